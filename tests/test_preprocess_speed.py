"""Faster kernels of flatten-background against the slower references they replace.

References: numpy.linalg.lstsq (an SVD least-squares solver) for the surface fit, and
scipy.ndimage.gaussian_filter for the banded Gaussian. Frames are made here (invented data).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.preprocess import flatten_background as pp


@pytest.mark.parametrize("shape,n_terms", [((64, 64), 6), ((64, 90), 3), ((8, 8), 1), ((100, 70), 6)])
def test_least_squares_equals_lstsq(shape, n_terms):
    # reference: numpy.linalg.lstsq on the same polynomial design, a random subset of rows
    rng = np.random.default_rng(5)
    a = pp._poly_design(shape)[:, :n_terms]
    z = rng.normal(size=a.shape[0]) + a @ rng.normal(size=n_terms)
    keep = rng.uniform(size=a.shape[0]) > 0.4
    got = pp.least_squares(a[keep], z[keep])
    ref = np.linalg.lstsq(a[keep], z[keep], rcond=None)[0]
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-10)


def test_least_squares_singular_design_falls_back_to_lstsq():
    # every point at one place: the Gram matrix of [1, x] is singular; lstsq's minimum-norm answer
    a = np.column_stack([np.ones(10), np.full(10, 0.5)])
    z = np.full(10, 2.0)
    np.testing.assert_allclose(pp.least_squares(a, z), np.linalg.lstsq(a, z, rcond=None)[0], atol=1e-12)


@pytest.mark.parametrize("shape,sigma", [((700, 130), 1.0), ((33, 3000), 2.0), ((9, 9000), 1.0)])
def test_banded_gaussian_equals_scipy_over_many_bands(shape, sigma):
    # reference library: scipy.ndimage.gaussian_filter, mode="nearest"; frames of many bands and of one
    img = np.random.default_rng(6).uniform(0, 1, shape).astype(np.float32)
    got = pp.gaussian_nearest(img, sigma)
    ref = ndi.gaussian_filter(img.astype(np.float64), sigma, mode="nearest")
    np.testing.assert_allclose(got, ref, atol=2e-6, rtol=0)
