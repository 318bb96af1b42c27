"""classify-habit's kernels of the speed21 round tested against the code they replace.

Each ``_previous_*`` function below is the earlier form, kept here (not in the package). The new forms
must give the same bits: the interior RSS of placed models on drawn grains (skimage.draw) and on the
grains of rendered fields (the synthetic renderer; all invented test data), the smooth-surface RSS, the
facet evidence, and classify-habit's columns on rendered fields with the previous kernels put back.
"""
import math

import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import interior as it
from builders import body_and_rotation, draw_crystal_frame, habit_chain_frame


# --------------------------------------------------------------- references

def _previous_normal_equations(interior, g_up, z_up, g_dn=None, z_dn=None, edge_px=2.0, tem_offset_max=0.5,
                               gap_inv=None):
    """The normal equations of one chunk of models, each chunk's equations formed on their own."""
    g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
    c, m = z_up.shape
    p = interior.value.size
    x, y, v = interior.x, interior.y, interior.value
    pts = interior.points32

    def heights(g, z0):
        k = z0.shape[1]
        a = np.empty((k, c, 3), np.float32)
        a[..., :2] = np.swapaxes(g, 0, 1)
        a[..., 2] = z0.T
        return (a.reshape(-1, 3) @ pts).reshape(k, c, p)

    zup = heights(g_up, z_up)
    ztop = zup.min(axis=0)
    if interior.mode == "facets":
        idx = it.first_lowest(zup, ztop)
        bins = (np.arange(c)[:, None] * m + idx).ravel()
        if m > 1 and edge_px > 0:
            inv = it.plane_gap_inverse(g_up) if gap_inv is None else gap_inv
            rows = np.take(np.ascontiguousarray(inv).reshape(c * m, m), bins, axis=0)
            zup -= ztop
            with np.errstate(invalid="ignore"):
                zup *= rows.T.reshape(m, c, p)
            near = np.fmin.reduce(zup, axis=0)
            far = ~(near < edge_px * interior.pixel)
            nfar = far.sum(axis=1)
            use = (nfar >= 30) & (nfar < p)
            wt = np.where(use[:, None], far, True).astype(float)
            scale = np.where(use, p / np.maximum(nfar, 1), 1.0)
        else:
            wt = np.ones((c, p))
            scale = np.ones(c)
        cnt = np.bincount(bins, wt.ravel(), minlength=c * m).reshape(c, m)
        sx = np.bincount(bins, (wt * x).ravel(), minlength=c * m).reshape(c, m)
        sy = np.bincount(bins, (wt * y).ravel(), minlength=c * m).reshape(c, m)
        sv = np.bincount(bins, (wt * v).ravel(), minlength=c * m).reshape(c, m)
        xx, xy, yy, xv, yv, vv = (wt @ q for q in interior.products)
        nz = 1.0 / np.sqrt(1.0 + np.einsum("cmi,cmi->cm", g_up, g_up))
        sec = 1.0 / nz - 1.0
        f = np.empty((c, m, 4))
        f[..., 0] = 1.0
        f[..., 1] = sec
        np.multiply(-g_up[..., 0], nz, out=f[..., 2])
        np.multiply(-g_up[..., 1], nz, out=f[..., 3])
        nm = np.zeros((c, 6, 6))
        nm[:, :4, :4] = np.einsum("cm,cma,cmb->cab", cnt, f, f)
        nm[:, :4, 4] = nm[:, 4, :4] = np.einsum("cm,cma->ca", sx, f)
        nm[:, :4, 5] = nm[:, 5, :4] = np.einsum("cm,cma->ca", sy, f)
        nm[:, 4, 4], nm[:, 4, 5], nm[:, 5, 4], nm[:, 5, 5] = xx, xy, xy, yy
        rhs = np.concatenate([np.einsum("cm,cma->ca", sv, f), xv[:, None], yv[:, None]], axis=1)
        return it.NormalEquations("facets", nm, rhs, vv, scale)
    t = np.maximum(ztop - heights(g_dn, z_dn).max(axis=0), 0.0).astype(float)
    nm = np.empty((c, 4, 4))
    st, sx_, sy_ = t.sum(axis=1), t @ x, t @ y
    nm[:, 0, 0] = np.einsum("cp,cp->c", t, t)
    nm[:, 0, 1], nm[:, 0, 2], nm[:, 0, 3] = st, sx_, sy_
    nm[:, 1:, 0] = nm[:, 0, 1:]
    sx_all, sy_all, sv_all, x_x, x_y, y_y, x_v, y_v, v_v, v_mean = interior.sums
    nm[:, 1:, 1:] = np.array([[p, sx_all, sy_all], [sx_all, x_x, x_y], [sy_all, x_y, y_y]])[None]
    rhs = np.empty((c, 4))
    rhs[:, 0] = t @ v
    rhs[:, 1:] = np.array([sv_all, x_v, y_v])[None]
    vv = np.full(c, v_v)
    amax = max(tem_offset_max * v_mean, 0.0)
    return it.NormalEquations("thickness", nm, rhs, vv, np.full(c, amax))


def _previous_rss_requests(requests, max_elements=1_000_000):
    """The requests' RSS with every chunk's equations formed on their own, then solved together."""
    eqs, owner = [], []
    for r, (interior, g_up, z_up, g_dn, z_dn, edge_px, tem, gap_inv) in enumerate(requests):
        g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
        c, m = z_up.shape
        if c == 0:
            continue
        step = max(1, int(max_elements // max(interior.value.size * max(m, 1), 1)))
        for i in range(0, c, step):
            eqs.append(_previous_normal_equations(interior, g_up[i:i + step], z_up[i:i + step],
                                                  None if g_dn is None else g_dn[i:i + step],
                                                  None if z_dn is None else z_dn[i:i + step], edge_px, tem,
                                                  None if gap_inv is None else gap_inv[i:i + step]))
            owner.append(r)
    got = it.solve_normal_equations(eqs)
    out = [[] for _ in requests]
    for r, g in zip(owner, got):
        out[r].append(g)
    return [np.concatenate(o) if o else np.zeros(0) for o in out]


def _previous_smooth_rss(interior, degree=it.SMOOTH_INTERIOR_DEGREE):
    """Every monomial column as its own product of powers."""
    x, y = interior.x, interior.y
    return it._surface_rss([x ** i * y ** j for i in range(degree + 1) for j in range(degree + 1 - i)],
                           interior.value)


def _previous_facet_evidence(flat, rnd, smooth, rmin, s2, w_eff):
    """The smooth surface fitted in every case."""
    return max(w_eff * (min(flat, rnd, smooth()) - rmin) / s2, 0.0)


# --------------------------------------------------------------- helpers

def _drawn_interior(alpha, face, rot_deg, contrast, seed):
    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, ecd_px=70.0, contrast=contrast, noise=0.02, seed=seed)
    signal, mode = cl.interior_signal(frame)
    return gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)[1]


def _requests_of(interiors, rng, with_round=True):
    """Placements of random library models over each interior (full and thinned), as the fits ask for them."""
    tab = gr.model_library().tables
    out = []
    for inner in interiors:
        for sample in (inner, gr.subsample_interior(inner, 150)):
            c = int(rng.integers(1, 60))
            u = rng.integers(0, tab.face.size, c)
            planes = gr.placed_planes(tab, u, rng.integers(0, 256, c), 256, down=inner.mode != "facets")
            out.append((sample, *planes, 2.0, 0.5, tab.gap_inv[u]))
            if with_round:
                out.append(it.round_request(sample, 0.5))
    return out


def _rendered_interiors(contrast, seed, count=12):
    frame = habit_chain_frame(10, contrast, seed=seed)
    signal, mode = cl.interior_signal(frame)
    contours = cl.frame_contours(frame)
    got = []
    for i, lab in enumerate(np.asarray(frame.grains["label"], int)):
        if len(contours[i]) >= 8:
            inner = gr.grain_evidence(frame.labels, signal, mode, contours[i], int(lab))[1]
            if inner is not None:
                got.append(inner)
    return got[:count]


# --------------------------------------------------------------- tests

@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_equations_formed_together_give_the_rss_of_each_chunk_alone(contrast):
    # the facet-mode equations of all chunks of a round are formed in one stack (interior.facet_equations);
    # every model's RSS must keep the bits of forming its chunk alone, also where requests are cut into
    # chunks, mixed with round-body requests (another number of planes) and with empty requests
    rng = np.random.default_rng(21)
    interiors = [_drawn_interior(a, f, r, contrast, s) for s, (a, f, r) in
                 enumerate([(1.0, "100", 5.0), (2.3, "111", 21.0), (3.5, "111", 12.0), (1.7, "110", 40.0)])]
    interiors += _rendered_interiors(contrast, seed=3)
    requests = _requests_of(interiors, rng)
    tab = gr.model_library().tables
    requests.append((interiors[0], *(a[:0] if a is not None else None for a in gr.placed_planes(
        tab, np.zeros(1, int), np.zeros(1, int), 256)), 2.0, 0.5, tab.gap_inv[:0]))
    for me in (1_000_000, 20_000):
        ref = _previous_rss_requests(requests, max_elements=me)
        got = it.rss_requests(requests, max_elements=me)
        assert len(got) == len(ref)
        for a, b in zip(got, ref):
            assert np.array_equal(a, b)
    # and one request alone (interior_rss_batch) as before
    for req in requests[:6]:
        assert np.array_equal(gr.interior_rss_batch(*req[:7], gap_inv=req[7]), _previous_rss_requests([req])[0])


def test_facet_sums_of_a_chunk_give_its_previous_equations():
    rng = np.random.default_rng(5)
    interiors = _rendered_interiors("bright", seed=1, count=6)
    for req in _requests_of(interiors, rng):
        new = it.normal_equations(*req)
        old = _previous_normal_equations(*req)
        assert new.mode == old.mode
        for a, b in zip(new[1:], old[1:]):
            assert np.array_equal(a, b)


def test_smooth_rss_with_each_power_once_equals_the_products_of_powers():
    rng = np.random.default_rng(8)
    interiors = _rendered_interiors("bright", seed=2, count=6) + _rendered_interiors("dark", seed=2, count=6)
    for k in range(20):
        x, y = rng.uniform(-0.6, 0.6, 300), rng.uniform(-0.6, 0.6, 300)
        x[:3] = (0.0, -0.0, 1e-300)
        interiors.append(it.Interior(x, y, rng.normal(0.5, 0.2, 300), "facets"))
    for inner in interiors:
        for sample in (inner, gr.subsample_interior(inner, 150)):
            assert it.smooth_rss(sample) == _previous_smooth_rss(sample)
            assert it.smooth_rss(sample, 2) == _previous_smooth_rss(sample, 2)


def test_facet_evidence_without_the_smooth_fit_where_it_cannot_matter():
    rng = np.random.default_rng(3)
    cases = []
    for _ in range(4000):
        flat, rnd, smooth, rmin = rng.uniform(0.0, 2.0, 4)
        if rng.random() < 0.2:
            rmin = rng.choice([flat, rnd])
        if rng.random() < 0.05:
            smooth = math.nan
        cases.append((flat, rnd, smooth, rmin, rng.uniform(1e-3, 1.0), rng.choice([0.0, 0.05, 3.0])))
    cases += [(1.0, 1.0, 0.5, 1.0, 0.1, 2.0), (1.0, math.nan, 0.5, 0.7, 0.1, 2.0), (0.4, 0.9, 0.1, math.nan, 0.1, 1.0)]
    called = 0
    for flat, rnd, smooth, rmin, s2, w in cases:
        def sm(v=smooth):
            nonlocal called
            called += 1
            return v
        got = gr.facet_evidence(flat, rnd, sm, rmin, s2, w)
        ref = _previous_facet_evidence(flat, rnd, lambda v=smooth: v, rmin, s2, w)
        assert (math.isnan(got) and math.isnan(ref)) or (got == ref and math.copysign(1, got) == math.copysign(1, ref))
    assert called < len(cases)                        # the smooth fit is left out somewhere


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_classify_frame_equals_the_previous_kernels(contrast, monkeypatch):
    # reference: the previous rss_requests, smooth_rss and facet evidence, grains in step 64 at a time
    frame = habit_chain_frame(10, contrast, seed=6)
    assert frame.n_grains >= 5
    new = cl.classify_frame(frame)
    monkeypatch.setattr(gr, "rss_requests", _previous_rss_requests)
    monkeypatch.setattr(gr, "smooth_rss", _previous_smooth_rss)
    monkeypatch.setattr(gr, "facet_evidence", _previous_facet_evidence)
    monkeypatch.setattr(cl, "GRAINS_IN_STEP", 64)
    old = cl.classify_frame(frame)
    for k, v in new.items():
        a, b = np.asarray(v), np.asarray(old[k])
        assert (np.all(a == b) if a.dtype == object else np.array_equal(a, b, equal_nan=True)), k


def test_interior_given_the_outline_geometry_equals_the_one_computed_alone():
    # the interior collected with the outline's centroid and area handed in (classify_frame takes them once
    # per outline) against the one that computes them itself
    frame = habit_chain_frame(10, "dark", seed=5)
    signal, mode = cl.interior_signal(frame)
    contours = cl.frame_contours(frame)
    labs = np.asarray(frame.grains["label"], int)
    checked = 0
    for i, c in enumerate(contours):
        if len(c) < 3:
            continue
        geo = cl.outline_geometry(c)
        assert cl.outline_ecd_px(c, geo) == cl.outline_ecd_px(c)
        a_lab, a_get = gr.grain_evidence_lazy(frame.labels, signal, mode, c, int(labs[i]), 2)
        b_lab, b_get = gr.grain_evidence_lazy(frame.labels, signal, mode, c, int(labs[i]), 2, geo)
        assert np.array_equal(a_lab, b_lab)
        a, b = a_get(), b_get()
        assert (a is None) == (b is None)
        if a is not None:
            for f in ("x", "y", "value", "pixel", "weight", "mode"):
                assert np.array_equal(getattr(a, f), getattr(b, f)), f
            checked += 1
    assert checked >= 5
    assert cl.outline_geometry(None) is None and cl.outline_geometry(np.zeros((2, 2))) is None


def _previous_free_edge(labels, contour_px, label, reach_px=2):
    """scipy's iterated binary dilation of the other grains' pixels."""
    from scipy import ndimage as ndi

    c = np.asarray(contour_px, float)
    r0 = max(int(np.floor(c[:, 1].min())) - reach_px - 1, 0)
    c0 = max(int(np.floor(c[:, 0].min())) - reach_px - 1, 0)
    r1 = min(int(np.ceil(c[:, 1].max())) + reach_px + 2, labels.shape[0])
    c1 = min(int(np.ceil(c[:, 0].max())) + reach_px + 2, labels.shape[1])
    crop = labels[r0:r1, c0:c1]
    near = ndi.binary_dilation((crop != label) & (crop != 0), iterations=reach_px)
    rr = np.clip(np.floor(c[:, 1]).astype(int) - r0, 0, crop.shape[0] - 1)
    cc = np.clip(np.floor(c[:, 0]).astype(int) - c0, 0, crop.shape[1] - 1)
    return ~near[rr, cc]


@pytest.mark.parametrize("seed", [0, 4])
def test_free_edge_and_the_signature_of_split_grains_equal_the_previous_forms(seed):
    # touching grains of a rendered field (invented): the true-edge flags by the one-step diamond dilation,
    # and the signature and area a split grain's smoothness test takes from its outline match
    from grainhabit.plugins.habit import signature as sg

    frame = habit_chain_frame(12, "bright", seed=seed)
    contours = cl.frame_contours(frame)
    labs = np.asarray(frame.grains["label"], int)
    p = cl.STEP.resolve({})
    checked = 0
    for i, c in enumerate(contours):
        if len(c) < 8:
            continue
        for reach in (1, 2, 3):
            assert np.array_equal(cl.free_edge(frame.labels, c, int(labs[i]), reach),
                                  _previous_free_edge(frame.labels, c, int(labs[i]), reach))
        lab_c = np.column_stack([c[:, 0], -c[:, 1]])
        match = cl.outline_evidence_many([lab_c], p)[0][0]
        assert np.array_equal(match.signature, sg.radial_signature(lab_c, p["n_angles"]))
        assert match.area == gr.polygon_centroid(lab_c)[1]
        checked += 1
    assert checked >= 5


def test_mean_and_std_equal_numpys():
    # reference: numpy.mean and numpy.std
    rng = np.random.default_rng(17)
    arrays = [rng.normal(rng.uniform(-3, 3), rng.uniform(1e-3, 5), int(rng.integers(1, 5000))) for _ in range(500)]
    arrays += [np.full(40, 0.25), rng.normal(size=(300, 2))[:, 1], rng.normal(size=50).astype(np.float32),
               np.arange(60)]
    for v in arrays:
        m, s = it.mean_and_std(v)
        assert m == float(np.mean(v)) and s == float(np.std(v))
        assert it.mean_of(v) == float(np.mean(v))
    for inner in _rendered_interiors("bright", seed=4, count=6):
        assert inner.spread == abs(float(np.mean(inner.value))) + float(np.std(inner.value))


def _previous_first_lowest(z, zmin):
    """A new score array per call, the comparison times the scores, then their maximum."""
    m = z.shape[0]
    if m > 255:
        return z.argmin(axis=0)
    score = np.arange(m, 0, -1, dtype=np.uint8)[:, None, None]
    top = np.max((z == zmin) * score, axis=0)
    return m - top.astype(np.intp)


def test_first_lowest_scored_in_place_equals_the_previous_form_and_argmin():
    # reference: the previous kernel and numpy's argmin (the first index of the least value)
    rng = np.random.default_rng(9)
    for m in (1, 2, 7, 60, 255, 300):
        z = rng.integers(0, 4, (m, 5, 37)).astype(np.float32)          # many ties
        z[:, 0, 0] = 1.0                                                # all planes tied
        zmin = z.min(axis=0)
        got = it.first_lowest(z, zmin)
        assert np.array_equal(got, _previous_first_lowest(z, zmin))
        assert np.array_equal(got, z.argmin(axis=0))
    z = rng.normal(size=(7, 3, 50)).astype(np.float32)
    zc = z.copy()
    it.first_lowest(z, z.min(axis=0))
    assert np.array_equal(z, zc)                                        # the heights are left alone
