"""Benchmark ``grainhabit bench habit``: habit accuracy and alpha recovery on synthetic fields.

Fields are rendered from the crystal model (:mod:`grainhabit.plugins.synthetic.render`; invented
test data, every habit, random in-plane rotation, facet shading or thickness
contrast, illumination gradient, blur, noise, both contrasts). The default
chain is run by calling the step hooks in order (flatten-background ->
segment-grains -> measure-grains -> classify-habit -> fit-growth-ratio);
detected grains are matched one-to-one to the truth by IoU >= 0.5 of their
label masks. Printed: the habit confusion matrix (rows truth, columns
found), overall accuracy, the alpha mean absolute error on cuboctahedra, and
the fraction of polyhedral grains whose true alpha lies inside
[alpha_lo, alpha_hi] (an octahedron's true alpha counts as inside when the
range reaches 3 and the grid top, all alpha >= 3 giving the same body;
a cube's likewise for alpha <= 1 and the grid bottom).

Also printed: CPU milliseconds per detected grain of classify-habit plus
fit-growth-ratio (the fit memo is shared, so the second step is nearly free).

Targets: accuracy >= 0.95, alpha MAE <= 0.10, coverage >= 90 %, at most about
15 ms per grain for the two habit steps.
"""
from __future__ import annotations

import argparse
import time

import numpy as np

from grainhabit import hookimpl
from grainhabit.frame import FrameData
from grainhabit.plugins.habit.vocabulary import HABITS

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-habit"

_MIX = {"cube": 1.0, "cuboctahedron": 1.6, "octahedron": 1.0, "tabular_hexagon": 1.0,
        "tabular_triangle": 0.8, "rod": 0.6, "irregular": 0.6}


def run_chain(frame: FrameData, timings: dict | None = None) -> FrameData:
    """Run the default per-frame chain on a frame by calling the hooks directly.

    ``timings``, if given, gets ``habit_s`` increased by the CPU seconds of the
    classify-habit and fit-growth-ratio steps.
    """
    from grainhabit.plugins.habit import classify_habit as classify
    from grainhabit.plugins.habit import fit_growth_ratio as growth
    from grainhabit.plugins.measure import measure_grains as measure
    from grainhabit.plugins.preprocess import flatten_background as preprocess
    from grainhabit.plugins.segment import segment_grains as segment

    f = preprocess.grainhabit_preprocess(frame, preprocess.STEP.resolve({}))
    f = segment.grainhabit_segment(f, segment.STEP.resolve({}))
    f = measure.grainhabit_measure(f, measure.STEP.resolve({}))
    t0 = time.process_time()
    f = classify.grainhabit_classify(f, classify.STEP.resolve({}))
    f = growth.grainhabit_fit_growth(f, growth.STEP.resolve({}))
    if timings is not None:
        timings["habit_s"] = timings.get("habit_s", 0.0) + time.process_time() - t0
    return f


def match_labels(truth: np.ndarray, found: np.ndarray, min_iou: float = 0.5) -> dict[int, int]:
    """One-to-one matching of found labels to truth labels by IoU.

    Parameters
    ----------
    truth, found : ndarray of int, shape (rows, cols)
    min_iou : float

    Returns
    -------
    dict
        found label -> truth label, for pairs with IoU >= ``min_iou`` (above
        0.5 a match is necessarily unique).
    """
    t = truth.ravel().astype(np.int64)
    f = found.ravel().astype(np.int64)
    nt, nf = int(t.max()) + 1, int(f.max()) + 1
    inter = np.bincount(t * nf + f, minlength=nt * nf).reshape(nt, nf)
    at, af = np.bincount(t, minlength=nt), np.bincount(f, minlength=nf)
    out = {}
    for lt in range(1, nt):
        cand = np.flatnonzero(inter[lt, 1:]) + 1
        for lf in cand:
            iou = inter[lt, lf] / (at[lt] + af[lf] - inter[lt, lf])
            if iou >= min_iou:
                out[int(lf)] = lt
    return out


def _covered(truth_alpha, habit, lo, hi, grid_lo, grid_hi):
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return False
    a = truth_alpha
    if habit == "octahedron" and a >= 3.0:
        return lo <= 3.0 + 1e-9 and hi >= grid_hi - 1e-9
    if habit == "cube" and a <= 1.0:
        return lo <= grid_lo + 1e-9 and hi >= 1.0 - 1e-9
    return lo - 1e-9 <= a <= hi + 1e-9


def evaluate(n_fields: int = 8, grains_per_field: int = 14, seed: int = 7, size: int = 448,
             pixel_size_nm: float = 10.0, ecd_nm: float = 600.0, verbose: bool = True) -> dict:
    """Render fields, run the chain, compare with the truth.

    Returns
    -------
    dict
        ``confusion`` (7 x 7, rows truth), ``accuracy``, ``alpha_mae``,
        ``coverage``, ``n_matched``, ``n_truth``, ``seconds``,
        ``habit_ms_per_grain`` (CPU ms of the two habit steps per detected grain).
    """
    from grainhabit.plugins.habit import fit_growth_ratio as growth
    from grainhabit.plugins.synthetic import render as sy

    conf = np.zeros((len(HABITS), len(HABITS)), int)
    errs, cov = [], []
    n_truth = n_match = 0
    lib = growth.model_library()
    growth.library_tables(lib)                     # per-process set-up, not per grain
    timings = {}
    n_found = 0
    t0 = time.time()
    for k in range(n_fields):
        contrast = "bright" if k % 2 == 0 else "dark"
        field = sy.make_field(grains_per_field, (size, size), pixel_size_nm, _MIX, ecd_nm,
                              contrast=contrast, seed=seed + k, touching_fraction=0.0,
                              ecd_gsd=1.12, noise=0.02, blur_px=1.0, gradient=0.3)
        frame = FrameData(source=f"synthetic#{k}", sample="bench", raw=field.image,
                          pixel_size_nm=pixel_size_nm, calibration="synthetic")
        out = run_chain(frame, timings)
        n_found += out.n_grains
        m = match_labels(field.labels, out.labels)
        labels = np.asarray(out.grains["label"])
        row = {int(l): i for i, l in enumerate(labels)}
        n_truth += len(field.grains)
        for lf, lt in m.items():
            i = row.get(lf)
            if i is None or bool(out.grains["edge_cut"][i]):
                continue
            g = field.grains[lt - 1]
            n_match += 1
            found = str(out.grains["habit"][i])
            conf[HABITS.index(g.habit), HABITS.index(found)] += 1
            if g.habit in ("cube", "cuboctahedron", "octahedron"):
                a = g.alpha if np.isfinite(g.alpha) else {"cube": 1.0, "cuboctahedron": 2.0,
                                                          "octahedron": 3.0}[g.habit]
                lo, hi, est = (float(out.grains[c][i]) for c in ("alpha_lo", "alpha_hi", "alpha"))
                cov.append(_covered(a, g.habit, lo, hi, lib.grid[0], lib.grid[-1]))
                if g.habit == "cuboctahedron" and np.isfinite(est):
                    errs.append(abs(est - a))
        if verbose:
            print(f"field {k} ({contrast}): {len(field.grains)} grains, {len(m)} matched, "
                  f"{time.time() - t0:.1f} s so far", flush=True)
    total = conf.sum()
    return {
        "confusion": conf,
        "accuracy": float(np.trace(conf) / total) if total else float("nan"),
        "alpha_mae": float(np.mean(errs)) if errs else float("nan"),
        "coverage": float(np.mean(cov)) if cov else float("nan"),
        "n_cubo": len(errs), "n_poly": len(cov),
        "n_matched": n_match, "n_truth": n_truth, "seconds": time.time() - t0,
        "habit_ms_per_grain": 1000.0 * timings.get("habit_s", 0.0) / max(n_found, 1),
    }


def format_confusion(conf: np.ndarray) -> str:
    """Confusion matrix as text (rows truth, columns found)."""
    short = ["cube", "cubo", "octa", "tab_hex", "tab_tri", "rod", "irreg"]
    lines = ["truth \\ found " + "".join(f"{s:>8}" for s in short)]
    for i, s in enumerate(short):
        lines.append(f"{s:<14}" + "".join(f"{v:>8d}" for v in conf[i]))
    return "\n".join(lines)


def run(argv) -> int:
    """Entry point of ``grainhabit bench habit``."""
    ap = argparse.ArgumentParser(prog="grainhabit bench habit",
                                 description="Habit accuracy and alpha recovery on synthetic fields "
                                             "(invented test data rendered from the crystal model).")
    ap.add_argument("--fields", type=int, default=8, help="number of fields, alternating SEM/TEM look")
    ap.add_argument("--grains", type=int, default=14, help="grains per field")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--size", type=int, default=448, help="field side in pixels")
    ap.add_argument("--pixel-size", type=float, default=10.0, help="nm per pixel")
    ap.add_argument("--ecd", type=float, default=600.0, help="median grain ECD in nm")
    ap.add_argument("--quiet", action="store_true")
    a = ap.parse_args(argv)
    r = evaluate(a.fields, a.grains, a.seed, a.size, a.pixel_size, a.ecd, verbose=not a.quiet)
    print(format_confusion(r["confusion"]))
    print(f"matched {r['n_matched']} of {r['n_truth']} grains (IoU >= 0.5, edge-cut left out)")
    print(f"accuracy {r['accuracy']:.3f} (target >= 0.95)")
    print(f"alpha MAE on cuboctahedra {r['alpha_mae']:.3f} over {r['n_cubo']} grains (target <= 0.10)")
    print(f"alpha range coverage {100 * r['coverage']:.1f} % over {r['n_poly']} polyhedral grains "
          "(target >= 90 %)")
    print(f"classify-habit + fit-growth-ratio {r['habit_ms_per_grain']:.1f} ms CPU per grain "
          "(target <= 15 on an unloaded machine)")
    print(f"time {r['seconds']:.1f} s")
    return 0


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench habit``."""
    return {"habit": run}
