"""Issue 19 (branch speedseg): cheaper forms of segmentation kernels against the forms they replaced.

Each reference below is the project's previous code (segment-grains 2.17), written with
scipy.ndimage's ``label`` over the whole frame; the fields are invented.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import foreground as fg
from grainhabit.plugins.segment.disk_morphology import erode_disk


def _half_height_mask_reference(image, noise_level, edge_level=0.5, faint_level=None, faint_min_area=0.0,
                                grow_level=None):
    """segment-grains 2.17's half_height_mask: the components of the weak mask from scipy's ``label``."""
    weak = image > noise_level
    if faint_level is not None and faint_level < noise_level:
        weak |= fg.faint_objects(image > faint_level, weak, faint_min_area)
    if grow_level is not None and grow_level < noise_level:
        weak = fg.grown_to(weak, image > grow_level)
    lab, n = ndi.label(weak, structure=np.ones((3, 3), bool))
    if n == 0:
        return weak
    peak = np.full(n + 1, -np.inf, np.float32)
    at = np.flatnonzero(weak)
    own, value = lab.ravel()[at], image.ravel()[at]
    starts = np.flatnonzero(np.r_[True, own[1:] != own[:-1]])
    np.maximum.at(peak, own[starts], np.maximum.reduceat(value, starts))
    peak[0] = 0.0
    deep = erode_disk(weak, fg.EDGE_BAND_PX, 1)
    strong = np.zeros(weak.shape, bool)
    strong.ravel()[at[value > edge_level * peak[own]]] = True
    faint = at[value <= fg.STAIN_SHARE * peak[own]]
    faint = faint[deep.ravel()[faint]]
    stain_at = faint[~fg.dilated_at(strong, fg.STRONG_REACH_PX, faint)]
    if stain_at.size:
        stain = np.zeros(weak.shape, bool)
        stain.ravel()[stain_at] = True
        outer = np.zeros(weak.shape, bool)
        outer.ravel()[stain_at] = fg.dilated_at(weak & ~deep, 1.5, stain_at)
        deep &= ~fg.diffuse_parts(stain, outer)
    deep |= strong
    return deep


def _field(seed, size=300, dtype=np.float32):
    """Invented field: blurred discs and rings of several levels (some cut by the frame's edge), faint
    stains round some, noise, and with some seeds a bright corner pixel and a bright whole edge row."""
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[:size, :size]
    img = np.zeros((size, size))
    for _ in range(int(rng.integers(3, 20))):
        y, x, r = rng.uniform(-15, size + 15, 2).tolist() + [rng.uniform(3, 30)]
        d = np.hypot(yy - y, xx - x)
        level = rng.uniform(0.1, 1.0)
        shape = (d <= r) & (d > rng.uniform(0, 0.8) * r) if rng.random() < 0.3 else d <= r
        img = np.maximum(img, np.where(shape, level, 0.0))
        if rng.random() < 0.4:
            img = np.maximum(img, np.where((d > r) & (d <= 2 * r) & (np.cos(2 * np.arctan2(yy - y, xx - x)) > 0),
                                           0.12 * level, 0.0))
    img = ndi.gaussian_filter(img, rng.uniform(0.5, 2.0)) + rng.normal(0, rng.uniform(0.002, 0.03), img.shape)
    if seed % 3 == 0:
        img[0, 0] = 1.0
        img[-1, :] = 0.9
    return img.astype(dtype)


@pytest.mark.parametrize("seed", range(12))
def test_half_height_mask_from_runs_equals_the_scipy_labelling(seed):
    # reference: segment-grains 2.17's form above (scipy.ndimage.label of the weak mask over the whole frame)
    img = _field(seed, dtype=np.float32 if seed % 2 else np.float64)
    for args in ((0.05, 0.5), (0.05, 0.3, 0.03, 40.0), (0.08, 0.5, 0.04, 20.0, 0.04), (0.02, 0.8)):
        np.testing.assert_array_equal(fg.half_height_mask(img, *args), _half_height_mask_reference(img, *args))


def test_half_height_mask_edge_cases_equal_the_scipy_labelling():
    # reference: as above; an empty mask, one pixel, a frame all above the level, one row, one column
    z = np.zeros((40, 50), np.float32)
    cases = [z, z + 1.0, np.pad(np.ones((1, 1), np.float32), ((5, 34), (7, 42))),
             np.tile(np.linspace(0, 1, 50, dtype=np.float32), (40, 1)), np.ones((1, 30), np.float32),
             np.ones((30, 1), np.float32), np.eye(40, 50, dtype=np.float32)]
    for img in cases:
        np.testing.assert_array_equal(fg.half_height_mask(img, 0.05, 0.5), _half_height_mask_reference(img, 0.05, 0.5))


def _masks(seed):
    """Invented masks of several shapes, densities and dtypes (all and none set among them)."""
    rng = np.random.default_rng(seed)
    out = []
    for shape in [(1,), (9,), (5, 9), (64, 80), (1, 40), (40, 1), (3, 4, 5)]:
        for p in (0.0, 0.03, 0.5, 0.97, 1.0):
            out.append(rng.random(shape) < p)
    blobs = ndi.gaussian_filter(rng.random((120, 90)), 4) > 0.5
    out += [blobs, ~blobs, blobs[::2, ::3], rng.random((20, 30)), np.where(rng.random((20, 20)) < 0.5, np.nan, 0.0)]
    return out


@pytest.mark.parametrize("seed", range(3))
def test_distance_map_equals_scipy_bit_for_bit(seed):
    # reference library: scipy.ndimage.distance_transform_edt (distances, and feature indices alone)
    from grainhabit.plugins.segment.distance import distance_map, feature_transform

    for m in _masks(seed):
        want = ndi.distance_transform_edt(m)
        got = distance_map(m)
        assert got.dtype == want.dtype == np.float64 and got.shape == want.shape
        np.testing.assert_array_equal(got.view(np.uint64), want.view(np.uint64))
        ft = feature_transform(m)
        want_ft = ndi.distance_transform_edt(m, return_distances=False, return_indices=True)
        assert ft.dtype == want_ft.dtype
        np.testing.assert_array_equal(ft, want_ft)


def test_distances_from_features_sum_in_int64_beyond_int32():
    # reference: scipy's float64 sum of squares, on index grids too long for an int32 sum (a 1 x 50000 strip
    # with its only zero pixel at one end: squared reach 2.5e9 > 2**31)
    from grainhabit.plugins.segment.distance import distance_map

    m = np.ones((1, 50_000), bool)
    m[0, 0] = False
    np.testing.assert_array_equal(distance_map(m), ndi.distance_transform_edt(m))
    assert distance_map(m)[0, -1] == 49_999.0


def _survives_disk_erosion_reference(mask, radius):
    """segment-grains 2.17's survives_disk_erosion: the square's running minima first, then the disk."""
    from grainhabit.plugins.segment.disk_morphology import erode_disk

    k = int(np.floor(radius))
    m = np.asarray(mask, bool)
    if m.size and ndi.minimum_filter(m.view(np.uint8), size=2 * k + 1, mode="constant", cval=0).any():
        return True
    return bool(erode_disk(np.pad(m, 1), radius, 0).any())


@pytest.mark.parametrize("seed", range(6))
def test_survives_disk_erosion_with_the_middle_square_first_equals_the_previous_form(seed):
    # reference: the 2.17 form above (scipy's minimum filter, then the disk erosion); invented discs, rings,
    # bars, masks filling their array to the edge and noise
    from grainhabit.plugins.segment.mark_shapes import survives_disk_erosion

    rng = np.random.default_rng(seed)
    for _ in range(40):
        h, w = rng.integers(1, 60, 2)
        yy, xx = np.mgrid[:h, :w]
        d = np.hypot(yy - rng.uniform(0, h), xx - rng.uniform(0, w))
        r = rng.uniform(0, 30)
        kind = rng.integers(0, 4)
        m = [d < r, (d < r) & (d > 0.6 * r), rng.random((h, w)) < 0.9, np.ones((h, w), bool)][kind]
        for radius in (0.0, 1.5, 4.0, 5.3, 8.0):
            assert survives_disk_erosion(m, radius) == _survives_disk_erosion_reference(m, radius)
