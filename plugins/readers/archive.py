"""Frame archives: ``grainhabit ingest`` and the reader for archived frames.

An archive is a zarr (format 3) group made by ``grainhabit ingest``:

- ``frames/f000000``, ``frames/f000001``, ...: one 2-D array per frame,
  float32 or the file's integer type, chunked in tiles of
  ``chunk`` x ``chunk`` pixels (default 1024) and compressed with zstd;
  each array's attributes hold ``source``, ``pixel_size_nm``,
  ``calibration``, ``content_hash``, ``notes`` and acquisition metadata;
- root attribute ``grainhabit_archive`` (format version) and ``index``:
  source -> array name and content hash. Running ``ingest`` again adds only
  new or changed frames (by content hash); a changed frame gets a new array
  and the old one is removed only after the index points to the new one.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path

import numpy as np

from grainhabit import hookimpl
from grainhabit.lazy import lazy_module
from grainhabit.frame import FrameData, FrameRef

zarr = lazy_module("zarr")  # imported on first use: only runs that read or write an archive need it

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "archive"
FORMAT = 1


def is_archive(path: str) -> bool:
    """True if ``path`` is a grainhabit frame archive."""
    p = Path(path)
    if not (p.is_dir() and (p / "zarr.json").exists()):
        return False
    try:
        return "grainhabit_archive" in zarr.open_group(str(p), mode="r").attrs
    except Exception:
        return False


def _index(root) -> dict:
    idx = root.attrs.get("index", {})
    return json.loads(idx) if isinstance(idx, str) else dict(idx)


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List archived frames (sorted by original source)."""
    if not is_archive(path):
        return None
    root = zarr.open_group(path, mode="r")
    limit = int(options.get("max_pixels") or 0)
    refs = []
    for n, (source, entry) in enumerate(sorted(_index(root).items())):
        arr = root["frames"][entry["array"]]
        if limit and arr.shape[0] * arr.shape[1] > limit:
            raise ValueError(f"{path}: frame {source} of {arr.shape[1]}x{arr.shape[0]} px exceeds "
                             f"input.max_pixels = {limit}")
        refs.append(FrameRef(source=source, path=path, page=int(entry["array"][1:]), shape=tuple(arr.shape),
                             dtype=str(arr.dtype), reader=NAME, content_hash=entry["hash"]))
    return refs


@hookimpl
def grainhabit_read_frame(ref: FrameRef, options: dict):
    """Read an archived frame with the calibration stored at ingest."""
    if ref.reader != NAME:
        return None
    arr = zarr.open_group(ref.path, mode="r")["frames"][f"f{ref.page:06d}"]
    attrs = dict(arr.attrs)
    raw = np.asarray(arr[...], dtype=np.float32)
    px = attrs.get("pixel_size_nm")
    px = float(px) if px is not None else math.nan
    notes = tuple(n for n in attrs.get("notes", "").split("; ") if n)
    return FrameData(source=ref.source, sample="", raw=raw, pixel_size_nm=px,
                     calibration=attrs.get("calibration", "") or "", notes=notes,
                     meta=json.loads(attrs.get("meta", "{}")))


@hookimpl
def grainhabit_open_regions(ref: FrameRef, options: dict):
    """Open an archived frame for region reads (its chunks are tiles; :class:`.regions.ArchiveRegions`)."""
    if ref.reader != NAME:
        return None
    from .regions import ArchiveRegions

    key = f"f{ref.page:06d}"
    arr = zarr.open_group(ref.path, mode="r")["frames"][key]
    attrs = dict(arr.attrs)
    px = attrs.get("pixel_size_nm")
    return ArchiveRegions(path=ref.path, key=key, shape=tuple(int(x) for x in arr.shape[:2]),
                          pixel_size_nm=float(px) if px is not None else math.nan,
                          calibration=attrs.get("calibration", "") or "",
                          notes=tuple(n for n in attrs.get("notes", "").split("; ") if n),
                          meta=json.loads(attrs.get("meta", "{}")))


def ingest(paths: list[str], into: str, host, chunk: int = 1024, pixel_size_nm: float | None = None,
           max_pixels: int = 1_000_000_000, log=print) -> dict:
    """Copy frames of TIFF files (or folders) into an archive.

    Parameters
    ----------
    paths : list of str
        Files, folders or glob patterns.
    into : str
        Archive path (created if missing).
    host : grainhabit.manager.Host
        For the reader plugins.
    chunk : int
        Tile side of the zarr chunks, px.
    pixel_size_nm : float, optional
        Stored for frames whose file has no calibration.
    max_pixels : int
        Refuse frames with more pixels than this.

    Returns
    -------
    dict
        Counts: ``added``, ``changed``, ``unchanged``, ``failed``.
    """
    from grainhabit.workflow import Plan, find_inputs

    plan = Plan("ingest", "", "", {"input": {"paths": list(paths), "archive": None}})
    in_folders: set = set()
    files, unmatched = find_inputs(plan, in_folders)
    counts = {"added": 0, "changed": 0, "unchanged": 0, "failed": 0}
    for pattern in unmatched:
        log(f"grainhabit ingest: {pattern}: no file matches", file=sys.stderr)
        counts["failed"] += 1
    if Path(into).exists() and not is_archive(into):
        raise ValueError(f"{into}: exists and is not a grainhabit archive")
    root = zarr.open_group(into, mode="a", zarr_format=3)
    if "grainhabit_archive" not in root.attrs:
        root.attrs.update({"grainhabit_archive": FORMAT, "index": {}})
    group = root.require_group("frames")
    options = {"max_pixels": max_pixels, "pixel_size_nm": pixel_size_nm}
    index = _index(root)
    next_id = 1 + max([int(e["array"][1:]) for e in index.values()] or [-1])
    for path in files:
        try:
            refs = host.pm.hook.grainhabit_list_frames(path=path, options=options)
            if refs is None and path in in_folders:
                continue  # a file beside the frames that no reader opens (a README, a log)
            if refs is None:
                raise ValueError("no reader plugin recognises this file")
        except Exception as exc:
            log(f"grainhabit ingest: {path}: {exc}", file=sys.stderr)
            counts["failed"] += 1
            continue
        for ref in refs:
            old = index.get(ref.source)
            if old is not None and old["hash"] == ref.content_hash:
                counts["unchanged"] += 1
                continue
            try:
                frame = host.pm.hook.grainhabit_read_frame(ref=ref, options=options)
            except Exception as exc:
                log(f"grainhabit ingest: {ref.source}: {exc}", file=sys.stderr)
                counts["failed"] += 1
                continue
            name = f"f{next_id:06d}"
            next_id += 1
            data = frame.raw
            px, cal = frame.pixel_size_nm, frame.calibration
            if not (px and np.isfinite(px)):
                px, cal = (pixel_size_nm, "workflow") if pixel_size_nm else (None, "")
            c = (min(chunk, data.shape[0]), min(chunk, data.shape[1]))
            arr = group.create_array(name, shape=data.shape, dtype=data.dtype, chunks=c)
            arr[...] = data
            arr.attrs.update({"source": ref.source, "pixel_size_nm": px, "calibration": cal,
                              "content_hash": ref.content_hash, "notes": "; ".join(frame.notes),
                              "meta": json.dumps(frame.meta, default=str)})
            index[ref.source] = {"array": name, "hash": ref.content_hash}
            root.attrs["index"] = index  # the frame is in the archive from here on
            if old is not None:
                del group[old["array"]]
                counts["changed"] += 1
            else:
                counts["added"] += 1
    return counts


def _cmd_ingest(args) -> int:
    try:
        counts = ingest(args.paths, args.into, args.host, chunk=args.chunk, pixel_size_nm=args.pixel_size_nm,
                        max_pixels=args.max_pixels, log=print)
    except ValueError as exc:
        print(f"grainhabit ingest: {exc}", file=sys.stderr)
        return 2
    print(f"{args.into}: {counts['added']} frames added, {counts['changed']} changed, "
          f"{counts['unchanged']} unchanged, {counts['failed']} failed")
    return 1 if counts["failed"] else 0


@hookimpl
def grainhabit_add_commands(subparsers):
    p = subparsers.add_parser(
        "ingest", help="copy frames of instrument files into a chunked zarr archive",
        description="Copy the frames of every file a reader opens (TIFF, OME-TIFF, DM3/DM4, EMD, SER, MRC, ...) "
                    "into a chunked, compressed zarr archive "
                    "with their calibration, source path and content hash. Running it again adds only new or "
                    "changed frames.")
    p.add_argument("paths", nargs="+", metavar="PATH", help="files, folders or glob patterns")
    p.add_argument("--into", required=True, metavar="ARCHIVE", help="archive path (e.g. survey.zarr)")
    p.add_argument("--chunk", type=int, default=1024, help="chunk side in pixels (default 1024)")
    p.add_argument("--pixel-size-nm", type=float, default=None,
                   help="pixel size stored for files without calibration")
    p.add_argument("--max-pixels", type=int, default=1_000_000_000, help="refuse larger frames")
    p.set_defaults(handler=_cmd_ingest)
