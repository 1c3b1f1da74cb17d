"""Drift measured from the full next-token distributions.

Outside references: scipy.stats.entropy (KL of explicit distributions, and of whole-sequence distributions
enumerated by hand for the chain rule); an independently loaded reference model for the evaluation plumbing.
"""

from __future__ import annotations

import itertools
import json
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
import torch
from scipy import stats
from transformers import AutoModelForSeq2SeqLM

from alignrun import metrics
from alignrun.config import BaseSection, Experiment, LoraSection, ReferenceSection, with_overrides
from alignrun.evaluation import EvalResult, drift, evaluate_policy, read_samples, summarise, write_samples
from alignrun.models import build_policy

CFG = Experiment.model_validate({
    "base": {"model": "tiny-base"}, "reward": {"source": "tiny-classifier", "harmful_labels": ["rude"]},
    "data": {"prompts": "prompts.jsonl"}, "run": {"name": "drift"},
    "evaluation": {"bootstrap_resamples": 200, "samples_per_prompt": 2, "judge": None},
})


# ---------------------------------------------------------------- the formula

@pytest.mark.parametrize(("p", "q"), [
    ([0.5, 0.25, 0.25], [0.25, 0.5, 0.25]),       # by hand: 0.25 ln 2
    ([0.7, 0.2, 0.1, 0.0], [0.1, 0.2, 0.3, 0.4]),  # a zero in p contributes nothing
    ([1.0, 0.0], [0.5, 0.5]),                      # a point mass: ln 2
    ([0.3, 0.3, 0.4], [0.3, 0.3, 0.4]),            # equal distributions: 0
])
def test_next_token_kl_matches_scipy_entropy(p: list[float], q: list[float]) -> None:
    # KL(p || q) = sum p log(p / q); reference implementation scipy.stats.entropy(p, q)
    with np.errstate(divide="ignore"):
        got = metrics.next_token_kl(np.log(p), np.log(q))
    assert got == pytest.approx(stats.entropy(p, q), rel=1e-12, abs=1e-15)


def test_next_token_kl_over_a_batch_of_positions() -> None:
    rng = np.random.default_rng(3)
    p, q = rng.dirichlet(np.ones(7), size=(2, 5)), rng.dirichlet(np.ones(7), size=(2, 5))
    got = metrics.next_token_kl(np.log(p), np.log(q))
    assert got.shape == (2, 5)
    assert got == pytest.approx(stats.entropy(p, q, axis=-1), rel=1e-12)  # scipy.stats.entropy, per row
    q[0, 0, 2] = 0.0  # q misses a token p can emit: infinite divergence
    q[0, 0] /= q[0, 0].sum()
    with np.errstate(divide="ignore"):
        assert metrics.next_token_kl(np.log(p), np.log(q))[0, 0] == np.inf == stats.entropy(p[0, 0], q[0, 0])


def _toy_model(rng: np.random.Generator, vocab: int) -> dict[tuple[int, ...], np.ndarray]:
    """A next-token distribution for every prefix of up to 2 tokens over tokens 1..vocab-1 (token 0 = EOS)."""
    prefixes = [()] + [tuple(x) for n in (1, 2) for x in itertools.product(range(1, vocab), repeat=n)]
    return {prefix: rng.dirichlet(np.ones(vocab)) for prefix in prefixes}


def _replies(vocab: int, max_len: int) -> list[tuple[int, ...]]:
    """Every reply: tokens 1..vocab-1 ended by EOS (0), or cut off at max_len tokens."""
    out = []
    for n in range(max_len + 1):
        for body in itertools.product(range(1, vocab), repeat=n):
            out.append(body + (0,) if n < max_len else body)
    return out


def test_summed_along_replies_it_is_the_sequence_kl() -> None:
    # The chain rule: E_{y~p} sum_t KL(p(.|y<t) || q(.|y<t)) = KL(p(y) || q(y)) over whole replies. The right
    # side is scipy.stats.entropy over the enumerated sequence distributions of a toy model (3 tokens, length 3).
    rng = np.random.default_rng(0)
    vocab, max_len = 3, 3
    p, q = _toy_model(rng, vocab), _toy_model(rng, vocab)
    replies = _replies(vocab, max_len)

    def prob(model: dict, reply: tuple[int, ...]) -> float:
        return float(np.prod([model[reply[:t]][tok] for t, tok in enumerate(reply)]))

    joint_p, joint_q = np.array([prob(p, y) for y in replies]), np.array([prob(q, y) for y in replies])
    assert joint_p.sum() == pytest.approx(1.0, rel=1e-12)
    exact = np.array([sum(metrics.next_token_kl(np.log(p[y[:t]]), np.log(q[y[:t]])) for t in range(len(y)))
                      for y in replies])
    assert float(joint_p @ exact) == pytest.approx(stats.entropy(joint_p, joint_q), rel=1e-12)
    k1 = np.log(joint_p) - np.log(joint_q)  # the sampled estimator has the same mean, with more spread here
    assert float(joint_p @ k1) == pytest.approx(stats.entropy(joint_p, joint_q), rel=1e-12)


# ---------------------------------------------------------------- evaluation plumbing

def _zero_scorer() -> SimpleNamespace:
    return SimpleNamespace(score=lambda texts: SimpleNamespace(harm=np.zeros(len(texts))))


def _tiny_eval(tiny_models: dict, perturb: bool) -> tuple[EvalResult, object, Experiment, list[str]]:
    torch.manual_seed(0)
    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4), ReferenceSection(),
                          torch.device("cpu"))
    if perturb:
        with torch.no_grad():
            for name, param in policy.lm.named_parameters():
                if "lora_B" in name:
                    param.normal_(std=0.5)  # a policy that has moved away from the reference
    cfg = with_overrides(CFG, {"generation.max_new_tokens": 6})
    prompts = ["my chain is broken", "when are you open on friday", "the brakes squeal"]
    result = evaluate_policy(policy, prompts, _zero_scorer(), None, cfg, torch.device("cpu"))
    return result, policy, cfg, prompts


def test_evaluation_exact_kl_matches_a_hand_computation(tiny_models: dict) -> None:
    result, policy, _, prompts = _tiny_eval(tiny_models, perturb=True)
    ref = AutoModelForSeq2SeqLM.from_pretrained(tiny_models["t5"]).eval()  # an independent copy of the base
    start = ref.config.decoder_start_token_id
    assert result.kl_exact is not None
    for i, prompt in enumerate(prompts):
        for j, ids in enumerate(result.token_ids[i]):
            enc = policy.tokenizer([prompt], return_tensors="pt")
            dec = torch.tensor([[start, *ids[:-1]]])
            with torch.no_grad():
                p = torch.softmax(policy.lm(**enc, decoder_input_ids=dec).logits[0].double(), -1).numpy()
                q = torch.softmax(ref(**enc, decoder_input_ids=dec).logits[0].double(), -1).numpy()
            # per position KL(p || q) by scipy.stats.entropy, summed over the reply's tokens (EOS included)
            assert result.kl_exact[i, j] == pytest.approx(stats.entropy(p, q, axis=-1).sum(), rel=1e-4, abs=1e-6)
            k1 = sum(np.log(p[t, tok]) - np.log(q[t, tok]) for t, tok in enumerate(ids))
            assert result.kl[i, j] == pytest.approx(k1, rel=1e-4, abs=1e-5)
    assert (result.kl_exact > 0).all()


def test_no_drift_before_training(tiny_models: dict) -> None:
    # A fresh adapter (LoRA B = 0, Hu et al. 2021) leaves the policy equal to the reference: both estimates are 0.
    result, *_ = _tiny_eval(tiny_models, perturb=False)
    assert result.kl_exact is not None
    assert np.abs(result.kl_exact).max() < 1e-9 and np.abs(result.kl).max() < 1e-6


# ---------------------------------------------------------------- files and report

def _result(rng: np.random.Generator, n: int, k: int, harm: np.ndarray, kl_exact: np.ndarray | None) -> EvalResult:
    samples = [[f"reply {i}.{j}" for j in range(k)] for i in range(n)]
    tokens = np.full((n, k), 3.0)
    kl = (kl_exact if kl_exact is not None else np.zeros((n, k))) + rng.normal(0, 0.5, size=(n, k))
    return EvalResult(prompts=[f"prompt {i}: where is my bike?" for i in range(n)], samples=samples,
                      token_ids=[[[5, 6, 1]] * k for _ in range(n)], harm=harm, judge=None, logp=-tokens,
                      kl=kl, ref_nll=tokens, tokens=tokens, greedy=[row[0] for row in samples],
                      greedy_harm=harm[:, 0], greedy_judge=None, kl_exact=kl_exact)


def test_samples_keep_exact_kl_and_older_files_stay_readable(tmp_path: Path) -> None:
    rng = np.random.default_rng(1)
    before = _result(rng, 4, 2, rng.uniform(size=(4, 2)), np.zeros((4, 2)))
    after = _result(rng, 4, 2, rng.uniform(size=(4, 2)), rng.uniform(0, 2, size=(4, 2)))
    write_samples(tmp_path / "eval_after.jsonl", after)
    back = read_samples(tmp_path / "eval_after.jsonl")
    assert back.kl_exact is not None and np.allclose(back.kl_exact, after.kl_exact)
    assert summarise(back, CFG)["guards"]["kl_exact_to_reference"] == pytest.approx(after.kl_exact.mean())
    # a file written before exact KL was stored: no such key on any row
    old = tmp_path / "old.jsonl"
    rows = [json.loads(line) for line in (tmp_path / "eval_after.jsonl").read_text().splitlines()]
    old.write_text("".join(json.dumps({k: v for k, v in r.items() if k != "kl_exact"}) + "\n" for r in rows))
    legacy = read_samples(old)
    assert legacy.kl_exact is None and np.allclose(legacy.kl, after.kl)
    assert summarise(legacy, CFG)["guards"]["kl_exact_to_reference"] is None
    assert drift(before, legacy, CFG) is None
