"""The CPU share of this process: how many threads to use, how many while other programs are busy, and worker
CPU shares. Imports no torch (the thread count is applied through a callback).

OpenMP's waiting policy is left as it is: with libgomp's default, threads spin briefly before they sleep, the
fastest on an idle machine; spinning only hurts when another program holds a CPU a sibling thread waits for,
and then ThreadGovernor has already lowered the thread count (scripts/bench_contention.py measures both).
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import time
from collections.abc import Callable, Iterator, MutableMapping
from dataclasses import dataclass
from pathlib import Path

CGROUP_ROOT = Path("/sys/fs/cgroup")


def affinity_cpus() -> list[int]:
    """The CPUs this process may run on (its affinity mask; every CPU where the OS has no masks)."""
    if hasattr(os, "sched_getaffinity"):
        return sorted(os.sched_getaffinity(0))
    return list(range(os.cpu_count() or 1))


def _quota(max_text: str | None, period_text: str | None) -> float | None:
    """CPUs allowed by a CFS bandwidth limit: quota / period; None when unlimited ("max" or -1)."""
    if max_text is None or period_text is None or max_text in ("max", "-1"):
        return None
    quota, period = int(max_text), int(period_text)
    return quota / period if quota > 0 and period > 0 else None


def _read(path: Path) -> str | None:
    try:
        return path.read_text().strip()
    except OSError:
        return None


def cgroup_cpu_quota(root: Path = CGROUP_ROOT, proc_cgroup: Path = Path("/proc/self/cgroup")) -> float | None:
    """The smallest CPU bandwidth limit on this process's cgroup and its ancestors, in CPUs; None if none.

    cgroup v2: `cpu.max` holds "$MAX $PERIOD", "max 100000" meaning no limit (Linux kernel docs,
    Documentation/admin-guide/cgroup-v2.rst, "cpu.max"). cgroup v1: `cpu.cfs_quota_us` (-1 = no limit) over
    `cpu.cfs_period_us` (Documentation/scheduler/sched-bwc.rst). Both the process's own cgroup path and the
    mount's root are read (inside a container the mount root is the container's cgroup)."""
    paths = {"v2": "/", "v1": "/"}
    for line in (_read(proc_cgroup) or "").splitlines():
        hierarchy, _, rest = line.partition(":")
        controllers, _, path = rest.partition(":")
        if hierarchy == "0" and controllers == "":
            paths["v2"] = path or "/"
        elif "cpu" in controllers.split(","):
            paths["v1"] = path or "/"
    limits: list[float] = []
    for base, relative, files in ((root, paths["v2"], None),
                                  (root / "cpu", paths["v1"], ("cpu.cfs_quota_us", "cpu.cfs_period_us")),
                                  (root / "cpu,cpuacct", paths["v1"], ("cpu.cfs_quota_us", "cpu.cfs_period_us"))):
        folder = base / relative.lstrip("/")
        for level in (folder, *folder.parents):  # the process's cgroup, then each ancestor up to the mount
            if files is None:
                fields = (_read(level / "cpu.max") or "").split()
                limit = _quota(*fields) if len(fields) == 2 else None
            else:
                limit = _quota(_read(level / files[0]), _read(level / files[1]))
            if limit is not None:
                limits.append(limit)
            if level == base:
                break
    return min(limits) if limits else None


@dataclass(frozen=True)
class ThreadChoice:
    threads: int
    reason: str
    adaptive: bool = False  # alignrun chose the count, so ThreadGovernor may lower it while other work runs


def choose_threads(requested: int = 0, environ: MutableMapping[str, str] = os.environ,
                   cgroup_root: Path = CGROUP_ROOT) -> ThreadChoice:
    """Threads for torch: base.threads when set, else OMP_NUM_THREADS when the user set it, else the CPUs this
    process may use (affinity mask, capped by a cgroup quota rounded down), divided among the processes a
    launcher (torchrun) started on this machine."""
    if requested > 0:
        return ThreadChoice(requested, f"base.threads = {requested}")
    user = environ.get("OMP_NUM_THREADS", "").split(",")[0].strip()
    if user.isdigit() and int(user) > 0:
        return ThreadChoice(int(user), f"OMP_NUM_THREADS={user} (set by the user)")
    cpus = len(affinity_cpus())
    threads, reason = cpus, f"{cpus} CPU(s) in this process's affinity mask"
    quota = cgroup_cpu_quota(cgroup_root)
    if quota is not None:
        reason += f", cgroup CPU quota {quota:g}"
        threads = max(1, min(threads, math.floor(quota)))
    local = environ.get("LOCAL_WORLD_SIZE", "")
    if local.isdigit() and int(local) > 1:
        reason += f", shared by {local} processes on this machine"
        threads = max(1, threads // int(local))
    return ThreadChoice(threads, reason + "; fewer while other programs keep some of them busy", adaptive=True)


def worker_shares(cpus: list[int], workers: int) -> list[list[int]]:
    """Split `cpus` into `workers` disjoint, contiguous shares of near-equal size (the first ones one larger);
    with more workers than CPUs, each worker gets one CPU and CPUs are reused in turn."""
    if workers >= len(cpus):
        return [[cpus[i % len(cpus)]] for i in range(workers)]
    size, extra = divmod(len(cpus), workers)
    shares, start = [], 0
    for i in range(workers):
        end = start + size + (i < extra)
        shares.append(cpus[start:end])
        start = end
    return shares


def pin(cpus: list[int], running_threads: bool = False) -> None:
    """Restrict this process to `cpus` where the OS supports masks: threads started from now on, and with
    `running_threads` also those already running (a reused worker process whose OpenMP threads exist)."""
    if not hasattr(os, "sched_setaffinity"):
        return
    tasks = Path("/proc/self/task")
    for tid in ([int(t) for t in os.listdir(tasks)] if running_threads and tasks.is_dir() else []):
        with contextlib.suppress(OSError):  # a thread that ended meanwhile
            os.sched_setaffinity(tid, cpus)
    os.sched_setaffinity(0, cpus)


@contextlib.contextmanager
def claimed_share(shares: list[list[int]], key: str) -> Iterator[list[int] | None]:
    """The first share no other process on this machine holds for `key` (a lock file per share in the temporary
    folder, released when the block ends or the process dies); None when every share is taken."""
    import fcntl  # POSIX only; the command line imports this module everywhere

    folder = Path(tempfile.gettempdir())
    for i, cpus in enumerate(shares):
        handle = open(folder / f"alignrun-{key}-share-{i}.lock", "w")  # held until the block ends
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            handle.close()
            continue
        try:
            yield cpus
        finally:
            handle.close()
        return
    yield None


def busy_seconds(cpus: list[int], stat: Path = Path("/proc/stat")) -> float | None:
    """CPU seconds the given CPUs spent busy since boot, by every process: user, nice, system, irq, softirq and
    steal from /proc/stat's per-CPU lines, in USER_HZ ticks (proc(5)); None where there is no /proc/stat or a line
    is not in that layout. Fields an older kernel does not write count as zero."""
    text = _read(stat)
    if text is None:
        return None
    wanted, ticks = {f"cpu{c}" for c in cpus}, 0
    for line in text.splitlines():
        fields = line.split()
        if fields and fields[0] in wanted:
            try:
                values = [int(f) for f in fields[1:9]]
            except ValueError:
                return None
            user, nice, system, _idle, _iowait, irq, softirq, steal = values + [0] * (8 - len(values))
            ticks += user + nice + system + irq + softirq + steal
    return ticks / os.sysconf("SC_CLK_TCK")


class ThreadGovernor:
    """At step, minibatch and token boundaries (`rebalance`), torch's thread count = the CPUs this process may use
    minus the CPUs other processes kept busy since the last call (rounded, at least one), so OpenMP threads never
    spin waiting for a sibling that another program holds off its CPU; alone, the process gets every CPU back.

    Other processes' use = busy seconds of this process's CPUs (`busy_seconds`) minus this process's own CPU
    seconds, over the wall time between calls."""

    MIN_INTERVAL_S = 0.1  # shorter intervals hold a handful of 10 ms ticks: too coarse to act on
    MIN_OWN_SHARE = 0.25  # of one CPU: below it the interval was mostly this process waiting, not working

    def __init__(self, most: int, cpus: list[int], apply: Callable[[int], None],
                 busy: Callable[[], float | None] | None = None, clock: Callable[[], float] = time.monotonic,
                 own: Callable[[], float] = lambda: sum(os.times()[:2])) -> None:
        self.most, self.threads, self.apply = most, most, apply
        self.busy = busy or (lambda: busy_seconds(cpus))
        self.clock, self.own = clock, own
        self.last = (clock(), self.busy(), own())

    def others(self) -> float | None:
        """CPUs other processes used since the last call, while this process worked; None until enough time
        has passed, and for an interval in which this process hardly ran (its own pause says nothing about
        the competition its work meets)."""
        now = self.clock()
        wall = now - self.last[0]
        if wall < self.MIN_INTERVAL_S:  # cheap: called inside loops, it reads /proc/stat only now and then
            return None
        busy_now, own_now = self.busy(), self.own()
        if busy_now is None or self.last[1] is None:
            return None
        busy, own = busy_now - self.last[1], own_now - self.last[2]
        self.last = (now, busy_now, own_now)
        if own < self.MIN_OWN_SHARE * wall:  # this process hardly ran (paused, waiting on input): no evidence
            return None
        return max(0.0, busy - own) / wall

    def __call__(self) -> int:
        """Set and return the thread count for the next stretch of work."""
        others = self.others()
        if others is not None:
            threads = max(1, self.most - math.floor(others + 0.5))  # others >= 0: never above self.most
            if threads != self.threads:
                self.apply(threads)
                self.threads = threads
        return self.threads


_governor: ThreadGovernor | None = None


def govern(governor: ThreadGovernor | None) -> None:
    """Make `governor` the one `rebalance` consults (None: the thread count stays as set)."""
    global _governor
    _governor = governor


def rebalance() -> None:
    """At a step or batch boundary: let the governor, if there is one, set the thread count for what follows."""
    if _governor is not None:
        _governor()
