"""The critic-free methods beside PPO: leave-one-out (RLOO) and group-relative (GRPO) advantages against the worked
examples of REFERENCES.md, the k3 KL loss against scipy, the [method] config errors, the trainer's wiring of each
method, PPO's numbers unchanged from the loop before [method] existed, and exact resume for each method."""

from __future__ import annotations

import hashlib
import io
import json
import shutil
import signal
import subprocess
import sys
import tarfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.stats
import torch

from alignrun import advantages as baselines
from alignrun import ppo, trainer
from alignrun.cli import main
from alignrun.config import load_config
from alignrun.errors import UserError
from alignrun.rollout import Rollout
from tests import test_multiprocess, tiny_run
from tests.test_config import GOOD
from tests.test_resume import checkpoint_step, start_held, status, training_numbers

# ------------------------------------------------------------------------------- advantages, worked examples


def test_leave_one_out_worked_example() -> None:
    # REFERENCES.md, RLOO (Kool et al. 2019; Ahmadian et al. 2024): R = [1, 0, 0.5, 0.5] -> baselines
    # [1/3, 2/3, 1/2, 1/2] -> A = [2/3, -2/3, 0, 0]
    got = baselines.leave_one_out(torch.tensor([[1.0, 0.0, 0.5, 0.5]]))
    torch.testing.assert_close(got, torch.tensor([[2 / 3, -2 / 3, 0.0, 0.0]]), rtol=0, atol=1e-7)


@pytest.mark.parametrize("std, expected", [
    ("sample", [1.2247, -1.2247, 0.0, 0.0]),      # REFERENCES.md, GRPO: sample std sqrt(0.5/3) = 0.4082
    ("population", [1.4142, -1.4142, 0.0, 0.0]),  # REFERENCES.md, GRPO: population std sqrt(0.125) = 0.3536
    ("none", [0.5, -0.5, 0.0, 0.0]),              # R - mean(R), mean 0.5 (Liu et al. 2025's form)
])
def test_group_relative_worked_example(std: str, expected: list[float]) -> None:
    # Shao et al. 2024 (DeepSeekMath), worked by hand in REFERENCES.md; 4 decimals there, hence atol 1e-4
    got = baselines.group_relative(torch.tensor([[1.0, 0.0, 0.5, 0.5]]), std)
    torch.testing.assert_close(got, torch.tensor([expected]), rtol=0, atol=1e-4)


def test_group_relative_std_matches_numpy() -> None:
    # the two std conventions: numpy's ddof=1 (sample) and ddof=0 (population)
    r = np.random.default_rng(3).normal(size=(5, 6))
    for std, ddof in (("sample", 1), ("population", 0)):
        expected = (r - r.mean(1, keepdims=True)) / r.std(1, ddof=ddof, keepdims=True)
        got = baselines.group_relative(torch.tensor(r), std).numpy()
        np.testing.assert_allclose(got, expected, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("k", [2, 3, 8])
@pytest.mark.parametrize("value", [0.0, -0.37, 0.1])
def test_identical_rewards_give_zero_advantage(k: int, value: float) -> None:
    # a group where every reply scored the same carries no signal (common practice; both papers' baselines)
    rewards = torch.full((3, k), value)
    assert torch.equal(baselines.leave_one_out(rewards).abs().max() <= 1e-7, torch.tensor(True))
    for std in ("sample", "population", "none"):
        assert baselines.group_relative(rewards, std).abs().max() <= 1e-7, std


def test_a_spread_below_float_noise_gives_zero_not_unit_advantages() -> None:
    # (R - mean) / std of two rewards 1e-9 apart would be -+0.707 (sample std): noise divided by noise. Below
    # advantages.STD_FLOOR the group counts as tied (common practice)
    rewards = torch.tensor([[0.5, 0.5 + 1e-9]], dtype=torch.float64)
    for std in ("sample", "population"):
        assert torch.equal(baselines.group_relative(rewards, std), torch.zeros_like(rewards)), std


def test_leave_one_out_sums_to_zero_and_is_k_over_k_minus_1_times_centred() -> None:
    # A_i = R_i - mean_{j != i} R_j = (k / (k - 1)) (R_i - mean R) (REFERENCES.md, RLOO identity), so each
    # group's advantages sum to zero
    rng = np.random.default_rng(0)
    for k in (2, 3, 4, 7):
        r = torch.tensor(rng.normal(size=(6, k)))
        a = baselines.leave_one_out(r)
        torch.testing.assert_close(a.sum(dim=1), torch.zeros(6, dtype=r.dtype), rtol=0, atol=1e-12)
        torch.testing.assert_close(a, k / (k - 1) * (r - r.mean(dim=1, keepdim=True)), rtol=0, atol=1e-12)


def test_per_token_spreads_one_value_over_real_tokens_only() -> None:
    mask = torch.tensor([[1.0, 1.0, 0.0], [1.0, 0.0, 0.0]])
    got = baselines.per_token(torch.tensor([0.5, -2.0]), mask)
    assert torch.equal(got, torch.tensor([[0.5, 0.5, 0.0], [-2.0, 0.0, 0.0]]))


# ------------------------------------------------------------------------------------ losses


def test_masked_average_by_tokens_and_by_replies() -> None:
    # hand computation: tokens (1 + 1 + 4) / 3 = 2; replies mean(1, 4) = 2.5 (Shao et al. 2024, eq. 3's 1/|o_i|);
    # an empty reply counts in neither
    x = torch.tensor([[1.0, 1.0, 99.0], [4.0, 99.0, 99.0], [99.0, 99.0, 99.0]])
    mask = torch.tensor([[1.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]])
    assert float(ppo.masked_average(x, mask, "tokens")) == pytest.approx(2.0, abs=1e-7)
    assert float(ppo.masked_average(x, mask, "replies")) == pytest.approx(2.5, abs=1e-7)


def test_k3_kl_loss_on_tokens_in_proportion_equals_scipy_kl() -> None:
    # E_{x~p}[k3] = KL(p || q) (Schulman 2020, k3 unbiased): replies whose tokens occur exactly in proportion to p give
    # the exact expectation, checked against scipy.stats.entropy(p, q); both averaging forms agree here
    p, q = np.array([0.5, 0.25, 0.25]), np.array([0.2, 0.5, 0.3])
    tokens = torch.tensor([[0, 0, 1, 2], [2, 0, 1, 0]])  # each reply 2 : 1 : 1 = p
    logp, ref = torch.log(torch.tensor(p))[tokens], torch.log(torch.tensor(q))[tokens]
    mask = torch.ones_like(logp)
    for average in ("tokens", "replies"):
        assert float(ppo.kl_loss(logp, ref, mask, average)) == pytest.approx(scipy.stats.entropy(p, q), abs=1e-12)
    # padding contributes nothing, whatever log-probs it holds (here -inf and 0 in a reply that is all padding)
    garbage = torch.cat([logp[:1], torch.tensor([[-float("inf"), 0.0, -7.0, 0.0]], dtype=logp.dtype)])
    pad = torch.tensor([[1.0] * 4, [0.0] * 4], dtype=logp.dtype)
    for average in ("tokens", "replies"):
        leaf = garbage.clone().requires_grad_(True)
        got = ppo.kl_loss(leaf, ref, pad, average)
        assert float(got) == pytest.approx(scipy.stats.entropy(p, q), abs=1e-12)
        got.backward()
        assert torch.isfinite(leaf.grad).all() and torch.equal(leaf.grad[1], torch.zeros(4, dtype=leaf.dtype))


def test_k3_kl_loss_hand_value() -> None:
    # one token with pi = 0.5, pi_ref = 0.25: r = 0.5, k3 = (r - 1) - log r = -0.5 + log 2 = 0.193147 (Schulman 2020);
    # k1 would give log 2 = 0.693 (the same expectation, a different estimator)
    got = ppo.kl_loss(torch.log(torch.tensor([[0.5]])), torch.log(torch.tensor([[0.25]])), torch.ones(1, 1))
    assert float(got) == pytest.approx(-0.5 + np.log(2), abs=1e-6)


def test_k3_kl_loss_monte_carlo_matches_scipy() -> None:
    # sampled tokens (seeded): the k3 mean approaches KL(p || q) = scipy.stats.entropy within 5 standard errors
    p, q = np.array([0.1, 0.6, 0.3]), np.array([0.4, 0.4, 0.2])
    gen = torch.Generator().manual_seed(0)
    draws = torch.multinomial(torch.tensor(p), 200_000, replacement=True, generator=gen).view(400, 500)
    logp, ref = torch.log(torch.tensor(p))[draws], torch.log(torch.tensor(q))[draws]
    k3 = ppo.kl_k3(logp, ref)
    got = float(ppo.kl_loss(logp, ref, torch.ones_like(logp)))
    assert abs(got - scipy.stats.entropy(p, q)) < 5 * float(k3.std()) / np.sqrt(k3.numel())


def test_policy_loss_by_replies_weighs_each_reply_once() -> None:
    # ratio 1 everywhere: the clipped surrogate is -A per token; by replies it is minus the mean of the replies' own
    # means (Shao et al. 2024, eq. 3), by tokens minus the mean over tokens (Schulman et al. 2017)
    adv = torch.tensor([[1.0, 1.0, 1.0], [-2.0, 0.0, 0.0]])
    mask = torch.tensor([[1.0, 1.0, 1.0], [1.0, 0.0, 0.0]])
    zeros = torch.zeros_like(adv)
    by_tokens = ppo.policy_loss(zeros, zeros, adv, mask, 0.2)[0]
    by_replies = ppo.policy_loss(zeros, zeros, adv, mask, 0.2, "replies")[0]
    assert float(by_tokens) == pytest.approx(-(3 - 2) / 4)
    assert float(by_replies) == pytest.approx(-(1 - 2) / 2)
    # the value loss 0.5 (V - R)^2 (no clipping) is reduced the same way: per token 0.5 (1 + 1 + 1 + 4) / 4,
    # per reply 0.5 (1 + 4) / 2
    returns = torch.tensor([[1.0, 1.0, 1.0], [2.0, 9.0, 9.0]])
    assert float(ppo.value_loss(zeros, zeros, returns, mask, None)[0]) == pytest.approx(0.5 * 7 / 4)
    assert float(ppo.value_loss(zeros, zeros, returns, mask, None, "replies")[0]) == pytest.approx(0.5 * 5 / 2)


# ------------------------------------------------------------------------------------ config

@pytest.mark.parametrize("name", ["rloo", "grpo"])
@pytest.mark.parametrize("k", [None, 1])
def test_critic_free_methods_need_two_replies_per_prompt(tmp_path: Path, name: str, k: int | None) -> None:
    path = tmp_path / "exp.toml"
    path.write_text(GOOD)
    sets = [f"method.name={name}"] + ([] if k is None else [f"method.samples_per_prompt={k}"])
    with pytest.raises(UserError) as info:
        load_config(path, sets)
    msg = str(info.value)
    assert "[method]" in msg and f"name = '{name}'" in msg and "samples_per_prompt >= 2 (it is 1)" in msg
    assert "method.samples_per_prompt = 4" in msg  # the fix


def test_method_defaults_and_values(tmp_path: Path) -> None:
    path = tmp_path / "exp.toml"
    path.write_text(GOOD)
    cfg = load_config(path)
    assert (cfg.method.name, cfg.method.samples_per_prompt, cfg.method.group_std, cfg.method.loss_average) == (
        "ppo", 1, "sample", "tokens")
    with pytest.raises(UserError, match="'method.name'.*'a2c'"):
        load_config(path, ["method.name=a2c"])
    with pytest.raises(UserError, match="'method.group_std'"):
        load_config(path, ["method.group_std=mad"])
    assert load_config(path, ["method.name=ppo", "method.samples_per_prompt=3"]).method.samples_per_prompt == 3


# ------------------------------------------------------------------------------------ the trainer's wiring


def fake_rollout(k: int, groups: int = 2, seed: int = 0) -> tuple[Rollout, torch.Tensor]:
    """A rollout of groups x k replies with random log-probs, uneven lengths, and sequence scores."""
    gen = torch.Generator().manual_seed(seed)
    b, t = groups * k, 5
    lengths = torch.randint(1, t + 1, (b,), generator=gen)
    mask = (torch.arange(t).expand(b, t) < lengths.unsqueeze(1)).float()
    logp = -torch.rand(b, t, generator=gen) * 3 * mask
    ref = -torch.rand(b, t, generator=gen) * 3 * mask
    ids = torch.zeros(b, t, dtype=torch.long)
    ro = Rollout(ids, torch.ones(b, 2), ids, ids, mask, logp, ref, torch.randn(b, t, generator=gen) * mask,
                 [""] * b)
    return ro, torch.rand(b, generator=gen)


def method_cfg(tmp_path: Path, *sets: str) -> Any:
    path = tmp_path / "exp.toml"
    path.write_text(GOOD)
    return load_config(path, list(sets))


def test_rloo_puts_the_summed_k1_in_the_reward_before_the_baseline(tmp_path: Path) -> None:
    cfg = method_cfg(tmp_path, "method.name=rloo", "method.samples_per_prompt=3")
    ro, score = fake_rollout(3)
    beta = 0.3
    adv, returns, kl = trainer.method_advantages(score, ro, cfg, beta, lambda t: t)
    assert returns is None
    # by hand: R_i = score_i - beta sum_t (log pi - log pi_ref) (Ahmadian et al. 2024), leave-one-out per group of 3
    r = (score - beta * ((ro.logp - ro.ref_logp) * ro.response_mask).sum(1)).view(2, 3)
    loo = torch.stack([r[:, i] - (r.sum(1) - r[:, i]) / 2 for i in range(3)], dim=1).reshape(-1)
    torch.testing.assert_close(adv, loo.unsqueeze(1) * ro.response_mask)
    torch.testing.assert_close(kl, (ro.logp - ro.ref_logp) * ro.response_mask)


def test_grpo_keeps_the_kl_out_of_the_advantages(tmp_path: Path) -> None:
    cfg = method_cfg(tmp_path, "method.name=grpo", "method.samples_per_prompt=4", "method.group_std=population")
    ro, score = fake_rollout(4)
    adv, returns, _ = trainer.method_advantages(score, ro, cfg, 0.7, lambda t: t)
    assert returns is None
    g = score.view(2, 4).numpy()
    expected = (g - g.mean(1, keepdims=True)) / g.std(1, ddof=0, keepdims=True)  # numpy, population std
    torch.testing.assert_close(adv, torch.tensor(expected.reshape(-1), dtype=torch.float32).unsqueeze(1)
                               * ro.response_mask)


def test_ppo_advantages_are_the_plain_gae_composition(tmp_path: Path) -> None:
    # PPO's branch is the loop as it was: k1 penalty in the reward -> GAE -> whitening (Ziegler et al. 2019;
    # Schulman et al. 2016; Huang et al. 2022), bit for bit
    cfg = method_cfg(tmp_path)
    ro, score = fake_rollout(1, groups=6)
    adv, returns, kl = trainer.method_advantages(score, ro, cfg, 0.2, lambda t: t)
    rewards, kl_ref = ppo.penalised_rewards(score, ro.logp, ro.ref_logp, ro.response_mask, 0.2)
    adv_ref, ret_ref = ppo.gae(rewards, ro.values, ro.response_mask, cfg.ppo.gamma, cfg.ppo.gae_lambda)
    assert torch.equal(adv, ppo.whiten(adv_ref, ro.response_mask)) and torch.equal(returns, ret_ref)
    assert torch.equal(kl, kl_ref)


def test_minibatches_hold_k_replies_per_prompt(tmp_path: Path) -> None:
    # ppo.minibatch counts prompts: 4 prompts x 3 replies in minibatches of 2 prompts = 2 minibatches of 6 rows
    cfg = method_cfg(tmp_path, "method.name=rloo", "method.samples_per_prompt=3", "ppo.prompts_per_step=4",
                     "ppo.minibatch=2", "ppo.epochs=2")
    order = trainer.minibatch_order(12, cfg, step=0, processes=1)
    assert [[len(mb) for mb in epoch] for epoch in order] == [[6, 6], [6, 6]]
    assert all(sorted(torch.cat(epoch).tolist()) == list(range(12)) for epoch in order)


def test_describe_states_the_variant(tmp_path: Path) -> None:
    grpo = method_cfg(tmp_path, "method.name=grpo", "method.samples_per_prompt=4", "method.group_std=none",
                      "method.loss_average=replies")
    d = baselines.describe(grpo.method, grpo.ppo)
    assert (d["kl_placement"], d["group_std"], d["loss_average"], d["samples_per_prompt"]) == ("loss", "none", "replies", 4)
    assert "without std division" in d["advantage"] and d["beta_scales"] == "the k3 loss term"
    rloo = method_cfg(tmp_path, "method.name=rloo", "method.samples_per_prompt=2")
    d = baselines.describe(rloo.method, rloo.ppo)
    assert (d["kl_placement"], d["group_std"], d["beta_scales"]) == ("reward", None, "the KL penalty in the reward")
    assert "leave-one-out" in d["advantage"] and "not trained" in d["value_head"]
    ppo_cfg = method_cfg(tmp_path)
    d = baselines.describe(ppo_cfg.method, ppo_cfg.ppo)
    assert (d["name"], d["kl_placement"], d["group_std"]) == ("ppo", "reward", None) and "GAE" in d["advantage"]


# ------------------------------------------------------------------------------------ end to end (slow)

# PPO's numbers as of the last deliberate change to them (2de1236: the value head reads detached hidden states).
# Before it, 711b14b (the loop before [method]) was the reference, and the methods' refactor matched it at
# tolerance 0. A deliberate change to PPO's numbers moves this commit, in a commit of its own.
PPO_REFERENCE = "2de1236"


def _fingerprint(run_dir: Path) -> dict[str, Any]:
    """Metrics (timing removed), after-training numbers and adapter file hashes of a finished run."""
    return {"metrics": tiny_run.metrics_without_timing(run_dir),
            "after": tiny_run.report_numbers(run_dir)["after"],
            "adapter": {p.name: hashlib.sha256(p.read_bytes()).hexdigest()
                        for p in sorted((run_dir / "adapter").glob("*.safetensors"))}}


@pytest.mark.slow
@pytest.mark.parametrize("sets", [[], ["--set", "base.precision=bf16", "--set", "ppo.epochs=2"]])
def test_ppo_is_unchanged_from_the_reference_commit(tiny_models, tmp_path: Path, sets: list[str]) -> None:
    """The same tiny run with this tree and with the tree of PPO_REFERENCE (git archive), both as real
    processes on this machine: metrics, evaluation and adapter files identical (tolerance 0)."""
    try:
        archive = subprocess.run(["git", "-C", str(tiny_run.REPO), "archive", PPO_REFERENCE, "alignrun"],
                                 capture_output=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError):
        pytest.skip(f"git or commit {PPO_REFERENCE} not available (a shallow clone?)")
    old_tree = tmp_path / "reference"
    with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
        tar.extractall(old_tree, filter="data")
    exp = tiny_run.write_tiny_experiment(tmp_path / "exp", tiny_models["t5"], steps=3, checkpoint_every=0)
    runs = {}
    for name, path in (("before", f"{old_tree}:{tiny_run.REPO}"), ("now", str(tiny_run.REPO))):
        out = tmp_path / name
        done = subprocess.run(tiny_run.alignrun_command("run", str(exp.config), "--out", str(out), "--quiet", *sets),
                              cwd=tmp_path, env={**tiny_run.cli_env(), "PYTHONPATH": path}, capture_output=True,
                              text=True, timeout=300)
        assert done.returncode == 0, done.stderr
        runs[name] = _fingerprint(out)
    assert runs["now"] == runs["before"]


@pytest.mark.slow
@pytest.mark.parametrize("name", ["rloo", "grpo"])
def test_critic_free_sigkill_then_resume_is_exact(name: str, tiny_models, tmp_path: Path) -> None:
    """As tests/test_resume.py for PPO: an uninterrupted run, and a copy SIGKILLed inside step 3 (checkpoint 2
    complete) then resumed; every training number, the adapter and the value head (untrained) are equal."""
    exp = tiny_run.write_tiny_experiment(tmp_path / "exp", tiny_models["t5"], steps=4, checkpoint_every=1,
                                         reward_source=f"{tiny_run.MODULE}:scripted_harm")
    body = {**exp.body, "method": {"name": name, "samples_per_prompt": 2}}
    config = tiny_run.write_config(exp.config, body)
    reference = tmp_path / "reference"
    tiny_run.reset_call_counts()
    assert main(["run", str(config), "--out", str(reference), "--quiet"]) == 0
    out = tmp_path / "killed"
    child, _ = start_held(config, out, hold_step=3)
    assert checkpoint_step(out) == 2
    child.send_signal(signal.SIGKILL)
    assert child.wait(timeout=60) == -signal.SIGKILL
    assert main(["run", str(config), "--resume", str(out), "--quiet"]) == 0
    assert status(out)["state"] == "finished"
    resumed, ref = training_numbers(out), training_numbers(reference)
    assert [r["step"] for r in resumed["metrics"]] == [1, 2, 3, 4]
    for key in ref:
        assert resumed[key] == ref[key], f"{key} differs after resuming"
    assert _fingerprint(out)["adapter"] == _fingerprint(reference)["adapter"]
    report = json.loads((out / "report.json").read_text())
    method = report["training"]["method"]
    assert (method["name"], method["samples_per_prompt"]) == (name, 2)
    assert method["kl_placement"] == ("loss" if name == "grpo" else "reward")
    assert "value_loss" not in resumed["metrics"][0] and ("kl_loss" in resumed["metrics"][0]) == (name == "grpo")
    from alignrun import compare

    runs, _ = compare.collect([str(reference)])
    rows, varying, _ = compare.compare_runs(runs)
    cols = dict(compare.columns(rows, varying))
    assert cols["method"] == [f"{name} k=2"]
    shutil.rmtree(tmp_path / "killed-cwd", ignore_errors=True)


@pytest.mark.slow
def test_critic_free_value_head_keeps_its_initial_weights(tiny_models, tmp_path: Path) -> None:
    """rloo trains the adapter only: the saved value head equals the freshly initialised one of a PPO run with the
    same seed (before its first update), while the adapter moved; the optimiser holds the adapter's tensors only
    (a trainable head that gets no gradient would also stall a multi-process run, whose gradient reduction waits
    for every trainable parameter)."""
    from safetensors.torch import load_file

    exp = tiny_run.write_tiny_experiment(tmp_path / "exp", tiny_models["t5"], steps=2, checkpoint_every=0)
    runs = {}
    for name, sets in (("rloo", ["--set", "method.name=rloo", "--set", "method.samples_per_prompt=2"]),
                       ("ppo0", ["--set", "ppo.learning_rate=1e-12"])):
        assert main(["run", str(exp.config), "--out", str(tmp_path / name), "--quiet", *sets]) == 0
        runs[name] = {f: load_file(tmp_path / name / "adapter" / f)
                      for f in ("value_head.safetensors", "adapter_model.safetensors")}
    head, initial = runs["rloo"]["value_head.safetensors"], runs["ppo0"]["value_head.safetensors"]
    assert set(head) == set(initial) and all(torch.allclose(head[k], initial[k], atol=1e-9) for k in head)
    assert any(not torch.equal(v, runs["ppo0"]["adapter_model.safetensors"][k])
               for k, v in runs["rloo"]["adapter_model.safetensors"].items())
    optimised = {name: len(torch.load(tmp_path / name / "checkpoint" / "trainer_state.pt",
                                      weights_only=True)["optimizer"]["param_groups"][0]["params"])
                 for name in runs}
    lora = len(runs["rloo"]["adapter_model.safetensors"])
    assert optimised == {"rloo": lora, "ppo0": lora + len(initial)}


def test_compare_names_the_method_and_reads_older_reports_as_ppo() -> None:
    from alignrun import compare

    assert compare._method({}) == "ppo"  # a report written before [method] existed: PPO, one reply per prompt
    assert compare._method({"method": {"name": "ppo", "samples_per_prompt": 1}}) == "ppo"
    assert compare._method({"method": {"name": "grpo", "samples_per_prompt": 4}}) == "grpo k=4"


@pytest.mark.slow
@pytest.mark.parametrize("name, average", [("grpo", "tokens"), ("rloo", "replies")])
def test_two_processes_make_the_same_critic_free_update_as_one(name: str, average: str, tmp_path: Path) -> None:
    # as tests/test_multiprocess.py for PPO (a global minibatch, common practice for data-parallel training): the
    # groups stay inside a process, the loss is weighed by each process's share of tokens (or replies)
    from alignrun.demo.build import build_tiny_seq2seq

    models = tiny_run.build_tiny_models(tmp_path / "models")
    bart = build_tiny_seq2seq(tmp_path / "models" / "bart", "bart", models.tokenizer)
    exp = tiny_run.write_tiny_experiment(tmp_path / "exp", bart)
    body = tiny_run.tiny_config(bart, exp.prompts)
    body["ppo"].update(prompts_per_step=4, minibatch=4, epochs=1, learning_rate=1e-3)
    body["kl"].update(target=1.0, coef=0.5)
    body["method"] = {"name": name, "samples_per_prompt": 2, "loss_average": average}
    config = tiny_run.write_config(tmp_path / "exp" / "first.toml", body)
    two_processes = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node", "2"]
    done = subprocess.run([*two_processes, test_multiprocess.__file__, str(config), str(tmp_path / "two.pt")], cwd=tmp_path,
                          env=tiny_run.cli_env(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    two, two_row, _ = torch.load(tmp_path / "two.pt", weights_only=True)
    one, one_row, lengths = test_multiprocess.first_update(config)
    assert lengths[:4].sum() != lengths[4:].sum()  # the processes' shares hold different numbers of tokens
    assert two.keys() == one.keys() and not any("value_head" in key for key in one)
    worst = max(float((two[key] - one[key]).abs().max()) for key in one)
    assert worst <= 1e-6, worst  # test_multiprocess.py's tolerance: float sums in another order
    assert two_row["kl_mean"] == pytest.approx(one_row["kl_mean"], rel=1e-5)
