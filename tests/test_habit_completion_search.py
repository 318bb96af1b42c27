"""The centre search of complete_by_symmetry with its per-call tables kept (plugins/habit/engine.py).

Reference: the previous form of ``engine.complete_by_symmetry``, kept below, which built the 9 x 9 grid
of candidate centres, the hull of the true edges (``engine._true_edge_hull``) and the points' support
values (inside ``engine.symmetric_hull_areas``) anew at every call and every step of the search. The
search now builds the grid once per process, keeps the last few true-edge hulls (the two-, three- and
six-fold completions of one split grain start from the same hull) and hands each direction count's
support values to every step. The same floats go in, so every completed outline must be equal vertex
for vertex. The search itself is checked against scipy's ConvexHull and a Nelder-Mead reference in
tests/test_habit_hard.py and tests/test_habit_grain_batches.py. Outlines: regular polygons (handbook
geometry) and random star polygons, cut by straight lines (invented test data).
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import engine as gr


def _previous_complete_by_symmetry(contour_xy, free=None, fold=2, centre=None):
    """complete_by_symmetry before: grid, hull and support values made anew at every call and step."""
    from scipy.spatial import ConvexHull

    pts = gr._true_edge_hull(contour_xy, free)
    cen, area = gr.polygon_centroid(pts)
    scale = math.sqrt(area)
    g = np.linspace(-1.0, 1.0, 9)
    grid = np.stack(np.meshgrid(g, g), axis=-1).reshape(-1, 2)
    best, half, stop = np.asarray(cen, float), 0.6 * scale, 1e-3 * scale
    if centre is not None:
        best, half, stop = np.asarray(centre, float).reshape(2), 0.6 / 9.0 * scale, 1e-2 * scale
    while half > stop:
        cand = best + half * grid
        n_dir = gr.SUPPORT_DIRECTIONS if half > 0.01 * scale else gr.FINE_SUPPORT_DIRECTIONS
        best = cand[int(np.argmin(gr.symmetric_hull_areas(pts, cand, fold, n_dir)))]
        half /= 3.0
    both = np.vstack([pts] + [(pts - best) @ r.T + best for r in gr._turns(fold)])
    return both[ConvexHull(both).vertices]


def _cut_outlines(seed):
    """Densely sampled regular polygons and random stars, each cut by a straight line, with true-edge flags."""
    rng = np.random.default_rng(seed)
    out = []
    for k, r in ((3, 40.0), (4, 30.0), (6, 25.0)):
        t = np.linspace(0, 2 * np.pi, 360, endpoint=False)
        ang = np.floor(t / (2 * np.pi / k)) * (2 * np.pi / k) + np.pi / k
        rad = r * np.cos(np.pi / k) / np.cos(t - ang)
        out.append(np.column_stack([rad * np.cos(t + 0.2), rad * np.sin(t + 0.2)]) + rng.normal(0, 0.2, (360, 2)))
    for _ in range(3):
        k = int(rng.integers(5, 40))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        rad = 30.0 * (1.0 + 0.3 * rng.uniform(-1, 1, k))
        out.append(np.column_stack([rad * np.cos(t), rad * np.sin(t)]))
    cut = []
    for c in out:
        d = c - c.mean(axis=0)
        side = d @ np.array([np.cos(0.9), np.sin(0.9)])
        keep = side < 0.35 * np.abs(d).max()
        piece = c[keep] + rng.uniform(-400, 400, 2)
        free = side[keep] < 0.2 * np.abs(d).max()          # the vertices near the cut are not true edges
        cut.append((piece, free))
    return cut


@pytest.mark.parametrize("fold", [2, 3, 6])
def test_completion_equals_the_search_that_rebuilt_its_tables(fold):
    for piece, free in _cut_outlines(fold):
        for flags in (None, free):
            got = gr.complete_by_symmetry(piece, flags, fold)
            assert np.array_equal(got, _previous_complete_by_symmetry(piece, flags, fold))
            # asked again (the kept hull) and from another completion's centre
            assert np.array_equal(gr.complete_by_symmetry(piece, flags, fold), got)
            c2 = gr.polygon_centroid(gr.complete_by_symmetry(piece, flags, 2))[0]
            assert np.array_equal(gr.complete_by_symmetry(piece, flags, fold, centre=c2),
                                  _previous_complete_by_symmetry(piece, flags, fold, centre=c2))


def test_kept_hull_follows_the_outline_not_the_array():
    # the same array changed in place after a completion, and other flags: a fresh hull each time
    piece, free = _cut_outlines(7)[0]
    a = piece.copy()
    first = gr.complete_by_symmetry(a, free, 2)
    a[:, 0] *= 1.5
    assert np.array_equal(gr.complete_by_symmetry(a, free, 2), _previous_complete_by_symmetry(a, free, 2))
    assert np.array_equal(gr.complete_by_symmetry(a, ~free, 2), _previous_complete_by_symmetry(a, ~free, 2))
    assert np.array_equal(gr.complete_by_symmetry(piece, free, 2), first)
    for k in range(3 * gr._EDGE_HULLS_KEPT):               # many outlines: the memo stays bounded
        gr.complete_by_symmetry(piece + k, None, 2)
    assert len(gr._EDGE_HULLS) <= gr._EDGE_HULLS_KEPT


@pytest.mark.parametrize("fold", [1, 2, 3, 6])
def test_areas_from_handed_support_values_equal_those_computed_inside(fold):
    rng = np.random.default_rng(fold)
    for n in (gr.SUPPORT_DIRECTIONS, gr.FINE_SUPPORT_DIRECTIONS, 36):
        if n % fold:
            continue
        pts = rng.normal(0, 20, (int(rng.integers(3, 40)), 2)) + rng.uniform(-300, 300, 2)
        cen = pts.mean(axis=0) + rng.normal(0, 3, (81, 2))
        ref = gr.symmetric_hull_areas(pts, cen, fold, n)
        assert np.array_equal(gr.symmetric_hull_areas(pts, cen, fold, n, support=gr.support_values(pts, n)), ref)
