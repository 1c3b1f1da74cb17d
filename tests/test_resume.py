"""Interrupted runs: resume exactness after SIGKILL and SIGINT, the run-folder lock, status.json, the NaN guard.

The reference is one uninterrupted tiny run (5 PPO steps, a checkpoint after every step). A second copy of
the same run is started as a real subprocess and held inside a chosen step by the reward callable
(tests.tiny_run.scripted_harm), so the kill point is exact: checkpoint k is complete, step k + 1 has
sampled but not updated. It is SIGKILLed (or sent SIGINT), then resumed with
`alignrun run CONFIG --resume RUN_DIR`, and its numbers must equal the reference's.

In-process runs (`alignrun.cli.main`) and `python -m alignrun` give bit-identical reports here (one thread,
same seed), so the reference and the resumes run in-process to save interpreter start-ups.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import alignrun.trainer
from alignrun.cli import main
from alignrun.errors import UserError
from alignrun.runfolder import RunFolder, read_status
from tests import tiny_run

STEPS = 5
HOLD_TIMEOUT_S = 400  # interpreter start-up plus a few tiny steps, on a loaded 2-core machine


# ------------------------------------------------------------------------------------------ helpers


def training_numbers(run_dir: Path) -> dict[str, Any]:
    """What training decides: metrics.jsonl rows (timing removed), the training block, per-prompt harm
    before/after, the harm summaries of both classifiers, the after-training block and the paired change."""
    numbers = tiny_run.report_numbers(run_dir)
    return {
        "metrics": tiny_run.metrics_without_timing(run_dir),
        "steps": numbers["steps"], "training": numbers["training"], "per_prompt": numbers["per_prompt"],
        "before_harm": {who: numbers["before"][who] for who in ("reward_classifier", "judge")},
        "after": numbers["after"], "change": numbers["change"], "prompt_digest": numbers["prompt_digest"],
    }


def status(run_dir: Path) -> dict[str, Any]:
    return json.loads((run_dir / "status.json").read_text())


def checkpoint_step(run_dir: Path) -> int:
    return json.loads((run_dir / "checkpoint" / "checkpoint.json").read_text())["step"]


def resume(config: Path, run_dir: Path, *extra: str) -> int:
    return main(["run", str(config), "--resume", str(run_dir), "--quiet", *extra])


def hashes(folder: Path) -> dict[str, str]:
    """SHA-256 of every file under folder, by relative path (folders listed too)."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "folder"
            for p in sorted(folder.rglob("*"))}


def wait_for(condition: Callable[[], bool], child: subprocess.Popen, cwd: Path, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while not condition():
        if child.poll() is not None:
            raise AssertionError(f"the run ended (code {child.returncode}) before the hold point:\n"
                                 f"{(cwd / 'child.err').read_text()}")
        if time.monotonic() > deadline:
            raise AssertionError(f"no hold point after {timeout} s")
        time.sleep(0.1)


def start_held(config: Path, out: Path, hold_step: int) -> tuple[subprocess.Popen, Path]:
    """Start `alignrun run` as a subprocess and return once it is held inside PPO step hold_step
    (cwd/held exists; creating tiny_run.release_path(cwd/held) lets the step go on)."""
    cwd = out.parent / f"{out.name}-cwd"
    cwd.mkdir()
    mark = cwd / "held"
    child = tiny_run.start_alignrun(["run", str(config), "--out", str(out), "--quiet"], cwd=cwd,
                                    **{tiny_run.HOLD_AT_ENV: str(tiny_run.call_of_step(hold_step)),
                                       tiny_run.HOLD_MARK_ENV: str(mark)})
    try:
        wait_for(mark.exists, child, cwd, HOLD_TIMEOUT_S)
    except BaseException:
        child.kill()
        child.wait()
        raise
    return child, cwd


# ------------------------------------------------------------------------------------------ fixtures


@pytest.fixture(scope="module")
def experiment(tiny_models: dict[str, Path], tmp_path_factory: pytest.TempPathFactory) -> tiny_run.TinyExperiment:
    return tiny_run.write_tiny_experiment(tmp_path_factory.mktemp("resume-exp"), tiny_models["t5"], steps=STEPS,
                                          checkpoint_every=1, reward_source=f"{tiny_run.MODULE}:scripted_harm")


@pytest.fixture(scope="module")
def reference(experiment: tiny_run.TinyExperiment) -> Path:
    """The uninterrupted run."""
    out = experiment.folder / "reference"
    tiny_run.reset_call_counts()
    assert main(["run", str(experiment.config), "--out", str(out), "--quiet"]) == 0
    assert status(out)["state"] == "finished"
    return out


@pytest.fixture(scope="module")
def killed(experiment: tiny_run.TinyExperiment) -> Callable[[int], Path]:
    """killed(k): a pristine copy of a run folder SIGKILLed while held in step k + 1 (checkpoint k complete)."""
    made: dict[int, Path] = {}

    def make(k: int) -> Path:
        if k not in made:
            out = experiment.folder / f"killed-{k}"
            child, _ = start_held(experiment.config, out, hold_step=k + 1)
            # held mid-step: status says running at step k, checkpoint k and k metrics rows are on disk
            assert status(out) == {**status(out), "state": "running", "step": k}
            assert checkpoint_step(out) == k
            assert [r["step"] for r in tiny_run.read_jsonl(out / "metrics.jsonl")] == list(range(1, k + 1))
            child.send_signal(signal.SIGKILL)
            assert child.wait(timeout=60) == -signal.SIGKILL
            made[k] = out
        return made[k]

    return make


def copy_of(run_dir: Path, name: str) -> Path:
    target = run_dir.parent / name
    shutil.copytree(run_dir, target)
    return target


# ------------------------------------------------------------------------------- SIGKILL and resume


@pytest.mark.slow
@pytest.mark.parametrize("k", [1, 3])
def test_sigkill_after_step_k_then_resume_is_exact(k: int, experiment, reference, killed, capsys) -> None:
    run_dir = copy_of(killed(k), f"resumed-{k}")
    assert not (run_dir / "report.json").exists()
    lock = json.loads((run_dir / ".lock").read_text())  # left behind by the killed process
    assert lock["host"] == socket.gethostname()
    capsys.readouterr()
    assert resume(experiment.config, run_dir) == 0
    said = capsys.readouterr().out
    assert f"process {lock['pid']} on {lock['host']} is gone" in said  # the dead run is reported as such
    assert f"training continues from step {k} (checkpoint/)" in said
    assert not (run_dir / ".lock").exists()  # the stale lock was cleared, then ours released
    assert status(run_dir)["state"] == "finished" and status(run_dir)["step"] == STEPS
    resumed, ref = training_numbers(run_dir), training_numbers(reference)
    assert [r["step"] for r in resumed["metrics"]] == list(range(1, STEPS + 1))
    for key in ref:
        assert resumed[key] == ref[key], f"{key} differs after resuming from step {k}"


@pytest.mark.slow
def test_resumed_report_equals_uninterrupted_report_in_every_number(experiment, reference, killed) -> None:
    run_dir = copy_of(killed(3), "resumed-full")
    assert resume(experiment.config, run_dir) == 0
    assert tiny_run.report_numbers(run_dir) == tiny_run.report_numbers(reference)


@pytest.mark.slow
def test_resume_drops_metrics_rows_written_after_the_checkpoint(experiment, reference, killed) -> None:
    # killed after writing step 4's row but before checkpoint 4: the row is redone, not kept twice
    run_dir = copy_of(killed(3), "resumed-extra-row")
    with open(run_dir / "metrics.jsonl", "a") as fh:
        fh.write(json.dumps({"step": 4, "reward_mean": 123.0}) + "\n")
    assert resume(experiment.config, run_dir) == 0
    assert training_numbers(run_dir) == training_numbers(reference)


@pytest.mark.slow
def test_resume_survives_a_torn_last_metrics_line(experiment, reference, killed, capsys) -> None:
    run_dir = copy_of(killed(3), "resumed-torn")
    with open(run_dir / "metrics.jsonl", "a") as fh:
        fh.write('{"step": 4, "reward_me')
    code = resume(experiment.config, run_dir)
    assert code == 0, capsys.readouterr().err
    assert training_numbers(run_dir) == training_numbers(reference)


@pytest.mark.slow
def test_resume_without_a_checkpoint_restarts_cleanly(experiment, reference, killed, capsys) -> None:
    # the state of a run with run.checkpoint_every = 0 killed after step 3
    run_dir = copy_of(killed(3), "resumed-no-checkpoint")
    shutil.rmtree(run_dir / "checkpoint")
    capsys.readouterr()
    assert resume(experiment.config, run_dir) == 0
    assert "no checkpoint, so training restarts from step 0" in capsys.readouterr().out
    assert training_numbers(run_dir) == training_numbers(reference)


# ------------------------------------------------------------------------- dead, finished, damaged


@pytest.mark.slow
def test_a_killed_run_reads_as_dead_in_status_and_compare(killed) -> None:
    from alignrun import compare

    run_dir = copy_of(killed(3), "dead")
    assert status(run_dir)["state"] == "running"  # what the killed process last wrote
    pid = json.loads((run_dir / ".lock").read_text())["pid"]
    seen = read_status(run_dir)
    assert seen is not None and seen["state"] == "dead" and seen["step"] == 3 and f"process {pid}" in seen["note"]
    with pytest.raises(UserError, match=rf"status: dead, step 3; .*process {pid} .* is gone"):
        compare.compare_cli([str(run_dir)], fmt="table", plot_dir=None, report=None)


@pytest.mark.slow
def test_resuming_a_finished_run_changes_nothing(experiment, reference, capsys) -> None:
    run_dir = copy_of(reference, "finished-again")
    before = hashes(run_dir)
    capsys.readouterr()
    assert resume(experiment.config, run_dir) == 0
    said = capsys.readouterr().out
    assert "already finished; nothing to resume, nothing changed" in said
    assert hashes(run_dir) == before
    # a different seed is refused, naming the key with both values, and changes nothing either
    assert resume(experiment.config, run_dir, "--set", "run.seed=7") == 2
    assert "run.seed: 0 in the run, 7 now" in capsys.readouterr().err
    assert hashes(run_dir) == before


@pytest.mark.slow
def test_a_damaged_report_is_named_and_written_again_without_training(experiment, reference, capsys) -> None:
    run_dir = copy_of(reference, "damaged-report")
    (run_dir / "report.json").write_text('{"schema": "alignrun.rep')
    metrics = hashes(run_dir)["metrics.jsonl"]
    capsys.readouterr()
    assert resume(experiment.config, run_dir) == 2
    err = capsys.readouterr().err
    assert f"{run_dir / 'report.json'}: report is not valid JSON" in err and "delete it" in err
    (run_dir / "report.json").unlink()  # as the message says
    assert resume(experiment.config, run_dir) == 0
    assert f"training continues from step {STEPS}" in capsys.readouterr().out
    assert hashes(run_dir)["metrics.jsonl"] == metrics  # no step was trained again
    assert tiny_run.report_numbers(run_dir) == tiny_run.report_numbers(reference)


@pytest.mark.slow
def test_overwrite_replaces_the_run_and_keeps_other_files(experiment, reference) -> None:
    run_dir = copy_of(reference, "overwritten")
    (run_dir / "notes.txt").write_text("mine")
    (run_dir / "status.json").unlink()  # still a run: recognised by its other files
    tiny_run.reset_call_counts()
    assert main(["run", str(experiment.config), "--out", str(run_dir), "--quiet"]) == 2
    # the old run's files go before the new run starts: a new run that stops at the preflight leaves none behind
    assert main(["run", str(experiment.config), "--out", str(run_dir), "--quiet", "--overwrite",
                 "--set", f"reward.source={tiny_run.MODULE}:constant_harm"]) == 3
    assert sorted(p.name for p in run_dir.iterdir()) == ["config.toml", "environment.json", "notes.txt",
                                                         "preflight.json", "status.json"]
    tiny_run.reset_call_counts()
    assert main(["run", str(experiment.config), "--out", str(run_dir), "--quiet", "--overwrite"]) == 0
    assert (run_dir / "notes.txt").read_text() == "mine"
    assert status(run_dir)["state"] == "finished"
    assert training_numbers(run_dir) == training_numbers(reference)


@pytest.mark.slow
def test_damaged_trainer_state_is_named_and_status_keeps_the_step(experiment, killed, capsys) -> None:
    run_dir = copy_of(killed(3), "damaged-state")
    state = run_dir / "checkpoint" / "trainer_state.pt"
    state.write_bytes(state.read_bytes()[:200])  # truncated
    capsys.readouterr()
    assert resume(experiment.config, run_dir) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "internal error" not in err
    assert f"{run_dir / 'checkpoint'}: the checkpoint" in err and "damaged" in err and f"delete {run_dir / 'checkpoint'}" in err
    # not "failed, step 0": the run still stands at step 3, stopped
    assert (status(run_dir)["state"], status(run_dir)["step"]) == ("interrupted", 3)
    assert status(run_dir)["error"].startswith("resume failed:")


@pytest.mark.slow
def test_the_second_of_two_concurrent_runs_is_not_told_to_resume(experiment, tmp_path, capsys) -> None:
    out = tmp_path / "busy"
    child, cwd = start_held(experiment.config, out, hold_step=2)
    try:
        before = hashes(out)
        capsys.readouterr()
        for extra in ((), ("--overwrite",), ("--resume", str(out))):
            assert main(["run", str(experiment.config), "--out", str(out), "--quiet", *extra]) == 2
            err = capsys.readouterr().err
            assert f"another alignrun process is writing this run folder (pid {child.pid}" in err
            assert "--resume" not in err and "--overwrite" not in err
        assert hashes(out) == before
    finally:
        child.kill()
        child.wait()


def test_run_files_follow_the_umask(tmp_path) -> None:
    # atomic writes create files like open() does: 0666 minus the umask (common practice, POSIX creat)
    from alignrun.runfolder import write_json_atomic, write_text_atomic

    for mask in (0o022, 0o077, 0o002):
        old = os.umask(mask)
        try:
            folder = tmp_path / f"m{mask:o}"
            write_text_atomic(folder / "a.md", "x")
            write_json_atomic(folder / "b.json", {"x": 1})
            with RunFolder(folder):
                lock_mode = (folder / ".lock").stat().st_mode & 0o777
        finally:
            os.umask(old)
        assert {(folder / n).stat().st_mode & 0o777 for n in ("a.md", "b.json")} == {0o666 & ~mask}
        assert lock_mode == 0o666 & ~mask


@pytest.mark.slow
def test_every_file_of_a_run_follows_the_umask(reference) -> None:
    mask = os.umask(0)
    os.umask(mask)
    modes = {str(p.relative_to(reference)): p.stat().st_mode & 0o777 for p in reference.rglob("*") if p.is_file()}
    assert modes and {name: oct(m) for name, m in modes.items() if m != 0o666 & ~mask} == {}


@pytest.mark.slow
def test_resume_after_a_kill_inside_checkpoint_renames(experiment, reference, killed) -> None:
    run_dir = copy_of(killed(3), "resumed-renames")
    (run_dir / "checkpoint").rename(run_dir / ".checkpoint.old")
    assert resume(experiment.config, run_dir) == 0
    assert training_numbers(run_dir) == training_numbers(reference)


# -------------------------------------------------------------------------------- SIGINT (Ctrl-C)


@pytest.fixture(scope="module")
def interrupted(experiment: tiny_run.TinyExperiment) -> tuple[Path, dict[str, Any]]:
    """A subprocess run sent SIGINT (Ctrl-C) while held inside step 4 (checkpoint 3 complete), released half a
    second later (a run that stops at the end of the step may finish it), then resumed in-process."""
    out = experiment.folder / "interrupted"
    child, cwd = start_held(experiment.config, out, hold_step=4)
    child.send_signal(signal.SIGINT)
    time.sleep(0.5)
    tiny_run.release_path(cwd / "held").write_text("")
    seen: dict[str, Any] = {"code": child.wait(timeout=120)}
    seen.update(err=(cwd / "child.err").read_text(), status=status(out), saved_step=checkpoint_step(out),
                rows=len(tiny_run.read_jsonl(out / "metrics.jsonl")), had_report=(out / "report.json").exists())
    seen["resumed"] = resume(experiment.config, out)
    return out, seen


@pytest.mark.slow
def test_sigint_marks_interrupted_and_resume_completes(interrupted) -> None:
    out, seen = interrupted
    assert seen["code"] == 130
    assert seen["status"]["state"] == "interrupted"
    # stopped at once (step 3 done) or at the end of the step it was in (step 4 done); either way the
    # status, the checkpoint and metrics.jsonl agree
    assert seen["status"]["step"] == seen["saved_step"] == seen["rows"] in (3, 4)
    assert "Traceback" not in seen["err"]
    assert f"--resume {out}" in seen["err"] and "alignrun: interrupted" in seen["err"]
    assert not seen["had_report"]
    assert seen["resumed"] == 0
    assert status(out)["state"] == "finished" and status(out)["step"] == STEPS
    assert [r["step"] for r in tiny_run.read_jsonl(out / "metrics.jsonl")] == list(range(1, STEPS + 1))


@pytest.mark.slow
def test_sigint_then_resume_is_exact(interrupted, reference) -> None:
    out, _ = interrupted
    assert training_numbers(out) == training_numbers(reference)


@pytest.mark.slow
@pytest.mark.parametrize("stage, hold_step, step", [("before-training evaluation", 0, 0),
                                                    ("after-training evaluation", STEPS + 1, STEPS)])
def test_sigint_in_an_evaluation_tells_one_story(stage, hold_step, step, experiment, reference, capsys) -> None:
    """Ctrl-C while the held-out set is scored (hold_step 0 holds the before-training evaluation's reward call,
    STEPS + 1 the after-training one): the message, status.json and --resume agree."""
    out = experiment.folder / f"sigint-{hold_step}"
    child, cwd = start_held(experiment.config, out, hold_step=hold_step)
    child.send_signal(signal.SIGINT)
    assert child.wait(timeout=120) == 130
    err = (cwd / "child.err").read_text()
    assert "Traceback" not in err
    assert f"interrupted during the {stage}; continue with: alignrun run CONFIG --resume {out} " \
           f"(training resumes from step {step})" in err
    assert (status(out)["state"], status(out)["step"], status(out)["stage"]) == ("interrupted", step, stage)
    capsys.readouterr()
    assert resume(experiment.config, out) == 0
    said = capsys.readouterr().out
    assert (f"training continues from step {step}" if step else "training restarts from step 0") in said
    assert status(out)["state"] == "finished"
    assert training_numbers(out) == training_numbers(reference)


# ------------------------------------------------------------------------------------- the NaN guard


@pytest.fixture(scope="module")
def nan_at_step_3(experiment: tiny_run.TinyExperiment, tmp_path_factory: pytest.TempPathFactory):
    """A run whose transformed reward is NaN in PPO step 3 (trainer.reward_from_scores patched in-process)."""
    out = tmp_path_factory.mktemp("nan") / "run"
    calls = {"n": 0}
    real = alignrun.trainer.reward_from_scores

    def reward(scores: Any, section: Any) -> Any:
        calls["n"] += 1
        value = real(scores, section)
        return value * float("nan") if calls["n"] == 3 else value

    with pytest.MonkeyPatch.context() as mp, tempfile.TemporaryFile("w+") as capture:
        mp.setattr(alignrun.trainer, "reward_from_scores", reward)
        mp.setattr(sys, "stderr", capture)  # capsys is function-scoped; this fixture is shared
        tiny_run.reset_call_counts()
        code = main(["run", str(experiment.config), "--out", str(out), "--quiet"])
        capture.seek(0)
        err = capture.read()
    return out, code, err


@pytest.mark.slow
def test_nan_reward_stops_and_keeps_the_last_good_checkpoint_and_adapter(nan_at_step_3) -> None:
    out, code, err = nan_at_step_3
    assert code == 2 and "Traceback" not in err
    assert "NaN" in err and str(out) in err
    assert status(out)["state"] == "failed"
    assert not (out / "report.json").exists()
    assert checkpoint_step(out) == 2  # steps 1 and 2 finished; step 3 produced the NaN
    assert (out / "adapter" / "adapter_model.safetensors").is_file()
    assert (out / "adapter" / "value_head.safetensors").is_file()
    assert [r["step"] for r in tiny_run.read_jsonl(out / "metrics.jsonl")] == [1, 2]


@pytest.mark.slow
def test_nan_message_names_the_failing_step(nan_at_step_3) -> None:
    _, _, err = nan_at_step_3
    assert re.search(r"\bat step 3\b", err), err


@pytest.mark.slow
def test_nan_from_a_callable_backend_is_caught_by_the_guard(experiment, tmp_path, monkeypatch, capsys) -> None:
    monkeypatch.setenv(tiny_run.NAN_AT_ENV, str(tiny_run.call_of_step(3)))
    tiny_run.reset_call_counts()
    out = tmp_path / "run"
    code = main(["run", str(experiment.config), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err
    assert status(out)["state"] == "failed" and not (out / "report.json").exists()
    assert checkpoint_step(out) == 2
    assert (out / "adapter" / "adapter_model.safetensors").is_file()
    assert re.search(r"\bat step 3\b", err), err


# ------------------------------------------------------------------------------ disk full at the end


@pytest.mark.slow
def test_disk_full_at_report_loses_nothing_and_resume_finishes(experiment, reference, tmp_path, monkeypatch,
                                                                capsys) -> None:
    import errno

    out = tmp_path / "run"
    real = os.replace

    def replace(src: Any, dst: Any, *args: Any, **kwargs: Any) -> None:
        if Path(dst) == out / "report.json":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(dst))
        real(src, dst, *args, **kwargs)

    monkeypatch.setattr(os, "replace", replace)
    tiny_run.reset_call_counts()
    assert main(["run", str(experiment.config), "--out", str(out), "--quiet"]) != 0
    assert "Traceback" not in capsys.readouterr().err
    assert status(out)["state"] == "failed"
    assert not (out / "report.json").exists()
    assert not list(out.glob(".report.json.*"))  # no temporary file left behind
    assert checkpoint_step(out) == STEPS and (out / "adapter" / "adapter_model.safetensors").is_file()
    monkeypatch.setattr(os, "replace", real)  # space freed
    assert resume(experiment.config, out) == 0
    assert training_numbers(out) == training_numbers(reference)


# ------------------------------------------------------------------------------------------- the lock


def _write_lock(run_dir: Path, pid: int, host: str | None = None) -> None:
    run_dir.mkdir(parents=True, exist_ok=True)
    (run_dir / ".lock").write_text(json.dumps({"pid": pid, "host": host or socket.gethostname(),
                                               "since": "2030-01-01T00:00:00"}))


def _finished_pid() -> int:
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_live_lock_refuses_a_second_run_and_names_the_pid(experiment, tmp_path, capsys) -> None:
    out = tmp_path / "run"
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(120)"])
    try:
        _write_lock(out, sleeper.pid)
        lock_before = (out / ".lock").read_text()
        code = main(["run", str(experiment.config), "--out", str(out), "--quiet"])
        err = capsys.readouterr().err
    finally:
        sleeper.kill()
        sleeper.wait()
    assert code == 2 and "Traceback" not in err
    assert f"pid {sleeper.pid}" in err and "another alignrun process" in err and "--out" in err
    assert (out / ".lock").read_text() == lock_before  # the owner's lock is left alone
    assert sorted(p.name for p in out.iterdir()) == [".lock"]  # and nothing else was written


def test_lock_from_another_host_is_not_taken_over(experiment, tmp_path, capsys) -> None:
    # a pid on another machine (shared disk) cannot be checked, so it must count as alive
    out = tmp_path / "run"
    _write_lock(out, _finished_pid(), host="some-other-host.example")
    assert main(["run", str(experiment.config), "--out", str(out), "--quiet"]) == 2
    assert "some-other-host.example" in capsys.readouterr().err
    assert (out / ".lock").exists()


@pytest.mark.slow
def test_stale_lock_is_cleared_and_the_run_proceeds(experiment, tmp_path) -> None:
    out = tmp_path / "run"
    _write_lock(out, _finished_pid())
    tiny_run.reset_call_counts()
    assert main(["run", str(experiment.config), "--out", str(out), "--quiet"]) == 0
    assert status(out)["state"] == "finished" and (out / "report.json").is_file()
    assert not (out / ".lock").exists()


@pytest.mark.slow
def test_status_is_failed_after_a_failed_run_and_finished_after_a_good_one(experiment, reference, tmp_path) -> None:
    assert status(reference)["state"] == "finished" and status(reference)["step"] == STEPS
    out = tmp_path / "run"
    assert main(["run", str(experiment.config), "--out", str(out), "--quiet",
                 "--set", f"reward.source={tiny_run.MODULE}:constant_harm"]) == 3
    assert status(out)["state"] == "failed" and "uninformative" in status(out)["error"]


# ------------------------------------------------------------------------- property: lock and status

STATES = ["running", "finished", "failed", "interrupted"]
OPS = st.one_of(
    st.just(("acquire",)), st.just(("release",)), st.just(("second-acquire",)),
    st.tuples(st.just("status"), st.sampled_from(STATES), st.integers(0, 10**6)),
    st.tuples(st.just("foreign-lock"), st.sampled_from(["live", "dead", "other-host"])),
)
_DEAD: list[int] = []


def _dead_pid() -> int:
    if not _DEAD:
        _DEAD.append(_finished_pid())
    return _DEAD[0]


@settings(max_examples=60, deadline=None)
@given(ops=st.lists(OPS, max_size=14))
def test_lock_and_status_follow_a_simple_model(ops: list[tuple]) -> None:
    """Model: the lock is free, ours, or someone else's (live, dead, or on another host). Acquiring takes a
    free or dead lock and refuses the rest naming the owner's pid; release removes only our own lock;
    read_status returns the last state written, except "running" without a live writer, which reads "dead";
    no temporary files are left."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "run"
        folder = RunFolder(path)
        lock: str | None = None
        last_status: tuple[str, int] | None = None
        pids = {"live": os.getppid(), "dead": _dead_pid(), "other-host": os.getpid()}
        for op in ops:
            if op[0] in ("acquire", "second-acquire"):
                # second-acquire: another RunFolder object in this process, i.e. a second writer
                who = folder if op[0] == "acquire" else RunFolder(path)
                if lock in (None, "dead"):
                    who.acquire()
                    lock = "ours"
                    if who is not folder:
                        who.release()
                        lock = None
                else:
                    owner = json.loads((path / ".lock").read_text())
                    with pytest.raises(UserError, match=f"pid {owner['pid']} "):
                        who.acquire()
            elif op[0] == "release":
                folder.release()
                if lock == "ours":
                    lock = None
            elif op[0] == "status":
                path.mkdir(parents=True, exist_ok=True)
                folder.set_status(op[1], step=op[2])
                last_status = (op[1], op[2])
            elif op[0] == "foreign-lock" and lock is None:
                host = "elsewhere.example" if op[1] == "other-host" else None
                _write_lock(path, pids[op[1]], host)
                lock = op[1]
            assert (path / ".lock").exists() == (lock is not None)
            assert folder.locked == (lock == "ours")
            if lock == "ours":
                assert json.loads((path / ".lock").read_text())["pid"] == os.getpid()
            got = read_status(path) if path.exists() else None
            expected = last_status
            if expected and expected[0] == "running" and lock in (None, "dead"):
                expected = ("dead", expected[1])  # a running status whose writer is gone reads as dead
            assert (got and (got["state"], got["step"])) == (expected or None)
            if path.exists():
                assert not [p for p in path.iterdir() if p.name.endswith(".tmp")]
