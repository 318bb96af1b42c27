"""Outlines drawn to the outer edge of the blur (segment-grains ``outline: outer``)."""

import numpy as np
from scipy import ndimage as ndi
from skimage.segmentation import expand_labels

from grainhabit.plugins.segment.outer_edge import grow_to_level
from grainhabit.plugins.segment.segment_grains import segment_image


def blurred_discs(centres, radius, shape=(160, 160), sigma=1.2, supersample=4):
    """Discs of ``radius`` px, area-averaged over each pixel, then a Gaussian blur of ``sigma`` px."""
    h, w = shape
    yy, xx = np.mgrid[0:h * supersample, 0:w * supersample]
    yy = (yy + 0.5) / supersample
    xx = (xx + 0.5) / supersample
    fine = np.zeros(yy.shape)
    for cy, cx in centres:
        fine[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius ** 2] = 1.0
    coarse = fine.reshape(h, supersample, w, supersample).mean(axis=(1, 3))
    return ndi.gaussian_filter(coarse, sigma)


def test_half_height_outlines_keep_the_disc_area_and_outer_ones_add_a_rim():
    # Handbook geometry: the pixel count of a disc of radius r is pi r^2; a symmetric blur of a step edge
    # crosses half height at the edge, so the half-height outline keeps the area (here within 2 %).
    r = 14.3
    img = blurred_discs([(50.0, 50.0), (50.0, 110.0), (112.0, 80.0)], r)
    half, _, _ = segment_image(img, 1.0, {})
    outer, _, _ = segment_image(img, 1.0, {"outline": "outer"})
    assert half.max() == outer.max() == 3
    area_half = np.bincount(half.ravel())[1:]
    area_outer = np.bincount(outer.ravel())[1:]
    assert np.all(np.abs(area_half / (np.pi * r ** 2) - 1) < 0.02)
    # The outer outline lies about one pixel further out: an equal-area radius 0.5-2 px larger.
    dr = np.sqrt(area_outer / np.pi) - np.sqrt(area_half / np.pi)
    assert np.all((dr > 0.5) & (dr <= 2.0))
    # Every grain keeps its own pixels and its number.
    assert np.all(outer[half > 0] == half[half > 0])


def test_near_grains_do_not_merge_and_growth_stops_at_the_level():
    img = np.zeros((40, 60))
    labels = np.zeros((40, 60), np.int32)
    labels[10:30, 10:28] = 1
    labels[10:30, 31:50] = 2
    img[labels > 0] = 1.0
    img[10:30, 28:31] = 0.5   # a bright gap 3 px wide between the two grains
    img[10:30, 50] = 0.1      # a dim rim, under 0.3 of the grain level
    out = grow_to_level(img, labels)
    assert set(np.unique(out)) == {0, 1, 2}
    assert np.all(out[10:30, 28] == 1) and np.all(out[10:30, 30] == 2)
    assert np.all(out[10:30, 50] == 0)
    lab, n = ndi.label(out == 1)
    assert n == 1


def test_with_level_zero_the_growth_is_scikit_image_expand_labels():
    # Reference library: with every pixel eligible, ``reach_px`` rings of growth equal
    # skimage.segmentation.expand_labels(labels, reach_px) (nearest label wins).
    rng = np.random.default_rng(3)
    labels = np.zeros((64, 64), np.int32)
    for k, (y, x) in enumerate(rng.integers(4, 60, size=(9, 2)), start=1):
        labels[y - 2:y + 2, x - 2:x + 2] = k
    img = rng.random((64, 64))
    out = grow_to_level(img, labels, level=0.0, reach_px=1)
    assert np.array_equal(out, expand_labels(labels, 1))
