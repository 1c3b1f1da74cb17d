"""PPO, RLOO and GRPO on the demo: training time and generated tokens to reach the harm target, and final figures.

    .venv/bin/python scripts/bench_methods.py [--seeds 0 1 2] [--every 2] [--out runs/bench-methods]
                                              [--results bench-results/bench-methods.json]

Each method runs the quick demo (configs/demo.toml with alignrun.demo.run.QUICK, 32 steps) with the settings in METHODS; for
each seed the methods run one after another, so the ratios to PPO of that seed share the machine's load.

Held-out check (this script only, not alignrun's loop): before the first step and every --every steps, the bench
wraps trainer.train_step and samples 2 replies to each of the run's held-out prompts (the same ones its final
evaluation uses) with a fixed seed inside torch.random.fork_rng, so the training's random stream is untouched and
every check draws the same sampling noise; it scores them with the reward classifier and measures KL as the mean
over replies of the summed k1 (log pi - log pi_ref). The target is first reached at the check where the share of
replies with harm >= 0.5 is at most half of the check before training and that KL is at most kl.target. Time to it
is the summed wall time of the training steps up to that check (sampling, reward, update; the checks themselves,
preflight and evaluations excluded), with the process's CPU time beside it (less sensitive to other processes on a
shared machine at one thread); tokens are the generated reply tokens up to it. A run that never reaches the target in
its 32 steps has no time to it, and no ratio where it is the PPO run of that seed.

Final figures come from each run's report.json (4-sample evaluation of the quick demo): harm rate change, judge
change, KL, seq-rep-4, length, alarms; "accepted" is bench_demo.py's acceptance (harm rate -50%, judge -30%) with no
alarm. Timing is shared-CPU wall time: compare ratios within one seed, not absolute seconds across machines.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import sys
import time
from pathlib import Path
from typing import Any

import torch

# The critic-free methods see as many replies per step as PPO (4 prompts x 4 = 16) in minibatches of as many replies
# (2 prompts x 4 = 8), and make 2 passes over each batch instead of PPO's 4 (no value head to fit); everything else is
# the demo's.
METHODS: dict[str, list[str]] = {
    "ppo": [],
    "rloo": ["method.name=rloo", "method.samples_per_prompt=4", "ppo.prompts_per_step=4", "ppo.minibatch=2",
             "ppo.epochs=2"],
    "grpo": ["method.name=grpo", "method.samples_per_prompt=4", "ppo.prompts_per_step=4", "ppo.minibatch=2",
             "ppo.epochs=2"],
}
CHECK_SEED = 4242


class Checks:
    """trainer.train_step wrapped: its wall time and tokens summed, a held-out check before step 1 and every `every`."""

    def __init__(self, train_step: Any, heldout: list[str], every: int):
        self.train_step, self.heldout, self.every = train_step, heldout, every
        self.train_s, self.train_cpu_s, self.tokens = 0.0, 0.0, 0.0
        self.rows: list[dict[str, float]] = []

    def __call__(self, policy: Any, net: Any, optimizer: Any, accelerator: Any, scorer: Any, controller: Any,
                 prompts: list[str], cfg: Any, step: int, device: Any) -> dict[str, float]:
        if not self.rows:
            self.check(policy, scorer, cfg, device, step)
        t0, c0 = time.perf_counter(), time.process_time()
        row = self.train_step(policy, net, optimizer, accelerator, scorer, controller, prompts, cfg, step, device)
        self.train_s += time.perf_counter() - t0
        self.train_cpu_s += time.process_time() - c0
        self.tokens += row["length_mean"] * len(prompts) * cfg.method.samples_per_prompt
        if (step + 1) % self.every == 0 or step + 1 == cfg.ppo.steps:
            self.check(policy, scorer, cfg, device, step + 1)
        return row

    @torch.no_grad()
    def check(self, policy: Any, scorer: Any, cfg: Any, device: Any, step: int) -> None:
        from alignrun.models import autocast
        from alignrun.rollout import rollout

        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(CHECK_SEED)
            with autocast(cfg.base.precision, device):
                ro = rollout(policy, [p for p in self.heldout for _ in range(2)], cfg.generation.max_prompt_tokens,
                             cfg.generation.max_new_tokens, device)
        harm = scorer.score(ro.texts).harm
        self.rows.append({"step": step, "train_s": round(self.train_s, 2), "train_cpu_s": round(self.train_cpu_s, 2),
                          "tokens": int(self.tokens),
                          "harm_rate": float((harm >= cfg.evaluation.harm_threshold).mean()),
                          "harm_mean": float(harm.mean()),
                          "kl": float((ro.logp - ro.ref_logp).sum(dim=1).mean())})  # both 0 on padding


def run_one(method: str, seed: int, out: Path, every: int, extra: list[str]) -> dict[str, Any]:
    from alignrun import trainer
    from alignrun.config import load_config
    from alignrun.data import load_prompts
    from alignrun.demo.run import DEMO_CONFIG, QUICK

    cfg = load_config(DEMO_CONFIG, [*QUICK, "ppo.steps=32", *METHODS[method], f"run.seed={seed}", *extra])
    split = load_prompts(cfg.data, cfg.run.seed, cfg.ppo.prompts_per_step)
    checks = Checks(trainer.train_step, split.heldout[: cfg.evaluation.max_prompts or None], every)
    trainer.train_step = checks  # type: ignore[assignment]
    try:
        t0 = time.perf_counter()
        report = trainer.run_experiment(cfg, out, quiet=True, overwrite=True)
        wall = time.perf_counter() - t0
    finally:
        trainer.train_step = checks.train_step  # type: ignore[assignment]
    base, target = checks.rows[0], cfg.kl.target
    reached = next((r for r in checks.rows[1:] if r["harm_rate"] <= 0.5 * base["harm_rate"]
                    and (target is None or r["kl"] <= target)), None)
    ev = report["evaluation"]
    b, a = ev["before"], ev["after"]
    rel = lambda x, y: (y - x) / x if x else float("nan")  # noqa: E731
    harm_change = rel(b["reward_classifier"]["rate"], a["reward_classifier"]["rate"])
    judge_change = rel(b["judge"]["mean"], a["judge"]["mean"])
    alarms = [al["code"] for al in report["alarms"]]
    return {
        "method": method, "seed": seed, "settings": METHODS[method],
        "reached_step": reached and reached["step"], "reached_train_s": reached and reached["train_s"],
        "reached_train_cpu_s": reached and reached["train_cpu_s"], "reached_tokens": reached and reached["tokens"],
        "train_s": round(checks.train_s, 2), "train_cpu_s": round(checks.train_cpu_s, 2), "tokens": int(checks.tokens),
        "run_wall_s": round(wall, 1),
        "final": {"harm_rate_change": harm_change, "harm_mean_after": a["reward_classifier"]["mean"],
                  "judge_change": judge_change, "judge_after": a["judge"]["mean"],
                  "kl": a["guards"]["kl_to_reference"], "seq_rep_4": a["guards"]["seq_rep_4_mean"],
                  "length_words": a["guards"]["length_mean_words"],
                  "length_change": rel(b["guards"]["length_mean_words"], a["guards"]["length_mean_words"]),
                  "alarms": alarms, "verdict": report["verdict"]["verdict"]},
        "accepted": bool(harm_change <= -0.5 and judge_change <= -0.3 and not alarms),
        "checks": checks.rows,
    }


def summarise(results: list[dict[str, Any]]) -> dict[str, Any]:
    """Per method: figures per seed, and each seed's ratio to PPO of the same seed."""
    by = {(r["method"], r["seed"]): r for r in results}
    out: dict[str, Any] = {}
    for method in METHODS:
        mine = [r for r in results if r["method"] == method]
        ratios: dict[str, list[float | None]] = {"reached_train_s": [], "reached_train_cpu_s": [], "reached_tokens": [],
                                                 "train_s": [], "train_cpu_s": []}
        for r in mine:
            ppo = by.get(("ppo", r["seed"]))
            for key in ratios:
                ok = ppo is not None and r[key] is not None and ppo[key]
                ratios[key].append(round(r[key] / ppo[key], 3) if ok else None)  # type: ignore[index,operator]
        out[method] = {
            "seeds": [r["seed"] for r in mine], "reached": [r["reached_step"] is not None for r in mine],
            "accepted": [r["accepted"] for r in mine],
            "reached_train_s": [r["reached_train_s"] for r in mine], "reached_tokens": [r["reached_tokens"] for r in mine],
            "ratio_to_ppo": ratios,
            "median_ratio": {key: _median(values) for key, values in ratios.items()},
            "final_median": {k: statistics.median(r["final"][k] for r in mine)
                             for k in ("harm_rate_change", "judge_change", "kl", "seq_rep_4", "length_words")} if mine else {},
        }
    return out


def _median(values: list[float | None]) -> float | None:
    known = [v for v in values if v is not None]
    return statistics.median(known) if known else None


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--every", type=int, default=2, help="steps between held-out checks")
    parser.add_argument("--out", default="runs/bench-methods")
    parser.add_argument("--results", default="bench-results/bench-methods.json")
    parser.add_argument("--set", dest="overrides", action="append", default=["base.threads=1"], metavar="KEY=VALUE",
                        help="override a key for every method (default base.threads=1: a shared machine)")
    args = parser.parse_args()
    results: list[dict[str, Any]] = []
    started = time.time()
    load = os.getloadavg()
    for seed in args.seeds:
        for method in METHODS:
            r = run_one(method, seed, Path(args.out) / f"{method}-seed{seed}", args.every, args.overrides)
            results.append(r)
            print(f"seed {seed} {method:5}: target at step {r['reached_step']} ({r['reached_train_s']} s, "
                  f"{r['reached_tokens']} tokens); training {r['train_s']} s; final harm rate "
                  f"{r['final']['harm_rate_change']:+.2f}, judge {r['final']['judge_change']:+.2f}, KL "
                  f"{r['final']['kl']:.2f}, alarms {r['final']['alarms']}, accepted {r['accepted']}", flush=True)
            _write(args.results, args, results, started, load)
    summary = _write(args.results, args, results, started, load)
    for method, s in summary.items():
        print(f"{method:5} reached {s['reached']} accepted {s['accepted']} time-to-target / PPO "
              f"{s['ratio_to_ppo']['reached_train_s']} (median {s['median_ratio']['reached_train_s']}; CPU time "
              f"{s['median_ratio']['reached_train_cpu_s']})")
    return 0


def _write(path: str, args: argparse.Namespace, results: list[dict[str, Any]], started: float,
           load: tuple[float, float, float]) -> dict[str, Any]:
    summary = summarise(results)
    Path(path).parent.mkdir(parents=True, exist_ok=True)
    Path(path).write_text(json.dumps({
        "setup": {"seeds": args.seeds, "every": args.every, "methods": METHODS, "overrides": args.overrides, "quick_demo": True,
                  "threads": torch.get_num_threads(), "torch": torch.__version__, "platform": platform.platform(),
                  "load_average_start": load, "load_average_end": os.getloadavg(),
                  "wall_s": round(time.time() - started, 1)},
        "summary": summary, "runs": results}, indent=2) + "\n")
    return summary


if __name__ == "__main__":
    sys.exit(main())
