"""The outline match's lower bound (plugins/habit/outline_bound.py) and the fits it must leave unchanged.

The bound: for real signals a, b of length n with DFTs A, B, every cyclic shift s has
|a - roll(b, s)|^2 >= (1/n) sum_k (|A_k| - |B_k|)^2 -- Parseval's theorem (|a|^2 = (1/n) sum |A_k|^2)
and the triangle inequality on the correlation theorem's sum (handbook: e.g. Oppenheim & Schafer,
Discrete-Time Signal Processing, DFT properties). It is checked here against the brute-force
minimum over shifts with np.roll (no FFT), and the shapes the bound leaves out are checked against
the full comparison: the fits, class scores and classify-habit's columns must be the same.
Outlines: drawn grains (skimage.draw through the test builders), the library's own signatures
turned and with noise, random star polygons and discs (all invented test data).
"""
import numpy as np
import pytest

from grainhabit.plugins.habit import classify_habit as cl
from grainhabit.plugins.habit import engine as gr
from grainhabit.plugins.habit import outline_bound as ob
from builders import body_and_rotation, draw_crystal_frame, habit_chain_frame

N = 256


def _random_star(rng, k=None):
    """A star-shaped random polygon about the origin (invented)."""
    k = int(rng.integers(5, 40)) if k is None else k
    t = np.sort(rng.uniform(0, 2 * np.pi, k))
    r = 1.0 + 0.4 * rng.uniform(-1, 1, k)
    return np.column_stack([r * np.cos(t), r * np.sin(t)])


def _signatures(seed=3):
    """(signature, tau) pairs: drawn grains, noisy turned library shapes, random stars, a disc."""
    lib = gr.model_library()
    rng = np.random.default_rng(seed)
    out = []
    for a, f, r, ecd in [(1.0, "100", 3.0, 70.0), (1.4, "100", 30.0, 40.0), (2.3, "111", 11.0, 90.0),
                         (2.9, "111", 47.0, 60.0), (3.5, "111", 5.0, 25.0), (1.8, "110", 20.0, 50.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=ecd, noise=0.02, seed=1)
        c = cl.frame_contours(frame)[0]
        m = gr.match_outline(c, lib)
        out.append((m.signature, m.tau, m.level))
    m_models = lib.signatures.shape[1]
    for j in rng.integers(0, m_models, 12):
        lev = int(rng.integers(0, lib.signatures.shape[0]))
        s = np.roll(lib.signatures[lev, j], int(rng.integers(0, N)))
        noise = float(rng.choice([0.0, 0.002, 0.01, 0.05]))
        out.append((s * (1 + noise * rng.standard_normal(N)), float(rng.choice([0.003, 0.01, 0.03])), lev))
    for _ in range(8):
        s = gr.radial_signature(_random_star(rng), N)
        out.append((s, float(rng.choice([0.003, 0.01, 0.05])), int(rng.integers(0, 7))))
    t = np.linspace(0, 2 * np.pi, 200, endpoint=False)
    out.append((gr.radial_signature(np.column_stack([np.cos(t), np.sin(t)]), N), 0.01, 0))
    return out


def test_bound_is_below_the_brute_force_minimum_over_shifts():
    # Parseval's theorem and the triangle inequality: the magnitude-spectrum distance bounds the
    # distance at every cyclic shift from below; the minimum over shifts by np.roll, no FFT
    rng = np.random.default_rng(0)
    for n in (16, 64, 255, 256):
        for _ in range(20):
            a, b = rng.standard_normal(n), rng.standard_normal(n)
            if rng.uniform() < 0.5:
                b = np.roll(a, int(rng.integers(0, n))) * (1 + 0.1 * rng.standard_normal(n))
            brute = min(float(np.sum((a - np.roll(b, s)) ** 2)) / n for s in range(n))
            spec_b = np.conj(np.fft.rfft(b))[None, None]
            bound = ob.spectral_bound(spec_b, np.array([[b @ b]]), n, np.zeros(1, int))
            lb = ob.lower_bounds(np.fft.rfft(a), a @ a, np.array([b @ b]), bound.weighted_mag[0], n, 0.0)[0]
            assert lb <= brute + 1e-12 * (a @ a + b @ b) / n
            # the same bound as (1/n^2) sum over the whole spectrum of (|A_k| - |B_k|)^2 (Parseval)
            full = np.sum((np.abs(np.fft.fft(a)) - np.abs(np.fft.fft(b))) ** 2) / n ** 2
            assert lb == pytest.approx(full, rel=1e-9, abs=1e-12)


def test_bound_is_tight_for_a_turned_copy():
    # a copy turned by a whole number of samples: distance 0 at that shift, and the bound 0 too
    lib = gr.model_library()
    s = lib.signatures[0, 40]
    a = np.roll(s, 37)
    b = gr.BoundedOutline(a, lib, 0, 0.01)
    j = lib.tables.model_shape[40]
    assert abs(b.lb[j] + b.margin) < 1e-12 * (a @ a) / N          # the bound less its safety margin


@pytest.mark.parametrize("faces", [gr.VIEWS, ("111",), ("100", "110")])
@pytest.mark.parametrize("within", [0.0, 4.0, 29.0, 200.0])
def test_compared_rows_equal_the_full_comparison_and_the_rest_cannot_matter(within, faces):
    lib = gr.model_library()
    tab = lib.tables
    cls = np.full(tab.face.size, -1)
    cls[tab.model_shape] = np.where(lib.alphas <= 1.5, 0, np.where(lib.alphas < 3.0, 1, 2))   # vocabulary's limits
    ok = np.isin(tab.face, faces)
    for sig, tau, level in _signatures():
        s0, d0, v0 = gr.outline_candidates(sig, tab, level)
        s1, d1, v1 = gr.outline_candidates_within(sig, lib, level, tau, within, faces)
        c = v1[:, 0]
        # every compared shape: the bits of the full comparison
        assert np.array_equal(s0[c], s1[c]) and np.array_equal(d0[c], d1[c]) and np.array_equal(v0[c], v1[c])
        assert np.all(np.isinf(d1[~c])) and not v1[~c].any()
        # the allowed shapes left out: their scores lie beyond `within` and beyond each class's least
        # score; the least distance over all views and over the allowed ones is a compared shape's
        key = np.where(ok, d0[:, 0] ** 2 + tau ** 2 * tab.prior, np.inf)
        kstar = key.min()
        assert np.all(key[~c & ok] > kstar + tau ** 2 * within)
        for k in range(3):
            sel = (cls == k) & ok
            assert key[sel & c].min() == key[sel].min()
        assert d1[c, 0].min() == d0[:, 0].min()
        assert d1[c & ok, 0].min() == d0[ok, 0].min()


def test_resumed_comparison_equals_a_fresh_one():
    lib = gr.model_library()
    for sig, tau, level in _signatures(seed=5)[:12]:
        b = gr.BoundedOutline(sig, lib, level, tau)
        b.upto(4.0)
        got = b.upto(29.0)
        ref = gr.BoundedOutline(sig, lib, level, tau).upto(29.0)
        c = ref[2][:, 0]
        assert np.all(got[2][:, 0] >= c)                   # a superset of the fresh one's shapes
        k = got[2][:, 0]
        full = gr.outline_candidates(sig, lib.tables, level)
        for x, y in zip(got, full):
            assert np.array_equal(x[k], y[k])


def test_views_subset_falls_back_to_every_shape():
    # a match picked for all views is not used for a fit over fewer views: the fit compares all
    lib = gr.model_library()
    body, rot = body_and_rotation(2.2, "111", 9.0)
    frame = draw_crystal_frame(body, rot, ecd_px=60.0, noise=0.02, seed=4)
    c = cl.frame_contours(frame)[0]
    m = gr.match_outline(c, lib, within=4.0)
    ref = gr.fit_alpha(c, None, library=lib, faces=("100", "110"))
    got = gr.fit_alpha(c, None, library=lib, faces=("100", "110"), match=m)
    assert np.array_equal(ref.score, got.score)
    m2 = gr.match_outline(c, lib, within=4.0, faces=("100", "110"))
    got2 = gr.fit_alpha(c, None, library=lib, faces=("100", "110"), match=m2)
    assert got2.alpha_lo == ref.alpha_lo and got2.alpha_hi == ref.alpha_hi and got2.face == ref.face


_FIELDS = ("alpha", "alpha_lo", "alpha_hi", "alpha_best", "face", "rotation_deg", "outline_misfit", "note",
           "facet_chi2", "interior_level", "relief_chi2")


def _same_fit(got, ref, lib, p):
    for f in _FIELDS:
        x, y = getattr(got, f), getattr(ref, f)
        assert x == y or (x != x and y != y), f
    fin = np.isfinite(got.score)
    assert np.array_equal(got.score[fin], ref.score[fin])
    assert np.all(ref.score[~fin] > p["tolerance"])
    assert np.array_equal(gr.class_scores(got, lib), gr.class_scores(ref, lib))
    assert gr.polyhedral_class(got, lib, p["tolerance"]) == gr.polyhedral_class(ref, lib, p["tolerance"])
    assert gr.outline_settles(got, lib, p["tolerance"]) == gr.outline_settles(ref, lib, p["tolerance"])


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_fits_with_the_bounded_match_equal_those_with_every_shape(contrast):
    p = cl.STEP.resolve({})
    kw = gr.fit_options(p)
    lib = kw["library"]
    for a, f, r, ecd in [(1.0, "100", 5.0, 60.0), (2.4, "111", 20.0, 60.0), (2.8, "111", 33.0, 90.0),
                         (3.5, "111", 40.0, 30.0), (1.9, "110", 10.0, 60.0), (1.3, "100", 41.0, 120.0)]:
        body, rot = body_and_rotation(a, f, r)
        frame = draw_crystal_frame(body, rot, ecd_px=ecd, size=160, contrast=contrast, noise=0.02, seed=2)
        signal, mode = cl.interior_signal(frame)
        contour, interior = gr.grain_evidence(frame.labels, signal, mode, cl.frame_contours(frame)[0], 1)
        full = gr.match_outline(contour, lib, 1.0, p["outline_noise_px"], p["outline_noise_floor"],
                                p["corner_radius_px"])
        for search in ("coarse", "quick", "exhaustive"):
            for inter in (None, interior):
                bounded = gr.match_outline(contour, lib, 1.0, p["outline_noise_px"], p["outline_noise_floor"],
                                           p["corner_radius_px"], within=float(p["tolerance"]))
                o = {**kw, "search": search}
                ref = gr.fit_alpha(contour, inter, **o, match=full)
                got = gr.fit_alpha(contour, inter, **o, match=bounded)
                _same_fit(got, ref, lib, p)


@pytest.mark.parametrize("contrast", ["bright", "dark"])
def test_frame_columns_equal_those_with_every_shape_compared(contrast, monkeypatch):
    # a rendered field with touching grains (split grains and completions; invented): classify-habit's
    # columns with the bounded outline match and with the full one put back, bit for bit
    frame = habit_chain_frame(12, contrast, seed=23)
    assert frame.n_grains >= 6
    now = cl.classify_frame(frame)
    full_match = gr.match_outline

    def every_shape(*args, within=None, faces=gr.VIEWS):
        return full_match(*args)

    monkeypatch.setattr(gr, "match_outline", every_shape)
    # and each grain's outline matched on its own (through match_outline), not with the others in step
    monkeypatch.setattr(cl, "outline_evidence_many", lambda contours, params, pixel_scale=1.0: [None] * len(contours))
    before = cl.classify_frame(frame)
    for k, v in now.items():
        a, b = np.asarray(v), np.asarray(before[k])
        assert (np.all(a == b) if a.dtype == object else np.array_equal(a, b, equal_nan=True)), k


@pytest.mark.parametrize("n", [180, 255])
def test_compared_rows_at_other_signature_lengths(n):
    # a length that is no power of two (the other scaling branch) and an odd one (no Nyquist term
    # in the half spectrum): the compared rows equal the full comparison, the least distance and
    # each class's least score are a compared shape's
    lib = gr.model_library(0.5, 4.0, 0.1, n)
    tab = lib.tables
    cls = np.full(tab.face.size, -1)
    cls[tab.model_shape] = np.where(lib.alphas <= 1.5, 0, np.where(lib.alphas < 3.0, 1, 2))
    rng = np.random.default_rng(9)
    sigs = [gr.radial_signature(_random_star(rng), n) for _ in range(4)]
    sigs += [np.roll(lib.signatures[2, j], 7) * (1 + 0.01 * rng.standard_normal(n)) for j in (3, 40, 90)]
    for sig in sigs:
        tau = 0.01
        s0, d0, v0 = gr.outline_candidates(sig, tab, 2)
        s1, d1, v1 = gr.outline_candidates_within(sig, lib, 2, tau, 4.0)
        c = v1[:, 0]
        assert np.array_equal(s0[c], s1[c]) and np.array_equal(d0[c], d1[c]) and np.array_equal(v0[c], v1[c])
        key = d0[:, 0] ** 2 + tau ** 2 * tab.prior
        assert np.all(key[~c] > key.min() + tau ** 2 * 4.0)
        for k in range(3):
            assert key[(cls == k) & c].min() == key[cls == k].min()
        assert d1[c, 0].min() == d0[:, 0].min()
