"""The ``grainhabit compare`` command: do two samples differ, and by how much?

``grainhabit compare RESULTS --a SAMPLE --b SAMPLE [--results-b RESULTS2] [--json]``
compares a family of quantities of two samples: the mean ECD, the COV of
ECD, the number fraction of each habit seen in either sample and, where
both samples have it, the median of the determined alpha values. For each it
gives the difference B - A with a confidence interval and a test; the
family-wise error is held at ``--alpha`` by Holm's step-down procedure,
and the output ends with a verdict in words ("B larger by 37 nm", "same
within 9 nm").

Grains of one frame are not independent (focus, contrast and local growth
conditions are shared), so frames are the units: standard errors come from
the frames (clustered standard error for means and fractions, frame
bootstrap for the COV and the alpha median; see :mod:`grainhabit.plugins.survey.statistics`)
and the tests use Student t on Welch-Satterthwaite degrees of freedom built
from each sample's number of frames.
"""

from __future__ import annotations

import json
import sys

import numpy as np

from grainhabit import hookimpl
from grainhabit.lazy import lazy_module
from grainhabit.plugins.survey import statistics as st
from grainhabit.plugins.survey.results_tables import load_results

xr = lazy_module("xarray")  # imported on first use: workers never need it
stats = lazy_module("scipy.stats")

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "compare"

#: Least determined alpha values per sample, and least determined fraction, to compare alpha medians.
MIN_ALPHA_VALUES = 5
MIN_ALPHA_DETERMINED = 0.5

METHOD_NOTE = ("frames as independent units (clustered standard error for the mean and fractions, frame "
               "bootstrap for COV and alpha median, both floored at the independent-grain error); Student t on "
               "Welch-Satterthwaite degrees of freedom; family-wise error held by Holm's step-down procedure; "
               "intervals at the level Holm used for each quantity")


def _column(grains, name, fill, dtype=float):
    if name in grains:
        return np.asarray(grains[name].values, dtype=dtype) if dtype is not object else np.asarray(grains[name].values)
    return np.full(grains.sizes["grain"], fill, dtype=dtype)


def sample_grains(grains: xr.Dataset, sample: str, include_edge_cut: bool = False) -> dict[str, np.ndarray]:
    """Per-grain columns of one sample's counted grains.

    Returns
    -------
    dict
        ``ecd`` (nm), ``codes`` (habit codes), ``alpha``, ``alpha_lo``,
        ``alpha_hi`` and ``frame``, each shape (n,).

    Raises
    ------
    ValueError
        If the sample has no grains in ``grains``; the message lists the samples.
    """
    names = np.array([str(s) for s in grains["sample"].values], dtype=object)
    sel = names == sample
    if not sel.any():
        known = ", ".join(sorted(set(names.tolist()))) or "none"
        raise ValueError(f"no grains of sample {sample!r} (samples: {known})")
    ecd = np.asarray(grains["ecd_nm"].values, float)
    sel &= np.isfinite(ecd) & (ecd > 0)
    if not include_edge_cut and "edge_cut" in grains:
        sel &= ~np.asarray(grains["edge_cut"].values, bool)
    out = {"ecd": ecd[sel], "codes": st.habit_codes(np.asarray(grains["habit"].values)[sel]),
           "frame": _column(grains, "frame", 0, int)[sel]}
    for key in ("alpha", "alpha_lo", "alpha_hi"):
        out[key] = _column(grains, key, np.nan)[sel]
    return out


def _quantities(s: dict, habits, n_resamples: int, rng) -> dict:
    """name -> Spread of one sample; ``habits`` are the habit codes to give fractions of."""
    out = {}
    n = s["ecd"].size
    fr = s["frame"]
    out["ecd_mean_nm"] = st.clustered_mean(s["ecd"], fr) if n else None
    known = s["codes"] >= 0
    if known.any():
        onehot = (s["codes"][known][:, None] == np.asarray(habits)[None, :]).astype(float)
        sp = st.clustered_mean(onehot, fr[known], binary=True)
        for j, h in enumerate(habits):
            out[f"fraction:{st.HABITS[h]}"] = st.Spread(sp.estimate[j], sp.se[j], sp.df, sp.n_clusters)
    if n >= 2:
        boot = {"ecd_cov_pct": st.weighted_cov_stat(s["ecd"])}
        det, bnd = st.alpha_states(s["alpha"], s["alpha_lo"], s["alpha_hi"])
        nd, ninfo = int(det.sum()), int((det | bnd).sum())
        if nd >= MIN_ALPHA_VALUES and nd >= MIN_ALPHA_DETERMINED * ninfo:
            boot["alpha_median"] = (st.weighted_quantile_stat(s["alpha"][det], 0.5), det)
        out.update(st.clustered_bootstrap(boot, n, fr, n_resamples=n_resamples, rng=rng))
    return out


_LABEL = {"ecd_mean_nm": ("ECD mean", "nm"), "ecd_cov_pct": ("COV of ECD", "percentage points"),
          "alpha_median": ("alpha median (determined values)", "")}


def compare_samples(a: dict, b: dict, n_resamples: int = 1000, seed: int = 0, family_alpha: float = 0.05) -> dict:
    """Compare two samples given as :func:`sample_grains` dictionaries.

    Parameters
    ----------
    a, b : dict
        Per-grain columns of samples A and B.
    n_resamples : int
        Frame-bootstrap resamples for the COV and the alpha median.
    seed : int
        Seed of the bootstrap.
    family_alpha : float
        Family-wise error rate of the whole comparison (Holm).

    Returns
    -------
    dict
        ``n_a``, ``n_b``, ``frames_a``, ``frames_b``; ``quantities``: one
        dict per compared quantity (``name``, ``label``, ``unit``, ``a``,
        ``b``, ``difference`` (B - A), ``ci_lo``, ``ci_hi``,
        ``confidence``, ``pvalue``, ``df``, ``differs``, ``verdict``);
        ``verdict`` (words), ``method``, ``family_alpha``; plain floats.
    """
    if not (0 < family_alpha < 1):
        raise ValueError(f"family_alpha must lie in (0, 1), got {family_alpha!r}")
    rng = np.random.default_rng(seed)
    k = len(st.HABITS)
    seen = [j for j in range(k) if (a["codes"] == j).any() or (b["codes"] == j).any()]
    qa = _quantities(a, seen, n_resamples, rng)
    qb = _quantities(b, seen, n_resamples, rng)
    rows = []
    order = ["ecd_mean_nm", "ecd_cov_pct"] + [f"fraction:{st.HABITS[j]}" for j in seen] + ["alpha_median"]
    for name in order:
        sa, sb = qa.get(name), qb.get(name)
        if sa is None or sb is None:
            continue
        floor_a = floor_b = 0.0
        if name.startswith("fraction:"):
            h = st.HABITS.index(name.split(":", 1)[1])
            ka, kb = int((a["codes"] == h).sum()), int((b["codes"] == h).sum())
            na, nb = int((a["codes"] >= 0).sum()), int((b["codes"] >= 0).sum())
            p0 = (ka + kb) / (na + nb)
            # binomial error of the pooled fraction: a habit absent from one sample's frames keeps a spread
            floor_a, floor_b = np.sqrt(p0 * (1 - p0) / na), np.sqrt(p0 * (1 - p0) / nb)
            label, unit = f"{name.split(':', 1)[1]} fraction", "percentage points"
        else:
            label, unit = _LABEL[name]
        d = st.difference(sa, sb, floor_a, floor_b)
        rows.append({"name": name, "label": label, "unit": unit, "a": float(sa.estimate), "b": float(sb.estimate),
                     "difference": d.estimate, "se": d.se, "df": d.df, "pvalue": d.pvalue})
    rejected, level = st.holm([r["pvalue"] for r in rows], family_alpha)
    for r, rej, lev in zip(rows, rejected, level):
        q = stats.t.ppf(1 - lev / 2, r["df"]) if np.isfinite(lev) else np.nan
        bound = 1.0 if r["name"].startswith("fraction:") else np.inf  # two fractions differ by at most 1
        r.update(ci_lo=max(r["difference"] - q * r["se"], -bound), ci_hi=min(r["difference"] + q * r["se"], bound),
                 confidence=float(1 - lev) if np.isfinite(lev) else np.nan, differs=bool(rej))
        r["verdict"] = _verdict(r)
    fa = int(np.unique(a["frame"]).size)
    fb = int(np.unique(b["frame"]).size)
    return {"n_a": int(a["ecd"].size), "n_b": int(b["ecd"].size), "frames_a": fa, "frames_b": fb,
            "quantities": rows, "family_alpha": family_alpha, "method": METHOD_NOTE,
            "verdict": _overall(rows, family_alpha, fa, fb)}


def _scaled(r: dict) -> tuple[float, float, float, str]:
    """Difference and limits in display units (fractions in percentage points)."""
    f = 100.0 if r["name"].startswith("fraction:") else 1.0
    return f * r["difference"], f * r["ci_lo"], f * r["ci_hi"], r["unit"]


def _decimals(name: str) -> int:
    return {"ecd_mean_nm": 0, "alpha_median": 2}.get(name, 1)


def _num(v: float, decimals: int = 1) -> str:
    return "n/a" if not np.isfinite(v) else f"{v:.{decimals}f}"


def _verdict(r: dict) -> str:
    """One quantity in words: 'B larger by ...' or 'same within ...'."""
    d, lo, hi, unit = _scaled(r)
    u = f" {unit}" if unit else ""
    k = _decimals(r["name"])
    if not np.isfinite(r["se"]):
        return f"{r['label']}: not compared (no spread known)"
    level = f"{_num(100 * r['confidence'], 1)} % interval"
    if r["differs"]:
        side = "larger" if d > 0 else "smaller"
        near, far = (lo, hi) if d > 0 else (-hi, -lo)
        return f"{r['label']}: B {side} by {_num(abs(d), k)}{u} ({level} {_num(near, k)} to {_num(far, k)})"
    return (f"{r['label']}: same within {_num(max(abs(lo), abs(hi)), k)}{u} "
            f"(B - A = {_num(d, k)}, {level} {_num(lo, k)} to {_num(hi, k)})")


def _overall(rows, family_alpha, fa, fb) -> str:
    few = ""
    if min(fa, fb) < 2:
        few = " One sample has a single frame: its frame-to-frame spread is unseen, so grains were taken as independent."
    elif min(fa, fb) < 5:
        few = f" With {min(fa, fb)} frames in a sample the intervals are wide: more frames narrow them more than more grains."
    if not rows:
        return "Nothing could be compared." + few
    diff = [r["verdict"] for r in rows if r["differs"]]
    same = [r["verdict"] for r in rows if not r["differs"]]
    head = (f"B differs from A (family-wise error {100 * family_alpha:g} %, Holm): " + "; ".join(diff) + "."
            if diff else f"No difference shown (family-wise error {100 * family_alpha:g} %, Holm).")
    tail = (" Same within the intervals: " + "; ".join(same) + ".") if same else ""
    return head + tail + few


def format_table(res: dict, name_a: str, name_b: str) -> str:
    """Plain-text rendering of :func:`compare_samples` output."""
    lines = [f"A = {name_a} ({res['n_a']} grains, {res['frames_a']} frames), "
             f"B = {name_b} ({res['n_b']} grains, {res['frames_b']} frames)",
             f"{'quantity':<34}{'A':>9}{'B':>9}{'B - A':>9}{'interval':>20}{'level':>7}{'p':>9}  differs"]
    for r in res["quantities"]:
        d, lo, hi, _ = _scaled(r)
        f = 100.0 if r["name"].startswith("fraction:") else 1.0
        k = _decimals(r["name"])
        lines.append(f"{r['label']:<34}{_num(f * r['a'], k):>9}{_num(f * r['b'], k):>9}{_num(d, k):>9}"
                     f"{_num(lo, k) + ' to ' + _num(hi, k):>20}{_num(100 * r['confidence'], 1) + '%':>7}"
                     f"{r['pvalue']:>9.2g}  {'yes' if r['differs'] else 'no'}")
    lines.append("(fractions in %, their differences in percentage points; ECD in nm)")
    lines.append("")
    lines.append("Verdict: " + res["verdict"])
    lines.append("Method: " + res["method"] + ".")
    return "\n".join(lines)


def _run(args) -> int:
    try:
        ga = load_results(args.results)["grains"]
        gb = load_results(args.results_b)["grains"] if args.results_b else ga
        a = sample_grains(ga, args.a, args.include_edge_cut)
        b = sample_grains(gb, args.b, args.include_edge_cut)
        res = compare_samples(a, b, n_resamples=args.bootstrap, seed=args.seed, family_alpha=args.family_error)
    except (ValueError, OSError, KeyError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"grainhabit compare: {exc}", file=sys.stderr)
        return 2
    if args.json:
        res.update(a=args.a, b=args.b, results=str(args.results), results_b=str(args.results_b or args.results))
        print(json.dumps(res, indent=2, allow_nan=True))
    else:
        print(format_table(res, args.a, args.b))
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit compare``."""
    p = subparsers.add_parser("compare", help="do two samples differ in size, spread, habit and alpha, and by how much",
                              description="Differences B - A of the mean ECD, the COV, each habit fraction and the "
                                          "alpha median, with intervals, tests that treat frames as the independent "
                                          "units, Holm's control of the family-wise error and a verdict in words.")
    p.add_argument("results", help="results store holding sample A (and B unless --results-b)")
    p.add_argument("--a", required=True, help="sample A")
    p.add_argument("--b", required=True, help="sample B")
    p.add_argument("--results-b", default=None, help="results store holding sample B")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--bootstrap", type=int, default=1000, help="frame-bootstrap resamples (default 1000)")
    p.add_argument("--family-error", type=float, default=0.05,
                   help="family-wise error rate of the whole comparison (default 0.05)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default 0)")
    p.add_argument("--include-edge-cut", action="store_true", help="count grains touching the frame border")
    p.set_defaults(handler=_run)
