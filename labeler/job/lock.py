"""One run at a time per work folder: an advisory lock the kernel drops when its process dies.

The lock file also says who holds it (pid, host, start time), for the message a second run
prints. A holder that died (even by SIGKILL) leaves its record behind but not the lock itself;
the next run takes it over and says so. The lock is local to a machine: put the work folder on a
local disk, not a network share whose locks are unreliable.
"""
from __future__ import annotations

import datetime as dt
import fcntl
import json
import logging
import os
import socket
from pathlib import Path

from ..errors import ArtifactError, LockedError

log = logging.getLogger(__name__)


class RunLock:
    """``with RunLock(work_dir) as lock:`` holds the work folder; ``lock.took_over`` names a dead holder."""

    def __init__(self, work_dir: Path):
        self.path = Path(work_dir) / "run.lock"
        self.fd: int | None = None
        self.took_over: dict | None = None

    def __enter__(self) -> "RunLock":
        self.path.parent.mkdir(parents=True, exist_ok=True)
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as exc:
            raise ArtifactError(f"{self.path}: the lock file cannot be opened ({exc.strerror}"
                                f"{': it is a folder' if self.path.is_dir() else ''}). Nothing was done. Remove "
                                "it (no run is using a lock that cannot be opened) and run again.") from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read(fd)
            os.close(fd)
            who = (f"pid {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"
                   if holder else "a process that has not written its record yet")
            raise LockedError(f"{self.path}: another run holds the lock ({who}). Wait for it to finish; "
                              "a lock left by a process that died is taken over automatically.") from None
        previous = _read(fd)
        if previous:
            self.took_over = previous
            log.warning("took over a stale lock left by pid %s on %s (started %s), which is no longer running",
                        previous.get("pid"), previous.get("host"), previous.get("started"))
        record = {"pid": os.getpid(), "host": socket.gethostname(),
                  "started": dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds")}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(record).encode(), 0)
        os.fsync(fd)
        self.fd = fd
        return self

    def __exit__(self, *exc) -> None:
        if self.fd is not None:
            os.ftruncate(self.fd, 0)  # a clean exit leaves no record: an empty file is not stale
            fcntl.flock(self.fd, fcntl.LOCK_UN)
            os.close(self.fd)
            self.fd = None


def _read(fd: int) -> dict:
    """The holder's record; an unreadable record (damaged, random bytes) is an unknown holder."""
    unknown = {"pid": "?", "host": "?", "started": "?"}
    try:
        raw = os.pread(fd, 4096, 0)
        record = json.loads(raw) if raw.strip() else {}
    except (OSError, ValueError):  # ValueError: not JSON, or not UTF-8
        return unknown
    return record if isinstance(record, dict) else unknown
