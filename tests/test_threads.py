"""Thread count, OpenMP waiting policy and worker CPU shares (alignrun.cpu), independent of this machine's cores."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from alignrun import cpu
from tests.tiny_run import cli_env


def _cgroup_v2(tmp_path: Path, limits: dict[str, str], own: str = "/") -> tuple[Path, Path]:
    """A cgroup v2 tree with cpu.max files ({relative folder: content}) and a /proc/self/cgroup naming `own`."""
    root = tmp_path / "cgroup"
    for folder, text in limits.items():
        (root / folder.lstrip("/")).mkdir(parents=True, exist_ok=True)
        (root / folder.lstrip("/") / "cpu.max").write_text(text + "\n")
    proc = tmp_path / "proc-self-cgroup"
    proc.write_text(f"0::{own}\n")
    return root, proc


# Formats from the Linux kernel docs: Documentation/admin-guide/cgroup-v2.rst, "cpu.max" ("$MAX $PERIOD", the
# default "max 100000" = no limit) and Documentation/scheduler/sched-bwc.rst (cfs_quota_us = -1: no limit).
def test_cgroup_v2_cpu_max_formats(tmp_path: Path) -> None:
    root, proc = _cgroup_v2(tmp_path / "a", {"/": "max 100000"})
    assert cpu.cgroup_cpu_quota(root, proc) is None
    root, proc = _cgroup_v2(tmp_path / "b", {"/": "150000 100000"})
    assert cpu.cgroup_cpu_quota(root, proc) == 1.5
    root, proc = _cgroup_v2(tmp_path / "c", {"/": "50000 100000"})
    assert cpu.cgroup_cpu_quota(root, proc) == 0.5


def test_cgroup_v2_nested_limits_take_the_smallest(tmp_path: Path) -> None:
    # the process sits in /jobs/run (proc file); its parent /jobs allows 2 CPUs, its own group is unlimited
    root, proc = _cgroup_v2(tmp_path, {"/jobs": "200000 100000", "/jobs/run": "max 100000", "/other": "50000 100000"},
                            own="/jobs/run")
    assert cpu.cgroup_cpu_quota(root, proc) == 2.0
    (root / "jobs" / "run" / "cpu.max").write_text("300000 200000\n")
    assert cpu.cgroup_cpu_quota(root, proc) == 1.5


def test_cgroup_v1_cfs_quota(tmp_path: Path) -> None:
    root, proc = tmp_path / "cgroup", tmp_path / "proc-self-cgroup"
    (root / "cpu,cpuacct").mkdir(parents=True)
    proc.write_text("4:memory:/x\n2:cpu,cpuacct:/\n0::/\n")
    (root / "cpu,cpuacct" / "cpu.cfs_quota_us").write_text("-1\n")
    (root / "cpu,cpuacct" / "cpu.cfs_period_us").write_text("100000\n")
    assert cpu.cgroup_cpu_quota(root, proc) is None
    (root / "cpu,cpuacct" / "cpu.cfs_quota_us").write_text("250000\n")
    assert cpu.cgroup_cpu_quota(root, proc) == 2.5


def test_no_cgroup_files_means_no_quota(tmp_path: Path) -> None:
    assert cpu.cgroup_cpu_quota(tmp_path / "absent", tmp_path / "absent-proc") is None


def test_threads_follow_affinity_then_quota(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 3, 5, 6}, raising=False)
    none = tmp_path / "no-cgroup"
    choice = cpu.choose_threads(0, {}, none)
    assert choice.threads == 4 and "4 CPU(s) in this process's affinity mask" in choice.reason
    root, _ = _cgroup_v2(tmp_path, {"/": "150000 100000"})
    choice = cpu.choose_threads(0, {}, root)
    assert choice.threads == 1 and "cgroup CPU quota 1.5" in choice.reason  # rounded down (common practice)
    root, _ = _cgroup_v2(tmp_path / "big", {"/": "800000 100000"})
    assert cpu.choose_threads(0, {}, root).threads == 4  # a quota above the mask does not add CPUs
    assert cpu.choose_threads(0, {"LOCAL_WORLD_SIZE": "2"}, none).threads == 2  # torchrun: 2 processes share them


def test_user_settings_win(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    root, _ = _cgroup_v2(tmp_path, {"/": "100000 100000"})
    assert cpu.choose_threads(0, {"OMP_NUM_THREADS": "3"}, root) == cpu.ThreadChoice(
        3, "OMP_NUM_THREADS=3 (set by the user)")
    assert cpu.choose_threads(5, {"OMP_NUM_THREADS": "3"}, root) == cpu.ThreadChoice(5, "base.threads = 5")
    environ: dict[str, str] = {}
    assert cpu.configure_openmp(environ) == "PASSIVE (alignrun's default)" and environ["OMP_WAIT_POLICY"] == "PASSIVE"
    environ = {"OMP_WAIT_POLICY": "ACTIVE"}
    assert cpu.configure_openmp(environ) == "ACTIVE (set by the user)" and environ["OMP_WAIT_POLICY"] == "ACTIVE"


@pytest.mark.parametrize("n_cpus,workers", [(2, 2), (8, 3), (7, 7), (16, 4), (5, 2)])
def test_worker_shares_are_disjoint_and_cover_the_cpus(n_cpus: int, workers: int) -> None:
    cpus = [c * 2 + 1 for c in range(n_cpus)]  # not 0..n-1: the shares are taken from the mask itself
    shares = cpu.worker_shares(cpus, workers)
    assert len(shares) == workers
    assert sorted(c for s in shares for c in s) == cpus  # disjoint and nothing left out
    assert max(map(len, shares)) - min(map(len, shares)) <= 1


def test_more_workers_than_cpus_get_one_cpu_each_in_turn() -> None:
    assert cpu.worker_shares([4, 9], 3) == [[4], [9], [4]]


# The command line sets the policy before torch (and with it OpenMP) is loaded; a user's own setting is kept.
PROBE = """
import os, sys
from alignrun import cli
before = 'torch' in sys.modules
cli.main(['config', 'show', sys.argv[1]])
print('torch loaded before main:', before, 'policy:', os.environ.get('OMP_WAIT_POLICY'))
"""


@pytest.mark.parametrize("given,expected", [(None, "PASSIVE"), ("ACTIVE", "ACTIVE")])
def test_command_line_sets_the_waiting_policy_before_torch_loads(tmp_path: Path, given: str | None,
                                                                  expected: str) -> None:
    config = tmp_path / "c.toml"
    config.write_text('[base]\nmodel = "m"\n[reward]\nsource = "r"\n[data]\nprompts = "p.jsonl"\n')
    env = {k: v for k, v in cli_env().items() if k != "OMP_WAIT_POLICY"}
    if given:
        env["OMP_WAIT_POLICY"] = given
    done = subprocess.run([sys.executable, "-c", PROBE, str(config)], env=env, capture_output=True, text=True,
                          timeout=300)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip().splitlines()[-1] == f"torch loaded before main: False policy: {expected}"


def test_each_claim_gets_a_share_no_other_holds(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("tempfile.tempdir", str(tmp_path))  # the lock files go here
    shares = [[0], [1]]
    with cpu.claimed_share(shares, "t") as first, cpu.claimed_share(shares, "t") as second:
        assert (first, second) == ([0], [1])
        with cpu.claimed_share(shares, "t") as third:
            assert third is None  # every share is held
        with cpu.claimed_share(shares, "other-sweep") as other:
            assert other == [0]  # another key has shares of its own
    with cpu.claimed_share(shares, "t") as again:
        assert again == [0]  # released at the end of the block


def test_ray_tasks_run_the_trial_on_a_claimed_share(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from alignrun import sweep

    monkeypatch.setattr("tempfile.tempdir", str(tmp_path))
    pinned: list[tuple[list[int], bool]] = []
    monkeypatch.setattr(cpu, "pin", lambda cpus, running_threads=False: pinned.append((cpus, running_threads)))
    with cpu.claimed_share([[0], [1]], "k"):  # another trial holds the first share
        result = sweep._pinned_trial(lambda *args: {"state": "finished", "args": args}, [[0], [1]], "k",
                                     {"a": 1}, "folder", False, True)
    assert result == {"state": "finished", "args": ({"a": 1}, "folder", False, True)}
    assert pinned == [([1], True)]  # threads already running in a reused Ray worker are moved too
