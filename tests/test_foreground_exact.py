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
