"""`alignrun sweep`: one normal run per point of [sweep].grid x [sweep].seeds, run locally or on Ray.

The sweep folder holds one run folder per trial and sweep.json, the index `compare` reads:

    {"schema": "alignrun.sweep/1", "config": path, "grid": {key: [values]}, "seeds": [int], "updated": time,
     "trials": [{"name", "overrides", "folder", "state": finished|failed|pending, "error", "wall_s"}]}

`folder` is relative to the sweep folder. Re-running a sweep skips finished trials, resumes interrupted or
failed ones that left a checkpoint, and starts the others again from an empty folder.
"""

from __future__ import annotations

import difflib
import hashlib
import itertools
import json
import multiprocessing
import os
import re
import shutil
import time
from collections.abc import Callable
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from dataclasses import dataclass
from pathlib import Path
from typing import Any, get_args

from pydantic import BaseModel

from alignrun import cpu
from alignrun.config import Experiment, flatten, load_config, with_overrides
from alignrun.errors import UserError
from alignrun.report import load_report
from alignrun.runfolder import RunFolder, read_json, write_json_atomic

SCHEMA = "alignrun.sweep/1"
SET_BY_SWEEP = {"run.name": "each trial is named after its values", "run.out": "trials live in the sweep folder",
                "run.seed": "list seeds in [sweep].seeds instead"}
NOT_COMPARED = {"base.threads", "run.out", "run.trackers", "run.tracker_dir"}  # may differ between re-runs of a trial without changing it
MAX_NAME = 120

TrialRunner = Callable[[dict[str, Any], str, bool, bool], dict[str, Any]]


@dataclass
class Trial:
    name: str                    # also the trial's folder name inside the sweep folder
    overrides: dict[str, Any]    # the swept keys and their values for this trial
    config: Experiment


@dataclass
class Job:
    trial: Trial
    folder: Path
    resume: bool


# ---------------------------------------------------------------- trial expansion

def config_keys(model: type[BaseModel] = Experiment, prefix: str = "") -> list[str]:
    """Every dotted key of the config schema, sections included (e.g. "kl", "kl.coef", "evaluation.judge.source")."""
    keys = []
    for name, field in model.model_fields.items():
        keys.append(prefix + name)
        nested = [a for a in (field.annotation, *get_args(field.annotation)) if isinstance(a, type) and issubclass(a, BaseModel)]
        if nested:
            keys += config_keys(nested[0], f"{prefix}{name}.")
    return keys


def _check_grid(cfg: Experiment, source: str) -> None:
    sweep = cfg.sweep
    if sweep is None or not (sweep.grid or sweep.seeds):
        raise UserError(
            f"{source}: nothing to sweep: [sweep].grid is empty and no [sweep].seeds are given; add for example\n"
            '  [sweep.grid]\n  "kl.coef" = [0.05, 0.2]\n  "lora.rank" = [4, 8]\n'
            "(each key is a dotted config key, each value a list; seeds = [0, 1] repeats every point)"
        )
    known = [k for k in config_keys() if not k.startswith("sweep") and k not in SET_BY_SWEEP]
    for key, values in sweep.grid.items():
        if key in SET_BY_SWEEP:
            raise UserError(f"{source}: [sweep].grid key '{key}' cannot be swept: {SET_BY_SWEEP[key]}")
        if key not in known:
            hint = difflib.get_close_matches(key, known, n=1, cutoff=0.6)
            did = f"; did you mean '{hint[0]}'?" if hint else " (keys look like 'kl.coef' or 'lora.rank')"
            raise UserError(f"{source}: [sweep].grid key '{key}' is not a config key{did}")
        if not values:
            raise UserError(f"{source}: [sweep].grid key '{key}' has an empty list; give at least one value")
        _no_repeats(values, f"{source}: [sweep].grid key '{key}'")
    _no_repeats(sweep.seeds, f"{source}: [sweep].seeds")


def _no_repeats(values: list[Any], what: str) -> None:
    seen = [json.dumps(v, sort_keys=True) for v in values]
    twice = [v for v in values if seen.count(json.dumps(v, sort_keys=True)) > 1]
    if twice:
        raise UserError(f"{what} lists {twice[0]!r} more than once; each value makes one trial")


def _value_text(value: Any) -> str:
    if isinstance(value, bool) or value is None:
        return json.dumps(value)
    if isinstance(value, list):
        return "+".join(_value_text(v) for v in value)
    return str(value)


def trial_name(overrides: dict[str, Any]) -> str:
    """A readable, file-safe folder name from the swept values, e.g. kl.coef=0.05_lora.rank=4_seed=0."""
    text = "_".join(f"{'seed' if k == 'run.seed' else k}={_value_text(v)}" for k, v in overrides.items())
    safe = re.sub(r"[^A-Za-z0-9_.=+-]+", "-", text).strip("-.") or "trial"
    if len(safe) > MAX_NAME:
        safe = f"{safe[:MAX_NAME - 9]}-{hashlib.sha256(text.encode()).hexdigest()[:8]}"
    return safe


def expand_trials(cfg: Experiment, source: str = "config") -> list[Trial]:
    """Every grid point times every seed as a validated trial config, or a UserError before anything runs."""
    _check_grid(cfg, source)
    assert cfg.sweep is not None
    base = cfg.model_copy(update={"sweep": None})
    keys = list(cfg.sweep.grid)
    points = [dict(zip(keys, values)) for values in itertools.product(*cfg.sweep.grid.values())]
    if cfg.sweep.seeds:
        points = [{**point, "run.seed": seed} for point in points for seed in cfg.sweep.seeds]
    trials: list[Trial] = []
    names: set[str] = set()
    for point in points:
        name = trial_name(point)
        if name in names:  # two value lists that read the same once made file-safe
            name = f"{name}-{len(trials)}"
        names.add(name)
        try:
            config = with_overrides(base, {**point, "run.name": name})
        except UserError as exc:
            problems = str(exc).removeprefix("invalid sweep trial:\n  ")
            raise UserError(f"{source}: [sweep] trial {name} is not a valid config:\n  {problems}") from None
        trials.append(Trial(name, point, config))
    return trials


# ---------------------------------------------------------------- one trial (runs in a worker)

def run_trial(config: dict[str, Any], folder: str, resume: bool, quiet: bool) -> dict[str, Any]:
    """Run one trial; every failure becomes a record, so one bad trial never stops the others."""
    started = time.perf_counter()
    try:
        from alignrun.trainer import run_experiment

        run_experiment(Experiment.model_validate(config), Path(folder), resume=resume, quiet=quiet)
        state, error = "finished", None
    except UserError as exc:
        state, error = "failed", str(exc)
    except Exception as exc:
        state, error = "failed", f"{type(exc).__name__}: {exc}"
    return {"state": state, "error": error, "wall_s": round(time.perf_counter() - started, 2)}


def _failed(message: str, wall_s: float | None = None) -> dict[str, Any]:
    return {"state": "failed", "error": message, "wall_s": wall_s}


# ---------------------------------------------------------------- the sweep folder

def read_index(root: Path) -> dict[str, Any]:
    """Read a sweep folder's sweep.json, refusing anything that is not this version's index."""
    path = Path(root) / "sweep.json"
    index = read_json(path, "sweep index")
    if not isinstance(index, dict) or index.get("schema") != SCHEMA or not isinstance(index.get("trials"), list):
        found = index.get("schema") if isinstance(index, dict) else type(index).__name__
        raise UserError(f"{path}: not a sweep index this alignrun reads (schema {found!r}, expected {SCHEMA!r})")
    return index


def _finished_report(folder: Path) -> dict[str, Any] | None:
    """A trial is finished when its report.json is there (status.json may be gone); a damaged report is named,
    never taken for an unfinished trial whose folder a fresh start would delete."""
    return load_report(folder) if (folder / "report.json").exists() else None


def _differences(saved: dict[str, Any], cfg: Experiment, limit: int = 4) -> list[str]:
    old, new = flatten(saved), flatten(cfg.model_dump(mode="json"))
    keys = [k for k in dict.fromkeys([*old, *new]) if k not in NOT_COMPARED and old.get(k) != new.get(k)]
    return [f"{k}: {old.get(k)!r} -> {new.get(k)!r}" for k in keys[:limit]] + (["..."] if len(keys) > limit else [])


def _saved_config(folder: Path) -> dict[str, Any] | None:
    try:
        return load_config(folder / "config.toml").model_dump(mode="json")
    except UserError:
        return None


def plan(trial: Trial, root: Path) -> str:
    """What a (re-)run does with a trial: "skip" (finished), "resume" (checkpoint of the same config) or "fresh"."""
    folder = root / trial.name
    if not folder.exists():
        return "fresh"
    report = _finished_report(folder)
    if report is not None:
        diff = _differences(report.get("config") or {}, trial.config)
        if diff:
            raise UserError(
                f"{folder}: this trial already finished with a different config ({'; '.join(diff)}); re-running "
                f"would mix two experiments in one sweep. Use another --out, or delete {folder} to run it again"
            )
        return "skip"
    saved = _saved_config(folder)
    if (folder / "checkpoint" / "checkpoint.json").exists() and saved is not None and not _differences(saved, trial.config):
        return "resume"
    return "fresh"


def sweep_folder(cfg: Experiment, out: str | None) -> Path:
    root = Path(out or (cfg.sweep.out if cfg.sweep else None) or Path("sweeps") / cfg.run.name)
    if root.is_file():
        raise UserError(f"{root}: is a file; the sweep folder must be a folder (choose another --out)")
    if root.is_dir() and any(root.iterdir()) and not (root / "sweep.json").exists():
        raise UserError(f"{root}: folder is not empty and holds no sweep.json, so it is not a sweep folder; "
                        "choose another --out")
    return root


def _record(trial: Trial, state: str, error: str | None = None, wall_s: float | None = None) -> dict[str, Any]:
    return {"name": trial.name, "overrides": trial.overrides, "folder": trial.name, "state": state, "error": error,
            "wall_s": wall_s}


# ---------------------------------------------------------------- executors

def _with_threads(cfg: Experiment, share: int) -> Experiment:
    """Divide the cores: a trial never asks for more than its share (an explicit smaller value is kept)."""
    threads = share if cfg.base.threads == 0 else min(cfg.base.threads, share)
    return with_overrides(cfg, {"base.threads": threads})


def _run_sequential(jobs: list[Job], runner: TrialRunner, quiet: bool, done: Callable[[Job, dict], None]) -> None:
    for job in jobs:
        done(job, runner(job.trial.config.model_dump(mode="json"), str(job.folder), job.resume, quiet))


def _take_share(shares: Any) -> None:
    """Pool worker start-up (before torch loads): keep to one share of the CPUs, never another worker's."""
    cpu.pin(shares.get())


def _run_pool(jobs: list[Job], runner: TrialRunner, workers: int, done: Callable[[Job, dict], None]) -> None:
    """`workers` trials at once in fresh ("spawn") processes, each pinned to its own disjoint share of the CPUs
    (affinity mask) with as many threads as its share of the CPU quota."""
    share = max(1, cpu.choose_threads().threads // workers)
    context = multiprocessing.get_context("spawn")
    shares = context.Queue()
    for cpus in cpu.worker_shares(cpu.affinity_cpus(), workers):  # one per worker process, taken at its start
        shares.put(cpus)
    with ProcessPoolExecutor(max_workers=workers, mp_context=context, initializer=_take_share,
                             initargs=(shares,)) as pool:
        futures = {pool.submit(runner, _with_threads(job.trial.config, share).model_dump(mode="json"),
                               str(job.folder), job.resume, True): job for job in jobs}
        try:
            for future in as_completed(futures):
                done(futures[future], _outcome(future))
        except BaseException:
            pool.shutdown(wait=True, cancel_futures=True)
            raise


def _outcome(future: Future) -> dict[str, Any]:
    try:
        return future.result()
    except Exception as exc:  # the worker process itself died
        return _failed(f"worker process failed: {type(exc).__name__}: {exc}")


def _pinned_trial(runner: TrialRunner, shares: list[list[int]], key: str, config: dict[str, Any], folder: str,
                  resume: bool, quiet: bool) -> dict[str, Any]:
    """A Ray task: the trial on a share of the CPUs no other trial of this sweep holds (Ray reuses worker
    processes, so threads already running are moved too)."""
    with cpu.claimed_share(shares, key) as cpus:
        if cpus is not None:
            cpu.pin(cpus, running_threads=True)
        return runner(config, folder, resume, quiet)


def _run_ray(jobs: list[Job], runner: TrialRunner, workers: int, address: str | None, quiet: bool,
             done: Callable[[Job, dict], None]) -> None:
    """One Ray task per trial, asking for as many CPUs as the trial uses threads (a node's CPUs / workers)."""
    try:
        import ray
    except ImportError:
        raise UserError("--backend ray needs Ray, an optional extra: pip install 'alignrun[ray]'") from None
    started = not ray.is_initialized()
    if started and address:
        ray.init(address=address, log_to_driver=not quiet)
    elif started:
        ray.init(num_cpus=os.cpu_count(), include_dashboard=False, log_to_driver=not quiet)
    try:
        node_cpus = [int(n["Resources"].get("CPU", 0)) for n in ray.nodes() if n.get("Alive")]
        if not any(node_cpus):
            raise UserError(f"ray cluster {address or '(local)'} has no CPUs to run trials on")
        share, largest = max(1, min(c for c in node_cpus if c) // workers), max(node_cpus)
        task = ray.remote(_pinned_trial)
        # a local cluster's trials share this machine: each task takes a free share of its CPUs (disjoint masks)
        shares = [] if address else cpu.worker_shares(cpu.affinity_cpus(), workers)
        key = f"sweep-{os.getpid()}"
        # Ray starts its worker processes itself: they get the user's OpenMP waiting policy, if any, from the start
        policy = os.environ.get("OMP_WAIT_POLICY")
        waiting = {"env_vars": {"OMP_WAIT_POLICY": policy}} if policy else None
        pending = {}
        for job in jobs:
            cfg = _with_threads(job.trial.config, min(job.trial.config.base.threads or share, largest))
            ref = task.options(num_cpus=cfg.base.threads, runtime_env=waiting).remote(
                runner, shares, key, cfg.model_dump(mode="json"), str(job.folder), job.resume, quiet)
            pending[ref] = job
        while pending:
            ready, _ = ray.wait(list(pending), num_returns=1)
            for ref in ready:
                job = pending.pop(ref)
                try:
                    result = ray.get(ref)
                except Exception as exc:  # the task's worker died, or an error escaped the runner
                    cause = getattr(exc, "cause", None) or exc
                    result = _failed(f"ray task failed: {type(cause).__name__}: {cause}")
                done(job, result)
    finally:
        if started:
            ray.shutdown()


def _execute(jobs: list[Job], backend: str, workers: int, address: str | None, quiet: bool,
             done: Callable[[Job, dict], None]) -> None:
    runner = run_trial  # looked up at call time, so tests can swap in a fake
    if backend == "ray":
        if address:
            print("note: with a remote Ray cluster, every node must see the sweep folder, models and prompts "
                  "at the same paths (a shared file system)", flush=True)
        _run_ray(jobs, runner, workers, address, quiet, done)
    elif workers > 1 and len(jobs) > 1:
        _run_pool(jobs, runner, min(workers, len(jobs)), done)
    else:
        _run_sequential(jobs, runner, quiet, done)


# ---------------------------------------------------------------- the command

def run_sweep(config_path: str, overrides: list[str], *, out: str | None, backend: str, workers: int,
              address: str | None, quiet: bool) -> int:
    """`alignrun sweep`: returns 0 when every trial finished, 1 when any failed."""
    if workers < 1:
        raise UserError(f"--workers must be at least 1, found {workers}")
    if address and backend != "ray":
        raise UserError("--address is for --backend ray; the local backend runs trials on this machine")
    cfg = load_config(config_path, overrides)
    trials = expand_trials(cfg, str(config_path))
    root = sweep_folder(cfg, out).resolve()
    plans = {t.name: plan(t, root) for t in trials}  # raises before anything runs
    root.mkdir(parents=True, exist_ok=True)
    with RunFolder(root):
        previous = {r.get("name"): r for r in read_index(root)["trials"]} if (root / "sweep.json").exists() else {}
        records = {}
        for t in trials:
            wall = previous.get(t.name, {}).get("wall_s")
            records[t.name] = _record(t, "finished", wall_s=wall) if plans[t.name] == "skip" else _record(t, "pending")
        sweep = cfg.sweep
        assert sweep is not None  # expand_trials refused a config without one
        index = {"schema": SCHEMA, "config": str(Path(config_path).resolve()), "grid": sweep.grid,
                 "seeds": sweep.seeds, "updated": None, "trials": list(records.values())}

        def save() -> None:
            index["updated"] = time.strftime("%Y-%m-%dT%H:%M:%S")
            index["trials"] = list(records.values())
            write_json_atomic(root / "sweep.json", index)

        jobs = []
        for t in trials:
            if plans[t.name] == "fresh" and (root / t.name).exists():
                shutil.rmtree(root / t.name)
            if plans[t.name] != "skip":
                jobs.append(Job(t, root / t.name, resume=plans[t.name] == "resume"))
        save()
        skipped = len(trials) - len(jobs)
        print(f"sweep: {len(trials)} trials in {root}" + (f" ({skipped} already finished, skipped)" if skipped else ""),
              flush=True)

        def done(job: Job, result: dict[str, Any]) -> None:
            records[job.trial.name] = _record(job.trial, result["state"], result.get("error"), result.get("wall_s"))
            save()
            finished = sum(r["state"] != "pending" for r in records.values()) - skipped
            what = "finished" if result["state"] == "finished" else f"FAILED: {str(result['error']).splitlines()[0]}"
            wall = f" in {result['wall_s']:.0f} s" if result.get("wall_s") is not None else ""
            print(f"[{finished}/{len(jobs)}] {job.trial.name}: {what}{wall}", flush=True)

        if jobs:
            _execute(jobs, backend, workers, address, quiet, done)
    failed = [r for r in records.values() if r["state"] != "finished"]
    if failed:
        print(f"\n{len(failed)} of {len(trials)} trials did not finish:")
        for r in failed:
            print(f"  {r['name']}: {str(r['error'] or r['state']).splitlines()[0]}\n    run folder: {root / r['folder']}")
        print(f"full messages: {root / 'sweep.json'}; re-run the same command to retry only these trials")
        return 1
    print(f"\nall {len(trials)} trials finished; compare them with: alignrun compare {root}")
    return 0
