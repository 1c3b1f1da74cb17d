"""The same run as two CPU processes (gloo) under torchrun, with accelerate splitting the global batch.

Run as a script under torchrun, this file makes one PPO update on a fixed batch shared out between the processes
(`first_update`), for the test below to compare with one process doing the same update alone.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from tests.tiny_run import (
    build_tiny_models,
    cli_env,
    read_jsonl,
    tiny_config,
    write_config,
    write_tiny_experiment,
)

TWO_PROCESSES = [sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node", "2"]


def first_update(config: Path) -> tuple[dict[str, torch.Tensor], dict[str, float], torch.Tensor]:
    """One train_step on a batch sampled once (the same in every process, same weights and seed), k replies per
    prompt (method.samples_per_prompt), each process taking the replies of its consecutive share of the prompts;
    returns the trainable weights after it, the metrics row and the replies' lengths. The base must be a BART (its
    final_logits_bias makes EOS likely, so lengths differ)."""
    from accelerate import Accelerator

    from alignrun import ppo, trainer
    from alignrun.config import load_config
    from alignrun.data import load_prompts
    from alignrun.models import build_policy
    from alignrun.reward import load_scorer

    cfg = load_config(config)
    k = cfg.method.samples_per_prompt
    accelerator = Accelerator(cpu=True)
    rank, processes = accelerator.process_index, accelerator.num_processes
    torch.set_num_threads(1)
    torch.manual_seed(0)
    policy = build_policy(cfg.base, cfg.lora, cfg.reference, accelerator.device)
    with torch.no_grad():  # LoRA's B is zero at the start (Hu et al. 2021): give it values, the same everywhere
        for name, p in policy.lm.named_parameters():
            if "lora_B" in name:
                p.normal_(std=0.05, generator=torch.Generator().manual_seed(len(name)))
        policy.lm.get_base_model().final_logits_bias[0, policy.tokenizer.eos_token_id] = 5.0
    prompts = load_prompts(cfg.data, cfg.run.seed).train[: cfg.ppo.prompts_per_step]
    torch.manual_seed(1)
    batch = trainer.rollout(policy, [p for p in prompts for _ in range(k)], cfg.generation.max_prompt_tokens,
                            cfg.generation.max_new_tokens, accelerator.device)
    share = len(prompts) // processes
    mine = batch.select(torch.arange(rank * share * k, (rank + 1) * share * k))
    if cfg.method.name != "ppo":
        policy.net.value_head.requires_grad_(False)  # as trainer._run_locked does
    optimizer = torch.optim.AdamW([p for p in policy.net.parameters() if p.requires_grad], lr=cfg.ppo.learning_rate)
    net, optimizer = accelerator.prepare(policy.net, optimizer)
    sample = trainer.rollout
    trainer.rollout = lambda *args, **kwargs: mine  # type: ignore[assignment]  # share the batch, do not sample
    try:
        row = trainer.train_step(policy, net, optimizer, accelerator, load_scorer(cfg.reward, "reward"),
                                 ppo.KLController(beta=cfg.kl.coef, target=cfg.kl.target, horizon=cfg.kl.horizon),
                                 prompts[rank * share:(rank + 1) * share], cfg, 0, accelerator.device)
    finally:
        trainer.rollout = sample  # type: ignore[assignment]
    weights = {name: p.detach().clone() for name, p in policy.net.named_parameters() if p.requires_grad}
    return weights, row, batch.response_mask.sum(1)


@pytest.mark.slow
def test_two_processes_make_the_same_first_update_as_one(tmp_path: Path) -> None:
    # A global minibatch means the update does not depend on how many processes share it (common practice for
    # data-parallel training): whitening, loss normalisation, gradient clipping and the value-clip scale all over
    # the whole batch. Tolerance 1e-6 on the weights: float sums in a different order (the update itself moves
    # them by about the learning rate, 1e-3).
    from alignrun.demo.build import build_tiny_seq2seq

    models = build_tiny_models(tmp_path / "models")
    bart = build_tiny_seq2seq(tmp_path / "models" / "bart", "bart", models.tokenizer)
    exp = write_tiny_experiment(tmp_path / "exp", bart)
    body = tiny_config(bart, exp.prompts)
    body["ppo"].update(prompts_per_step=8, minibatch=8, epochs=1, learning_rate=1e-3)
    body["kl"].update(target=1.0)
    config = write_config(tmp_path / "exp" / "first.toml", body)
    done = subprocess.run([*TWO_PROCESSES, __file__, str(config), str(tmp_path / "two.pt")], cwd=tmp_path,
                          env=cli_env(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    two, two_row, _ = torch.load(tmp_path / "two.pt", weights_only=True)
    one, one_row, lengths = first_update(config)
    assert lengths[:4].sum() != lengths[4:].sum()  # the processes' shares hold different numbers of tokens
    assert two.keys() == one.keys()
    worst = max(float((two[k] - one[k]).abs().max()) for k in one)
    assert worst <= 1e-6, worst
    assert two_row["kl_mean"] == pytest.approx(one_row["kl_mean"], rel=1e-5)
    assert two_row["reward_mean"] == pytest.approx(one_row["reward_mean"], rel=1e-6)


@pytest.mark.slow
def test_two_process_run_under_torchrun(tmp_path: Path) -> None:
    models = build_tiny_models(tmp_path / "models")
    exp = write_tiny_experiment(tmp_path / "exp", models.base, steps=2, checkpoint_every=0)
    out = tmp_path / "run"
    cmd = [*TWO_PROCESSES, "-m", "alignrun", "run", str(exp.config), "--out", str(out), "--quiet"]
    done = subprocess.run(cmd, cwd=exp.folder, env=cli_env(), capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    assert json.loads((out / "environment.json").read_text())["processes"] == 2
    assert json.loads((out / "status.json").read_text())["state"] == "finished"
    assert [row["step"] for row in read_jsonl(out / "metrics.jsonl")] == [1, 2]  # one writer, no interleaving
    assert json.loads((out / "report.json").read_text())["run"]["steps"] == 2
    # every process's random generators are in the checkpoint, and they differ (each samples its own replies)
    rng = torch.load(out / "checkpoint" / "trainer_state.pt", weights_only=True)["rng"]
    assert len(rng) == 2 and not torch.equal(rng[0]["torch"], rng[1]["torch"])
    # the held-out evaluation was shared out and joined: every prompt once, k samples and one greedy reply each
    rows = read_jsonl(out / "eval_after.jsonl")
    prompts = exp.body["evaluation"]["max_prompts"]
    assert len(rows) == prompts * (exp.body["evaluation"]["samples_per_prompt"] + 1)
    assert len({r["prompt"] for r in rows}) == prompts


if __name__ == "__main__":  # under torchrun: python tests/test_multiprocess.py CONFIG OUT
    result = first_update(Path(sys.argv[1]))
    if int(os.environ.get("RANK", "0")) == 0:
        torch.save(result, sys.argv[2])
    torch.distributed.destroy_process_group()
