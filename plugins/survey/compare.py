"""The ``grainhabit compare`` command: are two samples' grains alike?

``grainhabit compare RESULTS --a SAMPLE --b SAMPLE [--results-b RESULTS2] [--json]``
runs a two-sample Kolmogorov-Smirnov test on ECD, a chi-square test on the
habit counts and a bootstrap interval of the difference of alpha medians,
and prints a plain-text table (or JSON).
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

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "compare"


def sample_grains(grains: xr.Dataset, sample: str, include_edge_cut: bool = False) -> dict[str, np.ndarray]:
    """ECD, habit codes and alpha of one sample's counted grains.

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
    alpha = np.asarray(grains["alpha"].values, float) if "alpha" in grains else np.full(ecd.size, np.nan)
    return {"ecd": ecd[sel], "codes": st.habit_codes(grains["habit"].values[sel]), "alpha": alpha[sel]}


def compare_samples(a: dict, b: dict, n_resamples: int = 2000, seed: int = 0, confidence: float = 0.95) -> dict:
    """Compare two samples given as :func:`sample_grains` dictionaries.

    Returns
    -------
    dict
        ``n_a``, ``n_b``; ``ks`` (statistic, pvalue) on ECD; ``chi2``
        (statistic, pvalue, dof, counts per habit); ``alpha_median_difference``
        (b minus a, with percentile bootstrap limits); all plain floats.
    """
    k = len(st.HABITS)
    ca = np.bincount(a["codes"][a["codes"] >= 0], minlength=k)
    cb = np.bincount(b["codes"][b["codes"] >= 0], minlength=k)
    d, p = st.ks_test(a["ecd"], b["ecd"])
    chi, pc, dof = st.habit_chi2(ca, cb)
    diff = st.median_difference_ci(a["alpha"], b["alpha"], n_resamples=n_resamples, confidence=confidence,
                                   rng=np.random.default_rng(seed))
    return {
        "n_a": int(a["ecd"].size), "n_b": int(b["ecd"].size),
        "ecd_median_a_nm": float(np.median(a["ecd"])) if a["ecd"].size else float("nan"),
        "ecd_median_b_nm": float(np.median(b["ecd"])) if b["ecd"].size else float("nan"),
        "ks": {"statistic": d, "pvalue": p},
        "chi2": {"statistic": chi, "pvalue": pc, "dof": dof, "habits": list(st.HABITS),
                 "counts_a": ca.tolist(), "counts_b": cb.tolist()},
        "alpha_median_difference": {"estimate": float(diff.estimate), "ci_lo": float(diff.low),
                                    "ci_hi": float(diff.high), "confidence": confidence,
                                    "resamples": n_resamples, "method": "percentile"},
    }


def format_table(res: dict, name_a: str, name_b: str) -> str:
    """Plain-text rendering of :func:`compare_samples` output."""
    f = lambda v, nd=3: "n/a" if not np.isfinite(v) else (f"{v:.{nd}g}" if abs(v) < 1e-3 else f"{v:.{nd}f}")  # noqa: E731
    am = res["alpha_median_difference"]
    lines = [f"A = {name_a} ({res['n_a']} grains), B = {name_b} ({res['n_b']} grains)",
             f"{'test':<34}{'statistic':>12}{'p-value':>12}",
             f"{'ECD, two-sample Kolmogorov-Smirnov':<34}{f(res['ks']['statistic']):>12}{f(res['ks']['pvalue']):>12}",
             f"{'habit counts, chi-square (dof ' + str(res['chi2']['dof']) + ')':<34}"
             f"{f(res['chi2']['statistic'], 2):>12}{f(res['chi2']['pvalue']):>12}",
             f"alpha median B - A: {f(am['estimate'])}  ({100 * am['confidence']:g} % bootstrap interval "
             f"{f(am['ci_lo'])} to {f(am['ci_hi'])})",
             f"{'habit':<18}{'A':>8}{'B':>8}"]
    for h, x, y in zip(res["chi2"]["habits"], res["chi2"]["counts_a"], res["chi2"]["counts_b"]):
        lines.append(f"{h:<18}{x:>8}{y:>8}")
    return "\n".join(lines)


def _run(args) -> int:
    try:
        ga = load_results(args.results)["grains"]
        gb = load_results(args.results_b)["grains"] if args.results_b else ga
        a = sample_grains(ga, args.a, args.include_edge_cut)
        b = sample_grains(gb, args.b, args.include_edge_cut)
        res = compare_samples(a, b, n_resamples=args.bootstrap, seed=args.seed)
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
    p = subparsers.add_parser("compare", help="test whether two samples differ in size, habit and alpha",
                              description="Kolmogorov-Smirnov on ECD, chi-square on habit counts and a bootstrap "
                                          "interval of the alpha median difference between two samples.")
    p.add_argument("results", help="results store holding sample A (and B unless --results-b)")
    p.add_argument("--a", required=True, help="sample A")
    p.add_argument("--b", required=True, help="sample B")
    p.add_argument("--results-b", default=None, help="results store holding sample B")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table")
    p.add_argument("--bootstrap", type=int, default=2000, help="bootstrap resamples (default 2000)")
    p.add_argument("--seed", type=int, default=0, help="bootstrap seed (default 0)")
    p.add_argument("--include-edge-cut", action="store_true", help="count grains touching the frame border")
    p.set_defaults(handler=_run)
