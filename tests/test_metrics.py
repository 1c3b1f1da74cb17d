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
from hypothesis import given, settings
from hypothesis import strategies as st

from alignrun.hf_metrics import NAMES, metric_path
from alignrun.metrics import (
    bootstrap_ci,
    distinct_n,
    expected_max_harm,
    harm_probability,
    harm_rate,
    paired_change,
    pareto_front,
    perplexity,
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
    # Li et al. 2016, worked example from REFERENCES.md: distinct-1 = 3/7, distinct-2 = 3/5
    assert distinct_n(WORKED_TEXTS, 1) == pytest.approx(3 / 7)
    assert distinct_n(WORKED_TEXTS, 2) == pytest.approx(3 / 5)
    # n-grams do not cross outputs: "x" + "y" has no bigram; no n-grams at all -> 0.0 (brief)
    assert distinct_n(["x", "y"], 2) == 0.0
    assert distinct_n([], 1) == 0.0


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
    # Wilcoxon 1945 signed-rank test, as computed by scipy.stats.wilcoxon
    assert result["wilcoxon_p"] == pytest.approx(scipy.stats.wilcoxon(before, after).pvalue, rel=1e-12)
    assert result["mean_before"] == pytest.approx(before.mean())
    assert result["diff"] == pytest.approx(after.mean() - before.mean())
    assert result["rel_change"] == pytest.approx(after.mean() / before.mean() - 1)
    # the paired diff CI is the bootstrap of the per-prompt differences (scipy.stats.bootstrap, same seed)
    direct = scipy.stats.bootstrap(
        (after - before,), np.mean, n_resamples=500, method="percentile", rng=np.random.default_rng(1)
    ).confidence_interval
    assert result["diff_ci"] == pytest.approx([direct.low, direct.high], rel=1e-12)
    lo, hi = result["rel_ci"]
    assert lo < result["rel_change"] < hi
    assert result["paired"] is True
    json.dumps(result, allow_nan=False)


def test_paired_change_ci_brackets_the_true_difference():
    # Efron 1979: a 95% interval should contain the true mean shift (-0.1 by construction) in most repetitions;
    # for 40 repetitions at a true coverage >= 0.9, P(more than 8 misses) < 0.05 (binomial tail)
    misses = 0
    for seed in range(40):
        before, after = _synthetic_pair(seed)
        lo, hi = paired_change(before, after, n_resamples=500, seed=seed)["diff_ci"]
        misses += not lo <= -0.1 <= hi
    assert misses <= 8
    assert scipy.stats.binom.sf(8, 40, 0.1) < 0.05


def test_paired_change_undefined_parts_are_none():
    zeros = np.zeros(5)
    same = paired_change(zeros, zeros)
    assert same["wilcoxon_p"] is None and same["rel_change"] is None and same["rel_ci"] is None
    assert same["diff_ci"] == [0.0, 0.0]
    # the mean before is 0.2, but many resamples have a zero denominator: the ratio interval is undefined
    mostly_zero = paired_change(np.array([0, 0, 0, 0, 1.0]), zeros)
    assert mostly_zero["rel_change"] == -1.0 and mostly_zero["rel_ci"] is None
    json.dumps(mostly_zero, allow_nan=False)
    with pytest.raises(ValueError, match="same prompts"):
        paired_change(np.ones(3), np.ones(4))


def test_unpaired_change_matches_scipy():
    rng = np.random.default_rng(5)
    before, after = rng.uniform(0.2, 0.8, 30), rng.uniform(0.1, 0.6, 45)
    result = unpaired_change(before, after, n_resamples=500, seed=2)
    # Mann & Whitney 1947 rank-sum test, as computed by scipy.stats.mannwhitneyu (two-sided)
    assert result["mannwhitney_p"] == pytest.approx(scipy.stats.mannwhitneyu(after, before).pvalue, rel=1e-12)
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
    paired_keys = set(paired_change(before[:5], after[:5])) - {"wilcoxon_p"}
    assert set(result) - {"mannwhitney_p"} == paired_keys
    json.dumps(result, allow_nan=False)


def test_pareto_front_hand_example():
    # Pareto dominance, hand example: B (0.4, 0.2) is dominated by A (0.5, 0.1); D duplicates C, and equal points
    # do not dominate each other; E has the lowest drift
    reduction = [0.5, 0.4, 0.6, 0.6, 0.1]
    drift = [0.1, 0.2, 0.3, 0.3, 0.05]
    assert pareto_front(reduction, drift) == [True, False, True, True, True]
    assert pareto_front([], []) == []
    with pytest.raises(ValueError, match="equal-length"):
        pareto_front([0.1], [0.1, 0.2])


def _dominates(i, j, red, dri):
    return red[i] >= red[j] and dri[i] <= dri[j] and (red[i] > red[j] or dri[i] < dri[j])


@settings(deadline=None, max_examples=200)
@given(st.lists(st.tuples(st.integers(0, 5), st.integers(0, 5)), min_size=1, max_size=12))
def test_pareto_front_invariants(points):
    # Pareto dominance: front points do not dominate each other, every other point is dominated by a front point,
    # and the best reduction with the least drift among those is always on the front
    red, dri = [p[0] / 5 for p in points], [p[1] / 5 for p in points]
    front = pareto_front(red, dri)
    on = [i for i, f in enumerate(front) if f]
    assert not any(_dominates(i, j, red, dri) for i in on for j in on)
    assert all(any(_dominates(i, j, red, dri) for i in on) for j in range(len(points)) if not front[j])
    best = min(range(len(points)), key=lambda i: (-red[i], dri[i]))
    assert front[best]


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
    assert got["d1"] == {"distinct_1": pytest.approx(distinct_n(texts, 1))}
    assert got["d2"] == {"distinct_2": pytest.approx(distinct_n(texts, 2))}


def test_metric_path_names_the_script_folders():
    for name in NAMES:
        assert (Path(metric_path(name)) / f"{name}.py").is_file()
    with pytest.raises(ValueError, match="unknown metric"):
        metric_path("accuracy")
