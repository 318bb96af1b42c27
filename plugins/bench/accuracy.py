"""Benchmark ``grainhabit bench accuracy``: segmentation against exact truth.

Synthetic fields from :mod:`grainhabit.plugins.synthetic.render` (every habit, facet shading,
illumination gradient, blur, Poisson + Gaussian noise, touching pairs, a
lognormal size spread; invented data) go through ``flatten-background`` and
``segment-grains`` with their default parameters. Printed per contrast:

- recall and precision of a one-to-one matching at IoU >= 0.5 (an IoU above
  one half can pair each grain with at most one other, so the matching is
  read straight off the contingency table of the two label images);
- median absolute ECD error (%) of the matched grains;
- the fraction of touching pairs split correctly (both members matched).

Truth grains cut by the frame border are left out of the scoring, as they
are from the statistics; so are found grains that are edge-cut or match an
edge-cut truth grain.

Targets: recall >= 0.97, precision >= 0.97, median ECD error <= 2 %,
touching pairs split >= 0.90, in both contrasts. ``--check`` makes the exit
code 1 when a target is missed. ``--misses`` lists the unmatched truth and
found grains of every field (habit, size, bounding box, best overlap), to
look at the failures; it changes no figure.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from grainhabit import hookimpl

GRAINHABIT_API = 1
#: The name this plugin is registered under.
NAME = "bench-accuracy"

TARGETS = {"recall": 0.97, "precision": 0.97, "ecd_err_pct": 2.0, "pairs_split": 0.90}


def match_labels(truth: np.ndarray, pred: np.ndarray, min_iou: float = 0.5):
    """One-to-one matches of two label images at IoU >= ``min_iou`` (>= 0.5).

    Parameters
    ----------
    truth, pred : ndarray of int, shape (rows, cols)
        0 background, 1..n labels.
    min_iou : float
        Intersection over union needed for a match; at least 0.5.

    Returns
    -------
    pairs : ndarray of int, shape (k, 2)
        Matched (truth label, predicted label).
    iou : ndarray of float, shape (k,)
    areas_truth, areas_pred : ndarray of int
        Pixel areas indexed by label (index 0 is the background).

    Notes
    -----
    ``IoU = |T & P| / (|T| + |P| - |T & P|)`` from
    :func:`skimage.metrics.contingency_table`. Above 0.5 a grain overlaps more
    than half of the union with its partner, so no second partner can reach
    0.5 as well: the matching is unique without an assignment solver.
    """
    from skimage.metrics import contingency_table

    if min_iou < 0.5:
        raise ValueError(f"min_iou must be >= 0.5 for a unique matching, got {min_iou}")
    table = contingency_table(truth, pred).tocoo()
    at = np.bincount(truth.ravel(), minlength=int(truth.max()) + 1)
    ap = np.bincount(pred.ravel(), minlength=int(pred.max()) + 1)
    t, p, inter = table.row, table.col, table.data.astype(float)
    ok = (t > 0) & (p > 0)
    t, p, inter = t[ok], p[ok], inter[ok]
    iou = inter / (at[t] + ap[p] - inter)
    sel = iou >= min_iou
    return np.column_stack([t[sel], p[sel]]), iou[sel], at, ap


def border_labels(labels: np.ndarray) -> set:
    """Labels touching the frame border."""
    edge = np.concatenate([labels[0, :], labels[-1, :], labels[:, 0], labels[:, -1]])
    return set(int(v) for v in np.unique(edge) if v > 0)


def score_frame(truth: np.ndarray, pred: np.ndarray, touching_pairs) -> dict:
    """Counts for one frame (see the module docstring)."""
    pairs, _, at, ap = match_labels(truth, pred)
    t_edge, p_edge = border_labels(truth), border_labels(pred)
    t_all = set(range(1, int(truth.max()) + 1)) - t_edge
    matched_t = {int(t): int(p) for t, p in pairs}
    p_to_t = {int(p): int(t) for t, p in pairs}
    p_all = {p for p in range(1, int(pred.max()) + 1)
             if p not in p_edge and not (p in p_to_t and p_to_t[p] in t_edge)}
    tp = [t for t in t_all if t in matched_t]
    ecd_t = np.sqrt(4 * at[tp] / np.pi)
    ecd_p = np.sqrt(4 * ap[[matched_t[t] for t in tp]] / np.pi)
    scored_pairs = [(a, b) for a, b in touching_pairs if a not in t_edge and b not in t_edge]
    split_ok = sum(1 for a, b in scored_pairs if a in matched_t and b in matched_t)
    return {"n_truth": len(t_all), "n_pred": len(p_all), "tp": len(tp),
            "tp_pred": sum(1 for p in p_all if p in p_to_t),
            "ecd_err": list(100 * np.abs(ecd_p - ecd_t) / ecd_t),
            "pairs": len(scored_pairs), "pairs_ok": split_ok}


def describe_misses(truth: np.ndarray, pred: np.ndarray, grains, touching_pairs) -> list[str]:
    """One line per unmatched truth grain and per unmatched found grain (diagnostics, not scoring).

    Parameters
    ----------
    truth, pred : ndarray of int, shape (rows, cols)
        Label images (0 background).
    grains : sequence of GrainSpec
        Truth label i + 1 is ``grains[i]``.
    touching_pairs : list of (int, int)
        Truth label pairs placed touching.

    Returns
    -------
    list of str
        ``missed``: truth label, habit, ECD (nm), bounding box (px), the found grain covering most
        of it and the fraction it covers, touching partner if any. ``extra``: found label, area (px),
        bounding box, the truth grain it overlaps most and the fraction of it that is background.
        Grains cut by the frame border are left out, as in :func:`score_frame`.
    """
    from scipy import ndimage as ndi

    pairs, _, at, ap = match_labels(truth, pred)
    t_edge, p_edge = border_labels(truth), border_labels(pred)
    matched_t, matched_p = set(int(t) for t in pairs[:, 0]), set(int(p) for p in pairs[:, 1])
    t_box, p_box = ndi.find_objects(truth), ndi.find_objects(pred)

    def box(sl):
        return f"rows {sl[0].start}-{sl[0].stop - 1} cols {sl[1].start}-{sl[1].stop - 1}"

    lines = []
    for t in range(1, int(truth.max()) + 1):
        if t in t_edge or t in matched_t or t_box[t - 1] is None:
            continue
        over = np.bincount(pred[t_box[t - 1]][truth[t_box[t - 1]] == t], minlength=1)
        over[0] = 0
        best = int(np.argmax(over)) if over.any() else 0
        partner = [b if a == t else a for a, b in touching_pairs if t in (a, b)]
        g = grains[t - 1]
        lines.append(f"missed truth {t}: {g.habit}, ECD {g.ecd_nm:.0f} nm, {box(t_box[t - 1])}; found grain "
                     f"{best} covers {over.max() / at[t]:.2f}" + (f"; touching {partner}" if partner else ""))
    for p in range(1, int(pred.max()) + 1):
        if p in p_edge or p in matched_p or p_box[p - 1] is None:
            continue
        over = np.bincount(truth[p_box[p - 1]][pred[p_box[p - 1]] == p], minlength=1)
        background = over[0] / ap[p]
        over[0] = 0
        best = int(np.argmax(over)) if over.any() else 0
        if best in t_edge:
            continue
        lines.append(f"extra found {p}: {ap[p]} px, {box(p_box[p - 1])}; mostly over truth {best}, "
                     f"{background:.2f} background")
    return lines


def run_contrast(contrast: str, args) -> dict:
    """Generate, segment and score ``args.frames`` fields of one contrast."""
    from grainhabit.frame import FrameData
    from grainhabit.plugins.preprocess import flatten_background as preprocess
    from grainhabit.plugins.segment import segment_grains as segment
    from grainhabit.plugins.synthetic import render as synthetic

    habits = {h: 1.0 for h in synthetic.HABITS}
    tot = {"n_truth": 0, "n_pred": 0, "tp": 0, "tp_pred": 0, "ecd_err": [], "pairs": 0, "pairs_ok": 0}
    t_seg = 0.0
    for i in range(args.frames):
        hard = getattr(args, "hard", False)
        # hard survey: 30 % touching, half the signal-to-noise, one field in four defocused
        blur = args.blur * (2.5 if hard and i % 4 == 3 else 1.0)
        field = synthetic.make_field(args.grains, (args.size, args.size), args.pixel_size, habits,
                                     args.ecd, contrast=contrast, seed=args.seed + i, ecd_gsd=args.gsd,
                                     touching_fraction=0.3 if hard else args.touching,
                                     noise=args.noise * (2.0 if hard else 1.0),
                                     gradient=args.gradient, blur_px=blur)
        if hard:
            field = synthetic.add_artefacts(field, seed=args.seed + i)
        frame = FrameData(source=f"bench-{contrast}-{i}.tif", sample="bench", raw=field.image,
                          pixel_size_nm=args.pixel_size)
        t0 = time.perf_counter()
        frame = preprocess.grainhabit_preprocess(frame=frame, params={})
        frame = segment.grainhabit_segment(frame=frame, params={})
        t_seg += time.perf_counter() - t0
        s = score_frame(field.labels, frame.labels, field.touching_pairs)
        if getattr(args, "misses", False):
            for line in describe_misses(field.labels, frame.labels, field.grains, field.touching_pairs):
                print(f"  {contrast} field {i} (seed {args.seed + i}): {line}")
        for k in tot:
            tot[k] += s[k]
    return {
        "recall": tot["tp"] / max(tot["n_truth"], 1),
        "precision": tot["tp_pred"] / max(tot["n_pred"], 1),
        "ecd_err_pct": float(np.median(tot["ecd_err"])) if tot["ecd_err"] else float("nan"),
        "pairs_split": tot["pairs_ok"] / tot["pairs"] if tot["pairs"] else float("nan"),
        "n_truth": tot["n_truth"], "n_pairs": tot["pairs"], "seconds": t_seg,
    }


def run(argv) -> int:
    """Entry point of ``grainhabit bench accuracy``; returns the exit code."""
    ap = argparse.ArgumentParser(prog="grainhabit bench accuracy",
                                 description="Segmentation accuracy on synthetic fields with exact truth "
                                             "(invented data).")
    ap.add_argument("--frames", type=int, default=4, help="fields per contrast (default 4)")
    ap.add_argument("--grains", type=int, default=50, help="grains per field (default 50)")
    ap.add_argument("--size", type=int, default=768, help="field side in pixels (default 768)")
    ap.add_argument("--pixel-size", type=float, default=5.0, help="nm per pixel (default 5)")
    ap.add_argument("--ecd", type=float, default=300.0, help="median ECD in nm (default 300)")
    ap.add_argument("--gsd", type=float, default=1.2, help="geometric sd of ECD (default 1.2)")
    ap.add_argument("--touching", type=float, default=0.15, help="fraction placed touching (default 0.15)")
    ap.add_argument("--noise", type=float, default=0.02, help="noise amplitude (default 0.02)")
    ap.add_argument("--gradient", type=float, default=0.3, help="illumination ramp (default 0.3)")
    ap.add_argument("--blur", type=float, default=1.0, help="blur sigma in pixels (default 1)")
    ap.add_argument("--seed", type=int, default=0, help="first seed (default 0)")
    ap.add_argument("--contrast", choices=("bright", "dark", "both"), default="both")
    ap.add_argument("--hard", action="store_true",
                    help="hard survey: 30 %% of grains touching or partly overlapping, twice the noise, one "
                         "field in four defocused (2.5x blur), charging streaks and debris specks under 3 px")
    ap.add_argument("--check", action="store_true", help="exit 1 if a target is missed")
    ap.add_argument("--misses", action="store_true",
                    help="list every unmatched truth grain and found grain per field (diagnostics)")
    args = ap.parse_args(argv)
    if args.frames < 1 or args.grains < 1 or args.size < 64 or args.pixel_size <= 0:
        ap.error("--frames and --grains must be >= 1, --size >= 64, --pixel-size > 0")
    contrasts = ("bright", "dark") if args.contrast == "both" else (args.contrast,)
    print(f"segmentation accuracy{' (hard survey)' if args.hard else ''}: {args.frames} field(s) of {args.size}x{args.size} px per contrast, "
          f"{args.grains} grains, {args.pixel_size:g} nm/px, median ECD {args.ecd:g} nm, seed {args.seed}")
    print(f"{'contrast':<9}{'grains':>7}{'recall':>8}{'precision':>10}{'ECD err %':>10}"
          f"{'pairs':>6}{'split':>7}{'seconds':>9}")
    ok = True
    for c in contrasts:
        r = run_contrast(c, args)
        print(f"{c:<9}{r['n_truth']:>7}{r['recall']:>8.3f}{r['precision']:>10.3f}{r['ecd_err_pct']:>10.2f}"
              f"{r['n_pairs']:>6}{r['pairs_split']:>7.2f}{r['seconds']:>9.1f}")
        ok &= (r["recall"] >= TARGETS["recall"] and r["precision"] >= TARGETS["precision"]
               and r["ecd_err_pct"] <= TARGETS["ecd_err_pct"]
               and not r["pairs_split"] < TARGETS["pairs_split"])
    print("targets (recall, precision >= 0.97; ECD error <= 2 %; pairs split >= 0.90): "
          + ("met" if ok else "MISSED"))
    return 1 if (args.check and not ok) else 0


@hookimpl
def grainhabit_benchmarks():
    """Offer ``grainhabit bench accuracy``."""
    return {"accuracy": run}
