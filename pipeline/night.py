"""How a night's frames reach the results store: appended, or the store rewritten.

The store's ``frames`` group says which frames it holds (``source``,
``stage_key``). A night compares that with what it listed:

- a listed frame whose row is stored with the same staging key, and that
  was not processed again tonight, is unchanged: nothing of it is read;
- a listed frame with no row gets one (its staged result is read: only the
  night's new frames);
- a listed frame whose row has another key (a changed file, a changed
  chain) or that was processed again (a failed frame retried, ``--fresh``)
  has its row replaced;
- a stored frame that is not listed any more is kept
  (``input.on_missing: keep``) or removed (``drop``); a row of an input
  problem (a pattern that matched nothing, an unreadable file) is replaced
  by tonight's view of that input; a row stored under an unresolved path
  spelling (stores made before paths were resolved) is removed, its file
  being listed under its resolved path.

Only additions: the rows are appended in place (:mod:`grainhabit.append`).
Any replacement or removal: the stored rows that stay are read from the
store (not from staging), the new rows added after them, and the store is
rewritten and swapped in (:func:`grainhabit.results.write_results`).
Either way the summaries are computed over all rows.
"""

from __future__ import annotations

import logging
import os
import threading
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from .append import APPEND_DIMS, CannotAppend, append_groups, set_chunking
from .consolidate import build_datasets, concat_rows, offset_indices, select_frames
from .results import root_attrs, write_results
from .staging import read_staged

log = logging.getLogger("grainhabit")


@dataclass
class NightPlan:
    """What tonight changes in the store (from :func:`plan_night`).

    Attributes
    ----------
    mode : str
        ``"new"`` (no store yet: write it), ``"append"`` or ``"rewrite"``.
    keep : ndarray of bool or None
        Stored frames that stay (``rewrite``).
    new_entries : list of (info, staged)
        Rows to add, in order, for :func:`grainhabit.consolidate.build_datasets`.
    stored : dict of str -> xarray.Dataset
        The stored ``frames`` and ``grains`` (loaded), for the summaries; opened lazily
        (never loaded) where ``keep`` holds no row.
    counts : dict
        ``unchanged``, ``added``, ``replaced``, ``removed``, ``kept_missing`` rows.
    snapshot : StoreSnapshot or None
        The stored groups as opened for this plan (None for a new store).
    """

    mode: str
    keep: np.ndarray | None = None
    new_entries: list = field(default_factory=list)
    stored: dict = field(default_factory=dict)
    counts: dict = field(default_factory=dict)
    snapshot: "StoreSnapshot | None" = None


def _open_group(path: str, name: str) -> xr.Dataset | None:
    """A group of the store, read lazily without dask (numpy-backed when loaded), or None."""
    try:
        return xr.open_zarr(path, group=name, chunks=None)
    except Exception:
        return None


class StoreSnapshot:
    """The stored groups a night reads, each opened once; may be read ahead in a background thread.

    :func:`plan_night` and :func:`build_night` open the stored ``frames``
    group, read its ``source``, ``stage_key`` and ``error`` columns, and open
    the other appendable groups; where no stored row stays (``--fresh``, or
    every frame changed) they load those groups cut to no rows. None of this
    depends on the night's results, so the run reads it while its last
    frames are computed (:meth:`read_ahead`), on the core those frames leave
    idle, instead of after them. The run holds the store's lock from before
    the read until after its commit, so nothing changes the store between.
    Read on demand, the snapshot gives what opening the groups there gives.

    Parameters
    ----------
    results : str
        Results store (may not exist).
    """

    def __init__(self, results: str):
        self.results = results
        self._groups: dict[str, xr.Dataset | None] = {}
        self._keys = None
        self._none_kept = None
        self._root = None
        self._lock = threading.Lock()

    def group(self, name: str) -> xr.Dataset | None:
        """Group ``name`` opened lazily (None where the store or the group is missing)."""
        with self._lock:
            if name not in self._groups:
                self._groups[name] = _open_group(self.results, name) if os.path.exists(self.results) else None
            return self._groups[name]

    def frame_keys(self) -> xr.Dataset | None:
        """The stored ``frames`` group's ``source``, ``stage_key`` and ``error``, loaded; None without them."""
        fr = self.group("frames")
        if fr is None or "source" not in fr or "stage_key" not in fr:
            return None
        with self._lock:
            if self._keys is None:
                self._keys = fr[["source", "stage_key", "error"]].load()
            return self._keys

    def none_kept(self) -> dict[str, xr.Dataset]:
        """Every appendable group cut to no rows and loaded (:func:`select_frames` keeping no frame)."""
        old = {name: self.group(name) for name in APPEND_DIMS}
        with self._lock:
            if self._none_kept is None:
                keep = np.zeros(old["frames"].sizes.get("frame", 0), dtype=bool)
                self._none_kept = {name: ds.load() for name, ds in select_frames(old, keep).items()}
            return dict(self._none_kept)

    def root_attrs(self) -> dict:
        """The store's root attributes (:func:`grainhabit.results.root_attrs`); empty where unreadable."""
        with self._lock:
            if self._root is None:
                try:
                    self._root = root_attrs(self.results) if os.path.exists(self.results) else {}
                except Exception:
                    self._root = {}
            return self._root

    def read_ahead(self) -> None:
        """Open and read what a night of this store reads whatever its frames gave."""
        self.root_attrs()
        if self.frame_keys() is None:
            return
        if all(self.group(name) is not None for name in APPEND_DIMS):
            self.none_kept()


def _problem_row(path: str, reason: str, failed, sample_of=None) -> tuple[dict, dict]:
    sample = sample_of(path) if sample_of is not None else ""
    return ({"source": path, "sample": sample, "content_hash": "", "stage_key": ""}, failed(path, sample, reason))


def plan_night(results: str, frames: list, problems: list, transient: dict, stage, processed: set,
               on_missing: str, failed_result, fresh: bool = False, sample_of=None,
               snapshot: StoreSnapshot | None = None) -> NightPlan:
    """Compare tonight's listing with the stored frames (see the module docstring).

    Parameters
    ----------
    results : str
        Results store (may not exist yet).
    frames : list of ListedFrame
        Tonight's frames in listing order.
    problems : list of (path, reason)
        Tonight's input problems.
    transient : dict
        Staging key -> result of frames that failed without being staged.
    stage : Path
        Staging folder.
    processed : set of str
        Staging keys of the frames processed tonight.
    on_missing : str
        ``keep`` or ``drop``.
    sample_of : callable, optional
        Sample name of an input problem's path (an unreadable file still
        belongs to the sample its path names); default: no sample.
    failed_result : callable
        ``(source, sample, reason) -> staged-like result`` for problem rows.
    fresh : bool
        ``--fresh``: every row is replaced.
    snapshot : StoreSnapshot, optional
        The stored groups, perhaps read ahead; default: opened here.
    """
    def result_of(f):
        res = transient.get(f.key)
        if res is not None:
            return res
        path = stage / f"{f.key}.npz"
        try:
            return read_staged(path)
        except FileNotFoundError:
            return failed_result(f.ref.source, f.sample, "staged result missing; the next run does it again")

    def entry(f):
        info = {"source": f.ref.source, "sample": f.sample, "content_hash": f.ref.content_hash,
                "stage_key": f.key, **f.fields}
        return info, result_of(f)

    snapshot = snapshot if snapshot is not None else StoreSnapshot(results)
    fr = snapshot.frame_keys()
    if fr is None:
        entries = [_problem_row(p, r, failed_result, sample_of) for p, r in problems] + [entry(f) for f in frames]
        return NightPlan("new", new_entries=entries, counts={"added": len(entries)})
    stored_frames = snapshot.group("frames")
    sources = [str(s) for s in fr["source"].values]
    keys = [str(k) for k in fr["stage_key"].values]
    errors = [str(e) for e in fr["error"].values]
    n = len(sources)
    keep = np.ones(n, dtype=bool)
    row_of: dict[str, int] = {}
    for i, s in enumerate(sources):
        row_of.setdefault(s, i)
    listed = {f.ref.source for f in frames}
    tonight_problems = dict(problems)
    new_entries = []
    counts = {"unchanged": 0, "added": 0, "replaced": 0, "removed": 0, "kept_missing": 0}

    def tally(i, unchanged: bool, make) -> None:
        """Count tonight's row against stored row ``i`` (None: new) and queue it unless unchanged."""
        if i is not None and unchanged:
            counts["unchanged"] += 1
            return
        if i is not None:
            keep[i] = False
        counts["replaced" if i is not None else "added"] += 1
        new_entries.append(make())

    for path, reason in problems:
        i = row_of.get(path)
        tally(i, i is not None and keys[i] == "" and errors[i] == reason,
              lambda: _problem_row(path, reason, failed_result, sample_of))
    for f in frames:
        i = row_of.get(f.ref.source)
        tally(i, i is not None and keys[i] == f.key and f.key not in processed and not fresh, lambda: entry(f))
    gone = []
    for i, s in enumerate(sources):
        if s in listed or s in tonight_problems or not keep[i]:
            continue
        if row_of.get(s) != i:  # a second row of one source (should not happen): keep the first
            keep[i] = False
            counts["removed"] += 1
        elif keys[i] == "":  # an input problem of an earlier night, gone tonight
            keep[i] = False
            counts["removed"] += 1
        elif _unresolved(s):
            keep[i] = False
            counts["removed"] += 1
            log.info("frame %s was stored under an unresolved spelling of its path: replaced by its resolved path", s)
        else:
            gone.append(i)
    if gone:
        if on_missing == "drop":
            keep[gone] = False
            counts["removed"] += len(gone)
            log.warning("%d frames of earlier runs are no longer found in the inputs: dropped "
                        "(input.on_missing=drop)", len(gone))
        else:
            counts["kept_missing"] = len(gone)
            log.warning("%d frames of earlier runs are no longer found in the inputs: kept "
                        "(input.on_missing=keep)", len(gone))
    mode = "append" if keep.all() else "rewrite"
    if mode == "append" or keep.any():
        stored = {"frames": stored_frames.load(), "grains": snapshot.group("grains").load()}
    else:
        # every stored row is replaced (--fresh, or all frames changed): only the groups' layout is read
        stored = {"frames": stored_frames, "grains": snapshot.group("grains")}
    return NightPlan(mode, keep=keep, new_entries=new_entries, stored=stored, counts=counts, snapshot=snapshot)


def _unresolved(source: str) -> bool:
    """True if a stored source path is not in resolved form (``..``, a symbolic link, relative)."""
    path = source.split("#")[0]
    return os.path.realpath(path) != path


def _full_groups(results: str, night: NightPlan, new: dict) -> dict:
    """Stored rows that stay, then the new rows: every appendable group, in memory.

    Where no stored row stays, the stored groups are opened lazily and cut to no rows
    before they are loaded: the same (empty) datasets, with their variables, types and
    encodings, as loading them whole first, without reading their values.
    """
    snapshot = night.snapshot
    if not np.asarray(night.keep, bool).any() and snapshot is not None and all(
            snapshot.group(name) is not None for name in APPEND_DIMS):
        # no stored row stays: the groups cut to no rows, perhaps read ahead
        old = snapshot.none_kept()
        offset_indices(new, 0, 0)
        return concat_rows(old, new)
    old = {name: (night.stored[name] if name in night.stored else _open_group(results, name)) for name in APPEND_DIMS}
    if np.asarray(night.keep, bool).any():
        old = {name: ds.load() for name, ds in old.items()}
    # loading what select_frames kept reads nothing more where the groups were loaded above
    old = {name: ds.load() for name, ds in select_frames(old, night.keep).items()}
    offset_indices(new, old["frames"].sizes.get("frame", 0), old["grains"].sizes.get("grain", 0))
    return concat_rows(old, new)


def build_night(results: str, night: NightPlan, extra_columns=()) -> dict:
    """The datasets of tonight: all rows (for the summaries) and what to write.

    Returns
    -------
    dict
        ``grains`` and ``frames`` over all rows; ``new`` (tonight's rows,
        indices offset past the stored rows; ``append`` only) or ``groups``
        (every appendable group in full; ``new`` and ``rewrite``).
    """
    new = build_datasets(night.new_entries, extra_columns=extra_columns)
    if night.mode == "new":
        return {"grains": new["grains"], "frames": new["frames"], "groups": new}
    if night.mode == "append":
        offset_indices(new, night.stored["frames"].sizes.get("frame", 0),
                       night.stored["grains"].sizes.get("grain", 0))
        both = concat_rows({k: night.stored[k] for k in ("grains", "frames")},
                           {k: new[k] for k in ("grains", "frames")})
        return {"grains": both["grains"], "frames": both["frames"], "new": new}
    full = _full_groups(results, night, new)
    return {"grains": full["grains"], "frames": full["frames"], "groups": full}


def commit_night(results: str, night: NightPlan, built: dict, survey: dict, attrs: dict,
                 extra_columns=(), cleanup: list | None = None) -> str:
    """Write tonight's results: append in place, or write the whole store and swap it in.

    Parameters
    ----------
    results : str
        Results store.
    night : NightPlan
    built : dict
        From :func:`build_night`.
    survey : dict of str -> xarray.Dataset
        Groups of the summarise steps (written anew).
    attrs : dict
        Root attributes.
    cleanup : list, optional
        Given, a replaced store is removed without waiting for it
        (:func:`grainhabit.results.discard`; threads the caller must join are
        appended here); by default it is removed before this returns.

    Returns
    -------
    str
        ``"appended"`` or ``"written"``.
    """
    if night.mode == "append":
        new = built["new"]
        appended = {name: ds for name, ds in new.items() if name in APPEND_DIMS}
        try:
            append_groups(results, appended, survey, attrs)
            return "appended"
        except CannotAppend as exc:
            log.info("rewriting the results store instead of appending: %s", exc)
            night.keep = np.ones(night.stored["frames"].sizes.get("frame", 0), dtype=bool)
            new = build_datasets(night.new_entries, extra_columns=extra_columns)
            groups = _full_groups(results, night, new)
    else:
        groups = dict(built["groups"])
    groups.update(survey)
    write_results(results, set_chunking(groups), attrs, cleanup=cleanup)
    return "written"


@dataclass
class TouchedPart:
    """The rows of the samples that got frames tonight (for summaries computed per sample)."""

    samples: list
    grains: xr.Dataset
    frames: xr.Dataset


def touched_part(results: str, night: NightPlan, built: dict) -> TouchedPart | None:
    """All rows of the samples that got new frames tonight, or None where summaries need every row.

    Only for nights that append (no row of a stored sample changed) to a store
    that has a ``summary`` group. The summaries of the other samples are
    those stored (:func:`merge_summaries`).
    """
    if night.mode != "append" or not night.new_entries:
        return None
    if _open_group(results, "summary") is None:
        return None
    samples = sorted({str(info.get("sample", "")) for info, _ in night.new_entries})
    frames, grains = built["frames"], built["grains"]
    fmask = np.isin(np.asarray(frames["sample"].values, dtype=object), samples)
    gmask = np.isin(np.asarray(grains["sample"].values, dtype=object), samples) if grains.sizes.get("grain") else \
        np.zeros(0, bool)
    return TouchedPart(samples, grains.isel(grain=np.flatnonzero(gmask)), frames.isel(frame=np.flatnonzero(fmask)))


def _as_object_text(ds: xr.Dataset) -> xr.Dataset:
    changed = {k: v.copy(data=np.asarray(v.values, dtype=object)) for k, v in ds.variables.items()
               if v.dtype.kind in ("T", "U", "O")}
    return ds.assign(changed) if changed else ds


def merge_summaries(results: str, part: dict, samples: list) -> dict | None:
    """Stored summaries of the untouched samples with tonight's summaries of ``samples``.

    Each group must have a ``sample`` dimension with a ``sample`` coordinate,
    the same variables (with the same dims) and the same attributes as the
    stored group, and every variable without the ``sample`` dimension equal
    to the stored one; the rows are put in sample order (as the summarise
    steps sort them). Otherwise None: the caller summarises every sample.
    Per-sample summaries computed this way equal those of a full computation
    as long as a sample's summary depends on that sample's rows alone
    (``summarise-samples`` seeds its bootstrap per sample).
    """
    merged = {}
    for name, new in part.items():
        if not isinstance(new, xr.Dataset) or "sample" not in new.dims or "sample" not in new.coords:
            return None
        stored = _open_group(results, name)
        if stored is None or "sample" not in stored.dims or "sample" not in stored.coords:
            return None
        stored = _as_object_text(stored.load())
        new = _as_object_text(new)
        if set(stored.variables) != set(new.variables) or dict(stored.attrs) != dict(new.attrs):
            return None
        for k, v in new.variables.items():
            if stored[k].dims != v.dims:
                return None
            if "sample" not in v.dims and not stored[k].variable.equals(v):
                return None
        keep = [s for s in stored["sample"].values.tolist() if s not in set(samples)]
        both = xr.concat([stored.sel(sample=keep), new], dim="sample", data_vars="all", coords="different",
                         compat="equals", join="outer", combine_attrs="override")
        order = np.argsort(np.asarray(both["sample"].values, dtype=str), kind="stable")
        merged[name] = both.isel(sample=order)
    return merged
