"""`alignrun sweep`: trial expansion and the re-run logic with a fake trial runner (fast), then end-to-end
sweeps on the demo models, locally and on a local Ray instance (slow)."""

from __future__ import annotations

import itertools
import json
import os
import re
import sys
from pathlib import Path
from typing import Any

import pytest

from alignrun import cpu, sweep
from alignrun.config import Experiment, load_config, to_toml
from alignrun.errors import UserError
from alignrun.report import SCHEMA
from alignrun.runfolder import RunFolder, write_json_atomic, write_text_atomic

REPO = Path(__file__).resolve().parents[1]
BASE_TOML = """
[base]
model = "tiny-base"
[reward]
source = "tiny-classifier"
[data]
prompts = "prompts.jsonl"
[run]
name = "grid"
"""


def write_config(tmp_path: Path, sweep_toml: str) -> Path:
    path = tmp_path / "sweep.toml"
    path.write_text(BASE_TOML + sweep_toml)
    return path


# ---------------------------------------------------------------- trial expansion

def test_grid_times_seeds(tmp_path: Path) -> None:
    path = write_config(tmp_path, '[sweep]\nseeds = [0, 1]\n[sweep.grid]\n"kl.coef" = [0.05, 0.2]\n"lora.rank" = [4, 8]\n')
    trials = sweep.expand_trials(load_config(path))
    expected = list(itertools.product([0.05, 0.2], [4, 8], [0, 1]))  # grid x seeds, grid keys in file order
    assert [(t.config.kl.coef, t.config.lora.rank, t.config.run.seed) for t in trials] == expected
    assert [t.name for t in trials] == [f"kl.coef={c}_lora.rank={r}_seed={s}" for c, r, s in expected]
    assert all(t.config.run.name == t.name and t.config.sweep is None for t in trials)
    assert trials[0].overrides == {"kl.coef": 0.05, "lora.rank": 4, "run.seed": 0}
    # configs cross process boundaries as JSON dicts and validate back to the same experiment
    assert all(Experiment.model_validate(t.config.model_dump(mode="json")) == t.config for t in trials)


def test_seeds_only_and_names_are_file_safe(tmp_path: Path) -> None:
    trials = sweep.expand_trials(load_config(write_config(tmp_path, "[sweep]\nseeds = [3, 4]\n")))
    assert [t.name for t in trials] == ["seed=3", "seed=4"] and [t.config.run.seed for t in trials] == [3, 4]
    path = write_config(tmp_path, '[sweep.grid]\n"data.text_field" = ["a/b", "a b", "../x"]\n'
                                  '"lora.targets" = [["q", "v"], "all-linear"]\n')
    names = [t.name for t in sweep.expand_trials(load_config(path))]
    assert len(set(names)) == len(names) == 6
    assert all(re.fullmatch(r"[A-Za-z0-9_.=+-]+", n) and not n.startswith(".") for n in names)
    assert names[:2] == ["data.text_field=a-b_lora.targets=q+v", "data.text_field=a-b_lora.targets=all-linear"]


@pytest.mark.parametrize(("grid", "message"), [
    ('"kl.coeff" = [0.1]', r"\[sweep\].grid key 'kl.coeff' is not a config key; did you mean 'kl.coef'\?"),
    ('"lora.rnak" = [4]', r"did you mean 'lora.rank'\?"),
    ('"run.seed" = [1, 2]', r"'run.seed' cannot be swept: list seeds in \[sweep\].seeds"),
    ('"kl.coef" = []', r"'kl.coef' has an empty list"),
    ('"kl.coef" = [0.1, 0.1]', r"lists 0.1 more than once"),
    ('"lora.rank" = [4, "eight"]', r"trial lora.rank=eight is not a valid config:\n  .*'lora.rank' has value 'eight'"),
])
def test_bad_grids(tmp_path: Path, grid: str, message: str) -> None:
    path = write_config(tmp_path, f"[sweep.grid]\n{grid}\n")
    with pytest.raises(UserError, match=message):
        sweep.expand_trials(load_config(path), str(path))


def test_empty_grid_says_what_to_add(tmp_path: Path) -> None:
    for extra in ("", "[sweep]\n"):
        with pytest.raises(UserError, match=r'(?s)nothing to sweep.*\[sweep.grid\]\n  "kl.coef" = \[0.05, 0.2\]'):
            sweep.expand_trials(load_config(write_config(tmp_path, extra)), "x.toml")


# ---------------------------------------------------------------- re-runs with a fake trial runner

FAIL: set[str] = set()          # trial names the fake fails, without a checkpoint
FAIL_AFTER_CHECKPOINT: set[str] = set()


def fake_runner(config: dict[str, Any], folder: str, resume: bool, quiet: bool) -> dict[str, Any]:
    """Writes what a run would (status, config.toml, report.json, checkpoint) without training anything."""
    out, cfg = Path(folder), Experiment.model_validate(config)
    calls = out.parent / "calls.jsonl"
    with calls.open("a") as fh:
        fh.write(json.dumps({"name": cfg.run.name, "resume": resume, "pid": os.getpid(),
                             "threads": cfg.base.threads, "existed": (out / "marker").exists(),
                             "cpus": sorted(os.sched_getaffinity(0))}) + "\n")
    if not resume and (out / "status.json").exists():
        raise AssertionError("a fresh trial must start from an empty folder")
    write_text_atomic(out / "config.toml", to_toml(cfg))
    write_text_atomic(out / "marker", "")
    if cfg.run.name in FAIL | FAIL_AFTER_CHECKPOINT:
        if cfg.run.name in FAIL_AFTER_CHECKPOINT:
            write_json_atomic(out / "checkpoint" / "checkpoint.json", {"step": 1})
        RunFolder(out).set_status("failed", step=1, error="boom")
        return {"state": "failed", "error": f"stopped: boom in {cfg.run.name}", "wall_s": 0.5}
    write_json_atomic(out / "report.json", {"schema": SCHEMA, "config": config})
    RunFolder(out).set_status("finished", step=2)
    return {"state": "finished", "error": None, "wall_s": 1.5}


def calls(root: Path) -> list[dict[str, Any]]:
    lines = (root / "calls.jsonl").read_text().splitlines() if (root / "calls.jsonl").exists() else []
    (root / "calls.jsonl").unlink(missing_ok=True)
    return [json.loads(line) for line in lines]


GRID = '[sweep.grid]\n"kl.coef" = [0.05, 0.2]\n"lora.rank" = [4, 8]\n'


def test_failed_trial_continues_and_rerun_retries_only_it(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                                          capsys: pytest.CaptureFixture) -> None:
    monkeypatch.setattr(sweep, "run_trial", fake_runner)
    monkeypatch.setattr(sys.modules[__name__], "FAIL", {"kl.coef=0.2_lora.rank=8"})
    monkeypatch.setattr(sys.modules[__name__], "FAIL_AFTER_CHECKPOINT", {"kl.coef=0.2_lora.rank=4"})
    path, root = write_config(tmp_path, GRID), tmp_path / "out"
    args = {"out": str(root), "backend": "local", "workers": 1, "address": None, "quiet": True}

    assert sweep.run_sweep(str(path), [], **args) == 1
    out = capsys.readouterr().out
    assert "2 of 4 trials did not finish" in out and "kl.coef=0.2_lora.rank=8: stopped: boom" in out
    assert f"run folder: {root / 'kl.coef=0.2_lora.rank=8'}" in out
    index = json.loads((root / "sweep.json").read_text())
    states = {t["name"]: (t["state"], t["error"]) for t in index["trials"]}
    assert states == {"kl.coef=0.05_lora.rank=4": ("finished", None), "kl.coef=0.05_lora.rank=8": ("finished", None),
                      "kl.coef=0.2_lora.rank=4": ("failed", "stopped: boom in kl.coef=0.2_lora.rank=4"),
                      "kl.coef=0.2_lora.rank=8": ("failed", "stopped: boom in kl.coef=0.2_lora.rank=8")}
    assert index["grid"] == {"kl.coef": [0.05, 0.2], "lora.rank": [4, 8]} and index["seeds"] == []
    assert [t["folder"] for t in index["trials"]] == [t["name"] for t in index["trials"]]
    assert len(calls(root)) == 4

    monkeypatch.setattr(sys.modules[__name__], "FAIL", set())
    monkeypatch.setattr(sys.modules[__name__], "FAIL_AFTER_CHECKPOINT", set())
    assert sweep.run_sweep(str(path), [], **args) == 0
    assert "(2 already finished, skipped)" in capsys.readouterr().out
    again = {c["name"]: c for c in calls(root)}
    assert set(again) == {"kl.coef=0.2_lora.rank=4", "kl.coef=0.2_lora.rank=8"}
    assert again["kl.coef=0.2_lora.rank=4"]["resume"] and again["kl.coef=0.2_lora.rank=4"]["existed"]
    assert not again["kl.coef=0.2_lora.rank=8"]["resume"] and not again["kl.coef=0.2_lora.rank=8"]["existed"]
    index = json.loads((root / "sweep.json").read_text())
    assert {t["state"] for t in index["trials"]} == {"finished"} and index["trials"][0]["wall_s"] == 1.5

    assert sweep.run_sweep(str(path), [], **args) == 0  # nothing left to do
    assert calls(root) == []


def test_rerun_with_another_config_is_refused(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sweep, "run_trial", fake_runner)
    path, root = write_config(tmp_path, GRID), tmp_path / "out"
    args = {"out": str(root), "backend": "local", "workers": 1, "address": None, "quiet": True}
    assert sweep.run_sweep(str(path), [], **args) == 0
    calls(root)
    with pytest.raises(UserError, match=r"already finished with a different config \(ppo.steps: 20 -> 3\)"):
        sweep.run_sweep(str(path), ["ppo.steps=3"], **args)
    assert calls(root) == []  # refused before any trial ran
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    with pytest.raises(UserError, match="not empty and holds no sweep.json"):
        sweep.run_sweep(str(path), [], **{**args, "out": str(tmp_path / "busy")})


def test_default_sweep_folder(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sweep, "run_trial", fake_runner)
    monkeypatch.chdir(tmp_path)
    path = write_config(tmp_path, GRID.replace("[sweep.grid]", "[sweep]\nout = \"elsewhere\"\n[sweep.grid]"))
    assert sweep.run_sweep(str(path), [], out=None, backend="local", workers=1, address=None, quiet=True) == 0
    assert (tmp_path / "elsewhere" / "sweep.json").exists()  # sweep.out, relative to the config file
    path = write_config(tmp_path, GRID)
    assert sweep.run_sweep(str(path), [], out=None, backend="local", workers=1, address=None, quiet=True) == 0
    assert (tmp_path / "sweeps" / "grid" / "sweep.json").exists()  # sweeps/<run.name>


def test_workers_run_in_separate_processes_with_divided_cores(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sweep, "run_trial", fake_runner)  # spawned workers import it from this module
    path, root = write_config(tmp_path, GRID), tmp_path / "out"
    assert sweep.run_sweep(str(path), [], out=str(root), backend="local", workers=2, address=None, quiet=True) == 0
    seen = calls(root)
    assert len(seen) == 4 and os.getpid() not in {c["pid"] for c in seen}
    assert {c["threads"] for c in seen} == {max(1, cpu.choose_threads().threads // 2)}
    # each worker process keeps to its own share of the CPUs (disjoint where there are 2 or more); which of the two
    # workers takes which trial is up to the pool, so one worker may have run them all
    masks = {c["pid"]: c["cpus"] for c in seen}
    shares = cpu.worker_shares(cpu.affinity_cpus(), 2)
    assert all(m in shares for m in masks.values())
    assert len({tuple(m) for m in masks.values()}) == len(masks)


def test_ray_missing_names_the_extra(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(sys.modules, "ray", None)  # makes `import ray` raise ImportError
    with pytest.raises(UserError, match=r"pip install 'alignrun\[ray\]'"):
        sweep.run_sweep(str(write_config(tmp_path, GRID)), [], out=str(tmp_path / "out"), backend="ray", workers=1,
                        address=None, quiet=True)


def test_bad_command_line_values(tmp_path: Path) -> None:
    path = str(write_config(tmp_path, GRID))
    with pytest.raises(UserError, match="--workers must be at least 1, found 0"):
        sweep.run_sweep(path, [], out=None, backend="local", workers=0, address=None, quiet=True)
    with pytest.raises(UserError, match="--address is for --backend ray"):
        sweep.run_sweep(path, [], out=None, backend="local", workers=1, address="10.0.0.1:6379", quiet=True)


# ---------------------------------------------------------------- end to end on the demo models (slow)

SWEEP_DEMO = REPO / "configs" / "sweep-demo.toml"
TINY = ["ppo.steps=2", "ppo.prompts_per_step=4", "ppo.minibatch=4", "evaluation.max_prompts=8",
        "evaluation.samples_per_prompt=2", "evaluation.bootstrap_resamples=200"]


def small_sweep(tmp_path: Path, grid: str) -> Path:
    """A config that extends sweep-demo.toml with its own (smaller) grid values."""
    path = tmp_path / "small.toml"
    path.write_text(f'extends = "{SWEEP_DEMO}"\n[sweep.grid]\n{grid}\n')
    return path


@pytest.mark.slow
def test_demo_sweep_local_rerun_and_compare(demo_models: Any, tmp_path: Path, capsys: pytest.CaptureFixture) -> None:
    from alignrun.compare import compare_cli
    from alignrun.report import load_report

    root = tmp_path / "sweep"
    args = {"out": str(root), "backend": "local", "workers": 2, "address": None, "quiet": True}
    assert sweep.run_sweep(str(SWEEP_DEMO), TINY, **args) == 0  # two worker processes, one core each
    index = json.loads((root / "sweep.json").read_text())
    assert len(index["trials"]) == 6 and {t["state"] for t in index["trials"]} == {"finished"}
    for trial in index["trials"]:
        report = load_report(root / trial["folder"])
        assert report["run"]["steps"] == 2 and report["evaluation"]["prompts"] == 8
        assert (report["config"]["kl"]["coef"], report["config"]["lora"]["rank"]) == \
            (trial["overrides"]["kl.coef"], trial["overrides"]["lora.rank"])
    stamps = {t["name"]: (root / t["folder"] / "report.json").stat().st_mtime_ns for t in index["trials"]}
    capsys.readouterr()

    assert sweep.run_sweep(str(SWEEP_DEMO), TINY, **args) == 0  # re-run: everything is skipped
    assert "(6 already finished, skipped)" in capsys.readouterr().out
    assert stamps == {name: (root / name / "report.json").stat().st_mtime_ns for name in stamps}

    assert compare_cli([str(root)], fmt="table", plot_dir=str(tmp_path / "plots"), report=None) == 0
    table = capsys.readouterr().out
    assert all(name in table for name in stamps) and "kl.coef" in table and "lora.rank" in table
    assert sorted(p.name for p in (tmp_path / "plots").iterdir()) == \
        ["before_after.png", "harm_vs_kl.png", "kl_rank_heatmap.png"]


@pytest.mark.slow
def test_demo_sweep_failed_trial_leaves_the_other(demo_models: Any, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture) -> None:
    path = small_sweep(tmp_path, '"kl.coef" = [0.1]\n"lora.rank" = [4]\n"data.text_field" = ["prompt", "no_such_field"]')
    root = tmp_path / "sweep"
    assert sweep.run_sweep(str(path), TINY, out=str(root), backend="local", workers=1, address=None, quiet=True) == 1
    out = capsys.readouterr().out
    states = {t["name"]: t for t in json.loads((root / "sweep.json").read_text())["trials"]}
    good, bad = "kl.coef=0.1_lora.rank=4_data.text_field=prompt", "kl.coef=0.1_lora.rank=4_data.text_field=no_such_field"
    assert states[good]["state"] == "finished" and (root / good / "report.json").exists()
    assert states[bad]["state"] == "failed" and "no field 'no_such_field'" in states[bad]["error"]
    assert f"1 of 2 trials did not finish:\n  {bad}: " in out and "no field 'no_such_field'" in out


@pytest.mark.slow
def test_demo_sweep_on_local_ray(demo_models: Any, tmp_path: Path) -> None:
    ray = pytest.importorskip("ray")
    path = small_sweep(tmp_path, '"kl.coef" = [0.05, 0.2]\n"lora.rank" = [4]')
    root = tmp_path / "sweep"
    try:
        # the sweep starts a local Ray instance (no --address) and shuts it down when done
        assert sweep.run_sweep(str(path), TINY, out=str(root), backend="ray", workers=2, address=None,
                               quiet=True) == 0
        assert not ray.is_initialized()
    finally:
        if ray.is_initialized():
            ray.shutdown()
    index = json.loads((root / "sweep.json").read_text())
    assert [t["state"] for t in index["trials"]] == ["finished", "finished"]
    threads = {json.loads((root / t["folder"] / "report.json").read_text())["config"]["base"]["threads"]
               for t in index["trials"]}
    assert threads == {max(1, (os.cpu_count() or 1) // 2)}  # two trials share the local instance's CPUs
