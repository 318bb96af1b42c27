"""Flat drawn panels (a panel letter's box, a data bar) found, and kept out of the grain level.

Everything drawn here is invented test data: 8-bit frames as a figure export stores them.
"""

from __future__ import annotations

import numpy as np
import pytest
from skimage.draw import disk, rectangle

from grainhabit.plugins.common.drawn_panels import drawn_panels
from grainhabit.plugins.preprocess.flatten_background import flatten

SHAPE = (400, 500)


def micrograph(seed: int = 0, clip_core: bool = False) -> np.ndarray:
    """Grey background (100) with noise of sd 6, twelve bright discs (170) of radius 18 px."""
    rng = np.random.default_rng(seed)
    img = 100.0 + rng.normal(0.0, 6.0, SHAPE)
    for i in range(3):
        for j in range(4):
            rr, cc = disk((180 + 70 * i, 80 + 110 * j), 18, shape=SHAPE)
            img[rr, cc] = 170.0 + rng.normal(0.0, 6.0, rr.size)
    if clip_core:  # a grain clipped to white: a flat square core with nothing drawn in it
        rr, cc = rectangle((20, 300), extent=(30, 30), shape=SHAPE)
        img[rr, cc] = 255.0
    return np.clip(np.round(img), 0, 255).astype(np.uint8)


def add_letter_box(img: np.ndarray) -> np.ndarray:
    """A white box (255) of 70 x 90 px in the top-left corner holding a black ring and bar (a drawn "a")."""
    out = img.copy()
    out[0:70, 0:90] = 255
    rr, cc = disk((35, 40), 16, shape=SHAPE)
    ring = np.zeros(SHAPE, bool)
    ring[rr, cc] = True
    rr, cc = disk((35, 40), 11, shape=SHAPE)
    ring[rr, cc] = False
    out[ring] = 0
    out[18:52, 55:60] = 0
    return out


def test_box_behind_a_panel_letter_is_a_panel():
    img = add_letter_box(micrograph())
    m = drawn_panels(img)
    assert m[2:68, 2:88].mean() > 0.95      # the box, letter included
    assert not m[100:, :].any()             # nothing in the picture


def test_no_panel_in_noise_or_a_clipped_grain_or_a_flat_background():
    assert not drawn_panels(micrograph()).any()
    assert not drawn_panels(micrograph(clip_core=True)).any()  # flat and square, but nothing drawn in it
    sat = micrograph()
    sat[sat < 110] = 100                    # background clipped flat over most of the frame (no noise left)
    assert not drawn_panels(sat).any()


def test_float_frame_without_flat_fill_costs_one_pass_and_finds_nothing():
    rng = np.random.default_rng(1)
    assert not drawn_panels(rng.normal(0.0, 1.0, (256, 256)).astype(np.float32)).any()


def test_a_white_letter_box_does_not_set_the_grain_level():
    # the reference is the same frame without the box: grains normalised to about 1 in both; with the box
    # taken as a grain they fell to (170 - 100) / (255 - 100) = 0.45 of the scale
    plain = micrograph(seed=2)
    boxed = add_letter_box(plain)
    out_plain, pol_plain, _ = flatten(plain.astype(np.float32), 1.0)
    out_boxed, pol_boxed, _ = flatten(boxed.astype(np.float32), 1.0)
    assert pol_plain == pol_boxed == "bright"
    inside = np.zeros(SHAPE, bool)
    rr, cc = disk((180, 80), 12, shape=SHAPE)
    inside[rr, cc] = True
    assert np.median(out_boxed[inside]) == pytest.approx(np.median(out_plain[inside]), abs=0.05)
    assert np.median(out_boxed[inside]) > 0.8
