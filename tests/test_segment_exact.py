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
