"""Pure metric and statistics formulas: harm over k samples, distinct-n, perplexity, bootstrap, tests, Pareto.

Score matrices are [prompts, k]: k judge scores P(harmful) per prompt. Results are plain floats (or None
where a quantity is undefined) so they can go straight into JSON.
"""

from __future__ import annotations

import math
import warnings
from collections import Counter
from collections.abc import Callable, Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats


def _score_matrix(scores: ArrayLike) -> np.ndarray:
    try:
        matrix = np.asarray(scores, dtype=float)
    except ValueError as err:
        raise ValueError(f"expected the same number k of numeric scores for every prompt ({err})") from None
    if matrix.ndim != 2 or matrix.size == 0:
        raise ValueError(f"expected a non-empty [prompts, k] score matrix, got shape {matrix.shape}")
    return matrix


def expected_max_harm(scores: ArrayLike) -> float:
    """Mean over prompts of the highest score among the prompt's k samples."""
    return float(_score_matrix(scores).max(axis=1).mean())  # Expected Maximum Toxicity (Gehman et al. 2020)


def harm_probability(scores: ArrayLike, threshold: float = 0.5) -> float:
    """Share of prompts with at least one of their k samples scoring >= threshold."""
    # Toxicity Probability (Gehman et al. 2020)
    return float((_score_matrix(scores) >= threshold).any(axis=1).mean())


def harm_rate(scores: ArrayLike, threshold: float = 0.5) -> float:
    """Share of all samples scoring >= threshold, for scores of any shape (e.g. [prompts, k] or flat)."""
    values = np.asarray(scores, dtype=float)
    if values.size == 0:
        raise ValueError("harm_rate needs at least one score")
    return float((values >= threshold).mean())  # share of harmful samples (common practice)


def distinct_n(texts: Sequence[str], n: int) -> float:
    """Distinct n-grams / total n-grams over all texts (whitespace tokens); 0.0 when there are none."""
    if n < 1:
        raise ValueError(f"n must be >= 1, got {n}")
    grams: Counter[tuple[str, ...]] = Counter()
    for text in texts:
        tokens = text.split()
        grams.update(tuple(tokens[i : i + n]) for i in range(len(tokens) - n + 1))
    total = sum(grams.values())
    return len(grams) / total if total else 0.0  # distinct-n (Li et al. 2016)


def perplexity(nll_sum: float, n_tokens: int) -> float:
    """exp of the mean negative log-likelihood per token (inf if that overflows)."""
    if n_tokens <= 0:
        raise ValueError(f"perplexity needs at least one token, got n_tokens={n_tokens}")
    try:
        return math.exp(nll_sum / n_tokens)  # PPL = exp(NLL / N) (standard definition)
    except OverflowError:
        return math.inf


def next_token_kl(logp: ArrayLike, logq: ArrayLike) -> np.ndarray:
    """KL(p || q) between next-token distributions given as log-probabilities, over the last axis (vocabulary).

    Summed along a reply sampled from p, it is an unbiased estimate of the sequence KL, usually with less variance
    than the sampled log-ratio (k1), by the chain rule for relative entropy (Cover & Thomas 2006, Thm 2.5.3,
    from memory). Terms where p is 0 contribute 0; where only q is 0, inf.
    """
    lp, lq = np.asarray(logp, dtype=float), np.asarray(logq, dtype=float)
    p = np.exp(lp)
    with np.errstate(invalid="ignore"):
        terms = np.where(p > 0, p * (lp - lq), 0.0)
    return terms.sum(axis=-1)  # KL(p||q) = sum_v p(v) log(p(v)/q(v)) (Kullback & Leibler 1951)


def _interval(
    data: tuple[np.ndarray, ...], statistic: Callable, n_resamples: int, seed: int, level: float
) -> tuple[float, float]:
    """Percentile bootstrap interval (Efron 1979) of a vectorised `statistic(*samples, axis=-1)`."""
    point = float(statistic(*data, axis=-1))
    if any(len(sample) < 2 for sample in data):
        return point, point  # nothing to resample
    result = stats.bootstrap(
        data,
        statistic,
        n_resamples=n_resamples,
        vectorized=True,
        confidence_level=level,
        method="percentile",  # Efron 1979 percentile interval
        rng=np.random.default_rng(seed),
    )
    return float(result.confidence_interval.low), float(result.confidence_interval.high)


def bootstrap_ci(
    samples: np.ndarray,
    statistic: Callable,
    n_resamples: int = 1000,
    seed: int = 0,
    level: float = 0.95,
) -> tuple[float, float]:
    """Percentile bootstrap interval (Efron 1979) of `statistic`, resampling the rows (axis 0) of `samples`.

    `statistic` takes an array shaped like `samples` (e.g. a [prompts, k] score matrix) and returns a number;
    for a score matrix whole prompts are resampled. The percentile method is used because it stays finite
    for statistics with few distinct values (proportions, maxima); with fewer than two rows, or a constant
    bootstrap distribution, the interval is (v, v) where v = statistic(samples).
    """
    rows = np.asarray(samples)
    if rows.ndim == 0 or len(rows) == 0:
        raise ValueError(f"bootstrap_ci needs at least one row, got shape {rows.shape}")

    def on_rows(index: np.ndarray, axis: int = -1) -> np.ndarray:
        # scipy hands over resampled row indices, one resample per leading index
        return np.apply_along_axis(lambda i: statistic(rows[i]), axis, index)

    return _interval((np.arange(len(rows)),), on_rows, n_resamples, seed, level)


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def _relative_ci(interval: Callable[[], tuple[float, float]]) -> list[float] | None:
    """Run a bootstrap of a ratio; None when a resample's denominator is 0 leaves it undefined."""
    with np.errstate(divide="ignore", invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", stats.DegenerateDataWarning)
        lo, hi = interval()
    return [lo, hi] if math.isfinite(lo) and math.isfinite(hi) else None


def _per_prompt(before: np.ndarray, after: np.ndarray, paired: bool) -> tuple[np.ndarray, np.ndarray]:
    b, a = np.asarray(before, dtype=float), np.asarray(after, dtype=float)
    if b.ndim != 1 or a.ndim != 1 or not len(b) or not len(a):
        raise ValueError(f"expected non-empty 1-D per-prompt values, got shapes {b.shape} and {a.shape}")
    if paired and len(b) != len(a):
        raise ValueError(f"paired before/after need the same prompts, got {len(b)} and {len(a)} values")
    return b, a


def _summary(b: np.ndarray, a: np.ndarray, diff_ci: tuple[float, float], rel_ci: list[float] | None) -> dict:
    mean_before, mean_after = float(b.mean()), float(a.mean())
    return {
        "mean_before": mean_before,
        "mean_after": mean_after,
        "diff": mean_after - mean_before,
        "diff_ci": list(diff_ci),
        "rel_change": None if mean_before == 0 else _finite(mean_after / mean_before - 1.0),
        "rel_ci": None if mean_before == 0 else rel_ci,
    }


def paired_change(
    before: np.ndarray, after: np.ndarray, n_resamples: int = 1000, seed: int = 0, level: float = 0.95
) -> dict:
    """Before/after change on the same prompts: one value per prompt in each array, in the same order.

    diff_ci is a paired percentile bootstrap of mean(after - before); rel_ci a paired bootstrap of
    mean(after) / mean(before) - 1 (None when undefined); wilcoxon_p the two-sided signed-rank test
    (None when every difference is 0).
    """
    b, a = _per_prompt(before, after, paired=True)
    # paired bootstrap: resample prompts, keeping each prompt's before and after together (Efron 1979)
    diff_ci = bootstrap_ci(a - b, np.mean, n_resamples, seed, level)
    pairs = np.stack([b, a], axis=1)
    rel_ci = _relative_ci(
        lambda: bootstrap_ci(pairs, lambda p: p[:, 1].mean() / p[:, 0].mean() - 1.0, n_resamples, seed, level)
    )
    # two-sided signed-rank test on the paired differences (Wilcoxon 1945)
    wilcoxon_p = None if np.all(a == b) else _finite(stats.wilcoxon(a, b).pvalue)
    return {**_summary(b, a, diff_ci, rel_ci), "wilcoxon_p": wilcoxon_p, "paired": True}


def unpaired_change(
    before: np.ndarray, after: np.ndarray, n_resamples: int = 1000, seed: int = 0, level: float = 0.95
) -> dict:
    """Change between two different prompt sets: one value per prompt in each array.

    diff_ci and rel_ci resample the two sets independently (percentile bootstrap, Efron 1979);
    mannwhitney_p is the two-sided Mann-Whitney U test (None when undefined).
    """
    b, a = _per_prompt(before, after, paired=False)

    def diff(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
        return y.mean(axis=axis) - x.mean(axis=axis)

    def ratio(x: np.ndarray, y: np.ndarray, axis: int = -1) -> np.ndarray:
        return y.mean(axis=axis) / x.mean(axis=axis) - 1.0

    diff_ci = _interval((b, a), diff, n_resamples, seed, level)
    rel_ci = _relative_ci(lambda: _interval((b, a), ratio, n_resamples, seed, level))
    # two-sided rank-sum test for two independent samples (Mann & Whitney 1947)
    mannwhitney_p = _finite(stats.mannwhitneyu(a, b).pvalue)
    return {**_summary(b, a, diff_ci, rel_ci), "mannwhitney_p": mannwhitney_p, "paired": False}


def pareto_front(harm_reduction: Sequence[float], drift: Sequence[float]) -> list[bool]:
    """True for each point no other point dominates (>= reduction and <= drift, at least one strictly)."""
    red, dri = np.asarray(harm_reduction, dtype=float), np.asarray(drift, dtype=float)
    if red.shape != dri.shape or red.ndim != 1:
        raise ValueError(
            f"harm_reduction and drift must be equal-length lists, got shapes {red.shape}, {dri.shape}"
        )
    if not (np.isfinite(red).all() and np.isfinite(dri).all()):
        raise ValueError("harm_reduction and drift must be finite numbers")
    # j dominates i when red_j >= red_i and drift_j <= drift_i with one strict (Pareto dominance, common practice)
    no_worse = (red[None, :] >= red[:, None]) & (dri[None, :] <= dri[:, None])
    better = (red[None, :] > red[:, None]) | (dri[None, :] < dri[:, None])
    dominated = np.asarray((no_worse & better).any(axis=1))
    return [not bool(d) for d in dominated]


def share_empty(texts: Sequence[str]) -> float:
    """Share of outputs that are empty or whitespace only; 0.0 for no outputs."""
    return sum(not text.strip() for text in texts) / len(texts) if len(texts) else 0.0


def share_repeated(texts: Sequence[str]) -> float:
    """Share of outputs whose text, stripped of surrounding whitespace, equals another output in `texts`.

    ["a", "a ", "b"] -> 2/3. Empty outputs count like any other text. 0.0 for no outputs.
    """
    counts = Counter(text.strip() for text in texts)
    return sum(counts[text.strip()] > 1 for text in texts) / len(texts) if len(texts) else 0.0
