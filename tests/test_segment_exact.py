"""Faster segmentation kernels (same labels), each against the slower reference it replaces.

References named beside each check: scikit-image's ``watershed`` for the windowed flood, scipy's
``find_objects`` for bounding boxes handed on instead of recomputed, numpy's ``median`` for the
background level from a histogram, and the step's own slower path where a result is passed on
instead of recomputed.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import band_flood


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("levels", [0, 4])
def test_watershed_window_equals_scikit_image_watershed(seed, levels):
    # reference library: skimage.segmentation.watershed (connectivity 1) on the same gradient, seeds and mask;
    # levels=4 quantises the relief to 4 values so that most pixels tie (the queue's tie order is tested)
    from skimage.segmentation import watershed

    rng = np.random.default_rng(seed)
    shape = (37 + seed, 53 - seed)
    relief = ndi.gaussian_filter(rng.random(shape), 1.5).astype(np.float32)
    if levels:
        relief = np.floor(relief / relief.max() * (levels - 0.01)).astype(np.float32)
    mask = ndi.gaussian_filter(rng.random(shape), 2.0) > 0.45
    mask[0, :] = True  # the mask reaches the window's edge
    seeds = np.zeros(shape, np.int32)
    pick = (rng.random(shape) > 0.96) & mask
    seeds[pick] = rng.integers(1, 4, size=int(pick.sum()))
    assert len(np.unique(seeds)) >= 3
    got = band_flood.watershed_window(relief, seeds, mask)
    ref = watershed(relief, seeds, mask=mask)
    assert got.dtype == ref.dtype
    np.testing.assert_array_equal(got, ref)
    assert (got > 0).sum() > (seeds > 0).sum()  # something was flooded


def test_watershed_window_takes_the_public_function_for_other_label_types():
    # reference library: skimage.segmentation.watershed; int64 seeds go the public way
    from skimage.segmentation import watershed

    rng = np.random.default_rng(7)
    relief = rng.random((20, 30))
    mask = np.ones((20, 30), bool)
    seeds = np.zeros((20, 30), np.int64)
    seeds[3, 4], seeds[15, 25] = 1, 2
    np.testing.assert_array_equal(band_flood.watershed_window(relief, seeds, mask), watershed(relief, seeds, mask=mask))


def _rendered(seed, size=512, grains=30):
    from grainhabit.plugins.bench import harness as bu
    from grainhabit.plugins.preprocess import flatten_background as pp

    raw = bu.render_frames(1, size, grains=grains, seed=seed)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    return raw, arr, bu.PIXEL_SIZE_NM


@pytest.mark.parametrize("seed", [0, 4])
def test_label_grains_boxes_equal_find_objects(seed):
    # reference library: scipy.ndimage.find_objects of the labels label_grains returns, and the clusters it
    # returns for the component of every label; a rendered field (invented data)
    from grainhabit.plugins.segment import segment_grains as sg
    from grainhabit.plugins.segment.levels import frame_levels

    _, arr, px = _rendered(seed)
    labels, clusters, flags = sg.label_grains(arr, px, frame_levels(arr), method="auto")
    assert labels.max() > 10
    assert flags["boxes"] == ndi.find_objects(labels)
    for k, c in enumerate(flags["cluster_of"], start=1):
        assert np.all(clusters[labels == k] == c)


def testunion_boxes_equal_find_objects_of_the_grouped_image():
    # reference library: scipy.ndimage.find_objects of the image where every object's pixels carry its group id
    from grainhabit.plugins.segment import segment_grains as sg

    rng = np.random.default_rng(3)
    objects = ndi.label(ndi.gaussian_filter(rng.random((120, 150)), 2.0) > 0.55)[0]
    n = int(objects.max())
    group = np.r_[0, rng.integers(1, 9, size=n)]
    take = np.r_[False, rng.random(n) > 0.3]
    grouped = np.where(take[objects], group[objects], 0)
    got = sg.union_boxes([None] + ndi.find_objects(objects), group, take)
    assert got == ndi.find_objects(grouped)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.float32])
def test_drawn_labels_with_shared_ink_and_boxes_equal_the_plain_call(dtype):
    # reference: drawn_labels computing its own ink levels, background median (numpy's median) and
    # scipy.ndimage.find_objects; a frame with a drawn bar, a hollow drawn ring and grey blobs (invented data)
    from grainhabit.plugins.segment import annotations

    rng = np.random.default_rng(5)
    raw = (rng.normal(90, 6, (200, 260))).clip(1, 250)
    raw[20:26, 30:150] = 255  # a bar in white ink
    yy, xx = np.mgrid[:200, :260]
    ring = np.abs(np.hypot(yy - 120, xx - 60) - 15) < 3
    raw[ring] = 0  # a ring in black ink
    blobs = np.hypot((yy - 130) % 50 - 25, (xx - 170) % 45 - 22) < 9
    raw[blobs] += 60
    raw = raw.astype(dtype)
    labels = ndi.label(ring | blobs | (raw >= 250))[0]
    plain = annotations.drawn_labels(labels, raw)
    shared = annotations.frame_ink(raw)
    fast = annotations.drawn_labels(labels, raw, boxes=ndi.find_objects(labels), ink=shared)
    assert plain.size >= 2
    np.testing.assert_array_equal(fast, plain)
    for rim in (1, annotations.RIM_PX):
        np.testing.assert_array_equal(annotations.drawn_labels(labels, raw, rim=rim, ink=shared),
                                      annotations.drawn_labels(labels, raw, rim=rim))


@pytest.mark.parametrize("n", [1, 2, 7, 1000, 1001])
def test_median_of_counts_equals_numpy_median(n):
    # reference library: numpy.median
    from grainhabit.plugins.segment import annotations

    v = np.random.default_rng(n).integers(0, 40, size=n)
    assert annotations.median_of_counts(np.bincount(v), v.size) == float(np.median(v))
    # counts with trailing empty levels (a frame's counts less an object's)
    assert annotations.median_of_counts(np.r_[np.bincount(v), [0, 0, 0]], v.size) == float(np.median(v))


@pytest.mark.parametrize("b", [2, 3, 4, 8])
def test_block_any_equals_numpy_reduction(b):
    # reference library: numpy's any over the blocks of a reshaped mask
    from grainhabit.plugins.segment import gaps

    rng = np.random.default_rng(b)
    mask = rng.random((16 * b, 24 * b)) > 0.995
    mask[-1, -1] = True
    ref = mask.reshape(16, b, 24, b).any(axis=(1, 3))
    np.testing.assert_array_equal(gaps.block_any(mask, b), ref)
    np.testing.assert_array_equal(gaps.block_any(np.asfortranarray(mask), b), ref)


def test_paint_boxes_equals_a_lookup_over_the_frame():
    # reference library: numpy.where over the whole frame, boxes from scipy.ndimage.find_objects
    from grainhabit.plugins.segment import segment_grains as sg

    rng = np.random.default_rng(11)
    labels = ndi.label(ndi.gaussian_filter(rng.random((90, 130)), 2.0) > 0.55)[0]
    n = int(labels.max())
    value = rng.integers(1, 50, size=n + 1)
    take = np.r_[False, rng.random(n) > 0.4]
    got = sg.paint_boxes(labels, [None] + ndi.find_objects(labels), value, take)
    assert got.dtype == np.int32
    np.testing.assert_array_equal(got, np.where(take[labels], value[labels], 0))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_convex_hull_mask_of_shapes_with_empty_rows_equals_scikit_image(seed):
    # reference library: skimage.morphology.convex_hull_image; shapes in pieces (empty rows between them),
    # single pixels, one-pixel rows and columns, where the kept points of each line are most often the same
    from skimage.morphology import convex_hull_image

    from grainhabit.plugins.segment import hull_fill

    rng = np.random.default_rng(seed)
    shapes = [rng.random((rng.integers(1, 30), rng.integers(1, 30))) > rng.uniform(0.6, 0.97) for _ in range(80)]
    shapes += [np.eye(7, dtype=bool), np.ones((1, 9), bool), np.ones((9, 1), bool), np.ones((1, 1), bool)]
    for m in shapes:
        if not m.any():
            continue
        np.testing.assert_array_equal(hull_fill.convex_hull_mask(m), convex_hull_image(m))


def _rings_and_islands(seed):
    """Random blobs, rings with islands, a ring in a ring's hole with an island, rings cut by the frame's edge."""
    rng = np.random.default_rng(seed)
    shape = (160, 190)
    mask = ndi.gaussian_filter(rng.random(shape), 1.5) > 0.56
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    for cy, cx, r in ((40, 50, 22), (110, 130, 30), (0, 100, 12), (150, 10, 14)):
        d = np.hypot(yy - cy, xx - cx)
        mask[d < r + 3] = False
        mask[(d >= r) & (d < r + 2)] = True  # a ring
    d = np.hypot(yy - 110, xx - 130)
    mask[(d >= 15) & (d < 17)] = True  # a ring in the big ring's hole
    mask[(d < 4)] = True  # an island in it
    mask[(d >= 9) & (d < 10.5)] = True  # and a thin ring between
    mask[44:47, 48:52] = True  # an island in the first ring
    mask[80, 100:103] = True
    mask[81, 103] = True  # a diagonal step
    return mask


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_fill_label_equals_filling_then_labelling(seed):
    # reference library: scipy.ndimage.binary_fill_holes, then scipy.ndimage.label (8-connected) and
    # scipy.ndimage.find_objects of the filled mask
    from grainhabit.plugins.segment import foreground as seg_fg

    mask = _rings_and_islands(seed)
    filled, comp, n, boxes = seg_fg.fill_label(mask)
    want = ndi.binary_fill_holes(mask)
    want_comp, want_n = ndi.label(want, structure=np.ones((3, 3), bool))
    assert (want & ~mask).sum() > 100  # holes were filled
    np.testing.assert_array_equal(filled, want)
    assert comp.dtype == want_comp.dtype and n == want_n
    np.testing.assert_array_equal(comp, want_comp)
    assert boxes == ndi.find_objects(want_comp)
    # a mask without holes, and an empty one
    for m in (np.eye(20, dtype=bool), np.zeros((8, 9), bool)):
        f, c, k, b = seg_fg.fill_label(m)
        np.testing.assert_array_equal(f, ndi.binary_fill_holes(m))
        np.testing.assert_array_equal(c, ndi.label(m, structure=np.ones((3, 3), bool))[0])
        assert b == ndi.find_objects(c)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_level_counts_equal_numpy_bincount(dtype):
    # reference library: numpy.bincount over the whole array at once
    from grainhabit.plugins.segment import annotations

    v = np.random.default_rng(2).integers(0, np.iinfo(dtype).max, size=(300, 701)).astype(dtype)
    got = annotations.level_counts(v, chunk=1000)
    want = np.bincount(v.ravel())
    assert got.dtype == want.dtype
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("seed", [0, 1, 5])
def test_euler_number8_equals_scikit_image(seed):
    # reference library: skimage.measure.euler_number (connectivity 2: 8-connected objects, 4-connected holes),
    # and components less holes counted with scipy.ndimage.label
    from skimage.measure import euler_number

    from grainhabit.plugins.segment import foreground as seg_fg

    for mask in (_rings_and_islands(seed), np.random.default_rng(seed).random((60, 70)) > 0.5,
                 np.zeros((5, 6), bool), np.ones((5, 6), bool)):
        got = seg_fg.euler_number8(mask)
        assert got == euler_number(mask, connectivity=2)
        back, nb = ndi.label(~np.pad(mask, 1))
        n_holes = nb - 1 if nb else 0  # the padded frame's outer background is one component
        assert got == ndi.label(mask, structure=np.ones((3, 3), bool))[1] - n_holes
