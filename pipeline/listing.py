"""What the readers said about each input file, remembered beside the results store.

Listing a frame means opening its file and hashing its bytes (the reader's
``grainhabit_list_frames``); in an archive that only grows, that is the
whole archive read again every night. The index ``<results>.inputs.json``
remembers, per resolved file path, the file's size, modification time
(ns) and inode, the input pattern that found it, and the readers' answer
(the frames with their content hashes). A file whose size, mtime and
inode are unchanged is not opened again; any change lists it anew.

The answers are valid only for the same readers and listing options: the
index carries a key of both (:func:`listing_key`) and starts empty when it
differs. The index is written (atomically) after the results store is
committed, so it describes the files the store was last made from; that
is what the check for a vanished input root compares against
(:func:`vanished_roots`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import uuid
from pathlib import Path

from .frame import FrameRef

FORMAT = 1


def index_path(results: str | os.PathLike) -> Path:
    """Path of the listing index of a results store."""
    p = Path(results)
    return p.with_name(p.name + ".inputs.json")


def listing_key(readers: list[str], options: dict) -> str:
    """Key of what a listing depends on: reader plugins with versions, and the listing options.

    Parameters
    ----------
    readers : list of str
        ``name=version`` of every plugin with a reader hook.
    options : dict
        The workflow's ``input`` section; only the keys readers may use when
        listing are taken (``max_pixels``, ``pixel_size_nm``, ``calibration``).
    """
    picked = {k: options.get(k) for k in ("max_pixels", "pixel_size_nm", "calibration")}
    blob = json.dumps({"readers": sorted(readers), "options": picked}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()[:16]


def _ident(st: os.stat_result) -> list:
    return [int(st.st_size), int(st.st_mtime_ns), int(st.st_ino)]


def _ref_to_json(ref: FrameRef) -> dict:
    d = dataclasses.asdict(ref)
    d["shape"] = list(d.get("shape") or ())
    return d


_REF_FIELDS = {f.name for f in dataclasses.fields(FrameRef)}


def _ref_from_json(d: dict) -> FrameRef:
    d = {k: v for k, v in d.items() if k in _REF_FIELDS}
    d["shape"] = tuple(d.get("shape") or ())
    return FrameRef(**d)


class ListingIndex:
    """Readers' answers per file, reused while a file's size, mtime and inode stay the same.

    Parameters
    ----------
    path : path-like
        The index file (:func:`index_path`).
    key : str
        :func:`listing_key` of this run; answers stored under another key are ignored.

    Attributes
    ----------
    previous : dict of str -> dict
        The entries as loaded (resolved path -> entry).
    hits, misses : int
        Files answered from the index / listed by the readers in this run.
    """

    def __init__(self, path: str | os.PathLike, key: str):
        self.path = Path(path)
        self.key = key
        self.previous: dict[str, dict] = {}
        self._stale_answers = False
        self.current: dict[str, dict] = {}
        self.hits = self.misses = 0
        self._reused: dict | None = None
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            data = {}
        if isinstance(data, dict) and data.get("format") == FORMAT:
            self.previous = data.get("files") or {}
            self._stale_answers = data.get("key") != key

    def lookup(self, path: str, st: os.stat_result) -> list[FrameRef] | None:
        """The remembered frames of ``path`` if the file is unchanged, else None."""
        entry = self.previous.get(path)
        if entry is None or self._stale_answers or entry.get("stat") != _ident(st) or "refs" not in entry:
            return None
        self.hits += 1
        self._reused = entry
        return [_ref_from_json(r) for r in entry["refs"]]

    def remember(self, path: str, st: os.stat_result | None, refs: list[FrameRef] | None, root: str) -> None:
        """Record this run's view of a file (``refs`` None: listing failed; it is listed again next time)."""
        reused = self._reused
        self._reused = None
        if reused is not None and st is not None and reused.get("stat") == _ident(st):
            self.current[path] = reused if reused.get("root") == root else dict(reused, root=root)
            return
        entry: dict = {"root": root}
        if st is not None and refs is not None:
            entry["stat"] = _ident(st)
            entry["refs"] = [_ref_to_json(r) for r in refs]
        self.current[path] = entry

    def previous_files(self, root: str) -> list[str]:
        """Files an earlier run found through the input pattern ``root``."""
        return [p for p, e in self.previous.items() if e.get("root") == root]

    def save(self) -> None:
        """Write this run's entries (atomically: temporary file, then rename)."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{self.path.name}.{uuid.uuid4().hex[:8]}.tmp")
        tmp.write_text(json.dumps({"format": FORMAT, "key": self.key, "files": self.current}), encoding="utf-8")
        os.replace(tmp, self.path)


def vanished_roots(index: ListingIndex, patterns: list[str], per_root: list[list[str]]) -> list[tuple[int, int]]:
    """Input patterns that find none of the files they found before (an unmounted share).

    Parameters
    ----------
    index : ListingIndex
        Loaded index of the results store.
    patterns : list of str
        The workflow's resolved ``input.paths``.
    per_root : list of list of str
        Resolved files each pattern finds now.

    Returns
    -------
    list of (int, int)
        (pattern index, number of files it found before) for every pattern
        that found files before and finds none of them now.
    """
    out = []
    for i, pattern in enumerate(patterns):
        before = index.previous_files(pattern)
        if before and not set(before) & set(per_root[i]):
            out.append((i, len(before)))
    return out
