"""The ``grainhabit aggregate`` command: merge several results stores into one.

``grainhabit aggregate RESULTS... --into COMBINED`` concatenates the
``grains``, ``frames``, ``outlines`` and ``thumbnails`` groups, re-indexing
``frame`` and ``grain``; a frame seen in more than one store (same
``content_hash``) is kept once, from the store with the newest run; then the
summary groups are recomputed with :func:`grainhabit.plugins.survey.summarise_samples.summarise` and the
combined store is written atomically with :func:`grainhabit.results.write_results`.
"""

from __future__ import annotations

import datetime as _dt
import json
import sys

import numpy as np

from grainhabit import hookimpl
from grainhabit.lazy import lazy_module

from grainhabit.plugins.survey import summarise_samples as summary_step
from grainhabit.plugins.survey.results_tables import load_results, plain_dataset

xr = lazy_module("xarray")  # imported on first use: workers never need it

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "aggregate"

_TIME_KEYS = ("finished", "ended", "started", "time")


def run_time(groups: dict) -> str:
    """Latest time stamp (ISO text) among a store's run records; "" if none."""
    runs = groups.get("/", xr.Dataset()).attrs.get("runs", "[]")
    try:
        runs = json.loads(runs) if isinstance(runs, str) else list(runs or [])
    except ValueError:
        runs = []
    stamps = [str(r[k]) for r in runs if isinstance(r, dict) for k in _TIME_KEYS if r.get(k)]
    return max(stamps) if stamps else ""


def _fill_like(var: xr.DataArray, n: int, dim: str) -> xr.DataArray:
    kind = var.dtype.kind
    shape = tuple(n if d == dim else var.sizes[d] for d in var.dims)
    if kind == "f":
        data = np.full(shape, np.nan, var.dtype)
    elif kind == "b":
        data = np.zeros(shape, bool)
    elif kind in "iu":
        data = np.full(shape, -1 if kind == "i" else 0, var.dtype)
    else:
        data = np.full(shape, "", dtype=object)
    return xr.DataArray(data, dims=var.dims, attrs=var.attrs)


def _concat(parts: list[xr.Dataset], dim: str) -> xr.Dataset:
    """Concatenate along ``dim``, filling variables some parts lack (NaN, False, -1, "")."""
    parts = [plain_dataset(p.drop_vars([c for c in p.coords if dim in p[c].dims])) for p in parts]
    names: dict[str, xr.DataArray] = {}
    for p in parts:
        for k, v in p.data_vars.items():
            names.setdefault(k, v)
    filled = []
    for p in parts:
        n = p.sizes.get(dim, 0)
        q = p.copy()
        for k, v in names.items():
            if k not in q:
                q[k] = _fill_like(v, n, dim)
        filled.append(q[list(names)])
    out = xr.concat(filled, dim=dim, data_vars="all", coords="minimal", compat="override",
                    combine_attrs="override", join="outer")
    for k, v in names.items():
        out[k].attrs = dict(v.attrs)
    return out


def _pad_thumbs(ds: xr.Dataset, ny: int, nx: int) -> xr.Dataset:
    img = np.asarray(ds["image"].values)
    pad = np.zeros((img.shape[0], ny, nx), img.dtype)
    pad[:, :img.shape[1], :img.shape[2]] = img
    out = ds.drop_vars("image")
    out["image"] = (("frame", "thumb_y", "thumb_x"), pad, ds["image"].attrs)
    return out


def aggregate(stores: list, params: dict | None = None) -> tuple[dict, dict, dict]:
    """Merge results stores.

    Parameters
    ----------
    stores : list of path-like
        Results stores, in any order; a later store wins ties of run time.
    params : dict, optional
        Parameters for :func:`grainhabit.plugins.survey.summarise_samples.summarise`; by default those
        recorded in the newest store's summary (bootstrap, seed, threshold),
        and ``group_by`` every key of its ``summary_by_<key>`` groups.

    Returns
    -------
    groups : dict of str -> xarray.Dataset
    root_attrs : dict
    info : dict
        ``frames``, ``grains``, ``duplicates_dropped`` and per-store counts.

    Raises
    ------
    ValueError
        If fewer than one store is given or one is not a results store.
    """
    if not stores:
        raise ValueError("aggregate: no results stores given")
    loaded = [load_results(s) for s in stores]
    times = [run_time(g) for g in loaded]
    rank = sorted(range(len(loaded)), key=lambda i: (times[i], i))  # oldest first
    order = {i: r for r, i in enumerate(rank)}

    # which copy of each content hash to keep: the newest store's (last frame within a store)
    best: dict[str, tuple] = {}
    for i, g in enumerate(loaded):
        hashes = [str(h) for h in g["frames"]["content_hash"].values] if "content_hash" in g["frames"] else []
        for j, h in enumerate(hashes):
            if h and (h not in best or (order[i], j) > best[h]):
                best[h] = (order[i], j)
    parts = {k: [] for k in ("frames", "grains", "outlines", "thumbnails")}
    frame_off = grain_off = dropped = 0
    per_store = []
    for i, g in enumerate(loaded):
        fr = g["frames"]
        nf = fr.sizes.get("frame", 0)
        hashes = [str(h) for h in fr["content_hash"].values] if "content_hash" in fr else [""] * nf
        keep_f = np.array([not h or best[h] == (order[i], j) for j, h in enumerate(hashes)], bool)
        dropped += int((~keep_f).sum())
        new_f = np.full(nf, -1)
        new_f[keep_f] = frame_off + np.arange(keep_f.sum())
        gr = g["grains"]
        gf = np.asarray(gr["frame"].values, int)
        keep_g = keep_f[gf] if gf.size else np.zeros(0, bool)
        new_g = np.full(gf.size, -1)
        new_g[keep_g] = grain_off + np.arange(keep_g.sum())
        f_sel = fr.isel(frame=np.flatnonzero(keep_f))
        g_sel = gr.isel(grain=np.flatnonzero(keep_g))
        g_sel["frame"] = (("grain",), new_f[gf[keep_g]], gr["frame"].attrs)
        parts["frames"].append(f_sel)
        parts["grains"].append(g_sel)
        if "outlines" in g:
            ol = g["outlines"]
            vg = np.asarray(ol["grain"].values, int)
            kv = keep_g[vg] if vg.size else np.zeros(0, bool)
            o_sel = ol.isel(vertex=np.flatnonzero(kv))
            o_sel["grain"] = (("vertex",), new_g[vg[kv]], ol["grain"].attrs)
            parts["outlines"].append(o_sel)
        if "thumbnails" in g:
            parts["thumbnails"].append(g["thumbnails"].isel(frame=np.flatnonzero(keep_f)))
        per_store.append({"store": str(stores[i]), "run_time": times[i], "frames": nf,
                          "frames_kept": int(keep_f.sum()), "grains_kept": int(keep_g.sum())})
        frame_off += int(keep_f.sum())
        grain_off += int(keep_g.sum())

    groups = {"frames": _concat(parts["frames"], "frame"), "grains": _concat(parts["grains"], "grain")}
    if parts["outlines"]:
        groups["outlines"] = _concat(parts["outlines"], "vertex")
    if len(parts["thumbnails"]) == len(loaded):
        ny = max(t.sizes["thumb_y"] for t in parts["thumbnails"])
        nx = max(t.sizes["thumb_x"] for t in parts["thumbnails"])
        groups["thumbnails"] = _concat([_pad_thumbs(t, ny, nx) for t in parts["thumbnails"]], "frame")

    newest = loaded[rank[-1]]
    if params is None:
        sa = newest.get("summary", xr.Dataset()).attrs
        params = {}
        for key, attr in (("bootstrap", "bootstrap_resamples"), ("seed", "bootstrap_seed"),
                          ("confidence", "confidence"),
                          ("monodisperse_cov_pct", "monodisperse_cov_pct")):
            if attr in sa:
                params[key] = type(summary_step.STEP.defaults()[key])(sa[attr])
        if "edge_cut_included" in sa:
            params["include_edge_cut"] = bool(sa["edge_cut_included"])
        keys = {n[len("summary_by_"):] for g in loaded for n in g if n.startswith("summary_by_")}
        params["group_by"] = sorted(k for k in keys if k in groups["frames"])
    ok_frames = np.asarray([str(s) for s in groups["frames"]["status"].values]) != "failed" \
        if "status" in groups["frames"] else np.ones(groups["frames"].sizes["frame"], bool)
    gf = np.asarray(groups["grains"]["frame"].values, int)
    grains_ok = groups["grains"].isel(grain=np.flatnonzero(ok_frames[gf])) if gf.size else groups["grains"]
    groups.update(summary_step.summarise(grains_ok, groups["frames"], params))

    attrs = dict(newest["/"].attrs)
    runs = []
    for g in loaded:
        r = g["/"].attrs.get("runs", "[]")
        try:
            runs.extend(json.loads(r) if isinstance(r, str) else list(r or []))
        except ValueError:
            pass
    info = {"frames": frame_off, "grains": grain_off, "duplicates_dropped": dropped, "stores": per_store}
    runs.append({"kind": "aggregate", "time": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                 "inputs": [str(s) for s in stores], "duplicate_frames_dropped": dropped})
    attrs["runs"] = json.dumps(runs)
    attrs["aggregated_from"] = json.dumps(per_store)
    return groups, attrs, info


def _run(args) -> int:
    from grainhabit.results import write_results

    try:
        groups, attrs, info = aggregate(args.results)
        write_results(args.into, groups, attrs)
    except (ValueError, OSError, KeyError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"grainhabit aggregate: {exc}", file=sys.stderr)
        return 2
    print(f"wrote {args.into}: {info['frames']} frames, {info['grains']} grains from {len(args.results)} stores; "
          f"{info['duplicates_dropped']} duplicate frame(s) dropped (same content hash, newest run kept)")
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit aggregate``."""
    p = subparsers.add_parser("aggregate", help="merge several results stores into one",
                              description="Concatenate results stores, drop frames seen twice (same content "
                                          "hash; the newest run's copy is kept) and recompute the summary.")
    p.add_argument("results", nargs="+", help="results stores to merge")
    p.add_argument("--into", required=True, help="combined results store to write")
    p.set_defaults(handler=_run)
