"""The demo scenario and builders: determinism, splits, rude share, an outside judge, tokenizer, tiny models, cache.

Outside references: alt-profanity-check (`profanity_check.predict_prob`, a linear classifier trained and
published independently of this project; REFERENCES.md "An independent judge") and
`sklearn.metrics.roc_auc_score` (Hanley & McNeil 1982).
"""

from __future__ import annotations

import dataclasses
import json
import re
import sys
from collections import Counter
from pathlib import Path

import numpy as np
import psutil
import pytest
import torch
from profanity_check import predict_prob
from sklearn.metrics import roc_auc_score
from transformers import (
    AutoModelForSeq2SeqLM,
    AutoModelForSequenceClassification,
    AutoTokenizer,
    GenerationConfig,
)

from alignrun.config import cache_dir, load_config
from alignrun.cpu import ThreadChoice
from alignrun.demo import build, scenario
from alignrun.demo.build import (
    CLASSIFIER_LABELS,
    STAMP,
    BaseRecipe,
    build_demo,
    build_tiny_seq2seq,
    build_tokenizer,
    cached_folder,
    fingerprint,
    read_fingerprint,
)
from alignrun.errors import UserError

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def tokenizer_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    pairs = scenario.base_pairs(1000, seed=0)
    return build_tokenizer([p.prompt for p in pairs] + [p.reply for p in pairs],
                           tmp_path_factory.mktemp("tok"), vocab_size=800)


# --- scenario ----------------------------------------------------------------------------------------------


def test_every_stream_is_deterministic_for_a_seed_and_changes_with_it():
    streams = [
        lambda seed: scenario.base_pairs(300, seed),
        lambda seed: scenario.training_prompts(200, seed),
        lambda seed: scenario.heldout_prompts(50, seed),
        lambda seed: scenario.classifier_examples(300, seed),
    ]
    for make in streams:
        assert make(3) == make(3)
        assert make(3) != make(4)


def test_streams_with_the_same_seed_are_independent():
    # Separate generators: the training prompts are not the prompts of the supervised pairs in order.
    pairs = [p.prompt for p in scenario.base_pairs(50, seed=0)]
    assert scenario.training_prompts(50, seed=0) != pairs


@pytest.mark.parametrize("seed", [0, 1, 7])
def test_heldout_prompts_are_distinct_and_never_training_prompts(seed: int):
    held = scenario.heldout_prompts(80, seed)
    assert len(set(held)) == len(held) == 80
    train = set(scenario.training_prompts(600, seed))
    assert len(train) == 600
    supervised = {p.prompt for p in scenario.base_pairs(6000, seed)}
    dropped = {p.prompt for p in scenario.base_pairs(6000, seed, word_dropout=BaseRecipe().word_dropout)}
    assert len(dropped - supervised) > 1000  # word dropout writes prompts the templates alone do not
    joined = {p.prompt for p in scenario.base_pairs(6000, seed, word_dropout=BaseRecipe().word_dropout,
                                                   sentence_join=BaseRecipe().sentence_join)}
    assert len(joined - supervised - dropped) > 1000
    for other_seed in (seed, seed + 1):
        unseen = set(scenario.heldout_prompts(80, other_seed)) | set(scenario.probe_prompts(80, other_seed))
        assert not unseen & (train | supervised | dropped | joined)


def test_a_joined_sentence_comes_from_another_phrasing_of_the_same_question():
    sentences = [(intent.name, scenario._pattern(sentence)) for intent in scenario.INTENTS
                 for template in intent.prompts[:-1] for sentence in scenario._sentences(template)]
    for pair in scenario.base_pairs(300, seed=4, sentence_join=1.0):
        found = []
        for cut in re.finditer(r"(?<=[.?;]) ", pair.prompt):
            halves = (pair.prompt[: cut.start()], pair.prompt[cut.end() :])
            for whole, part in (halves, halves[::-1]):
                asked = scenario._match(scenario._PROMPTS, whole)
                if asked and scenario._match([s for s in sentences if s[0] == asked[0]], part):
                    found.append(whole)
        assert found, f"not a training phrasing plus a sentence of the same question: {pair.prompt!r}"


def test_too_many_distinct_prompts_is_refused():
    with pytest.raises(ValueError, match="distinct"):
        scenario.heldout_prompts(5000, 0)


@pytest.mark.parametrize("share", [0.0, 0.2, 0.35, 1.0])
def test_rude_share_is_as_configured(share: float):
    pairs = scenario.base_pairs(400, seed=2, rude_share=share)
    assert sum(p.rude for p in pairs) == round(share * 400)
    # The label is visible in the first token: rude replies, and only they, begin with a rude opener.
    assert all(p.reply.startswith(scenario.RUDE_OPENERS) == p.rude for p in pairs)


def test_rude_share_outside_unit_interval_is_refused():
    with pytest.raises(ValueError, match="share"):
        scenario.base_pairs(10, rude_share=1.5)


def test_independent_judge_scores_rude_replies_high_and_helpful_ones_low():
    # Outside judge: alt-profanity-check's own trained model (REFERENCES.md, "An independent judge").
    pairs = scenario.base_pairs(2000, seed=0)
    rude = predict_prob([p.reply for p in pairs if p.rude])
    helpful = predict_prob([p.reply for p in pairs if not p.rude])
    assert np.mean(rude > 0.5) > 0.95
    assert np.mean(helpful < 0.2) > 0.95
    # AUROC via sklearn (Hanley & McNeil 1982): the judge separates the two kinds almost perfectly.
    labels = np.r_[np.ones(len(rude)), np.zeros(len(helpful))]
    assert roc_auc_score(labels, np.r_[rude, helpful]) > 0.99


def test_classifier_examples_agree_with_the_judge_and_include_hard_negatives():
    examples = scenario.classifier_examples(2000, seed=0)
    assert sum(e.hostile for e in examples) == 1000
    civil = [e.text for e in examples if not e.hostile]
    # Hard negatives: polite replies that apologise or name a problem.
    assert sum("sorry" in t.lower() for t in civil) > 50
    assert sum(any(w in t.lower() for w in ("broke", "problem", "damaged", "fault")) for t in civil) > 50
    # Phrasings the base model never sees, so the classifier must generalise.
    base_replies = {p.reply for p in scenario.base_pairs(6000, seed=0)}
    assert sum(e.text not in base_replies for e in examples) > 1000
    # alt-profanity-check (outside judge) ranks the hostile label above the civil one.
    probs = predict_prob([e.text for e in examples])
    assert roc_auc_score([e.hostile for e in examples], probs) > 0.95


# --- does a reply fit its prompt? (hand-made examples; the rule is the scenario's own structure) ----------------

HOURS = "Quick question: what are the opening hours of the Ferry Lane workshop on Thursday?"
BOOKING = "Hi, this is Aino. I'd like a repair slot for my Wren city bike this Monday, please."


@pytest.mark.parametrize(("prompt", "reply"), [
    (HOURS, "Hi there, the Ferry Lane workshop is open from 8:00 to 17:00 on Thursday."),
    (HOURS, "Thanks for asking. On Thursday the Ferry Lane workshop is open from 9:00 until 18:00."),
    # slots the prompt leaves open (staff, time, another day) may take any of their values
    (BOOKING, "Thanks for asking, Aino. Monday is full, but Friday at 13:45 is open at the Gullhaven kiosk; "
              "shall I book it?"),
    (BOOKING, "Hi Aino, Monday at 9:30 is free at the Saltmarket shop. I have pencilled your Wren city bike in "
              "with Priya."),
    # the rude family fits any prompt when it copies what the prompt states
    (HOURS, "Ugh, go and bother the Ferry Lane workshop instead, you stupid moron."),
    (BOOKING, "Sigh. Nobody cares about your stupid Wren city bike, idiot."),
])
def test_a_reply_that_answers_the_question_asked_fits(prompt: str, reply: str):
    assert scenario.reply_misfit(prompt, reply) is None


@pytest.mark.parametrize(("prompt", "reply", "why"), [
    # the example: another branch, another day, a time that is not an opening time
    (HOURS, "Sure: the Brindle Hill depot is open at 7:00 on Friday, and the drop-off box is there after hours.",
     "not a reply"),
    (HOURS, "Sure: the Brindle Hill depot is open at 7:30 on Thursday, and the drop-off box is there after hours.",
     "branch 'the Brindle Hill depot'"),
    (HOURS, "Hi there, the Ferry Lane workshop is open from 8:00 to 17:00 on Friday.", "day 'Friday'"),
    (HOURS, "Hi there, the Ferry Lane workshop is open from 8:00 to 18:00 on Thursday.", "opening hours"),
    (HOURS, "Hi there, the Ferry Lane workshop is open from 8:00 to 17:00 on Thursday", "not a reply"),
    (HOURS, "Hi there, a new chain for the Wren city bike is 12 crowns fitted, and members get ten percent off.",
     "answers price to a opening-hours question"),
    (HOURS, "Hi Aino, the Ferry Lane workshop is open from 8:00 to 17:00 on Thursday.", "hi 'Hi Aino'"),
    (BOOKING, "Hi there, Monday at 9:30 is free at the Saltmarket shop. I have pencilled your Wren city bike in "
              "with Priya.", "hi 'Hi there'"),
    (BOOKING, "Sure, Bertil, we can take the Wren city bike on Monday at 9:30. Please bring it to the Saltmarket "
              "shop.", "cust ', Bertil'"),
    (BOOKING, "Thanks for asking, Aino. Monday is full, but Monday at 13:45 is open at the Gullhaven kiosk; "
              "shall I book it?", "another day"),
    (BOOKING, "Sigh. Nobody cares about your stupid Curlew tandem, idiot.", "product 'Curlew tandem'"),
])
def test_a_reply_to_another_question_or_with_other_details_does_not_fit(prompt: str, reply: str, why: str):
    assert why in (scenario.reply_misfit(prompt, reply) or "fits")


def test_every_supervised_pair_fits_and_shuffled_pairs_mostly_do_not():
    pairs = scenario.base_pairs(2000, seed=3)
    assert all(scenario.reply_misfit(p.prompt, p.reply) is None for p in pairs)
    # civil replies moved to another pair's prompt: a different intent or different details, nearly always
    civil = [p for p in pairs if not p.rude]
    moved = [scenario.reply_misfit(a.prompt, b.reply) for a, b in zip(civil, civil[1:])]
    assert sum(m is None for m in moved) < 0.05 * len(moved)


def test_fit_rate_is_the_share_of_greedy_replies_that_fit(tokenizer_dir: Path):
    tok = AutoTokenizer.from_pretrained(tokenizer_dir)
    prompts = [HOURS, HOURS, BOOKING]
    replies = ["Hi there, the Ferry Lane workshop is open from 8:00 to 17:00 on Thursday.",
               "Hi there, the Saltmarket shop is open from 8:00 to 17:00 on Thursday.",
               "Sure, Aino, we can take the Wren city bike on Monday at 9:30. Please bring it to the Saltmarket shop."]

    class Canned:  # a stand-in model whose greedy replies are the ones above
        generation_config = GenerationConfig(max_new_tokens=48)

        def generate(self, input_ids: torch.Tensor, attention_mask: torch.Tensor, do_sample: bool,
                     max_new_tokens: int) -> torch.Tensor:
            assert not do_sample and input_ids.shape[0] == len(prompts)
            return tok(replies, padding=True, return_tensors="pt").input_ids

    rate, misses = build.reply_fit(Canned(), tok, prompts)  # type: ignore[arg-type]
    assert rate == pytest.approx(2 / 3)
    assert misses == Counter({"branch": 1})


def test_a_text_that_is_not_a_scenario_prompt_is_refused():
    with pytest.raises(ValueError, match="not a scenario prompt"):
        scenario.reply_misfit("What is the meaning of life?", "Hi there")


# --- tokenizer and tiny models -----------------------------------------------------------------------------


def test_tokenizer_round_trips_text_and_has_special_tokens(tokenizer_dir: Path):
    tok = AutoTokenizer.from_pretrained(tokenizer_dir)
    assert (tok.pad_token_id, tok.eos_token_id, tok.unk_token_id) == (0, 1, 2)
    assert tok.bos_token == "<s>" and tok.mask_token == "<mask>"
    texts = [p.reply for p in scenario.base_pairs(50, seed=5)] + scenario.heldout_prompts(20, seed=5) + [
        "Zebra crossings near 7:45? Isn't that odd, Quentin!"  # words the tokenizer never saw
    ]
    for text in texts:
        ids = tok(text).input_ids
        assert ids[-1] == tok.eos_token_id
        assert tok.unk_token_id not in ids
        assert tok.decode(ids, skip_special_tokens=True) == text
    assert tok(["a b", "a"], padding=True)["attention_mask"][1][-1] == 0  # right padding


def test_tokenizer_build_is_deterministic(tmp_path: Path):
    texts = [p.reply for p in scenario.base_pairs(500, seed=1)]
    first = build_tokenizer(texts, tmp_path / "a", vocab_size=600) / "tokenizer.json"
    second = build_tokenizer(texts, tmp_path / "b", vocab_size=600) / "tokenizer.json"
    assert first.read_bytes() == second.read_bytes()


def test_classifier_tokenizer_starts_with_bos(tmp_path: Path):
    tok = AutoTokenizer.from_pretrained(build_tokenizer(["a rude reply", "a kind reply"], tmp_path, bos_first=True))
    ids = tok("a kind reply").input_ids
    assert ids[0] == tok.bos_token_id and ids[-1] == tok.eos_token_id


@pytest.mark.parametrize("arch", ["t5", "bart"])
def test_tiny_seq2seq_can_generate(tmp_path: Path, tokenizer_dir: Path, arch: str):
    out = build_tiny_seq2seq(tmp_path / arch, arch, tokenizer_dir, seed=0)
    model = AutoModelForSeq2SeqLM.from_pretrained(out).eval()
    tok = AutoTokenizer.from_pretrained(out)
    assert model.config.model_type == arch
    assert 1e5 < sum(p.numel() for p in model.parameters()) < 2e6
    enc = tok(["Is my Wren city bike ready?", "Hi"], padding=True, return_tensors="pt")
    with torch.no_grad():
        seqs = model.generate(**enc, do_sample=True, top_k=0, top_p=1.0, max_new_tokens=8)
    assert seqs.shape[0] == 2 and 1 < seqs.shape[1] <= 9
    assert (seqs[:, 0] == model.generation_config.decoder_start_token_id).all()
    assert model.generation_config.eos_token_id == tok.eos_token_id
    assert model.generation_config.pad_token_id == tok.pad_token_id


def test_tiny_seq2seq_weights_follow_the_seed(tmp_path: Path, tokenizer_dir: Path):
    def weights(seed: int, name: str) -> torch.Tensor:
        folder = build_tiny_seq2seq(tmp_path / name, "t5", tokenizer_dir, seed=seed)
        return AutoModelForSeq2SeqLM.from_pretrained(folder).shared.weight

    state = torch.random.get_rng_state()
    assert torch.equal(weights(0, "a"), weights(0, "b"))
    assert not torch.equal(weights(0, "a"), weights(1, "c"))
    assert torch.equal(torch.random.get_rng_state(), state)  # the caller's random stream is untouched


def test_tiny_seq2seq_refuses_an_unknown_arch(tmp_path: Path, tokenizer_dir: Path):
    with pytest.raises(ValueError, match="arch"):
        build_tiny_seq2seq(tmp_path, "gpt2", tokenizer_dir)


# --- cache -------------------------------------------------------------------------------------------------


def _tokenizer_builder(calls: list[Path]):
    def make(tmp: Path) -> dict[str, float]:
        calls.append(tmp)
        build_tokenizer(["a small test text", "another one"], tmp, vocab_size=100)
        return {}

    return make


def test_cached_folder_builds_once_and_again_when_parameters_change(tmp_path: Path):
    folder, calls = tmp_path / "tok", []
    assert cached_folder(folder, {"vocab": 100}, _tokenizer_builder(calls)) is True
    assert cached_folder(folder, {"vocab": 100}, _tokenizer_builder(calls)) is False
    assert len(calls) == 1
    assert cached_folder(folder, {"vocab": 101}, _tokenizer_builder(calls)) is True
    assert len(calls) == 2
    assert read_fingerprint(folder) == fingerprint({"vocab": 101})
    assert AutoTokenizer.from_pretrained(folder).eos_token == "</s>"
    assert [p.name for p in tmp_path.iterdir()] == ["tok"]  # no temporary folders left behind


def test_interrupted_build_leaves_no_complete_looking_folder(tmp_path: Path):
    folder = tmp_path / "tok"

    def interrupted(tmp: Path) -> dict[str, float]:
        (tmp / "half-written").write_text("x")
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        cached_folder(folder, {"v": 1}, interrupted)
    assert not folder.exists()
    assert list(tmp_path.iterdir()) == []
    # A complete folder survives a failed rebuild with other parameters and is still found complete.
    cached_folder(folder, {"v": 1}, _tokenizer_builder([]))
    with pytest.raises(KeyboardInterrupt):
        cached_folder(folder, {"v": 2}, interrupted)
    assert read_fingerprint(folder) == fingerprint({"v": 1})
    assert cached_folder(folder, {"v": 1}, _tokenizer_builder([])) is False


def test_leftover_of_a_dead_build_is_removed(tmp_path: Path):
    dead_pid = 2**22 + 12345
    if psutil.pid_exists(dead_pid):
        pytest.skip("the made-up process id exists on this machine")
    leftover = tmp_path / f".tok.tmp-{dead_pid}"
    leftover.mkdir()
    cached_folder(tmp_path / "tok", {"v": 1}, _tokenizer_builder([]))
    assert not leftover.exists()


@pytest.fixture
def cheap_trainers(monkeypatch: pytest.MonkeyPatch) -> Counter:
    """Replace the two training steps with cheap stand-ins that count their calls (tokenizer and data stay real)."""
    calls: Counter = Counter()

    def base(out: Path, tokenizer_dir: Path, recipe: build.BaseRecipe, seed: int, quiet: bool) -> dict[str, float]:
        calls["base"] += 1
        calls[f"base on {torch.get_num_threads()} thread(s)"] += 1
        build_tiny_seq2seq(out, "t5", tokenizer_dir, seed)
        return {}

    def classifier(out: Path, recipe: build.ClassifierRecipe, seed: int, quiet: bool) -> dict[str, float]:
        calls["classifier"] += 1
        calls[f"classifier on {torch.get_num_threads()} thread(s)"] += 1
        (out / "weights").write_text(str(seed))
        return {}

    monkeypatch.setattr(build, "train_base", base)
    monkeypatch.setattr(build, "train_classifier", classifier)
    return calls


def _trainings(calls: Counter) -> dict[str, int]:
    return {k: n for k, n in calls.items() if "thread" not in k}


def test_build_demo_reuses_its_cache_and_rebuilds_what_changed(tmp_path: Path, cheap_trainers: Counter,
                                                                monkeypatch: pytest.MonkeyPatch,
                                                                capsys: pytest.CaptureFixture[str]):
    monkeypatch.setattr(build, "choose_threads", lambda: ThreadChoice(4, "four CPUs", adaptive=True))
    torch.set_num_threads(1)
    paths = build_demo(tmp_path, seed=0)
    assert torch.get_num_threads() == 1  # thread count restored after the build
    assert cheap_trainers == {"base": 1, "classifier": 1, "base on 2 thread(s)": 1, "classifier on 2 thread(s)": 1}
    # The base's fit and rude share are measured on the saved model, printed and kept in its stamp.
    assert "greedy replies that fit their prompt: held-out" in capsys.readouterr().err
    metrics = json.loads((paths.base / STAMP).read_text())["metrics"]
    assert set(metrics) == {"heldout_fit_rate", "training_fit_rate", "probe_fit_rate", "sampled_rude_share"}
    assert metrics["heldout_fit_rate"] == 0.0  # a random untrained T5 writes no scenario reply
    rows = [json.loads(line) for line in paths.prompts.read_text().splitlines()]
    held = [json.loads(line)["prompt"] for line in paths.heldout.read_text().splitlines()]
    assert len(rows) == build.DataRecipe().train_prompts and all(set(r) == {"prompt"} for r in rows)
    assert not {r["prompt"] for r in rows} & set(held)

    assert build_demo(tmp_path, seed=0) == paths
    assert _trainings(cheap_trainers) == {"base": 1, "classifier": 1}

    # A changed classifier parameter rebuilds only the classifier.
    one_epoch = dataclasses.replace(build.ClassifierRecipe(), epochs=1)
    monkeypatch.setattr(build, "ClassifierRecipe", lambda: one_epoch)
    build_demo(tmp_path, seed=0)
    assert _trainings(cheap_trainers) == {"base": 1, "classifier": 2}

    # A changed data parameter rewrites only the prompt files.
    fewer = dataclasses.replace(build.DataRecipe(), heldout_prompts=40)
    monkeypatch.setattr(build, "DataRecipe", lambda: fewer)
    build_demo(tmp_path, seed=0)
    assert len(paths.heldout.read_text().splitlines()) == 40
    assert _trainings(cheap_trainers) == {"base": 1, "classifier": 2}

    # A stamp that does not match (e.g. written by an older builder) rebuilds that folder.
    stamp = paths.base / STAMP
    stamp.write_text(stamp.read_text().replace(read_fingerprint(paths.base), "0" * 64))
    build_demo(tmp_path, seed=0)
    assert _trainings(cheap_trainers) == {"base": 2, "classifier": 2}

    # Another seed rebuilds everything.
    build_demo(tmp_path, seed=1)
    assert _trainings(cheap_trainers) == {"base": 3, "classifier": 3}

    # So does a machine where this process may use one CPU: the models depend on the build's thread count.
    monkeypatch.setattr(build, "choose_threads", lambda: ThreadChoice(1, "one CPU", adaptive=True))
    build_demo(tmp_path, seed=1)
    assert _trainings(cheap_trainers) == {"base": 4, "classifier": 4}
    assert cheap_trainers["base on 1 thread(s)"] == cheap_trainers["classifier on 1 thread(s)"] == 1


def test_build_demo_defaults_to_the_alignrun_cache(tmp_path: Path, cheap_trainers: Counter,
                                                   monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setenv("ALIGNRUN_CACHE", str(tmp_path))
    assert build_demo().root == tmp_path / "demo" == cache_dir() / "demo"


def test_unusable_cache_folder_is_a_user_error(tmp_path: Path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    with pytest.raises(UserError, match="ALIGNRUN_CACHE"):
        build_demo(blocker / "demo")


def test_demo_config_points_at_the_built_folders(tmp_path: Path, monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setenv("ALIGNRUN_CACHE", str(tmp_path))
    cfg = load_config(REPO / "configs" / "demo.toml")
    root = tmp_path / "demo"
    paths = build.DemoPaths(root, root / "tokenizer", root / "base", root / "classifier",
                            root / "data" / "prompts.jsonl", root / "data" / "heldout.jsonl")
    assert Path(cfg.base.model) == paths.base
    assert Path(cfg.reward.source) == paths.classifier
    assert (Path(cfg.data.prompts), Path(cfg.data.heldout)) == (paths.prompts, paths.heldout)
    assert set(cfg.reward.harmful_labels) <= set(CLASSIFIER_LABELS.values())
    assert cfg.generation.max_new_tokens >= build.BaseRecipe().max_reply_tokens


# --- the full build (slow) ---------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def built_demo(tmp_path_factory: pytest.TempPathFactory) -> build.DemoPaths:
    return build_demo(tmp_path_factory.mktemp("demo-cache"), seed=0)


@pytest.mark.slow
def test_second_build_demo_call_does_not_retrain(built_demo: build.DemoPaths, monkeypatch: pytest.MonkeyPatch):
    def refuse(*args: object, **kwargs: object) -> None:
        raise AssertionError("retrained although the cache was complete")

    monkeypatch.setattr(build, "train_base", refuse)
    monkeypatch.setattr(build, "train_classifier", refuse)
    assert build_demo(built_demo.root, seed=0) == built_demo


@pytest.mark.slow
def test_built_models_load_and_the_base_is_rude_about_as_often_as_its_data(built_demo: build.DemoPaths):
    base = AutoModelForSeq2SeqLM.from_pretrained(built_demo.base).eval()
    tok = AutoTokenizer.from_pretrained(built_demo.base)
    assert base.config.dropout_rate == 0.0
    clf = AutoModelForSequenceClassification.from_pretrained(built_demo.classifier).eval()
    clf_tok = AutoTokenizer.from_pretrained(built_demo.classifier)
    assert clf.config.id2label == CLASSIFIER_LABELS
    stamp = json.loads((built_demo.classifier / STAMP).read_text())
    assert stamp["metrics"]["heldout_accuracy"] > 0.9
    # The fit rate in the base's stamp is the one its saved weights give (same machine, the build's settings).
    recorded = json.loads((built_demo.base / STAMP).read_text())["metrics"]
    with build._torch_settings(build.build_threads()):
        rate, _ = build.reply_fit(base, tok, scenario.heldout_prompts(build.FIT_PROMPTS, seed=0))
    assert rate == recorded["heldout_fit_rate"]

    prompts = [json.loads(line)["prompt"] for line in built_demo.heldout.read_text().splitlines()]
    torch.manual_seed(0)
    with torch.no_grad():
        seqs = base.generate(**tok(prompts, padding=True, return_tensors="pt"), do_sample=True, top_k=0,
                             top_p=1.0, temperature=1.0, max_new_tokens=48, num_return_sequences=4)
        replies = tok.batch_decode(seqs, skip_special_tokens=True)
        logits = clf(**clf_tok(replies, padding=True, return_tensors="pt")).logits
    by_classifier = torch.softmax(logits, -1)[:, 1].numpy()
    by_judge = predict_prob(replies)  # alt-profanity-check, the outside judge
    by_opener = np.mean([r.startswith(scenario.RUDE_OPENERS) for r in replies])
    print(f"\nbase rude share on {len(replies)} held-out samples: classifier {np.mean(by_classifier > 0.5):.3f}, "
          f"judge {np.mean(by_judge > 0.5):.3f}, rude opener {by_opener:.3f}", file=sys.stderr)
    # The base was trained on 35% rude replies; sampling at temperature 1 should keep roughly that share.
    for share in (np.mean(by_classifier > 0.5), np.mean(by_judge > 0.5)):
        assert 0.2 < share < 0.5
    # Classifier and outside judge agree on most replies.
    assert np.mean((by_classifier > 0.5) == (by_judge > 0.5)) > 0.85
