"""classify-habit's faster kernels (third round) tested against the code they replace.

Each ``_previous_*`` function below is the earlier implementation, kept here (not in the
package); the new kernels must give the same bits on drawn grains (skimage.draw), random
polygons and rendered fields (the synthetic renderer; all invented test data), and
classify-habit's columns on a frame must not change when the previous kernels are put back.
"""
import dataclasses
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import signature as sg
from builders import body_and_rotation, draw_crystal_frame, drawn_outline, habit_chain_frame


# --------------------------------------------------------------- references

def _previous_radial_signature(poly, n_angles=256):
    """Ray directions from np.cos / np.sin of every (ray, edge) pair, numerators per pair."""
    n = sg.check_n_angles(n_angles)
    p = sg.check_polygon(poly)
    c, area = sg.polygon_centroid(p)
    q = p - c
    e = np.roll(q, -1, axis=0) - q
    k = len(q)
    a0 = np.arctan2(q[:, 1], q[:, 0]) * (n / (2.0 * np.pi))
    da = np.roll(a0, -1) - a0
    da = (da + n / 2) % n - n / 2
    lo = np.floor(np.minimum(a0, a0 + da)).astype(np.int64) - 1
    cnt = np.floor(np.maximum(a0, a0 + da)).astype(np.int64) + 2 - lo
    wide = np.abs(da) > n / 2 - 2
    lo[wide], cnt[wide] = 0, n
    cnt = np.minimum(cnt, n)
    edge = np.repeat(np.arange(k), cnt)
    start = np.cumsum(cnt) - cnt
    ray = (lo[edge] + np.arange(edge.size) - start[edge]) % n
    phi = 2.0 * np.pi * ray / n
    dx, dy = np.cos(phi), np.sin(phi)
    qe, ee = q[edge], e[edge]
    det = -dx * ee[:, 1] + ee[:, 0] * dy
    ok = np.abs(det) > 1e-14
    det = np.where(ok, det, 1.0)
    t = (-qe[:, 0] * ee[:, 1] + ee[:, 0] * qe[:, 1]) / det
    s = (dx * qe[:, 1] - dy * qe[:, 0]) / det
    hit = ok & (s >= -1e-9) & (s <= 1 + 1e-9) & (t > 0)
    r = np.zeros(n)
    np.maximum.at(r, ray[hit], t[hit])
    return r / math.sqrt(area)


def _previous_outline_candidates(sig, tab, level=0):
    """Shifts by take_along_axis over the windows, duplicate slots one turn at a time."""
    a = np.asarray(sig, float)
    n = a.size
    d = np.fft.irfft(np.fft.rfft(a)[None, :] * tab.sig_fft[level], n, axis=1)
    np.multiply(d, -2.0 / n, out=d)
    np.add(d, ((a @ a + tab.sig_sq[level]) / n)[:, None], out=d)
    u = d.shape[0]
    k0 = np.argmin(d, axis=1)
    win = k0[:, None, None] + tab.turn_win
    np.bitwise_and(win, n - 1, out=win)
    vals = d.ravel()[(win + (np.arange(u) * n)[:, None, None]).transpose(2, 0, 1)]
    nw = vals.shape[0]
    first = nw - np.max((vals == vals.min(axis=0)) * np.arange(nw, 0, -1, dtype=np.uint8)[:, None, None], axis=0)
    best = np.take_along_axis(win, first[:, :, None].astype(np.intp), axis=2)[:, :, 0]
    shifts = np.empty((u, 4), np.int64)
    valid = np.zeros((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    shifts[:, 1:] = best
    for j in range(3):
        dup = np.any((shifts[:, :j + 1] == best[:, j, None]) & valid[:, :j + 1], axis=1)
        valid[:, j + 1] = tab.turn_ok[:, j] & ~dup
    return shifts, np.sqrt(np.maximum(np.take_along_axis(d, shifts, axis=1), 0.0)), valid


def _previous_best_families(sig, level=0, spectrum=None):
    """Distances as one expression (|a|^2 + |b|^2 - 2 C) / n, then the parabola refinement.

    ``spectrum`` (the match's spectrum, which classify-habit now hands on) is not read: this form
    takes its own ``rfft`` of the signature, as it did.
    """
    a = np.asarray(sig, float)
    spec, sq, cut = cl._families_stacked(a.size, int(level))
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * spec, a.size, axis=1)
    d2 = np.maximum(((a @ a + sq[:, None] - 2.0 * cc) / a.size).min(axis=1), 0.0)
    return cl.family_minima(d2, cut)


def _previous_interior_signal(frame):
    """The whole frame converted to float64 first."""
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.labels) else None
    src = raw if raw is not None else frame.image
    if frame.polarity == "dark":
        if raw is None:
            return 1.0 - np.asarray(src, float), "thickness"
        return np.asarray(src, float), "thickness"
    return np.asarray(src, float), "facets"


def _previous_brackets(seqs, coarse):
    """The coarse search's runs and, per shape, the runs holding it (dicts built in a loop)."""
    brackets, where = [], {}
    for q in seqs:
        cpos = np.flatnonzero(coarse[q])
        if cpos.size == 1:
            cpos = np.array([0, 0])
        for a, b in zip(cpos[:-1], cpos[1:]):
            for s in q[a:b + 1].tolist():
                where.setdefault(s, []).append(len(brackets))
            brackets.append(q[a:b + 1])
    return brackets, where


def _previous_symmetric_hull_areas(pts, centres, fold=2, n_dir=720):
    """All centres at once: (centres, directions) arrays in one piece."""
    p = np.asarray(pts, float)
    cen = np.asarray(centres, float).reshape(-1, 2)
    n = int(n_dir)
    u, du, cross = gr._support_tables(n, fold)
    hk = (p @ u.T).max(axis=0)
    h = np.empty((cen.shape[0], n))
    h[:] = hk
    for j in range(1, fold):
        s = j * n // fold
        np.maximum(h, np.concatenate((hk[n - s:], hk[:n - s])) + cen @ du[j - 1], out=h)
    w_sq, w_next = cross
    return 0.5 * np.abs(np.einsum("ci,ci->c", h, w_sq * h + w_next * np.concatenate((h[:, 1:], h[:, :1]), axis=1)))



# -------------------------------------------------------------------- tests

def test_ray_direction_table_equals_cos_and_sin_of_any_subset():
    # numpy evaluates cos and sin element by element: a table of all rays gives the floats of any
    # subset, in any order and array length
    rng = np.random.default_rng(0)
    for n in (64, 250, 256, 1000):
        cos_ray, sin_ray = sg._ray_directions(n)
        for size in (1, 7, 33, 500, 4000):
            ray = rng.integers(0, n, size)
            phi = 2.0 * np.pi * ray / n
            assert np.array_equal(cos_ray[ray], np.cos(phi)) and np.array_equal(sin_ray[ray], np.sin(phi))


def test_radial_signature_bitwise_equals_the_previous_kernel():
    rng = np.random.default_rng(1)
    polys = [drawn_outline(a, f, r) for a, f, r in [(1.0, "100", 4.0), (2.2, "111", 29.0), (2.0, "110", 11.0)]]
    for _ in range(30):                                   # random star-shaped and convex polygons
        k = int(rng.integers(3, 60))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = rng.uniform(0.3, 1.0, k) * rng.uniform(1, 50)
        polys.append(np.column_stack([r * np.cos(t), r * np.sin(t)]) + rng.normal(0, 20, 2))
    polys.append(np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]]))   # rays through vertices
    for p in polys:
        for n in (64, 250, 256, 1024):
            assert np.array_equal(gr.radial_signature(p, n), _previous_radial_signature(p, n))


def test_radial_signature_of_a_square_and_a_disc():
    # handbook geometry: a square of side s seen from its centre reaches s/2 along the axes and
    # s/sqrt(2) along the diagonals; a disc of area A has radius sqrt(A / pi)
    s = 10.0
    sig = gr.radial_signature(np.array([[-s, -s], [s, -s], [s, s], [-s, s]]) / 2, 256)
    assert sig[0] == pytest.approx(0.5 / 1.0 * s / s)
    assert sig[32] == pytest.approx(math.sqrt(2) / 2)
    t = np.linspace(0, 2 * np.pi, 2000, endpoint=False)
    disc = gr.radial_signature(np.column_stack([np.cos(t), np.sin(t)]), 256)
    assert np.allclose(disc, 1 / math.sqrt(math.pi), rtol=1e-5)


def test_outline_candidates_and_families_bitwise_equal_the_previous_kernels():
    # every shift, distance and flag, also of unused slots; drawn grains and noisy library signatures
    lib = gr.model_library()
    rng = np.random.default_rng(2)
    sigs = [gr.radial_signature(drawn_outline(a, f, r), 256)
            for a, f, r in [(1.3, "100", 8.0), (2.5, "111", 44.0), (3.4, "111", 2.0), (1.8, "110", 70.0)]]
    for j in rng.integers(0, lib.signatures.shape[1], 10):
        sigs.append(lib.signatures[int(rng.integers(0, 7)), j] * (1 + 0.02 * rng.standard_normal(256)))
    sigs.append(lib.signatures[0, 0].copy())              # a model itself: exact ties at the look-alike turns
    for sig in sigs:
        for level in range(len(gr.ROUNDING_LEVELS)):
            for x, y in zip(gr.outline_candidates(sig, lib.tables, level),
                            _previous_outline_candidates(sig, lib.tables, level)):
                assert np.array_equal(x, y)
            assert cl.best_families(sig, level) == _previous_best_families(sig, level)


def test_coarse_search_runs_equal_the_dict_built_ones():
    rng = np.random.default_rng(3)
    for _ in range(200):
        u = int(rng.integers(1, 60))
        perm = rng.permutation(u)
        cuts = np.sort(rng.choice(np.arange(1, u), size=min(2, u - 1), replace=False)) if u > 2 else []
        seqs = [q for q in np.split(perm, cuts) if q.size]
        every = int(rng.integers(1, 6))
        coarse = np.zeros(u, bool)
        for q in seqs:
            coarse[q[::every]] = True
            coarse[q[-1]] = True
        brackets, where = _previous_brackets(seqs, coarse)
        first = 0
        for q in seqs:
            cpos = np.flatnonzero(coarse[q])
            if cpos.size == 1:
                cpos = np.array([0, 0])
            for i, s in enumerate(q.tolist()):
                assert gr._brackets_of(cpos, i, first) == where[s]
            first += max(cpos.size - 1, 1)
        assert first == len(brackets)


def test_library_grid_tables_equal_the_per_fit_expressions():
    import pickle

    lib = gr.model_library()
    assert np.array_equal(lib.grid_index, np.searchsorted(lib.grid, lib.alphas - 1e-9))
    for ib in (0, 17, lib.grid.size - 1):
        alpha = float(lib.grid[ib])
        assert np.array_equal(lib.at_grid[ib], np.abs(lib.alphas - alpha) < 1e-9)
    back = pickle.loads(pickle.dumps(lib))                  # the cached tables are not stored
    assert "grid_index" not in back.__dict__ and np.array_equal(back.grid_index, lib.grid_index)
    assert np.array_equal(gr._allowed_views(("111", "nonsense")), [False, True, False])


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_frame_columns_equal_those_of_the_previous_kernels(contrast, monkeypatch):
    # a rendered field (touching grains, so split grains and their completions are included; invented)
    # quantised to uint16 as a 16-bit TIFF reads: classify-habit's columns with the previous kernels
    # (whole-frame float64 signal, per-pair ray directions, the earlier outline and family kernels)
    # and with the present ones must be the same, bit for bit
    frame = habit_chain_frame(10, contrast, seed=11, quantise=True)
    assert frame.n_grains >= 5 and frame.raw.dtype == np.uint16
    now = cl.classify_frame(frame)
    monkeypatch.setattr(cl, "interior_signal", _previous_interior_signal)
    monkeypatch.setattr(gr, "radial_signature", _previous_radial_signature)
    monkeypatch.setattr(gr, "outline_candidates", _previous_outline_candidates)
    monkeypatch.setattr(cl, "best_families", _previous_best_families)
    before = cl.classify_frame(frame)
    for k, v in now.items():
        a, b = np.asarray(v), np.asarray(before[k])
        assert (np.all(a == b) if a.dtype == object else np.array_equal(a, b, equal_nan=True)), k
    # a float32 frame of the same grains goes through the same conversion per crop
    f32 = dataclasses.replace(frame, raw=frame.raw.astype(np.float32))
    monkeypatch.undo()
    signal, _ = cl.interior_signal(f32)
    assert signal.dtype == np.float32


@pytest.mark.parametrize("chunk", [1, 700, 5000, gr.HULL_CHUNK_ELEMENTS, 10 ** 8])
def test_symmetric_hull_areas_in_chunks_bitwise_equal_all_at_once(chunk, monkeypatch):
    # any number of centres per chunk gives the floats of all centres at once (the product of the
    # centres with the direction table stays one BLAS call: a product of fewer rows may round
    # differently); random hulls of all sizes and offsets, both folds, coarse and fine directions
    from scipy.spatial import ConvexHull

    monkeypatch.setattr(gr, "HULL_CHUNK_ELEMENTS", chunk)
    rng = np.random.default_rng(4)
    for _ in range(40):
        pts = rng.normal(size=(int(rng.integers(3, 80)), 2)) * rng.uniform(0.1, 300, 2) + rng.normal(0, 1000, 2)
        pts = pts[ConvexHull(pts).vertices]
        cen = pts.mean(axis=0) + rng.normal(size=(int(rng.choice([1, 5, 81, 100])), 2)) * rng.uniform(0.01, 100)
        fold, n = int(rng.choice([2, 3])), int(rng.choice([24, 720, 2016]))
        got = gr.symmetric_hull_areas(pts, cen, fold, n)
        with monkeypatch.context() as mp:
            mp.setattr(gr, "HULL_CHUNK_ELEMENTS", 10 ** 9)
            assert np.array_equal(got, gr.symmetric_hull_areas(pts, cen, fold, n))
        # the form over all directions about the origin (before the one-period form), on the points and
        # centres moved next to the origin (a translation moves no area; far from it that form rounds
        # the squares of the large support values): the same areas to a relative 1e-9
        # (tests/test_habit_grain_batches.py)
        m = pts.mean(axis=0)
        np.testing.assert_allclose(got, _previous_symmetric_hull_areas(pts - m, cen - m, fold, n), rtol=1e-9)


def test_symmetric_hull_area_of_a_cut_square_against_scipy():
    # handbook geometry: a unit square with a corner cut off, completed by its point reflection about
    # the square's centre, is the unit square again; scipy.spatial.ConvexHull of the points and
    # their copies gives the exact area at other centres (within the O(1 / n^2) of the sampled support)
    from scipy.spatial import ConvexHull

    pts = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 0.7], [0.7, 1.0], [0.0, 1.0]])
    centres = np.array([[0.5, 0.5], [0.52, 0.47], [0.3, 0.6]])
    got = gr.symmetric_hull_areas(pts, centres, 2, 720)
    assert got[0] == pytest.approx(1.0, rel=1e-6)
    for c, a in zip(centres, got):
        exact = ConvexHull(np.vstack([pts, 2 * c - pts])).volume
        assert a == pytest.approx(exact, rel=5e-3)


def _plain_outline_candidates(sig, spec, sq, turn_off, turn_ok):
    """One argmin per look-alike window over the distances at every shift (no scores, no flat gathers)."""
    a = np.asarray(sig, float)
    n = a.size
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * spec, n, axis=1)
    np.multiply(cc, -2.0 / n, out=cc)
    d = np.add(cc, ((a @ a + sq) / n)[:, None], out=cc)
    u = d.shape[0]
    k0 = np.argmin(d, axis=1)
    w = np.arange(-(n // 32), n // 32 + 1)
    shifts = np.zeros((u, 4), np.int64)
    valid = np.zeros((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    for i in range(u):
        for j in range(3):
            win = (k0[i] + turn_off[i, j] + w) % n
            best = win[int(np.argmin(d[i, win]))]
            shifts[i, j + 1] = best
            valid[i, j + 1] = turn_ok[i, j] and not any(shifts[i, q] == best and valid[i, q] for q in range(j + 1))
    return shifts, np.sqrt(np.maximum(d[np.arange(u)[:, None], shifts], 0.0)), valid


@pytest.mark.parametrize("n", [256, 4096])
def test_outline_candidates_at_the_largest_n_angles(n):
    # n_angles may be 4096 (its parameter's upper bound): a look-alike window then holds 257 shifts,
    # more than a uint8 score counts (the previous kernel raised OverflowError there). Regular
    # polygons (handbook geometry: a square looks alike after a quarter turn, a hexagon after a
    # sixth) and noisy copies, against one argmin per window
    import types

    rng = np.random.default_rng(5)
    polys = [np.column_stack([np.cos(t), np.sin(t)]) for t in
             (np.arange(4) * np.pi / 2 + 0.1, np.arange(6) * np.pi / 3, np.arange(8) * np.pi / 4 + 0.2)]
    sigs = np.array([gr.radial_signature(p, n) for p in polys])
    face = np.array(["100", "111", "110"])
    turn_off, turn_ok = gr._look_alike_turns(face, np.array([90.0, 120.0, 180.0]), n)
    w = np.arange(-(n // 32), n // 32 + 1)
    tab = types.SimpleNamespace(sig_fft=np.conj(np.fft.rfft(sigs, axis=1))[None], sig_sq=np.einsum("ij,ij->i", sigs, sigs)[None],
                                turn_off=turn_off, turn_ok=turn_ok, turn_win=turn_off[:, :, None] + w[None, None, :])
    for sig in [sigs[0], sigs[1] * (1 + 0.01 * rng.standard_normal(n)), np.roll(sigs[2], n // 7)]:
        got = gr.outline_candidates(sig, tab, 0)
        ref = _plain_outline_candidates(sig, tab.sig_fft[0], tab.sig_sq[0], turn_off, turn_ok)
        for x, y in zip(got, ref):
            assert np.array_equal(x, y)
    # a square against itself: distance 0 at its best shift
    got = gr.outline_candidates(sigs[0], tab, 0)
    assert got[1][0, 0] == pytest.approx(0.0, abs=1e-6)      # sqrt of rounding in the squared distance
