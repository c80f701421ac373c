"""One run of a job at a time: an exclusive lock on a file in the job's output folder.

The lock is ``fcntl.flock`` on ``<output dir>/.smootharea.lock``. The operating
system releases a flock when its holder dies, even by SIGKILL, so a killed run
can never leave a lock that blocks the next night: the file it leaves behind
only *describes* the last holder (pid, host, start time) and is overwritten by
the next run that takes the lock. The file itself is never deleted, because
unlinking a flock file lets two processes lock two different inodes.
(Hand-written because no well-kept library offers a non-blocking flock with a
holder description; ``fcntl`` is the standard library.)
"""
from __future__ import annotations

import fcntl
import json
import os
import socket
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from .provenance import utc_now

LOCK_FILE = ".smootharea.lock"


class LockHeld(Exception):
    """Another live process holds the job's lock."""

    def __init__(self, path: Path, holder: dict[str, Any]):
        self.path = path
        self.holder = holder
        who = ", ".join(f"{k} {v}" for k, v in holder.items() if k in ("pid", "host", "started"))
        super().__init__(f"another run of this job holds {path} ({who or 'holder unknown'})")


@dataclass
class JobLock:
    """An acquired lock; release it with :meth:`release` or use as a context manager."""

    path: Path
    handle: Any
    previous_holder: dict[str, Any]

    @property
    def reclaimed_from_dead_run(self) -> bool:
        """True when the lock file named a holder that is no longer running."""
        holder = self.previous_holder
        return bool(holder) and not holder.get("released", False)

    def release(self) -> None:
        if self.handle is None:
            return
        try:
            write_holder(self.handle, {**read_holder_from(self.handle), "released": True})
        finally:
            fcntl.flock(self.handle.fileno(), fcntl.LOCK_UN)
            self.handle.close()
            self.handle = None

    def __enter__(self) -> "JobLock":
        return self

    def __exit__(self, *exc_info) -> None:
        self.release()


def read_holder_from(handle) -> dict[str, Any]:
    handle.seek(0)
    text = handle.read()
    try:
        holder = json.loads(text) if text.strip() else {}
    except json.JSONDecodeError:
        return {"unreadable": text[:200]}
    return holder if isinstance(holder, dict) else {}


def write_holder(handle, holder: dict[str, Any]) -> None:
    handle.seek(0)
    handle.truncate()
    handle.write(json.dumps(holder))
    handle.flush()
    os.fsync(handle.fileno())


def read_lock_holder(out_dir: str | Path) -> dict[str, Any]:
    """What the lock file says about its last holder (empty if there is none)."""
    path = Path(out_dir) / LOCK_FILE
    if not path.exists():
        return {}
    with open(path, encoding="utf-8") as handle:
        return read_holder_from(handle)


def acquire_job_lock(out_dir: str | Path, run_id: str | None = None) -> JobLock:
    """Take the job's lock without waiting; raise :class:`LockHeld` if a live run has it."""
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    path = out_dir / LOCK_FILE
    handle = open(path, "a+", encoding="utf-8")
    try:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        holder = read_holder_from(handle)
        handle.close()
        raise LockHeld(path, holder) from None
    previous = read_holder_from(handle)
    write_holder(handle, {"pid": os.getpid(), "host": socket.gethostname(),
                          "started": utc_now(), "run_id": run_id})
    return JobLock(path=path, handle=handle, previous_holder=previous)
