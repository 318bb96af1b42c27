"""Step ``write-report`` and the ``grainhabit report RESULTS --out DIR`` command.

Writes one static page (``index.html``, inline CSS, no scripts, no external
addresses) with the figures as PNG files next to it, and the tables behind
them as CSV, Parquet and NetCDF. Figures are drawn with matplotlib's
object-oriented API on the Agg canvas, so nothing here touches pyplot's
global state.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import os
import re
import sys
from pathlib import Path

import numpy as np

from grainhabit import __version__, hookimpl
from grainhabit.lazy import lazy_module
from grainhabit.params import Param, StepInfo

from grainhabit.plugins.survey import statistics as st
from grainhabit.plugins.survey.results_tables import load_results, plain_dataset, text_values
from grainhabit.plugins.survey import summarise_samples as summary_step
from grainhabit.plugins.habit.vocabulary import HABIT_COLOURS, HABIT_LINES, HABIT_MARKERS

# imported on first use: dask workers load this plugin but never draw
xr = lazy_module("xarray")

GRAINHABIT_API = 1

STEP = StepInfo(
    name="write-report",
    stage="report",
    version="1.0",
    summary="Static HTML page with size, habit and alpha figures, a frame gallery, QC and data exports.",
    params=(
        Param("gallery_frames", int, 12, low=0, doc="Frames shown in the thumbnail gallery."),
        Param("bins", int, 30, low=5, high=200, doc="Histogram classes of the size and alpha plots."),
        Param("qc_rows", int, 300, low=10, doc="Rows of the per-frame QC table on the page (the CSV has all)."),
        Param("title", str, "", doc="Page title; the workflow name when empty."),
    ),
)


_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:1.5em auto;max-width:1200px;
color:#1d1d1d;line-height:1.4;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em} h2{border-bottom:2px solid #ccc;padding-bottom:.2em;margin-top:1.6em}
table{border-collapse:collapse;margin:.6em 0;font-size:.92em}
th,td{border:1px solid #bbb;padding:.25em .55em;text-align:right} th{background:#eee}
td.t,th.t{text-align:left}
.prov{background:#f4f4f4;border-left:4px solid #888;padding:.5em 1em;font-size:.9em}
.note{font-size:.88em;color:#444}
.verdict{font-weight:bold;padding:.15em .5em;border-radius:4px;white-space:nowrap}
.v-monodisperse{background:#d7ecff;color:#0b2f6b;border:2px solid #0b2f6b}
.v-polydisperse{background:#ffe3cc;color:#6b2a00;border:2px dashed #6b2a00}
.v-borderline{background:#f2f2f2;color:#333;border:2px dotted #333}
.v-nodata{background:#fff;color:#777;border:1px solid #aaa}
.cards{display:flex;flex-wrap:wrap;gap:.8em}
.card{border:1px solid #bbb;border-radius:6px;padding:.6em 1em;min-width:14em}
.card .big{font-size:1.3em}
.gallery{display:flex;flex-wrap:wrap;gap:.6em}
.gallery figure{margin:0;width:260px;font-size:.8em}
.gallery img{width:260px;height:auto;border:1px solid #999}
.swatch{display:inline-block;width:1.6em;height:.9em;vertical-align:middle;border:1px solid #333;margin-right:.3em}
.legend span.item{margin-right:1.2em;white-space:nowrap}
img.fig{max-width:100%;border:1px solid #ddd}
.failed{color:#8a1c00;font-weight:bold}
"""

_VERDICT_MARK = {"monodisperse": "\u2713", "polydisperse": "\u2717", "borderline": "~", "no data": "\u2013"}


# --------------------------------------------------------------------------
# reading
# --------------------------------------------------------------------------


def _root_info(groups: dict, path) -> dict:
    attrs = dict(groups.get("/", xr.Dataset()).attrs)
    info = {"path": str(path), "workflow_text": str(attrs.get("workflow", "") or ""),
            "workflow_hash": str(attrs.get("workflow_hash", "") or ""), "name": "", "runs": [], "versions": {},
            "data_note": str(attrs.get("data_note", "") or "")}
    try:
        import yaml

        wf = yaml.safe_load(info["workflow_text"]) if info["workflow_text"] else None
        if isinstance(wf, dict):
            info["name"] = str(wf.get("name", "") or "")
    except Exception:  # a workflow text we cannot parse still gets shown as text
        pass
    for key in ("runs", "versions"):
        val = attrs.get(key)
        if isinstance(val, str):
            try:
                val = json.loads(val)
            except ValueError:
                val = None
        if val is not None:
            info[key] = val
    return info


def _slug(name: str) -> str:
    s = re.sub(r"[^A-Za-z0-9_.-]+", "_", str(name)).strip("._") or "x"
    return s[:60]


def _included(grains: xr.Dataset, attrs: dict) -> np.ndarray:
    n = grains.sizes.get("grain", 0)
    edge = np.asarray(grains["edge_cut"].values, bool) if "edge_cut" in grains else np.zeros(n, bool)
    ecd = np.asarray(grains["ecd_nm"].values, float) if "ecd_nm" in grains else np.full(n, np.nan)
    keep = np.isfinite(ecd) & (ecd > 0)
    if not attrs.get("edge_cut_included", 0):
        keep &= ~edge
    return keep


# --------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------


def _figure(**kwargs):
    """A new matplotlib ``Figure`` on the Agg canvas (pyplot's global state untouched)."""
    from matplotlib.figure import Figure

    return Figure(**kwargs)


def _save(fig, out: Path, name: str, written: list, dpi: int = 100) -> str:
    path = out / name
    fig.savefig(path, dpi=dpi)
    written.append(str(path))
    return name


def _fmt(v, nd=1) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return html.escape(str(v))
    return "&ndash;" if not np.isfinite(v) else f"{v:.{nd}f}"


def _size_figure(ecd, row, sample, bins, out, written) -> str:
    fig = _figure(figsize=(6.0, 3.6))
    ax = fig.subplots()
    if ecd.size:
        lo, hi = np.percentile(ecd, [0.5, 99.5])
        edges = np.linspace(max(lo * 0.85, 0), hi * 1.15, bins + 1)
        ax.hist(ecd, bins=edges, color="#9db3c9", edgecolor="#2d4159", label=f"grains (n = {ecd.size})")
        gm, gsd = float(row["ecd_geo_mean_nm"]), float(row["ecd_geo_sd"])
        if np.isfinite(gm) and np.isfinite(gsd) and gsd > 1:
            grid = np.linspace(edges[0] if edges[0] > 0 else edges[1] * 0.5, edges[-1], 300)
            ax.plot(grid, st.lognormal_pdf(grid, gm, gsd) * ecd.size * np.diff(edges)[0], color="#b03a00", lw=2,
                    label=f"lognormal fit: x_g = {gm:.0f} nm, \u03c3_g = {gsd:.3f}")
        for key, ls in (("ecd_d10_nm", ":"), ("ecd_d50_nm", "-"), ("ecd_d90_nm", ":")):
            v = float(row[key])
            if np.isfinite(v):
                ax.axvline(v, color="#222", ls=ls, lw=1)
        ax.legend(fontsize=8, loc="upper right")
    else:
        ax.text(0.5, 0.5, "no grains counted", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("ECD (nm)")
    ax.set_ylabel("grains per class")
    ax.set_title(f"{sample}: COV {_fmt(row['ecd_cov_pct'])} %, number-based D10 / D50 / D90 dotted / solid",
                 fontsize=9)
    fig.tight_layout()
    return _save(fig, out, f"size_{_slug(sample)}.png", written)


def _habit_figure(summ: xr.Dataset, out, written) -> str:
    samples = [str(s) for s in summ["sample"].values]
    habits = [str(h) for h in summ["habit"].values]
    fig = _figure(figsize=(max(6.0, 1.3 * len(samples) + 3), 6.4), layout="constrained")
    axes = fig.subplots(2, 1, sharex=True)
    width = 0.8 / len(habits)
    x = np.arange(len(samples))
    for ax, var, label in ((axes[0], "habit_number_fraction", "fraction by number"),
                           (axes[1], "habit_area_fraction", "fraction by projected area")):
        val = np.asarray(summ[var].values, float)
        lo = np.asarray(summ[var + "_ci_lo"].values, float) if var + "_ci_lo" in summ else np.full_like(val, np.nan)
        hi = np.asarray(summ[var + "_ci_hi"].values, float) if var + "_ci_hi" in summ else np.full_like(val, np.nan)
        for j, h in enumerate(habits):
            v = np.nan_to_num(val[:, j])
            err = np.vstack([np.nan_to_num(v - lo[:, j]), np.nan_to_num(hi[:, j] - v)]).clip(min=0)
            ax.bar(x - 0.4 + (j + 0.5) * width, v, width, color=HABIT_COLOURS.get(h, "#888"),
                   edgecolor="#222", linewidth=0.5, yerr=err, capsize=2, ecolor="#444",
                   error_kw={"elinewidth": 0.8}, label=h if ax is axes[0] else None)
        ax.set_ylabel(label)
        ax.set_ylim(0, 1.05)
        ax.grid(axis="y", alpha=0.3)
    axes[1].set_xticks(x, samples, rotation=20 if len(samples) > 4 else 0)
    fig.legend(fontsize=8, ncol=4, loc="outside upper center")
    return _save(fig, out, "habits.png", written)


_SAMPLE_STYLES = [("#1a2a6e", "-"), ("#d9541a", "--"), ("#5a7878", "-."), ("#a66ee8", ":"),
                  ("#5a1a1a", "-"), ("#3b8bb5", "--"), ("#8a7a00", "-.")]


def _alpha_figure(grains, keep, samples, bins, out, written) -> str:
    fig = _figure(figsize=(6.4, 3.6))
    ax = fig.subplots()
    alpha = np.asarray(grains["alpha"].values, float) if "alpha" in grains else np.full(keep.size, np.nan)
    gs = text_values(grains["sample"].values) if "sample" in grains else np.full(keep.size, "", object)
    fin = alpha[keep & np.isfinite(alpha)]
    if fin.size:
        edges = np.linspace(min(0.0, fin.min()), max(4.0, fin.max()), bins + 1)
        for i, s in enumerate(samples):
            a = alpha[keep & np.isfinite(alpha) & (gs == s)]
            if a.size:
                c, ls = _SAMPLE_STYLES[i % len(_SAMPLE_STYLES)]
                ax.hist(a, bins=edges, histtype="step", color=c, ls=ls, lw=1.8, label=f"{s} (n = {a.size})")
        for v, t in ((1.0, "cube"), (3.0, "octahedron")):
            ax.axvline(v, color="#777", lw=0.8)
            ax.text(v, 0.98, f" {t}", transform=ax.get_xaxis_transform(), fontsize=7, va="top", color="#555")
        ax.legend(fontsize=7)
    else:
        ax.text(0.5, 0.5, "no grain has a determined alpha", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("\u03b1 = \u221a3 v100 / v111")
    ax.set_ylabel("grains per class")
    fig.tight_layout()
    return _save(fig, out, "alpha.png", written)


def _scatter_figure(grains, keep, out, written) -> str:
    fig = _figure(figsize=(6.4, 4.0))
    ax = fig.subplots()
    alpha = np.asarray(grains["alpha"].values, float) if "alpha" in grains else np.full(keep.size, np.nan)
    ecd = np.asarray(grains["ecd_nm"].values, float)
    hab = text_values(grains["habit"].values) if "habit" in grains else np.full(keep.size, "", object)
    use = keep & np.isfinite(alpha)
    for h in st.HABITS:
        m = use & (hab == h)
        if m.any():
            ax.scatter(ecd[m], alpha[m], s=14, marker=HABIT_MARKERS[h], color=HABIT_COLOURS[h],
                       edgecolors="#222" if HABIT_MARKERS[h] not in "|x" else None, linewidths=0.4,
                       label=f"{h} ({int(m.sum())})")
    if use.any():
        ax.legend(fontsize=7, loc="best")
    else:
        ax.text(0.5, 0.5, "no grain has a determined alpha", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("ECD (nm)")
    ax.set_ylabel("\u03b1")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return _save(fig, out, "ecd_alpha.png", written)


def _trend_source(groups: dict, grains, frames) -> tuple[str, xr.Dataset] | None:
    """A grouped summary with more than one group: stored, else computed from a frame field."""
    for name in sorted(groups):
        if name.startswith("summary_by_"):
            key = name[len("summary_by_"):]
            ds = groups[name]
            if key in ds.dims and ds.sizes[key] > 1:
                return key, ds
    for key in ("batch", "date", "lot", "run"):
        if key in frames and len(set(text_values(frames[key].values))) > 1:
            params = summary_step.STEP.resolve({"bootstrap": 300})
            return key, summary_step.summarise_by(grains, frames, key, params)
    return None


def _trend_figure(key, ds, out, written) -> str:
    labels = [str(v) for v in ds[key].values]
    x = np.arange(len(labels))
    fig = _figure(figsize=(max(6.0, 0.8 * len(labels) + 3), 6.4))
    axes = fig.subplots(3, 1, sharex=True)
    for ax, var, lab in ((axes[0], "ecd_d50_nm", "number-based D50 (nm)"), (axes[1], "ecd_cov_pct", "size COV (%)")):
        v = np.asarray(ds[var].values, float)
        lo = np.asarray(ds[var + "_ci_lo"].values, float)
        hi = np.asarray(ds[var + "_ci_hi"].values, float)
        ax.errorbar(x, v, yerr=np.vstack([np.nan_to_num(v - lo), np.nan_to_num(hi - v)]).clip(min=0),
                    color="#1a2a6e", marker="o", capsize=3)
        ax.set_ylabel(lab, fontsize=8)
        ax.grid(alpha=0.3)
    thr = float(ds.attrs.get("monodisperse_cov_pct", st.MONODISPERSE_COV_PCT))
    axes[1].axhline(thr, color="#d9541a", ls="--", lw=1)
    axes[1].text(0, thr, f" monodispersity threshold {thr:g} %", fontsize=7, va="bottom", color="#6b2a00")
    nf = np.asarray(ds["habit_number_fraction"].values, float)
    for j, h in enumerate(str(v) for v in ds["habit"].values):
        if np.nan_to_num(nf[:, j]).max() > 0:
            axes[2].plot(x, nf[:, j], color=HABIT_COLOURS.get(h, "#888"), ls=HABIT_LINES.get(h, "-"),
                         marker=HABIT_MARKERS.get(h, "o"), label=h, markeredgecolor="#222")
    axes[2].set_ylabel("fraction by number", fontsize=8)
    axes[2].set_ylim(0, 1.02)
    axes[2].legend(fontsize=7, ncol=4)
    axes[2].set_xticks(x, labels, rotation=20 if len(labels) > 5 else 0)
    axes[2].set_xlabel(key)
    fig.tight_layout()
    return _save(fig, out, "trend.png", written)


def _pick_frames(frames, n) -> list[int]:
    status = text_values(frames["status"].values) if "status" in frames else np.full(frames.sizes["frame"], "ok", object)
    samples = text_values(frames["sample"].values) if "sample" in frames else np.full(status.size, "", object)
    ok = [i for i in range(status.size) if status[i] == "ok"]
    by_sample: dict[str, list[int]] = {}
    for i in ok:
        by_sample.setdefault(samples[i], []).append(i)
    picked: list[int] = []
    while len(picked) < min(n, len(ok)):  # round-robin over samples
        for s in sorted(by_sample):
            if by_sample[s] and len(picked) < n:
                picked.append(by_sample[s].pop(0))
    return sorted(picked)


def _gallery(groups, grains, frames, n, out, written) -> list[tuple[str, int, str]]:
    thumbs = groups.get("thumbnails")
    if thumbs is None or "image" not in thumbs or n == 0:
        return []
    outlines = groups.get("outlines")
    gf = np.asarray(grains["frame"].values, int) if "frame" in grains else np.zeros(0, int)
    hab = text_values(grains["habit"].values) if "habit" in grains else np.full(gf.size, "", object)
    edge = np.asarray(grains["edge_cut"].values, bool) if "edge_cut" in grains else np.zeros(gf.size, bool)
    if outlines is not None and outlines.sizes.get("vertex", 0):
        vg = np.asarray(outlines["grain"].values, int)
        vx = np.asarray(outlines["x_nm"].values, float)
        vy = np.asarray(outlines["y_nm"].values, float)
        order = np.argsort(vg, kind="stable")
        vg, vx, vy = vg[order], vx[order], vy[order]
        starts = np.searchsorted(vg, np.arange(gf.size))
        ends = np.searchsorted(vg, np.arange(gf.size), side="right")
    else:
        starts = ends = np.zeros(gf.size, int)
        vx = vy = np.zeros(0)
    shown = []
    sources = text_values(frames["source"].values) if "source" in frames else None
    for f in _pick_frames(frames, n):
        if f >= thumbs.sizes.get("frame", 0):
            continue
        img = np.asarray(thumbs["image"].isel(frame=f).values)
        rows = int(thumbs["thumb_rows"].values[f]) if "thumb_rows" in thumbs else img.shape[0]
        cols = int(thumbs["thumb_cols"].values[f]) if "thumb_cols" in thumbs else img.shape[1]
        scale = float(thumbs["scale_nm"].values[f])
        img = img[:rows, :cols]
        fig = _figure(figsize=(2.6, 2.6 * rows / max(cols, 1)))
        ax = fig.add_axes([0, 0, 1, 1])
        ax.imshow(img, cmap="gray", vmin=0, vmax=255, interpolation="nearest", extent=(0, cols, rows, 0))
        from matplotlib import patheffects

        halo = [patheffects.Stroke(linewidth=2.6, foreground="white"), patheffects.Normal()]
        for g in np.flatnonzero(gf == f):
            if ends[g] - starts[g] < 2:
                continue
            xs = np.r_[vx[starts[g]:ends[g]], vx[starts[g]]] / scale
            ys = np.r_[vy[starts[g]:ends[g]], vy[starts[g]]] / scale
            h = hab[g]
            ax.plot(xs, ys, color=HABIT_COLOURS.get(h, "#ff00ff"), ls=HABIT_LINES.get(h, "-"),
                    lw=1.3 if not edge[g] else 0.8, path_effects=halo)
        ax.set_xlim(0, cols)
        ax.set_ylim(rows, 0)
        ax.axis("off")
        name = _save(fig, out, f"frame_{f:05d}.png", written, dpi=150)
        shown.append((name, f, str(sources[f]) if sources is not None else str(f)))
    return shown


# --------------------------------------------------------------------------
# exports
# --------------------------------------------------------------------------


def _table(ds: xr.Dataset, dim: str):
    import pandas as pd

    cols = {}
    for name, var in ds.variables.items():
        if var.dims == (dim,):
            vals = var.values
            cols[name] = list(text_values(vals)) if vals.dtype.kind in ("U", "S", "O", "T") else vals
    return pd.DataFrame(cols)


def _habit_table(ds: xr.Dataset, dim: str):
    import pandas as pd

    names = [n for n, v in ds.data_vars.items() if v.dims == (dim, "habit")]
    rows = []
    for i, s in enumerate(text_values(ds[dim].values)):
        for j, h in enumerate(text_values(ds["habit"].values)):
            rows.append({dim: s, "habit": h, **{n: ds[n].values[i, j] for n in names}})
    return pd.DataFrame(rows)


def _exports(groups, out: Path, written: list) -> list[tuple[str, str]]:
    files = []

    def put(df, name, what):
        p = out / name
        if name.endswith(".csv"):
            df.to_csv(p, index=False)
        else:
            df.to_parquet(p, index=False)
        written.append(str(p))
        files.append((name, what))

    put(_table(groups["grains"], "grain"), "grains.csv", "every grain, every measured column")
    put(_table(groups["grains"], "grain"), "grains.parquet", "the same, Parquet")
    put(_table(groups["frames"], "frame"), "frames.csv", "every frame with status, error and calibration")
    for name in sorted(g for g in groups if g == "summary" or g.startswith("summary_by_")):
        ds = groups[name]
        dim = "sample" if name == "summary" else name[len("summary_by_"):]
        if dim not in ds.dims:
            continue
        put(_table(ds, dim), f"{name}.csv", f"per-{dim} statistics")
        put(_table(ds, dim), f"{name}.parquet", "the same, Parquet")
        put(_habit_table(ds, dim), f"{name}_habits.csv", f"per-{dim} and habit counts, fractions and CIs")
        put(_habit_table(ds, dim), f"{name}_habits.parquet", "the same, Parquet")
    for name in ("grains", "frames", "summary") + tuple(sorted(g for g in groups if g.startswith("summary_by_"))):
        if name in groups:
            p = out / f"{name}.nc"
            plain_dataset(groups[name]).to_netcdf(p, engine="scipy")
            written.append(str(p))
            files.append((p.name, f"the {name} dataset, NetCDF 3"))
    return files


# --------------------------------------------------------------------------
# the page
# --------------------------------------------------------------------------


def _verdict_html(v: str) -> str:
    cls = "v-" + v.replace(" ", "")
    return f'<span class="verdict {cls}">{_VERDICT_MARK.get(v, "")} {html.escape(v)}</span>'


def _ci(ds, var, i, nd=1) -> str:
    lo, hi = var + "_ci_lo", var + "_ci_hi"
    if lo in ds and hi in ds and np.isfinite(float(ds[lo].values[i])):
        return f"{_fmt(ds[var].values[i], nd)} <span class='note'>[{_fmt(ds[lo].values[i], nd)}, " \
               f"{_fmt(ds[hi].values[i], nd)}]</span>"
    return _fmt(ds[var].values[i], nd)


def _qc(grains, frames, max_rows, out, written):
    import pandas as pd

    n_f = frames.sizes.get("frame", 0)
    gf = np.asarray(grains["frame"].values, int) if "frame" in grains else np.zeros(0, int)
    edge = np.asarray(grains["edge_cut"].values, bool) if "edge_cut" in grains else np.zeros(gf.size, bool)
    per = np.bincount(gf, minlength=n_f)[:n_f] if gf.size else np.zeros(n_f, int)
    per_edge = np.bincount(gf, weights=edge, minlength=n_f)[:n_f] if gf.size else np.zeros(n_f)
    col = {k: (text_values(frames[k].values) if k in frames else np.full(n_f, "", object))
           for k in ("source", "sample", "status", "error", "calibration")}
    px = np.asarray(frames["pixel_size_nm"].values, float) if "pixel_size_nm" in frames else np.full(n_f, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(per > 0, per_edge / np.maximum(per, 1), np.nan)
    df = pd.DataFrame({"frame": np.arange(n_f), "source": col["source"], "sample": col["sample"],
                       "status": col["status"], "error": col["error"], "grains": per,
                       "edge_cut_grains": per_edge.astype(int), "edge_cut_fraction": frac,
                       "pixel_size_nm": px, "calibration": col["calibration"]})
    p = out / "qc_frames.csv"
    df.to_csv(p, index=False)
    written.append(str(p))
    failed = df[df.status == "failed"]
    parts = [f"<p>{n_f} frames, <span class='{'failed' if len(failed) else ''}'>{len(failed)} failed</span>; "
             f"{int(per.sum())} grains in all, {int(per_edge.sum())} touching a frame border "
             f"({_fmt(100 * per_edge.sum() / max(per.sum(), 1))} %). Full table: "
             f"<a href='qc_frames.csv'>qc_frames.csv</a>.</p>"]
    if len(failed):
        parts.append("<h3>Failed frames</h3><table><tr><th>frame</th><th class='t'>source</th>"
                     "<th class='t'>sample</th><th class='t'>reason</th></tr>")
        for r in failed.itertuples():
            parts.append(f"<tr><td>{r.frame}</td><td class='t'>{html.escape(r.source)}</td>"
                         f"<td class='t'>{html.escape(r.sample)}</td><td class='t'>{html.escape(r.error)}</td></tr>")
        parts.append("</table>")
    parts.append("<h3>Grains per frame</h3><table><tr><th>frame</th><th class='t'>source</th><th class='t'>sample"
                 "</th><th class='t'>status</th><th>grains</th><th>edge-cut fraction</th><th>pixel (nm)</th>"
                 "<th class='t'>calibration</th></tr>")
    for r in df.head(max_rows).itertuples():
        parts.append(f"<tr><td>{r.frame}</td><td class='t'>{html.escape(r.source)}</td><td class='t'>"
                     f"{html.escape(r.sample)}</td><td class='t'>{html.escape(r.status)}</td><td>{r.grains}</td>"
                     f"<td>{_fmt(r.edge_cut_fraction, 2)}</td><td>{_fmt(r.pixel_size_nm, 3)}</td>"
                     f"<td class='t'>{html.escape(r.calibration)}</td></tr>")
    parts.append("</table>")
    if len(df) > max_rows:
        parts.append(f"<p class='note'>First {max_rows} of {len(df)} frames shown.</p>")
    return "\n".join(parts)


def write_report(results: str | os.PathLike, out_dir: str | os.PathLike, params: dict | None = None) -> list[str]:
    """Write the report of a results store into ``out_dir``.

    Parameters
    ----------
    results : path-like
        Results store.
    out_dir : path-like
        Folder for ``index.html``, the PNGs and the exports (created).
    params : dict, optional
        Parameters of :data:`STEP`.

    Returns
    -------
    list of str
        Paths written, ``index.html`` first.

    Raises
    ------
    ValueError
        If ``results`` is not a results store.
    """
    params = STEP.resolve(params)
    groups = load_results(results)
    info = _root_info(groups, results)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    grains, frames = groups["grains"], groups["frames"]
    if "summary" not in groups or "sample" not in groups["summary"].dims:
        groups.update(summary_step.summarise(grains, frames, {}))
    summ = groups["summary"]
    written: list[str] = []
    keep = _included(grains, summ.attrs)
    samples = [str(s) for s in summ["sample"].values]
    gs = text_values(grains["sample"].values) if "sample" in grains else np.full(keep.size, "", object)
    ecd_all = np.asarray(grains["ecd_nm"].values, float) if "ecd_nm" in grains else np.full(keep.size, np.nan)
    title = params["title"] or (f"Grain survey: {info['name']}" if info["name"] else "Grain survey")
    thr = float(summ.attrs.get("monodisperse_cov_pct", st.MONODISPERSE_COV_PCT))
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")

    body = [f"<h1>{html.escape(title)}</h1>"]
    prov = [f"<b>Data:</b> results store <code>{html.escape(str(Path(results).resolve()))}</code>",
            f"<b>Workflow:</b> {html.escape(info['name'] or '(unnamed)')}"
            + (f" <span class='note'>(hash {html.escape(info['workflow_hash'][:16])})</span>"
               if info["workflow_hash"] else "")]
    runs = info["runs"] if isinstance(info["runs"], list) else []
    if runs:
        last = runs[-1] if isinstance(runs[-1], dict) else {}
        when = next((str(last[k]) for k in ("finished", "ended", "started", "time") if k in last), "")
        prov.append(f"<b>Runs recorded:</b> {len(runs)}" + (f", last {html.escape(when)}" if when else ""))
    prov.append(f"<b>Page written:</b> {now} by grainhabit {html.escape(__version__)}")
    if info["data_note"]:
        prov.append(f"<b>Note on the data:</b> {html.escape(info['data_note'])}")
    elif "demo" in (info["name"] + info["workflow_text"][:2000]).lower():
        prov.append("<b>Note on the data:</b> this workflow is a demo; its frames are invented, not measurements.")
    body.append("<div class='prov'>" + "<br>".join(prov) + "</div>")

    # verdicts first
    body.append("<h2>Verdict per sample</h2><div class='cards'>")
    for i, s in enumerate(samples):
        v = str(summ["monodispersity"].values[i]) if "monodispersity" in summ else "no data"
        body.append(f"<div class='card'><div class='big'>{html.escape(s)}</div>{_verdict_html(v)}"
                    f"<div>COV {_ci(summ, 'ecd_cov_pct', i)} %</div>"
                    f"<div>D50 {_ci(summ, 'ecd_d50_nm', i, 0)} nm</div>"
                    f"<div class='note'>{int(summ['grain_count'].values[i])} grains</div></div>")
    body.append("</div>")
    conf = float(summ.attrs.get("confidence", 0.95))
    body.append(
        f"<p class='note'>Monodisperse: size COV at or below {thr:g} % (a threshold of common practice, from "
        f"memory; labs set their own). Borderline: the {100 * conf:g} % bootstrap interval of the COV "
        f"({html.escape(str(summ.attrs.get('bootstrap_method', '')))}, {summ.attrs.get('bootstrap_resamples', '?')} "
        f"resamples) straddles the threshold. Grains touching a frame border are "
        f"{'included' if summ.attrs.get('edge_cut_included', 0) else 'left out'}.</p>")

    body.append("<h2>Size statistics</h2><table><tr><th class='t'>sample</th><th>grains</th><th>mean ECD (nm)</th>"
                "<th>sd (nm)</th><th>COV (%)</th><th>D10 (nm)</th><th>D50 (nm)</th><th>D90 (nm)</th>"
                "<th>D[3,2] (nm)</th><th>D[4,3] (nm)</th><th>x<sub>g</sub> (nm)</th><th>&sigma;<sub>g</sub></th>"
                "<th>D50 by volume (nm)</th></tr>")
    for i, s in enumerate(samples):
        g = lambda v, nd=1: _fmt(summ[v].values[i], nd) if v in summ else "&ndash;"  # noqa: E731
        body.append(f"<tr><td class='t'>{html.escape(s)}</td><td>{int(summ['grain_count'].values[i])}</td>"
                    f"<td>{g('ecd_mean_nm')}</td><td>{g('ecd_sd_nm')}</td><td>{_ci(summ, 'ecd_cov_pct', i)}</td>"
                    f"<td>{g('ecd_d10_nm')}</td><td>{_ci(summ, 'ecd_d50_nm', i)}</td><td>{g('ecd_d90_nm')}</td>"
                    f"<td>{g('sauter_d32_nm')}</td><td>{g('de_brouckere_d43_nm')}</td><td>{g('ecd_geo_mean_nm')}</td>"
                    f"<td>{g('ecd_geo_sd', 3)}</td><td>{g('ecd_d50_volume_nm')}</td></tr>")
    body.append("</table><p class='note'>D10, D50 and D90 are number-based (ISO 9276-1, r = 0); the volume-based "
                "median (r = 3) and the ISO 9276-2 moment means D[3,2] (Sauter) and D[4,3] (De Brouckere) weight "
                "large grains more. x<sub>g</sub> and &sigma;<sub>g</sub> are the lognormal fit. Brackets: "
                f"{100 * conf:g} % bootstrap intervals.</p>")
    for i, s in enumerate(samples):
        sel = keep & (gs == s)
        name = _size_figure(ecd_all[sel], summ.isel(sample=i), s, params["bins"], out, written)
        body.append(f"<img class='fig' src='{html.escape(name)}' alt='ECD histogram of {html.escape(s)}'>")

    body.append("<h2>Habits</h2>")
    body.append(f"<img class='fig' src='{_habit_figure(summ, out, written)}' alt='habit fractions'>")
    body.append("<table><tr><th class='t'>sample</th>" + "".join(
        f"<th>{html.escape(str(h))}</th>" for h in summ["habit"].values) + "</tr>")
    for i, s in enumerate(samples):
        body.append(f"<tr><td class='t'>{html.escape(s)}</td>" + "".join(
            f"<td>{_fmt(100 * summ['habit_number_fraction'].values[i, j])} / "
            f"{_fmt(100 * summ['habit_area_fraction'].values[i, j])}</td>" for j in range(summ.sizes["habit"]))
            + "</tr>")
    body.append("</table><p class='note'>Percent by number / by projected area.</p>")

    body.append("<h2>Growth-rate parameter &alpha;</h2>")
    body.append("<table><tr><th class='t'>sample</th><th>grains with &alpha;</th><th>median &alpha;</th>"
                "<th>IQR</th><th>mean tabular aspect ratio</th></tr>")
    for i, s in enumerate(samples):
        body.append(f"<tr><td class='t'>{html.escape(s)}</td><td>{int(summ['alpha_count'].values[i])}</td>"
                    f"<td>{_ci(summ, 'alpha_median', i, 2)}</td><td>{_fmt(summ['alpha_iqr'].values[i], 2)}</td>"
                    f"<td>{_fmt(summ['tabular_aspect_ratio_mean'].values[i], 1)}</td></tr>")
    body.append("</table>")
    body.append(f"<img class='fig' src='{_alpha_figure(grains, keep, samples, params['bins'], out, written)}' "
                "alt='alpha distribution'>")
    body.append(f"<img class='fig' src='{_scatter_figure(grains, keep, out, written)}' alt='ECD against alpha'>")
    body.append("<p class='note'>&alpha; = &radic;3 v<sub>100</sub> / v<sub>111</sub>: 1 or less gives a cube, "
                "3 or more an octahedron, cuboctahedra between.</p>")

    trend = _trend_source(groups, grains, frames)
    if trend is not None:
        key, ds = trend
        body.append(f"<h2>Trend across {html.escape(key)}</h2>")
        body.append(f"<img class='fig' src='{_trend_figure(key, ds, out, written)}' alt='trend across {key}'>")

    shown = _gallery(groups, grains, frames, params["gallery_frames"], out, written)
    if shown:
        body.append("<h2>Frames</h2><p class='legend'>" + "".join(
            f"<span class='item'><span class='swatch' style='background:{HABIT_COLOURS[h]}'></span>"
            f"{h} <span class='note'>({ {'-': 'solid', '--': 'dashed', '-.': 'dash-dot', ':': 'dotted'}[HABIT_LINES[h]]})"
            f"</span></span>" for h in st.HABITS) + "</p>")
        body.append("<p class='note'>Outlines coloured by habit; thin outlines touch the frame border (left out of "
                    "the statistics).</p><div class='gallery'>")
        fs = text_values(frames["sample"].values) if "sample" in frames else None
        for name, f, src in shown:
            n = int((np.asarray(grains["frame"].values) == f).sum()) if "frame" in grains else 0
            cap = f"{html.escape(src)}<br>{html.escape(str(fs[f])) if fs is not None else ''}, {n} grains"
            body.append(f"<figure><img src='{name}' alt='frame {f}'><figcaption>{cap}</figcaption></figure>")
        body.append("</div>")

    body.append("<h2>Quality control</h2>")
    body.append(_qc(grains, frames, params["qc_rows"], out, written))

    files = _exports(groups, out, written)
    body.append("<h2>Data files</h2><ul>" + "".join(
        f"<li><a href='{html.escape(n)}'>{html.escape(n)}</a> &ndash; {html.escape(w)}</li>" for n, w in files)
        + "<li><a href='qc_frames.csv'>qc_frames.csv</a> &ndash; per-frame QC table</li></ul>")
    if info["workflow_text"]:
        body.append("<h2>Workflow</h2><pre>" + html.escape(info["workflow_text"]) + "</pre>")
    body.append("<p class='note'>This page describes grains; it gives no precipitation advice. Any change to "
                "precipitation conditions (silver nitrate, halide solutions) follows your site's chemical "
                "safety rules and data sheets.</p>")

    page = ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body>\n"
            + "\n".join(body) + "\n</body></html>\n")
    index = out / "index.html"
    index.write_text(page, encoding="utf-8")
    return [str(index)] + written


@hookimpl
def grainhabit_report(results, out_dir, params):
    """Write the HTML report; see :func:`write_report`."""
    return write_report(results, out_dir, params)


def _run(args) -> int:
    try:
        files = write_report(args.results, args.out, {"gallery_frames": args.gallery})
    except (ValueError, OSError, KeyError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"grainhabit report: {exc}", file=sys.stderr)
        return 2
    print(f"wrote {files[0]} and {len(files) - 1} more files")
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit report RESULTS --out DIR``."""
    p = subparsers.add_parser("report", help="write an HTML report of a results store",
                              description="Write a static HTML page, figures and data exports of a results store.")
    p.add_argument("results", help="results store (.zarr)")
    p.add_argument("--out", required=True, help="folder to write the report into")
    p.add_argument("--gallery", type=int, default=12, help="frames in the thumbnail gallery (default 12)")
    p.set_defaults(handler=_run)
