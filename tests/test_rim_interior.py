"""Grains seen by their bright rims: the open inside of a C-shaped rim joins it (segment-grains 2.12)."""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.preprocess import flatten_background
from grainhabit.plugins.segment import segment_grains
from grainhabit.plugins.segment.rim_interior import fill_rim_interiors


def _rim_bright_rods(seed=0):
    """Six SEM-like rods: edges bright (1.0), faces dim (0.2), each rim fading along part of its top side."""
    shape, r, rim_w, gap = (240, 320), 12.0, 4.0, 30.0
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    img = np.zeros(shape)
    rods = []
    for cy, x0 in ((40, 30), (40, 190), (120, 30), (120, 190), (200, 30), (200, 190)):
        d = np.hypot(yy - cy, xx - np.clip(xx, x0 + r, x0 + 100 - r))
        body = d <= r
        rim = body & (d > r - rim_w) & ~((yy < cy) & (np.abs(xx - (x0 + 50)) < gap / 2))
        img[body] = 0.2
        img[rim] = 1.0
        rods.append(body)
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(seed).normal(0.0, 0.05, shape)
    raw = (np.clip(0.1 + 0.6 * img, 0, 1) * 60000).astype(np.uint16)
    # handbook geometry: a stadium of radius r and overall length 100 px has area pi r^2 + 2 r (100 - 2 r)
    return raw, rods, math.pi * r ** 2 + 2 * r * (100 - 2 * r)


def test_rim_bright_rods_are_found_whole():
    raw, rods, area = _rim_bright_rods()
    assert all(abs(b.sum() - area) / area < 0.03 for b in rods)  # pixel digitisation of 24 px wide bodies
    image, _, _ = flatten_background.flatten(raw, 5.0, polarity="bright")
    labels, _, notes = segment_grains.segment_image(image, 5.0, {}, raw)
    whole = 0
    for body in rods:
        on = np.unique(labels[body & (labels > 0)])
        if on.size == 1:
            found = labels == on[0]
            assert abs(found.sum() - area) / area < 0.15, notes
            whole += 1
    # without the fill the half-height bands of these rods are cut into 2-3 grains each (2 of 6 whole)
    assert whole >= 5, notes


def test_open_rim_is_filled_and_a_touching_pair_is_not():
    # unit level: a C-shaped band whose inside is material is completed to its hull; two discs touching at
    # a neck leave two notches on the background and stay as they are
    shape = (100, 100)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    r = np.hypot(yy - 50, xx - 50)
    band = (r <= 30) & (r > 24) & ~((xx > 70) & (np.abs(yy - 50) < 8))
    image = np.where(r <= 30, 0.3, 0.0)
    image[band] = 1.0
    fg = band.copy()
    comp = band.astype(np.int32)
    assert fill_rim_interiors(image, fg, comp, ndi.find_objects(comp), noise=0.2) == 1
    assert comp.sum() > 0.97 * (r <= 30).sum() - 2 * math.pi * 30  # the disc of radius 30, up to its rim pixels
    pair = (np.hypot(yy - 50, xx - 30) <= 18) | (np.hypot(yy - 50, xx - 68) <= 18)
    image = pair.astype(float)
    fg = pair.copy()
    comp = pair.astype(np.int32)
    assert fill_rim_interiors(image, fg, comp, ndi.find_objects(comp), noise=0.2) == 0
    assert np.array_equal(comp > 0, pair)
