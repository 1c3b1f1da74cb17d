"""Step time on a busy machine: three thread settings, idle and with a competing 2-thread CPU job, measured in
one run, interleaved.

    python scripts/bench_contention.py [--shape tiny] [--rounds 4] [--steps 3] [--out bench-results/bench-contention.json]

Three worker processes each hold one bench model (scripts/_bench_common.py shapes) and time PPO steps
(alignrun.trainer.train_step, the `ours` variant of scripts/bench.py) when asked:

    old       the defaults before alignrun.cpu: OMP_WAIT_POLICY unset (libgomp spins a while, then sleeps) and
              torch threads = the CPUs in the affinity mask
    passive   the previous default: OMP_WAIT_POLICY=PASSIVE (threads sleep at once) and threads from
              alignrun.cpu.choose_threads (affinity mask, cgroup quota)
    adaptive  the `alignrun` command now: OMP_WAIT_POLICY unset, threads from choose_threads, and before every
              step alignrun.cpu.ThreadGovernor lowers them by the CPUs other programs kept busy

The competing job is a numpy float64 matmul loop (1024 x 1024) with 2 BLAS threads in its own process. Each
round times `--steps` steps of each worker idle and loaded (orders alternate between rounds; the competitor
gets a second to start). Figures are medians over rounds; the ratios that matter (loaded / idle for each
setting, each setting's idle / old idle) are formed within this one run, so other work on the machine moves both sides.

A spin check shows that the waiting policy took effect in each worker: 300 small matmuls with 2 ms sleeps
between them, the process CPU seconds they cost (threads spinning through the sleeps add CPU time).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import _bench_common as common

SETTINGS = ("old", "passive", "adaptive")
COMPETITOR = """
import numpy as np
a = np.random.default_rng(0).standard_normal((1024, 1024))
while True:
    a = (a @ a) / 1024.0
"""


def worker(model: Path, setting: str) -> None:
    """In a child process: build the `ours` setup, then answer 'steps N', 'spin' and 'quit' on stdin."""
    import bench
    import torch
    from accelerate import Accelerator

    from alignrun import cpu

    if setting == "old":
        torch.set_num_threads(len(cpu.affinity_cpus()))
        reason = "the CPUs in the affinity mask (old default)"
    else:
        reason = common.set_bench_threads(0)  # as `alignrun run` does: for adaptive, with its ThreadGovernor
        if setting == "passive":
            cpu.govern(None)
    common.quiet_transformers()
    setup = bench.make_setup("ours", model, Accelerator(cpu=True))
    bench.run_step(setup.warm_up(), 0)
    print(json.dumps({"threads": torch.get_num_threads(), "threads_reason": reason,
                      "omp_wait_policy": os.environ.get("OMP_WAIT_POLICY", "(unset)")}), flush=True)
    x, step = torch.randn(256, 256), 0
    for line in sys.stdin:
        command, _, arg = line.strip().partition(" ")
        if command == "steps":
            rows = []
            for _ in range(int(arg)):
                step += 1
                cpu.rebalance()  # as the trainer does before every step (nothing for old and passive)
                row = bench.run_step(setup, step)
                rows.append({"wall": row["step"], "cpu": row["cpu"], "threads": torch.get_num_threads()})
            print(json.dumps(rows), flush=True)
        elif command == "spin":
            def loop() -> None:
                for _ in range(300):
                    x @ x
                    time.sleep(0.002)
            loop()
            wall, used = common.timed(loop)
            print(json.dumps({"wall": wall, "cpu": used}), flush=True)
        else:
            return


class Worker:
    def __init__(self, model: Path, setting: str) -> None:
        env = {k: v for k, v in os.environ.items() if k != "OMP_WAIT_POLICY"}
        if setting == "passive":
            env["OMP_WAIT_POLICY"] = "PASSIVE"  # before the worker loads torch: libgomp reads it once
        self.proc = subprocess.Popen([sys.executable, __file__, "--worker", setting, "--model", str(model)],
                                     stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env)
        self.info = self.ask(None)

    def ask(self, command: str | None) -> Any:
        assert self.proc.stdin is not None and self.proc.stdout is not None
        if command is not None:
            self.proc.stdin.write(command + "\n")
            self.proc.stdin.flush()
        line = self.proc.stdout.readline()
        if not line:
            raise RuntimeError(f"worker {self.proc.args} stopped (exit {self.proc.wait()})")
        return json.loads(line)

    def close(self) -> None:
        if self.proc.poll() is None:
            self.ask_quit()

    def ask_quit(self) -> None:
        assert self.proc.stdin is not None
        self.proc.stdin.write("quit\n")
        self.proc.stdin.close()
        self.proc.wait(timeout=60)


def start_competitor() -> subprocess.Popen:
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "2", "OMP_NUM_THREADS": "2", "MKL_NUM_THREADS": "2"}
    env.pop("OMP_WAIT_POLICY", None)
    proc = subprocess.Popen([sys.executable, "-c", COMPETITOR], env=env)
    time.sleep(1.0)  # let it start its threads
    return proc


def summary(rows: list[dict[str, float]]) -> dict[str, float]:
    walls = [r["wall"] for r in rows]
    return {"steps": len(rows), "median_s": statistics.median(walls), "mean_s": statistics.fmean(walls),
            "max_s": max(walls), "min_s": min(walls), "cpu_median_s": statistics.median(r["cpu"] for r in rows),
            "steps_by_threads": {str(t): sum(r["threads"] == t for r in rows) for t in sorted({r["threads"] for r in rows})}}


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--shape", default="tiny", choices=list(common.SHAPES))
    ap.add_argument("--rounds", type=int, default=4, help="rounds of idle and loaded blocks")
    ap.add_argument("--steps", type=int, default=3, help="steps per worker per block")
    ap.add_argument("--out", default="bench-results/bench-contention.json")
    ap.add_argument("--worker", choices=SETTINGS, help=argparse.SUPPRESS)
    ap.add_argument("--model", type=Path, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.worker:
        worker(args.model, args.worker)
        return 0
    log = common.Log()
    setup = common.machine()
    times: dict[tuple[str, str], list[dict[str, float]]] = {(s, load): [] for s in SETTINGS
                                                            for load in ("idle", "loaded")}
    with tempfile.TemporaryDirectory(prefix="alignrun-contention-") as tmp:
        log(f"{args.shape}: building the model, starting the two workers")
        model = common.build_model(common.SHAPES[args.shape], Path(tmp) / args.shape)
        workers = {name: Worker(model, name) for name in SETTINGS}
        try:
            for r in range(args.rounds):
                loads = ("idle", "loaded") if r % 2 == 0 else ("loaded", "idle")
                for load in loads:
                    competitor = start_competitor() if load == "loaded" else None
                    try:
                        for name in (SETTINGS if r % 2 == 0 else SETTINGS[::-1]):
                            rows = workers[name].ask(f"steps {args.steps}")
                            times[name, load] += rows
                            log(f"round {r + 1} {load:<6} {name}: " + ", ".join(f"{x['wall']:.2f} ({x['threads']})" for x in rows) + " s")
                    finally:
                        if competitor is not None:
                            competitor.kill()
                            competitor.wait()
            spin = {name: w.ask("spin") for name, w in workers.items()}
            info = {name: w.info for name, w in workers.items()}
        finally:
            for w in workers.values():
                w.close()
    table = {f"{s} {load}": summary(rows) for (s, load), rows in times.items()}
    med = {key: value["median_s"] for key, value in table.items()}
    ratios = {f"{s}: loaded / idle": common.ratio(med[f"{s} loaded"], med[f"{s} idle"]) for s in SETTINGS}
    ratios |= {f"idle: {s} / old": common.ratio(med[f"{s} idle"], med["old idle"]) for s in SETTINGS[1:]}
    ratios |= {f"loaded: {s} / old": common.ratio(med[f"{s} loaded"], med["old loaded"]) for s in SETTINGS[1:]}
    setup["load_average_end"] = os.getloadavg()
    results = {"setup": {**setup, "shape": args.shape, "rounds": args.rounds, "steps_per_block": args.steps,
                         "competitor": "numpy float64 1024x1024 matmul loop, 2 BLAS threads", "wall_s": log.elapsed()},
               "workers": info, "times": table, "ratios": ratios, "spin_check": spin,
               "targets": {"adaptive: loaded / idle": "<= 2.5", "idle: adaptive / old": "<= 1.05"}}
    out = common.write_results(args.out, results)
    print(f"\n{'':<17}{'median s':>10}{'mean s':>10}{'max s':>10}{'cpu s':>10}")
    for key, row in table.items():
        print(f"{key:<17}{row['median_s']:>10.2f}{row['mean_s']:>10.2f}{row['max_s']:>10.2f}{row['cpu_median_s']:>10.2f}")
    for key, value in ratios.items():
        print(f"{key:<26} {value:.2f}")
    for name, s in spin.items():
        print(f"spin check {name} ({info[name]['omp_wait_policy']}, {info[name]['threads']} threads): "
              f"{s['cpu']:.2f} CPU s in {s['wall']:.2f} s")
    print(f"load average at start {setup['load_average_start']}, at end {setup['load_average_end']}")
    print(f"wrote {out} ({log.elapsed():.0f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
