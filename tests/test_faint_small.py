"""Faint small grains: found below the noise threshold (hysteresis) and kept whole.

Everything drawn here is invented test data.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment.foreground import faint_objects
from grainhabit.plugins.segment.levels import frame_levels
from grainhabit.plugins.segment.segment_grains import label_grains

SHAPE = (240, 240)
CENTRES = [(30 + 45 * i, 30 + 45 * j) for i in range(5) for j in range(5)]


def found_at_centres(labels: np.ndarray) -> tuple[int, int]:
    """Discs with a grain at their centre, and grains at no disc."""
    hit = {int(labels[r, c]) for r, c in CENTRES} - {0}
    return len(hit), int(labels.max()) - len(hit)


def film_with_smooth_discs(radius: float, amplitude: float, sd: float, seed: int) -> np.ndarray:
    """A preprocessed frame (background 0): a rough film (white noise of sd ``sd``) that smooth discs of
    ``amplitude`` cover, the edges blurred 1 px."""
    discs = np.zeros(SHAPE)
    for r, c in CENTRES:
        rr, cc = disk((r, c), radius, shape=SHAPE)
        discs[rr, cc] = 1.0
    cover = ndi.gaussian_filter(discs, 1.0)
    rng = np.random.default_rng(seed)
    return (amplitude * cover + (1.0 - cover) * rng.normal(0.0, sd, SHAPE)).astype(np.float32)


def test_faint_objects_are_the_components_that_never_reach_the_high_level():
    low = np.zeros((20, 20), bool)
    low[2:6, 2:6] = True      # reaches high
    low[10:14, 10:14] = True  # does not
    high = np.zeros_like(low)
    high[3, 3] = True
    out = faint_objects(low, high)
    assert out[10:14, 10:14].all() and not out[2:6, 2:6].any() and out.sum() == 16


def test_grains_wholly_below_the_noise_threshold_found_at_the_faint_level():
    # smooth discs (radius 8 px) at 4.6 film sds: no pixel reaches 5 sds, all stand above 4 sds (and
    # above the 4 local sds a small object needs, specks.py); the film's own pixels pass 4 sds in ~3e-5 of
    # cases (the normal tail; from memory), never as a grain
    img = film_with_smooth_discs(8.0, 0.46, 0.1, seed=1)
    lv_off = frame_levels(img, 5.0)
    lv_on = frame_levels(img, 5.0, faint_k=4.0)
    assert abs(lv_on["sigma"] - 0.1) < 0.015
    off, _, _ = label_grains(img, 1.0, lv_off, method="auto", min_ecd_nm=0.0)
    on, _, _ = label_grains(img, 1.0, lv_on, method="auto", min_ecd_nm=0.0)
    assert found_at_centres(off)[0] <= 2
    assert found_at_centres(on) == (25, 0)
    # whole: the outline on the edge's gradient, the blurred edge's half-height point (pi r^2, handbook)
    areas = np.bincount(on.ravel())[1:]
    assert abs(np.median(areas) / (np.pi * 8.0 ** 2) - 1.0) < 0.1


def test_faint_level_leaves_clear_grains_and_their_neighbourhood_alone():
    # a bright grain with a faint line (4.5 sds) passing 4 px from its edge: the line does not join it
    img = film_with_smooth_discs(10.0, 1.0, 0.1, seed=2)
    img[38:40, 0:120] = 0.45   # the first row of discs: centres at row 30, edges at row 40 and below
    off, _, _ = label_grains(img, 1.0, frame_levels(img, 5.0), method="auto", min_ecd_nm=0.0)
    on, _, _ = label_grains(img, 1.0, frame_levels(img, 5.0, faint_k=4.0), method="auto", min_ecd_nm=0.0)
    for r, c in CENTRES:
        assert (on == on[r, c]).sum() == (off == off[r, c]).sum()


def test_faint_grain_kept_whole_beyond_its_pixels_above_the_threshold():
    # soft discs (radius 8 px, blurred 2 px) whose peak, 0.55, is just above the 5-sd pixel threshold
    # (white noise of sd 0.1): only their cores stand above it, their outlines lie on their edges'
    # gradient; each is a grain, not a pocket of background enclosed between grains
    discs = np.zeros(SHAPE)
    for r, c in CENTRES:
        rr, cc = disk((r, c), 8.0, shape=SHAPE)
        discs[rr, cc] = 0.55
    rng = np.random.default_rng(5)
    img = (ndi.gaussian_filter(discs, 2.0) + rng.normal(0.0, 0.1, SHAPE)).astype(np.float32)
    labels, _, _ = label_grains(img, 1.0, frame_levels(img, 5.0), method="auto", min_ecd_nm=0.0)
    assert found_at_centres(labels) == (25, 0)
    # the blurred edge's half-height point is the disc's edge (pi r^2, handbook geometry); the outline
    # of a peak only just above the noise sits a little inside it
    areas = np.bincount(labels.ravel())[1:]
    assert abs(np.median(areas) / (np.pi * 8.0 ** 2) - 1.0) < 0.2
