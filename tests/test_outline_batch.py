"""The outline matches of many grains at once (plugins/habit/outline_batch.py) against one grain at a time.

Each batched kernel replaces a slower reference kept in the package: ``signature.radial_signature_about``,
``engine.match_outline`` (with a reach ``within``, its ``BoundedOutline`` and its later ``upto``) and
classify-habit's per-grain ``outline_evidence``. All are checked equal bit for bit. The references
themselves are checked against outside sources elsewhere (the ray crossings of the signature in
tests/test_habit_speed.py and tests/test_classify.py, the bound against brute-force shifts in
tests/test_outline_bound.py). Outlines: drawn grains (skimage.draw through the test builders), random
star polygons and discs, the grains of a rendered field (all invented test data).
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import outline_batch as ob
from grainhabit.plugins.habit import signature as sg
from builders import body_and_rotation, draw_crystal_frame, habit_chain_frame


def _random_star(rng, k=None, scale=1.0, centre=(0.0, 0.0)):
    """A star-shaped random polygon (invented), some with edges that pass close to the centroid."""
    k = int(rng.integers(3, 60)) if k is None else k
    t = np.sort(rng.uniform(0, 2 * np.pi, k))
    r = 1.0 + 0.6 * rng.uniform(-1, 1, k)
    return scale * np.column_stack([r * np.cos(t), r * np.sin(t)]) + np.asarray(centre)


def _outlines(seed=5):
    """Drawn grains of every view, random stars of many sizes and places, a disc and a thin sliver."""
    rng = np.random.default_rng(seed)
    out = []
    for a, f, r, ecd in [(1.0, "100", 3.0, 70.0), (1.4, "100", 30.0, 14.0), (2.3, "111", 11.0, 90.0),
                         (2.9, "111", 47.0, 60.0), (3.5, "111", 5.0, 25.0), (1.8, "110", 20.0, 50.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=ecd, noise=0.02, seed=1)
        out.append(cl.frame_contours(frame)[0])
    for _ in range(30):
        out.append(_random_star(rng, scale=float(rng.uniform(5, 80)), centre=rng.uniform(-500, 500, 2)))
    t = np.linspace(0, 2 * np.pi, 200, endpoint=False)
    out.append(40.0 * np.column_stack([np.cos(t), np.sin(t)]))
    out.append(np.array([[0.0, 0.0], [30.0, 0.5], [31.0, 2.0], [1.0, 1.5]]))
    return out


@pytest.mark.parametrize("n", [256, 255, 64])
def test_signatures_of_many_outlines_equal_one_at_a_time(n):
    polys = [sg.check_polygon(p) for p in _outlines()]
    cen_area = [sg.polygon_centroid(p) for p in polys]
    got = ob.radial_signatures_about(polys, [c for c, _ in cen_area], [a for _, a in cen_area], n)
    for p, (c, a), row in zip(polys, cen_area, got):
        assert np.array_equal(row, sg.radial_signature_about(p, c, a, n))
    assert ob.radial_signatures_about([], [], [], n).shape == (0, n)


def _same_match(a, b):
    assert np.array_equal(a.signature, b.signature)
    assert np.array_equal(a.shifts, b.shifts) and np.array_equal(a.dist, b.dist)
    assert np.array_equal(a.valid, b.valid)
    assert (a.tau, a.area, a.level, a.within, a.faces) == (b.tau, b.area, b.level, b.within, b.faces)
    ca, cb = a.compared, b.compared
    assert np.array_equal(ca.state.comp, cb.state.comp) and np.array_equal(ca.state.dmin, cb.state.dmin)
    assert np.array_equal(ca.lb, cb.lb) and ca.margin == cb.margin and ca.aa == cb.aa


@pytest.mark.parametrize("faces", [gr.VIEWS, ("111",), ("100", "110")])
@pytest.mark.parametrize("within", [0.0, 4.0, gr.outline_reach(4.0), 200.0])
def test_matches_of_many_outlines_equal_one_at_a_time(within, faces, monkeypatch):
    # every field of every match, the state of its comparison and what a later, wider reach adds
    lib = gr.model_library()
    contours = _outlines()
    monkeypatch.setattr(ob, "ROWS_AT_ONCE", 97)           # the inverse FFTs by blocks, a block edge mid-grain
    got = ob.match_outlines(contours, lib, 1.0, 0.25, 0.003, 1.0, within, faces)
    for c, m in zip(contours, got):
        ref = gr.match_outline(c, lib, 1.0, 0.25, 0.003, 1.0, within=within, faces=faces)
        _same_match(m, ref)
        for wider in (within + 3.0, within + 40.0, np.inf):
            r1, r2 = m.reaching(wider), ref.reaching(wider)
            for x, y in zip((r1.shifts, r1.dist, r1.valid), (r2.shifts, r2.dist, r2.valid)):
                assert np.array_equal(x, y)


@pytest.mark.parametrize("n", [180, 255])
def test_matches_at_other_signature_lengths(n):
    # no power of two (the other scaling branch) and odd (no Nyquist term in the half spectrum)
    lib = gr.model_library(0.5, 4.0, 0.1, n)
    contours = _outlines(seed=8)[:20]
    got = ob.match_outlines(contours, lib, 0.5, 0.25, 0.003, 1.0, 12.0, gr.VIEWS)
    for c, m in zip(contours, got):
        _same_match(m, gr.match_outline(c, lib, 0.5, 0.25, 0.003, 1.0, within=12.0))


def test_distance_rows_of_pairs_equal_the_rows_of_one_outline():
    lib = gr.model_library()
    tab = lib.tables
    rng = np.random.default_rng(2)
    sigs = [sg.radial_signature(_random_star(rng), 256) for _ in range(5)]
    for n_sig, sig in enumerate(sigs):
        spec, aa = np.fft.rfft(sig), sig @ sig
        rows = rng.choice(tab.face.size, 40, replace=False)
        ref = gr._distance_rows(spec, aa, tab.sig_fft[n_sig % 7][rows], tab.sig_sq[n_sig % 7][rows], 256)
        got = ob.distance_rows_of(np.repeat(spec[None], 40, axis=0), np.full(40, aa),
                                  tab.sig_fft[n_sig % 7][rows], tab.sig_sq[n_sig % 7][rows], 256)
        assert np.array_equal(got, ref)


def test_outline_evidence_of_many_equals_one_at_a_time():
    p = cl.STEP.resolve({})
    contours = _outlines()
    for (m, fam), c in zip(cl.outline_evidence_many(contours, p), contours):
        m0, fam0 = cl.outline_evidence(c, p)
        _same_match(m, m0)
        assert fam == fam0
    assert cl.outline_evidence_many([], p) == []


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_frame_columns_equal_those_with_outlines_matched_one_at_a_time(contrast, monkeypatch):
    # a rendered field with touching grains (invented): classify-habit's columns with the outlines
    # matched together and with the per-grain outline evidence put back, bit for bit
    frame = habit_chain_frame(12, contrast, seed=29)
    assert frame.n_grains >= 6
    now = cl.classify_frame(frame)
    monkeypatch.setattr(cl, "outline_evidence_many",
                        lambda contours, params, pixel_scale=1.0: [None for _ in contours])
    before = cl.classify_frame(frame)
    for k, v in now.items():
        a, b = np.asarray(v), np.asarray(before[k])
        assert (np.all(a == b) if a.dtype == object else np.array_equal(a, b, equal_nan=True)), k


def _same_fit(a, b):
    for f in ("alpha", "alpha_lo", "alpha_hi", "alpha_best", "face", "rotation_deg", "outline_misfit", "note",
              "facet_chi2", "interior_level", "relief_chi2"):
        x, y = getattr(a, f), getattr(b, f)
        assert x == y or (np.isnan(x) and np.isnan(y)), f
    assert np.array_equal(a.score, b.score) and np.array_equal(a.signature, b.signature)


@pytest.mark.parametrize("tolerance", [0.0, 4.0, 25.0])
def test_outline_fits_of_many_matches_equal_one_at_a_time(tolerance):
    # every field of fit_alpha without interior, on matches of the gate's reach and on full matches;
    # near-ties of the score, the tied runs and the squares of scalars (numpy's pow) included
    lib = gr.model_library()
    contours = _outlines(seed=11)
    bounded = ob.match_outlines(contours, lib, 1.0, 0.25, 0.003, 1.0, gr.outline_reach(4.0), gr.VIEWS)
    full = [gr.match_outline(c, lib) for c in contours]
    small = ob.match_outlines(contours, lib, 1.0, 0.25, 0.003, 1.0, 0.0, gr.VIEWS)
    for matches in (bounded, full, small):
        got = ob.outline_fits(matches, lib, tolerance)
        for c, m, fit in zip(contours, matches, got):
            _same_fit(fit, gr.fit_alpha(c, None, library=lib, tolerance=tolerance, match=m))
    assert ob.outline_fits([], lib, 4.0) == []
    with pytest.raises(ValueError):
        ob.outline_fits(ob.match_outlines(contours[:2], lib, 1.0, 0.25, 0.003, 1.0, 4.0, ("111",)), lib, 4.0)
