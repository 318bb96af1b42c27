"""One run at a time per results store: a lock file beside it.

The lock ``<results>.lock`` holds JSON naming its holder (host, PID, start
time, process start time). A second run finds it and stops (exit 3). A lock
whose holder is gone (same host, PID no longer alive or reused by another
process) is stale and taken over with a warning.
"""

from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path

import psutil


class LockHeld(Exception):
    """Another live run holds the lock; the message names it."""


def lock_path(results: str | os.PathLike) -> Path:
    """Path of the lock file of a results store."""
    p = Path(results)
    return p.with_name(p.name + ".lock")


def _me() -> dict:
    proc = psutil.Process()
    return {"host": socket.gethostname(), "pid": os.getpid(), "started": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
            "create_time": proc.create_time()}


def _alive(holder: dict) -> bool:
    if holder.get("host") != socket.gethostname():
        return True  # cannot tell for another host: assume alive
    pid = holder.get("pid")
    if not isinstance(pid, int) or not psutil.pid_exists(pid):
        return False
    try:
        ct = psutil.Process(pid).create_time()
    except psutil.Error:
        return False
    want = holder.get("create_time")
    return want is None or abs(ct - float(want)) < 1.0


def describe(holder: dict) -> str:
    """One-line description of a lock holder."""
    return f"host {holder.get('host', '?')}, PID {holder.get('pid', '?')}, started {holder.get('started', '?')}"


class RunLock:
    """Context manager holding the lock of a results store.

    Attributes
    ----------
    took_over : dict or None
        The stale holder that was replaced, if any.
    """

    def __init__(self, results: str | os.PathLike):
        self.path = lock_path(results)
        self.took_over: dict | None = None
        self._held = False

    def acquire(self) -> "RunLock":
        self.path.parent.mkdir(parents=True, exist_ok=True)
        for _ in range(3):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                holder = self._check_holder()
                if not holder:
                    # empty or unreadable: a holder may be writing it this instant
                    time.sleep(0.2)
                    holder = self._check_holder()
                stale = self.path.with_name(self.path.name + f".stale-{os.getpid()}")
                try:
                    os.replace(self.path, stale)
                    stale.unlink(missing_ok=True)
                except FileNotFoundError:
                    pass
                self.took_over = holder or {"host": "?", "pid": "?", "started": "?"}
                continue
            with os.fdopen(fd, "w") as fh:
                json.dump(_me(), fh)
                fh.flush()
                os.fsync(fh.fileno())
            self._held = True
            return self
        raise LockHeld(f"{self.path}: could not take the lock")

    def _check_holder(self) -> dict:
        """Read the lock's holder; raise LockHeld if it is alive, else return it ({} if unreadable)."""
        try:
            holder = json.loads(self.path.read_text() or "{}")
        except (OSError, ValueError):
            holder = {}
        if holder and _alive(holder):
            raise LockHeld(f"{self.path}: another run holds the lock ({describe(holder)})") from None
        return holder

    def release(self) -> None:
        if self._held:
            try:
                holder = json.loads(self.path.read_text())
                if holder.get("pid") == os.getpid():
                    self.path.unlink()
            except (OSError, ValueError):
                pass
            self._held = False

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False
