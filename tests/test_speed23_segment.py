"""Issue 19 (branch speed23): segmentation kernels against the forms they replaced.

tiling.renumber_raster's shortcut for labels already in raster order, against the lookup-table form
(``lut[labels]``, written out here) and scikit-image's ``measure.label``, whose numbering (row-major
order of each component's first pixel) the function follows; packed.block_average of integer frames
against its reshape-and-sum form.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi
from skimage.measure import label as sk_label

from grainhabit.plugins.segment.tiling import first_pixels, renumber_raster


def _lut_reference(labels):
    lab = np.asarray(labels)
    first = first_pixels(lab)
    present = np.flatnonzero(first >= 0) + 1
    old = present[np.argsort(first[present - 1], kind="stable")]
    lut = np.zeros(int(lab.max()) + 1 if lab.size else 1, np.int32)
    lut[old] = np.arange(1, len(old) + 1, dtype=np.int32)
    return lut[lab], old


def test_renumber_raster_equals_lookup_and_skimage_order():
    rng = np.random.default_rng(4)
    blobs = ndi.gaussian_filter(rng.random((160, 200)), 3) > 0.52
    in_order = sk_label(blobs, connectivity=1).astype(np.int32)  # 1..n in raster order already
    shuffled = np.r_[0, rng.permutation(int(in_order.max())) + 1][in_order]
    gap = np.where(in_order == 3, 0, in_order)  # an id missing
    cases = [in_order, in_order.astype(np.int64), shuffled, gap, np.zeros((5, 7), np.int32),
             np.ones((4, 4), np.int16), in_order[:0]]
    shortcut = 0
    for lab in cases:
        got, old = renumber_raster(lab)
        want, old_want = _lut_reference(lab)
        assert got.dtype == want.dtype == np.int32
        np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(old, old_want)
        assert not np.shares_memory(got, lab)
        if lab.size and lab.max() and np.array_equal(old, np.arange(1, lab.max() + 1)):
            shortcut += 1
            # skimage numbers the same components the same way
            np.testing.assert_array_equal(got, sk_label(lab > 0, connectivity=1))
    assert shortcut >= 3


def test_block_average_of_integers_equals_reshape_sums():
    # reference: the reshape-and-sum form (int64 accumulators) packed.block_average used before
    from grainhabit.plugins.segment.packed import block_average

    rng = np.random.default_rng(5)
    for dtype in (np.uint16, np.int16, np.uint8, np.int32, bool):
        for shape, f in (((64, 48), 4), ((101, 77), 3), ((40, 40), 1), ((300, 128), 16)):
            a = (rng.integers(-2**15, 2**15, size=shape) if dtype is not bool else rng.random(shape) > 0.5).astype(dtype)
            rows, cols = (shape[0] // f) * f, (shape[1] // f) * f
            s = a[:rows, :cols].reshape(rows // f, f, cols).sum(axis=1, dtype=np.int64)
            want = s.reshape(rows // f, cols // f, f).sum(axis=2) / float(f * f)
            got = block_average(a, f)
            assert got.dtype == want.dtype
            np.testing.assert_array_equal(got, want)
