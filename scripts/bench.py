"""Benchmark one alignrun step against a bare floor and a naive loop on three random T5-shaped models, and on
request (--shapes causal) a ~61M Llama-shaped decoder-only model.

    scripts/bench [--shapes tiny,small,base,causal] [--variants ours,floor,naive,ours-bf16|all] [--rounds 2]
                  [--memory VARIANTS] [--out bench-results/bench.json]

For each shape a random model is saved as a Hugging Face folder (WordLevel tokenizer over invented words)
and loaded by the real `build_policy`. In one process, after a warm-up step of every variant (one minibatch,
one epoch), it times one step of each, in turn, twice (--rounds), keeping each variant's faster step:

    ours        alignrun.trainer.train_step with the defaults (fp32, LoRA on the decoder's query/value
                projections): the frozen encoder runs once and its output serves sampling, the reference
                and every PPO epoch; old log-probs and values come from the generation pass; reference =
                the same weights with adapters disabled; reward; PPO update
    floor       bare compute: the same generate, one reference forward, the same epochs x minibatches of
                forward/backward/optimizer step, nothing else (no value head, no bookkeeping, no reuse)
    naive       a deep-copied frozen reference model plus an extra policy forward for old log-probs and
                values, then the same reward, advantages and PPO update (full forwards, no reuse)
    ours-bf16   ours with base.precision = "bf16": autocast, frozen linear weights stored in bf16
    ours-ed, floor-ed, naive-ed
                the same three with lora.scope = "encoder-decoder" (adapters in both stacks: nothing to
                reuse); timed with --variants all

Wall time and process CPU time are both recorded: CPU time is less disturbed by other work on the machine.
Peak RSS is per process, so each variant's memory is measured in its own subprocess (one step, VmHWM; the
subprocesses run side by side, which changes their speed, not their peaks):
by default ours, naive and ours-bf16 (the floor tracks ours within ~5%).
All variants generate exactly 32 tokens: the saved generation config sets min_new_tokens, and every
variant calls the same generate.

Threads and OpenMP's waiting policy are those `alignrun run` would choose (scripts/_bench_common.py). Where
the CPU only emulates bf16 the bf16 variants are skipped (--emulated-bf16 times them), and a shape whose
predicted time would end the run after --budget-s (540 s) is skipped; both are said in the output and JSON.
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

import _bench_common as common  # first: offline settings and alignrun's start-up thread settings
import torch
from _bench_common import (
    NEW_TOKENS,
    PROMPT_TOKENS,
    PROMPTS,
    SHAPES,
    bench_prompts,
    build_model,
    model_vocab,
    ratio,
)
from accelerate import Accelerator
from trl.trainer.utils import selective_log_softmax

from alignrun import budget, ppo, rollout, trainer
from alignrun.config import Experiment
from alignrun.models import Policy, autocast, build_policy
from alignrun.reward import load_scorer, reward_from_scores

MINIBATCH, EPOCHS, RANK = 8, 4, 8
VARIANTS = ("ours", "floor", "naive", "ours-bf16", "ours-ed", "floor-ed", "naive-ed")
PAIRED = {"floor": "ours", "floor-ed": "ours-ed"}  # the floor runs on its own variant's policy
PARTS = ("generate", "old_logp", "reference", "reward", "update", "other")
CPU = torch.device("cpu")


def variant_cfg(model: Path, variant: str, epochs: int = EPOCHS) -> Experiment:
    return Experiment.model_validate({
        "base": {"model": str(model), "device": "cpu", "precision": "bf16" if "bf16" in variant else "fp32"},
        "lora": {"rank": RANK, "scope": "encoder-decoder" if variant.endswith("-ed") else "decoder"},
        "reference": {"mode": "copy" if variant.startswith("naive") else "adapters-off"},
        "reward": {"backend": "callable", "source": common.REWARD_SOURCE},
        "ppo": {"prompts_per_step": PROMPTS, "minibatch": MINIBATCH, "epochs": epochs},
        "generation": {"max_new_tokens": NEW_TOKENS, "max_prompt_tokens": PROMPT_TOKENS},
        "data": {"prompts": "unused-by-the-bench"},
        "evaluation": {"judge": None},
    })


def load_policy(cfg: Experiment) -> Policy:
    return build_policy(cfg.base, cfg.lora, cfg.reference, CPU)


# ---------------------------------------------------------------------------------------- the variants


class Clock:
    """Named wall-clock and CPU-time totals ("NAME cpu"); `part` times a block, `wrap` times every call of a
    module function."""

    def __init__(self) -> None:
        self.totals: dict[str, float] = defaultdict(float)

    @contextmanager
    def part(self, name: str) -> Iterator[None]:
        start, cpu = time.perf_counter(), common.cpu_seconds()
        try:
            yield
        finally:
            self.totals[name] += time.perf_counter() - start
            self.totals[f"{name} cpu"] += common.cpu_seconds() - cpu

    def wrap(self, module: Any, attr: str, name: str) -> None:
        original: Callable[..., Any] = getattr(module, attr)

        def timed(*args: Any, **kwargs: Any) -> Any:
            with self.part(name):
                return original(*args, **kwargs)

        setattr(module, attr, timed)

    def take(self) -> dict[str, float]:
        out, self.totals = dict(self.totals), defaultdict(float)
        return out


CLOCK = Clock()
PPO_UPDATE = trainer.ppo_update  # the naive loop calls it directly, timed by its own block


def instrument() -> None:
    """Time the real rollout and update functions from inside train_step (the bench process only)."""
    CLOCK.wrap(rollout, "frozen_encoding", "generate")  # encoding the prompts belongs to sampling
    CLOCK.wrap(rollout, "sample", "generate")
    CLOCK.wrap(rollout, "reference_logprobs", "reference")
    CLOCK.wrap(trainer, "ppo_update", "update")


def plain_generate(policy: Policy, ids: torch.Tensor, mask: torch.Tensor) -> torch.Tensor:
    """The same sampling call as rollout.sample, without asking for logits or hidden states; the same
    sequences [B, 1 + T] (a causal model's from the prompt's last token)."""
    seq = policy.lm.generate(input_ids=ids, attention_mask=mask, max_new_tokens=NEW_TOKENS, num_beams=1,
                             do_sample=True, temperature=1.0, top_k=0, top_p=1.0,
                             pad_token_id=policy.tokenizer.pad_token_id,
                             eos_token_id=policy.tokenizer.eos_token_id)
    return seq[:, ids.shape[1] - 1:] if policy.causal else seq


@dataclass
class Setup:
    variant: str
    cfg: Experiment
    policy: Policy
    net: torch.nn.Module
    optimizer: torch.optim.Optimizer
    accelerator: Accelerator
    scorer: Any
    controller: ppo.KLController
    prompts: list[str]

    def warm_up(self) -> Setup:
        """The same variant on one minibatch for one epoch: first-call costs are paid outside the timing."""
        cfg = self.cfg.model_copy(update={"ppo": self.cfg.ppo.model_copy(update={"epochs": 1})})
        return Setup(**{**self.__dict__, "cfg": cfg, "prompts": self.prompts[:MINIBATCH]})


def make_setup(variant: str, model: Path, accelerator: Accelerator, policy: Policy | None = None,
               epochs: int = EPOCHS) -> Setup:
    """A variant's policy (the real build_policy unless shared), optimizer, scorer and KL controller."""
    cfg = variant_cfg(model, variant, epochs)
    policy = policy or load_policy(cfg)
    trained = policy.lm if variant.startswith("floor") else policy.net
    optimizer = torch.optim.AdamW([p for p in trained.parameters() if p.requires_grad],
                                  lr=cfg.ppo.learning_rate)
    net, optimizer = accelerator.prepare(policy.net, optimizer)
    return Setup(variant, cfg, policy, net, optimizer, accelerator, load_scorer(cfg.reward, "reward"),
                 ppo.KLController(beta=cfg.kl.coef), bench_prompts(model_vocab(model)))


def ours_step(s: Setup, step: int) -> dict[str, float]:
    row = trainer.train_step(s.policy, s.net, s.optimizer, s.accelerator, s.scorer, s.controller, s.prompts,
                             s.cfg, step, CPU)
    return {**CLOCK.take(), "reward": row["reward_s"], "step": row["step_s"]}


def floor_step(s: Setup, step: int) -> dict[str, float]:
    """Bare compute: generate, one reference forward, epochs x minibatches of forward/backward/step."""
    lm, p = s.policy.lm, s.cfg.ppo
    ids, mask = rollout.encode_prompts(s.policy.tokenizer, s.prompts, PROMPT_TOKENS, CPU)
    start = time.perf_counter()
    with CLOCK.part("generate"), torch.no_grad():
        seq = plain_generate(s.policy, ids, mask)
    decoder_input, response = seq[:, :-1], seq[:, 1:]
    with CLOCK.part("reference"), torch.no_grad(), lm.disable_adapter():
        selective_log_softmax(s.policy.reply_logits(lm, ids, mask, decoder_input), response)
    order = torch.Generator().manual_seed(step)
    with CLOCK.part("update"):
        for _ in range(p.epochs):
            for idx in torch.randperm(len(s.prompts), generator=order).split(p.minibatch):
                logits = s.policy.reply_logits(lm, ids[idx], mask[idx], decoder_input[idx])
                loss = -selective_log_softmax(logits, response[idx]).mean()
                s.optimizer.zero_grad(set_to_none=True)
                loss.backward()
                s.optimizer.step()
    return {**CLOCK.take(), "step": time.perf_counter() - start}


def naive_step(s: Setup, step: int) -> dict[str, float]:
    """A straightforward loop: plain generate, a policy forward for old log-probs and values, a reference
    forward through a separate deep-copied model, then the same reward, advantages and PPO update as ours."""
    policy, cfg = s.policy, s.cfg
    assert policy.reference_copy is not None
    tok = policy.tokenizer
    start = time.perf_counter()
    ids, mask = rollout.encode_prompts(tok, s.prompts, PROMPT_TOKENS, CPU)
    with CLOCK.part("generate"), torch.no_grad():
        seq = plain_generate(policy, ids, mask)
    decoder_input = seq[:, :-1]
    response_mask = rollout.response_mask(seq[:, 1:], tok.eos_token_id)
    response = torch.where(response_mask.bool(), seq[:, 1:], torch.full_like(seq[:, 1:], tok.pad_token_id))
    with CLOCK.part("old_logp"), torch.no_grad():
        logits, values = s.net(ids, mask, decoder_input)
        logp = selective_log_softmax(logits.float(), response)
    ref_logp = rollout.reference_logprobs(policy, ids, mask, decoder_input, response)  # timed by instrument()
    texts = [t.strip() for t in tok.batch_decode(response, skip_special_tokens=True)]
    ro = rollout.Rollout(ids, mask, decoder_input, response, response_mask, logp * response_mask,
                         ref_logp * response_mask, values.float() * response_mask, texts)
    with CLOCK.part("reward"):
        reward = torch.tensor(reward_from_scores(s.scorer.score(texts), cfg.reward), dtype=torch.float32)
    rewards, kl = ppo.penalised_rewards(reward, ro.logp, ro.ref_logp, response_mask, s.controller.beta)
    advantages, returns = ppo.gae(rewards, ro.values, response_mask, cfg.ppo.gamma, cfg.ppo.gae_lambda)
    advantages = ppo.whiten(advantages, response_mask)
    with CLOCK.part("update"):
        PPO_UPDATE(s.net, s.optimizer, s.accelerator, ro, advantages, returns, cfg, step, CPU)
    s.controller.update(float(kl.sum(dim=1).mean()))
    return {**CLOCK.take(), "step": time.perf_counter() - start}


STEPS: dict[str, Callable[[Setup, int], dict[str, float]]] = {
    "ours": ours_step, "floor": floor_step, "naive": naive_step,
    "ours-bf16": ours_step, "ours-ed": ours_step, "floor-ed": floor_step, "naive-ed": naive_step,
}


def run_step(s: Setup, step: int) -> dict[str, float]:
    """One step: generate, old_logp, reference, reward, update, other (step minus the rest), step, cpu."""
    cpu = common.cpu_seconds()
    raw = STEPS[s.variant](s, step)
    out = {part: raw.get(part, 0.0) for part in PARTS if part != "other"}
    out["other"] = max(0.0, raw["step"] - sum(out.values()))
    return {**out, "step": raw["step"], "cpu": common.cpu_seconds() - cpu, "generate cpu": raw.get("generate cpu", 0.0)}


# ---------------------------------------------------------------------------------------- measurements


def time_shape(model: Path, variants: list[str], rounds: int) -> dict[str, dict[str, float]]:
    """One process: each floor shares its ours variant's policy; the other variants load their own.
    Every variant gets a warm-up step (one minibatch, one epoch); then `rounds` rounds time one full step of
    each variant in turn (in reverse order every other round), and each variant keeps its fastest round (the
    least disturbed by other work)."""
    accelerator = Accelerator(cpu=True)
    setups: dict[str, Setup] = {}
    for v in variants:
        shared = setups[PAIRED[v]].policy if v in PAIRED and PAIRED[v] in setups else None
        setups[v] = make_setup(v, model, accelerator, policy=shared)
    for setup in setups.values():
        run_step(setup.warm_up(), 0)
    best: dict[str, dict[str, float]] = {}
    for step in range(1, rounds + 1):
        torch.manual_seed(step)
        order = list(setups.items())  # every other round backwards: no variant always runs first or last
        for name, setup in order if step % 2 else order[::-1]:
            row = run_step(setup, step)
            fastest = best.get(name, row)
            # sampling on its own: its fastest round, wall and CPU (the step's fastest round may be another)
            sampling = {"generate best": min(row["generate"], fastest.get("generate best", row["generate"])),
                        "generate cpu best": min(row["generate cpu"],
                                                 fastest.get("generate cpu best", row["generate cpu"]))}
            best[name] = {**(row if row["step"] <= fastest["step"] else fastest), **sampling}
    return best


def memory_child(model: Path, variant: str, epochs: int) -> dict[str, float]:
    """In a fresh process: build the variant, run one step, report this process's peak RSS."""
    setup = make_setup(variant, model, Accelerator(cpu=True), epochs=epochs)
    row = run_step(setup, 0)
    return {"peak_rss_mb": trainer.peak_rss_mb(), "step_s": row["step"]}


def measure_memory(model: Path, variants: list[str], epochs: int) -> dict[str, dict[str, float]]:
    """Each variant's peak RSS, in subprocesses run side by side (each reads only its own peak). Each loads its
    own copy of the model folder: pages of a file mapped by several processes cannot be paged out, which a
    lone run relies on (models.store_frozen_linear_in_bf16)."""
    copies = {v: Path(shutil.copytree(model, model.with_name(f"{model.name}-{v}"), dirs_exist_ok=True))
              for v in variants}
    children = {v: subprocess.Popen([sys.executable, __file__, "--child", v, "--model", str(copies[v]),
                                     "--epochs", str(epochs), "--threads", str(torch.get_num_threads())],
                                    stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
                for v in variants}
    out: dict[str, dict[str, float]] = {}
    for variant, child in children.items():
        stdout, stderr = child.communicate()
        if child.returncode != 0:
            raise RuntimeError(f"memory run {variant} on {model} failed:\n{stderr[-3000:]}")
        out[variant] = json.loads(stdout.strip().splitlines()[-1])
    return out


# Tolerances fixed before measuring: a per-token log-prob change of 0.05 nats moves the PPO ratio by ~5%, a
# quarter of the clip range eps = 0.2; a step-0 KL of 0.1 nats per reply costs 0.01 reward at kl.coef = 0.1.
TOKEN_TOLERANCE, REPLY_KL_TOLERANCE = 0.05, 0.1


def precision_check(model: Path) -> dict[str, dict[str, float]]:
    """bf16 settings vs fp32 on the same model: log-probs of fp32's sampled replies, the PPO ratio at the
    first minibatch (generation-time vs teacher-forced log-probs), and the KL to the reference at step 0."""
    out: dict[str, dict[str, float]] = {}
    fp32: rollout.Rollout | None = None
    fp32_logp = torch.empty(0)
    for variant in ("ours", "ours-bf16"):
        cfg = variant_cfg(model, variant)
        policy = load_policy(cfg)
        torch.manual_seed(0)
        with autocast(cfg.base.precision, CPU):
            ro = rollout.rollout(policy, bench_prompts(model_vocab(model)), PROMPT_TOKENS, NEW_TOKENS, CPU)
        if fp32 is None:
            fp32 = ro
        with torch.no_grad(), autocast(cfg.base.precision, CPU):
            logits, _ = policy.net(ro.prompt_ids, ro.prompt_mask, ro.decoder_input)
            own = selective_log_softmax(logits.float(), ro.response_ids)
            logits, _ = policy.net(fp32.prompt_ids, fp32.prompt_mask, fp32.decoder_input)
            on_fp32 = selective_log_softmax(logits.float(), fp32.response_ids)
        fp32_logp = on_fp32 if variant == "ours" else fp32_logp
        real = fp32.response_mask.bool()
        vs_fp32 = (on_fp32 - fp32_logp)[real].abs()
        ratio_shift = (ro.logp - own * ro.response_mask)[ro.response_mask.bool()].abs()
        out[variant] = {
            "tokens": int(real.sum()),
            "logp_vs_fp32_mean": float(vs_fp32.mean()), "logp_vs_fp32_max": float(vs_fp32.max()),
            "first_ratio_logshift_max": float(ratio_shift.max()),
            "step0_kl_reply_max": float((ro.logp - ro.ref_logp).sum(dim=1).abs().max()),
        }
        out[variant]["within_tolerance"] = bool(
            out[variant]["logp_vs_fp32_max"] <= TOKEN_TOLERANCE
            and out[variant]["first_ratio_logshift_max"] <= TOKEN_TOLERANCE
            and out[variant]["step0_kl_reply_max"] <= REPLY_KL_TOLERANCE)
    return out


# ---------------------------------------------------------------------------------------- report


def summarise(entry: dict[str, Any]) -> dict[str, float]:
    m, e = entry.get("memory", {}), entry["estimate"]
    t = {v: entry["time"].get(v, {"step": float("nan"), "cpu": float("nan")}) for v in VARIANTS}
    row: dict[str, float] = {}
    g = {v: entry["time"].get(v, {"generate best": float("nan"), "generate cpu best": float("nan")}) for v in VARIANTS}
    row["generate ours/floor step"] = ratio(g["ours"]["generate best"], g["floor"]["generate best"])
    row["generate ours/floor cpu"] = ratio(g["ours"]["generate cpu best"], g["floor"]["generate cpu best"])
    for clock in ("step", "cpu"):
        row[f"ours/floor {clock}"] = ratio(t["ours"][clock], t["floor"][clock])
        row[f"ours/naive {clock}"] = ratio(t["ours"][clock], t["naive"][clock])
        row[f"bf16/floor {clock}"] = ratio(t["ours-bf16"][clock], t["floor"][clock])
        row[f"ed: ours/floor {clock}"] = ratio(t["ours-ed"][clock], t["floor-ed"][clock])
        row[f"ed: ours/naive {clock}"] = ratio(t["ours-ed"][clock], t["naive-ed"][clock])
    row["est/meas step"] = ratio(e["ours"]["seconds_per_step"], t["ours"]["step"])
    rss = {v: m[v]["peak_rss_mb"] if v in m else float("nan") for v in VARIANTS}
    row["rss ours/naive"] = ratio(rss["ours"], rss["naive"])
    row["rss bf16/naive"] = ratio(rss["ours-bf16"], rss["naive"])
    row["est/meas rss"] = ratio(e["ours"]["peak_mb"], rss["ours"])
    row["est/meas rss naive"] = ratio(e["naive"]["peak_mb"], rss["naive"])
    return row


def _table(title: str, rows: dict[str, dict[str, float]], cols: list[str], fmt: str = ".2f") -> None:
    print(f"\n{title}")
    print(f"{'shape':<7}" + "".join(f"{c:>25}" for c in cols))
    for name, row in rows.items():
        print(f"{name:<7}" + "".join(f"{row.get(c, float('nan')):>25{fmt}}" for c in cols))


def print_tables(results: dict[str, Any]) -> None:
    summary = {name: entry["summary"] for name, entry in results["shapes"].items()}
    _table("ratios, wall time (targets: ours/floor <= 1.10, ours/naive <= 0.85, fastest/floor <= 0.65, "
           "generate ours/floor <= 1.05)", summary, ["ours/floor step", "ours/naive step", "bf16/floor step",
                                                      "ed: ours/floor step", "ed: ours/naive step",
                                                      "generate ours/floor step"])
    _table("ratios, process CPU time (less sensitive to other work on the machine)", summary,
           ["ours/floor cpu", "ours/naive cpu", "bf16/floor cpu", "ed: ours/floor cpu", "ed: ours/naive cpu",
            "generate ours/floor cpu"])
    _table("peak RSS ratios (target on base: <= 0.60) and estimate / measured (target 0.70-1.30)", summary,
           ["rss ours/naive", "rss bf16/naive", "est/meas rss", "est/meas rss naive", "est/meas step"])
    print("\nseconds per step (fastest round after a warm-up; other = step minus the named parts), "
          "CPU seconds, peak RSS (MB, own subprocess)")
    columns = (*PARTS, "step", "cpu")
    print(f"{'shape':<7}{'variant':<11}" + "".join(f"{p:>10}" for p in columns) + f"{'peak MB':>9}")
    for name, entry in results["shapes"].items():
        for variant, t in entry["time"].items():
            rss = entry.get("memory", {}).get(variant, {}).get("peak_rss_mb", float("nan"))
            print(f"{name:<7}{variant:<11}" + "".join(f"{t[p]:>10.2f}" for p in columns) + f"{rss:>9.0f}")
    print("\nestimate (alignrun.budget.estimate, fp32) vs measured")
    print(f"{'shape':<7}{'params':>12}{'trainable':>11}{'est s':>8}{'meas s':>8}{'est MB':>8}{'meas MB':>9}"
          f"{'naive est':>10}{'naive MB':>9}")
    for name, entry in results["shapes"].items():
        e, m = entry["estimate"], entry.get("memory", {})
        rss = {v: m.get(v, {}).get("peak_rss_mb", float("nan")) for v in ("ours", "naive")}
        print(f"{name:<7}{e['ours']['total_params']:>12,}{e['ours']['trainable_params']:>11,}"
              f"{e['ours']['seconds_per_step']:>8.2f}{entry['time'].get('ours', {}).get('step', float('nan')):>8.2f}"
              f"{e['ours']['peak_mb']:>8.0f}{rss['ours']:>9.0f}"
              f"{e['naive']['peak_mb']:>10.0f}{rss['naive']:>9.0f}")
    check = results.get("precision_check")
    if check:
        print(f"\nprecision check on the {results['precision_check_shape']} model (tolerances: per-token "
              f"{TOKEN_TOLERANCE} nats, step-0 KL per reply {REPLY_KL_TOLERANCE} nats)")
        for variant, c in check.items():
            print(f"  {variant:<11} log-probs of fp32's replies vs fp32: mean {c['logp_vs_fp32_mean']:.4f}, "
                  f"max {c['logp_vs_fp32_max']:.4f}; first PPO ratio log-shift max "
                  f"{c['first_ratio_logshift_max']:.4f}; step-0 KL per reply max "
                  f"{c['step0_kl_reply_max']:.4f} -> "
                  f"{'within' if c['within_tolerance'] else 'OUTSIDE'} tolerance")


def skip_emulated_bf16(variants: list[str], memory: list[str], keep: bool) -> dict[str, str]:
    """Without native bf16 (alignrun.budget.native_bf16, what `alignrun check` warns about) torch emulates it
    and a bf16 step takes several times an fp32 one: the bf16 variants are left out unless asked for."""
    if keep or budget.native_bf16():
        return {}
    why = (f"emulated bf16 (cpu {torch.backends.cpu.get_cpu_capability()}, no native avx512_bf16/amx_bf16): "
           "skipped, it would take several times an fp32 step; --emulated-bf16 times it anyway")
    dropped = {v: why for v in VARIANTS if "bf16" in v and (v in variants or v in memory)}
    variants[:] = [v for v in variants if v not in dropped]
    memory[:] = [v for v in memory if v not in dropped]
    return dropped


def predicted_seconds(model: Path, variants: list[str], memory: list[str], rounds: int) -> float:
    """The shape's share of the run from the resource estimate: a warm-up (a quarter step) and `rounds` steps
    per variant (naive ~1.3x), plus the memory runs (side by side on shared cores) and loading."""
    step = budget.estimate(variant_cfg(model, "ours")).seconds_per_step
    return step * (sum((1.3 if v.startswith("naive") else 1.0) * (rounds + 0.25) for v in variants)
                   + 1.3 * len(memory) + 2)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--shapes", default="tiny,small,base", help="comma-separated, from: " + ", ".join(SHAPES))
    ap.add_argument("--out", default="bench-results/bench.json", help="where the JSON results go")
    ap.add_argument("--variants", default="ours,floor,naive,ours-bf16",
                    help="variants to time ('all': also the -ed ones, about 4 more minutes); from: "
                    + ",".join(VARIANTS))
    ap.add_argument("--rounds", type=int, default=2, help="timed steps per variant; the fastest counts")
    ap.add_argument("--memory", default="ours,naive,ours-bf16",
                    help="variants whose peak RSS is measured, each in its own subprocess ('' for none; all: "
                    + ",".join(VARIANTS) + ")")
    ap.add_argument("--memory-epochs", type=int, default=EPOCHS,
                    help="PPO epochs in the memory runs (1 is faster, reads ~5%% lower: less fragmentation)")
    ap.add_argument("--threads", type=int, default=0, help="torch threads (0: as `alignrun run` chooses them)")
    ap.add_argument("--budget-s", type=float, default=540,
                    help="skip a shape whose predicted time would end the run after this many seconds (0: no limit)")
    ap.add_argument("--emulated-bf16", action="store_true",
                    help="time the bf16 variants even where this CPU only emulates bf16 (slow)")
    ap.add_argument("--child", choices=VARIANTS, help=argparse.SUPPRESS)
    ap.add_argument("--model", type=Path, help=argparse.SUPPRESS)
    ap.add_argument("--epochs", type=int, default=EPOCHS, help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    threads_reason = common.set_bench_threads(args.threads)
    common.quiet_transformers()
    instrument()
    if args.child:
        print(json.dumps(memory_child(args.model, args.child, args.epochs)))
        return 0
    shapes = [s.strip() for s in args.shapes.split(",") if s.strip()]
    memory = [v.strip() for v in args.memory.split(",") if v.strip()]
    variants = list(VARIANTS) if args.variants == "all" else [v.strip() for v in args.variants.split(",")]
    for given, allowed, what in ((shapes, SHAPES, "--shapes"), (memory, VARIANTS, "--memory"),
                                 (variants, VARIANTS, "--variants")):
        if any(g not in allowed for g in given):
            ap.error(f"{what} {','.join(given)}: choose from {', '.join(allowed)}")
    log = common.Log()
    skipped = skip_emulated_bf16(variants, memory, args.emulated_bf16)
    for variant, why in skipped.items():
        log(f"{variant}: {why}")
    results: dict[str, Any] = {
        "setup": {"prompts": PROMPTS, "prompt_tokens": PROMPT_TOKENS, "new_tokens": NEW_TOKENS,
                  "minibatch": MINIBATCH, "epochs": EPOCHS, "lora_rank": RANK, "lora_targets": "q,v",
                  "memory_epochs": args.memory_epochs, "rounds": args.rounds, "threads_reason": threads_reason,
                  "budget_s": args.budget_s, **common.machine()},
        "fast_settings": budget.fast_settings(), "skipped": skipped, "shapes": {},
    }
    with tempfile.TemporaryDirectory(prefix="alignrun-bench-") as tmp:
        for name in shapes:
            log(f"{name}: building the model")
            model = build_model(SHAPES[name], Path(tmp) / name)
            predicted = predicted_seconds(model, variants, memory, args.rounds)
            if args.budget_s and log.elapsed() + predicted > args.budget_s:
                skipped[name] = (f"predicted {predicted:.0f} s would end the run after the {args.budget_s:.0f} s "
                                 "budget (--budget-s 0 runs it)")
                log(f"{name}: skipped, {skipped[name]}")
                continue
            entry: dict[str, Any] = {"shape": asdict(SHAPES[name]), "predicted_s": predicted, "estimate": {
                v: asdict(budget.estimate(variant_cfg(model, v))) for v in ("ours", "naive")}}
            if not results["shapes"]:  # the smallest shape asked for: tiny by default
                log(f"{name}: precision check")
                results["precision_check"], results["precision_check_shape"] = precision_check(model), name
            log(f"{name}: timing {', '.join(variants)}, {args.rounds} round(s) (predicted {predicted:.0f} s)")
            entry["time"] = time_shape(model, variants, args.rounds)
            gc.collect()
            if memory:
                log(f"{name}: peak RSS of {', '.join(memory)}, one subprocess each, side by side")
                entry["memory"] = measure_memory(model, memory, args.memory_epochs)
            entry["summary"] = summarise(entry)
            results["shapes"][name] = entry
    results["setup"]["load_average_end"] = os.getloadavg()
    results["setup"]["wall_s"] = log.elapsed()
    out = common.write_results(args.out, results)  # before printing: kept
    print_tables(results)
    for what, why in results["skipped"].items():
        print(f"skipped {what}: {why}")
    print(f"\nwrote {out} ({results['setup']['wall_s']:.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
