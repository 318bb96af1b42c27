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


def write_staged(folder: Path, key: str, result: dict, arrays: dict | None = None) -> Path:
    """Write one frame's result atomically; return its path.

    ``arrays``, if given, is :func:`staged_arrays` of ``result`` (computed
    once by a caller that also keeps :func:`staged_view` of it).
    """
    folder.mkdir(parents=True, exist_ok=True)
    final = folder / f"{key}.npz"
    tmp = folder / f".{key}.{os.getpid()}.tmp"
    if arrays is None:
        arrays = staged_arrays(result)
    with open(tmp, "wb") as fh:
        np.savez(fh, **arrays)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, final)
    return final


def staged_arrays(result: dict) -> dict[str, np.ndarray]:
    """The arrays a frame's result is staged as (the members of its ``.npz`` file, in order)."""
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
    return arrays


def read_staged(path: Path) -> dict:
    """Read a staged frame result written by :func:`write_staged`."""
    with np.load(path, allow_pickle=False) as data:
        return staged_view({k: data[k] for k in data.files})


def staged_view(arrays: dict[str, np.ndarray]) -> dict:
    """The result :func:`read_staged` gives for a file of these :func:`staged_arrays`, without the file.

    ``np.savez`` and ``np.load`` give back every array with its dtype,
    shape and values, so a run keeps this view of each frame it stages and
    consolidates from it instead of reading the file again.
    """
    return {
        "record": json.loads(str(arrays["record"])),
        "columns": {k[5:]: arrays[k] for k in arrays if k.startswith("col__")},
        "outline_xy": arrays["outline_xy"],
        "outline_offsets": arrays["outline_offsets"],
        "thumb": arrays["thumb"],
        "thumb_factor": float(arrays["thumb_factor"]),
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
