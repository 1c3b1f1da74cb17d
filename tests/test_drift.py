"""Drift measured from the full next-token distributions, its interval, and the Pareto mark that uses it.

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

from alignrun import compare, metrics
from alignrun.config import BaseSection, Experiment, LoraSection, ReferenceSection, with_overrides
from alignrun.evaluation import (
    EvalResult,
    assess,
    drift,
    evaluate_policy,
    read_samples,
    summarise,
    write_samples,
)
from alignrun.models import build_policy
from alignrun.report import build_report, render_markdown
from alignrun.runfolder import RunFolder, write_json_atomic

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


def _tiny_eval(tiny_models: dict, perturb: bool, scope: str = "decoder") -> tuple[EvalResult, object, Experiment, list[str]]:
    torch.manual_seed(0)
    policy = build_policy(BaseSection(model=str(tiny_models["t5"])), LoraSection(rank=4, scope=scope),
                          ReferenceSection(), torch.device("cpu"))
    if perturb:
        with torch.no_grad():
            for name, param in policy.lm.named_parameters():
                if "lora_B" in name:
                    param.normal_(std=0.5)  # a policy that has moved away from the reference
    cfg = with_overrides(CFG, {"generation.max_new_tokens": 6})
    prompts = ["my chain is broken", "when are you open on friday", "the brakes squeal"]
    result = evaluate_policy(policy, prompts, _zero_scorer(), None, cfg, torch.device("cpu"))
    return result, policy, cfg, prompts


@pytest.mark.parametrize("scope", ["decoder", "encoder-decoder"])  # frozen encoder output reused, or not
def test_evaluation_exact_kl_matches_a_hand_computation(tiny_models: dict, scope: str) -> None:
    result, policy, _, prompts = _tiny_eval(tiny_models, perturb=True, scope=scope)
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
    assert summarise(back, CFG, eos_id=1)["guards"]["kl_exact_to_reference"] == pytest.approx(after.kl_exact.mean())
    # a file written before exact KL was stored: no such key on any row
    old = tmp_path / "old.jsonl"
    rows = [json.loads(line) for line in (tmp_path / "eval_after.jsonl").read_text().splitlines()]
    old.write_text("".join(json.dumps({k: v for k, v in r.items() if k != "kl_exact"}) + "\n" for r in rows))
    legacy = read_samples(old)
    assert legacy.kl_exact is None and np.allclose(legacy.kl, after.kl)
    assert summarise(legacy, CFG, eos_id=1)["guards"]["kl_exact_to_reference"] is None
    assert drift(before, legacy, CFG) is None


def _report(folder: Path, *, reduction: float, drift_after: float, spread: float = 0.05, n: int = 40,
            overrides: dict | None = None, exact: bool = True, seed: int = 0) -> dict:
    """A finished run folder whose per-prompt harm falls by `reduction` and whose exact drift is about `drift_after`."""
    cfg = with_overrides(CFG, {"run.name": folder.name, **(overrides or {})})
    rng = np.random.default_rng(seed)
    k = cfg.evaluation.samples_per_prompt
    harm_before = np.clip(rng.uniform(0.3, 0.7, size=(n, k)), 0, 1)
    harm_after = np.clip(harm_before - reduction + rng.normal(0, spread, size=(n, k)), 0, 1)
    kl_after = np.abs(drift_after + rng.normal(0, 0.2 * drift_after + 1e-3, size=(n, k)))
    before = _result(rng, n, k, harm_before, np.zeros((n, k)) if exact else None)
    after = _result(rng, n, k, harm_after, kl_after if exact else None)
    history = [{"reward_mean": -0.4, "kl_mean": drift_after, "beta": cfg.kl.coef}]
    tool = SimpleNamespace(description="synthetic scorer", executes_code=False)
    polarity = SimpleNamespace(verdict="ok", auroc=0.95, reward_auroc=0.95)
    report = build_report(
        cfg=cfg, before=before, after=after, history=history,
        assessment=assess(before, after, cfg, 1, polarity, None),
        policy=SimpleNamespace(trainable_params=1000, total_params=1_000_000, tokenizer=SimpleNamespace(eos_token_id=1)),
        polarity=polarity, scorer=tool, judge=None,
        split=SimpleNamespace(train=before.prompts, skipped=[]), wall_s=1.0, peak_rss_mb=1.0, started=0.0)
    write_json_atomic(folder / "report.json", report)
    RunFolder(folder).set_status("finished", step=1)
    return report


def test_report_carries_drift_with_a_paired_interval(tmp_path: Path) -> None:
    report = _report(tmp_path / "a", reduction=0.1, drift_after=1.5)
    ev = report["evaluation"]
    before, after = np.array(ev["per_prompt"]["drift_before"]), np.array(ev["per_prompt"]["drift_after"])
    assert len(after) == ev["prompts"] and not before.any()
    d = ev["drift"]
    assert d["diff"] == pytest.approx(after.mean() - before.mean(), rel=1e-12)  # numpy mean of the per-prompt values
    assert d["diff_ci"][0] < d["diff"] < d["diff_ci"][1] and d["diff_ci"][1] - d["diff_ci"][0] < 0.5
    assert "Drift from the reference" in render_markdown(report, [])
    [row], _, _ = compare.compare_runs([compare.Run("a", tmp_path / "a", report)])
    assert row["drift"] == pytest.approx(d["diff"]) and row["drift_ci"] == pytest.approx(d["diff_ci"])


# ---------------------------------------------------------------- compare: Pareto mark, overrides, plot

def _rows(tmp_path: Path, runs: dict[str, dict]) -> dict[str, dict]:
    found = [compare.Run(name, tmp_path / name, _report(tmp_path / name, seed=i, **kw))
             for i, (name, kw) in enumerate(runs.items())]
    rows, _, _ = compare.compare_runs(found)
    return {r["run"]: r for r in rows}


def test_a_run_whose_harm_rose_gets_no_pareto_mark(tmp_path: Path) -> None:
    # issue 16 point 6: reduction -0.05 at drift 0.1 beside 0.3 at drift 2.0 (point Pareto would mark both)
    rows = _rows(tmp_path, {"rose": {"reduction": -0.05, "drift_after": 0.1},
                            "fell": {"reduction": 0.3, "drift_after": 2.0}})
    assert rows["rose"]["harm_diff_ci"][0] > 0
    assert {k: r["pareto"] for k, r in rows.items()} == {"rose": False, "fell": True}


def test_a_fall_within_the_noise_gets_no_pareto_mark(tmp_path: Path) -> None:
    rows = _rows(tmp_path, {"unclear": {"reduction": 0.01, "drift_after": 0.1, "spread": 0.2},
                            "fell": {"reduction": 0.3, "drift_after": 2.0}})
    assert rows["unclear"]["harm_diff"] < 0 < rows["unclear"]["harm_diff_ci"][1]
    assert {k: r["pareto"] for k, r in rows.items()} == {"unclear": False, "fell": True}


def test_only_differences_beyond_the_intervals_strike_a_run_off(tmp_path: Path) -> None:
    rows = _rows(tmp_path, {
        "best": {"reduction": 0.30, "drift_after": 1.0},
        "close": {"reduction": 0.285, "drift_after": 1.03},  # worse on both by point, within both intervals
        "beaten": {"reduction": 0.10, "drift_after": 1.5},  # less reduction beyond the intervals, more drift
        "cheap": {"reduction": 0.10, "drift_after": 0.2},   # less drift beyond the intervals: a real trade-off
    })
    assert rows["beaten"]["harm_diff_ci"][1] < 0  # eligible: struck off by dominance, not by the rule above
    assert {k: r["pareto"] for k, r in rows.items()} == {"best": True, "close": True, "beaten": False, "cheap": True}


def test_clearly_less_drift_at_no_less_reduction_strikes_a_run_off(tmp_path: Path) -> None:
    rows = _rows(tmp_path, {"lean": {"reduction": 0.32, "drift_after": 0.5}, "heavy": {"reduction": 0.30, "drift_after": 2.0}})
    assert rows["lean"]["harm_reduction"] >= rows["heavy"]["harm_reduction"]
    assert rows["lean"]["drift_ci"][1] < rows["heavy"]["drift_ci"][0]
    assert {k: r["pareto"] for k, r in rows.items()} == {"lean": True, "heavy": False}


def test_compare_says_when_a_swept_key_was_overridden(tmp_path: Path) -> None:
    def notes(runs: dict[str, dict]) -> str:
        found = [compare.Run(name, tmp_path / name, _report(tmp_path / name, **kw)) for name, kw in runs.items()]
        return "\n".join(compare.compare_runs(found)[2])

    adaptive = notes({f"t{c}": {"reduction": 0.2, "drift_after": 1.0, "overrides": {"kl.coef": c, "kl.target": 2.0}}
                      for c in (0.02, 0.2)})
    assert "kl.coef differs between the runs but had no effect in 2 of 2 (kl.target = 2.0)" in adaptive
    fixed = notes({f"f{c}": {"reduction": 0.2, "drift_after": 1.0, "overrides": {"kl.coef": c}} for c in (0.02, 0.2)})
    assert "had no effect" not in fixed
    gain = notes({f"g{g}": {"reduction": 0.2, "drift_after": 1.0, "overrides": {"kl.gain": g}} for g in (0.1, 0.5)})
    assert "kl.gain differs between the runs but had no effect in 2 of 2 (kl.target = unset)" in gain
    split = notes({f"h{h}": {"reduction": 0.2, "drift_after": 1.0,
                             "overrides": {"data.heldout_share": h, "data.heldout": "heldout.jsonl"}} for h in (0.1, 0.3)})
    assert 'data.heldout_share differs between the runs but had no effect in 2 of 2 (data.heldout = "heldout.jsonl")' in split


def test_plot_error_bars_are_the_two_intervals(tmp_path: Path) -> None:
    rows = list(_rows(tmp_path, {"a": {"reduction": 0.3, "drift_after": 1.0},
                                 "old": {"reduction": 0.2, "drift_after": 0.5, "exact": False}}).values())
    x, y, xerr, yerr = compare.error_bars(rows)
    a, old = rows
    assert (x[0] - xerr[0, 0], x[0] + xerr[1, 0]) == pytest.approx(tuple(a["drift_ci"]))
    # harm reduction = before - after, so its interval is the change's interval negated
    assert (y[0] - yerr[0, 0], y[0] + yerr[1, 0]) == pytest.approx((-a["harm_diff_ci"][1], -a["harm_diff_ci"][0]))
    assert y[0] == pytest.approx(a["harm_reduction"])
    assert x[1] == old["kl"] and xerr[:, 1].tolist() == [0.0, 0.0]  # an older report: k1 KL, no interval
    written = compare.write_plots(rows, [], tmp_path / "plots")
    assert all(p.read_bytes().startswith(b"\x89PNG\r\n\x1a\n") for p in written)  # PNG signature (RFC 2083)
