"""The loop: config -> preflight -> rollout -> reward -> PPO update -> evaluation -> report, in one run folder."""

from __future__ import annotations

import contextlib
import dataclasses
import json
import os
import platform
import random
import resource
import signal
import sys
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch
from accelerate import Accelerator
from trl.trainer.utils import entropy_from_logits, selective_log_softmax

from alignrun import advantages as baselines
from alignrun import console, cpu, evaluation, html_report, ppo, tracking
from alignrun.budget import emulated_bf16_warning
from alignrun.checkpoint import (
    checkpoint_step,
    load_checkpoint,
    read_metrics,
    restore,
    save_on_main,
    saved_step,
    snapshot,
    truncate_metrics,
)
from alignrun.config import Experiment, load_config, result_differences, to_toml
from alignrun.cpu import ThreadChoice
from alignrun.data import load_prompts
from alignrun.errors import UserError
from alignrun.inputs import check_inputs
from alignrun.metrics import num
from alignrun.models import (
    Policy,
    autocast,
    build_policy,
    pick_device,
    save_adapter,
    set_threads,
)
from alignrun.preflight import require_polarity
from alignrun.report import build_report, load_report, summary_text, write_report
from alignrun.reward import load_scorer, reward_from_scores
from alignrun.rollout import Rollout, rollout
from alignrun.runfolder import (
    RunFolder,
    check_run_folder,
    read_status,
    remove_run_files,
    write_json_atomic,
    write_text_atomic,
)


def peak_rss_mb() -> float:
    """This process's own peak resident memory: VmHWM, not ru_maxrss, which Linux carries over fork + exec (a
    sweep worker would report its parent's peak)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024  # kB
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux


def seed_everything(seed: int) -> None:
    random.seed(seed)
    np.random.seed(seed)
    torch.manual_seed(seed)


def step_prompts(train: list[str], step: int, per_step: int, seed: int) -> list[str]:
    """Prompts for one step: a stream of seeded permutations, so the data position is just the step number."""
    start = step * per_step
    out: list[str] = []
    while len(out) < per_step:
        epoch, offset = divmod(start + len(out), len(train))
        order = np.random.default_rng([seed, epoch]).permutation(len(train))
        out.extend(train[i] for i in order[offset: offset + per_step - len(out)])
    return out


def minibatch_order(n: int, cfg: Experiment, step: int, processes: int) -> list[list[torch.Tensor]]:
    """Row indices of every minibatch of every epoch of this step (a seeded shuffle per epoch). ppo.minibatch counts
    prompts, so a minibatch holds its k replies each (not necessarily of the same prompts)."""
    mb = max(1, cfg.ppo.minibatch // processes) * cfg.method.samples_per_prompt
    gen = torch.Generator().manual_seed(cfg.run.seed * 100_003 + step)
    return [list(torch.randperm(n, generator=gen).split(mb)) for _ in range(cfg.ppo.epochs)]


def policy_forward(net: torch.nn.Module, part: Rollout, cfg: Experiment,
                   device: torch.device) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor]:
    """The update's forward: (fp32 logits [b, T, V], log-probs of the sampled tokens [b, T], values [b, T])."""
    with autocast(cfg.base.precision, device):
        logits, values = net(part.prompt_ids, part.prompt_mask, part.decoder_input, part.encoder_hidden)
    logits = logits.float()
    return logits, selective_log_softmax(logits, part.response_ids), values.float()


@torch.no_grad()
def update_forward_bookkeeping(net: torch.nn.Module, ro: Rollout, first_epoch: list[torch.Tensor],
                               cfg: Experiment, device: torch.device) -> Rollout:
    """Old log-probs and values from the update's own forward, minibatch by minibatch as the first epoch will run
    it. Under bf16 the generation pass (KV cache, one position at a time) rounds differently from that forward,
    by up to 1.6e-2 in log-ratio: the first minibatch would start off-ratio and step 0 would show a spurious KL."""
    logp, values = torch.zeros_like(ro.logp), torch.zeros_like(ro.values)
    for idx in first_epoch:
        part = ro.select(idx)
        _, logp[idx], values[idx] = policy_forward(net, part, cfg, device)
    return dataclasses.replace(ro, logp=logp * ro.response_mask, values=values * ro.response_mask)


def method_advantages(reward: torch.Tensor, ro: Rollout, cfg: Experiment, beta: float,
                      total: Any) -> tuple[torch.Tensor, torch.Tensor | None, torch.Tensor]:
    """The method's advantages [B, T], value-head targets [B, T] (None for the critic-free methods) and the per-token
    k1 KL [B, T] (0 on padding). A prompt's k replies are adjacent rows of the rollout."""
    if cfg.method.name == "ppo":
        rewards, kl = ppo.penalised_rewards(reward, ro.logp, ro.ref_logp, ro.response_mask, beta)
        advantages, returns = ppo.gae(rewards, ro.values, ro.response_mask, cfg.ppo.gamma, cfg.ppo.gae_lambda)
        if cfg.ppo.whiten_advantages:
            advantages = ppo.whiten(advantages, ro.response_mask, total=total)
        return advantages, returns, kl
    kl = torch.where(ro.response_mask.bool(), ppo.kl_k1(ro.logp, ro.ref_logp), torch.zeros_like(ro.logp))
    groups = reward.view(-1, cfg.method.samples_per_prompt)
    if cfg.method.name == "rloo":
        # R = score - beta sum_t k1_t: the KL penalty inside the reply's reward (Ahmadian et al. 2024)
        per_reply = baselines.leave_one_out(groups - beta * kl.sum(dim=1).view_as(groups))
    else:
        per_reply = baselines.group_relative(groups, cfg.method.group_std)  # KL goes into the loss (ppo_update)
    return baselines.per_token(per_reply.reshape(-1), ro.response_mask), None, kl


def ppo_update(net: torch.nn.Module, optimizer: torch.optim.Optimizer, accelerator: Accelerator, ro: Rollout,
               advantages: torch.Tensor, returns: torch.Tensor | None, cfg: Experiment, step: int,
               device: torch.device, order: list[list[torch.Tensor]] | None = None,
               beta: float = 0.0) -> dict[str, float]:
    """Several epochs of the clipped policy loss over minibatches (Schulman et al. 2017), in the order `order`
    (default: minibatch_order's); plus the value loss when there are value targets (`returns`, PPO), and beta times
    the k3 KL loss when the method puts the KL in the loss (grpo)."""
    p, average = cfg.ppo, cfg.method.loss_average
    kl_in_loss = cfg.method.name == "grpo"
    order = order or minibatch_order(ro.response_ids.shape[0], cfg, step, accelerator.num_processes)
    total = _sum_over_processes(accelerator)
    # value clipping in units of this step's return spread, so it means the same whatever the reward's scale
    # (Huang et al. 2022 clip values of normalised returns at 0.2; from memory)
    value_clip = (p.value_clip * float(ppo.moments(returns, ro.response_mask, total)[1].sqrt())
                  if p.value_clip and returns is not None else None)
    kept = ["policy_loss", "value_loss", "clip_frac", "value_clip_frac", "approx_kl", "entropy", "kl_loss"]
    if returns is None:
        kept = [k for k in kept if not k.startswith("value_")]
    totals: dict[str, list[float]] = {k: [] for k in kept if k != "kl_loss" or kl_in_loss}
    for epoch in order:
        for idx in epoch:
            cpu.rebalance()
            part = ro.select(idx)
            logits, logp, values = policy_forward(net, part, cfg, device)
            mask = part.response_mask
            pl, clip_frac, approx_kl = ppo.policy_loss(logp, part.logp, advantages[idx], mask, p.clip_epsilon, average)
            found = {"policy_loss": pl, "clip_frac": clip_frac, "approx_kl": approx_kl}
            if returns is not None:
                vl, vclip = ppo.value_loss(values, part.values, returns[idx], mask, value_clip, average)
                loss = pl + p.value_weight * vl
                found.update(value_loss=vl, value_clip_frac=vclip)
            else:
                loss = pl
            if kl_in_loss:
                kl_term = ppo.kl_loss(logp, part.ref_logp, mask, average)
                loss = loss + beta * kl_term  # + beta D_KL(pi || pi_ref), k3 per token (Shao et al. 2024)
                found["kl_loss"] = kl_term
            # the losses are means over this process's tokens (or replies) and the gradients are averaged over
            # processes: weigh by this process's share of the global minibatch's tokens (or replies), so the update
            # is that of one process (1.0)
            tokens = mask.sum() if average == "tokens" else mask.bool().any(dim=1).sum().to(mask.dtype)
            share = tokens * accelerator.num_processes / total(tokens).clamp(min=1)
            optimizer.zero_grad(set_to_none=True)
            accelerator.backward(loss * share)
            grad_norm = accelerator.clip_grad_norm_(net.parameters(), p.max_grad_norm)
            if not (torch.isfinite(loss) and torch.isfinite(torch.as_tensor(grad_norm))):
                raise NonFinite(f"loss is {loss.item()} (gradient norm {float(grad_norm)}) at step {step + 1}")
            optimizer.step()
            with torch.no_grad():
                found["entropy"] = ppo.masked_mean(entropy_from_logits(logits), mask)
            for key in totals:
                totals[key].append(float(found[key].detach()))
    return {k: float(np.mean(v)) for k, v in totals.items()}


class NonFinite(Exception):
    """A reward or loss became NaN or inf."""


def _gather_mean(accelerator: Accelerator, x: torch.Tensor) -> float:
    return float(accelerator.gather(x.detach().reshape(-1)).mean())


def _sum_over_processes(accelerator: Accelerator) -> Any:
    """A function summing a tensor over all processes (the tensor itself with one process)."""
    if accelerator.num_processes == 1:
        return lambda t: t
    return lambda t: accelerator.reduce(t.clone(), reduction="sum")


def _any_process(accelerator: Accelerator, flag: bool) -> bool:
    """True on every process when `flag` is true on any (so that all take the same branch)."""
    if accelerator.num_processes == 1:
        return flag
    return bool(accelerator.gather(torch.tensor([float(flag)], device=accelerator.device)).max())


def train_step(policy: Policy, net: torch.nn.Module, optimizer: torch.optim.Optimizer, accelerator: Accelerator,
               scorer: Any, controller: ppo.KLController, prompts: list[str], cfg: Experiment, step: int,
               device: torch.device) -> dict[str, float]:
    t0 = time.perf_counter()
    prompts = [p for p in prompts for _ in range(cfg.method.samples_per_prompt)]  # a prompt's k replies: one group
    with autocast(cfg.base.precision, device):
        ro = rollout(policy, prompts, cfg.generation.max_prompt_tokens, cfg.generation.max_new_tokens, device)
    order = minibatch_order(len(prompts), cfg, step, accelerator.num_processes)
    if cfg.base.precision == "bf16":
        ro = update_forward_bookkeeping(net, ro, order[0], cfg, device)
    t1 = time.perf_counter()
    problem = ""
    try:
        scores = scorer.score(ro.texts)
        reward = torch.tensor(reward_from_scores(scores, cfg.reward), dtype=torch.float32, device=device)
        if not torch.isfinite(reward).all():
            problem = "returned NaN/inf"
    except UserError as exc:  # e.g. a callable that returned NaN: same guard as a NaN reward
        problem = f"failed: {exc}"
    if _any_process(accelerator, bool(problem)):  # every process stops at the same point
        raise NonFinite(f"the reward backend {problem or 'failed in another process'} at step {step + 1}")
    t2 = time.perf_counter()
    advantages, returns, kl = method_advantages(reward, ro, cfg, controller.beta, _sum_over_processes(accelerator))
    stats = ppo_update(net, optimizer, accelerator, ro, advantages, returns, cfg, step, device, order, controller.beta)
    t3 = time.perf_counter()
    seq_kl = _gather_mean(accelerator, kl.sum(dim=1))
    beta = controller.beta
    controller.update(seq_kl, episodes=len(prompts) * accelerator.num_processes)
    tokens = float(accelerator.gather(ro.response_mask.sum().reshape(1)).sum())
    # a reply with no EOS was cut at generation.max_new_tokens; it is scored and treated as ended (rollout.rollout)
    truncated = _gather_mean(accelerator, (ro.response_ids != policy.tokenizer.eos_token_id).all(dim=1).float())
    all_reward = accelerator.gather(reward)
    return {
        "step": step + 1, "reward_mean": float(all_reward.mean()), "reward_std": float(all_reward.std()),
        "harm_mean": _gather_mean(accelerator, torch.as_tensor(scores.harm, dtype=torch.float32)),
        "kl_mean": seq_kl, "beta": beta, **stats,
        "length_mean": tokens / (len(prompts) * accelerator.num_processes), "truncated_share": truncated,
        "rollout_s": t1 - t0, "reward_s": t2 - t1, "update_s": t3 - t2, "step_s": t3 - t0,
        "tokens_per_s": tokens / max(t3 - t0, 1e-9), "threads": torch.get_num_threads(),
    }


# ---------------------------------------------------------------- the run

def environment(cfg: Experiment, threads: ThreadChoice, device: torch.device, accelerator: Accelerator
                ) -> dict[str, Any]:
    import peft
    import transformers

    return {
        "python": platform.python_version(), "platform": platform.platform(), "torch": torch.__version__,
        "transformers": transformers.__version__, "peft": peft.__version__, "threads": threads.threads,
        "threads_reason": threads.reason, "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY", "(unset)"),
        "device": str(device), "processes": accelerator.num_processes, "seed": cfg.run.seed,
        "command": " ".join(sys.argv), "precision": cfg.base.precision,
    }


def run_experiment(cfg: Experiment, out: Path, *, resume: bool = False, force: bool = False,
                   quiet: bool = False, overwrite: bool = False) -> dict[str, Any]:
    """Run one experiment into `out` and return the report dict (a finished run's own report on --resume)."""
    out = Path(out)
    folder = RunFolder(out)
    check_run_folder(out, resume, overwrite)
    if resume and (out / "report.json").exists():
        print(f"{out}: this run already finished; nothing to resume, nothing changed. To train again, start a new "
              "run with another --out", flush=True)
        return load_report(out)
    check_inputs(cfg)  # missing files and an absent GPU, before anything loads or is written
    previous = read_status(out) if resume else None  # read before our lock replaces a dead one
    accelerator = Accelerator(cpu=pick_device(cfg.base).type == "cpu", **tracking.accelerator_options(cfg.run))
    main = accelerator.is_main_process
    with folder if main else _NoLock(), tracking.trackers(accelerator, cfg, out):
        if main and overwrite and not resume:
            remove_run_files(out)
        return _run_locked(cfg, out, folder, accelerator, main, resume, force, quiet, previous)


class _NoLock:
    def __enter__(self) -> None:
        return None

    def __exit__(self, *exc: object) -> None:
        return None


def _run_locked(cfg: Experiment, out: Path, folder: RunFolder, accelerator: Accelerator, main: bool,
                resume: bool, force: bool, quiet: bool, previous: dict[str, Any] | None) -> dict[str, Any]:
    started = time.time()
    console.quiet_libraries()
    threads = set_threads(cfg.base.threads)
    device = accelerator.device
    seed_everything(cfg.run.seed)
    ckpt = out / "checkpoint"
    step = start = checkpoint_step(ckpt) if resume else 0
    stage = "preflight"
    if resume and main:
        if previous and previous.get("note"):
            print(f"note: {previous['note']}", flush=True)
        print(f"resuming {out}: " + (f"training continues from step {start} (checkpoint/)" if start else
                                     "no checkpoint, so training restarts from step 0"), flush=True)
    try:
        if main:
            emulated = emulated_bf16_warning(cfg.base.precision, device.type)
            if emulated:
                print(f"warning: {emulated}", flush=True)
            folder.set_status("running", step=step)
            write_text_atomic(out / "config.toml", to_toml(cfg))
            write_json_atomic(out / "environment.json", environment(cfg, threads, device, accelerator))
        split = load_prompts(cfg.data, cfg.run.seed, cfg.ppo.prompts_per_step)
        if main:
            for warning in split.source.get("warnings", []):
                print(f"warning: {warning}", flush=True)
        scorer = load_scorer(cfg.reward, "reward")
        judge = load_scorer(cfg.evaluation.judge, "evaluation.judge") if cfg.evaluation.judge else None
        polarity, judge_polarity = require_polarity(scorer, cfg.reward, out, force, judge, cfg.evaluation.judge)
        for key in ("prompts_per_step", "minibatch"):  # global sizes: the same update whatever the process count
            if getattr(cfg.ppo, key) % accelerator.num_processes:
                raise UserError(f"ppo.{key} ({getattr(cfg.ppo, key)}) must divide evenly across "
                                f"{accelerator.num_processes} processes")
        policy = build_policy(cfg.base, cfg.lora, cfg.reference, device)
        if accelerator.process_index:  # each process samples its own replies; process 0 keeps the run's seed
            seed_everything(cfg.run.seed + 1_000_003 * accelerator.process_index)
        if not quiet and main:
            print(f"policy: {policy.trainable_params:,} trainable of {policy.total_params:,} parameters "
                  f"({100 * policy.trainable_params / policy.total_params:.2f}%); {policy.describe()}", flush=True)
        heldout = split.heldout[: cfg.evaluation.max_prompts or None]
        stage = "before-training evaluation"
        before = _evaluate_once(out / "eval_before.jsonl", policy, heldout, scorer, judge, cfg, device, main, quiet,
                                "before", accelerator)
        if cfg.method.name != "ppo":  # critic-free: the value head is neither trained nor used (initial weights kept)
            policy.net.value_head.requires_grad_(False)
        optimizer = torch.optim.AdamW([p for p in policy.net.parameters() if p.requires_grad],
                                      lr=cfg.ppo.learning_rate, weight_decay=cfg.ppo.weight_decay)
        net, optimizer = accelerator.prepare(policy.net, optimizer)
        controller = ppo.KLController(beta=cfg.kl.coef, target=cfg.kl.target, gain=cfg.kl.gain, horizon=cfg.kl.horizon)
        if start:
            try:
                step = load_checkpoint(ckpt, policy, optimizer, controller, accelerator.process_index,
                                       accelerator.num_processes)
            except UserError:
                raise
            except Exception as exc:  # a truncated or overwritten trainer_state.pt or adapter file
                raise UserError(f"{ckpt}: the checkpoint (trainer_state.pt, adapter/) cannot be read "
                                f"({(str(exc).splitlines() or [type(exc).__name__])[0][:200]}); it is damaged: "
                                f"restore it, or delete {ckpt} to restart training from step 0 with "
                                f"--resume {out}") from None
        stage = "training"
        if resume and main:
            truncate_metrics(out / "metrics.jsonl", step)  # rows after the checkpoint (all, without one) are redone
        history = read_metrics(out / "metrics.jsonl") if resume else []
        per_proc = cfg.ppo.prompts_per_step // accelerator.num_processes
        bar = console.progress(cfg.ppo.steps, "ppo", "step", quiet or not main, initial=step)
        try:
            with _StopAtStepEnd(main) as stop, open(out / "metrics.jsonl", "a" if resume else "w", encoding="utf-8") as log:
                while step < cfg.ppo.steps:
                    prompts = step_prompts(split.train, step, cfg.ppo.prompts_per_step, cfg.run.seed)
                    mine = prompts[accelerator.process_index * per_proc:(accelerator.process_index + 1) * per_proc]
                    before_step = snapshot(net, optimizer, controller)
                    cpu.rebalance()
                    try:
                        row = train_step(policy, net, optimizer, accelerator, scorer, controller, mine, cfg, step, device)
                    except NonFinite as exc:
                        restore(before_step, net, optimizer, controller)  # minibatches before the NaN are undone
                        save_on_main(accelerator, ckpt, policy, optimizer, controller, step)
                        if main:
                            save_adapter(policy, out / "adapter")
                        raise UserError(f"stopped: {exc}. The last good adapter and checkpoint (after step {step}) "
                                        f"are kept in {out}; lower ppo.learning_rate or check the reward backend") from None
                    step += 1
                    history.append(row)
                    tracking.log_step(accelerator, row)
                    if main:
                        log.write(json.dumps(row) + "\n")
                        log.flush()
                        folder.set_status("running", step=step)
                    if cfg.run.checkpoint_every and step % cfg.run.checkpoint_every == 0:
                        save_on_main(accelerator, ckpt, policy, optimizer, controller, step)
                    bar.update(1)
                    bar.set_postfix(reward=num(row["reward_mean"]), kl=num(row["kl_mean"]), beta=num(row["beta"]))
                    if _any_process(accelerator, stop.requested):
                        save_on_main(accelerator, ckpt, policy, optimizer, controller, step)
                        raise KeyboardInterrupt
        finally:
            bar.close()
        save_on_main(accelerator, ckpt, policy, optimizer, controller, step)
        if main:
            save_adapter(policy, out / "adapter")
        stage = "after-training evaluation"
        after = _evaluate_once(out / "eval_after.jsonl", policy, heldout, scorer, judge, cfg, device, main, quiet,
                               "after", accelerator, fresh=True)
        report: dict[str, Any] = {}
        if main:
            assessment = evaluation.assess(before, after, cfg, policy.tokenizer.eos_token_id, polarity, judge_polarity)
            report = build_report(cfg=cfg, before=before, after=after, assessment=assessment, history=history,
                                  policy=policy,
                                  polarity=polarity, scorer=scorer, judge=judge, split=split,
                                  wall_s=time.time() - started, peak_rss_mb=peak_rss_mb(), started=started,
                                  judge_polarity=judge_polarity)
            try:
                write_report(out, report, before, after)
                html_report.write_run_html(out)
            except UserError as exc:
                raise UserError(f"{exc}\n  training finished and is kept in {out} (adapter/, checkpoint/ at step "
                                f"{step}); fix this, then write the report with: alignrun run CONFIG --resume {out}",
                                exc.exit_code) from None
            folder.set_status("finished", step=step)
            tracking.log_summary(accelerator, report)
        accelerator.wait_for_everyone()
        return report
    except KeyboardInterrupt:
        if main:
            saved = saved_step(ckpt)
            with contextlib.suppress(Exception):
                folder.set_status("interrupted", step=saved, stage=stage)
            print(f"\ninterrupted during the {stage}; continue with: alignrun run CONFIG --resume {out} "
                  f"(training resumes from step {saved})", file=sys.stderr)
        raise
    except BaseException as exc:
        if main:
            error = (str(exc).splitlines() or [type(exc).__name__])[0][:500]
            with contextlib.suppress(Exception):  # a full disk must not hide the first error behind a second
                if previous and step == start and stage != "after-training evaluation":
                    # a resume that failed before doing anything: the run is as it was, say so
                    state = "interrupted" if previous["state"] in ("running", "dead") else previous["state"]
                    kept = {k: v for k, v in previous.items() if k not in ("state", "updated", "note", "error")}
                    folder.set_status(state, **kept, error=f"resume failed: {error}")
                else:
                    folder.set_status("failed", step=step, stage=stage, error=error)
        raise


class _StopAtStepEnd:
    """Ctrl-C during training: finish the current step, checkpoint it and stop (a second Ctrl-C stops at once,
    keeping the previous checkpoint), so a resumed run continues exactly where this one stopped."""

    def __init__(self, active: bool):
        self.active = active and threading.current_thread() is threading.main_thread()
        self.requested = False

    def __enter__(self) -> _StopAtStepEnd:
        if self.active:
            self.previous = signal.signal(signal.SIGINT, self._handle)
        return self

    def _handle(self, signum: int, frame: object) -> None:
        if self.requested:
            raise KeyboardInterrupt
        self.requested = True
        print("\nalignrun: stopping after this step (Ctrl-C again to stop now)", file=sys.stderr, flush=True)

    def __exit__(self, *exc: object) -> None:
        if self.active:
            signal.signal(signal.SIGINT, self.previous)


def _evaluate_once(path: Path, policy: Policy, prompts: list[str], scorer: Any, judge: Any, cfg: Experiment,
                   device: torch.device, main: bool, quiet: bool, label: str, accelerator: Accelerator,
                   fresh: bool = False) -> evaluation.EvalResult:
    """Held-out evaluation, reused from disk on resume (before) so a resumed run reports the same numbers. With
    several processes each evaluates its own contiguous share of the prompts and the main process joins them."""
    if path.exists() and not fresh:
        try:
            return evaluation.read_samples(path)
        except (ValueError, KeyError, TypeError, IndexError) as exc:  # a damaged or hand-edited file
            raise UserError(f"{path}: the saved {label}-training evaluation cannot be read ({exc}); it is damaged: "
                            "delete it and resume, and the evaluation is done again") from None
    rank, processes = accelerator.process_index, accelerator.num_processes
    share = -(-len(prompts) // processes)
    mine = prompts[rank * share:(rank + 1) * share]
    result = None
    if mine or processes == 1:
        replies = len(mine) * (cfg.evaluation.samples_per_prompt + 1)  # k samples and one greedy reply each
        with torch.random.fork_rng(devices=[]), \
                console.progress(replies, f"evaluate {label}", "reply", quiet or not main) as bar:
            # the same sampling noise before and after: a paired design; each process its own stream
            torch.manual_seed(cfg.run.seed + 7919 + 1_000_003 * rank)
            with autocast(cfg.base.precision, device):
                result = evaluation.evaluate_policy(policy, mine, scorer, judge, cfg, device, bar)
    if processes > 1:
        parts: list[Any] = [None] * processes
        torch.distributed.all_gather_object(parts, result)
        result = evaluation.join_results([r for r in parts if r is not None])
    assert result is not None
    if main:
        evaluation.write_samples(path, result)
        return evaluation.read_samples(path)  # the very numbers a resumed run reads back
    return result


def run_from_cli(config_path: str, overrides: list[str], *, out: str | None, resume: str | None,
                 force: bool, quiet: bool, overwrite: bool = False) -> int:
    cfg = load_config(config_path, overrides)
    if resume:
        if out is not None and Path(out).resolve() != Path(resume).resolve():
            raise UserError(f"--out {out} and --resume {resume} name different folders; a resumed run stays in "
                            "its own folder, so give only --resume")
        saved = Path(resume) / "config.toml"
        if not saved.exists():
            raise UserError(f"--resume {resume}: no config.toml there; is it a run folder?")
        diff = result_differences(load_config(saved), cfg)
        if diff:
            raise UserError(f"--resume {resume}: {config_path} (with --set) differs from the run's saved config.toml "
                            f"in {len(diff)} key(s) that change the result: {'; '.join(diff)}. Resume with the same "
                            "config (--set KEY=VALUE to match), or start a new run with another --out")
        out = resume
    target = Path(out or cfg.run.out or Path("runs") / cfg.run.name)
    report = run_experiment(cfg, target, resume=bool(resume), force=force, quiet=quiet, overwrite=overwrite)
    if report:
        print(summary_text(report))
        print(f"\nrun folder: {target}")
    _teardown()
    return 0


def _teardown() -> None:
    """Explicit process-group teardown: without it a gloo process sometimes aborts at exit (STACK-NOTES)."""
    if torch.distributed.is_available() and torch.distributed.is_initialized():
        torch.distributed.destroy_process_group()
