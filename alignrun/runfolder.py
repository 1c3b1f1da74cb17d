"""Run-folder I/O: atomic writes, the staging-folder swap, the one-writer lock, status.json, "is this a run?".

A run folder is recognised by its own files (RUN_FILES), not only by status.json, so deleting one file never
turns a finished run into an empty folder that a new run may overwrite. Files are created with mode 0666
minus the user's umask, like any file the user writes.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import time
import uuid
from collections.abc import Iterable
from pathlib import Path
from typing import Any

from alignrun.errors import UserError

# Files and folders a run writes; any one of them marks a folder as holding a run (eval_*.jsonl by pattern).
RUN_FILES = ("config.toml", "environment.json", "preflight.json", "status.json", "metrics.jsonl", "report.json",
             "report.md", "report.html", "pairs.jsonl", "pairs.csv", "adapter", "checkpoint")
RUN_PATTERNS = ("eval_*.jsonl",)


def write_text_atomic(path: Path, text: str) -> None:
    """Write via a temporary file in the same folder, then rename: readers never see half a file."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex[:8]}.tmp")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        # os.open with 0o666 applies the umask, as open() does (tempfile.mkstemp would force 0600)
        fd = os.open(tmp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError):
            raise UserError(f"{path}: could not write the file ({exc.strerror or exc}); free disk space or fix the "
                            "folder's permissions") from None
        raise


def write_json_atomic(path: Path, obj: Any) -> None:
    write_text_atomic(path, json.dumps(obj, indent=2, ensure_ascii=False, allow_nan=False, default=_jsonable) + "\n")


def write_jsonl_atomic(path: Path, rows: Iterable[dict[str, Any]]) -> None:
    write_text_atomic(path, "".join(json.dumps(r, ensure_ascii=False, default=_jsonable) + "\n" for r in rows))


def _jsonable(obj: Any) -> Any:
    if hasattr(obj, "tolist"):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def read_json(path: Path, what: str, fix: str = "restore it from a backup or re-create it") -> Any:
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{path}: {what} not found") from None
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: {what} is not valid JSON ({exc}); the file is damaged: {fix}") from None


def staging_folder(folder: Path) -> Path:
    """An empty sibling folder to build `folder` in; `replace_folder` then swaps it into place."""
    tmp = Path(folder).with_name(f".{Path(folder).name}.tmp")
    shutil.rmtree(tmp, ignore_errors=True)  # a leftover from a killed process
    return tmp


def _umask() -> int:
    try:  # Linux names it without changing it
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("Umask:"):
                return int(line.split()[1], 8)
    except OSError:
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def replace_folder(tmp: Path, folder: Path) -> None:
    """Swap a fully written folder into place by renames, so a reader sees the old or the new one, never half.
    Its files get the user's mode first (safetensors writes 0600 files)."""
    mode = 0o666 & ~_umask()
    for path in Path(tmp).rglob("*"):
        if path.is_file():
            path.chmod(mode)
    folder = Path(folder)
    old = folder.with_name(f".{folder.name}.old")
    shutil.rmtree(old, ignore_errors=True)
    if folder.exists():
        folder.rename(old)
    Path(tmp).rename(folder)
    shutil.rmtree(old, ignore_errors=True)


# ---------------------------------------------------------------- is this folder a run?

def run_files(folder: Path) -> list[str]:
    """The run files present in `folder` (folders end in '/'); empty when it holds no run."""
    folder = Path(folder)
    if not folder.is_dir():
        return []
    found = [f"{name}/" if (folder / name).is_dir() else name for name in RUN_FILES if (folder / name).exists()]
    found += sorted(p.name for pattern in RUN_PATTERNS for p in folder.glob(pattern))
    return found


def describe_run(folder: Path) -> str:
    """What the folder holds, for messages: 'a run (finished at step 5; config.toml, report.json, adapter/)'."""
    files = run_files(folder)
    try:
        status = read_status(folder)
    except UserError:
        status = {"state": "status.json unreadable"}
    state = f"{status.get('state')} at step {status.get('step', '?')}" if status else "no status.json"
    shown = ", ".join(files[:6]) + (", ..." if len(files) > 6 else "")
    return f"a run ({state}; {shown})"


def inside(path: Path, folder: Path) -> bool:
    """Whether `path` is `folder` or lies inside it (both resolved)."""
    path, folder = Path(path).resolve(), Path(folder).resolve()
    return path == folder or folder in path.parents


# ---------------------------------------------------------------- the lock and status.json

def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def lock_owner(folder: Path) -> dict[str, Any] | None:
    """The lock's owner {pid, host, since}; None when there is no lock, {} when it is damaged."""
    try:
        owner = json.loads((Path(folder) / ".lock").read_text())
    except FileNotFoundError:
        return None
    except (OSError, json.JSONDecodeError):
        return {}
    return owner if isinstance(owner, dict) else {}


def owner_alive(owner: dict[str, Any]) -> bool:
    """A pid on another host cannot be checked and counts as alive; on this host, ask the kernel."""
    if owner.get("host") != socket.gethostname():
        return True
    try:
        return _pid_alive(int(owner.get("pid", -1)))
    except (TypeError, ValueError):
        return True


def read_status(folder: Path) -> dict[str, Any] | None:
    """status.json as written, except that a 'running' run whose writer is gone reads as 'dead'
    (the lock names a pid that no longer exists on this host, or there is no lock at all)."""
    path = Path(folder) / "status.json"
    if not path.exists():
        return None
    status = read_json(path, "run status")
    if not isinstance(status, dict):
        raise UserError(f"{path}: run status is not a JSON object; the file is damaged: delete it and resume")
    if status.get("state") == "running":
        owner = lock_owner(folder)
        if owner is None or (owner and not owner_alive(owner)):
            who = f"process {owner.get('pid')} on {owner.get('host')} is gone" if owner else "no process holds its lock"
            return {**status, "state": "dead",
                    "note": f"status.json says running at step {status.get('step', '?')} but {who} (killed?); "
                            "continue it with --resume"}
    return status


class RunFolder:
    """One writer per run folder: a lock file naming the owner, and a status file anyone can read."""

    def __init__(self, path: Path):
        self.path = Path(path)
        self.lock_path = self.path / ".lock"
        self.locked = False

    def acquire(self) -> None:
        try:
            self.path.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise UserError(f"{self.path}: cannot create the run folder ({exc.strerror}); choose another --out") from None
        if not os.access(self.path, os.W_OK):
            raise UserError(f"{self.path}: run folder is not writable; choose another --out")
        me = {"pid": os.getpid(), "host": socket.gethostname(), "since": time.strftime("%Y-%m-%dT%H:%M:%S")}
        for _ in range(2):
            try:
                fd = os.open(self.lock_path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666)
            except FileExistsError:
                owner = lock_owner(self.path)
                if not owner:
                    raise UserError(
                        f"{self.lock_path}: the lock file is empty or damaged (left by a run that crashed while "
                        f"taking it?); if no alignrun process is using {self.path}, delete it and run again"
                    ) from None
                if not owner_alive(owner):
                    self.lock_path.unlink(missing_ok=True)  # stale: its process is gone
                    continue
                raise busy_error(self.path, owner) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.locked = True
            return
        raise UserError(f"{self.lock_path}: could not take the run-folder lock")

    def release(self) -> None:
        if self.locked:
            self.lock_path.unlink(missing_ok=True)
            self.locked = False

    def set_status(self, state: str, **extra: Any) -> None:
        write_json_atomic(self.path / "status.json",
                          {"state": state, "updated": time.strftime("%Y-%m-%dT%H:%M:%S"), **extra})

    def __enter__(self) -> RunFolder:
        self.acquire()
        return self

    def __exit__(self, *exc: object) -> None:
        self.release()


def busy_error(folder: Path, owner: dict[str, Any]) -> UserError:
    return UserError(f"{folder}: another alignrun process is writing this run folder (pid {owner.get('pid', '?')} "
                     f"on {owner.get('host', '?')}, since {owner.get('since', '?')}); wait for it to end, or use "
                     "another --out")


def check_run_folder(out: Path, resume: bool, overwrite: bool) -> None:
    """Refuse what would lose results: a folder another process is writing, a new run into a folder that holds
    a run (unless overwrite), a resume of a folder that holds none."""
    owner = lock_owner(out)
    if owner and owner_alive(owner):  # checked first: a live run is never offered --resume or --overwrite
        raise busy_error(out, owner)
    held = run_files(out)
    if resume and not held:
        raise UserError(f"--resume {out}: the folder holds no run; start a new run with --out {out}")
    if not resume and held and not overwrite:
        finished = (out / "report.json").exists()
        raise UserError(f"{out}: already holds {describe_run(out)}; "
                        + ("" if finished else f"continue it with --resume {out}, ")
                        + "keep it and choose another --out, or replace it with --overwrite")


def remove_run_files(out: Path) -> None:
    """--overwrite: the previous run's own files go (with their staging leftovers); other files stay."""
    for name in run_files(out):
        path = out / name.rstrip("/")
        shutil.rmtree(path) if path.is_dir() else path.unlink()
    for name in ("adapter", "checkpoint"):
        for leftover in (out / f".{name}.tmp", out / f".{name}.old"):
            shutil.rmtree(leftover, ignore_errors=True)
