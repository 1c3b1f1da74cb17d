"""Reward backends: loading errors, label resolution, probabilities, combine rules and transforms."""

from __future__ import annotations

import math
import shutil
import sys
import types

import joblib
import numpy as np
import pytest
import torch
from scipy.special import expit, softmax

from alignrun.config import RewardSection, ScorerSection
from alignrun.errors import UserError
from alignrun.preflight import load_probes
from alignrun.reward import Scores, combine, describe_transform, load_scorer, reward_from_scores
from tests import tiny_classifiers as tc

PROFANITY = "profanity_check.profanity_check:vectorizer,model"
TEXTS = ["you are such a clueless fool", "thanks for the lovely summary", "the office opens at ten", "shut up"]


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    with tc.one_torch_thread():
        yield


@pytest.fixture(scope="session")
def roots(tmp_path_factory):
    return tmp_path_factory.mktemp("classifiers")


@pytest.fixture(scope="session")
def bert(roots):
    return tc.shared_classifier("bert", roots)


@pytest.fixture(scope="session")
def roberta(roots):
    return tc.shared_classifier("roberta", roots)


@pytest.fixture(scope="session")
def multilabel(roots):
    return tc.shared_classifier("multilabel", roots)


@pytest.fixture
def fake_module(monkeypatch):
    """An importable module `fake_scorers` whose attributes the test sets."""
    module = types.ModuleType("fake_scorers")
    monkeypatch.setitem(sys.modules, "fake_scorers", module)
    return module


def _error(section: ScorerSection, key: str = "reward") -> str:
    with pytest.raises(UserError) as info:
        load_scorer(section, key)
    return str(info.value)


def _hf(source, **kw) -> ScorerSection:
    return ScorerSection(source=str(source), **kw)


# ------------------------------------------------------------------------------------ hf errors


def test_unknown_label_lists_the_available_ones(bert):
    msg = _error(_hf(bert, harmful_labels=["toxic"]))
    assert "reward.harmful_labels" in msg and "'toxic'" in msg
    assert "'friendly', 'hostile'" in msg


def test_missing_folder_names_the_key_and_the_path(tmp_path):
    missing = tmp_path / "no-such-classifier"
    msg = _error(_hf(missing, harmful_labels=["hostile"]), key="evaluation.judge")
    assert "evaluation.judge.source" in msg and str(missing) in msg and "does not exist" in msg


def test_seq2seq_folder_is_not_a_sequence_classifier(tmp_path):
    folder = tc.tiny_seq2seq(tmp_path / "t5")
    msg = _error(_hf(folder, harmful_labels=["hostile"]))
    assert "T5ForConditionalGeneration" in msg and "not a sequence classifier" in msg and "reward.source" in msg


def test_folder_without_tokenizer(bert, tmp_path):
    folder = shutil.copytree(bert, tmp_path / "no-tokenizer")
    for name in ("tokenizer.json", "tokenizer_config.json", "special_tokens_map.json"):
        (folder / name).unlink(missing_ok=True)
    msg = _error(_hf(folder, harmful_labels=["hostile"]))
    assert "no tokenizer" in msg and "save_pretrained" in msg


def test_folder_without_config(bert, tmp_path):
    folder = shutil.copytree(bert, tmp_path / "no-config")
    (folder / "config.json").unlink()
    assert "no config.json" in _error(_hf(folder, harmful_labels=["hostile"]))


def test_folder_with_broken_config(bert, tmp_path):
    folder = shutil.copytree(bert, tmp_path / "broken")
    (folder / "config.json").write_text("{not json")
    msg = _error(_hf(folder, harmful_labels=["hostile"]))
    assert "could not read" in msg and str(folder / "config.json") in msg


def test_index_refused_when_the_model_names_its_labels(bert):
    msg = _error(_hf(bert, harmful_index=1))
    assert "reward.harmful_index = 1" in msg and 'reward.harmful_labels = ["hostile"]' in msg


def test_no_harmful_class_set_is_refused(bert):
    assert "set reward.harmful_labels" in _error(_hf(bert))


def test_softmax_head_with_every_class_harmful_is_refused(bert):
    assert "nothing counts as benign" in _error(_hf(bert, harmful_labels=["friendly", "hostile"]))


def test_index_accepted_without_names(bert, tmp_path):
    unnamed = tc.relabel(bert, tmp_path / "unnamed", ["LABEL_0", "LABEL_1"])
    by_index = load_scorer(_hf(unnamed, harmful_index=1), "reward").score(TEXTS)
    by_name = load_scorer(_hf(bert, harmful_labels=["hostile"]), "reward").score(TEXTS)
    np.testing.assert_allclose(by_index.harm, by_name.harm, rtol=1e-6)
    msg = _error(_hf(unnamed, harmful_labels=["hostile"]))
    assert "LABEL_0" in msg and "harmful_index" in msg


# ------------------------------------------------------------------------------ hf probabilities


def _manual_logits(folder, texts):
    from transformers import AutoModelForSequenceClassification, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(folder)
    model = AutoModelForSequenceClassification.from_pretrained(folder).eval()
    with torch.no_grad():
        return np.stack([model(**{k: v for k, v in tok(t, return_tensors="pt").items() if k != "token_type_ids"})
                         .logits[0].numpy() for t in texts])


def test_softmax_head_matches_unbatched_forward(roberta):
    # One text at a time (no padding) vs batched with padding: the attention mask must hide the padding.
    scorer = load_scorer(_hf(roberta, harmful_labels=["toxic"], batch_size=3), "reward")
    scores = scorer.score(TEXTS)
    expected = softmax(_manual_logits(roberta, TEXTS), axis=1)[:, 1]  # scipy softmax as the reference
    np.testing.assert_allclose(scores.harm, expected, rtol=1e-4, atol=1e-6)
    assert scores.labels == ["neutral", "toxic"] and scores.raw_kind == "softmax-logits"
    assert not scorer.executes_code


def test_multilabel_head_uses_sigmoid_per_label(multilabel):
    scores = load_scorer(_hf(multilabel, harmful_labels=["hostile"]), "reward").score(TEXTS)
    expected = expit(_manual_logits(multilabel, TEXTS))  # scipy expit as the reference
    np.testing.assert_allclose(scores.class_probabilities(), expected, rtol=1e-4, atol=1e-6)
    np.testing.assert_allclose(scores.harm, expected[:, 1], rtol=1e-4, atol=1e-6)


def test_truncation_uses_the_model_limit_not_the_tokenizer_sentinel(roberta):
    # The tiny tokenizer reports the ~1e30 "no limit" sentinel. RoBERTa numbers positions from
    # pad_token_id + 1 (transformers' create_position_ids_from_input_ids), so 66 slots with pad id 0 hold 65
    # tokens: 65 runs and 66 overflows when fed to the model directly.
    scorer = load_scorer(_hf(roberta, harmful_labels=["toxic"]), "reward")
    assert scorer.tokenizer.model_max_length > 10**6
    assert scorer.max_length == 65
    ids = torch.full((1, 66), 5)
    scorer.model(input_ids=ids[:, :65])
    with pytest.raises((IndexError, RuntimeError)):
        scorer.model(input_ids=ids)
    long_text = " ".join(["thanks for the lovely summary"] * 60)
    assert scorer.score([long_text]).harm.shape == (1,)
    assert load_scorer(_hf(roberta, harmful_labels=["toxic"], max_length=8), "reward").max_length == 8
    msg = _error(_hf(roberta, harmful_labels=["toxic"], max_length=66))
    assert "reward.max_length = 66" in msg and "at most 65 tokens" in msg


# ------------------------------------------------------------------------------------- sklearn


def test_profanity_pipeline_matches_the_package(tmp_path):
    # alt-profanity-check's own predict_prob is the outside reference.
    from profanity_check import predict_prob
    from profanity_check import profanity_check as pc
    from sklearn.pipeline import make_pipeline

    expected = predict_prob(TEXTS)
    scorer = load_scorer(ScorerSection(backend="sklearn", source=PROFANITY, harmful_labels=["1"]), "reward")
    assert scorer.executes_code
    np.testing.assert_allclose(scorer.score(TEXTS).harm, expected, rtol=1e-12)
    path = tmp_path / "judge.joblib"
    joblib.dump(make_pipeline(pc.vectorizer, pc.model), path)
    from_file = load_scorer(ScorerSection(backend="sklearn", source=str(path), harmful_labels=["1"]), "reward")
    np.testing.assert_allclose(from_file.score(TEXTS).harm, expected, rtol=1e-12)


def test_sklearn_errors(tmp_path):
    msg = _error(ScorerSection(backend="sklearn", source=PROFANITY, harmful_labels=["2"]))
    assert "'2'" in msg and "['0', '1']" in msg
    msg = _error(ScorerSection(backend="sklearn", source=PROFANITY, harmful_index=1))
    assert 'reward.harmful_labels = ["1"]' in msg
    msg = _error(ScorerSection(backend="sklearn", source=str(tmp_path / "gone.joblib"), harmful_labels=["1"]))
    assert "gone.joblib" in msg and "does not exist" in msg
    msg = _error(ScorerSection(backend="sklearn", source="profanity_check.profanity_check:vectorizer",
                               harmful_labels=["1"]))
    assert "no predict_proba" in msg
    msg = _error(ScorerSection(backend="sklearn", source="profanity_check.profanity_check:model", harmful_labels=["1"]))
    assert "failed on a plain text" in msg and "vectorizer,model" in msg
    msg = _error(ScorerSection(backend="sklearn", source="no_such_module_here:thing", harmful_labels=["1"]))
    assert "cannot import module 'no_such_module_here'" in msg


def test_combine_several_harmful_labels(fake_module):
    table = {"a": [0.1, 0.2, 0.7], "b": [0.5, 0.4, 0.1]}

    class Fixed:
        classes_ = np.array(["calm", "rude", "mean"])

        def predict_proba(self, texts):
            return np.array([table.get(t, [1.0, 0.0, 0.0]) for t in texts])

    fake_module.fixed = Fixed()
    for how, expected in [("max", [0.7, 0.4]),  # max(0.2, 0.7), max(0.4, 0.1): by hand
                          ("noisy-or", [1 - 0.8 * 0.3, 1 - 0.6 * 0.9])]:  # 1 - prod(1 - p): by hand
        section = ScorerSection(backend="sklearn", source="fake_scorers:fixed", harmful_labels=["rude", "mean"],
                                combine=how)
        np.testing.assert_allclose(load_scorer(section, "reward").score(["a", "b"]).harm, expected, rtol=1e-12)


def test_combine_by_hand():
    probs = np.array([[0.2, 0.5], [0.9, 0.1], [0.0, 0.0]])
    np.testing.assert_allclose(combine(probs, "max"), [0.5, 0.9, 0.0])
    np.testing.assert_allclose(combine(probs, "noisy-or"), [1 - 0.8 * 0.5, 1 - 0.1 * 0.9, 0.0])


# ------------------------------------------------------------------------------------ callable


@pytest.mark.parametrize("returned, problem", [
    (lambda texts: np.full(len(texts) + 1, 0.5), "shape (5,) for 4 texts"),
    (lambda texts: np.full((len(texts), 2, 1), 0.5), "shape (4, 2, 1)"),
    (lambda texts: np.array([0.1, np.nan, 0.2, 0.3]), "NaN"),
    (lambda texts: np.array([0.1, 1.5, 0.2, 0.3]), "values in [0.1, 1.5]"),
    (lambda texts: ["high"] * len(texts), "not an array of numbers"),
])
def test_callable_returning_the_wrong_thing(fake_module, returned, problem):
    fake_module.score = returned
    scorer = load_scorer(ScorerSection(backend="callable", source="fake_scorers:score"), "reward")
    assert scorer.executes_code
    with pytest.raises(UserError) as info:
        scorer.score(TEXTS)
    msg = str(info.value)
    assert problem in msg and "fake_scorers:score" in msg and "expected [4] harm probabilities" in msg


def test_callable_that_raises_names_the_callable(fake_module):
    def broken(texts):
        raise RuntimeError("lookup table missing")

    fake_module.score = broken
    scorer = load_scorer(ScorerSection(backend="callable", source="fake_scorers:score"), "reward")
    with pytest.raises(UserError, match=r"reward.source = 'fake_scorers:score': the function raised RuntimeError: "
                                        "lookup table missing"):
        scorer.score(TEXTS)


def test_callable_class_probabilities_need_an_index(fake_module):
    fake_module.score = lambda texts: np.tile([0.3, 0.7], (len(texts), 1))
    unset = load_scorer(ScorerSection(backend="callable", source="fake_scorers:score"), "reward")
    with pytest.raises(UserError, match="set reward.harmful_index"):
        unset.score(TEXTS)
    indexed = load_scorer(ScorerSection(backend="callable", source="fake_scorers:score", harmful_index=1), "reward")
    np.testing.assert_allclose(indexed.score(TEXTS).harm, 0.7)
    assert "no label names" in _error(ScorerSection(backend="callable", source="fake_scorers:score",
                                                    harmful_labels=["bad"]))
    fake_module.score = lambda texts: np.full(len(texts), 0.2)
    one_column = load_scorer(ScorerSection(backend="callable", source="fake_scorers:score", harmful_index=1), "reward")
    with pytest.raises(UserError, match="harmful_index must not be set"):
        one_column.score(TEXTS)
    fake_module.value = 3
    assert "not a function" in _error(ScorerSection(backend="callable", source="fake_scorers:value"))
    assert "has no attribute 'nothing'" in _error(ScorerSection(backend="callable", source="fake_scorers:nothing"))
    assert "expected module:function" in _error(ScorerSection(backend="callable", source="fake_scorers"))


# ---------------------------------------------------------------------------------- transforms

HARM = np.array([0.1, 0.5, 0.9, 0.0])


def _scores(harm=HARM) -> Scores:
    return Scores(harm=harm, raw=np.stack([1 - harm, harm], axis=1), labels=["ok", "bad"], harmful=[1])


def _reward(scores, **kw) -> np.ndarray:
    return reward_from_scores(scores, RewardSection(source="x", harmful_labels=["bad"], **kw))


def test_neg_harm_scale_shift_clip_by_hand():
    np.testing.assert_allclose(_reward(_scores()), [-0.1, -0.5, -0.9, 0.0])
    # 2 * (-p) + 0.5, then clipped to [-1, 1]: by hand
    np.testing.assert_allclose(_reward(_scores(), scale=2.0, shift=0.5, clip=1.0), [0.3, -0.5, -1.0, 0.5])


def test_log_odds_by_hand():
    # log((1 - p) / p), with p = 0 clipped to 1e-6: by hand with math.log
    expected = [math.log(0.9 / 0.1), 0.0, math.log(0.1 / 0.9), math.log((1 - 1e-6) / 1e-6)]
    np.testing.assert_allclose(_reward(_scores(), transform="log-odds"), expected, rtol=1e-9)
    # probability-only backends: logit-margin falls back to the same log-odds
    np.testing.assert_allclose(_reward(_scores(), transform="logit-margin"), expected, rtol=1e-9)


def test_logit_margin_on_softmax_logits_by_hand():
    raw = np.array([[2.0, 0.5, 1.0], [-1.0, 3.0, 0.0]])
    scores = Scores(harm=softmax(raw, axis=1)[:, 1], raw=raw, labels=["a", "bad", "c"], harmful=[1],
                    raw_kind="softmax-logits")
    # logsumexp over the benign logits minus the harmful logit, by hand with math.exp / math.log
    expected = [math.log(math.exp(2.0) + math.exp(1.0)) - 0.5, math.log(math.exp(-1.0) + math.exp(0.0)) - 3.0]
    np.testing.assert_allclose(_reward(scores, transform="logit-margin"), expected, rtol=1e-12)
    # on a two-class head it equals log((1 - p) / p) exactly (softmax identity)
    two = Scores(harm=softmax(raw[:, :2], axis=1)[:, 1], raw=raw[:, :2], labels=["a", "bad"], harmful=[1],
                 raw_kind="softmax-logits")
    np.testing.assert_allclose(_reward(two, transform="logit-margin"), _reward(two, transform="log-odds"), rtol=1e-9)


def test_describe_transform():
    section = RewardSection(source="x", harmful_labels=["hostile"], clip=5.0)
    assert describe_transform(section) == "reward = 1.0 * (-P(hostile)) + 0.0, clipped to [-5, 5]"
    many = RewardSection(source="x", harmful_labels=["a", "b"], combine="noisy-or", scale=2.0, shift=-1.0)
    assert describe_transform(many) == "reward = 2.0 * (-1 - (1 - P(a)) * (1 - P(b))) + -1.0"
    fallback = RewardSection(backend="sklearn", source="m:a,b", harmful_labels=["1"], transform="logit-margin")
    assert "falls back to log-odds" in describe_transform(fallback)
    hf = RewardSection(source="x", harmful_labels=["hostile"], transform="logit-margin")
    assert "logsumexp of benign-class logits - logsumexp of harmful-class logits" in describe_transform(hf)


# ------------------------------------------------------------------------------------- probes


@pytest.mark.parametrize("row, expected", [
    ('{"text": "fine", "harmful": "yes"}', "'harmful' is 'yes'"),
    ('{"text": "", "harmful": true}', "'text' is ''"),
    ('{"harmful": true}', "'text' is None"),
    ('["fine", true]', "found list"),
    ('{"text": "fine", "harmful": true', "not valid JSON"),
])
def test_malformed_probe_file_names_the_row(tmp_path, row, expected):
    path = tmp_path / "extra.jsonl"
    path.write_text('{"text": "a calm line", "harmful": false}\n\n' + row + "\n")
    with pytest.raises(UserError) as info:
        load_probes([str(path)])
    msg = str(info.value)
    assert f"{path}: row 3" in msg and expected in msg and '"harmful": true' in msg


def test_missing_or_empty_probe_file(tmp_path):
    with pytest.raises(UserError, match="does not exist"):
        load_probes([str(tmp_path / "none.jsonl")])
    (tmp_path / "empty.jsonl").write_text("\n")
    with pytest.raises(UserError, match="no probe rows"):
        load_probes([str(tmp_path / "empty.jsonl")])


# ------------------------------------------------------------------------- how heads are read


@pytest.fixture(scope="module")
def one_output(bert, tmp_path_factory):
    """The bert classifier collapsed to one output (logit of harm) under each problem_type."""
    root = tmp_path_factory.mktemp("one-output")
    return {str(p): tc.single_output_classifier(bert, root / str(p), p)
            for p in ("regression", None, "multi_label_classification")}


@pytest.mark.parametrize("problem_type", ["regression", "None"])
def test_a_regression_head_is_not_silently_read_as_a_sigmoid(one_output, problem_type):
    msg = _error(_hf(one_output[problem_type], harmful_labels=["hostile"]))
    assert "single output" in msg and "regression" in msg and "not P(harmful)" in msg
    assert 'reward.single_output = "logit"' in msg and 'reward.single_output = "probability"' in msg


def test_a_one_output_head_read_as_stated_matches_the_two_class_softmax(bert, one_output):
    # sigmoid(a - b) = softmax([b, a])[1]: the one-output copy must give the source's P(harm) (scipy as reference).
    expected = softmax(_manual_logits(bert, TEXTS), axis=1)[:, 1]
    sigmoid_head = load_scorer(_hf(one_output["multi_label_classification"], harmful_labels=["hostile"]), "reward")
    assert "multi-label head" in sigmoid_head.head and "sigmoid logit" in sigmoid_head.head
    np.testing.assert_allclose(sigmoid_head.score(TEXTS).harm, expected, atol=1e-6)
    stated = load_scorer(_hf(one_output["regression"], harmful_labels=["hostile"], single_output="logit"), "reward")
    assert "regression" in stated.head and "sigmoid(output)" in stated.head and "single_output" in stated.head
    np.testing.assert_allclose(stated.score(TEXTS).harm, expected, atol=1e-6)


def test_a_one_output_head_stated_as_probability_must_stay_in_0_1(one_output):
    scorer = load_scorer(_hf(one_output["regression"], harmful_labels=["hostile"], single_output="probability"),
                         "reward")
    assert "read as P(harm) itself" in scorer.head
    with pytest.raises(UserError, match=r"single output reaches .* so it is not P\(harm\); set reward.single_output"):
        scorer.score(TEXTS)  # its outputs are logits (negative for benign texts), not probabilities


def test_single_output_is_refused_for_heads_with_several_outputs(bert):
    assert "only for heads with one output" in _error(_hf(bert, harmful_labels=["hostile"], single_output="logit"))


def test_softmax_and_multi_label_heads_state_their_reading(bert, multilabel):
    assert load_scorer(_hf(bert, harmful_labels=["hostile"]), "reward").head == \
        "softmax over 2 classes (problem_type = 'single_label_classification')"
    assert load_scorer(_hf(multilabel, harmful_labels=["hostile"]), "reward").head == \
        "multi-label head (problem_type = 'multi_label_classification'): 2 outputs, an independent sigmoid per label"
