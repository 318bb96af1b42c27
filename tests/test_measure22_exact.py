"""measure-grains kernels of the speed22 round against the forms they replaced, bit for bit.

- ``measure_grains._run_pixels``: the grain pixels and their labels from the row runs, against
  ``np.flatnonzero(lab.ravel() != 0)`` and the labels read there (what ``label_moments`` read
  before), and the intensity mean and standard deviation built on them against that form;
- ``convex.convex_hulls``: a pass that drops no repeated vertex keeps the neighbours it found
  (the previous form, kept below, found them a second time), against that form and, for the
  vertex sets, against scipy's ``ConvexHull`` (a general-purpose reference library).

Label images and polygons are invented here (random fields and shapes).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import ConvexHull

from grainhabit.plugins.common.contours import trace_outlines
from grainhabit.plugins.measure import convex
from grainhabit.plugins.measure.measure_grains import _label_runs, _run_pixels, label_moments


def _random_labels(seed: int, shape=(57, 83), n=9) -> np.ndarray:
    rng = np.random.default_rng(seed)
    lab = np.zeros(shape, np.int32)
    for k in range(1, n + 1):
        r, c = rng.integers(0, shape[0]), rng.integers(0, shape[1])
        h, w = rng.integers(1, 15, 2)
        lab[r:r + h, c:c + w] = k
    lab[rng.random(shape) < 0.03] = 0            # holes and ragged edges
    return lab


@pytest.mark.parametrize("seed", range(6))
def test_run_pixels_equal_the_nonzero_pixels(seed):
    shapes = [(57, 83), (1, 40), (40, 1), (5, 5)]
    lab = _random_labels(seed, shapes[seed % len(shapes)], n=4 + seed)
    for case in (lab, np.zeros_like(lab), np.full_like(lab, 3)):
        fg, ids = _run_pixels(_label_runs(case))
        ref_fg = np.flatnonzero(case.ravel() != 0)
        assert fg.dtype == ref_fg.dtype and np.array_equal(fg, ref_fg)
        ref_ids = case.ravel()[ref_fg].astype(np.intp)
        assert ids.dtype == ref_ids.dtype and np.array_equal(ids, ref_ids)


@pytest.mark.parametrize("seed", range(4))
def test_intensity_moments_equal_the_pixel_form(seed):
    lab = _random_labels(seed)
    image = np.random.default_rng(100 + seed).normal(1000.0, 37.0, lab.shape).astype(np.float32)
    got = label_moments(lab, image)
    # reference: the per-pixel form label_moments used before (np.flatnonzero over the frame)
    n = int(lab.max())
    flat = lab.ravel()
    fg = np.flatnonzero(flat != 0)
    ids = flat[fg].astype(np.intp)
    vals = image.ravel()[fg].astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / np.bincount(ids, None, n + 1)[1:].astype(np.float64)
        mean = np.bincount(ids, vals, n + 1)[1:] * inv
        dv = vals - np.concatenate([[0.0], mean])[ids]
        std = np.sqrt(np.bincount(ids, dv * dv, n + 1)[1:] * inv)
    np.testing.assert_array_equal(got["mean"], mean)
    np.testing.assert_array_equal(got["std"], std)


def _reference_convex_hulls(xy, offsets, max_passes=200):
    """``convex.convex_hulls`` before this round: the neighbours found again after the repeat check."""
    xy = np.asarray(xy, dtype=np.float64)
    offsets = np.asarray(offsets, dtype=np.intp)
    n = len(offsets) - 1
    scale = float(np.abs(xy).max()) if len(xy) else 1.0
    eps = 1e-12 * max(scale, 1.0) ** 2
    counts = np.diff(offsets)
    cur, cur_gid = xy, np.repeat(np.arange(n), counts)
    cur_off = offsets.copy()
    settled = False
    for _ in range(max_passes):
        _, prv, _ = convex._cyclic_neighbours(cur_off)
        before = cur[prv]
        distinct = (cur[:, 0] != before[:, 0]) | (cur[:, 1] != before[:, 1])
        lone = np.bincount(cur_gid[distinct], minlength=n) == 0
        starts = cur_off[:-1][lone & (np.diff(cur_off) > 0)]
        distinct[starts] = True
        if not np.all(distinct):
            cur, cur_gid = cur[distinct], cur_gid[distinct]
            cur_off = np.zeros(n + 1, dtype=np.intp)
            np.cumsum(np.bincount(cur_gid, minlength=n), out=cur_off[1:])
        _, prv, nxt = convex._cyclic_neighbours(cur_off)
        a = cur - cur[prv]
        b = cur[nxt] - cur
        cross = a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]
        drop = cross <= eps
        left = np.bincount(cur_gid[~drop], minlength=n)
        drop &= left[cur_gid] >= 3
        if not np.any(drop):
            settled = True
            break
        keep = ~drop
        cur, cur_gid = cur[keep], cur_gid[keep]
        cur_off = np.zeros(n + 1, dtype=np.intp)
        np.cumsum(np.bincount(cur_gid, minlength=n), out=cur_off[1:])
    hk = np.diff(cur_off)
    good = hk >= 3
    if not settled:
        _, prv, nxt = convex._cyclic_neighbours(cur_off)
        a = cur - cur[prv]
        b = cur[nxt] - cur
        bad = (a[:, 0] * b[:, 1] - a[:, 1] * b[:, 0]) <= eps
        good &= np.bincount(cur_gid[bad], minlength=n) == 0
    good &= convex._turns_once(cur, cur_off)
    good &= convex._contains_all(cur, cur_off, xy, offsets, eps)
    sel = good[cur_gid]
    parts, gids = [cur[sel]], [cur_gid[sel]]
    for i in np.flatnonzero(~good):
        h = convex._hull(xy[offsets[i]:offsets[i + 1]])
        parts.append(h.reshape(-1, 2))
        gids.append(np.full(len(h), i, dtype=cur_gid.dtype))
    h_xy, h_gid = np.concatenate(parts), np.concatenate(gids)
    order = np.argsort(h_gid, kind="stable")
    h_off = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(np.bincount(h_gid, minlength=n), out=h_off[1:])
    return h_xy[order].reshape(-1, 2), h_off


def _star_polygons(seed: int, n: int = 12):
    """Random star-shaped polygons (counter-clockwise), some with repeated vertices, one of a single point."""
    rng = np.random.default_rng(seed)
    parts = []
    for i in range(n):
        k = int(rng.integers(5, 40))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = rng.uniform(3, 10, k)
        p = np.round(np.c_[20 * i + r * np.cos(t), r * np.sin(t)] * 2) / 2      # on a half-pixel grid
        if i % 3 == 0:
            p = np.repeat(p, rng.integers(1, 3, k), axis=0)                     # repeated vertices
        parts.append(p)
    parts.append(np.array([[5.0, 5.0], [5.0, 5.0]]))
    off = np.zeros(len(parts) + 1, np.intp)
    np.cumsum([len(p) for p in parts], out=off[1:])
    return np.concatenate(parts), off


@pytest.mark.parametrize("seed", range(5))
def test_convex_hulls_equal_the_previous_form(seed):
    cases = [_star_polygons(seed)]
    lab = _random_labels(seed, (64, 64), n=7)
    outl = trace_outlines(lab, int(lab.max()), 9)
    cases += [(outl.raw_xy, outl.offsets), (outl.pixel_xy, outl.offsets)]
    for xy, off in cases:
        got, got_off = convex.convex_hulls(xy, off)
        ref, ref_off = _reference_convex_hulls(xy, off)
        assert np.array_equal(got_off, ref_off)
        assert got.tobytes() == ref.tobytes()
        # the vertex sets against scipy's qhull where a polygon spans an area
        for i in range(len(off) - 1):
            pts = np.unique(xy[off[i]:off[i + 1]], axis=0)
            if len(pts) < 3 or np.linalg.matrix_rank(pts - pts[0]) < 2:
                continue
            q = pts[ConvexHull(pts).vertices]
            mine = got[got_off[i]:got_off[i + 1]]
            assert sorted(map(tuple, q)) == sorted(map(tuple, mine))
