"""Issue 19 (branch speedseg): cheaper forms of preprocessing kernels against the forms they replaced.

The references are numpy's own gradient and the project's previous polarity vote (flatten-background 1.8),
on invented images.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import kth_smallest
from grainhabit.plugins.preprocess import polarity


def _images(seed):
    rng = np.random.default_rng(seed)
    smooth = ndi.gaussian_filter(rng.random((90, 120)), 3).astype(np.float32)
    return [smooth, smooth[:2, :], smooth[:, :2], smooth[::3, ::7], rng.normal(size=(3, 3)).astype(np.float32),
            rng.normal(size=(40, 55)), np.zeros((20, 20), np.float32)]


@pytest.mark.parametrize("seed", range(3))
def test_gradient_at_equals_numpy_gradient(seed):
    # reference library: numpy.gradient (unit spacing, first-order edges), every pixel asked for
    for f in _images(seed):
        at = np.arange(f.size)
        for axis in (0, 1):
            want = np.gradient(f, axis=axis).ravel()
            got = polarity.gradient_at(f, at, axis)
            assert got.dtype == want.dtype
            np.testing.assert_array_equal(got, want)


def _tangent_vote_reference(arr, sigma, edge_fraction=polarity.EDGE_FRACTION):
    """flatten-background 1.8's vote at one scale: the second derivative over the whole image first."""
    itt, grad = polarity.tangent_second_derivative(arr, sigma)
    t = kth_smallest(grad, int((1.0 - edge_fraction) * (grad.size - 1)))
    edge = (grad >= t) & (grad > 0)
    return float(np.mean(np.sign(-itt[edge]))) if edge.any() else None


@pytest.mark.parametrize("seed", range(4))
def test_convex_side_vote_equals_the_whole_image_form(seed):
    # reference: the previous form above, through the same multiscale_vote, on invented discs and holes
    rng = np.random.default_rng(seed)
    size = 160
    yy, xx = np.mgrid[:size, :size]
    img = np.zeros((size, size))
    for _ in range(8):
        y, x, r = rng.uniform(0, size, 2).tolist() + [rng.uniform(5, 25)]
        img += np.where(np.hypot(yy - y, xx - x) < r, rng.choice([-1.0, 1.0]), 0.0)
    img = img + rng.normal(0, 0.2, img.shape)
    for scales in (polarity.SCALES_PX, (1.0,), (2.0, 8.0)):
        want = polarity.multiscale_vote(img, scales, _tangent_vote_reference)
        assert polarity.convex_side_vote(img, scales) == want
    assert polarity.convex_side_vote(np.zeros((30, 30))) == polarity.multiscale_vote(
        np.zeros((30, 30)), polarity.SCALES_PX, _tangent_vote_reference)
