"""Fast habit kernels tested against the slower references they replace.

Each reference below is the earlier, plainer implementation, kept here (not in
the package) so that the fast kernel is checked against it on drawn grains
(skimage.draw; invented test data) and on the model library itself.
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit import engine as gr
from builders import body_and_rotation, draw_crystal_frame, draw_polygon_frame, habit_chain_frame


def _evidence(alpha, face, rot_deg, contrast="bright", seed=0, ecd_px=70.0):
    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, ecd_px=ecd_px, contrast=contrast, noise=0.02, seed=seed)
    signal, mode = cl.interior_signal(frame)
    return gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)


# --------------------------------------------------------------- references

def _reference_outline_candidates(sig, tab, level=0):
    """One window at a time, offsets from the symmetry on every call (the earlier kernel)."""
    a = np.asarray(sig, float)
    n = a.size
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * tab.sig_fft[level], n, axis=1)
    d = (a @ a + tab.sig_sq[level][:, None] - 2.0 * cc) / n
    u = d.shape[0]
    rows = np.arange(u)
    k0 = np.argmin(d, axis=1)
    half = tab.sym_deg / 2 / 360 * n
    is100 = tab.face != "111"
    offs = np.where(is100[:, None], np.column_stack([half, np.full(u, np.nan), np.full(u, np.nan)]),
                    np.column_stack([half / 2, half, 1.5 * half]))
    shifts = np.zeros((u, 4), int)
    valid = np.zeros((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    w = np.arange(-(n // 32), n // 32 + 1)
    for j in range(3):
        ok = np.isfinite(offs[:, j])
        o = np.round(np.nan_to_num(offs[:, j])).astype(int)
        win = (k0[:, None] + o[:, None] + w[None, :]) % n
        best = win[rows, np.argmin(d[rows[:, None], win], axis=1)]
        dup = np.any((shifts[:, :j + 1] == best[:, None]) & valid[:, :j + 1], axis=1)
        shifts[:, j + 1] = best
        valid[:, j + 1] = ok & ~dup
    return shifts, np.sqrt(np.maximum(d[rows[:, None], shifts], 0.0)), valid


def _previous_outline_candidates(sig, tab, level=0):
    """The kernel before the in-place distances and the stored window offsets (plain expressions)."""
    a = np.asarray(sig, float)
    n = a.size
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * tab.sig_fft[level], n, axis=1)
    d = (a @ a + tab.sig_sq[level][:, None] - 2.0 * cc) / n
    u = d.shape[0]
    k0 = np.argmin(d, axis=1)
    w = np.arange(-(n // 32), n // 32 + 1)
    win = (k0[:, None, None] + tab.turn_off[:, :, None] + w[None, None, :]) % n
    vals = np.take_along_axis(d, win.reshape(u, -1), axis=1).reshape(win.shape)
    best = np.take_along_axis(win, np.argmin(vals, axis=2)[:, :, None], axis=2)[:, :, 0]
    shifts = np.empty((u, 4), np.int64)
    valid = np.zeros((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    shifts[:, 1:] = best
    for j in range(3):
        dup = np.any((shifts[:, :j + 1] == best[:, j, None]) & valid[:, :j + 1], axis=1)
        valid[:, j + 1] = tab.turn_ok[:, j] & ~dup
    return shifts, np.sqrt(np.maximum(np.take_along_axis(d, shifts, axis=1), 0.0)), valid


# -------------------------------------------------------------------- tests

@pytest.mark.parametrize("alpha,face,rot_deg", [(1.0, "100", 0.0), (1.8, "100", 9.0), (2.6, "111", 33.0),
                                                (3.2, "111", 71.0), (2.0, "110", 12.0)])
def test_outline_candidates_equal_the_reference(alpha, face, rot_deg):
    lib = gr.model_library()
    contour, _ = _evidence(alpha, face, rot_deg)
    sig = gr.radial_signature(contour, 256)
    for level in (0, 3):
        fast = gr.outline_candidates(sig, lib.tables, level)
        ref = _reference_outline_candidates(sig, lib.tables, level)
        assert np.array_equal(fast[2], ref[2])
        assert np.array_equal(fast[0][fast[2]], ref[0][ref[2]])
        assert np.array_equal(fast[1][fast[2]], ref[1][ref[2]])



@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_library_plane_gaps_give_the_same_rss(contrast):
    # the per-shape table of 1 / |g_j - g_i| (kept by the library, rotation-invariant) against
    # the same quantity computed from the turned planes of each placement
    lib = gr.model_library()
    tab = lib.tables
    _, inner = _evidence(2.3, "111", 21.0, contrast)
    rng = np.random.default_rng(3)
    u = rng.integers(0, tab.face.size, 40)
    k = rng.integers(0, 256, 40)
    planes = gr.placed_planes(tab, u, k, 256)
    fast = gr.interior_rss_batch(inner, *planes, gap_inv=tab.gap_inv[u])
    ref = gr.interior_rss_batch(inner, *planes)
    # float32 geometry: a pixel exactly on a facet edge may change side
    assert np.allclose(fast, ref, rtol=1e-5)


@pytest.mark.parametrize("alpha,face,rot_deg", [(1.0, "100", 5.0), (2.6, "111", 33.0)])
def test_plate_and_rod_families_at_once_equal_one_at_a_time(alpha, face, rot_deg):
    # reference: best_family on each family separately
    contour, _ = _evidence(alpha, face, rot_deg)
    sig = gr.radial_signature(contour, 256)
    _, plate, _, rod = cl.family_signatures(256)
    both = cl.best_families(sig)
    for got, fam in zip(both, (plate, rod)):
        ref = cl.best_family(sig, fam)
        assert got[1] == ref[1]
        assert got[0] == pytest.approx(ref[0], abs=1e-12)


def test_outline_candidates_bitwise_equal_the_previous_kernel():
    # every shift, distance and flag, also of unused slots, on drawn grains and on noisy
    # library signatures (each model against the whole library, all rounding levels)
    lib = gr.model_library()
    tab = lib.tables
    rng = np.random.default_rng(5)
    sigs = [gr.radial_signature(_evidence(a, f, r)[0], 256)
            for a, f, r in [(1.2, "100", 3.0), (2.4, "111", 40.0), (3.4, "111", 7.0), (1.9, "110", 15.0)]]
    m = lib.signatures.shape[1]
    for j in rng.integers(0, m, 12):
        sigs.append(lib.signatures[int(rng.integers(0, 7)), j] * (1 + 0.02 * rng.standard_normal(256)))
    for sig in sigs:
        for level in range(len(gr.ROUNDING_LEVELS)):
            fast = gr.outline_candidates(sig, tab, level)
            ref = _previous_outline_candidates(sig, tab, level)
            for x, y in zip(fast, ref):
                assert np.array_equal(x, y)


@pytest.mark.parametrize("faces", [("111",), ("100", "110"), ("110", "nonsense")])
def test_view_subset_masks_the_same_models_as_isin(faces):
    # reference: np.isin of the shapes' view index against the views asked for (the earlier code)
    lib = gr.model_library()
    contour, _ = _evidence(2.2, "111", 17.0)
    fit = gr.fit_alpha(contour, None, library=lib, faces=faces)
    ok = np.isin(lib.tables.face_id, [gr.VIEWS.index(f) for f in faces if f in gr.VIEWS])[lib.tables.model_shape]
    assert np.array_equal(np.isfinite(fit.score), ok)
    assert fit.face in faces


def test_bench_prepare_builds_the_family_tables_before_the_first_frame():
    # the one-off cost of the plate and rod family signatures is paid in prepare(), as a worker
    # pays it in classify-habit's prepare hook, not by the grains of the first frame
    from grainhabit.plugins.bench import habit as bench_habit

    cl.family_signatures.cache_clear()
    cl._families_stacked.cache_clear()
    bench_habit.prepare()
    before = cl.family_signatures.cache_info()
    levels = len(gr.ROUNDING_LEVELS)
    assert before.currsize == levels          # one table per corner rounding of the models
    lib = gr.model_library()
    for level in range(levels):
        cl.family_signatures(lib.signatures.shape[-1], level)
    assert cl.family_signatures.cache_info().hits == before.hits + levels


# ------------------------------------------ interior fit: the kernel before the per-interior caches

def _previous_sets(k, spec):
    """(T, t0) stacks of active sets as the earlier kernel built them (fixed values, one tie)."""
    ts, t0s = [], []
    for fixed, tied in spec:
        t, t0 = np.eye(k), np.zeros(k)
        for i, val in fixed:
            t[:, i] = 0.0
            t0[i] = val
        if tied is not None:
            i, j, ratio = tied
            t[:, j] = 0.0
            t[j, i] = ratio
        ts.append(t)
        t0s.append(t0)
    return np.stack(ts), np.stack(t0s)


def _previous_solve_sets(nm, rhs, vv, sets):
    tm, t0 = sets
    k = tm.shape[-1]
    tt = np.swapaxes(tm, 1, 2)
    nf = tt[:, None] @ nm[None] @ tm[:, None]
    r = np.einsum("sak,sck->sca", tt, rhs[None] - np.einsum("ckj,sj->sck", nm, t0))
    dead = ~np.any(tm != 0.0, axis=1)
    tr = np.einsum("scii->sc", nf)
    eye = np.eye(k)
    nf = nf + eye * (1e-12 * tr + 1e-300)[:, :, None, None] + (dead[:, :, None] * eye)[:, None]
    phi = np.linalg.solve(nf, r[..., None])[..., 0]
    theta = np.einsum("sij,scj->sci", tm, phi) + t0[:, None, :]
    rss = vv - 2.0 * np.einsum("sci,ci->sc", theta, rhs) + np.einsum("sci,cij,scj->sc", theta, nm, theta)
    return theta, np.maximum(rss, 0.0)


def _previous_interior_rss_batch(interior, g_up, z_up, g_dn=None, z_dn=None, edge_px=2.0, tem_offset_max=0.5,
                                 gap_inv=None):
    """The batched interior fit before its per-interior sums were kept (one chunk; the earlier kernel)."""
    kmin, kmax = gr.TILT_GAIN_RANGE
    g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
    c, m = z_up.shape
    x, y, v = interior.x, interior.y, interior.value
    p = v.size
    pts = np.stack([x, y, np.ones_like(x)]).astype(np.float32)

    def heights(g, z0):
        k = z0.shape[1]
        a = np.empty((k, c, 3), np.float32)
        a[..., :2] = np.swapaxes(g, 0, 1)
        a[..., 2] = z0.T
        return (a.reshape(-1, 3) @ pts).reshape(k, c, p)

    zup = heights(g_up, z_up)
    ztop = zup.min(axis=0)
    if interior.mode == "facets":
        if m <= 12:
            idx = np.full((c, p), m - 1, np.intp)
            for j in range(m - 2, -1, -1):
                idx[zup[j] == ztop] = j
        else:
            idx = zup.argmin(axis=0)
        wt = np.ones((c, p))
        scale = np.ones(c)
        if m > 1 and edge_px > 0:
            inv = (gr.plane_gap_inverse(g_up) if gap_inv is None else gap_inv).transpose(2, 0, 1)
            zup -= ztop
            with np.errstate(invalid="ignore"):
                zup *= inv[:, np.arange(c)[:, None], idx]
            near = np.fmin.reduce(zup, axis=0)
            far = ~(near < edge_px * interior.pixel)
            nfar = far.sum(axis=1)
            use = (nfar >= 30) & (nfar < p)
            wt = np.where(use[:, None], far, True).astype(float)
            scale = np.where(use, p / np.maximum(nfar, 1), 1.0)
        bins = (np.arange(c)[:, None] * m + idx).ravel()
        cnt = np.bincount(bins, wt.ravel(), minlength=c * m).reshape(c, m)
        sx = np.bincount(bins, (wt * x).ravel(), minlength=c * m).reshape(c, m)
        sy = np.bincount(bins, (wt * y).ravel(), minlength=c * m).reshape(c, m)
        sv = np.bincount(bins, (wt * v).ravel(), minlength=c * m).reshape(c, m)
        xx, xy, yy = wt @ (x * x), wt @ (x * y), wt @ (y * y)
        xv, yv, vv = wt @ (x * v), wt @ (y * v), wt @ (v * v)
        nz = 1.0 / np.sqrt(1.0 + np.einsum("cmi,cmi->cm", g_up, g_up))
        sec = 1.0 / nz - 1.0
        f = np.stack([np.ones_like(sec), sec, -g_up[..., 0] * nz, -g_up[..., 1] * nz], axis=-1)
        nm = np.zeros((c, 6, 6))
        nm[:, :4, :4] = np.einsum("cm,cma,cmb->cab", cnt, f, f)
        nm[:, :4, 4] = nm[:, 4, :4] = np.einsum("cm,cma->ca", sx, f)
        nm[:, :4, 5] = nm[:, 5, :4] = np.einsum("cm,cma->ca", sy, f)
        nm[:, 4, 4], nm[:, 4, 5], nm[:, 5, 4], nm[:, 5, 5] = xx, xy, xy, yy
        rhs = np.concatenate([np.einsum("cm,cma->ca", sv, f), xv[:, None], yv[:, None]], axis=1)
        eps = 1e-12
        sets = _previous_sets(6, [((), None), (((0, 0.0), (1, 0.0)), None), ((), (0, 1, kmin)), ((), (0, 1, kmax))])
        th, rss = _previous_solve_sets(nm, rhs, vv, sets)
        ok = (th[0, :, 0] >= -eps) & (th[0, :, 1] >= kmin * th[0, :, 0] - eps) \
            & (th[0, :, 1] <= kmax * th[0, :, 0] + eps)
        sub = np.minimum(rss[1], np.where(th[2, :, 0] >= -eps, rss[2], np.inf))
        sub = np.minimum(sub, np.where(th[3, :, 0] >= -eps, rss[3], np.inf))
        return np.where(ok, rss[0], sub) * scale
    t = np.maximum(ztop - heights(g_dn, z_dn).max(axis=0), 0.0).astype(float)
    nm = np.empty((c, 4, 4))
    st, sx_, sy_ = t.sum(axis=1), t @ x, t @ y
    nm[:, 0, 0] = np.einsum("cp,cp->c", t, t)
    nm[:, 0, 1], nm[:, 0, 2], nm[:, 0, 3] = st, sx_, sy_
    nm[:, 1:, 0] = nm[:, 0, 1:]
    nm[:, 1:, 1:] = np.array([[p, x.sum(), y.sum()], [x.sum(), x @ x, x @ y], [y.sum(), x @ y, y @ y]])[None]
    rhs = np.empty((c, 4))
    rhs[:, 0] = t @ v
    rhs[:, 1:] = np.array([v.sum(), x @ v, y @ v])[None]
    vv = np.full(c, v @ v)
    amax = max(tem_offset_max * float(np.mean(v)), 0.0)
    eps = 1e-12
    tm, t0 = _previous_sets(4, [(f, None) for f in ((), ((1, 0.0),), ((1, 1.0),), ((0, 0.0),),
                                                   ((0, 0.0), (1, 0.0)), ((0, 0.0), (1, 1.0)))])
    th, rss = _previous_solve_sets(nm, rhs, vv, (tm, t0 * amax))
    ok = (th[..., 0] >= -eps) & (th[..., 1] >= -eps) & (th[..., 1] <= amax + eps)
    return np.where(ok[0], rss[0], np.where(ok[1:], rss[1:], np.inf).min(axis=0))


@pytest.mark.parametrize("contrast", ["bright", "dark"])
@pytest.mark.parametrize("alpha,face,rot_deg", [(1.0, "100", 5.0), (2.3, "111", 21.0), (1.7, "110", 40.0)])
def test_interior_fit_bitwise_equals_the_previous_kernel(contrast, alpha, face, rot_deg):
    # the kept per-interior sums and the stored active-set constants change no bit: every RSS of
    # random placements (with and without the library's plane gaps, the full and a thinned sample,
    # each interior placed twice so that its kept sums are reused) and of the round body
    lib = gr.model_library()
    tab = lib.tables
    _, inner = _evidence(alpha, face, rot_deg, contrast, seed=2)
    rng = np.random.default_rng(11)
    for sample in (inner, gr.subsample_interior(inner, 150)):
        for _ in range(2):
            u = rng.integers(0, tab.face.size, 30)
            k = rng.integers(0, 256, 30)
            planes = gr.placed_planes(tab, u, k, 256)
            for gap in (None, tab.gap_inv[u]):
                got = gr.interior_rss_batch(sample, *planes, gap_inv=gap)
                ref = _previous_interior_rss_batch(sample, *planes, gap_inv=gap)
                assert np.array_equal(got, ref)
        rnd = gr.round_rss(sample, 0.5)
        from grainhabit.plugins.habit.interior import _round_planes
        assert rnd == float(_previous_interior_rss_batch(sample, *_round_planes(), edge_px=0.0)[0])
        # the kept noise scale is the plain |mean| + standard deviation
        assert sample.spread == abs(float(np.mean(sample.value))) + float(np.std(sample.value))


# ------------------------------------- per-grain work left out: the free active set, the lazy interior

def test_free_active_set_solve_equals_the_general_path():
    # reference: _solve_sets through T^T N T, T^T (r - N t0) and T phi + t0 with T the identity
    # (the path before the free set was solved on its own); random normal matrices of both fits
    from grainhabit.plugins.habit import interior as it

    rng = np.random.default_rng(7)
    for k, sets in ((6, it._FACET_SETS), (4, it._THICKNESS_SETS)):
        a = rng.standard_normal((25, 40, k))
        nm = np.einsum("cpi,cpj->cij", a, a)
        rhs = rng.standard_normal((25, k))
        vv = rng.random(25) * 50.0
        free = (sets[0][:1], sets[1][:1])
        got = it._solve_sets(nm, rhs, vv, free)
        ref = _previous_solve_sets(nm, rhs, vv, free)
        for x, y in zip(got, ref):
            assert np.array_equal(x, y)
        # a stack with held unknowns still takes the general path
        assert not it._is_free(sets[0][1:2], sets[1][1:2])


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_lazy_interior_equals_the_collected_one(contrast):
    # reference: grain_evidence (the interior collected at once), field by field
    from grainhabit.plugins.habit import interior as it

    body, rot = body_and_rotation(2.3, "111", 21.0)
    frame = draw_crystal_frame(body, rot, contrast=contrast, noise=0.02, seed=4)
    signal, mode = cl.interior_signal(frame)
    outline = cl.frame_contours(frame)[0]
    contour, inner = gr.grain_evidence(frame.labels, signal, mode, outline, 1)
    contour2, get = gr.grain_evidence_lazy(frame.labels, signal, mode, outline, 1)
    assert np.array_equal(contour, contour2)
    lazy = get()
    assert get() is lazy                              # collected once
    for name in ("x", "y", "value"):
        assert np.array_equal(getattr(inner, name), getattr(lazy, name))
    assert (inner.mode, inner.pixel, inner.weight) == (lazy.mode, lazy.pixel, lazy.weight)
    assert gr.grain_evidence_lazy(frame.labels, signal, mode, outline[:2], 1)[0] is None
    assert it.grain_evidence(frame.labels, signal, mode, outline[:2], 1) == (None, None)


@pytest.mark.parametrize("case", ["cube", "octahedron_dark", "plate", "disc"])
def test_classify_grain_with_a_lazy_interior_equals_the_collected_one(case):
    # reference: classify_grain given the interior collected beforehand (every column, every fit field)
    p = cl.STEP.resolve({})
    if case == "plate":
        plate = cr.tabular_prism(0.5, 0.1)
        rot = cr.in_plane_rotation(12.0) @ cr.resting_rotation("111")
        frame = draw_polygon_frame(cr.project(plate, rot) * 70)
    elif case == "disc":
        t = np.linspace(0, 2 * np.pi, 90, endpoint=False)
        frame = draw_polygon_frame(np.column_stack([9 * np.cos(t), 9 * np.sin(t)]))
    else:
        alpha, face, contrast = (1.0, "100", "bright") if case == "cube" else (3.4, "111", "dark")
        body, rot = body_and_rotation(alpha, face, 17.0)
        frame = draw_crystal_frame(body, rot, contrast=contrast, noise=0.02, seed=1)
    signal, mode = cl.interior_signal(frame)
    outline = cl.frame_contours(frame)[0]
    contour, inner = gr.grain_evidence(frame.labels, signal, mode, outline, 1, p["erode_px"])
    calls = []
    _, get = gr.grain_evidence_lazy(frame.labels, signal, mode, outline, 1, p["erode_px"])

    def counted():
        calls.append(1)
        return get()

    ref = cl.classify_grain(contour, inner, p)
    got = cl.classify_grain(contour, counted, p)
    assert got[0] == ref[0] and got[1] == ref[1]
    assert got[2].keys() == ref[2].keys()
    for k in ref[2]:
        assert got[2][k] == ref[2][k] or (np.isnan(got[2][k]) and np.isnan(ref[2][k]))
    for k in ("alpha", "alpha_lo", "alpha_hi", "face", "rotation_deg", "outline_misfit", "note",
              "facet_chi2", "relief_chi2"):
        a, b = getattr(got[3], k), getattr(ref[3], k)
        assert a == b or (isinstance(a, float) and np.isnan(a) and np.isnan(b))
    assert np.array_equal(got[3].score, ref[3].score)
    assert len(calls) <= 1
    if case == "plate":
        assert calls == []                            # the outline decides a plate: no interior collected


# ------------------------------------------------ next vertex by slicing instead of np.roll

def _previous_symmetric_hull_areas(pts, centres, fold=2, n_dir=720):
    """The support-function areas with np.roll (the code before the slicing)."""
    u, du, (w_sq, w_next) = gr._support_tables(n_dir, fold)
    hk = (np.asarray(pts, float) @ u.T).max(axis=0)
    cen = np.asarray(centres, float).reshape(-1, 2)
    h = np.empty((cen.shape[0], n_dir))
    h[:] = hk
    for j in range(1, fold):
        np.maximum(h, np.roll(hk, j * n_dir // fold) + cen @ du[j - 1], out=h)
    return 0.5 * np.abs(np.einsum("ci,ci->c", h, w_sq * h + w_next * np.roll(h, -1, axis=1)))


def _previous_polygon_centroid(poly):
    p = np.asarray(poly, float)
    x, y = p[:, 0], p[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    a = 0.5 * cross.sum()
    return np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * a), abs(a)


def test_next_vertex_by_slicing_equals_np_roll():
    from grainhabit.plugins.habit import signature as sg

    rng = np.random.default_rng(9)
    for a in (rng.random(7), rng.random((40, 2)), np.arange(3.0)):
        assert np.array_equal(sg._next(a), np.roll(a, -1, axis=0))
    contour, _ = _evidence(2.4, "111", 40.0)
    c, area = gr.polygon_centroid(contour)
    c0, area0 = _previous_polygon_centroid(contour)
    assert np.array_equal(c, c0) and area == area0
    pts = rng.standard_normal((25, 2))
    centres = rng.standard_normal((81, 2)) * 0.3
    for fold in (2, 3):
        # the one-period form of the areas since: equal to a relative 1e-9 (tests/test_habit_grain_batches.py)
        np.testing.assert_allclose(gr.symmetric_hull_areas(pts, centres, fold),
                                   _previous_symmetric_hull_areas(pts, centres, fold), rtol=1e-9)


@pytest.mark.parametrize("radius", [1, 2, 3, 4])
def test_diamond_morphology_equals_scipy_iterations(radius):
    # reference: scipy.ndimage.binary_erosion / binary_dilation with iterations=radius (default cross,
    # border_value 0), on random and closed masks of every size down to one pixel, touching the border
    from scipy import ndimage as ndi

    from grainhabit.plugins.habit import interior as it

    rng = np.random.default_rng(radius)
    for trial in range(120):
        h, w = (int(v) for v in rng.integers(1, 30, 2))
        m = rng.random((h, w)) < rng.uniform(0.3, 0.97)
        if trial % 2:
            m = ndi.binary_closing(m, iterations=2)
        assert np.array_equal(it.diamond_morphology(m, radius, True), ndi.binary_erosion(m, iterations=radius))
        assert np.array_equal(it.diamond_morphology(m, radius, False), ndi.binary_dilation(m, iterations=radius))


def test_interior_fits_of_many_grains_solved_together_equal_one_call_each():
    # reference: interior_rss_batch, one call per request (the previous way); the systems of grains of
    # both contrasts, thinned and full samples, and a request cut into chunks, solved in one call per mode
    from grainhabit.plugins.habit import interior as it

    lib = gr.model_library()
    tab = lib.tables
    rng = np.random.default_rng(5)
    requests = []
    for j, (contrast, alpha, face, rot) in enumerate([("bright", 1.0, "100", 5.0), ("dark", 2.3, "111", 21.0),
                                                      ("bright", 3.5, "111", 12.0), ("dark", 1.7, "110", 40.0)]):
        _, inner = _evidence(alpha, face, rot, contrast, seed=j)
        for sample in (inner, gr.subsample_interior(inner, 150)):
            c = int(rng.integers(1, 40))
            u = rng.integers(0, tab.face.size, c)
            g_up, z_up, g_dn, z_dn = gr.placed_planes(tab, u, rng.integers(0, 256, c), 256)
            requests.append((sample, g_up, z_up, g_dn, z_dn, 2.0, 0.5, tab.gap_inv[u]))
    requests.append((requests[0][0], *requests[0][1:5], 2.0, 0.5, None))
    for me in (1_000_000, 20_000):          # the second cuts requests into chunks (as the reference does)
        ref = [gr.interior_rss_batch(*r[:7], max_elements=me, gap_inv=r[7]) for r in requests]
        got = it.rss_requests(requests, max_elements=me)
        assert len(got) == len(ref)
        for a, b in zip(got, ref):
            assert np.array_equal(a, b)
    assert it.rss_requests([(requests[0][0], *(x[:0] for x in requests[0][1:5]), 2.0, 0.5, None)])[0].size == 0


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_frame_fitted_together_equals_grain_by_grain(contrast, monkeypatch):
    # reference: every grain's fits evaluated on their own (engine.run_steps per grain, the previous
    # way); classify_frame runs the grains in step and solves each round's placements together.
    # Every column must be the same, bit for bit (rendered field, touching grains included; invented)
    frame = habit_chain_frame(8, contrast, seed=4)
    assert frame.n_grains >= 4
    together = cl.classify_frame(frame)
    monkeypatch.setattr(cl, "GRAINS_IN_STEP", 3)                # grains in step three at a time
    in_threes = cl.classify_frame(frame)
    monkeypatch.setattr(gr, "run_together", lambda steps: [gr.run_steps(s) for s in steps])
    alone = cl.classify_frame(frame)
    for other in (alone, in_threes):
        for k, v in together.items():
            a, b = np.asarray(v), np.asarray(other[k])
            assert (np.all(a == b) if a.dtype == object else np.array_equal(a, b, equal_nan=True)), k
