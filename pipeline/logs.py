"""Logging for unattended runs: progress on a terminal, plain lines for cron.

- On a terminal: a one-line progress bar (frames done, grains, rate, ETA)
  redrawn on stderr, plus warnings and errors.
- Not on a terminal (cron, systemd): timestamped plain lines.
- ``--log-json``: one JSON object per line for log collectors.
- Always, when the workflow has an output: the same lines, with full
  tracebacks, appended to the run's log file.
"""

from __future__ import annotations

import json
import logging
import sys
import time

LOGGER = "grainhabit"


class JsonFormatter(logging.Formatter):
    """One JSON object per record: time, level, message and extra fields."""

    def format(self, record: logging.LogRecord) -> str:
        out = {"time": time.strftime("%Y-%m-%dT%H:%M:%S", time.localtime(record.created)),
               "level": record.levelname.lower(), "message": record.getMessage()}
        out.update(getattr(record, "fields", {}) or {})
        return json.dumps(out, default=str)


def setup(json_lines: bool = False, log_file: str | None = None, debug: bool = False) -> logging.Logger:
    """Configure the ``grainhabit`` logger (idempotent per process)."""
    log = logging.getLogger(LOGGER)
    for h in list(log.handlers):
        log.removeHandler(h)
        h.close()
    log.setLevel(logging.DEBUG)
    log.propagate = False
    console = logging.StreamHandler(sys.stderr)
    console.setLevel(logging.DEBUG if debug else logging.INFO)
    if json_lines:
        console.setFormatter(JsonFormatter())
    else:
        console.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%d %H:%M:%S"))
    log.addHandler(console)
    if log_file:
        fh = logging.FileHandler(log_file, encoding="utf-8")
        fh.setLevel(logging.DEBUG)
        fh.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%d %H:%M:%S"))
        log.addHandler(fh)
    return log


class Progress:
    """Frames done, grains found, rate and ETA.

    On a terminal it redraws one line; otherwise it logs a plain line at
    most every ``every`` seconds (and at the end).
    """

    def __init__(self, total: int, log: logging.Logger, tty: bool | None = None, every: float = 30.0):
        self.total, self.log, self.every = total, log, every
        self.tty = sys.stderr.isatty() if tty is None else tty
        self.done = self.failed = self.grains = 0
        self.t0 = time.monotonic()
        self._last = 0.0

    def update(self, ok: bool, grains: int) -> None:
        self.done += 1
        self.failed += 0 if ok else 1
        self.grains += grains
        now = time.monotonic()
        if self.tty:
            sys.stderr.write("\r" + self.line() + "\x1b[K")
            sys.stderr.flush()
        elif now - self._last >= self.every or self.done == self.total:
            self._last = now
            self.log.info(self.line(), extra={"fields": self.fields()})

    def fields(self) -> dict:
        el = time.monotonic() - self.t0
        rate = self.done / el if el > 0 else 0.0
        eta = (self.total - self.done) / rate if rate > 0 else float("nan")
        return {"frames_done": self.done, "frames_total": self.total, "frames_failed": self.failed,
                "grains": self.grains, "frames_per_min": rate * 60, "eta_s": eta}

    def line(self) -> str:
        f = self.fields()
        width = 24
        filled = int(width * self.done / self.total) if self.total else width
        eta = f["eta_s"]
        eta_txt = "--" if eta != eta else (f"{eta:.0f}s" if eta < 120 else f"{eta / 60:.0f}min")
        return (f"[{'#' * filled}{'.' * (width - filled)}] {self.done}/{self.total} frames, "
                f"{self.failed} failed, {self.grains} grains, {f['frames_per_min']:.1f} frames/min, ETA {eta_txt}")

    def close(self) -> None:
        if self.tty and self.total:
            sys.stderr.write("\n")
            sys.stderr.flush()


def to_file_only(log: logging.Logger, level: int, message: str) -> None:
    """Log ``message`` to the run's log file (and a JSON console), not as a second line on a terminal.

    Used for an interruption: the command line prints its own one line, the
    log file records what happened.
    """
    record = log.makeRecord(log.name, level, __file__, 0, message, (), None)
    for handler in log.handlers:
        if isinstance(handler, logging.FileHandler) and record.levelno >= handler.level:
            handler.handle(record)
