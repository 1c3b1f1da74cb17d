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


@pytest.mark.parametrize("n_cpus,workers", [(2, 2), (8, 3), (7, 7), (16, 4), (5, 2)])
def test_worker_shares_are_disjoint_and_cover_the_cpus(n_cpus: int, workers: int) -> None:
    cpus = [c * 2 + 1 for c in range(n_cpus)]  # not 0..n-1: the shares are taken from the mask itself
    shares = cpu.worker_shares(cpus, workers)
    assert len(shares) == workers
    assert sorted(c for s in shares for c in s) == cpus  # disjoint and nothing left out
    assert max(map(len, shares)) - min(map(len, shares)) <= 1


def test_more_workers_than_cpus_get_one_cpu_each_in_turn() -> None:
    assert cpu.worker_shares([4, 9], 3) == [[4], [9], [4]]


# The command line leaves OpenMP's waiting policy to OpenMP and to the user, and loads no torch before main.
PROBE = """
import os, sys
from alignrun import cli
before = 'torch' in sys.modules
cli.main(['config', 'show', sys.argv[1]])
print('torch loaded before main:', before, 'policy:', os.environ.get('OMP_WAIT_POLICY'))
"""


@pytest.mark.parametrize("given,expected", [(None, "None"), ("PASSIVE", "PASSIVE")])
def test_command_line_leaves_the_waiting_policy_alone(tmp_path: Path, given: str | None, expected: str) -> None:
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


# /proc/stat's per-CPU lines as proc(5) gives them (from memory): "cpuN user nice system idle iowait irq softirq steal guest
# guest_nice", in USER_HZ ticks; guest time is already inside user, so it is not added again.
STAT = """cpu  900 10 300 5000 40 5 5 20 7 0
cpu0 400 5 100 2500 20 2 3 10 7 0
cpu1 500 5 200 2500 20 3 2 10 0 0
intr 12345
"""


def test_busy_seconds_reads_the_given_cpus_lines(tmp_path: Path) -> None:
    stat = tmp_path / "stat"
    stat.write_text(STAT)
    hz = os.sysconf("SC_CLK_TCK")
    assert cpu.busy_seconds([0], stat) == pytest.approx((400 + 5 + 100 + 2 + 3 + 10) / hz)  # idle, iowait out
    assert cpu.busy_seconds([1], stat) == pytest.approx((500 + 5 + 200 + 3 + 2 + 10) / hz)
    assert cpu.busy_seconds([0, 1], stat) == pytest.approx((520 + 720) / hz)
    assert cpu.busy_seconds([0], tmp_path / "absent") is None
    # Kernels before 2.6.11 wrote no steal field, before 2.6.0 no irq/softirq (proc(5), from memory): zero, no crash.
    stat.write_text("cpu  10 0 10 100\ncpu0 400 5 100 1000 50 2 3\ncpu1 500 5 200 900\n")
    assert cpu.busy_seconds([0], stat) == pytest.approx((400 + 5 + 100 + 2 + 3) / hz)
    assert cpu.busy_seconds([1], stat) == pytest.approx((500 + 5 + 200) / hz)
    stat.write_text("cpu0 400 5 n/a 1000\n")  # not proc(5)'s layout: no reading, so the thread count stays
    assert cpu.busy_seconds([0], stat) is None


class FakeMachine:
    """Busy seconds of our CPUs, our own CPU seconds and a clock, advanced by hand."""

    def __init__(self) -> None:
        self.busy, self.own, self.now = 0.0, 0.0, 0.0
        self.applied: list[int] = []

    def advance(self, wall: float, ours: float, others: float) -> None:
        """wall seconds pass; this process used `ours` CPU seconds and other processes `others` on our CPUs."""
        self.now += wall
        self.own += ours
        self.busy += ours + others

    def governor(self, most: int) -> cpu.ThreadGovernor:
        return cpu.ThreadGovernor(most, [0, 1], self.applied.append, busy=lambda: self.busy,
                                  clock=lambda: self.now, own=lambda: self.own)


def test_governor_gives_up_the_cpus_other_work_holds_and_takes_them_back() -> None:
    m = FakeMachine()
    governor = m.governor(2)
    m.advance(1.0, ours=2.0, others=0.0)  # alone: both CPUs are ours
    assert governor() == 2 and m.applied == []
    m.advance(1.0, ours=1.0, others=1.0)  # another job held one CPU for the whole step
    assert governor() == 1 and m.applied == [1]
    m.advance(1.0, ours=0.7, others=1.3)
    assert governor() == 1 and m.applied == [1]  # no call when nothing changes
    m.advance(1.0, ours=1.0, others=0.1)  # the other job ended
    assert governor() == 2 and m.applied == [1, 2]
    m.advance(1.0, ours=2.0, others=0.4)  # light background work (under half a CPU) keeps every thread
    assert governor() == 2
    m.advance(1.0, ours=1.5, others=0.6)
    assert governor() == 1


def test_governor_keeps_at_least_one_thread_and_waits_for_enough_ticks() -> None:
    m = FakeMachine()
    governor = m.governor(4)
    m.advance(0.05, ours=0.05, others=0.2)  # 50 ms: too few 10 ms ticks to act on
    assert governor() == 4 and m.applied == []
    m.advance(0.05, ours=0.05, others=0.2)  # with the first 50 ms, 0.1 s: 4 CPUs' worth of other work
    assert governor() == 1 and m.applied == [1]
    m.advance(2.0, ours=2.0, others=3.0)  # 1.5 CPUs busy with other work of 4: round(1.5) = 2 left to us
    assert governor() == 2


def test_only_a_thread_count_alignrun_chose_is_adjusted(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    none = tmp_path / "no-cgroup"
    assert cpu.choose_threads(0, {}, none).adaptive
    assert not cpu.choose_threads(2, {}, none).adaptive
    assert not cpu.choose_threads(0, {"OMP_NUM_THREADS": "2"}, none).adaptive


def test_a_run_asks_before_every_step_and_records_the_threads(tiny_models, tmp_path: Path,
                                                              monkeypatch: pytest.MonkeyPatch) -> None:
    """With the thread count left to alignrun, every training step and evaluation batch asks the governor first,
    and metrics.jsonl records the count each step ran with. /proc/stat is faked so that other programs keep
    every CPU busy between one call and the next, then leave them idle until the next, and so on: the steps
    alternate between one thread and two. With base.threads set, nothing moves."""
    import json

    import torch

    from alignrun.config import load_config
    from alignrun.trainer import run_experiment
    from tests.tiny_run import read_jsonl, write_tiny_experiment

    calls = {"n": 0, "busy": 0.0}

    def busy_every_other_interval(cpus: list[int], stat: Path = Path("/proc/stat")) -> float:
        calls["n"] += 1
        calls["busy"] += 1e6 if calls["n"] % 2 == 0 else 0.0  # far more than this process could use itself
        return calls["busy"]

    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: {0, 1}, raising=False)
    monkeypatch.setattr(cpu, "busy_seconds", busy_every_other_interval)
    monkeypatch.setattr(cpu, "cgroup_cpu_quota", lambda root=None: None)
    monkeypatch.setattr(cpu.ThreadGovernor, "MIN_INTERVAL_S", 0.0)  # steps of the tiny model are short
    monkeypatch.setattr(cpu.ThreadGovernor, "MIN_OWN_SHARE", 0.0)  # and 10 ms CPU ticks too coarse for them
    monkeypatch.delenv("OMP_NUM_THREADS", raising=False)
    before = torch.get_num_threads()
    try:
        exp = write_tiny_experiment(tmp_path / "adaptive", tiny_models["t5"], steps=4)
        run_experiment(load_config(exp.config, ["base.threads=0"]), tmp_path / "run", quiet=True)
        threads = [r["threads"] for r in read_jsonl(tmp_path / "run" / "metrics.jsonl")]
        assert sorted(set(threads)) == [1, 2] and all(a != b for a, b in zip(threads, threads[1:])), threads
        env = json.loads((tmp_path / "run" / "environment.json").read_text())
        assert env["threads"] == 2 and "fewer while other programs" in env["threads_reason"]
        run_experiment(load_config(exp.config, ["base.threads=2"]), tmp_path / "fixed", quiet=True)
        assert [r["threads"] for r in read_jsonl(tmp_path / "fixed" / "metrics.jsonl")] == [2, 2, 2, 2]
    finally:
        cpu.govern(None)
        torch.set_num_threads(before)


def test_governor_ignores_an_interval_in_which_this_process_hardly_ran() -> None:
    """While this process waits (a pause between blocks of work), other programs' use of the CPUs says nothing
    about the competition its next step meets; the count stays and the next interval starts afresh."""
    m = FakeMachine()
    governor = m.governor(2)
    m.advance(10.0, ours=0.5, others=20.0)  # we used 5% of a CPU while others ran flat out
    assert governor() == 2 and m.applied == []
    m.advance(1.0, ours=1.0, others=1.0)  # now working against another job
    assert governor() == 1 and m.applied == [1]


def test_the_thread_count_is_revisited_within_a_step(tiny_models, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    """A step can be long: besides once per step, rebalance runs before every PPO minibatch and between generated
    tokens (in training and in evaluation), so a step that meets new load changes course within it."""
    import sys
    from collections import Counter

    from alignrun.config import load_config
    from alignrun.trainer import run_experiment
    from tests.tiny_run import write_tiny_experiment

    callers: Counter[str] = Counter()
    monkeypatch.setattr(cpu, "rebalance", lambda: callers.update([sys._getframe(1).f_code.co_name]))
    exp = write_tiny_experiment(tmp_path / "calls", tiny_models["t5"], steps=3)
    run_experiment(load_config(exp.config), tmp_path / "run", quiet=True)
    assert callers["_run_locked"] == 3  # once before each step
    assert callers["ppo_update"] == 3 * 2  # 4 prompts per step in minibatches of 2, one epoch
    # generated tokens: up to 8 per sampling pass, at least one; 3 training rollouts and 4 evaluation passes
    assert 3 + 4 <= callers["__call__"] <= 8 * (3 + 4)
    assert callers["_generate"] == 4  # evaluation before and after, greedy and sampled: one batch each
