"""Measure kernels written without scipy.signal (same values), against scipy's own functions.

References named beside each check: ``scipy.signal.savgol_coeffs`` (Savitzky-Golay weights) and the
cyclic smoothing written with them.
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.measure import outline


@pytest.mark.parametrize("window", [3, 5, 7, 9, 11, 15, 21, 31])
def test_savgol_coefficients_equal_scipy_savgol_coeffs(window):
    # reference library: scipy.signal.savgol_coeffs (smoothing, use="conv"), bit for bit
    from scipy.signal import savgol_coeffs

    for order in range(0, min(window, 6)):
        got = outline.savgol_coefficients(window, order)
        want = savgol_coeffs(window, order)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)


def test_savgol_coefficients_refuse_bad_windows():
    for window, order in ((4, 2), (3, 3), (5, -1)):
        with pytest.raises(ValueError):
            outline.savgol_coefficients(window, order)


def test_smooth_closed_contour_equals_the_scipy_weights_form():
    # reference library: scipy.signal.savgol_coeffs, convolved cyclically as smooth_closed_contour did it
    # (a staircase outline of an invented disc)
    from scipy.signal import savgol_coeffs
    from skimage.measure import find_contours

    yy, xx = np.mgrid[:50, :50]
    c = find_contours((np.hypot(yy - 25, xx - 24) < 17).astype(float), 0.5)[0][:-1, ::-1]
    for window in (5, 9):
        coef, h = savgol_coeffs(window, 2), window // 2
        ext = np.concatenate([c[-h:], c, c[:h]])
        want = np.stack([np.convolve(ext[:, j], coef, mode="valid") for j in range(2)], axis=1)
        np.testing.assert_array_equal(outline.smooth_closed_contour(c, window, 2), want)


def _label_moments_before(lab, image, n):
    # the function as it was (np.flatnonzero of the labels themselves)
    flat = lab.ravel()
    fg = np.flatnonzero(flat)
    ids = flat[fg].astype(np.intp)
    rows, cols = np.divmod(fg, lab.shape[1])
    x, y = cols.astype(np.float64), rows.astype(np.float64)

    def total(w=None):
        return np.bincount(ids, w, n + 1)[1:n + 1]

    area = total().astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / area
        mx, my = total(x) * inv, total(y) * inv
        out = {"area": area, "cx": mx + 0.5, "cy": my + 0.5, "mxx": total(x * x) * inv - mx * mx + 1.0 / 12.0,
               "myy": total(y * y) * inv - my * my + 1.0 / 12.0, "mxy": total(x * y) * inv - mx * my}
        vals = np.asarray(image).ravel()[fg].astype(np.float64)
        mean = total(vals) * inv
        dv = vals - np.concatenate([[0.0], mean])[ids]
        out["mean"], out["std"] = mean, np.sqrt(total(dv * dv) * inv)
    return out


def test_label_moments_equal_the_form_before():
    # reference: label_moments as it was, bit for bit, on a rendered and segmented frame (invented data),
    # with one label left absent
    from grainhabit.frame import FrameData
    from grainhabit.plugins.bench import harness as bu
    from grainhabit.plugins.measure.measure_grains import label_moments
    from grainhabit.plugins.preprocess import flatten_background
    from grainhabit.plugins.segment import segment_grains

    raw = bu.render_frames(1, 512, grains=25, seed=2)[0].astype(np.float32)
    frame = FrameData(source="t.tif", sample="t", raw=raw, pixel_size_nm=bu.PIXEL_SIZE_NM)
    frame = segment_grains.grainhabit_segment(frame=flatten_background.grainhabit_preprocess(frame=frame, params={}),
                                              params={})
    lab = frame.labels.copy()
    lab[lab == 3] = 0
    n = int(lab.max()) + 1
    got, want = label_moments(lab, frame.image, n), _label_moments_before(lab, frame.image, n)
    assert got.keys() == want.keys()
    for k in want:
        np.testing.assert_array_equal(got[k], want[k])


def _line_before(c, a, b):
    # the edge line of the polygon clean-up as it was: every row of the cumulative table turned into Python
    # floats up front
    import math

    m = len(c)
    cx, cy = (float(v) for v in c.mean(axis=0))
    cc = np.concatenate([c, c]) - (cx, cy)
    x, y = cc[:, 0], cc[:, 1]
    cum = np.zeros((2 * m + 1, 5))
    np.cumsum(np.stack([x, y, x * x, y * y, x * y], axis=1), axis=0, out=cum[1:])
    cum, pts = cum.tolist(), c.tolist()
    span = (b - a) % m
    trim = span // 5
    if span - 2 * trim >= 3:
        s0, n = (a + trim) % m, span - 2 * trim + 1
        lo, hi = cum[s0], cum[s0 + n]
        mx, my = (hi[0] - lo[0]) / n, (hi[1] - lo[1]) / n
        sxx, syy = (hi[2] - lo[2]) / n - mx * mx, (hi[3] - lo[3]) / n - my * my
        sxy = (hi[4] - lo[4]) / n - mx * my
        t = 0.5 * math.atan2(2.0 * sxy, sxx - syy)
        return (mx + cx, my + cy, math.cos(t), math.sin(t))
    (ax, ay), (bx, by) = pts[a], pts[b]
    ln = math.hypot(bx - ax, by - ay)
    return (ax, ay, (bx - ax) / ln, (by - ay) / ln) if ln > 0 else None


def test_cleaner_lines_equal_the_form_before():
    # reference: the edge lines computed from the whole table of Python floats, as before, bit for bit;
    # outlines of an invented square, disc and hexagon
    from skimage.measure import find_contours

    yy, xx = np.mgrid[:60, :60]
    shapes = [(np.abs(yy - 30) < 15) & (np.abs(xx - 28) < 18), np.hypot(yy - 30, xx - 30) < 22,
              (np.abs(yy - 30) < 20) & (np.abs(xx - 30) + 0.58 * np.abs(yy - 30) < 24)]
    for mask in shapes:
        c = np.ascontiguousarray(find_contours(mask.astype(float), 0.5)[0][:-1, ::-1])
        cl = outline._Cleaner(c)
        m = len(c)
        for a in range(0, m, 7):
            for b in range(0, m, 5):
                assert cl.line(a, b) == _line_before(c, a, b)


def _previous_douglas_peucker_packed(xy, offsets, tolerances):
    """Douglas-Peucker of many closed contours, every pass over all their points (the kernel before)."""
    xy = np.asarray(xy, dtype=np.float64)
    off = np.asarray(offsets, dtype=np.intp)
    tol = np.asarray(tolerances, dtype=np.float64)
    n = len(off) - 1
    counts = np.diff(off)
    out = np.zeros(len(xy), dtype=bool)
    if len(xy) == 0:
        return out
    # each contour followed by a copy of its first vertex (the closed chain)
    ext_off = off + np.arange(n + 1)
    gid = np.repeat(np.arange(n), counts + 1)
    local = np.arange(len(xy) + n) - ext_off[:-1][gid]
    src = off[:-1][gid] + np.where(local == counts[gid], 0, local)
    src = np.minimum(src, len(xy) - 1)
    ext = xy[src]
    closing = local == counts[gid]
    keep = np.zeros(len(ext), dtype=bool)
    keep[ext_off[:-1]] = True
    keep[closing] = True
    # vertex farthest from the first one starts the recursion
    d0 = ((ext - ext[ext_off[:-1][gid]]) ** 2).sum(axis=1)
    pt_tol = tol[gid]
    dmax = outline._first_argmax(d0, ext_off)
    seed = dmax[(dmax >= 0)]
    seed = seed[d0[seed] > pt_tol[seed] ** 2]
    keep[seed] = True
    small = counts < 3
    pos = np.arange(len(ext))
    while True:
        kept = np.flatnonzero(keep)
        seg = np.searchsorted(kept, pos, side="right") - 1
        a_i = kept[seg]
        b_i = kept[np.minimum(seg + 1, len(kept) - 1)]
        a, b = ext[a_i], ext[b_i]
        d = b - a
        ln2 = (d**2).sum(axis=1)
        rel = ext - a
        proj = (rel * d).sum(axis=1)
        inside = (proj > 0) & (proj < ln2)
        with np.errstate(invalid="ignore", divide="ignore"):
            perp = np.abs(d[:, 0] * rel[:, 1] - d[:, 1] * rel[:, 0]) / np.sqrt(ln2)
        ends = np.sqrt(np.minimum((rel**2).sum(axis=1), ((ext - b) ** 2).sum(axis=1)))
        dist = np.where(inside, perp, ends)
        dist[keep] = -1.0
        dist[b_i < a_i] = -1.0
        segmax = np.maximum.reduceat(dist, kept)
        best = segmax[seg]
        hit = (dist == best) & (dist > pt_tol)
        cand = np.flatnonzero(hit)
        if len(cand) == 0:
            break
        first = np.ones(len(cand), dtype=bool)
        first[1:] = seg[cand][1:] != seg[cand][:-1]
        keep[cand[first]] = True
    keep_c = keep[~closing]
    keep_c[np.repeat(small, counts)] = True
    return keep_c


def test_douglas_peucker_over_the_open_segments_equals_every_point_pass():
    # reference: the passes over all points of all contours (kept above); the same kept vertices, on
    # traced outlines of drawn grains (skimage.draw; invented test data), regular polygons (handbook
    # geometry) and noisy circles, at several tolerances, tiny contours included
    from skimage.draw import disk, polygon as draw_polygon

    from grainhabit.plugins.common.contours import trace_outlines

    rng = np.random.default_rng(12)
    lab = np.zeros((300, 300), np.int32)
    for i in range(1, 40):
        r, c = rng.integers(10, 290, 2)
        if i % 3:
            rr, cc = draw_polygon(r + rng.normal(0, 14, 6), c + rng.normal(0, 14, 6), shape=lab.shape)
        else:
            rr, cc = disk((r, c), rng.uniform(1, 12), shape=lab.shape)
        lab[rr, cc] = i
    outl = trace_outlines(lab, None, 9)
    t = np.linspace(0, 2 * np.pi, 300, endpoint=False)
    extra = [np.column_stack([np.cos(t), np.sin(t)]) * 40 + rng.normal(0, 0.3, (300, 2)),
             np.array([[0.0, 0.0], [10.0, 0.0], [10.0, 10.0], [0.0, 10.0]]),
             np.array([[0.0, 0.0], [1.0, 0.0]]), np.array([[3.0, 3.0]])]
    parts = [outl.xy[outl.offsets[i]:outl.offsets[i + 1]] for i in range(len(outl))] + extra
    off = np.zeros(len(parts) + 1, np.intp)
    np.cumsum([len(p) for p in parts], out=off[1:])
    xy = np.concatenate(parts)
    for scale in (0.005, 0.02, 0.08):
        tol = np.maximum(scale * np.array([np.sqrt(max(len(p), 1)) * 3 for p in parts]), 0.5)
        got = outline.douglas_peucker_packed(xy, off, tol)
        assert np.array_equal(got, _previous_douglas_peucker_packed(xy, off, tol))
