"""Faster forms of foreground kernels, each against the slower form it replaced (kept here as the reference).

The references are the project's earlier code, written with scipy.ndimage (label, find_objects) and
scikit-image's convex hull image where they say so; the shapes are invented.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import foreground
from grainhabit.plugins.segment.hull_fill import convex_hull_mask

from builders import faint_objects_reference

_EIGHT = np.ones((3, 3), bool)


def _diffuse_parts_reference(mask, outer=None):
    # the earlier form: one scipy.ndimage.label over the whole frame, every part visited in a loop
    lab, n = ndi.label(mask, structure=_EIGHT)
    out = mask.copy()
    areas = np.bincount(lab.ravel(), minlength=n + 1)
    for k, box in enumerate(ndi.find_objects(lab), start=1):
        if box is None:
            continue
        part = lab[box] == k
        if outer is not None and not (outer[box] & part).any():
            out[box][part] = False
        elif (areas[k] >= foreground.PLATE_MIN_AREA_PX
              and areas[k] >= foreground.PLATE_SOLIDITY * convex_hull_mask(part).sum()):
            out[box][part] = False
    return out


def _stains(seed, size=160):
    # invented masks: noise specks, convex blobs, rings and bands, some cut by the frame's edge
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size]
    mask = rng.random((size, size)) < rng.uniform(0.0, 0.08)
    for _ in range(int(rng.integers(0, 8))):
        cy, cx, r = rng.uniform(-10, size + 10), rng.uniform(-10, size + 10), rng.uniform(3, 25)
        d = np.hypot(yy - cy, xx - cx)
        mask |= (d < r) & (d > (r - rng.uniform(2, r)) if rng.random() < 0.5 else d < r)
    outer = rng.random((size, size)) < rng.uniform(0.0, 0.02)
    for _ in range(int(rng.integers(0, 4))):
        r0, c0 = rng.integers(0, size, 2)
        outer[r0:r0 + int(rng.integers(1, 40)), c0:c0 + int(rng.integers(1, 40))] = True
    return mask, outer


@pytest.mark.parametrize("seed", range(30))
def test_diffuse_parts_equals_the_frame_wide_loop(seed):
    # reference: the earlier frame-wide form above (scipy.ndimage.label / find_objects of the whole mask)
    mask, outer = _stains(seed)
    for o in (outer, None, np.zeros_like(outer), np.ones_like(outer)):
        np.testing.assert_array_equal(foreground.diffuse_parts(mask, o), _diffuse_parts_reference(mask, o))
    empty = np.zeros_like(mask)
    np.testing.assert_array_equal(foreground.diffuse_parts(empty, outer), empty)


@pytest.mark.parametrize("seed", range(20))
def test_faint_objects_equal_the_whole_frame_counts(seed):
    # reference: the earlier form above (areas counted over the whole label image)
    rng = np.random.default_rng(500 + seed)
    image = ndi.gaussian_filter(rng.normal(0, 1, (150, 170)), rng.uniform(1, 4))
    image /= image.std()
    for lo_t, hi_t in ((0.5, 1.5), (0.0, 1.0), (1.0, 2.5), (3.0, 9.0)):
        low, high = image > lo_t, image > hi_t
        for area in (0.0, 20.0, 200.0):
            np.testing.assert_array_equal(foreground.faint_objects(low, high, area),
                                          faint_objects_reference(low, high, area))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_sobel_magnitude_equals_scikit_image(dtype):
    # reference library: skimage.filters.sobel (default reflect borders), bit for bit
    from skimage.filters import sobel

    from grainhabit.plugins.segment.band_flood import sobel_magnitude

    rng = np.random.default_rng(7)
    for shape in ((1, 1), (1, 9), (2, 2), (3, 7), (17, 5), (64, 80), (130, 41)):
        for scale in (1.0, 1e-3, 300.0):
            image = (rng.normal(0, scale, shape) + rng.uniform(-1, 1)).astype(dtype)
            got, want = sobel_magnitude(image), sobel(image)
            assert got.dtype == want.dtype
            np.testing.assert_array_equal(got.view(np.uint8), want.view(np.uint8))
    window = np.ascontiguousarray(rng.random((50, 60)).astype(dtype)[5:40, 7:51])  # a window cut from a frame
    np.testing.assert_array_equal(sobel_magnitude(window), sobel(window))
    strided = rng.random((20, 30)).astype(dtype)[::2, 1::3]  # a strided view
    np.testing.assert_array_equal(sobel_magnitude(strided), sobel(strided))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_median3_equals_scipy_median_filter(dtype):
    # reference library: scipy.ndimage.median_filter(size=3), reflect borders (the default), bit for bit
    from grainhabit.plugins.segment.touching import median3

    rng = np.random.default_rng(11)
    for t in range(600):
        h, w = (int(x) for x in rng.integers(1, 40, 2))
        image = (rng.normal(0, 1, (h, w)) if t % 2 else rng.integers(0, 4, (h, w))).astype(dtype)  # ties too
        got, want = median3(image), ndi.median_filter(image, size=3)
        assert got.dtype == want.dtype and got.shape == want.shape
        np.testing.assert_array_equal(got.view(np.uint8), want.view(np.uint8))


def _check_frame_reference(arr, levels, p):
    # the earlier form: the shares of the frame as numpy means of the masks
    from grainhabit.plugins.segment import segment_grains as sg

    t = levels["otsu"]
    upper = arr > t
    mean_up = float(arr[upper].mean()) if upper.any() else t
    mean_low = float(arr[~upper].mean()) if not upper.all() else t
    if mean_up - mean_low < p["min_contrast"]:
        return "contrast"
    otsu_frac = float(np.mean(upper))
    if otsu_frac > sg.MAX_FOREGROUND:
        return f"covers {otsu_frac!r}"
    fg_frac = float(np.mean(arr > levels["noise"]))
    if fg_frac < sg.NOISE_ONLY_FRACTION:
        return f"noise {100 * fg_frac:.2f}"
    return ""


@pytest.mark.parametrize("seed", range(12))
def test_check_frame_shares_equal_numpy_means(seed):
    # reference: the earlier form above (numpy.mean of each mask); the share is the same correctly rounded
    # quotient of two integers, so the decisions and the numbers in the notes agree
    from grainhabit.plugins.segment import segment_grains as sg

    rng = np.random.default_rng(seed)
    arr = (rng.random((int(rng.integers(5, 300)), int(rng.integers(5, 300)))) ** rng.uniform(0.2, 8)).astype(np.float32)
    p = sg.STEP.resolve({})
    for otsu, noise in ((0.5, 0.2), (0.01, 0.999), (0.999, 0.99999), (0.3, 0.6)):
        levels = {"otsu": otsu, "noise": noise, "background": 0.0}
        try:
            got = sg.check_frame(arr, levels, p)
        except ValueError as exc:
            got = str(exc)
        want = _check_frame_reference(arr, levels, p)
        if want.startswith("covers"):
            assert f"{100 * float(want.split()[1]):.0f} %" in got
        elif want.startswith("noise"):
            assert f"only {want.split()[1]} %" in got
        elif want == "contrast":
            assert "contrast" in got
        else:
            assert got == "" or "most common level" in got


@pytest.mark.parametrize("kind, i", [("photo", 0), ("dark", 1)])
def test_label_grains_clusters_are_the_components_of_the_grains_kept(kind, i):
    # reference: np.where(labels > 0, component, 0) painted afresh from the grains kept (the earlier form painted
    # the clusters from scratch; now the components painted for the text-row test are reused and the grains
    # dropped as strokes since are taken out); hard-survey frames with letters and text (invented data)
    from grainhabit.frame import FrameData
    from grainhabit.plugins.preprocess import flatten_background as pp
    from grainhabit.plugins.segment import segment_grains as sg
    from grainhabit.plugins.segment.levels import frame_levels
    from grainhabit.plugins.synthetic import hard

    hf = hard.hard_field(kind, i, size=768, pixel_size_nm=5.0, n_grains=50, ecd_nm=300.0, ecd_gsd=1.2, noise=0.02,
                         gradient=0.3, blur_px=1.0, seed=0)
    frame = pp.grainhabit_preprocess(FrameData(source="t", sample="t", raw=hf.field.image, pixel_size_nm=5.0),
                                     pp.STEP.resolve({}))
    levels = frame_levels(frame.image, 5.0, faint_k=sg.STEP.resolve({})["faint_k"])
    labels, clusters, flags = sg.label_grains(frame.image, 5.0, levels, method="auto")
    assert flags["rejected"]["stroke"] > 0  # grains were dropped after the components were painted
    want = np.zeros(labels.shape, np.int32)
    for k, comp in enumerate(flags["cluster_of"], start=1):
        want[labels == k] = comp
    np.testing.assert_array_equal(clusters, want)
