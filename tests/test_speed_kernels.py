"""Faster kernels of preprocessing and measurement, each against the slower reference it replaces.

The references are kept here as they were before the speed work (flatten-background 1.1 called
step by step on float64 frames, with scikit-image's ``downscale_local_mean`` and ``resize`` and
scipy's ``gaussian_filter``), or are the general-purpose libraries themselves (scipy.ndimage,
scikit-image). Frames are rendered by the project (invented data).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.bench import harness as bu
from grainhabit.plugins.common.image_stats import (
    CLIP_SIGMAS, LEVEL_SAMPLES, regular_subsample,
)
from grainhabit.plugins.preprocess import flatten_background as pp

from builders import draw_faceted_frame, half_height_reference

#: Largest difference allowed between the fast step's output and the reference's, in output units
#: (background 0, grains 1): float32 arithmetic from the variance-stabilised image on (measured:
#: at most 1e-5 on 2048 px frames).
FLATTEN_TOLERANCE = 2e-4


# --- the reference: flatten-background as it was, step by step in float64 ------------------------

def reference_denoise(arr, sigma_px):
    a, b = pp.noise_model(arr)
    use_vst = a > 1e-9 and a > 1e-3 * b / max(float(np.mean(arr)), 1e-6)
    work = pp.anscombe(arr, a, b) if use_vst else arr
    out = ndi.gaussian_filter(work, sigma_px, mode="nearest") if sigma_px > 0 else work
    return pp.inverse_anscombe(out, a, b) if use_vst else out


def reference_background(arr, px, background_nm, grain_sign):
    from skimage.transform import downscale_local_mean, resize

    scale_px = background_nm / px
    f = int(max(1, min(round(scale_px / 8.0), min(arr.shape) // 64))) if scale_px > 0 else \
        max(1, min(arr.shape) // 128)
    small = downscale_local_mean(arr, (f, f))
    small = small[: arr.shape[0] // f or 1, : arr.shape[1] // f or 1]
    # the surface fit and its decisions are not a kernel: the step's own fit_surface
    surface = pp.fit_surface(small, scale_px / f if scale_px > 0 else 0.0, grain_sign)
    bg = resize(surface, arr.shape, order=1, mode="edge", anti_aliasing=False) if f > 1 else surface
    r_sub = regular_subsample(arr, LEVEL_SAMPLES) - regular_subsample(bg, LEVEL_SAMPLES)
    m, s_full = pp.background_peak(r_sub, grain_sign)
    return bg + m, s_full


def reference_flatten(image, px, background_nm=4000.0, denoise_method="gaussian", smooth_px=1.0, polarity="auto"):
    x = pp.normalise(image)
    x = reference_denoise(x, smooth_px if denoise_method == "gaussian" else 0.0)
    bg, s = reference_background(x, px, background_nm, 0)
    if polarity == "auto":
        # the edge-curvature vote of grainhabit.plugins.preprocess.polarity, on the whole residual
        from grainhabit.plugins.preprocess.polarity import detect_polarity as convex_polarity

        pol, conf = convex_polarity(x - bg)
    else:
        pol, conf = polarity, 1.0
    sign = 1 if pol == "bright" else -1
    bg, s = reference_background(x, px, background_nm, sign)
    r = sign * (x - bg)
    fg = r[r > CLIP_SIGMAS * s]
    level = max(float(np.percentile(fg, 95)) if fg.size >= 20 else 0.0, pp.NOISE_FLOOR_SIGMAS * s)
    return np.clip(r / level, pp.LOW_CLIP, 1.0).astype(np.float32), pol, conf


def _rendered(size, seed, contrast):
    from grainhabit.plugins.synthetic.render import HABITS, make_field, to_uint16

    grains = max(3, int(bu.grains_for(size)))
    field = make_field(grains, (size, size), bu.PIXEL_SIZE_NM, {h: 1.0 for h in HABITS}, bu.ECD_NM,
                       contrast=contrast, seed=seed)
    return to_uint16(field.image).astype(np.float32)


def _assert_flatten_close(raw, px, **kw):
    new, pol, conf = pp.flatten(raw, px, **kw)
    ref, pol_ref, conf_ref = reference_flatten(raw, px, **kw)
    assert new.dtype == np.float32 and new.shape == ref.shape
    assert pol == pol_ref
    assert conf == pytest.approx(conf_ref, abs=1e-3)
    assert float(np.abs(new - ref).max()) <= FLATTEN_TOLERANCE


@pytest.mark.parametrize("size,seed,contrast", [(768, 0, "bright"), (512, 3, "dark"), (1100, 7, "bright")])
def test_flatten_equals_stepwise_reference_on_rendered_fields(size, seed, contrast):
    # reference: the step as it was (scikit-image resampling, scipy's Gaussian, float64 throughout)
    _assert_flatten_close(_rendered(size, seed, contrast), bu.PIXEL_SIZE_NM)


@pytest.mark.parametrize("kw", [{"polarity": "dark"}, {"denoise_method": "none"}, {"background_nm": 0.0},
                                {"background_nm": 500.0, "smooth_px": 2.0}])
def test_flatten_equals_reference_with_other_settings(kw):
    raw, _ = draw_faceted_frame((260, 300), grains=((80, 80, 40, 6, 0.0), (180, 200, 45, 3, 5.0)),
                                contrast="bright", seed=21)
    _assert_flatten_close(raw, 5.0, **kw)


def test_flatten_small_frame_without_block_averaging():
    # 100 px frames give blocks of 1 px (no resampling at all)
    raw, _ = draw_faceted_frame((100, 120), grains=((50, 60, 20, 4, 0.0),), contrast="dark", seed=22)
    _assert_flatten_close(raw, 5.0)


@pytest.mark.parametrize("shape,sigma", [((300, 257), 1.0), ((64, 90), 2.5), ((5, 40), 1.0), ((40, 3), 1.5)])
@pytest.mark.parametrize("dtype,tol", [(np.float64, 1e-12), (np.float32, 2e-6)])
def test_gaussian_nearest_equals_scipy(shape, sigma, dtype, tol):
    # reference library: scipy.ndimage.gaussian_filter with mode="nearest" (same kernel, same edges)
    img = np.random.default_rng(4).uniform(0, 1, shape).astype(dtype)
    got = pp.gaussian_nearest(img, sigma)
    ref = ndi.gaussian_filter(img.astype(np.float64), sigma, mode="nearest")
    assert got.dtype == dtype
    np.testing.assert_allclose(got, ref, atol=tol, rtol=0)


@pytest.mark.parametrize("small_shape,shape", [((64, 64), (2048, 2048)), ((5, 7), (37, 90)), ((1, 3), (10, 11)),
                                               ((8, 8), (8, 8)), ((12, 9), (100, 71))])
def test_upsample_bilinear_equals_skimage_resize(small_shape, shape):
    # reference library: skimage.transform.resize(order=1, mode="edge", anti_aliasing=False)
    from skimage.transform import resize

    small = np.random.default_rng(5).normal(size=small_shape)
    ref = resize(small, shape, order=1, mode="edge", anti_aliasing=False)
    full = pp.upsample_bilinear(small, shape)
    np.testing.assert_allclose(full, ref, atol=1e-12, rtol=0)
    rows, cols = np.arange(0, shape[0], 3), np.arange(1, shape[1], 4)
    np.testing.assert_array_equal(pp.upsample_bilinear(small, shape, rows, cols), full[np.ix_(rows, cols)])


def test_upsample_bilinear_in_float32_equals_float64_and_its_own_subsets():
    # reference library: skimage.transform.resize(order=1, mode="edge", anti_aliasing=False), to float32 rounding
    from skimage.transform import resize

    small = np.random.default_rng(6).normal(size=(12, 9))
    shape = (100, 71)
    full = pp.upsample_bilinear(small, shape, dtype=np.float32)
    assert full.dtype == np.float32
    np.testing.assert_allclose(full, resize(small, shape, order=1, mode="edge", anti_aliasing=False),
                               atol=1e-6, rtol=0)
    # a window's values are the whole frame's there, to the bit (a tile gets the frame's background)
    rows, cols = np.arange(17, 60), np.arange(3, 50)
    np.testing.assert_array_equal(pp.upsample_bilinear(small, shape, rows, cols, dtype=np.float32),
                                  full[np.ix_(rows, cols)])


@pytest.mark.parametrize("shape,f", [((256, 320), 32), ((300, 257), 16), ((64, 90), 1), ((100, 71), 7)])
def test_block_sums_equal_skimage_block_means(shape, f):
    # reference library: skimage.transform.downscale_local_mean (the full blocks), times the block area
    from skimage.transform import downscale_local_mean

    img = np.random.default_rng(7).uniform(0, 1, shape).astype(np.float32)
    nb = (shape[0] // f, shape[1] // f)
    got = pp.block_sums(pp.block_sums(img, 0, f).T, 0, f).T[: nb[0], : nb[1]]
    ref = downscale_local_mean(img.astype(np.float64), (f, f))[: nb[0], : nb[1]] * (f * f)
    assert got.dtype == np.float64
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-9)


def test_block_sums_of_a_cut_frame_add_up_and_whole_blocks_do_not_depend_on_the_cut():
    img = np.random.default_rng(8).uniform(0, 1, (200, 150)).astype(np.float32)
    f = 16
    whole = pp.block_sums(pp.block_sums(img, 0, f).T, 0, f).T
    pieces = np.zeros_like(whole)
    # cores on the block grid (as the tiled chain cuts) and one cut through a block column (72 px), windows
    # grown by a halo
    for r0, r1, c0, c1 in ((0, 64, 0, 150), (64, 200, 0, 72), (64, 200, 72, 150)):
        win = img[max(r0 - 5, 0):r1 + 5, max(c0 - 5, 0):c1 + 5]
        core = win[r0 - max(r0 - 5, 0):, c0 - max(c0 - 5, 0):][: r1 - r0, : c1 - c0]
        part = pp.block_sums(pp.block_sums(core, r0, f).T, c0, f).T
        pieces[r0 // f:r0 // f + part.shape[0], c0 // f:c0 // f + part.shape[1]] += part
    np.testing.assert_allclose(pieces, whole, rtol=1e-12)
    # blocks held whole by one core (rows 0-63, every block column) have the same sum to the bit
    np.testing.assert_array_equal(pieces[:4], whole[:4])


def test_estimate_background_equals_reference():
    raw, _ = draw_faceted_frame((260, 300), grains=((80, 80, 40, 6, 0.0),), contrast="bright", seed=23)
    x = pp.normalise(raw)
    for sign in (0, 1, -1):
        bg, is_bg, s = pp.estimate_background(x, 5.0, 400.0, grain_sign=sign)
        bg_ref, s_ref = reference_background(x, 5.0, 400.0, sign)
        np.testing.assert_allclose(bg, bg_ref, atol=1e-12, rtol=0)
        assert s == pytest.approx(s_ref, rel=1e-12)
        assert is_bg.dtype == bool and is_bg.shape == x.shape


def test_flatten_rejects_bad_input_with_a_clear_message():
    with pytest.raises(ValueError, match="NaN or infinite"):
        pp.flatten(np.full((20, 20), np.nan, np.float32), 5.0)
    with pytest.raises(ValueError, match="2-D"):
        pp.flatten(np.zeros((20, 20, 3)), 5.0)
    out, _, _ = pp.flatten(np.full((20, 20), 7.0, np.float32), 5.0)  # a flat frame: all background
    assert out.shape == (20, 20) and np.all(out == 0)
    dots = np.full((300, 300), 7.0, np.float32)
    dots[::50, ::50] = 100.0  # 36 bright pixels: the 0.1 / 99.9 percentiles of the frame are still equal
    np.testing.assert_array_equal(pp.flatten(dots, 5.0)[0], reference_flatten(dots, 5.0)[0])


# --- drawn marks (readers.overlays): the reference is the whole-frame version it replaces ---------

def reference_annotation_mask(image):
    from grainhabit.plugins.readers import overlays as ov

    lo, hi = image.min(), image.max()
    if lo == hi:
        return None
    marks = np.zeros(image.shape, bool)
    for value in (lo, hi):
        candidate = image == value
        if candidate.mean() > 0.2:
            continue
        labels, n = ndi.label(candidate, structure=np.ones((3, 3)))
        if n == 0:
            continue
        sizes = np.bincount(labels.ravel(), minlength=n + 1)
        sizes[0] = 0
        keep = np.zeros(n + 1, bool)
        big = np.flatnonzero(sizes >= 12)
        if big.size == 0:
            continue
        ring = ndi.grey_dilation(labels, size=(3, 3)) * ~candidate
        around = np.asarray(ndi.median(image, ring, index=big), float)
        contrast = np.abs(around - float(value)) / (float(hi) - float(lo))
        slices = ndi.find_objects(labels)
        for lab, c in zip(big, contrast):
            if c < ov.MIN_MARK_CONTRAST:
                continue
            sl = slices[lab - 1]
            h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
            own = labels[sl] == lab
            thick = ndi.distance_transform_edt(np.pad(own, 1)).max()
            long, short = max(h, w), min(h, w)
            hole = int(ndi.binary_fill_holes(own).sum()) - int(sizes[lab])
            stroke = thick <= 2.0 and short <= ov.MAX_TEXT_HEIGHT and hole <= 3 * sizes[lab]
            bar = short <= 12 and long >= 5 * short and long >= 20 and sizes[lab] >= 0.6 * h * w
            keep[lab] = stroke or bar
        marks |= keep[labels]
    if not marks.any():
        return None
    return ndi.binary_dilation(marks, iterations=2)


def _marked_frames():
    from grainhabit.plugins.synthetic.render import HABITS, make_field, to_uint16

    rng = np.random.default_rng(8)
    frames = []
    field = to_uint16(make_field(30, (600, 600), bu.PIXEL_SIZE_NM, {h: 1.0 for h in HABITS}, bu.ECD_NM,
                                 seed=8).image)
    frames.append(field.copy())  # saturated grain cores, no marks
    img = field.copy()
    img[560:566, 20:200] = 65535  # a scale bar near the bottom edge
    for c0 in range(300, 420, 12):  # "text" strokes touching the bottom edge
        img[585:600, c0] = 65535
        img[592, c0:c0 + 7] = 65535
    img[0:3, 0:40] = 0  # a dark frame line in the corner
    frames.append(img)
    noisy_img = rng.normal(120, 25, (300, 400)).clip(0, 255).astype(np.uint8)  # scattered clipped specks
    noisy_img[100:104, 50:150] = 255
    frames.append(noisy_img)
    return frames


def test_annotation_mask_equals_whole_frame_reference():
    from grainhabit.plugins.readers import overlays as ov

    for img in _marked_frames():
        got, ref = ov.annotation_mask(img), reference_annotation_mask(img)
        assert (got is None) == (ref is None)
        if ref is not None:
            np.testing.assert_array_equal(got, ref)
    assert ov.annotation_mask(_marked_frames()[1]) is not None


def test_ring_medians_equal_scipy_labelled_median():
    # reference library: scipy.ndimage.median over labels (for every label that has pixels)
    from grainhabit.plugins.readers import overlays as ov

    rng = np.random.default_rng(9)
    img = rng.integers(0, 1000, (120, 130)).astype(np.uint16)
    ring = np.where(rng.uniform(size=img.shape) < 0.05, rng.integers(1, 9, img.shape), 0)
    index = np.arange(1, 9)
    np.testing.assert_array_equal(ov.ring_medians(img, ring, index),
                                  np.asarray(ndi.median(img, ring, index=index), float))
    assert np.isnan(ov.ring_medians(img, ring, np.array([20]))).all()


# --- corner polygons (measure.outline): the clean-up without its look-ups is the reference --------

def _reference_cleaner():
    from grainhabit.plugins.measure import outline

    class ReferenceCleaner(outline._Cleaner):
        """The clean-up as it was: every corner, turn and edge computed again at every step."""

        def polygon(self, idx, refine, reach):
            import math

            k = len(idx)
            if not refine:
                return [tuple(self.pts[i]) for i in idx], None
            lines = [self.line(idx[j], idx[(j + 1) % k]) for j in range(k)]
            poly = []
            for j in range(k):
                vx, vy = self.pts[idx[j]]
                p = self.meet(lines[j - 1], lines[j])
                if p is not None and math.hypot(p[0] - vx, p[1] - vy) <= reach:
                    poly.append(p)
                else:
                    poly.append((vx, vy))
            return poly, lines

        def turns_and_edges(self, idx, poly):
            return outline._turns_and_edges(poly)

    return ReferenceCleaner


@pytest.mark.parametrize("seed", [1, 6])
def test_corner_polygons_equal_the_uncached_clean_up(monkeypatch, seed):
    from grainhabit.plugins.measure import measure_grains, outline
    from grainhabit.plugins.synthetic.render import HABITS, make_field

    field = make_field(40, (640, 640), bu.PIXEL_SIZE_NM, {h: 1.0 for h in HABITS}, bu.ECD_NM, seed=seed)
    cols, contours = measure_grains.measure_labels(field.labels, None, 1.0)
    sizes = cols["ecd_nm"]
    keep = np.isfinite(sizes) & (sizes > 0)
    contours, sizes = [c for c, k in zip(contours, keep) if k], sizes[keep]
    assert len(contours) >= 30
    for refine in (True, False):
        fast = outline.fit_polygons(contours, sizes, refine=refine)
        with monkeypatch.context() as m:
            m.setattr(outline, "_Cleaner", _reference_cleaner())
            ref = outline.fit_polygons(contours, sizes, refine=refine)
        for a, b in zip(fast, ref):
            np.testing.assert_array_equal(a, b)


def test_half_height_peaks_equal_scipys_labelled_maximum():
    # reference: scipy.ndimage.maximum over each 8-connected component of I > T_n (what half_height_mask
    # used before); the mask must be identical
    from grainhabit.plugins.segment import foreground as seg_fg

    rng = np.random.default_rng(4)
    image = (ndi.gaussian_filter(rng.normal(size=(300, 300)), 3) * 12).astype(np.float32)
    noise_level, edge_level = 0.3, 0.5
    _, n = ndi.label(image > noise_level, structure=np.ones((3, 3), bool))
    assert n > 20
    expected = half_height_reference(image, noise_level, edge_level)
    np.testing.assert_array_equal(seg_fg.half_height_mask(image, noise_level, edge_level), expected)
