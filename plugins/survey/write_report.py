"""Step ``write-report`` and the ``grainhabit report RESULTS --out DIR`` command.

Writes the morning report as ONE self-contained HTML file (``index.html``:
inline CSS with a print stylesheet, every figure embedded as a ``data:``
URI, no scripts, no external addresses), so it can be attached to an
e-mail or printed. The page opens with what decides:

1. the batch verdicts against the product specs (``verdicts`` group),
2. failed and untrusted frames,
3. per product: control charts of its spec'd statistics across nights
   (``trends`` group) and its batches' size distributions on one axis,
4. then the detail: statistics tables, habits, alpha, a gallery of frames
   with every grain numbered as in the ``grains`` table, all frames, the
   spec and workflow texts.

The tables behind the page are written beside it in ``data/`` (CSV,
Parquet, NetCDF), for people who want the numbers; the page does not need
them. Figures are drawn by :mod:`grainhabit.plugins.survey.figures`.
"""

from __future__ import annotations

import datetime as _dt
import html
import json
import math
import os
import sys
from pathlib import Path

import numpy as np

from grainhabit import __version__, hookimpl
from grainhabit.lazy import lazy_module
from grainhabit.params import Param, StepInfo
from grainhabit.plugins.habit.vocabulary import HABIT_COLOURS, HABIT_LINES, HABITS
from grainhabit.plugins.survey import figures
from grainhabit.plugins.survey import summarise_samples as summary_step
from grainhabit.plugins.survey.control_charts import RULES, RULES_NAME
from grainhabit.plugins.survey.results_tables import load_results, plain_dataset, text_values
from grainhabit.plugins.survey.specs import EXACT_VARIABLES

# imported on first use: dask workers load this plugin but never draw
xr = lazy_module("xarray")

GRAINHABIT_API = 1

__all__ = ["STEP", "write_report", "load_results"]

STEP = StepInfo(
    name="write-report",
    stage="report",
    version="2.0",
    summary="One self-contained HTML page: batch verdicts, failed frames, per-product control charts, detail.",
    params=(
        Param("gallery_frames", int, 8, low=0, doc="Frames shown in the gallery, worst batches first."),
        Param("bins", int, 30, low=5, high=200, doc="Histogram classes of the size plots."),
        Param("qc_rows", int, 300, low=10, doc="Rows of the all-frames table on the page (data/frames.csv has all)."),
        Param("title", str, "", doc="Page title; the workflow name when empty."),
        Param("data_files", bool, True, doc="Write the tables (CSV, Parquet, NetCDF) into data/ beside the page."),
    ),
)

#: Frames whose grains touch the border this often are listed as untrusted.
UNTRUSTED_EDGE_FRACTION = 0.5

CAUTION = (
    "Verdicts and trend flags describe the grains that were measured; they are not instructions to change a "
    "process. Any change to precipitation conditions (silver nitrate, halide solutions, temperature, pAg, "
    "additions) is decided by qualified staff under your site's chemical-safety rules, the safety data sheets, "
    "local regulations and licensed practice."
)

_CSS = """
:root{--ink:#1d1d1d;--line:#bbb}
*{box-sizing:border-box}
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:1em auto;max-width:1180px;
color:var(--ink);line-height:1.4;padding:0 1em}
h1{font-size:1.5em;margin:.2em 0} h2{border-bottom:2px solid #ccc;padding-bottom:.2em;margin-top:1.5em}
h3{margin:1.1em 0 .3em}
.scroll{overflow-x:auto;max-width:100%}
table{border-collapse:collapse;margin:.5em 0;font-size:.9em}
th,td{border:1px solid var(--line);padding:.25em .5em;text-align:right;vertical-align:top}
th{background:#eee} td.t,th.t{text-align:left}
td.wrap{min-width:14em;white-space:normal} td.nw{white-space:nowrap}
.prov{background:#f4f4f4;border-left:4px solid #888;padding:.4em .9em;font-size:.9em}
.caution{background:#fff8e0;border:1px solid #b08900;border-left:6px solid #b08900;padding:.4em .9em;font-size:.9em}
.note{font-size:.86em;color:#444} span.when{white-space:nowrap}
.v{display:inline-block;font-weight:bold;padding:.05em .45em;border-radius:3px;white-space:nowrap;letter-spacing:.02em}
.v-pass{background:#d8f0d8;color:#0b3d0b;border:2px solid #0b3d0b}
.v-fail{background:#8c0a1a;color:#fff;border:2px solid #3d0008}
.v-undecided{background:#fff;color:#5c4400;border:2px dashed #5c4400}
.v-none{background:#fff;color:#666;border:1px dotted #888;font-weight:normal}
td.c-fail{background:#f7dadd} td.c-undecided{background:#fdf6e3}
.figure{max-width:100%;height:auto;border:1px solid #ddd;display:block;margin:.4em 0}
.gallery{display:grid;grid-template-columns:repeat(auto-fill,minmax(min(100%,440px),1fr));gap:1em}
.gallery figure{margin:0}
.gallery img{width:100%;height:auto;border:1px solid #999;cursor:zoom-in;display:block}
.gallery figcaption{font-size:.82em;word-break:break-all}
.gallery figure:target{position:fixed;inset:0;z-index:10;background:#111;margin:0;padding:.8em;
overflow:auto;color:#eee;text-align:center}
.gallery figure:target img{width:auto;max-width:100%;height:calc(100vh - 5em);max-height:none;margin:0 auto;
object-fit:contain;cursor:zoom-out}
.gallery a.close{display:none} .gallery figure:target a.close{display:inline;color:#fff}
.swatch{display:inline-block;width:1.6em;height:.9em;vertical-align:middle;border:1px solid #333;margin-right:.3em}
.legend span.item{margin-right:1.1em;white-space:nowrap;display:inline-block}
.failed{color:#8a1c00;font-weight:bold}
pre{white-space:pre-wrap;word-break:break-word;background:#f7f7f7;padding:.5em;font-size:.85em}
nav.toc{font-size:.9em} nav.toc a{margin-right:1em;white-space:nowrap}
@media (max-width:760px){body{padding:0 .5em;font-size:15px} table{font-size:.82em} h2{font-size:1.25em}}
@media print{
 @page{size:A4;margin:12mm}
 body{max-width:none;margin:0;padding:0;font-size:9.5pt;color:#000}
 .scroll{overflow:visible}
 table{font-size:8pt;page-break-inside:auto} tr{page-break-inside:avoid}
 h2,h3{page-break-after:avoid} img{page-break-inside:avoid}
 .gallery{grid-template-columns:1fr 1fr} .gallery figure{page-break-inside:avoid}
 .gallery a.close,nav.toc{display:none}
 .v-fail{-webkit-print-color-adjust:exact;print-color-adjust:exact}
 a{color:#000;text-decoration:none}
}
"""

_MARK = {"pass": "\u2713", "fail": "\u2717", "undecided": "?"}


def _esc(v) -> str:
    return html.escape(str(v))


def _fmt(v, nd: int = 1) -> str:
    try:
        v = float(v)
    except (TypeError, ValueError):
        return _esc(v)
    if math.isinf(v):
        return "&infin;" if v > 0 else "&minus;&infin;"
    return "&ndash;" if not math.isfinite(v) else f"{v:.{nd}f}"


def _nd(value: float) -> int:
    """Decimals that show a value of this size sensibly."""
    a = abs(value) if math.isfinite(value) else 0
    return 0 if a >= 100 else 1 if a >= 10 else 2 if a >= 0.1 else 3


def _badge(verdict: str) -> str:
    if verdict in _MARK:
        return f"<span class='v v-{verdict}'>{_MARK[verdict]} {verdict.upper()}</span>"
    return "<span class='v v-none'>no verdict</span>"


def _limits_text(lo: float, hi: float, nd: int | None = None) -> str:
    a = _nd(lo) if nd is None else nd
    b = _nd(hi) if nd is None else nd
    if math.isfinite(lo) and math.isfinite(hi):
        return f"{_fmt(lo, a)} &ndash; {_fmt(hi, b)}"
    if math.isfinite(lo):
        return f"&ge; {_fmt(lo, a)}"
    if math.isfinite(hi):
        return f"&le; {_fmt(hi, b)}"
    return "&ndash;"


def _limits_at(v, r: int, j: int) -> str:
    """The limits of criterion ``j`` of sample row ``r`` of a verdicts group, as text."""
    exact = str(v["criterion"].values[j]) in EXACT_VARIABLES
    return _limits_text(float(v["limit_lo"].values[r, j]), float(v["limit_hi"].values[r, j]), 0 if exact else None)


def _root_info(groups: dict, path) -> dict:
    attrs = dict(groups.get("/", xr.Dataset()).attrs)
    info = {"path": str(path), "workflow_text": str(attrs.get("workflow", "") or ""),
            "workflow_hash": str(attrs.get("workflow_hash", "") or ""), "name": "", "runs": [],
            "data_note": str(attrs.get("data_note", "") or ""), "spec_text": str(attrs.get("spec_text", "") or "")}
    try:
        import yaml

        wf = yaml.safe_load(info["workflow_text"]) if info["workflow_text"] else None
        if isinstance(wf, dict):
            info["name"] = str(wf.get("name", "") or "")
    except Exception:  # a workflow text we cannot parse is still shown as text
        pass
    runs = attrs.get("runs")
    if isinstance(runs, str):
        try:
            runs = json.loads(runs)
        except ValueError:
            runs = []
    info["runs"] = runs if isinstance(runs, list) else []
    return info


def _included(grains, attrs: dict) -> np.ndarray:
    n = grains.sizes.get("grain", 0)
    edge = np.asarray(grains["edge_cut"].values, bool) if "edge_cut" in grains else np.zeros(n, bool)
    ecd = np.asarray(grains["ecd_nm"].values, float) if "ecd_nm" in grains else np.full(n, np.nan)
    keep = np.isfinite(ecd) & (ecd > 0)
    if not attrs.get("edge_cut_included", 0):
        keep &= ~edge
    return keep


def _col(ds, name: str, n: int, fill="", text: bool = True) -> np.ndarray:
    if name in ds.variables:
        return text_values(ds[name].values) if text else np.asarray(ds[name].values)
    return np.full(n, fill, dtype=object if text else float)


# --------------------------------------------------------------------------
# the context: everything the sections need, read once
# --------------------------------------------------------------------------


class _Ctx:
    def __init__(self, groups: dict, params: dict):
        self.groups = groups
        self.params = params
        self.grains, self.frames = groups["grains"], groups["frames"]
        self.summary = groups["summary"]
        self.verdicts = groups.get("verdicts")
        self.trends = groups.get("trends")
        ng, nf = self.grains.sizes.get("grain", 0), self.frames.sizes.get("frame", 0)
        self.keep = _included(self.grains, self.summary.attrs)
        self.g_sample = _col(self.grains, "sample", ng)
        self.g_frame = np.asarray(self.grains["frame"].values, int) if "frame" in self.grains else np.zeros(ng, int)
        self.ecd = np.asarray(self.grains["ecd_nm"].values, float) if "ecd_nm" in self.grains else np.full(ng, np.nan)
        self.f_sample = _col(self.frames, "sample", nf)
        self.f_status = _col(self.frames, "status", nf, "ok")
        self.f_source = _col(self.frames, "source", nf)
        self.f_error = _col(self.frames, "error", nf)
        # samples with a name only: an input that named no sample is not a sample
        self.samples = [s for s in text_values(self.summary["sample"].values) if s]
        self.trend_by = str(self.trends.attrs.get("trend_by", "")) if self.trends is not None else ""
        self.product_of: dict[str, str] = {}
        self.overall: dict[str, str] = {}
        if self.verdicts is not None:
            vs = text_values(self.verdicts["sample"].values)
            for i, s in enumerate(vs):
                self.product_of[s] = str(self.verdicts["product"].values[i])
                self.overall[s] = str(self.verdicts["verdict_overall"].values[i])
        self.products = list(dict.fromkeys(p for p in (self.product_of.get(s, "") for s in self.samples) if p))

    def srow(self, sample: str) -> int:
        return list(text_values(self.summary["sample"].values)).index(sample)

    def sample_order(self, samples: list[str]) -> list[str]:
        """Samples in time order: by their first value of the trend field, then by name."""
        if not self.trend_by or self.trend_by == "sample" or self.trend_by not in self.frames.variables:
            return sorted(samples)
        field = _col(self.frames, self.trend_by, self.frames.sizes.get("frame", 0))
        first = {}
        for s in samples:
            vals = sorted(v for v in field[self.f_sample == s] if v)
            first[s] = vals[0] if vals else ""
        return sorted(samples, key=lambda s: (first[s], s))

    def when(self, sample: str) -> str:
        if not self.trend_by or self.trend_by == "sample" or self.trend_by not in self.frames.variables:
            return ""
        field = _col(self.frames, self.trend_by, self.frames.sizes.get("frame", 0))
        return ", ".join(sorted(set(v for v in field[self.f_sample == sample] if v)))


# --------------------------------------------------------------------------
# sections
# --------------------------------------------------------------------------


def _verdict_section(c: _Ctx) -> list[str]:
    out = ["<h2 id='verdicts'>Batch verdicts</h2>"]
    nf = c.frames.sizes.get("frame", 0)
    n_failed = int((c.f_status != "ok").sum())
    if c.verdicts is None:
        out.append("<p>No product specs were given (workflow key <code>specs:</code>), so no batch has a verdict. "
                   "The samples and their counts:</p>")
        out.append("<div class='scroll'><table><tr><th class='t'>sample</th><th class='t'>verdict</th>"
                   "<th>grains</th><th>frames</th><th>failed frames</th></tr>")
        for s in c.samples:
            i = c.srow(s)
            out.append(f"<tr><td class='t'>{_esc(s)}</td><td class='t'>{_badge('')}</td>"
                       f"<td>{int(c.summary['grain_count'].values[i])}</td>"
                       f"<td>{int((c.f_sample == s).sum())}</td>"
                       f"<td>{int(((c.f_sample == s) & (c.f_status != 'ok')).sum())}</td></tr>")
        out.append("</table></div>")
        return out
    v = c.verdicts
    counts = {k: sum(1 for s in c.samples if c.overall.get(s) == k) for k in ("pass", "fail", "undecided")}
    none = [s for s in c.samples if not c.product_of.get(s)]
    conf = float(v.attrs.get("confidence", 0.95))
    out.append(f"<p><b>{counts['pass']} pass, {counts['fail']} fail, {counts['undecided']} undecided</b>"
               + (f", {len(none)} without a product" if none else "")
               + f"; <span class='{'failed' if n_failed else ''}'>{n_failed} of {nf} frames failed</span>. "
               f"A criterion passes when its whole {100 * conf:g} % confidence interval lies inside the product's "
               f"limits and fails when the whole interval lies outside; otherwise, or with fewer grains than the "
               f"product asks for, it is undecided. A batch takes its worst criterion (fail &gt; undecided &gt; "
               f"pass).</p>")
    out.append(f"<p class='caution'><b>Caution.</b> {_esc(CAUTION)}</p>")
    crits = list(text_values(v["criterion"].values))
    vs = list(text_values(v["sample"].values))
    out.append("<div class='scroll'><table><tr><th class='t'>batch (sample)</th><th class='t'>product</th>"
               "<th class='t'>verdict</th><th>grains</th><th>frames (failed)</th><th class='t'>what decides</th></tr>")
    # the latest night first; within a night the worst verdicts first
    rank = {"fail": 0, "undecided": 1, "pass": 2}
    order = sorted(c.samples, key=lambda s: (rank.get(c.overall.get(s, ""), 3), c.product_of.get(s, ""), s))
    order = sorted(order, key=c.when, reverse=True)
    for s in order:
        nfr = int((c.f_sample == s).sum())
        nfail = int(((c.f_sample == s) & (c.f_status != "ok")).sum())
        frames_txt = f"{nfr}" + (f" <span class='failed'>({nfail})</span>" if nfail else "")
        if s not in vs or not c.product_of.get(s):
            n = int(c.summary["grain_count"].values[c.srow(s)])
            out.append(f"<tr><td class='t'><b>{_esc(s)}</b><br><span class='note when'>{_esc(c.when(s))}</span></td>"
                       f"<td class='t'>&ndash;</td><td class='t'>{_badge('')}</td>"
                       f"<td>{n}</td><td>{frames_txt}</td><td class='t wrap'>matches no product in the spec file"
                       f"</td></tr>")
            continue
        r = vs.index(s)
        ov = c.overall[s]
        n = int(v["grain_count"].values[r])
        why = []
        j0 = crits.index("grain_count") if "grain_count" in crits else -1
        if j0 >= 0 and str(v["verdict"].values[r, j0]) == "undecided":
            why.append(_esc(v["note"].values[r, j0]))
        else:
            for j, cr in enumerate(crits):
                cv = str(v["verdict"].values[r, j])
                if cv and cv == ov and ov != "pass":
                    val, lo, hi = (float(v[k].values[r, j]) for k in ("value", "ci_lo", "ci_hi"))
                    nd = _nd(val)
                    why.append(f"{_esc(figures.label_of(cr))} {_fmt(val, nd)} [{_fmt(lo, nd)}, {_fmt(hi, nd)}] "
                               f"against {_limits_at(v, r, j)}"
                               f": {_esc(v['note'].values[r, j])}")
        need = float(v["grains_needed"].values[r])
        grains_txt = f"{n}"
        if ov == "undecided" and math.isfinite(need) and need > n:
            grains_txt += f"<br><span class='note'>about {int(need)} needed</span>"
        decide = "; ".join(why) if why else "every criterion inside its limits"
        out.append(f"<tr><td class='t'><b>{_esc(s)}</b><br><span class='note when'>{_esc(c.when(s))}</span></td>"
                   f"<td class='t nw'>{_esc(c.product_of[s])}</td><td class='t'>{_badge(ov)}</td><td>{grains_txt}</td>"
                   f"<td>{frames_txt}</td><td class='t wrap'>{decide}</td></tr>")
    out.append("</table></div>")
    out.append("<p class='note'>&ldquo;About N needed&rdquo; estimates the counted grains at which every criterion "
               "would be decided if the estimate stayed where it is and the interval narrowed as a standard error "
               "does (as 1/&radic;n in the grains, or in the frames where the intervals treat frames as the "
               "independent units, at the present grains per frame).</p>")
    # per product: every criterion of every batch
    for p in c.products:
        mine = [s for s in c.sample_order([s for s in c.samples if c.product_of.get(s) == p]) if s in vs]
        rows = [vs.index(s) for s in mine]
        used = [j for j, cr in enumerate(crits) if any(str(v["verdict"].values[r, j]) for r in rows)]
        out.append(f"<h3>{_esc(p)}: every criterion</h3><div class='scroll'><table><tr><th class='t'>batch</th>"
                   "<th class='t'>verdict</th>"
                   + "".join(f"<th>{_esc(figures.label_of(crits[j]))}<br><span class='note'>"
                             f"{_limits_at(v, rows[0], j)}"
                             f"</span></th>" for j in used) + "</tr>")
        for s, r in zip(mine, rows):
            cells = []
            for j in used:
                cv = str(v["verdict"].values[r, j])
                val, lo, hi = (float(v[k].values[r, j]) for k in ("value", "ci_lo", "ci_hi"))
                nd = 0 if crits[j] in EXACT_VARIABLES else _nd(val)
                ci = f"<br><span class='note'>[{_fmt(lo, nd)}, {_fmt(hi, nd)}]</span>" if (
                    math.isfinite(lo) and (lo != val or hi != val)) else ""
                cells.append(f"<td class='c-{cv}' title='{_esc(v['note'].values[r, j])}'>{_fmt(val, nd)}{ci}"
                             f"<br>{_badge(cv) if cv else ''}</td>")
            out.append(f"<tr><td class='t'>{_esc(s)}<br><span class='note when'>{_esc(c.when(s))}</span></td>"
                       f"<td class='t'>{_badge(c.overall.get(s, ''))}</td>{''.join(cells)}</tr>")
        out.append("</table></div>")
    out.append(f"<p class='note'>Brackets: {100 * conf:g} % confidence intervals from the summary step"
               + (f" ({_esc(c.summary.attrs.get('ci_note'))})" if c.summary.attrs.get("ci_note") else "")
               + ". Spec file: <code>" + _esc(v.attrs.get("spec_file", "")) + "</code>"
               + (f" &mdash; {_esc(v.attrs.get('spec_note'))}" if v.attrs.get("spec_note") else "") + ".</p>")
    if none:
        out.append("<p><b>Samples that match no product</b> (no verdict): " + ", ".join(_esc(s) for s in none)
                   + ".</p>")
    return out


def _frames_section(c: _Ctx) -> list[str]:
    nf = c.frames.sizes.get("frame", 0)
    per = np.bincount(c.g_frame, minlength=nf)[:nf] if c.g_frame.size else np.zeros(nf, int)
    edge = np.asarray(c.grains["edge_cut"].values, bool) if "edge_cut" in c.grains else np.zeros(c.g_frame.size, bool)
    per_edge = np.bincount(c.g_frame, weights=edge, minlength=nf)[:nf] if c.g_frame.size else np.zeros(nf)
    notes = _col(c.frames, "notes", nf)
    qc = _col(c.frames, "qc", nf)
    out = ["<h2 id='frames'>Failed and untrusted frames</h2>"]
    failed = [i for i in range(nf) if c.f_status[i] != "ok"]
    untrusted = []
    for i in range(nf):
        if c.f_status[i] != "ok":
            continue
        why = []
        if per[i] == 0:
            why.append("no grains found")
        elif per_edge[i] / per[i] >= UNTRUSTED_EDGE_FRACTION:
            why.append(f"{int(per_edge[i])} of {per[i]} grains cut by the frame border")
        if not c.f_sample[i]:
            why.append("no sample name")
        if qc[i] and not (per[i] == 0 and qc[i] == "no-grains"):
            why.append(f"QC: {qc[i]}")  # a step could not vouch for its result (frames.qc)
        if why:
            untrusted.append((i, "; ".join(why + ([notes[i]] if notes[i] else []))))
    if not failed and not untrusted:
        out.append(f"<p>All {nf} frames were read and measured; none looks untrusted (no frame without grains, "
                   f"none with half or more of its grains cut by the border, none flagged by a step's QC).</p>")
        return out
    out.append("<div class='scroll'><table><tr><th>frame</th><th class='t'>sample</th><th class='t'>state</th>"
               "<th class='t'>file</th><th class='t'>reason</th></tr>")
    for i in failed:
        out.append(f"<tr><td>{i}</td><td class='t'>{_esc(c.f_sample[i] or '(none)')}</td><td class='t failed'>"
                   f"failed</td><td class='t wrap'>{_esc(c.f_source[i])}</td><td class='t wrap'>"
                   f"{_esc(c.f_error[i])}</td></tr>")
    for i, why in untrusted:
        out.append(f"<tr><td>{i}</td><td class='t'>{_esc(c.f_sample[i] or '(none)')}</td><td class='t'>untrusted</td>"
                   f"<td class='t wrap'>{_esc(c.f_source[i])}</td><td class='t wrap'>{_esc(why)}</td></tr>")
    out.append("</table></div><p class='note'>Failed frames add no grains; their batches may be undecided for want "
               "of grains. Untrusted frames are counted; look at them before relying on their batch.</p>")
    return out


def _trend_series(c: _Ctx, product: str):
    t = c.trends
    prod = text_values(t["product"].values)
    sel = np.flatnonzero(prod == product)
    if sel.size == 0:
        return [], []
    crit = text_values(t["criterion"].values)[sel]
    grp = text_values(t["group"].values)[sel]
    pos = np.asarray(t["position"].values, int)[sel]
    groups = [g for _, g in sorted(set(zip(pos, grp)))]
    series = []
    for cr in dict.fromkeys(crit):
        m = sel[crit == cr]
        series.append({
            "criterion": cr, "label": figures.label_of(cr), "x": np.asarray(t["position"].values, int)[m],
            "groups": text_values(t["group"].values)[m],
            **{k: np.asarray(t[k].values, float)[m] for k in ("value", "ci_lo", "ci_hi")},
            **{k: np.asarray(t[k].values, float)[m] for k in ("centre", "lcl", "ucl")},
            **{k: float(np.asarray(t[k].values, float)[m][0]) for k in ("limit_lo", "limit_hi")},
            "rules": list(text_values(t["rules"].values)[m]),
            "samples": list(text_values(t["samples"].values)[m]),
        })
    return groups, series


def _product_sections(c: _Ctx) -> list[str]:
    out = []
    if not c.products and not c.samples:
        return out
    by = c.trend_by or "sample"
    out.append(f"<h2 id='products'>Products across {_esc(by)}s</h2>")
    if c.trends is not None:
        out.append(
            f"<p class='note'>Each panel is a Shewhart individuals chart of one spec'd statistic, one point per "
            f"{_esc(by)} (grey whiskers: its confidence interval). Each point is judged against the nights before it: "
            f"centre line, the mean of those nights; control limits, centre &plusmn; 3 sigma, sigma from their "
            f"average moving range (&divide; 2/&radic;&pi;), once {int(c.trends.attrs.get('min_points_for_limits', 5))}"
            f" nights are behind it (drawn as steps). Red lines: spec limits. Ringed points break one of the "
            f"{_esc(RULES_NAME)}: " + "; ".join(f"{n}: {_esc(d[0])}" for n, d in RULES.items())
            + ". A broken rule flags a change in the process, often before a batch fails its spec.</p>")
    bins = int(c.params["bins"])
    for p in c.products:
        mine = c.sample_order([s for s in c.samples if c.product_of.get(s) == p])
        out.append(f"<h3 id='product-{_esc(p)}'>{_esc(p)}</h3>")
        if c.trends is not None:
            groups, series = _trend_series(c, p)
            if series:
                uri = figures.control_chart(groups, series, f"{p}: spec'd statistics per {by}")
                out.append(f"<img class='figure' src='{uri}' alt='control charts of {_esc(p)}'>")
                flags = []
                for s in series:
                    for g, r, v, smp in zip(s["groups"], s["rules"], s["value"], s["samples"]):
                        if r:
                            flags.append(f"<li>{_esc(by)} {_esc(g)} ({_esc(smp)}): {_esc(s['label'])} "
                                         f"{_fmt(v, _nd(v))} breaks rule " + ", ".join(
                                             f"{n} ({_esc(RULES[int(n)][0])})" for n in r.split()) + "</li>")
                if flags:
                    out.append("<p><b>Run rules broken:</b></p><ul>" + "".join(flags) + "</ul>")
                elif len(groups) >= int(c.trends.attrs.get("min_points_for_limits", 5)):
                    out.append("<p>No run rule broken.</p>")
                else:
                    out.append(f"<p class='note'>{len(groups)} point(s) so far: control limits need at least "
                               f"{int(c.trends.attrs.get('min_points_for_limits', 5))}.</p>")
        limits = []
        if c.verdicts is not None and mine:
            v = c.verdicts
            vs = list(text_values(v["sample"].values))
            crits = list(text_values(v["criterion"].values))
            for name in ("ecd_mean_nm", "ecd_d50_nm"):
                if name in crits and mine[0] in vs:
                    j, r = crits.index(name), vs.index(mine[0])
                    lo, hi = float(v["limit_lo"].values[r, j]), float(v["limit_hi"].values[r, j])
                    if math.isfinite(lo) or math.isfinite(hi):
                        limits.append((f"{figures.label_of(name)} spec limits", lo, hi))
        batches = [(f"{s}" + (f" ({c.when(s)})" if c.when(s) else "")
                    + f", n = {int((c.keep & (c.g_sample == s)).sum())}", c.ecd[c.keep & (c.g_sample == s)])
                   for s in mine]
        uri = figures.size_overlay(batches, limits, f"{p}: ECD of its batches", bins)
        out.append(f"<img class='figure' src='{uri}'"
                   f" alt='size distributions of the batches of {_esc(p)}'>")
    others = [s for s in c.samples if not c.product_of.get(s)]
    if others:
        head = "Samples without a product" if c.products else "Size distributions"
        out.append(f"<h3>{head}</h3>")
        batches = [(f"{s}, n = {int((c.keep & (c.g_sample == s)).sum())}", c.ecd[c.keep & (c.g_sample == s)])
                   for s in c.sample_order(others)]
        out.append(f"<img class='figure' src='{figures.size_overlay(batches, [], head + ': ECD', bins)}' "
                   f"alt='size distributions'>")
    return out


def _detail_sections(c: _Ctx) -> list[str]:
    s_ = c.summary
    out = ["<h2 id='detail'>Detail</h2>"]
    conf = float(s_.attrs.get("confidence", 0.95))
    out.append("<h3>Size statistics</h3><div class='scroll'><table><tr><th class='t'>sample</th><th>grains</th>"
               "<th>mean ECD (nm)</th><th>sd (nm)</th><th>COV (%)</th><th>D10 (nm)</th><th>D50 (nm)</th>"
               "<th>D90 (nm)</th><th>D[3,2] (nm)</th><th>D[4,3] (nm)</th><th>x<sub>g</sub> (nm)</th>"
               "<th>&sigma;<sub>g</sub></th></tr>")

    def ci(var, i, nd=1):
        lo, hi = var + "_ci_lo", var + "_ci_hi"
        val = _fmt(s_[var].values[i], nd) if var in s_ else "&ndash;"
        if lo in s_ and hi in s_ and np.isfinite(float(s_[lo].values[i])):
            return f"{val}<br><span class='note'>[{_fmt(s_[lo].values[i], nd)}, {_fmt(s_[hi].values[i], nd)}]</span>"
        return val

    for s in c.sample_order(c.samples):
        i = c.srow(s)
        out.append(f"<tr><td class='t'>{_esc(s)}</td><td>{int(s_['grain_count'].values[i])}</td>"
                   f"<td>{ci('ecd_mean_nm', i)}</td><td>{ci('ecd_sd_nm', i)}</td><td>{ci('ecd_cov_pct', i)}</td>"
                   f"<td>{ci('ecd_d10_nm', i)}</td><td>{ci('ecd_d50_nm', i)}</td><td>{ci('ecd_d90_nm', i)}</td>"
                   f"<td>{ci('sauter_d32_nm', i)}</td><td>{ci('de_brouckere_d43_nm', i)}</td>"
                   f"<td>{ci('ecd_geo_mean_nm', i)}</td><td>{ci('ecd_geo_sd', i, 3)}</td></tr>")
    out.append(f"</table></div><p class='note'>D10, D50 and D90 are number-based (ISO 9276-1, r = 0); D[3,2] "
               f"(Sauter) and D[4,3] (De Brouckere) are the ISO 9276-2 moment means; x<sub>g</sub> and "
               f"&sigma;<sub>g</sub> the lognormal fit. Brackets: {100 * conf:g} % confidence intervals. Grains "
               f"touching a frame border are {'included' if s_.attrs.get('edge_cut_included', 0) else 'left out'}."
               f"</p>")

    samples = c.sample_order(c.samples)
    rows = [c.srow(s) for s in samples]
    habits = [str(h) for h in text_values(s_["habit"].values)]
    if samples:
        val = np.asarray(s_["habit_number_fraction"].values, float)[rows]
        nan = np.full_like(val, np.nan)
        lo, hi = (np.asarray(s_[f"habit_number_fraction_ci_{k}"].values, float)[rows]
                  if f"habit_number_fraction_ci_{k}" in s_ else nan for k in ("lo", "hi"))
        out.append("<h3>Habits</h3>")
        out.append(f"<img class='figure' src='{figures.habit_bars(samples, habits, val, lo, hi, 'fraction by number')}'"
                   " alt='habit fractions by number'>")
        out.append("<div class='scroll'><table><tr><th class='t'>sample</th>" + "".join(
            f"<th>{_esc(h)}</th>" for h in habits) + "</tr>")
        af = np.asarray(s_["habit_area_fraction"].values, float)
        for s, i in zip(samples, rows):
            out.append(f"<tr><td class='t'>{_esc(s)}</td>" + "".join(
                f"<td>{_fmt(100 * val[rows.index(i), j])} / {_fmt(100 * af[i, j])}</td>" for j in range(len(habits)))
                + "</tr>")
        out.append("</table></div><p class='note'>Percent by number / by projected area.</p>")

    out.append("<h3>Growth-rate parameter &alpha;</h3><div class='scroll'><table><tr><th class='t'>sample</th>"
               "<th>grains with &alpha;</th><th>median &alpha;</th><th>IQR</th></tr>")
    for s, i in zip(samples, rows):
        cnt = int(s_["alpha_count"].values[i]) if "alpha_count" in s_ else 0
        out.append(f"<tr><td class='t'>{_esc(s)}</td><td>{cnt}</td><td>{ci('alpha_median', i, 2)}</td>"
                   f"<td>{_fmt(s_['alpha_iqr'].values[i], 2) if 'alpha_iqr' in s_ else '&ndash;'}</td></tr>")
    out.append("</table></div>")
    alpha = np.asarray(c.grains["alpha"].values, float) if "alpha" in c.grains else np.full(c.keep.size, np.nan)
    hab = _col(c.grains, "habit", c.keep.size)
    out.append(f"<img class='figure' src='{figures.alpha_scatter(c.ecd[c.keep], alpha[c.keep], hab[c.keep])}' "
               "alt='ECD against alpha'>")
    out.append("<p class='note'>&alpha; = &radic;3 v<sub>100</sub> / v<sub>111</sub>: 1 or less gives a cube, 3 or "
               "more an octahedron, cuboctahedra between; only grains whose &alpha; the outline determines are "
               "plotted.</p>")
    return out


def _pick_frames(c: _Ctx, n: int) -> list[int]:
    """Up to ``n`` good frames, round-robin over samples, worst verdicts first."""
    rank = {"fail": 0, "undecided": 1, "pass": 2}
    by_sample: dict[str, list[int]] = {}
    for i in range(c.f_status.size):
        if c.f_status[i] == "ok" and c.f_sample[i]:
            by_sample.setdefault(c.f_sample[i], []).append(i)
    order = sorted(by_sample, key=lambda s: (rank.get(c.overall.get(s, ""), 3), s))
    picked: list[int] = []
    while len(picked) < n and any(by_sample.values()):
        for s in order:
            if by_sample[s] and len(picked) < n:
                picked.append(by_sample[s].pop(0))
    return picked


def _gallery(c: _Ctx) -> list[str]:
    thumbs = c.groups.get("thumbnails")
    n = int(c.params["gallery_frames"])
    if thumbs is None or "image" not in thumbs or n == 0:
        return []
    outlines = c.groups.get("outlines")
    ng = c.g_frame.size
    hab = _col(c.grains, "habit", ng)
    edge = np.asarray(c.grains["edge_cut"].values, bool) if "edge_cut" in c.grains else np.zeros(ng, bool)
    cx = np.asarray(c.grains["centroid_x_nm"].values, float) if "centroid_x_nm" in c.grains else np.full(ng, np.nan)
    cy = np.asarray(c.grains["centroid_y_nm"].values, float) if "centroid_y_nm" in c.grains else np.full(ng, np.nan)
    if outlines is not None and outlines.sizes.get("vertex", 0):
        vg = np.asarray(outlines["grain"].values, int)
        order = np.argsort(vg, kind="stable")
        vg = vg[order]
        vx = np.asarray(outlines["x_nm"].values, float)[order]
        vy = np.asarray(outlines["y_nm"].values, float)[order]
        starts = np.searchsorted(vg, np.arange(ng))
        ends = np.searchsorted(vg, np.arange(ng), side="right")
    else:
        starts = ends = np.zeros(ng, int)
        vx = vy = np.zeros(0)
    out = ["<h3 id='gallery'>Frames</h3><p class='legend'>" + "".join(
        f"<span class='item'><span class='swatch' style='background:{HABIT_COLOURS[h]}'></span>{_esc(h)} "
        f"<span class='note'>({ {'-': 'solid', '--': 'dashed', '-.': 'dash-dot', ':': 'dotted'}[HABIT_LINES[h]]})"
        f"</span></span>" for h in HABITS) + "</p>",
        "<p class='note'>Click a frame to enlarge it (click again to go back). Each grain carries its number in the "
        "grains table (column <code>grain</code> of data/grains.csv, the row of the <code>grains</code> group). "
        "Thin outlines touch the frame border and are left out of the statistics.</p><div class='gallery'>"]
    for f in _pick_frames(c, n):
        if f >= thumbs.sizes.get("frame", 0):
            continue
        img = np.asarray(thumbs["image"].isel(frame=f).values)
        rows = int(thumbs["thumb_rows"].values[f]) if "thumb_rows" in thumbs else img.shape[0]
        cols = int(thumbs["thumb_cols"].values[f]) if "thumb_cols" in thumbs else img.shape[1]
        scale = float(thumbs["scale_nm"].values[f])
        if rows < 2 or cols < 2 or not (scale > 0):
            continue
        img = img[:rows, :cols]
        mine = np.flatnonzero(c.g_frame == f)
        polys = []
        for g in mine:
            if ends[g] - starts[g] >= 2:
                polys.append((np.r_[vx[starts[g]:ends[g]], vx[starts[g]]] / scale,
                              np.r_[vy[starts[g]:ends[g]], vy[starts[g]]] / scale))
            else:
                polys.append(([], []))
        cent = np.column_stack([cx[mine] / scale, cy[mine] / scale]) if mine.size else np.zeros((0, 2))
        uri = figures.frame_view(img, polys, [int(g) for g in mine], cent, list(hab[mine]), edge[mine])
        rng = f"grains {int(mine.min())}&ndash;{int(mine.max())}" if mine.size else "no grains"
        when = c.when(c.f_sample[f])
        out.append(f"<figure id='frame-{f}'><a href='#frame-{f}' title='enlarge'><img src='{uri}' "
                   f"alt='frame {f} of {_esc(c.f_sample[f])} with numbered grain outlines'></a>"
                   f"<figcaption><b>{_esc(c.f_sample[f])}</b>{(' (' + _esc(when) + ')') if when else ''}, frame {f}, "
                   f"{mine.size} grains ({rng})<br>{_esc(os.path.basename(c.f_source[f]))} "
                   f"<a class='close' href='#gallery'>close</a></figcaption></figure>")
    out.append("</div>")
    return out


def _all_frames(c: _Ctx, max_rows: int) -> list[str]:
    nf = c.frames.sizes.get("frame", 0)
    per = np.bincount(c.g_frame, minlength=nf)[:nf] if c.g_frame.size else np.zeros(nf, int)
    px = np.asarray(c.frames["pixel_size_nm"].values, float) if "pixel_size_nm" in c.frames else np.full(nf, np.nan)
    cal = _col(c.frames, "calibration", nf)
    out = ["<h3>All frames</h3><div class='scroll'><table><tr><th>frame</th><th class='t'>sample</th>"
           "<th class='t'>status</th><th>grains</th><th>pixel (nm)</th><th class='t'>calibration</th>"
           "<th class='t'>file</th></tr>"]
    for i in range(min(nf, max_rows)):
        st_ = c.f_status[i]
        out.append(f"<tr><td>{i}</td><td class='t'>{_esc(c.f_sample[i] or '(none)')}</td>"
                   f"<td class='t{' failed' if st_ != 'ok' else ''}'>{_esc(st_)}</td><td>{per[i]}</td>"
                   f"<td>{_fmt(px[i], 3)}</td><td class='t'>{_esc(cal[i])}</td>"
                   f"<td class='t wrap'>{_esc(c.f_source[i])}</td></tr>")
    out.append("</table></div>")
    if nf > max_rows:
        out.append(f"<p class='note'>First {max_rows} of {nf} frames shown; data/frames.csv has all.</p>")
    return out


# --------------------------------------------------------------------------
# data files beside the page
# --------------------------------------------------------------------------


def _table(ds, dim: str, index_name: str | None = None):
    import pandas as pd

    cols = {}
    if index_name:
        cols[index_name] = np.arange(ds.sizes.get(dim, 0))
    for name, var in ds.variables.items():
        if var.dims == (dim,) and name != index_name:
            vals = var.values
            cols[name] = list(text_values(vals)) if vals.dtype.kind in ("U", "S", "O", "T") else vals
    return pd.DataFrame(cols)


def _pair_table(ds, dims: tuple[str, str]):
    import pandas as pd

    a, b = dims
    names = [n for n, v in ds.data_vars.items() if v.dims == dims]
    rows = []
    for i, s in enumerate(text_values(ds[a].values)):
        for j, h in enumerate(text_values(ds[b].values)):
            rows.append({a: s, b: h, **{n: ds[n].values[i, j] for n in names}})
    return pd.DataFrame(rows)


def _exports(groups: dict, out: Path) -> list[str]:
    data = out / "data"
    data.mkdir(parents=True, exist_ok=True)
    written = []

    def put(df, name):
        p = data / name
        if name.endswith(".csv"):
            df.to_csv(p, index=False)
        else:
            df.to_parquet(p, index=False)
        written.append(str(p))

    grains = _table(groups["grains"], "grain", "grain")
    put(grains, "grains.csv")
    put(grains, "grains.parquet")
    put(_table(groups["frames"], "frame", "frame"), "frames.csv")
    for name in sorted(g for g in groups if g == "summary" or g.startswith("summary_by_")):
        ds = groups[name]
        dim = "sample" if name == "summary" else name[len("summary_by_"):]
        if dim not in ds.dims:
            continue
        put(_table(ds, dim), f"{name}.csv")
        put(_pair_table(ds, (dim, "habit")), f"{name}_habits.csv")
    if "verdicts" in groups:
        put(_table(groups["verdicts"], "sample"), "verdicts.csv")
        put(_pair_table(groups["verdicts"], ("sample", "criterion")), "verdicts_criteria.csv")
    if "trends" in groups:
        put(_table(groups["trends"], "point"), "trends.csv")
    for name in ("grains", "frames", "summary", "verdicts", "trends"):
        if name in groups:
            p = data / f"{name}.nc"
            plain_dataset(groups[name]).to_netcdf(p, engine="scipy")
            written.append(str(p))
    return written


# --------------------------------------------------------------------------
# the page
# --------------------------------------------------------------------------


def write_report(results: str | os.PathLike, out_dir: str | os.PathLike, params: dict | None = None,
                 specs=None) -> list[str]:
    """Write the report of a results store into ``out_dir``.

    Parameters
    ----------
    results : path-like
        Results store.
    out_dir : path-like
        Folder for ``index.html`` (the whole report, one file) and ``data/``.
    params : dict, optional
        Parameters of :data:`STEP`.
    specs : grainhabit.plugins.survey.specs.Specs, optional
        Judge the store against these product specs for this page (the
        store's own ``verdicts`` and ``trends`` are replaced on the page, not
        in the store); trends run over the store's first ``summary_by_*``
        field.

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
    if "summary" not in groups or "sample" not in groups["summary"].dims:
        groups.update(summary_step.summarise(groups["grains"], groups["frames"], {}))
    if specs is not None:
        from grainhabit.plugins.survey.verdicts import judge

        by = sorted(g[len("summary_by_"):] for g in groups if g.startswith("summary_by_"))
        sp = {k: groups["summary"].attrs[k] for k in ("bootstrap_resamples", "confidence")
              if k in groups["summary"].attrs}
        groups.update(judge(specs, groups, {"group_by": by[:1], "confidence": sp.get("confidence", 0.95),
                                            "bootstrap": int(sp.get("bootstrap_resamples", 1000))}))
        info["spec_text"] = Path(specs.file).read_text(encoding="utf-8")
    c = _Ctx(groups, params)
    title = params["title"] or (f"Batch report: {info['name']}" if info["name"] else "Batch report")
    now = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC")

    body = [f"<h1>{_esc(title)}</h1>"]
    prov = []
    if info["data_note"]:
        prov.append(f"<b>Data:</b> {_esc(info['data_note'])}")
    runs = info["runs"]
    last = runs[-1] if runs and isinstance(runs[-1], dict) else {}
    when = str(last.get("finished", "") or "")
    prov.append(f"<b>Results:</b> <code>{_esc(Path(results).resolve())}</code>"
                + (f", last run finished {_esc(when)}" if when else "")
                + f"; page written {now} by grainhabit {_esc(__version__)}")
    body.append("<div class='prov'>" + "<br>".join(prov) + "</div>")
    body.append("<nav class='toc'><a href='#verdicts'>verdicts</a><a href='#frames'>failed frames</a>"
                "<a href='#products'>products</a><a href='#detail'>detail</a><a href='#gallery'>frames</a>"
                "<a href='#sources'>spec and workflow</a></nav>")
    body += _verdict_section(c)
    body += _frames_section(c)
    body += _product_sections(c)
    body += _detail_sections(c)
    body += _gallery(c)
    body += _all_frames(c, int(params["qc_rows"]))

    written = _exports(groups, out) if params["data_files"] else []
    body.append("<h2 id='sources'>Spec file, workflow and data</h2>")
    if info["spec_text"]:
        body.append("<h3>Spec file</h3><pre>" + _esc(info["spec_text"]) + "</pre>")
    if info["workflow_text"]:
        body.append("<h3>Workflow</h3><pre>" + _esc(info["workflow_text"]) + "</pre>")
    if written:
        body.append("<p class='note'>The tables behind this page are in the folder <code>data/</code> beside it "
                    "(CSV, Parquet, NetCDF): " + ", ".join(_esc(Path(w).name) for w in written) + ".</p>")
    body.append(f"<p class='caution'><b>Caution.</b> {_esc(CAUTION)}</p>")

    page = ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>\n"
            + "\n".join(body) + "\n</body></html>\n")
    index = out / "index.html"
    tmp = out / ".index.html.tmp"
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, index)
    return [str(index)] + written


@hookimpl
def grainhabit_report(results, out_dir, params):
    """Write the HTML report; see :func:`write_report`."""
    return write_report(results, out_dir, params)


def _run(args) -> int:
    try:
        specs = None
        if args.specs:
            from grainhabit.plugins.survey.specs import load_specs

            specs = load_specs(args.specs)
        files = write_report(args.results, args.out, {"gallery_frames": args.gallery}, specs=specs)
    except (ValueError, OSError, KeyError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"grainhabit report: {exc}", file=sys.stderr)
        return 2
    size = os.path.getsize(files[0])
    print(f"wrote {files[0]} ({size / 1e6:.1f} MB, one self-contained file) and {len(files) - 1} data files")
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit report RESULTS --out DIR``."""
    p = subparsers.add_parser("report", help="write the HTML report of a results store",
                              description="Write the report of a results store: one self-contained HTML page "
                                          "(verdicts, failed frames, per-product trends, detail) and its tables "
                                          "in data/.")
    p.add_argument("results", help="results store (.zarr)")
    p.add_argument("--out", required=True, help="folder to write the report into")
    p.add_argument("--gallery", type=int, default=8, help="frames in the gallery (default 8)")
    p.add_argument("--specs", default=None, help="product spec file to judge the batches against on this page "
                                                 "(default: the verdicts stored by the run, if any)")
    p.set_defaults(handler=_run)
