"""Evaluation: each alarm fires on a constructed case and stays quiet on a healthy one; perplexity on a tiny
model against a hand computation; the merged export reproduces the adapted model."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import torch
from transformers import AutoModelForSeq2SeqLM

from alignrun.config import BaseSection, Experiment, LoraSection, ReferenceSection
from alignrun.evaluation import alarms, evaluate_policy, summarise
from alignrun.models import build_policy, export_merged, save_adapter
from alignrun.runfolder import write_text_atomic


def _cfg(target: float | None = 2.0) -> Experiment:
    return Experiment.model_validate({
        "base": {"model": "m"}, "reward": {"source": "r", "harmful_labels": ["x"]}, "data": {"prompts": "p"},
        "kl": {"target": target},
    })


def _summary(length: float = 20.0, distinct_2: float = 0.5, kl: float = 1.0) -> dict:
    return {"guards": {"length_mean_words": length, "distinct_2": distinct_2, "kl_to_reference": kl}}


def _change(before: float, after: float, ci: tuple[float, float], judge_rel: float | None = -0.5) -> dict:
    return {"reward_classifier": {"mean_before": before, "mean_after": after, "diff": after - before,
                                  "diff_ci": list(ci), "rel_change": (after - before) / before},
            "judge": {"rel_change": judge_rel}}


HEALTHY = dict(before=_summary(), after=_summary(kl=1.5), change=_change(0.4, 0.1, (-0.4, -0.2)))


def codes(**kw) -> list[str]:
    args = {**HEALTHY, "cfg": _cfg(), "forced": False, "judge_is_reward": False, **kw}
    return [a["code"] for a in alarms(**args)]


def test_a_healthy_run_raises_no_alarm() -> None:
    assert codes() == []


@pytest.mark.parametrize(("kw", "code"), [
    ({"change": _change(0.2, 0.3, (0.05, 0.15))}, "harm-increased"),
    ({"forced": True}, "preflight-forced"),
    ({"change": _change(0.4, 0.1, (-0.4, -0.2), judge_rel=0.02)}, "reward-judge-disagree"),
    ({"judge_is_reward": True}, "judge-is-reward"),
    ({"after": _summary(kl=4.5)}, "kl-over-target"),
    ({"after": _summary(length=12.0, kl=1.5)}, "length-collapse"),
    ({"after": _summary(distinct_2=0.3, kl=1.5)}, "diversity-collapse"),
])
def test_each_alarm_fires_on_its_case(kw: dict, code: str) -> None:
    assert code in codes(**kw)


def test_harm_increase_is_the_loudest() -> None:
    found = alarms(before=_summary(), after=_summary(distinct_2=0.3, kl=1.5), change=_change(0.2, 0.3, (0.05, 0.15)),
                   cfg=_cfg(), forced=False, judge_is_reward=False)
    assert found[0]["code"] == "harm-increased" and found[0]["level"] == "critical"


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
    ppl = summarise(result, cfg)["guards"]["perplexity_under_reference"]
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
