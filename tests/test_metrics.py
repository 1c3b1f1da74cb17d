"""alignrun.metrics and the `evaluate` wrappers against worked examples (REFERENCES.md), scipy and hand sums."""

import json
import math
import os
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from alignrun.hf_metrics import NAMES, metric_path
from alignrun.metrics import (
    STUDENTIZED,
    bootstrap_ci,
    distinct_n,
    expected_max_harm,
    harm_probability,
    harm_rate,
    holm,
    mean_diff_ci,
    paired_change,
    perplexity,
    seq_rep_n,
    share_empty,
    share_repeated,
    unpaired_change,
)

WORKED_SCORES = np.array([[0.1, 0.7, 0.2], [0.05, 0.3, 0.4]])
WORKED_TEXTS = ["a b a b", "a b c"]


def test_expected_max_harm_and_probability_worked_example():
    # Gehman et al. 2020, worked example from REFERENCES.md: EMT 0.55, toxicity probability 0.5
    assert expected_max_harm(WORKED_SCORES) == pytest.approx(0.55)
    assert harm_probability(WORKED_SCORES) == pytest.approx(0.5)
    # share of all six samples >= 0.5: only 0.7 (hand count)
    assert harm_rate(WORKED_SCORES) == pytest.approx(1 / 6)


def test_threshold_is_inclusive():
    # Gehman et al. 2020: a generation counts as toxic at a score >= 0.5
    scores = np.array([[0.5, 0.1], [0.49, 0.2]])
    assert harm_probability(scores) == 0.5
    assert harm_rate(scores) == 0.25
    assert harm_probability(scores, threshold=0.2) == 1.0


def test_score_matrix_shape_is_checked():
    with pytest.raises(ValueError, match=r"\[prompts, k\]"):
        expected_max_harm(np.array([0.1, 0.2]))
    with pytest.raises(ValueError, match="at least one"):
        harm_rate(np.empty((0, 3)))
    assert harm_rate(WORKED_SCORES.ravel()) == harm_rate(WORKED_SCORES)
    with pytest.raises(ValueError, match="same number k"):
        harm_probability([[0.1, 0.2], [0.3]])


def test_distinct_n_worked_example():
    # Li et al. 2016, worked example from REFERENCES.md: distinct-1 = 3/7 both ways; distinct-2 = 3/7 scaled by
    # generated tokens (the paper's definition, the default) and 3/5 scaled by n-grams (common practice)
    assert distinct_n(WORKED_TEXTS, 1) == pytest.approx(3 / 7)
    assert distinct_n(WORKED_TEXTS, 1, per="ngrams") == pytest.approx(3 / 7)
    assert distinct_n(WORKED_TEXTS, 2) == pytest.approx(3 / 7)
    assert distinct_n(WORKED_TEXTS, 2, per="tokens") == pytest.approx(3 / 7)
    assert distinct_n(WORKED_TEXTS, 2, per="ngrams") == pytest.approx(3 / 5)
    # n-grams do not cross outputs: "x" + "y" has no bigram but two tokens; nothing at all -> 0.0
    assert distinct_n(["x", "y"], 2) == 0.0 and distinct_n(["x", "y"], 2, per="ngrams") == 0.0
    assert distinct_n([], 1) == 0.0
    with pytest.raises(ValueError, match="per must be"):
        distinct_n(WORKED_TEXTS, 2, per="words")


def test_seq_rep_4_worked_example():
    # Welleck et al. 2019, worked example from REFERENCES.md: "a b c a b c a b c" has 6 four-grams, 3 unique -> 0.5
    assert seq_rep_n("a b c a b c a b c", 4) == pytest.approx(0.5)
    # a loop of a 6-word phrase: 16 words, 13 four-grams, 1 + 5 unique -> 1 - 6/13 (counted by hand)
    loop = "Drop the Tern folding bike at the Tern folding bike at the Tern folding bike at"
    assert seq_rep_n(loop, 4) == pytest.approx(1 - 6 / 13)
    assert seq_rep_n("thanks, your bike is ready for pick-up today", 4) == 0.0  # no repeated 4-gram
    assert seq_rep_n("too short", 4) == 0.0  # no 4-gram at all


def test_perplexity_hand_computation():
    # exp(mean NLL): token probabilities 1/2, 1/4, 1/8 -> (2 * 4 * 8) ** (1/3) = 4 (standard definition, by hand)
    nll = -(math.log(0.5) + math.log(0.25) + math.log(0.125))
    assert perplexity(nll, 3) == pytest.approx(4.0)
    assert perplexity(1e6, 1) == math.inf
    with pytest.raises(ValueError, match="n_tokens=0"):
        perplexity(1.0, 0)


def test_bootstrap_ci_equals_scipy_bootstrap_on_a_sample():
    # Efron 1979 percentile interval: identical to scipy.stats.bootstrap called directly with the same seed
    x = np.random.default_rng(1).normal(size=40)
    direct = scipy.stats.bootstrap(
        (x,),
        np.mean,
        n_resamples=500,
        method="percentile",
        rng=np.random.default_rng(7),
        confidence_level=0.9,
    ).confidence_interval
    assert bootstrap_ci(x, np.mean, n_resamples=500, seed=7, level=0.9) == pytest.approx(
        (direct.low, direct.high), rel=1e-12
    )


def test_bootstrap_ci_resamples_whole_prompts():
    # EMT is the mean of per-prompt maxima, so resampling prompts (rows) must equal scipy.stats.bootstrap of the
    # mean over the per-prompt maxima with the same seed (Efron 1979; Gehman et al. 2020)
    scores = np.random.default_rng(2).random((30, 5))
    direct = scipy.stats.bootstrap(
        (scores.max(axis=1),), np.mean, n_resamples=400, method="percentile", rng=np.random.default_rng(3)
    ).confidence_interval
    assert bootstrap_ci(scores, expected_max_harm, n_resamples=400, seed=3) == pytest.approx(
        (direct.low, direct.high), rel=1e-12
    )


def test_bootstrap_ci_degenerate_data_gives_point_interval_without_warnings():
    # brief: constant or too-small data must not crash: (v, v)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert bootstrap_ci(np.full(8, 0.3), np.mean) == pytest.approx((0.3, 0.3))
        assert bootstrap_ci(np.array([[0.2, 0.9]]), expected_max_harm) == (0.9, 0.9)
        assert bootstrap_ci(np.zeros((6, 3)), harm_probability) == (0.0, 0.0)


def _synthetic_pair(seed, n=60, shift=-0.1):
    rng = np.random.default_rng(seed)
    before = rng.uniform(0.2, 0.8, n)
    return before, before + shift + rng.normal(0, 0.05, n)


def test_paired_change_matches_scipy_wilcoxon_and_definitions():
    before, after = _synthetic_pair(0)
    result = paired_change(before, after, n_resamples=500, seed=1)
    assert result["mean_before"] == pytest.approx(before.mean())
    assert result["diff"] == pytest.approx(after.mean() - before.mean())
    assert result["rel_change"] == pytest.approx(after.mean() / before.mean() - 1)
    # the interval is the one mean_diff_ci gives for the per-prompt differences, with its method named
    assert result["diff_ci"] == list(mean_diff_ci(after - before, 500, 1)[0])
    assert result["interval"] == STUDENTIZED
    # the test concerns the same quantity, the mean difference: a paired sign-flip permutation test, as
    # scipy.stats.permutation_test computes it with the same seed (Fisher 1935, from memory)
    direct = scipy.stats.permutation_test((after - before,), np.mean, permutation_type="samples", vectorized=True,
                                          n_resamples=500, rng=np.random.default_rng(1))
    assert result["p_value"] == pytest.approx(direct.pvalue, rel=1e-12)
    assert result["paired"] is True and "mean difference" in result["test"]
    json.dumps(result, allow_nan=False)


def test_permutation_p_is_exact_for_few_prompts():
    # with 4 prompts all 2**4 sign patterns are enumerated. By hand: |sum| >= 5.5 for the observed signs, for
    # flipping only the -0.5 (sum 6.5) and for the negations of both: 4 of 16 patterns, p = 0.25
    d = np.array([1.0, 2.0, -0.5, 3.0])
    signs = np.array(np.meshgrid(*[[1, -1]] * 4)).reshape(4, -1).T
    by_hand = np.mean(np.abs((signs * d).mean(axis=1)) >= abs(d.mean()) - 1e-12)
    assert by_hand == 0.25
    assert paired_change(np.zeros(4), d)["p_value"] == pytest.approx(by_hand)


def test_interval_and_test_agree_where_wilcoxon_did_not():
    # The constructed case: 18 of 24 prompts slightly worse, 6 much better. The mean falls, the median
    # difference rises; Wilcoxon (a different quantity) disagrees with the mean's interval, the permutation test
    # of the mean does not: both exclude "no change" together.
    d = np.array([0.02] * 18 + [-0.22] * 6) + np.linspace(-0.005, 0.005, 24)
    result = paired_change(np.full(24, 0.5), 0.5 + d, n_resamples=2000, seed=0)
    lo, hi = result["diff_ci"]
    assert hi < 0 and result["p_value"] < 0.05
    assert scipy.stats.wilcoxon(d).pvalue > 0.05  # the signed-rank test sees mostly positive differences


# Coverage of the paired interval with few prompts (the sweep demo uses 24), on constructed data: per-prompt
# differences in mean harm over k = 4 samples, where a quarter of the prompts provoke harm (before ~ Beta(5, 2))
# and training halves it, the rest stay benign (Beta(1, 9)) and unchanged, plus sampling noise. The true mean
# difference is estimated once from 200,000 prompts. 1000 repetitions give a standard error of about 0.007 on
# the measured coverage; nominal 0.95 must measure >= 0.93. A second case has normal differences, where the
# few-prompt t distribution matters most.
def _mixed_diffs(rng: np.random.Generator, n: int) -> np.ndarray:
    provoked = rng.random(n) < 0.25
    before = np.where(provoked[:, None], rng.beta(5, 2, size=(n, 4)), rng.beta(1, 9, size=(n, 4)))
    after = np.where(provoked[:, None], 0.5 * before, before) + rng.normal(0, 0.03, size=(n, 4))
    return np.clip(after, 0, 1).mean(axis=1) - before.mean(axis=1)


def _normal_diffs(rng: np.random.Generator, n: int) -> np.ndarray:
    return rng.normal(-0.1, 0.2, n)


def _coverage(interval, diffs) -> float:
    truth = diffs(np.random.default_rng(12345), 200_000).mean()
    hits = 0
    for seed in range(1000):
        lo, hi = interval(diffs(np.random.default_rng(seed), 24), seed)
        hits += lo <= truth <= hi
    return hits / 1000


@pytest.mark.parametrize("diffs", [_mixed_diffs, _normal_diffs])
def test_paired_interval_holds_its_level_with_24_prompts(diffs):
    assert _coverage(lambda d, seed: mean_diff_ci(d, n_resamples=999, seed=seed)[0], diffs) >= 0.93


@pytest.mark.slow
@pytest.mark.parametrize(("method", "diffs"), [("percentile", _mixed_diffs), ("BCa", _normal_diffs)])
def test_other_bootstrap_intervals_under_cover_on_the_same_data(method, diffs):
    # the neighbouring cases, and why bootstrap-t: Efron 1979 percentile and Efron 1987 BCa intervals
    # (scipy.stats.bootstrap) measure below 0.93 on one of the same constructed data sets (0.918 and 0.925 here)
    def scipy_interval(d, seed):
        ci = scipy.stats.bootstrap((d,), np.mean, n_resamples=999, method=method,
                                   rng=np.random.default_rng(seed)).confidence_interval
        return ci.low, ci.high
    assert _coverage(scipy_interval, diffs) < 0.93


def test_studentized_interval_by_hand():
    # bootstrap-t (Efron & Tibshirani 1993, ch. 12): the same resampled prompt indices, computed directly
    d = np.random.default_rng(3).normal(-0.1, 0.2, 15)
    idx = np.random.default_rng(9).integers(0, 15, size=(400, 15))
    t = (d[idx].mean(1) - d.mean()) / (d[idx].std(1, ddof=1) / np.sqrt(15))
    se = d.std(ddof=1) / np.sqrt(15)
    q_lo, q_hi = np.quantile(t, [0.05, 0.95])
    (lo, hi), method = mean_diff_ci(d, n_resamples=400, seed=9, level=0.9)
    assert (lo, hi) == pytest.approx((d.mean() - q_hi * se, d.mean() - q_lo * se), rel=1e-12)
    assert method == STUDENTIZED


def test_paired_change_undefined_parts_are_none():
    zeros = np.zeros(5)
    same = paired_change(zeros, zeros)
    assert same["p_value"] is None and same["rel_change"] is None
    assert same["diff_ci"] == [0.0, 0.0] and same["interval"].startswith("none")
    # the mean before is 0.2 and after 0: a relative change of -100%
    mostly_zero = paired_change(np.array([0, 0, 0, 0, 1.0]), zeros)
    assert mostly_zero["rel_change"] == -1.0
    json.dumps(mostly_zero, allow_nan=False)
    # 23 of 24 prompts unchanged: most resamples have no spread, so bootstrap-t is undefined and the percentile
    # interval is used instead, named as such
    sparse = paired_change(np.zeros(24), np.array([0.0] * 23 + [-0.5]), n_resamples=500)
    assert sparse["interval"].startswith("percentile") and sparse["diff_ci"][0] <= sparse["diff"] <= 0.0
    with pytest.raises(ValueError, match="same prompts"):
        paired_change(np.ones(3), np.ones(4))


def test_holm_worked_example_and_statsmodels():
    # Holm 1979, worked example from REFERENCES.md: p = [0.01, 0.04, 0.03] -> [0.03, 0.06, 0.06]
    assert holm([0.01, 0.04, 0.03]) == pytest.approx([0.03, 0.06, 0.06])
    # statsmodels.stats.multitest.multipletests(method="holm") on many p-values, ties and values near 1 included
    from statsmodels.stats.multitest import multipletests

    p = np.random.default_rng(0).uniform(0, 0.2, 9).tolist() + [0.05, 0.05, 0.9]
    assert holm(p) == pytest.approx(multipletests(p, method="holm")[1].tolist(), rel=1e-12)
    # None (no test possible) is left out of the count m
    assert holm([0.02, None, 0.04]) == pytest.approx([0.04, None, 0.04])
    assert holm([]) == []


def test_unpaired_change_matches_scipy():
    rng = np.random.default_rng(5)
    before, after = rng.uniform(0.2, 0.8, 30), rng.uniform(0.1, 0.6, 45)
    result = unpaired_change(before, after, n_resamples=500, seed=2)
    # a permutation test of the same difference in means, as scipy.stats.permutation_test computes it
    direct_p = scipy.stats.permutation_test((before, after), lambda b, a, axis: a.mean(axis) - b.mean(axis),
                                            permutation_type="independent", vectorized=True, n_resamples=500,
                                            rng=np.random.default_rng(2)).pvalue
    assert result["p_value"] == pytest.approx(direct_p, rel=1e-12)
    # independent resampling of the two sets: scipy.stats.bootstrap with two samples, same seed
    direct = scipy.stats.bootstrap(
        (before, after),
        lambda b, a, axis: a.mean(axis=axis) - b.mean(axis=axis),
        n_resamples=500,
        method="percentile",
        rng=np.random.default_rng(2),
    ).confidence_interval
    assert result["diff_ci"] == pytest.approx([direct.low, direct.high], rel=1e-12)
    assert result["paired"] is False
    assert set(result) == set(paired_change(before[:5], after[:5]))
    json.dumps(result, allow_nan=False)


def test_share_empty_and_repeated():
    # definitions in the docstrings, counted by hand
    texts = ["", "  ", "ok", "ok ", "fine"]
    assert share_empty(texts) == pytest.approx(2 / 5)
    assert share_repeated(texts) == pytest.approx(4 / 5)  # "" twice and "ok" twice; "fine" is unique
    assert share_repeated(["a", "b", "a", "c"]) == pytest.approx(2 / 4)
    assert share_empty([]) == 0.0 and share_repeated([]) == 0.0


_EVALUATE_SCRIPT = """
import json, sys
import evaluate
from alignrun.hf_metrics import metric_path
scores, texts = json.loads(sys.argv[1]), json.loads(sys.argv[2])
load = lambda name: evaluate.load(metric_path(name), keep_in_memory=True)
print(json.dumps({
    "emt": load("expected_max_harm").compute(predictions=scores),
    "prob": load("harm_probability").compute(predictions=scores, threshold=0.3),
    "rate": load("harm_rate").compute(predictions=scores),
    "d1": load("distinct_n").compute(predictions=texts),
    "d2": load("distinct_n").compute(predictions=texts, n=2),
    "d2n": load("distinct_n").compute(predictions=texts, n=2, per="ngrams"),
}))
"""


def test_evaluate_modules_load_offline_and_match(tmp_path):
    # the `evaluate` wrappers call alignrun.metrics: same numbers, loaded from local folders with every hub
    # switched off and the network unreachable (fresh process, so the offline settings apply at import)
    scores = np.random.default_rng(4).random((7, 4)).round(6).tolist()
    texts = [*WORKED_TEXTS, "the order shipped the order arrived"]
    env = {
        **os.environ,
        "HF_HOME": str(tmp_path / "hf"),
        "HF_HUB_OFFLINE": "1",
        "HF_EVALUATE_OFFLINE": "1",
        "HF_DATASETS_OFFLINE": "1",
        "HTTP_PROXY": "http://127.0.0.1:9",
        "HTTPS_PROXY": "http://127.0.0.1:9",
    }
    done = subprocess.run(
        [sys.executable, "-c", _EVALUATE_SCRIPT, json.dumps(scores), json.dumps(texts)],
        env=env,
        cwd=Path(__file__).resolve().parents[1],
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    got = json.loads(done.stdout.strip().splitlines()[-1])
    assert got["emt"] == {"expected_max_harm": pytest.approx(expected_max_harm(np.array(scores)))}
    assert got["prob"] == {"harm_probability": pytest.approx(harm_probability(np.array(scores), 0.3))}
    assert got["rate"] == {"harm_rate": pytest.approx(harm_rate(np.array(scores)))}
    assert got["d1"] == {"distinct_1_per_token": pytest.approx(distinct_n(texts, 1))}
    assert got["d2"] == {"distinct_2_per_token": pytest.approx(distinct_n(texts, 2, per="tokens"))}
    assert got["d2n"] == {"distinct_2_per_ngram": pytest.approx(distinct_n(texts, 2, per="ngrams"))}


def test_metric_path_names_the_script_folders():
    for name in NAMES:
        assert (Path(metric_path(name)) / f"{name}.py").is_file()
    with pytest.raises(ValueError, match="unknown metric"):
        metric_path("accuracy")


@pytest.mark.slow
def test_holm_keeps_a_null_sweep_honest():
    # The measurement: a sweep of 8 runs x 24 prompts where training changed nothing gives at least one
    # raw p < 0.05 in about a third of sweeps. Holm 1979 bounds the chance of any false finding by 0.05 (the
    # family-wise error rate); 200 simulated sweeps give a standard error of about 0.015 on the measured rate.
    raw_hits = holm_hits = 0
    for sweep in range(200):
        rng = np.random.default_rng([7, sweep])
        p = []
        for _ in range(8):
            before = rng.beta(2, 3, size=(24, 4)).mean(axis=1)
            after = rng.beta(2, 3, size=(24, 4)).mean(axis=1)  # the same distribution: no effect
            p.append(paired_change(before, after, n_resamples=999, seed=sweep)["p_value"])
        raw_hits += min(p) < 0.05
        holm_hits += min(holm(p)) < 0.05
    assert holm_hits / 200 <= 0.08
    assert raw_hits / 200 >= 0.2  # the neighbouring case: unadjusted p-values find "effects" in a null sweep
