"""Per-frame results staged on disk, so a run can resume.

Each finished frame is written to ``<results>.staging/<key>.npz`` under a
temporary name, flushed to disk, then renamed: a frame is either fully
staged or not at all, whatever kills the run. The key combines the frame's
content hash, its sample name and the workflow's processing key (steps,
parameters, plugin versions), so a changed file or a changed chain is
processed again while everything else is reused.
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import numpy as np


def staging_dir(results: str | os.PathLike) -> Path:
    """Folder of staged frames beside a results store."""
    p = Path(results)
    return p.with_name(p.name + ".staging")


def frame_key(content_hash: str, source: str, sample: str, processing_key: str) -> str:
    """Key of a frame's staged result.

    Without a content hash (a reader that cannot tell) the source path
    stands in, so such frames are reprocessed only when their path changes.
    """
    ident = content_hash or ("path:" + source)
    return hashlib.sha256(f"{ident}|{sample}|{processing_key}".encode()).hexdigest()[:24]


def write_staged(folder: Path, key: str, result: dict) -> Path:
    """Write one frame's result atomically; return its path."""
    folder.mkdir(parents=True, exist_ok=True)
    final = folder / f"{key}.npz"
    tmp = folder / f".{key}.{os.getpid()}.tmp"
    arrays = {}
    for name, values in result["columns"].items():
        arr = np.asarray(values)
        if arr.dtype.kind in ("O", "T"):
            arr = arr.astype(str)
        arrays["col__" + name] = arr
    record = dict(result["record"])
    arrays["record"] = np.array(json.dumps(record, default=str))
    arrays["outline_xy"] = np.asarray(result["outline_xy"], dtype=np.float64)
    arrays["outline_offsets"] = np.asarray(result["outline_offsets"], dtype=np.int64)
    arrays["thumb"] = np.asarray(result["thumb"], dtype=np.uint8)
    arrays["thumb_factor"] = np.array(float(result.get("thumb_factor", 1.0)))
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, final)
    return final


def read_staged(path: Path) -> dict:
    """Read a staged frame result written by :func:`write_staged`."""
    with np.load(path, allow_pickle=False) as data:
        columns = {k[5:]: data[k] for k in data.files if k.startswith("col__")}
        return {
            "record": json.loads(str(data["record"])),
            "columns": columns,
            "outline_xy": data["outline_xy"],
            "outline_offsets": data["outline_offsets"],
            "thumb": data["thumb"],
            "thumb_factor": float(data["thumb_factor"]),
        }


def is_staged(folder: Path, key: str) -> bool:
    """True if the frame's result is fully staged."""
    return (folder / f"{key}.npz").exists()


def clean_temporaries(folder: Path) -> int:
    """Remove half-written files left by a killed run; return how many."""
    n = 0
    if folder.exists():
        for p in folder.glob(".*.tmp"):
            p.unlink(missing_ok=True)
            n += 1
    return n
