"""Polarity of a micrograph from the shape of its outlines: which side of the edges is convex.

Grains are compact convex bodies (or made of convex parts): along their
outline the grain side is the convex side, whatever covers most of the frame.
The earlier test, "the histogram's main mode is the background and the grains
make the heavier tail", fails when the grains cover more of the frame than the
background does (packed spheres, large crystals, cubes in a close group); the
outline test does not depend on areas.

At every strong edge pixel the second derivative of the (Gaussian-smoothed)
intensity along the isophote tangent,

    I_tt = (I_xx I_y^2 - 2 I_xy I_x I_y + I_yy I_x^2) / (I_x^2 + I_y^2),

is negative when the isophote bends round the bright side (a bright convex
body: moving along the tangent leaves the body and the intensity drops) and
positive round a dark one [1]_. Each edge pixel (the top
:data:`EDGE_FRACTION` of the gradient magnitude) casts one vote,
``sign(-I_tt)``; votes of two scales are averaged. Counting signs rather than
summing magnitudes keeps a few very strong drawn marks (letters, scale bars)
and the sharp corners of gaps between packed grains from deciding.

On the 357 EMPS training micrographs (B. Yildirim and J. M. Cole, J. Chem.
Inf. Model. 61 (2021) 1136; polarity taken as the sign of the median inside
the hand-drawn masks minus the median around them) this vote was wrong on 16
frames, the histogram-tail test on 79 (measured for this module). Where the
vote is weak, :mod:`grainhabit.plugins.preprocess.plateau_edges` counts again
the edges between two plateaus alone.

References
----------
.. [1] J. J. Koenderink and A. J. van Doorn, "Representation of local geometry
   in the visual system", Biol. Cybern. 55, 367-375, 1987,
   doi:10.1007/BF00318371 (isophote curvature from Gaussian derivatives)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import kth_smallest

#: Gaussian scales (px of the working copy) of the derivatives; votes of both are averaged.
SCALES_PX = (4.0, 8.0)
#: Fraction of pixels with the largest gradient magnitude that vote.
EDGE_FRACTION = 0.10
#: Frames are block-averaged to at most this many pixels per side before voting (speed; the
#: outlines of grains of 10 px and more survive).
MAX_SIDE_PX = 1024


def tangent_second_derivative(image: np.ndarray, sigma: float) -> tuple[np.ndarray, np.ndarray]:
    """Second derivative along the isophote and gradient magnitude at one Gaussian scale.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    sigma : float
        Gaussian scale in pixels.

    Returns
    -------
    itt : ndarray of float32
        ``(I_xx I_y^2 - 2 I_xy I_x I_y + I_yy I_x^2) / |grad I|^2``; equals
        ``-kappa |grad I|`` with ``kappa`` the curvature of the isophote,
        positive when it bends round the brighter side.
    grad : ndarray of float32
        ``|grad I|``.

    Notes
    -----
    One Gaussian smoothing, then central differences (:func:`numpy.gradient`)
    for the first and second derivatives: five times cheaper than five
    Gaussian derivative filters, and the same to well under a percent once
    ``sigma`` is a few pixels.
    """
    iy, ix, g2 = smoothed_gradient(image, sigma)
    iyy, iyx = np.gradient(iy)
    ixx = np.gradient(ix, axis=1)
    return _tangent_term(ixx, iyx, iyy, ix, iy, g2), np.sqrt(g2)


def smoothed_gradient(image: np.ndarray, sigma: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``I_y``, ``I_x`` and ``I_x^2 + I_y^2`` of the Gaussian-smoothed image (float32), as
    :func:`tangent_second_derivative` computes them."""
    g = ndi.gaussian_filter(np.asarray(image, np.float32), sigma)
    iy, ix = np.gradient(g)
    return iy, ix, ix * ix + iy * iy


def _tangent_term(ixx, iyx, iyy, ix, iy, g2):
    """``(I_xx I_y^2 - 2 I_xy I_x I_y + I_yy I_x^2) / max(|grad I|^2, 1e-30)``, element by element."""
    return (ixx * iy * iy - 2.0 * iyx * ix * iy + iyy * ix * ix) / np.maximum(g2, 1e-30)


def gradient_at(f: np.ndarray, at: np.ndarray, axis: int) -> np.ndarray:
    """``numpy.gradient(f, axis=axis).ravel()[at]`` (unit spacing, first-order edges), at chosen pixels only.

    Parameters
    ----------
    f : ndarray of float, shape (rows, cols)
        At least 2 samples along ``axis``.
    at : ndarray of int
        Flat (row-major) indices of the pixels asked for.
    axis : {0, 1}

    Returns
    -------
    ndarray, dtype of ``f``, shape (len(at),)
        ``(f[i + 1] - f[i - 1]) / 2`` inside, ``f[1] - f[0]`` and ``f[-1] - f[-2]`` (divided by the unit
        spacing) at the two ends: numpy's own arithmetic in ``f``'s dtype, so the same values
        (tests/test_prepspeed_exact.py).
    """
    rows, cols = f.shape
    flat = f.ravel()
    pos, n, step = (at // cols, rows, cols) if axis == 0 else (at % cols, cols, 1)
    hi = np.where(pos < n - 1, at + step, at)
    lo = np.where(pos > 0, at - step, at)
    spacing = np.where((pos > 0) & (pos < n - 1), f.dtype.type(2.0), f.dtype.type(1.0))
    return (flat[hi] - flat[lo]) / spacing


def block_mean(image: np.ndarray, f: int) -> np.ndarray:
    """Mean of ``f x f`` blocks (the last partial row and column of blocks dropped), in float32.

    For ``f = 2`` (frames of 1025-2048 px per side, and the halved copy of every frame) the four
    pixels of a block are added as numpy's ``mean(axis=(1, 3))`` of the float32 blocks adds them, by
    shifted slices (:func:`block_mean_pairs`: the same bits, several times cheaper than numpy's reduction
    over two axes of length 2); other ``f`` take numpy's mean.
    """
    if f <= 1:
        return np.asarray(image, np.float32)
    rows, cols = (image.shape[0] // f) * f, (image.shape[1] // f) * f
    if f == 2:
        return block_mean_pairs(np.asarray(image[:rows, :cols], np.float32))
    return np.asarray(image[:rows, :cols], np.float32).reshape(rows // f, f, cols // f, f).mean(axis=(1, 3))


def block_mean_pairs(x: np.ndarray) -> np.ndarray:
    """``x.reshape(r // 2, 2, c // 2, 2).mean(axis=(1, 3))`` of a float32 array of even sides, bit for bit.

    Parameters
    ----------
    x : ndarray of float32, shape (r, c), r and c even

    Returns
    -------
    ndarray of float32, shape (r // 2, c // 2)
        ``((a + b) + (c + d)) + 0`` divided by 4, with ``a b`` the block's upper pixels and ``c d`` its
        lower ones: numpy reduces the contiguous axis first (each row's pair), then the two rows, in the
        float32 accumulator of a float32 mean; its sum starts from +0, so a block of four negative zeros
        gives +0 (the ``+ 0``). Division by 4 is exact. Checked against numpy in
        tests/test_seg9_kernels_exact.py.
    """
    pairs = np.add(x[:, 0::2], x[:, 1::2])  # a + b in every row
    out = np.add(pairs[0::2], pairs[1::2])
    out += np.float32(0.0)
    out /= np.float32(4.0)
    return out


def convex_side_vote(image: np.ndarray, scales=SCALES_PX, edge_fraction: float = EDGE_FRACTION) -> float:
    """Mean vote of the strong edges for the bright side being convex.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Any intensities (raw or denoised).
    scales : sequence of float
        Gaussian scales in pixels of the working copy (the frame block-averaged
        to at most :data:`MAX_SIDE_PX` per side). A scale of 8 px or more is
        taken on a copy halved again, at half the scale (the same
        scale-space level, a quarter of the work).
    edge_fraction : float
        Fraction of pixels (largest gradient) that vote.

    Returns
    -------
    float
        In [-1, 1]: +1 when every edge bends round its bright side (bright
        grains), -1 round its dark side (dark grains); 0 for a flat frame.
    """
    def tangent_vote(arr: np.ndarray, sigma: float) -> float | None:
        iy, ix, g2 = smoothed_gradient(arr, sigma)
        grad = np.sqrt(g2)
        t = kth_smallest(grad, int((1.0 - edge_fraction) * (grad.size - 1)))  # np.partition's value
        edge = (grad >= t) & (grad > 0)
        if not edge.any():
            return None
        # the second derivatives at the voting pixels only (a tenth of them): tangent_second_derivative(arr,
        # sigma)[0][edge], the same values in the same order (tests/test_prepspeed_exact.py)
        at = np.flatnonzero(edge)
        itt = _tangent_term(gradient_at(ix, at, 1), gradient_at(iy, at, 1), gradient_at(iy, at, 0),
                            ix.ravel()[at], iy.ravel()[at], g2.ravel()[at])
        return float(np.mean(np.sign(-itt)))

    return multiscale_vote(image, scales, tangent_vote)


def multiscale_vote(image: np.ndarray, scales, vote_at) -> float:
    """Mean over Gaussian scales of a per-scale edge vote, on a block-averaged working copy.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Any intensities.
    scales : sequence of float
        Scales in pixels of the working copy (the frame block-averaged to at
        most :data:`MAX_SIDE_PX` per side); a scale of 8 px or more is taken on
        a copy halved again, at half the scale (the same scale-space level, a
        quarter of the work).
    vote_at : callable
        ``vote_at(copy, sigma)``: the vote in [-1, 1] at one scale, or None
        when the scale has no edges to count.

    Returns
    -------
    float
        The mean of the votes; 0 for a flat frame or when no scale votes.
    """
    arr = block_mean(np.asarray(image), int(np.ceil(max(np.shape(image)) / MAX_SIDE_PX)))
    if arr.size == 0 or float(arr.max()) == float(arr.min()):
        return 0.0
    half = None
    votes = []
    for s in scales:
        if s >= 8 and min(arr.shape) >= 32:
            half = block_mean(arr, 2) if half is None else half
            v = vote_at(half, s / 2.0)
        else:
            v = vote_at(arr, s)
        if v is not None:
            votes.append(v)
    return float(np.mean(votes)) if votes else 0.0


def detect_polarity(image: np.ndarray) -> tuple[str, float]:
    """Whether grains are brighter or darker than their surroundings.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Frame, any intensity units (denoised or not).

    Returns
    -------
    polarity : {"bright", "dark"}
    confidence : float
        ``|vote|`` of :func:`convex_side_vote`, in [0, 1] (about 0.5 for a
        clear frame of well-separated grains; near 0 when the outlines bend
        both ways alike).
    """
    vote = convex_side_vote(image)
    return ("bright" if vote >= 0 else "dark"), abs(vote)
