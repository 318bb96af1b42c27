"""Faster robust image statistics (same values), each against the slower reference it replaces.

References named beside each check: numpy's ``median`` (the float32 median by counting bits).
"""

from __future__ import annotations

import numpy as np
import pytest

from grainhabit.plugins.common import image_stats as st


def _float32_samples(seed):
    # invented samples: the shapes a frame's pixels take (noise about a level, integer grey levels kept as
    # float32, one-sided, constant, heavy-tailed, mixed signs and zeros, infinities)
    rng = np.random.default_rng(seed)
    n = (1 << 16) + int(rng.integers(0, 5000))
    return [
        rng.normal(0.0, 1.0, n),
        rng.normal(7888.0, 300.0, n).round(),
        -np.abs(rng.normal(5.0, 1.0, n)),
        np.full(n, 3.5),
        rng.integers(0, 65535, n).astype(float),
        np.r_[np.zeros(n // 2), -np.zeros(n - n // 2)],
        rng.normal(1e30, 1e29, n),
        rng.standard_cauchy(n),
        np.r_[np.full(n // 2, -np.inf), rng.normal(0, 1, 3), np.full(n // 2, np.inf)],
        np.r_[rng.normal(-1e-30, 1e-31, n // 2), rng.normal(1e-30, 1e-31, n - n // 2)],
        np.r_[rng.normal(-2.0, 0.1, n // 2), rng.normal(2.0, 0.1, n // 2 + 1)],
    ]


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("extra", [0, 1])
def test_float32_median_equals_numpy_median(seed, extra):
    # reference library: numpy.median, bit for bit, even and odd counts
    for v in _float32_samples(seed):
        v = np.r_[v, v[:extra]].astype(np.float32)
        np.random.default_rng(seed).shuffle(v)
        ref = float(np.median(v))
        got = st.float32_median(v)
        assert got == ref, (got, ref)
        assert st.median(v) == ref
        if ref != 0.0:
            assert np.float64(got).tobytes() == np.float64(ref).tobytes()


@pytest.mark.parametrize("n", [1, 2, 3, 10, 1001])
def test_float32_median_of_small_samples_equals_numpy_median(n):
    # reference library: numpy.median (median() leaves samples this small to numpy; the kernel itself is exact too)
    v = np.random.default_rng(n).normal(3.0, 2.0, n).astype(np.float32)
    assert st.float32_median(v) == float(np.median(v))
    assert st.median(v) == float(np.median(v))


def test_median_of_float32_with_nan_is_numpy_median():
    # reference library: numpy.median (NaN in the sample: numpy's answer, NaN)
    v = np.random.default_rng(4).normal(0, 1, 1 << 17).astype(np.float32)
    v[100] = np.nan
    with np.errstate(invalid="ignore"):
        assert np.isnan(st.median(v)) and np.isnan(np.median(v))


def test_median_of_a_frame_sized_float32_sample_equals_numpy():
    # reference library: numpy.median on a rendered frame's pixels, as drawn_labels asks for them (invented data)
    from grainhabit.plugins.bench import harness as bu

    raw = bu.render_frames(1, 512, grains=20, seed=3)[0].astype(np.float32)
    for sample in (raw.ravel(), raw[raw < np.percentile(raw, 60)], raw[:, :-1].ravel()):
        assert st.median(sample) == float(np.median(sample))


# --- the robust levels as they were before they shared their temporaries (kept as the references) ---

def _clipped_sigma_before(r, centre):
    dev = np.abs(r - centre)
    s = 1.4826 * float(np.median(dev))
    for _ in range(8):
        sel = dev < st.CLIP_SIGMAS * s
        if sel.sum() < 10:
            break
        s_new = float(np.sqrt(np.mean(dev[sel] ** 2))) / 0.9866
        if abs(s_new - s) <= 1e-3 * s:
            s = s_new
            break
        s = s_new
    return max(s, 1e-9)


def _coarse_mode(r):
    from scipy import ndimage as ndi

    lo, hi = np.percentile(r, [0.5, 99.5])
    if hi <= lo:
        return float(np.median(r)), 0.0
    bins = int(np.clip(np.sqrt(r.size), 16, 256))
    hist, edges = np.histogram(r, bins=bins, range=(lo, hi))
    hist = ndi.gaussian_filter1d(hist.astype(float), 2.0)
    k = int(np.argmax(hist))
    return float(0.5 * (edges[k] + edges[k + 1])), float(edges[1] - edges[0])


def _histogram_mode_before(r):
    mode, width = _coarse_mode(r)
    spread = 1.4826 * float(np.median(np.abs(r - mode)))
    if width > 0.25 * spread > 0:
        near = r[np.abs(r - mode) <= 4 * spread]
        if near.size >= 64:
            mode, _ = _coarse_mode(near)
    return mode


def _background_peak_before(values, grain_sign, valid=None, half_width=True):
    from grainhabit.plugins.preprocess import background_peak as bp

    arr = np.asarray(values, float)
    ok = np.ones(arr.shape, bool) if valid is None else np.asarray(valid, bool)
    v = arr[ok]
    m = _histogram_mode_before(v)
    if grain_sign == 0:
        return m, _clipped_sigma_before(v, m)
    signed = grain_sign * arr
    for _ in range(2):
        s = signed[ok]
        ms = grain_sign * m
        t = bp.otsu_of(s)
        if ms <= t:
            break
        low = s[s <= t]
        if low.size < max(bp.MIN_BACKGROUND_FRACTION * s.size, 64):
            break
        m_low = _histogram_mode_before(low)
        s_low = bp.peak_sigma(low, m_low, -1)
        if ms - m_low <= bp.MIN_SEPARATION * s_low:
            break
        if bp.spread_out(signed, ok, m_low, s_low):
            ms = m_low
            break
        ok = ok & ~(np.abs(signed - m_low) <= 2.0 * s_low)
    s = signed[ok]
    free = bp.peak_sigma(s, ms, -1) if half_width else bp.one_sided_sigma(s, ms, -1)
    return grain_sign * ms, min(_clipped_sigma_before(s, ms), free)


def _level_fields(seed):
    # invented fields: sparse bright grains on noise, grains covering most of the frame, a flat data bar along
    # one edge (a distinct low peak in a strip), dark grains, and a float32 sample
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:160, :200]
    sparse = rng.normal(0.1, 0.02, yy.shape) + 0.8 * (np.hypot((yy % 40) - 20, (xx % 50) - 25) < 8)
    packed = rng.normal(0.8, 0.03, yy.shape) - 0.7 * ((yy % 32 < 3) | (xx % 40 < 3))
    barred = packed.copy()
    barred[-12:] = rng.normal(-0.5, 0.01, (12, 200))
    return [sparse, packed, barred, -sparse, sparse.astype(np.float32)]


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_background_peak_and_its_helpers_equal_the_form_before(seed):
    # reference: the functions as they were (each temporary computed where it was used), bit for bit
    from grainhabit.plugins.preprocess import background_peak as bp

    for field in _level_fields(seed):
        flat = np.asarray(field, float).ravel()
        assert st.clipped_sigma(flat, 0.1) == _clipped_sigma_before(flat, 0.1)
        assert st.histogram_mode(flat) == _histogram_mode_before(flat)
        inner = (field > field.min()) & (field < field.max())
        for sign in (1, -1, 0):
            for valid in (None, inner):
                for half in (True, False):
                    assert bp.background_peak(field, sign, valid, half) == _background_peak_before(field, sign, valid, half)


@pytest.mark.parametrize("polarity", ["auto", "dark"])
def test_flatten_with_float32_level_grids_equals_float64_grids(polarity, monkeypatch):
    # reference: the step as it was, its grids of denoised values in float64; a rendered frame (invented data)
    from grainhabit.plugins.bench import harness as bu
    from grainhabit.plugins.preprocess import flatten_background as fb

    raw = bu.render_frames(1, 640, grains=30, seed=5)[0].astype(np.float32)
    if polarity == "dark":
        raw = raw.max() - raw
    got = fb.flatten(raw, bu.PIXEL_SIZE_NM, polarity=polarity)
    monkeypatch.setattr(fb, "GRID_DTYPE", np.float64)
    want = fb.flatten(raw, bu.PIXEL_SIZE_NM, polarity=polarity)
    np.testing.assert_array_equal(got[0], want[0])
    assert got[1:] == want[1:]
