"""Build the results datasets from staged per-frame results.

Frames are numbered in the order they were listed (sorted paths, then
pages), so the consolidated tables of a resumed run are identical, row for
row, to those of an uninterrupted run.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from .columns import FRAME_COLUMNS, GRAIN_COLUMNS, GRAIN_FILL, describe
from .params import Column
from .results import text_array

TEXT_KINDS = ("U", "S", "O", "T")


def _as_var(dim: str, values, column) -> xr.Variable:
    arr = np.asarray(values)
    if arr.dtype.kind in TEXT_KINDS:
        arr = text_array(arr)
    attrs = {"units": column.units if column else "1", "long_name": column.long_name if column else dim}
    return xr.Variable((dim,), arr, attrs)


_INT_COLUMNS = ("frame", "label", "n_corners")
_BOOL_COLUMNS = ("edge_cut", "split")
_TEXT_COLUMNS = ("source", "sample", "habit")


def _empty_dtype(name: str, like: np.ndarray | None):
    """dtype of a column when no frame has grains."""
    if name in _INT_COLUMNS:
        return np.int64
    if name in _BOOL_COLUMNS:
        return bool
    if like is not None:
        return object if like.dtype.kind in TEXT_KINDS else like.dtype
    return object if name in _TEXT_COLUMNS else float


def _fill_for(name: str, n: int, like: np.ndarray | None):
    if name in GRAIN_FILL:
        return np.full(n, GRAIN_FILL[name], dtype=object if isinstance(GRAIN_FILL[name], str) else None)
    if like is not None and like.dtype.kind in TEXT_KINDS:
        return np.full(n, "", dtype=object)
    if like is not None and like.dtype.kind == "b":
        return np.zeros(n, dtype=bool)
    return np.full(n, np.nan)


def build_datasets(entries: list[tuple[dict, dict]], extra_columns=()) -> dict[str, xr.Dataset]:
    """Assemble ``grains``, ``frames``, ``outlines`` and ``thumbnails``.

    Parameters
    ----------
    entries : list of (frame_info, staged)
        In frame order. ``frame_info`` holds the listing's view of the frame
        (``source``, ``sample``, ``content_hash``, ``stage_key`` and extra
        text fields); ``staged`` is a result from
        :func:`grainhabit.staging.read_staged`.
    extra_columns : iterable of Column
        Units and long names of further per-grain columns (from the steps'
        ``StepInfo.outputs``).

    Returns
    -------
    dict of str -> xarray.Dataset
    """
    known = describe(GRAIN_COLUMNS)
    known.update(describe(extra_columns))
    frame_known = describe(FRAME_COLUMNS)

    # column names over all frames, contract columns first
    names = [c.name for c in GRAIN_COLUMNS]
    examples: dict[str, np.ndarray] = {}
    for _, staged in entries:
        for k, v in staged["columns"].items():
            examples.setdefault(k, v)
            if k not in names:
                names.append(k)

    per_col: dict[str, list] = {k: [] for k in names}
    frame_rows: dict[str, list] = {}
    field_names: list[str] = []
    outl_grain, outl_xy = [], []
    thumbs, thumb_meta = [], []
    grain_offset = 0
    for index, (info, staged) in enumerate(entries):
        rec = dict(staged["record"])
        rec.update({k: info[k] for k in ("source", "sample", "content_hash", "stage_key") if k in info})
        for k in info:
            if k not in rec:
                rec[k] = info[k]
                if k not in field_names:
                    field_names.append(k)
        cols = staged["columns"] if rec.get("status") == "ok" else {}
        n = len(next(iter(cols.values()))) if cols else 0
        rec["grain_count"] = n
        for k in [c.name for c in FRAME_COLUMNS] + field_names:
            frame_rows.setdefault(k, []).append(rec.get(k, ""))
        if n:
            for k in names:
                if k == "frame":
                    per_col[k].append(np.full(n, index, dtype=np.int64))
                elif k == "source":
                    per_col[k].append(np.full(n, rec["source"], dtype=object))
                elif k == "sample":
                    per_col[k].append(np.full(n, rec["sample"], dtype=object))
                elif k in cols:
                    per_col[k].append(np.asarray(cols[k]))
                else:
                    per_col[k].append(_fill_for(k, n, examples.get(k)))
            offs = staged["outline_offsets"]
            if len(offs) == n + 1 and offs[-1] == len(staged["outline_xy"]):
                counts = np.diff(offs)
                outl_grain.append(np.repeat(np.arange(grain_offset, grain_offset + n), counts))
                outl_xy.append(staged["outline_xy"])
            grain_offset += n
        thumbs.append(staged["thumb"])
        px = float(rec.get("pixel_size_nm") or np.nan)
        thumb_meta.append((px * staged.get("thumb_factor", 1.0), *staged["thumb"].shape))

    # the variables first, then one Dataset: adding them one by one merges the dataset again at every
    # column (quadratic in the columns); the same dataset (tests/test_host_datasets.py)
    grain_vars = {}
    for k in names:
        parts = per_col[k]
        if parts:
            values = np.concatenate([np.asarray(p) for p in parts])
            if values.dtype.kind == "O" and k not in ("source", "sample"):
                try:
                    values = values.astype(float) if all(isinstance(x, (int, float)) for x in values[:50]) else values
                except (TypeError, ValueError):
                    pass
        else:
            values = np.zeros(0, dtype=_empty_dtype(k, examples.get(k)))
        grain_vars[k] = _as_var("grain", values, known.get(k))
    grains = xr.Dataset(grain_vars)

    frame_vars = {}
    for k, values in frame_rows.items():
        col = frame_known.get(k)
        arr = np.asarray(values, dtype=object)
        if col is not None and col.units not in ("",):
            arr = np.asarray([np.nan if v in ("", None) else v for v in values], dtype=float)
            if k in ("grain_count", "rows", "cols"):
                arr = np.nan_to_num(arr, nan=0).astype(np.int64)
        else:
            arr = np.asarray(["" if v is None else str(v) for v in values], dtype=object)
        frame_vars[k] = _as_var("frame", arr, col or Column(k, "", f"frame field {k}"))
    frames = xr.Dataset(frame_vars)

    vertex_grain = np.concatenate(outl_grain) if outl_grain else np.zeros(0, np.int64)
    vertex_xy = np.concatenate(outl_xy) if outl_xy else np.zeros((0, 2))
    outlines = xr.Dataset(
        {
            "grain": xr.Variable(("vertex",), vertex_grain, {"units": "1", "long_name": "index into the grains group"}),
            "x_nm": xr.Variable(("vertex",), vertex_xy[:, 0], {"units": "nm", "long_name": "outline vertex x"}),
            "y_nm": xr.Variable(("vertex",), vertex_xy[:, 1], {"units": "nm", "long_name": "outline vertex y"}),
        }
    )

    side = max([max(t.shape) for t in thumbs if t.size] or [1])
    stack = np.zeros((len(thumbs), side, side), dtype=np.uint8)
    for i, t in enumerate(thumbs):
        if t.size:
            stack[i, : t.shape[0], : t.shape[1]] = t
    meta = np.array(thumb_meta, dtype=float).reshape(-1, 3)
    thumbnails = xr.Dataset(
        {
            "image": xr.Variable(("frame", "thumb_y", "thumb_x"), stack,
                                 {"units": "1", "long_name": "frame thumbnail (8-bit, padded with 0)"}),
            "scale_nm": xr.Variable(("frame",), meta[:, 0], {"units": "nm", "long_name": "nm per thumbnail pixel"}),
            "thumb_rows": xr.Variable(("frame",), meta[:, 1].astype(np.int64),
                                      {"units": "1", "long_name": "valid thumbnail rows"}),
            "thumb_cols": xr.Variable(("frame",), meta[:, 2].astype(np.int64),
                                      {"units": "1", "long_name": "valid thumbnail columns"}),
        }
    )
    return {"grains": grains, "frames": frames, "outlines": outlines, "thumbnails": thumbnails}


def offset_indices(groups: dict[str, xr.Dataset], frames_before: int, grains_before: int) -> dict[str, xr.Dataset]:
    """Shift the ``frame`` and ``grain`` indices of new rows past the rows already stored.

    Parameters
    ----------
    groups : dict of str -> xarray.Dataset
        From :func:`build_datasets` for the new frames only (modified in place and returned).
    frames_before, grains_before : int
        Rows of ``frames`` and ``grains`` already in the store.
    """
    if "grains" in groups and "frame" in groups["grains"]:
        groups["grains"]["frame"] = groups["grains"]["frame"] + np.int64(frames_before)
    if "outlines" in groups and "grain" in groups["outlines"]:
        groups["outlines"]["grain"] = groups["outlines"]["grain"] + np.int64(grains_before)
    return groups


def select_frames(groups: dict[str, xr.Dataset], keep: np.ndarray) -> dict[str, xr.Dataset]:
    """Keep some frames of stored results, with their grains, outlines and thumbnails, renumbered.

    Parameters
    ----------
    groups : dict of str -> xarray.Dataset
        ``frames``, ``grains``, ``outlines``, ``thumbnails`` (loaded, or opened lazily where no
        frame is kept: their values are then never read).
    keep : ndarray of bool, shape (n_frames,)
        Frames to keep.

    Returns
    -------
    dict of str -> xarray.Dataset
        The same groups with only the kept rows; ``grains.frame`` and
        ``outlines.grain`` point at the new row numbers.
    """
    keep = np.asarray(keep, dtype=bool)
    new_frame = np.cumsum(keep) - 1
    out = dict(groups)
    out["frames"] = groups["frames"].isel(frame=np.flatnonzero(keep))
    if "thumbnails" in groups and groups["thumbnails"].sizes.get("frame", 0) == keep.size:
        out["thumbnails"] = groups["thumbnails"].isel(frame=np.flatnonzero(keep))
    grains = groups["grains"]
    # the owners are read only where a row may stay (where none does, the groups may be opened lazily)
    n_grains = grains.sizes.get("grain", 0)
    frame_of = grains["frame"].values.astype(np.int64) if n_grains and keep.any() else np.zeros(0, np.int64)
    grain_keep = keep[frame_of] if frame_of.size else np.zeros(n_grains, bool)
    g = grains.isel(grain=np.flatnonzero(grain_keep))
    if g.sizes.get("grain", 0):
        g["frame"] = g["frame"].copy(data=new_frame[frame_of[grain_keep]].astype(np.int64))
    out["grains"] = g
    if "outlines" in groups:
        ol = groups["outlines"]
        n_vertices = ol.sizes.get("vertex", 0)
        owner = ol["grain"].values.astype(np.int64) if n_vertices and grain_keep.any() else np.zeros(0, np.int64)
        vkeep = grain_keep[owner] if owner.size else np.zeros(n_vertices, bool)
        new_grain = np.cumsum(grain_keep) - 1
        o = ol.isel(vertex=np.flatnonzero(vkeep))
        if o.sizes.get("vertex", 0):
            o["grain"] = o["grain"].copy(data=new_grain[owner[vkeep]].astype(np.int64))
        out["outlines"] = o
    return out


def concat_rows(old: dict[str, xr.Dataset], new: dict[str, xr.Dataset]) -> dict[str, xr.Dataset]:
    """Stored rows followed by new rows (indices of ``new`` already offset), group by group.

    Thumbnail stacks of different sizes are padded with 0 to the larger one.
    A group missing on one side is taken from the other.
    """
    dims = {"grains": "grain", "frames": "frame", "outlines": "vertex", "thumbnails": "frame"}
    out = {}
    for name, dim in dims.items():
        a, b = old.get(name), new.get(name)
        if a is None or b is None:
            out[name] = a if b is None else b
            continue
        if not a.sizes.get(dim, 0):
            out[name] = b
            continue
        if not b.sizes.get(dim, 0):
            out[name] = a
            continue
        if name == "thumbnails":
            side = (max(a.sizes["thumb_y"], b.sizes["thumb_y"]), max(a.sizes["thumb_x"], b.sizes["thumb_x"]))
            a, b = (d.pad(thumb_y=(0, side[0] - d.sizes["thumb_y"]), thumb_x=(0, side[1] - d.sizes["thumb_x"]),
                          constant_values=0) if "thumb_y" in d.dims else d for d in (a, b))
        both = [a.copy(), b.copy()]
        for k in sorted(set(a.data_vars) ^ set(b.data_vars)):  # a column one side has not got: filled
            for d in both:
                if k not in d:
                    like = (a if k in a else b)[k]
                    fill = "" if like.dtype.kind in TEXT_KINDS else (False if like.dtype.kind == "b" else np.nan)
                    d[k] = xr.Variable(like.dims, np.full((d.sizes[dim],) + like.shape[1:], fill,
                                                          dtype=object if fill == "" else None), like.attrs)
        parts = []
        for d in both:
            d = d.copy()
            for k, v in d.variables.items():
                if v.dtype.kind in TEXT_KINDS:
                    d[k] = v.copy(data=np.asarray(v.values, dtype=object))
            parts.append(d)
        out[name] = xr.concat(parts, dim=dim, data_vars="all", coords="minimal", compat="override",
                              join="outer", combine_attrs="override")
    return out
