"""Segmentation and preprocessing kernels of the ninth speed round (issue 19), each against the form it replaces.

Every check compares a kernel with the general-purpose library call (numpy, scipy.ndimage) or the
code it stands in for, bit for bit, on invented masks and images (random blobs, noise fields, values
with both signs of zero).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.preprocess import polarity
from grainhabit.plugins.segment import packed, runs

from builders import faint_objects_reference

_EIGHT = np.ones((3, 3), bool)


def _fields(seed, n=12, side=(8, 160)):
    """Invented masks: thresholded smoothed noise at several scales, sparse pixels, full and empty frames."""
    rng = np.random.default_rng(seed)
    out = [np.zeros((5, 7), bool), np.ones((6, 4), bool), np.eye(9, dtype=bool)]
    for _ in range(n):
        shape = tuple(int(v) for v in rng.integers(side[0], side[1], 2))
        if rng.random() < 0.8:
            m = ndi.gaussian_filter(rng.random(shape), rng.uniform(0.6, 5.0)) > rng.uniform(0.45, 0.56)
        else:
            m = rng.random(shape) > rng.uniform(0.5, 0.97)
        out.append(m)
    return out


@pytest.mark.parametrize("shape", [(2, 2), (6, 10), (7, 11), (512, 512), (1000, 1536), (2048, 2048)])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_block_mean_pairs_equals_numpy_mean_of_blocks(shape, dtype):
    # reference: numpy's float32 mean over the two block axes (the form polarity.block_mean took before),
    # on values of every magnitude and with zeros of both signs (numpy's sum never gives -0)
    rng = np.random.default_rng(shape[0] * 7 + shape[1])
    x = rng.standard_normal(shape) * 10.0 ** rng.uniform(-6, 6, shape)
    x[rng.random(shape) < 0.1] = 0.0
    x[rng.random(shape) < 0.1] = -0.0
    x = x.astype(dtype)
    rows, cols = (shape[0] // 2) * 2, (shape[1] // 2) * 2
    want = np.asarray(x[:rows, :cols], np.float32).reshape(rows // 2, 2, cols // 2, 2).mean(axis=(1, 3))
    got = polarity.block_mean(x, 2)
    assert got.dtype == want.dtype == np.float32
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(np.signbit(got), np.signbit(want))
    # all four pixels negative zeros: numpy's sum starts from +0
    z = np.full((4, 6), -0.0, dtype)
    assert not np.signbit(polarity.block_mean(z, 2)).any()


@pytest.mark.parametrize("f", [3, 4])
def test_block_mean_other_factors_keep_numpy(f):
    x = np.random.default_rng(f).random((37, 45))
    rows, cols = (37 // f) * f, (45 // f) * f
    want = np.asarray(x[:rows, :cols], np.float32).reshape(rows // f, f, cols // f, f).mean(axis=(1, 3))
    np.testing.assert_array_equal(polarity.block_mean(x, f), want)


@pytest.mark.parametrize("seed", range(4))
def test_labelled_maxima_equal_scipy_maximum(seed):
    # reference: scipy.ndimage.maximum(values, labels, index) over every label
    rng = np.random.default_rng(seed)
    for m in _fields(seed):
        lab, n = ndi.label(m, _EIGHT)
        values = rng.standard_normal(m.shape)
        values[rng.random(m.shape) < 0.05] = -0.0
        at = np.flatnonzero(m)
        for v in (values, values.astype(np.float32), rng.integers(-50, 50, m.shape)):
            got = runs.labelled_maxima(v.ravel()[at], lab.ravel()[at], n)
            assert got.shape == (n + 1,) and got[0] == -np.inf
            if n:
                want = np.asarray(ndi.maximum(v, lab, np.arange(1, n + 1)), got.dtype)
                np.testing.assert_array_equal(got[1:], want)


def _core_area_ratios_scipy(dist, cut, min_area):
    """packed.core_area_ratios as it was: whole-frame bincount and scipy's labelled maximum."""
    cores, n = ndi.label(dist > cut, _EIGHT)
    if n == 0:
        return np.zeros(0)
    areas = np.bincount(cores.ravel(), minlength=n + 1)
    keep = [k for k, box in enumerate(ndi.find_objects(cores), start=1)
            if areas[k] >= min_area and packed._clear_of_edge(box, cores.shape)]
    if not keep:
        return np.zeros(0)
    inner = np.asarray(ndi.maximum(dist, cores, keep), float) - cut
    return areas[keep] / (np.pi * np.maximum(inner, 0.5) ** 2)


@pytest.mark.parametrize("seed", range(3))
def test_core_area_ratios_equal_the_scipy_form(seed):
    for m in _fields(seed, side=(20, 200)):
        dist = ndi.distance_transform_edt(m)
        for cut, min_area in ((1.0, 1.0), (2.0, 10.0), (0.5, 0.0)):
            np.testing.assert_array_equal(packed.core_area_ratios(dist, cut, min_area),
                                          _core_area_ratios_scipy(dist, cut, min_area))


@pytest.mark.parametrize("n", [10, 1 << 16, 300_001])
def test_kth_smallest_equals_numpy_partition(n):
    # reference: numpy.partition(values, k)[k], the polarity votes' edge level before
    from grainhabit.plugins.common.image_stats import kth_smallest

    rng = np.random.default_rng(n)
    g = np.sqrt(rng.standard_normal(n).astype(np.float32) ** 2 * 10.0 ** rng.integers(-3, 3, n).astype(np.float32))
    g[rng.random(n) < 0.05] = 0.0
    g[: n // 10] = g[n // 10: 2 * (n // 10)]  # ties
    neg = g - np.float32(0.5)
    withnan = neg.copy()
    withnan[n // 2] = np.nan
    for v in (g, neg, withnan, g.astype(np.float64), g.reshape(-1, 2) if n % 2 == 0 else g):
        for k in sorted({0, 1, n // 3, int(0.9 * (n - 1)), n - 1}):
            want = np.partition(v.ravel(), k)[k]
            got = kth_smallest(v, k)
            assert got.dtype == want.dtype
            assert got == want or (np.isnan(got) and np.isnan(want))


@pytest.mark.parametrize("seed", range(5))
@pytest.mark.parametrize("eight", [True, False])
def test_run_labels_equal_scipy_label_and_find_objects(seed, eight):
    # reference: scipy.ndimage.label (8- or 4-connectivity) and scipy.ndimage.find_objects
    structure = _EIGHT if eight else None
    masks = _fields(seed, n=10, side=(2, 300))
    rng = np.random.default_rng(seed)
    masks += [rng.random((200, 257)) > 0.5, ~masks[-1], np.ones((130, 140), bool), np.zeros((150, 150), bool)]
    diag = np.zeros((160, 160), bool)
    diag[np.arange(160), np.arange(160)] = True  # 8-connected only
    masks.append(diag | np.fliplr(diag))
    for m in masks:
        want, n = ndi.label(m, structure)
        rows, starts, stops = runs.row_runs(m)
        np.testing.assert_array_equal(runs.run_pixels(rows, starts, stops, m.shape[1]), np.flatnonzero(m))
        lab, k = runs.connect_runs(rows, starts, stops, m.shape[1], eight)
        assert k == n
        got = runs.paint_runs(m.shape, rows, starts, stops, lab)
        assert got.dtype == want.dtype
        np.testing.assert_array_equal(got, want)
        assert runs.run_boxes(rows, starts, stops, lab, k) == ndi.find_objects(want)
        for f in (runs.label, runs.label_with_boxes):
            out = f(m, eight)
            np.testing.assert_array_equal(out[0], want)
            assert out[1] == n
        assert runs.label_with_boxes(m, eight)[2] == ndi.find_objects(want)


@pytest.mark.parametrize("seed", range(4))
def test_gap_components_at_mask_equal_scipy_labels(seed):
    # reference: scipy.ndimage.label of the cores and of the mask (8-connected), read at np.flatnonzero(mask),
    # as gaps.gap_lines took them before
    from grainhabit.plugins.segment import gaps

    rng = np.random.default_rng(seed)
    for m in _fields(seed, side=(2, 260)):
        level = ndi.gaussian_filter(rng.random(m.shape), 2.0)
        for cores in (m & (level > np.median(level)), m, np.zeros(m.shape, bool), m & (rng.random(m.shape) > 0.7)):
            at, core_of, comp_of, n, n_mask = gaps._components_at_mask(m, cores)
            comp, k = ndi.label(cores, _EIGHT)
            whole, k_mask = ndi.label(m, _EIGHT)
            want_at = np.flatnonzero(m)
            np.testing.assert_array_equal(at, want_at)
            assert (n, n_mask) == (k, k_mask)
            assert core_of.dtype == comp.dtype and comp_of.dtype == whole.dtype
            np.testing.assert_array_equal(core_of, comp.ravel()[want_at])
            np.testing.assert_array_equal(comp_of, whole.ravel()[want_at])


def _diffuse_parts_scipy(mask, outer=None):
    """foreground.diffuse_parts as it was: scipy's labelling and find_objects of the mask's box."""
    from grainhabit.plugins.segment import foreground as fg
    from grainhabit.plugins.segment.hull_fill import convex_hull_mask

    out = mask.copy()
    rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
    if rows.size == 0:
        return out
    crop = (slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1))
    part = mask[crop]
    lab, n = ndi.label(part, structure=_EIGHT)
    areas = np.bincount(lab[part], minlength=n + 1)
    meets = np.ones(n + 1, bool)
    if outer is not None:
        meets[:] = False
        meets[lab[outer[crop] & part]] = True
    drop = ~meets
    big = np.flatnonzero(meets & (areas >= fg.PLATE_MIN_AREA_PX))
    big = big[big > 0]
    if big.size:
        boxes = ndi.find_objects(lab)
        for k in big:
            drop[k] = areas[k] >= fg.PLATE_SOLIDITY * convex_hull_mask(lab[boxes[k - 1]] == k).sum()
    drop[0] = False
    if drop.any():
        view = out[crop]
        view[drop[lab]] = False
    return out


@pytest.mark.parametrize("seed", range(4))
def test_faint_objects_and_diffuse_parts_equal_the_scipy_forms(seed):
    from grainhabit.plugins.segment import foreground as fg

    rng = np.random.default_rng(seed)
    for shape in ((40, 60), (150, 170), (300, 260)):
        img = ndi.gaussian_filter(rng.standard_normal(shape), rng.uniform(1.0, 4.0))
        img /= img.std()
        for lo_level, hi_level in ((0.3, 1.0), (0.8, 1.2), (0.0, 2.0)):
            low, high = img > lo_level, img > hi_level
            for min_area in (0.0, 20.0, 200.0):
                np.testing.assert_array_equal(fg.faint_objects(low, high, min_area),
                                              faint_objects_reference(low, high, min_area))
            # high not within low: its pixels outside low count for no component
            other = img + 0.5 * rng.standard_normal(shape) > hi_level
            np.testing.assert_array_equal(fg.faint_objects(low, other, 20.0), faint_objects_reference(low, other, 20.0))
            outer = rng.random(shape) > 0.9
            for o in (None, outer):
                np.testing.assert_array_equal(fg.diffuse_parts(low & ~high, o), _diffuse_parts_scipy(low & ~high, o))


@pytest.mark.parametrize("seed", range(3))
def test_hull_pixel_count_equals_the_hull_image_wherever_the_shape_lies(seed):
    # reference: scikit-image's convex_hull_image (the hull_fill module's own reference), pixels counted
    from skimage.morphology import convex_hull_image

    from grainhabit.plugins.segment import hull_fill, touching

    rng = np.random.default_rng(seed)
    hull_fill._COUNTS.clear()
    for m in _fields(seed, n=20, side=(3, 70)):
        want = int(np.count_nonzero(convex_hull_image(m))) if m.any() else 0
        pad = tuple(int(v) for v in rng.integers(0, 6, 4))
        placed = np.pad(m, ((pad[0], pad[1]), (pad[2], pad[3])))
        assert hull_fill.hull_pixel_count(placed) == want
        assert hull_fill.hull_pixel_count(m) == want  # read back from the note
        # a count noted by the splitter's concavity depth is read back for the same shape elsewhere
        hull_fill._COUNTS.clear()
        touching._DEPTHS.clear()
        touching.concavity_depth(m)
        if np.count_nonzero(m) >= 3:
            assert len(hull_fill._COUNTS) == 1
        assert hull_fill.hull_pixel_count(placed) == want


@pytest.mark.parametrize("seed", range(3))
def test_quantile_bins_equal_numpy_searchsorted(seed):
    # reference: the form noise_model_from_pairs took before (numpy.searchsorted, clipped, int16)
    from grainhabit.plugins.preprocess.flatten_background import quantile_bins

    rng = np.random.default_rng(seed)
    for n in (5, 1000, 300_000):
        m = rng.random(n) * rng.uniform(0.1, 10) - rng.uniform(0, 1)
        m[: n // 5] = np.round(m[: n // 5], 1)  # ties with the edges
        for edges in (np.unique(np.quantile(m, np.linspace(0, 1, 17))), np.unique(np.round(m[:40], 1)),
                      np.array([m.min() - 1.0, m.max() + 1.0]), np.array([0.0, 0.2, 0.2 + 1e-12, 5.0])):
            for v in (m, np.r_[m, np.nan, -np.inf, np.inf]):
                want = np.clip(np.searchsorted(edges, v, side="right") - 1, 0, len(edges) - 2).astype(np.int16)
                got = quantile_bins(edges, v)
                assert got.dtype == np.int16
                np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("seed", range(3))
def test_nearest_body_lines_equal_the_two_array_gather(seed):
    # reference: the lines with numpy's two-array gather bodies[ri, ci] of scipy's feature transform
    from grainhabit.plugins.segment import gaps

    rng = np.random.default_rng(seed)
    for m in _fields(seed, side=(10, 200)):
        bodies, _ = ndi.label(m & (rng.random(m.shape) > 0.3), _EIGHT)
        frame = np.zeros((m.shape[0] + 6, m.shape[1] + 9), np.int32)
        frame[3:-3, 4:-5] = bodies
        window = frame[3:-3, 4:-5]  # a view, as _lines_near_mask passes
        got, ft = gaps.nearest_body_lines(window, m, 4.0)
        free = bodies == 0
        want = np.zeros(m.shape, bool)
        if not free.all() and bodies[~free].min() != bodies[~free].max():
            ri, ci = ndi.distance_transform_edt(free, return_distances=False, return_indices=True)
            nearest = bodies[ri, ci]
            down, right = nearest[1:] != nearest[:-1], nearest[:, 1:] != nearest[:, :-1]
            want[1:] |= down
            want[:-1] |= down
            want[:, 1:] |= right
            want[:, :-1] |= right
            want &= free
            r, c = np.nonzero(want & m)
            d = np.sqrt((ri[r, c] - r).astype(np.float64) ** 2 + (ci[r, c] - c).astype(np.float64) ** 2)
            want[r[d > 4.0], c[d > 4.0]] = False
        np.testing.assert_array_equal(got, want)


def test_paint_boxes_equals_the_whole_frame_lookup():
    # reference: np.where(take[labels], value[labels], 0), the form paint_boxes stands in for
    from grainhabit.plugins.segment.segment_grains import paint_boxes

    rng = np.random.default_rng(5)
    for m in _fields(5, side=(20, 200)):
        labels, n = ndi.label(m, _EIGHT)
        boxes = [None] + ndi.find_objects(labels)
        for value in (rng.integers(-5, 2 ** 31 - 1, n + 1), list(rng.integers(0, 50, n + 1).tolist()),
                      np.arange(n + 1, dtype=np.int32)):
            take = rng.random(n + 1) > 0.3
            take[0] = False
            want = np.where(take[labels], np.asarray(value)[labels], 0).astype(np.int32)
            got = paint_boxes(labels, boxes, value, take)
            assert got.dtype == np.int32
            np.testing.assert_array_equal(got, want)
            base = rng.integers(0, 9, labels.shape).astype(np.int32)
            want_over = np.where(take[labels], np.asarray(value)[labels], base).astype(np.int32)
            np.testing.assert_array_equal(paint_boxes(labels, boxes, value, take, base.copy()), want_over)


def test_frame_levels_without_preview_give_the_same_levels_and_flatten_the_same_image():
    # reference: frame_levels with its preview (the form flatten took before) and apply_levels on it
    from grainhabit.plugins.preprocess import flatten_background as fb
    from grainhabit.plugins.synthetic.render import make_field

    for seed, size in ((0, 256), (1, 300)):
        img = make_field(12, (size, size), 5.0, {"cube": 1.0, "octahedron": 1.0}, 60.0, seed=seed).image
        for polarity in ("auto", "dark"):
            with_preview = fb.frame_levels(fb.whole_frame_regions(img), img.shape, 5.0, polarity=polarity)
            without = fb.frame_levels(fb.whole_frame_regions(img), img.shape, 5.0, polarity=polarity, preview=False)
            assert "preview" in with_preview and "preview" not in without
            for key, value in without.items():
                if isinstance(value, np.ndarray):
                    np.testing.assert_array_equal(value, with_preview[key])
                else:
                    assert value == with_preview[key], key
            full = (slice(0, img.shape[0]), slice(0, img.shape[1]))
            out, pol, conf = fb.flatten(img, 5.0, polarity=polarity)
            np.testing.assert_array_equal(out, fb.apply_levels(img, full, with_preview))
            assert (pol, conf) == (with_preview["polarity"], with_preview["confidence"])


def test_signed_residual_in_place_equals_the_expression():
    # reference: sign * (x - (b + m)) as numpy evaluates it (float32 x, float64 b)
    rng = np.random.default_rng(3)
    x = rng.standard_normal((50, 70)).astype(np.float32)
    b = rng.standard_normal((50, 70))
    x[0, :5] = 0.0
    b[0, :5] = 0.0
    for m in (0.0, -0.0, 0.37, -1e-9):
        for sign in (1, -1):
            want = sign * (x - (b + m))
            r = b.copy()
            r += m
            np.subtract(x, r, out=r)
            if sign < 0:
                np.negative(r, out=r)
            np.testing.assert_array_equal(r, want)
            np.testing.assert_array_equal(np.signbit(r), np.signbit(want))


@pytest.mark.parametrize("seed", range(4))
def test_maxima_by_label_equal_scipy_maximum(seed):
    # reference: scipy.ndimage.maximum(values, labels, index=np.arange(1, n + 1)), missing labels giving 0
    rng = np.random.default_rng(seed)
    for m in _fields(seed, side=(2, 120)):
        lab, k = ndi.label(m, _EIGHT)
        for n in (k, k + 3, max(k - 1, 1)):
            for v in (ndi.distance_transform_edt(m), -rng.random(m.shape), rng.standard_normal(m.shape).astype(np.float32)):
                want = ndi.maximum(v, lab, index=np.arange(1, n + 1))
                got = runs.maxima_by_label(v, lab, n)
                assert got.dtype == np.asarray(want).dtype and got.shape == (n,)
                np.testing.assert_array_equal(got, want)
        ws = rng.integers(0, 5, m.shape)  # labels in any order, not connected
        v = rng.standard_normal(m.shape)
        np.testing.assert_array_equal(runs.maxima_by_label(v, ws, 4), ndi.maximum(v, ws, index=np.arange(1, 5)))
