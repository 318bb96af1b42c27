"""Figures of the report, each returned as a ``data:`` URI for one self-contained page.

Drawn with matplotlib's object-oriented API on the Agg canvas (pyplot's
global state is never touched). Every figure is meant to be read in
greyscale too: series differ by line style, marker or lightness as well as
by hue.
"""

from __future__ import annotations

import base64
import io
import math

import numpy as np

from grainhabit.plugins.habit.vocabulary import HABIT_COLOURS, HABIT_LINES, HABIT_MARKERS, HABITS


#: Friendly axis labels of summary variables (the variable name is used otherwise).
LABELS = {
    "grain_count": "grains counted",
    "ecd_mean_nm": "mean ECD (nm)",
    "ecd_sd_nm": "ECD sd (nm)",
    "ecd_cov_pct": "size COV (%)",
    "ecd_d10_nm": "D10 (nm)",
    "ecd_d50_nm": "D50 (nm)",
    "ecd_d90_nm": "D90 (nm)",
    "sauter_d32_nm": "D[3,2] (nm)",
    "de_brouckere_d43_nm": "D[4,3] (nm)",
    "habit_number_fraction": "fraction by number",
    "habit_area_fraction": "fraction by area",
    "alpha_median": "median \u03b1",
    "edge_cut_fraction": "edge-cut fraction",
}


def label_of(criterion: str) -> str:
    """Axis label of a criterion name such as ``habit_number_fraction[cube]``."""
    var, _, habit = criterion.partition("[")
    base = LABELS.get(var, var)
    return f"{habit.rstrip(']')} {base}" if habit else base


def figure(**kwargs):
    """A new matplotlib ``Figure`` on the Agg canvas."""
    from matplotlib.figure import Figure

    return Figure(**kwargs)


def data_uri(fig, fmt: str = "png", dpi: int = 100, quality: int = 82) -> str:
    """Encode a figure as a ``data:`` URI (PNG, or JPEG for photographs)."""
    buf = io.BytesIO()
    if fmt == "jpeg":
        fig.savefig(buf, format="jpeg", dpi=dpi, pil_kwargs={"quality": quality})
        mime = "image/jpeg"
    else:
        fig.savefig(buf, format="png", dpi=dpi)
        mime = "image/png"
    return f"data:{mime};base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _sequence_styles(n: int):
    """Colour, line style and width for ``n`` batches in time order: later is darker and thicker."""
    from matplotlib import colormaps

    cmap = colormaps["viridis"]
    styles = ["-", "--", "-.", ":"]
    out = []
    for i in range(n):
        t = 0.85 - 0.85 * (i / max(n - 1, 1))  # viridis: lightness falls with t falling
        out.append((cmap(t), styles[(n - 1 - i) % len(styles)], 2.6 if i == n - 1 else 1.4))
    return out


def size_overlay(batches: list[tuple[str, np.ndarray]], limits: list[tuple[str, float, float]],
                 title: str, bins: int = 30) -> str:
    """ECD distributions of several batches on one axis.

    Each batch is drawn as a Gaussian kernel density estimate of its number
    distribution (scipy.stats.gaussian_kde, Scott's bandwidth), which keeps
    several small batches readable on one axis where histograms would
    overlap into noise; the newest batch also gets its histogram, faintly.

    Parameters
    ----------
    batches : list of (label, ecd_nm)
        In time order; the last is drawn darkest and thickest.
    limits : list of (label, low, high)
        Spec limits on a size statistic, drawn as a shaded band.
    title : str
    bins : int
        Histogram classes of the newest batch.

    Returns
    -------
    str
        ``data:`` URI of a PNG.
    """
    from scipy.stats import gaussian_kde

    n = len(batches)
    fig = figure(figsize=(7.0, 3.3 + 0.17 * ((n + 2) // 3)))
    ax = fig.subplots()
    allx = np.concatenate([x for _, x in batches if x.size]) if any(x.size for _, x in batches) else np.zeros(0)
    if allx.size:
        lo, hi = np.percentile(allx, [0.5, 99.5])
        grid = np.linspace(max(lo * 0.8, 0), hi * 1.2, 400)
        for lab, a, b in limits:
            a = a if math.isfinite(a) else grid[0]
            b = b if math.isfinite(b) else grid[-1]
            ax.axvspan(a, b, color="#999999", alpha=0.18, lw=0, label=lab)
        styles = _sequence_styles(n)
        last = batches[-1][1] if batches else np.zeros(0)
        if last.size:
            ax.hist(last, bins=np.linspace(grid[0], grid[-1], bins + 1), density=True, color=styles[-1][0],
                    alpha=0.15, lw=0)
        for (lab, x), (c, ls, lw) in zip(batches, styles):
            if x.size >= 2 and np.ptp(x) > 0:
                ax.plot(grid, gaussian_kde(x)(grid), color=c, ls=ls, lw=lw, label=lab)
        ax.set_ylim(0, None)
        ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=3, frameon=False)
    else:
        ax.text(0.5, 0.5, "no grains counted", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("ECD (nm)")
    ax.set_ylabel("grains per nm (density)")
    ax.set_title(title, fontsize=9)
    fig.tight_layout()
    return data_uri(fig)


def control_chart(groups: list[str], series: list[dict], title: str) -> str:
    """Individuals charts of one product, one panel per criterion.

    Parameters
    ----------
    groups : list of str
        Labels of the points in time order (e.g. nights).
    series : list of dict
        One per criterion: ``label``, ``x`` (positions into ``groups``),
        ``value``, ``ci_lo``, ``ci_hi``, ``centre``, ``lcl``, ``ucl``,
        ``limit_lo``, ``limit_hi``, ``rules`` (list of str per point).

    Returns
    -------
    str
        ``data:`` URI of a PNG.
    """
    n = max(len(series), 1)
    height = 1.75 * n + 1.3
    fig = figure(figsize=(7.2, height))
    axes = np.atleast_1d(fig.subplots(n, 1, sharex=True))
    # fixed margins in inches (constrained layout costs seconds per chart)
    fig.subplots_adjust(left=0.11, right=0.97, top=1 - 0.75 / height, bottom=0.55 / height, hspace=0.12)
    x_all = np.arange(len(groups))
    for ax, s in zip(axes, series):
        x = np.asarray(s["x"], int)
        v = np.asarray(s["value"], float)
        lo = np.asarray(s["ci_lo"], float)
        hi = np.asarray(s["ci_hi"], float)
        err = np.vstack([np.nan_to_num(v - lo), np.nan_to_num(hi - v)]).clip(min=0)
        ax.errorbar(x, v, yerr=err, color="#9a9a9a", lw=0, elinewidth=0.9, capsize=2, zorder=1)
        ax.plot(x, v, color="#1a2a6e", marker="o", ms=4, lw=1.2, zorder=3, label="value")
        # each point's limits come from the nights before it: drawn as steps
        for key, style, lab in (("centre", ":", "centre (nights before)"), ("lcl", "--", "control limits"),
                                ("ucl", "--", None)):
            val = np.asarray(s[key], float)
            if np.isfinite(val).any():
                ax.step(x, val, where="mid", color="#555", ls=style, lw=1, label=lab, zorder=2)
        for key, lab in (("limit_lo", "spec limits"), ("limit_hi", None)):
            val = s[key]
            if math.isfinite(val):
                ax.axhline(val, color="#b3001b", ls="-", lw=1.6, label=lab if key == "limit_lo" or
                           not math.isfinite(s["limit_lo"]) else None, zorder=2)
        flagged = [i for i, r in enumerate(s["rules"]) if r]
        if flagged:
            ax.scatter(x[flagged], v[flagged], s=110, facecolors="none", edgecolors="#d9541a", linewidths=2,
                       zorder=4, label="run rule broken")
            for i in flagged:
                ax.annotate("rule " + s["rules"][i].replace(" ", ","), (x[i], v[i]), xytext=(4, 6),
                            textcoords="offset points", fontsize=7, color="#6b2a00")
        ax.set_ylabel(s["label"], fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(alpha=0.25)
        ax.margins(x=0.06, y=0.25)
    axes[0].legend(fontsize=7, ncol=5, loc="lower left", bbox_to_anchor=(0, 1.02), frameon=False)
    axes[-1].set_xticks(x_all, groups, rotation=30 if len(groups) > 4 else 0, ha="right" if len(groups) > 4 else
                        "center")
    fig.suptitle(title, fontsize=9, y=1 - 0.08 / height)
    return data_uri(fig)


def habit_bars(samples: list[str], habits: list[str], val, lo, hi, ylabel: str) -> str:
    """Habit fractions per sample as grouped bars with interval whiskers."""
    fig = figure(figsize=(max(6.0, 0.9 * len(samples) + 3), 3.4), layout="constrained")
    ax = fig.subplots()
    width = 0.8 / max(len(habits), 1)
    x = np.arange(len(samples))
    for j, h in enumerate(habits):
        v = np.nan_to_num(val[:, j])
        err = np.vstack([np.nan_to_num(v - lo[:, j]), np.nan_to_num(hi[:, j] - v)]).clip(min=0)
        ax.bar(x - 0.4 + (j + 0.5) * width, v, width, color=HABIT_COLOURS.get(h, "#888"), edgecolor="#222",
               linewidth=0.5, hatch=None, yerr=err, capsize=1.5, ecolor="#444", error_kw={"elinewidth": 0.7},
               label=h)
    ax.set_ylabel(ylabel)
    ax.set_ylim(0, 1.05)
    ax.grid(axis="y", alpha=0.3)
    ax.set_xticks(x, samples, rotation=30 if len(samples) > 5 else 0, ha="right" if len(samples) > 5 else "center",
                  fontsize=8)
    fig.legend(fontsize=7, ncol=4, loc="outside upper center")
    return data_uri(fig)


def alpha_scatter(ecd, alpha, habit) -> str:
    """ECD against determined alpha, one marker per habit."""
    fig = figure(figsize=(6.4, 3.6))
    ax = fig.subplots()
    use = np.isfinite(alpha) & np.isfinite(ecd)
    for h in HABITS:
        m = use & (habit == h)
        if m.any():
            ax.scatter(ecd[m], alpha[m], s=14, marker=HABIT_MARKERS[h], color=HABIT_COLOURS[h],
                       edgecolors="#222" if HABIT_MARKERS[h] not in "|x" else None, linewidths=0.4,
                       label=f"{h} ({int(m.sum())})")
    if use.any():
        ax.legend(fontsize=7, loc="best")
        for v, t in ((1.0, "cube"), (3.0, "octahedron")):
            ax.axhline(v, color="#777", lw=0.8)
            ax.text(0.01, v, f" {t}", transform=ax.get_yaxis_transform(), fontsize=7, va="bottom", color="#555")
    else:
        ax.text(0.5, 0.5, "no grain has a determined \u03b1", ha="center", va="center", transform=ax.transAxes)
    ax.set_xlabel("ECD (nm)")
    ax.set_ylabel("\u03b1 = \u221a3 v100 / v111")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    return data_uri(fig)


def frame_view(img, polygons, numbers, centroids, habits, edge, side_px: int = 900) -> str:
    """A frame's thumbnail with every grain's outline (habit colour and line) and number.

    Parameters
    ----------
    img : ndarray of uint8, shape (rows, cols)
        Thumbnail.
    polygons : list of (xs, ys)
        Outline of each grain in thumbnail pixels.
    numbers : list of int
        Grain numbers (rows of the ``grains`` table).
    centroids : ndarray, shape (n, 2)
        Label positions (x, y) in thumbnail pixels.
    habits : list of str
    edge : ndarray of bool
        Grains touching the frame border (thin outlines).
    side_px : int
        Size of the longer side of the picture.

    Returns
    -------
    str
        ``data:`` URI of a JPEG.
    """
    from matplotlib import patheffects

    from PIL import Image

    rows, cols = img.shape
    dpi = 100
    scale = side_px / max(rows, cols)
    out_w, out_h = int(round(cols * scale)), int(round(rows * scale))
    # resample once with PIL (bicubic), then place pixel for pixel: much cheaper than resampling in matplotlib
    big = np.asarray(Image.fromarray(np.ascontiguousarray(img, dtype=np.uint8)).resize((out_w, out_h),
                                                                                      Image.Resampling.BICUBIC))
    fig = figure(figsize=(out_w / dpi, out_h / dpi))
    ax = fig.add_axes([0, 0, 1, 1])
    ax.imshow(big, cmap="gray", vmin=0, vmax=255, interpolation="nearest", extent=(0, cols, rows, 0))
    halo = [patheffects.Stroke(linewidth=2.8, foreground="white"), patheffects.Normal()]
    text_halo = [patheffects.Stroke(linewidth=2.2, foreground="white"), patheffects.Normal()]
    for (xs, ys), num, (cx, cy), h, e in zip(polygons, numbers, centroids, habits, edge):
        if len(xs) >= 2:
            ax.plot(xs, ys, color=HABIT_COLOURS.get(h, "#ff00ff"), ls=HABIT_LINES.get(h, "-"),
                    lw=1.7 if not e else 0.8, path_effects=halo)
        if np.isfinite(cx) and np.isfinite(cy):
            ax.text(cx, cy, str(num), fontsize=7.5, ha="center", va="center", color="#000",
                    path_effects=text_halo)
    ax.set_xlim(0, cols)
    ax.set_ylim(rows, 0)
    ax.axis("off")
    return data_uri(fig, fmt="jpeg", dpi=dpi)
