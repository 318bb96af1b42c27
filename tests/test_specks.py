"""Specks of texture against small real grains (plugins/segment/specks.py).

Frames are drawn here (invented data). Outside references: the normal distribution's
median absolute deviation, 0.6745 sd (handbook; 1.4826 = 1 / 0.6745), and
``skimage.draw.disk`` for the discs; the default segment-grains step runs on a drawn
preprocessed frame.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment import specks
from grainhabit.plugins.segment.segment_grains import segment_image


def test_local_contrast_of_a_disc_on_gaussian_noise():
    # a disc of contrast 1.0 on white Gaussian noise of sd 0.1: (mean - median) / (1.4826 MAD) about 10
    # (for a normal sample 1.4826 MAD estimates the sd; handbook)
    rng = np.random.default_rng(2)
    img = rng.normal(0.0, 0.1, (80, 80))
    part = np.zeros_like(img, bool)
    part[disk((40, 40), 5, shape=img.shape)] = True
    img[part] += 1.0
    box = ndi.find_objects(part.astype(int))[0]
    c = specks.local_contrast(part[box], box, img, part)
    assert 9.0 < c < 11.0
    # the same disc at a third of the noise's sd is a speck
    img2 = rng.normal(0.0, 0.1, (80, 80))
    img2[part] += 0.03
    assert specks.is_speck(part[box], box, img2, part)


def _textured_frame(seed):
    """Preprocessed frame (background 0, grains 1): faint noise on the left half, rough texture
    (Gaussian-smoothed noise of sd 0.15, peaks above the segmenter's min_peak) on the right half, and
    small discs of 8-12 px diameter at 1.0 on both halves; returns the frame and the disc centres."""
    rng = np.random.default_rng(seed)
    shape = (300, 300)
    texture = ndi.gaussian_filter(rng.normal(0.0, 1.0, shape), 1.5)
    texture *= 0.15 / texture.std()
    img = rng.normal(0.0, 0.03, shape)
    img[:, 150:] += texture[:, 150:]
    centres = [(40 + 55 * i, 40 + 55 * j) for i in range(5) for j in range(5)][::2]
    for k, (r, c) in enumerate(centres):
        img[disk((r, c), 4 + k % 3, shape=shape)] += 1.0
    return np.clip(img, -0.25, 1.0).astype(np.float32), centres


@pytest.mark.parametrize("seed", [0, 1])
def test_texture_specks_dropped_small_grains_kept(seed):
    img, centres = _textured_frame(seed)
    labels, _, _ = segment_image(img, 1.0, {"min_ecd_nm": 6.0})
    found = [int(labels[r, c]) for r, c in centres]
    # every small grain (8-12 px ECD, on the rough half too) found, one object each, and nothing else
    assert all(found) and len(set(found)) == len(centres)
    assert int(labels.max()) == len(centres)
    # without the speck test the rough half gives texture objects as well (the test is not idle)
    old = specks.MIN_CONTRAST
    try:
        specks.MIN_CONTRAST = 0.0
        loose, _, _ = segment_image(img, 1.0, {"min_ecd_nm": 6.0})
    finally:
        specks.MIN_CONTRAST = old
    assert int(loose.max()) > len(centres) + 3


def _streaked(seed, sd=0.28, shape=(120, 120)):
    """Background streaked along its rows (each row offset by N(0, sd), as scan lines of a charging SEM
    frame are) with white noise of sd 0.03: a ring of rows around an object has a spread of about sd."""
    rng = np.random.default_rng(seed)
    return rng.normal(0.0, sd, (shape[0], 1)) + rng.normal(0.0, 0.03, shape)


def _judge(img, part):
    box = ndi.find_objects(part.astype(int))[0]
    return specks.local_contrast(part[box], box, img, part), specks.is_speck(part[box], box, img, part)


def test_compact_particle_on_a_streaked_background_is_no_speck():
    # a disc of ECD 12 px at 1.0 over rows streaked with sd 0.28 stands 3-4 ring sds up (1 / 0.28 = 3.6):
    # under the general threshold of 4, kept as a convex body (handbook: a disc is convex; solidity 1.0 on
    # the pixel grid); a ragged object of about the same area and contrast (a plus sign of 105 px, arms
    # 5 px wide, solidity under 0.9) and a disc too small to tell from texture (ECD 8 px) stay specks
    shape = (120, 120)
    disc = np.zeros(shape, bool)
    disc[disk((60, 60), 6, shape=shape)] = True
    plus = np.zeros(shape, bool)
    plus[54:67, 58:63] = True
    plus[58:63, 54:67] = True
    small = np.zeros(shape, bool)
    small[disk((60, 60), 4, shape=shape)] = True
    seen = []
    for seed in range(6):
        for name, part in (("disc", disc), ("plus", plus), ("small", small)):
            img = _streaked(seed)
            img[part] += 1.0
            c, speck = _judge(img, part)
            seen.append((name, c, speck))
    assert specks.solidity(plus) < specks.COMPACT_SOLIDITY <= specks.solidity(disc)
    for name in ("disc", "plus"):  # the case at issue, seen for both shapes
        assert sum(specks.COMPACT_MIN_CONTRAST <= c < specks.MIN_CONTRAST for n, c, _ in seen if n == name) >= 2
    for name, c, speck in seen:
        if specks.COMPACT_MIN_CONTRAST <= c < specks.MIN_CONTRAST:
            assert speck == (name != "disc"), (name, c)


def test_least_contrast_grows_as_the_noise_of_a_mean():
    # the sd of the mean of n independent pixels is sd / sqrt(n) (handbook), and n grows as ECD^2, so the
    # margin below COMPACT_MIN_ECD_PX scales as 1 / ECD: the product is constant there, MIN_CONTRAST above
    for ecd in (4.0, 5.0, 7.5, 9.9):
        assert specks.least_contrast(ecd) * ecd == pytest.approx(specks.MIN_CONTRAST * specks.COMPACT_MIN_ECD_PX)
    for ecd in (10.0, 14.0, 23.0):
        assert specks.least_contrast(ecd) == specks.MIN_CONTRAST


def _tiny_grain_field(seed, shape=(240, 240), radius=2.5, noise=0.08):
    """Preprocessed frame (background 0, grains 1) of 49 discs of about 5 px ECD on white noise: a
    low-magnification field whose grains are all near the smallest outline (as in an SEM survey image)."""
    rng = np.random.default_rng(seed)
    img = rng.normal(0.0, noise, shape)
    centres = [(20 + 33 * i, 20 + 33 * j) for i in range(7) for j in range(7)]
    for r, c in centres:
        img[disk((r, c), radius, shape=shape)] += 1.0
    return img.astype(np.float32), centres


@pytest.mark.parametrize("seed", [0, 1])
def test_field_of_five_pixel_grains_found(seed):
    img, centres = _tiny_grain_field(seed)
    # skimage.draw.disk of radius 2.5 covers 21 px: ECD sqrt(4 * 21 / pi) = 5.2 px (handbook pi r^2 geometry)
    assert int(np.count_nonzero(_tiny_grain_field(seed, noise=0.0)[0] > 0.5)) == 21 * len(centres)
    labels, _, _ = segment_image(img, 1.0, {})
    found = [int(labels[r, c]) for r, c in centres]
    assert sum(1 for f in found if f) >= len(centres) - 1
    assert len(set(f for f in found if f)) == sum(1 for f in found if f)
    assert int(labels.max()) <= len(centres)
    # the floor of earlier versions (6 px) lost the field: the new floor is what finds it
    old, _, _ = segment_image(img, 1.0, {"min_ecd_px": 6.0})
    assert int(old.max()) < len(centres) // 2


def test_five_pixel_object_needs_twice_the_margin():
    # discs on white Gaussian noise of sd 0.1 (ring contrast = amplitude / sd, 1.4826 MAD estimating the sd;
    # handbook): at 6 sds a disc of 12 px ECD is a grain and one of 5 px a speck (it needs 8); at 12 sds both
    # are grains
    shape = (80, 80)
    rng = np.random.default_rng(5)
    for radius, sds, speck in ((6, 6.0, False), (2.5, 6.0, True), (2.5, 12.0, False), (6, 12.0, False)):
        part = np.zeros(shape, bool)
        part[disk((40, 40), radius, shape=shape)] = True
        for _ in range(3):
            img = rng.normal(0.0, 0.1, shape)
            img[part] += sds * 0.1
            c, is_speck = _judge(img, part)
            assert abs(c - sds) < 2.0, (radius, sds, c)
            assert is_speck == speck, (radius, sds, c)
