"""Habit kernels made faster, each tested equal to the slower kernel it replaces.

The references below are the kernels as they stood before (kept here, not in the
package), run on drawn grains (skimage.draw; invented test data), on noisy copies
of the model library's own signatures and on regular polygons (handbook geometry).
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from builders import body_and_rotation, draw_crystal_frame


def _drawn_signature(alpha, face, rot_deg, ecd_px=70.0, contrast="bright", seed=0):
    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, ecd_px=ecd_px, contrast=contrast, noise=0.02, seed=seed)
    return gr.radial_signature(cl.frame_contours(frame)[0], 256)


def _signatures():
    """Signatures of drawn grains and noisy library signatures (every view)."""
    lib = gr.model_library()
    rng = np.random.default_rng(11)
    sigs = [_drawn_signature(a, f, r) for a, f, r in
            [(1.0, "100", 0.0), (1.3, "100", 4.0), (2.2, "111", 17.0), (3.6, "111", 50.0), (2.0, "110", 8.0)]]
    m = lib.signatures.shape[1]
    for j in rng.integers(0, m, 10):
        sigs.append(lib.signatures[int(rng.integers(0, 7)), j] * (1 + 0.03 * rng.standard_normal(256)))
    # exact copies of models, turned by a whole number of samples: ties between look-alike shifts
    for j in rng.integers(0, m, 4):
        sigs.append(np.roll(lib.signatures[0, j], int(rng.integers(0, 256))))
    return sigs


# --------------------------------------------------------------- references

def _previous_outline_candidates(sig, tab, level=0):
    """The kernel before (window minima by descending scores over the transposed window values)."""
    a = np.asarray(sig, float)
    n = a.size
    d = np.fft.irfft(np.fft.rfft(a)[None, :] * tab.sig_fft[level], n, axis=1)
    if n & (n - 1) == 0:
        np.multiply(d, -2.0 / n, out=d)
        np.add(d, ((a @ a + tab.sig_sq[level]) / n)[:, None], out=d)
    else:
        np.multiply(d, 2.0, out=d)
        np.subtract((a @ a + tab.sig_sq[level])[:, None], d, out=d)
        np.divide(d, n, out=d)
    u = d.shape[0]
    k0 = np.argmin(d, axis=1)
    win = k0[:, None, None] + tab.turn_win
    if n & (n - 1) == 0:
        np.bitwise_and(win, n - 1, out=win)
    else:
        np.remainder(win, n, out=win)
    vals = d.ravel()[(win + (np.arange(u) * n)[:, None, None]).transpose(2, 0, 1)]
    nw = vals.shape[0]
    score = np.arange(nw, 0, -1, dtype=np.uint8 if nw < 256 else np.uint16)
    first = nw - np.max((vals == vals.min(axis=0)) * score[:, None, None], axis=0)
    best = k0[:, None] + tab.turn_off + (first.astype(np.int64) - n // 32)
    if n & (n - 1) == 0:
        np.bitwise_and(best, n - 1, out=best)
    else:
        np.remainder(best, n, out=best)
    shifts = np.empty((u, 4), np.int64)
    valid = np.empty((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    shifts[:, 1:] = best
    b0, b1, b2 = best[:, 0], best[:, 1], best[:, 2]
    ok = tab.turn_ok
    v1 = ok[:, 0] & (b0 != k0)
    v2 = ok[:, 1] & ~((b1 == k0) | ((b1 == b0) & v1))
    valid[:, 1], valid[:, 2] = v1, v2
    valid[:, 3] = ok[:, 2] & ~((b2 == k0) | ((b2 == b0) & v1) | ((b2 == b1) & v2))
    at = d.ravel()[shifts + (np.arange(u) * n)[:, None]]
    return shifts, np.sqrt(np.maximum(at, 0.0, out=at), out=at), valid


def _previous_symmetric_hull_areas(pts, centres, fold=2, n_dir=720, support=None):
    """The support-function areas over all n_dir directions about the origin (the kernel before).

    ``support`` (the points' support values, which the search now hands on) is not read: this form
    computes them from ``pts`` itself, as it did.
    """
    p = np.asarray(pts, float)
    cen = np.asarray(centres, float).reshape(-1, 2)
    n = int(n_dir)
    u, du, (w_sq, w_next) = gr._support_tables(n, fold)
    hk = (p @ u.T).max(axis=0)
    rolled = [np.concatenate((hk[n - j * n // fold:], hk[:n - j * n // fold])) for j in range(1, fold)]
    moved = [cen @ du[j - 1] for j in range(1, fold)]
    out = np.empty(cen.shape[0])
    rows = max(1, gr.HULL_CHUNK_ELEMENTS // n)
    for a in range(0, cen.shape[0], rows):
        h = None
        for j in range(1, fold):
            t = moved[j - 1][a:a + rows]
            np.add(t, rolled[j - 1], out=t)
            h = np.maximum(t, hk, out=t) if h is None else np.maximum(h, t, out=h)
        if h is None:
            h = np.empty((min(rows, cen.shape[0] - a), n))
            h[:] = hk
        nxt = np.concatenate((h[:, 1:], h[:, :1]), axis=1)
        np.multiply(nxt, w_next, out=nxt)
        q = h * w_sq
        np.add(q, nxt, out=q)
        out[a:a + rows] = 0.5 * np.abs(np.einsum("ci,ci->c", h, q))
    return out


# -------------------------------------------------------------------- tests

def test_outline_candidates_bitwise_equal_the_score_kernel():
    # every shift, distance and flag, unused slots included, at every rounding level
    tab = gr.model_library().tables
    for sig in _signatures():
        for level in range(len(gr.ROUNDING_LEVELS)):
            got = gr.outline_candidates(sig, tab, level)
            ref = _previous_outline_candidates(sig, tab, level)
            for x, y in zip(got, ref):
                assert x.dtype == y.dtype
                assert np.array_equal(x, y)


def test_match_outline_signature_equals_radial_signature():
    # match_outline reuses the centroid and area it has (radial_signature_about): the same bits as
    # radial_signature, which computes them itself
    lib = gr.model_library()
    for a, f, r in [(1.0, "100", 0.0), (2.6, "111", 33.0), (2.0, "110", 12.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=60.0, contrast="bright", noise=0.02, seed=1)
        contour = cl.frame_contours(frame)[0]
        match = gr.match_outline(contour, lib)
        assert np.array_equal(match.signature, gr.radial_signature(contour, lib.signatures.shape[-1]))
    # and a square of side 2 about its centre (handbook geometry: r(0) = s / 2, so 1 / 2 over sqrt(A) = 2)
    sq = np.array([[-1.0, -1.0], [1.0, -1.0], [1.0, 1.0], [-1.0, 1.0]])
    assert gr.radial_signature(sq, 8)[0] == pytest.approx(0.5)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_classify_grain_given_its_outline_evidence_equals_computing_it(contrast):
    # a completion's outline comparisons are computed once and handed to classify_grain_steps
    # (outline=...): every column and fit field as when it computes them itself
    p = cl.STEP.resolve({})
    for a, f, r in [(1.0, "100", 5.0), (2.4, "111", 20.0), (3.5, "111", 40.0), (1.9, "110", 10.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=60.0, contrast=contrast, noise=0.02, seed=2)
        signal, mode = cl.interior_signal(frame)
        contour, interior = gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)
        ref = gr.run_steps(cl.classify_grain_steps(contour, interior, p))
        got = gr.run_steps(cl.classify_grain_steps(contour, interior, p, outline=cl.outline_evidence(contour, p)))
        assert got[0] == ref[0] and got[1] == ref[1]
        assert got[2].keys() == ref[2].keys()
        for k in ref[2]:
            assert got[2][k] == ref[2][k] or (got[2][k] != got[2][k] and ref[2][k] != ref[2][k]), k
        for fld in ("alpha", "alpha_lo", "alpha_hi", "face", "rotation_deg", "outline_misfit", "note",
                    "facet_chi2", "relief_chi2"):
            x, y = getattr(got[3], fld), getattr(ref[3], fld)
            assert x == y or (x != x and y != y), fld
        assert np.array_equal(got[3].score, ref[3].score)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_facet_fits_without_the_downward_planes_equal_those_with_them(contrast):
    # a placement's request in 'facets' mode leaves the downward planes out (normal_equations reads
    # only the upward ones there): the same RSS, bit for bit, as the request with them
    tab = gr.model_library().tables
    body, rot = body_and_rotation(2.3, "111", 21.0)
    frame = draw_crystal_frame(body, rot, ecd_px=70.0, contrast=contrast, noise=0.02, seed=0)
    signal, mode = cl.interior_signal(frame)
    _, inner = gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)
    rng = np.random.default_rng(3)
    u, k = rng.integers(0, tab.face.size, 40), rng.integers(0, 256, 40)
    full = gr.placed_planes(tab, u, k, 256)
    up = gr.placed_planes(tab, u, k, 256, down=False)
    assert up[2] is None and up[3] is None
    assert np.array_equal(up[0], full[0]) and np.array_equal(up[1], full[1])
    if inner.mode == "facets":
        got = gr.interior_rss_batch(inner, *up, gap_inv=tab.gap_inv[u])
        ref = gr.interior_rss_batch(inner, *full, gap_inv=tab.gap_inv[u])
        assert np.array_equal(got, ref)
    # the request of a placement carries the downward planes in 'thickness' mode only
    shifts = np.zeros((tab.face.size, 4), np.int64)
    req = next(gr._rss_of(tab, shifts, np.column_stack([u, np.zeros_like(u)]), inner, (256, 2.0, 0.5)))
    assert (req[3] is None) == (inner.mode == "facets")


def _cut_outlines():
    """Regular polygons (handbook geometry) and drawn grain outlines, cut by a straight line."""
    rng = np.random.default_rng(8)
    out = []
    for k, r in ((4, 30.0), (6, 25.0), (3, 40.0), (8, 20.0)):
        t = np.linspace(0, 2 * np.pi, 400, endpoint=False)
        ang = np.floor(t / (2 * np.pi / k)) * (2 * np.pi / k) + np.pi / k
        rad = r * np.cos(np.pi / k) / np.cos(t - ang)                 # a regular k-gon, densely sampled
        out.append(np.column_stack([rad * np.cos(t + 0.3), rad * np.sin(t + 0.3)]) + rng.normal(0, 0.2, (400, 2)))
    for a, f, r in [(1.0, "100", 10.0), (2.5, "111", 25.0), (3.8, "111", 3.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=70.0, contrast="bright", noise=0.02, seed=4)
        out.append(cl.frame_contours(frame)[0])
    cut = []
    for c in out:
        d = c - c.mean(axis=0)
        keep = d @ np.array([np.cos(0.7), np.sin(0.7)]) < 0.3 * np.abs(d).max()
        cut.append(c[keep] + np.array([300.0, 200.0]))
    return cut


def test_symmetric_hull_areas_over_one_period_equal_the_full_form():
    # reference: the areas over all directions about the origin, on the points and centres moved next
    # to it (a translation moves no area): a relative 1e-9, and the same smallest centre on every grid
    # of the centre search (9 x 9 centres at the search's widths)
    from scipy.spatial import ConvexHull

    rng = np.random.default_rng(6)
    for c in _cut_outlines():
        pts = c[ConvexHull(c).vertices]
        m = pts.mean(axis=0)
        scale = np.sqrt(gr.polygon_centroid(pts)[1])
        g = np.linspace(-1.0, 1.0, 9)
        grid = np.stack(np.meshgrid(g, g), axis=-1).reshape(-1, 2)
        for fold in (2, 3, 6):
            for half in (0.6, 0.2, 0.02, 0.002):
                cand = m + rng.normal(0, 0.05, 2) * scale + half * scale * grid
                for n in (gr.SUPPORT_DIRECTIONS, gr.FINE_SUPPORT_DIRECTIONS):
                    got = gr.symmetric_hull_areas(pts, cand, fold, n)
                    ref = _previous_symmetric_hull_areas(pts - m, cand - m, fold, n)
                    np.testing.assert_allclose(got, ref, rtol=1e-9)
                    assert np.argmin(got) == np.argmin(ref)
        # and scipy's ConvexHull of the points with their copies (reference library), within the
        # sampling error the docstring states
        cen = m + 0.1 * scale
        both = np.vstack([pts, 2 * cen - pts])
        assert gr.symmetric_hull_areas(pts, cen[None], 2)[0] == pytest.approx(ConvexHull(both).volume, rel=5e-3)


def test_completions_equal_those_of_the_full_form(monkeypatch):
    # complete_by_symmetry with the one-period areas against the same search on the full form: the
    # same completed outline, vertex for vertex, on cut polygons and cut drawn grains, every fold
    done = {}
    for i, c in enumerate(_cut_outlines()):
        for fold in (2, 3, 6):
            done[i, fold] = gr.complete_by_symmetry(c, None, fold)
    monkeypatch.setattr(gr, "symmetric_hull_areas", _previous_symmetric_hull_areas)
    for i, c in enumerate(_cut_outlines()):
        for fold in (2, 3, 6):
            assert np.array_equal(done[i, fold], gr.complete_by_symmetry(c, None, fold))
