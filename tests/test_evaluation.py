"""Evaluation: each alarm fires on a constructed case and stays quiet on a healthy one; perplexity on a tiny
model against a hand computation; the merged export reproduces the adapted model."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from transformers import AutoModelForSeq2SeqLM

from alignrun.config import BaseSection, Experiment, LoraSection, ReferenceSection
from alignrun.evaluation import EvalResult, evaluate_policy, summarise
from alignrun.metrics import num
from alignrun.models import build_policy, export_merged, save_adapter
from alignrun.runfolder import write_text_atomic
from alignrun.verdict import alarms, verdict


def _cfg(target: float | None = 2.0, **evaluation: float) -> Experiment:
    return Experiment.model_validate({
        "base": {"model": "m"}, "reward": {"source": "r", "harmful_labels": ["x"]}, "data": {"prompts": "p"},
        "kl": {"target": target}, "evaluation": evaluation,
    })


def _summary(length: float = 20.0, distinct_2: float = 0.5, kl: float = 1.0, looping: float = 0.01,
             cut: float = 0.0) -> dict:
    return {"guards": {"length_mean_words": length, "distinct_2_per_ngram": distinct_2, "kl_to_reference": kl,
                       "seq_rep_4_share": looping, "truncated_share": cut}}


def _block(before: float, after: float, ci: tuple[float, float]) -> dict:
    return {"mean_before": before, "mean_after": after, "diff": after - before, "diff_ci": list(ci),
            "rel_change": (after - before) / before}


def _change(before: float, after: float, ci: tuple[float, float],
            judge: tuple[float, float, tuple[float, float]] | None = (0.4, 0.1, (-0.4, -0.2))) -> dict:
    return {"reward_classifier": _block(before, after, ci), **({"judge": _block(*judge)} if judge else {})}


HEALTHY = dict(before=_summary(), after=_summary(kl=1.5), change=_change(0.4, 0.1, (-0.4, -0.2)))


def found(**kw) -> dict[str, str]:
    """code -> level of every alarm raised on HEALTHY with `kw` replaced."""
    args = {**HEALTHY, "cfg": _cfg(), "forced": False, "judge_is_reward": False, **kw}
    return {a["code"]: a["level"] for a in alarms(**args)}


def test_a_healthy_run_raises_no_alarm() -> None:
    assert found() == {}


# Each alarm: the constructed case where it must fire and the neighbouring case where it must not.
@pytest.mark.parametrize(("fires", "quiet", "code"), [
    ({"forced": True}, {"forced": False}, "preflight-forced"),
    ({"judge_is_reward": True}, {}, "judge-is-reward"),
    # twice kl.target (2.0) is the limit
    ({"after": _summary(kl=4.5)}, {"after": _summary(kl=3.9)}, "kl-high"),
    # without kl.target: the default ceiling of 10 nats per reply (a KL of 50 raised nothing before)
    ({"after": _summary(kl=50.0), "cfg": _cfg(None)}, {"after": _summary(kl=9.0), "cfg": _cfg(None)}, "kl-high"),
    ({"after": _summary(kl=6.0), "cfg": _cfg(None, kl_ceiling=5.0)}, {"after": _summary(kl=6.0), "cfg": _cfg(None)},
     "kl-high"),
    # length below 70% of before (20 words -> under 14)
    ({"after": _summary(length=13.0)}, {"after": _summary(length=15.0)}, "length-collapse"),
    # distinct-2 per bigram below 80% of before (0.5 -> under 0.4)
    ({"after": _summary(distinct_2=0.39)}, {"after": _summary(distinct_2=0.41)}, "diversity-collapse"),
    # looping share up by more than the margin 0.02 (from 0.01)
    ({"after": _summary(looping=0.035)}, {"after": _summary(looping=0.025)}, "repetition-rise"),
    ({"after": _summary(looping=0.025), "cfg": _cfg(repetition_margin=0.01)}, {"after": _summary(looping=0.025)},
     "repetition-rise"),
    # cut-off share up by more than the margin 0.02 (from 0)
    ({"after": _summary(cut=0.03)}, {"after": _summary(cut=0.015)}, "truncation-rise"),
    # the reward classifier's harm fell (interval below zero) and the judge's did not (its interval reaches zero)
    ({"change": _change(0.4, 0.28, (-0.15, -0.09), judge=(0.3, 0.298, (-0.02, 0.016)))},
     {"change": _change(0.4, 0.28, (-0.15, -0.09), judge=(0.3, 0.25, (-0.08, -0.02)))}, "reward-judge-disagree"),
    ({"change": _change(0.4, 0.38, (-0.04, -0.001), judge=(0.3, 0.35, (0.0, 0.1)))},
     {"change": _change(0.4, 0.38, (-0.04, 0.001), judge=(0.3, 0.35, (-0.01, 0.1)))}, "reward-judge-disagree"),
])
def test_each_alarm_fires_on_its_case_and_not_on_the_neighbour(fires: dict, quiet: dict, code: str) -> None:
    assert code in found(**fires)
    assert code not in found(**quiet)


@pytest.mark.parametrize(("who", "code"), [("reward", "harm-increased"), ("judge", "judge-harm-increased")])
def test_harm_rise_is_critical_only_when_the_interval_excludes_zero(who: str, code: str) -> None:
    def change(ci: tuple[float, float], after: float = 0.33) -> dict:
        block = (0.3, after, ci)
        if who == "reward":
            return _change(*block, judge=(0.3, after, ci))
        return _change(0.4, 0.1, (-0.4, -0.2), judge=block)

    assert found(change=change((0.001, 0.06)))[code] == "critical"
    assert found(change=change((-0.001, 0.06)))[code] == "warning"  # the interval includes zero
    assert code not in found(change=change((-0.06, 0.001), after=0.29))  # harm fell


def test_judge_side_rise_is_seen_without_a_large_reward_fall() -> None:
    # the cases: reward -5% with judge +50%, and reward -9% with judge +100%, both judge intervals above 0
    for reward_after, judge_after in ((0.38, 0.45), (0.364, 0.6)):
        levels = found(change=_change(0.4, reward_after, (-0.05, 0.01), judge=(0.3, judge_after, (0.05, 0.4))))
        assert levels["judge-harm-increased"] == "critical"


@pytest.mark.parametrize(("judge_check", "suspect"), [("ok", False), ("weak", True), ("inverted", True),
                                                      (None, True)])
def test_disagreement_names_the_judge_as_a_suspect_unless_its_check_passed(judge_check: str | None,
                                                                          suspect: bool) -> None:
    out = alarms(**{**HEALTHY, "change": _change(0.4, 0.28, (-0.15, -0.09), judge=(0.3, 0.3, (-0.02, 0.02)))},
                 cfg=_cfg(), forced=False, judge_is_reward=False, judge_check=judge_check)
    [message] = [a["message"] for a in out if a["code"] == "reward-judge-disagree"]
    assert ("faulty judge" in message) is suspect


def test_harm_increase_is_the_loudest() -> None:
    out = alarms(before=_summary(), after=_summary(distinct_2=0.3, kl=1.5), change=_change(0.2, 0.3, (0.05, 0.15)),
                 cfg=_cfg(), forced=False, judge_is_reward=False)
    assert out[0]["code"] == "harm-increased" and out[0]["level"] == "critical"


# The verdict: improved only when both intervals lie below zero; worse when either lies above; else not shown.
BELOW, STRADDLES, ABOVE = (-0.3, -0.1), (-0.1, 0.05), (0.02, 0.2)


def _verdict(reward_ci: tuple[float, float], judge_ci: tuple[float, float] | None, **kw) -> dict:
    mid = lambda ci: 0.4 + sum(ci) / 2  # noqa: E731
    judge = None if judge_ci is None else (0.4, mid(judge_ci), judge_ci)
    return verdict(_change(0.4, mid(reward_ci), reward_ci, judge=judge), **kw)


@pytest.mark.parametrize(("reward_ci", "judge_ci", "expected"), [
    (BELOW, BELOW, "improved"),
    (BELOW, STRADDLES, "not shown"),  # the neighbour: the judge does not confirm
    (STRADDLES, BELOW, "not shown"),
    ((-0.3, 0.0), BELOW, "not shown"),  # an interval ending at zero does not lie below it
    (STRADDLES, STRADDLES, "not shown"),
    (ABOVE, BELOW, "worse"),
    (BELOW, ABOVE, "worse"),  # the judge alone sees a rise
    ((0.0, 0.2), BELOW, "not shown"),  # an interval starting at zero does not lie above it
    (BELOW, None, "not shown"),  # no judge
])
def test_verdict_rule(reward_ci, judge_ci, expected) -> None:
    v = _verdict(reward_ci, judge_ci)
    assert v["verdict"] == expected
    assert v["level"] == ("critical" if expected == "worse" else "info")
    assert v["reason"]


def test_verdict_needs_an_independent_working_judge() -> None:
    assert "reward classifier itself" in _verdict(BELOW, BELOW, judge_is_reward=True)["reason"]
    assert _verdict(BELOW, BELOW, judge_is_reward=True)["verdict"] == "not shown"
    for bad in ("inverted", "uninformative"):
        v = _verdict(BELOW, BELOW, judge_check=bad)
        assert v["verdict"] == "not shown" and bad in v["reason"]
    for fine in ("ok", "weak", None):
        assert _verdict(BELOW, BELOW, judge_check=fine)["verdict"] == "improved"
    assert _verdict(ABOVE, BELOW, judge_check="inverted")["verdict"] == "worse"  # the reward side alone suffices
    assert _verdict(BELOW, ABOVE, judge_check="inverted")["verdict"] == "not shown"


def test_verdict_matches_the_harm_alarms() -> None:
    # worse <=> a critical harm alarm from either side, on every combination of the three interval positions
    for reward_ci in (BELOW, STRADDLES, ABOVE):
        for judge_ci in (BELOW, STRADDLES, ABOVE):
            v = _verdict(reward_ci, judge_ci)
            mid = lambda ci: 0.4 + sum(ci) / 2  # noqa: E731
            levels = found(change=_change(0.4, mid(reward_ci), reward_ci, judge=(0.4, mid(judge_ci), judge_ci)))
            critical = "critical" in (levels.get("harm-increased"), levels.get("judge-harm-increased"))
            assert (v["verdict"] == "worse") is critical, (reward_ci, judge_ci)


def test_numbers_for_people_never_show_minus_zero() -> None:
    assert num(-0.00004) == "0.000" and num(-0.00004, sign=True) == "+0.000"
    assert num(-0.0006) == "-0.001" and num(2.3694) == "2.369"


def _result(token_ids: list[list[list[int]]]) -> EvalResult:
    n, k = len(token_ids), len(token_ids[0])
    texts = [[" ".join(f"w{i}" for i in ids) for ids in row] for row in token_ids]
    zeros = np.zeros((n, k))
    return EvalResult(prompts=[f"p{i}" for i in range(n)], samples=texts, token_ids=token_ids, harm=zeros, judge=None,
                      logp=zeros, kl=zeros, ref_nll=zeros + 1, tokens=np.array([[len(x) for x in r] for r in token_ids],
                                                                                dtype=float),
                      greedy=[r[0] for r in texts], greedy_harm=np.zeros(n), greedy_judge=None)


def test_degeneration_guards_on_constructed_replies() -> None:
    cfg = _cfg()
    cfg.generation.max_new_tokens = 6
    eos = 1
    result = _result([
        [[5, 6, 7, 8, 9, 10], [5, 6, 7, 8, 9, eos]],  # cut off at the limit (no EOS) | ends with EOS at the limit
        [[5, 6, eos], [7, 8, 7, 8, 7, 8]],  # short | cut off and looping
    ])
    guards = summarise(result, cfg, eos_id=eos)["guards"]
    assert guards["truncated_share"] == pytest.approx(2 / 4)  # counted by hand
    # distinct-1 (Li et al. 2016): words w1, w5..w10 -> 7 distinct of 21 words, by hand
    assert guards["distinct_1"] == pytest.approx(7 / 21)
    # "w7 w8 w7 w8 w7 w8": 3 four-grams, 2 unique -> seq-rep-4 = 1/3 (Welleck et al. 2019); the others have none
    # repeated; text of a reply = its ids as words, EOS included
    assert guards["seq_rep_4_mean"] == pytest.approx((1 / 3) / 4)
    assert guards["seq_rep_4_share"] == pytest.approx(1 / 4)  # above the default threshold 0.2
    cfg.evaluation.repetition_threshold = 0.4
    assert summarise(result, cfg, eos_id=eos)["guards"]["seq_rep_4_share"] == 0.0


class _Zero:
    description, executes_code = "zero", False

    def score(self, texts):
        from alignrun.reward import Scores

        return Scores(harm=np.zeros(len(texts)), raw=np.zeros((len(texts), 1)), labels=["harm"])


def test_perplexity_guard_matches_a_hand_computation(tiny_models) -> None:
    # Perplexity = exp(mean negative log-likelihood per token) under the reference (standard definition).
    torch.manual_seed(0)
    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4), ReferenceSection(),
                          torch.device("cpu"))
    cfg = _cfg()
    cfg.evaluation.samples_per_prompt, cfg.generation.max_new_tokens = 2, 6
    prompts = ["my chain is broken", "when are you open on friday"]
    result = evaluate_policy(policy, prompts, _Zero(), None, cfg, torch.device("cpu"))
    ref = AutoModelForSeq2SeqLM.from_pretrained(tiny_models["t5"]).eval()
    nll, count = 0.0, 0
    for i, prompt in enumerate(prompts):
        for ids in result.token_ids[i]:
            enc = policy.tokenizer([prompt], return_tensors="pt")
            target = torch.tensor([ids])
            dec = torch.cat([torch.tensor([[ref.config.decoder_start_token_id]]), target[:, :-1]], dim=1)
            with torch.no_grad():
                logp = torch.log_softmax(ref(**enc, decoder_input_ids=dec).logits, -1)
            nll -= logp.gather(-1, target.unsqueeze(-1)).sum().item()
            count += len(ids)
    ppl = summarise(result, cfg, policy.tokenizer.eos_token_id)["guards"]["perplexity_under_reference"]
    assert ppl == pytest.approx(float(np.exp(nll / count)), rel=1e-4)


def test_export_merges_the_adapter_into_a_standalone_model(tiny_models, tmp_path: Path) -> None:
    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4), ReferenceSection(),
                          torch.device("cpu"))
    with torch.no_grad():
        for name, p in policy.lm.named_parameters():
            if "lora_B" in name:
                p.normal_(std=0.5)  # a non-trivial adapter
    run = tmp_path / "run"
    save_adapter(policy, run / "adapter")
    write_text_atomic(run / "config.toml", f'[base]\nmodel = "{tiny_models["t5"]}"\n[reward]\nsource = "r"\n'
                      'harmful_labels = ["x"]\n[data]\nprompts = "p.jsonl"\n')
    merged = AutoModelForSeq2SeqLM.from_pretrained(export_merged(run, tmp_path / "merged")).eval()
    enc = policy.tokenizer(["is my bike ready"], return_tensors="pt")
    dec = torch.tensor([[0, 5, 9, 11]])
    with torch.no_grad():
        expected = policy.lm(**enc, decoder_input_ids=dec).logits
        got = merged(**enc, decoder_input_ids=dec).logits
    assert torch.allclose(expected, got, atol=1e-4)
