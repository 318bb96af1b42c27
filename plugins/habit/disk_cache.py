"""Model tables kept on disk between processes, so a fresh worker does not rebuild them.

The habit engine's model library (Wulff bodies over the alpha grid, their
projections and radial signatures) and the plate and rod families take
seconds of CPU to build and are a pure function of their arguments and of the
code that builds them. Every worker of every run built them again; with this
cache the first process on a machine builds them and writes one file, and
every later process reads it in a few tens of milliseconds.

A file's name holds the function, its arguments and a digest of the source
files of the habit plugins and the numpy version, so a changed model or
library never reads a stale table. Files are written to a temporary name and
renamed into place (``os.replace``, atomic on one file system): two workers
building at once both write a whole file and one wins. A file that cannot be
read (truncated, foreign) is ignored and rebuilt. Of the files of one table
built by different code, the :data:`KEEP_VERSIONS` newest are kept (two
checkouts of different code on one machine do not remove each other's).

Where: ``$GRAINHABIT_CACHE`` if set, else ``$XDG_CACHE_HOME/grainhabit``,
else ``~/.cache/grainhabit``. ``GRAINHABIT_CACHE=off`` turns the cache off
(every process builds its own tables, as before). The files are Python
pickles: they are read only from that folder, which belongs to the user
running grainhabit; do not point it at a folder others can write.
"""

from __future__ import annotations

import functools
import hashlib
import os
import pickle
import tempfile
from pathlib import Path

import numpy as np

#: Files of one table (one function and arguments) kept, each from other code (the newest written first).
KEEP_VERSIONS = 4
#: Source files whose change makes every cached table stale.
SOURCES = ("crystal.py", "signature.py", "engine.py", "interior.py", "classify_habit.py", "disk_cache.py")


def cache_folder() -> Path | None:
    """The cache folder (see the module docstring), or None when the cache is off."""
    env = os.environ.get("GRAINHABIT_CACHE", "").strip()
    if env.lower() in ("off", "0", "no", "false"):
        return None
    if env:
        return Path(env).expanduser()
    base = os.environ.get("XDG_CACHE_HOME", "").strip()
    return (Path(base).expanduser() if base else Path.home() / ".cache") / "grainhabit"


@functools.lru_cache(maxsize=1)
def code_digest() -> str:
    """Digest of the habit plugins' source files and the numpy version (16 hex digits)."""
    h = hashlib.sha256(np.__version__.encode())
    here = Path(__file__).resolve().parent
    for name in SOURCES:
        p = here / name
        h.update(name.encode())
        h.update(p.read_bytes() if p.is_file() else b"-")
    return h.hexdigest()[:16]


def file_for(name: str, args: tuple) -> Path | None:
    """The cache file of ``name(*args)``, or None when the cache is off."""
    folder = cache_folder()
    if folder is None:
        return None
    key = hashlib.sha256(repr((name, args)).encode()).hexdigest()[:16]
    return folder / f"{name}-{key}-{code_digest()}.pickle"


def on_disk(func):
    """Decorator: keep the result of ``func(*args)`` (positional, hashable arguments) in the cache folder.

    Parameters
    ----------
    func : callable
        A pure function of its positional arguments.

    Returns
    -------
    callable
        Reads the cached result when there is one; else calls ``func``,
        writes the result (atomically) and returns it. Any failure to read or
        write the cache falls back to calling ``func``: the cache never stops a
        run.
    """
    name = f"{func.__module__.rsplit('.', 1)[-1]}.{func.__qualname__}"

    @functools.wraps(func)
    def wrapper(*args):
        path = file_for(name, args)
        if path is not None and path.is_file():
            try:
                with open(path, "rb") as fh:
                    return pickle.load(fh)
            except Exception:  # noqa: BLE001 - a damaged or foreign file is rebuilt
                pass
        out = func(*args)
        if path is not None:
            write(path, out)
        return out

    wrapper.uncached = func
    return wrapper


def write(path: Path, value) -> bool:
    """Pickle ``value`` to ``path`` by way of a temporary file in the same folder; False if that failed."""
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=path.name, suffix=".part")
        with os.fdopen(fd, "wb") as fh:
            pickle.dump(value, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, path)
        # the same table built by other code: kept for the KEEP_VERSIONS - 1 most recent other versions (two
        # installs or checkouts of different code on one machine would else remove each other's tables, and
        # every worker of each would build them again, seconds of CPU), the older ones removed
        stem = path.name.rsplit("-", 1)[0]
        others = []
        for old in path.parent.glob(f"{stem}-*.pickle"):
            if old != path:
                try:
                    others.append((old.stat().st_mtime, str(old), old))
                except OSError:
                    pass
        for _, _, old in sorted(others, reverse=True)[KEEP_VERSIONS - 1:]:
            try:
                old.unlink()
            except OSError:
                pass
        return True
    except Exception:  # noqa: BLE001 - a read-only home, a full disk: the run goes on without the cache
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass
        return False
