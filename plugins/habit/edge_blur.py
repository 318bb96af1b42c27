"""The blur of a frame's grain edges, and the corner rounding it causes in their outlines.

A step edge of height H blurred by a Gaussian of standard deviation ``sigma`` and
then differentiated at scale ``s`` (a Gaussian derivative filter) has a peak gradient
of ``H / sqrt(2 pi (sigma^2 + s^2))``. The ratio of the peak gradients at two scales
s1 < s2 does not depend on H:

    R = sqrt((sigma^2 + s2^2) / (sigma^2 + s1^2)),  so  sigma^2 = (s2^2 - R^2 s1^2) / (R^2 - 1).

:func:`edge_blur_px` measures R on the outlines of a frame's grains (the median over
their edge pixels: every grain of a frame is blurred alike, by the focus of that
frame) and returns ``sigma``.

Thresholding a blurred corner at half height rounds it. For a right-angled corner
blurred by ``sigma`` the image is ``Phi(x / sigma) Phi(y / sigma)`` (Phi the normal
distribution function), whose half-height line crosses the corner's bisector where
``Phi(t / sigma)^2 = 1 / 2``, at ``t = 0.545 sigma`` from each edge line, i.e.
``0.77 sigma`` from the sharp corner. A circular arc tangent to both edges that
recedes as far has the radius ``0.77 sigma / (sqrt 2 - 1) = 1.86 sigma``
(:data:`CORNER_RADIUS_PER_SIGMA`; derived here, from the normal distribution and
the geometry of the right angle).

References
----------
.. [1] T. Lindeberg, "Edge detection and ridge detection with automatic scale
   selection", Int. J. Computer Vision 30(2), 117-156, 1998 (the response of
   Gaussian derivative filters to a blurred step edge, and its scale dependence).
"""
from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

__all__ = ["CORNER_RADIUS_PER_SIGMA", "SCALES_PX", "edge_blur_px", "corner_radius_px"]

#: Radius of the rounding that thresholding at half height gives a right-angled corner
#: blurred by a Gaussian of unit standard deviation (see the module docstring).
CORNER_RADIUS_PER_SIGMA = 0.77 / (math.sqrt(2.0) - 1.0)

#: The two scales (pixels) of the Gaussian derivative filters.
SCALES_PX = (1.5, 3.0)

#: Grains whose edges are read at most (the blur is one number per frame).
MAX_GRAINS = 6

#: Least number of edge pixels for an estimate.
MIN_EDGE_PIXELS = 200


def _peak_ratio(crop: np.ndarray, edge: np.ndarray) -> np.ndarray:
    """Ratio of the peak gradient magnitudes at the two scales on the edge pixels of one crop."""
    s1, s2 = SCALES_PX
    g1 = ndi.maximum_filter(ndi.gaussian_gradient_magnitude(crop, s1, truncate=3.0), size=3)
    g2 = ndi.maximum_filter(ndi.gaussian_gradient_magnitude(crop, s2, truncate=3.0), size=3)
    a, b = g1[edge], g2[edge]
    strong = b > 0.5 * np.median(b) if b.size else b.astype(bool)
    return a[strong] / np.maximum(b[strong], 1e-12)


def edge_blur_px(image, labels, max_grains: int = MAX_GRAINS, outlines=None) -> float:
    """Standard deviation (pixels) of the Gaussian blur of a frame's grain edges.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        The frame's signal (any polarity: the gradient magnitude does not depend on it).
    labels : ndarray of int, shape (rows, cols)
        Grain labels (0 background).
    max_grains : int
        The edges of at most this many grains are read (those nearest the median size).
    outlines : sequence of (label, ndarray (k, 2)), optional
        Outlines (x = column + 0.5, y = row + 0.5 at pixel centres) of the grains, where the
        caller has them: their boxes are taken from them instead of a pass over the label image.

    Returns
    -------
    float
        The blur sigma from the median two-scale peak-gradient ratio of the grains' edge
        pixels (see the module docstring); 0 where the edges are sharper than the smaller
        scale resolves, NaN where the frame has fewer than :data:`MIN_EDGE_PIXELS` edge pixels.
    """
    lab = np.asarray(labels)
    img = np.asarray(image)
    if lab.shape != img.shape or lab.size == 0:
        return float("nan")
    if outlines is None:
        boxes = [(k + 1, (o[0].start, o[0].stop, o[1].start, o[1].stop))
                 for k, o in enumerate(ndi.find_objects(lab)) if o is not None]
    else:
        boxes = []
        for k, c in outlines:
            c = np.asarray(c, float)
            if len(c):
                boxes.append((int(k), (int(np.floor(c[:, 1].min())), int(np.ceil(c[:, 1].max())) + 1,
                                       int(np.floor(c[:, 0].min())), int(np.ceil(c[:, 0].max())) + 1)))
    # the grains nearest the median size: every grain of a frame is blurred alike, and the largest
    # would only cost more
    area = np.array([(b[1] - b[0]) * (b[3] - b[2]) for _, b in boxes], float)
    order = np.argsort(np.abs(area - np.median(area)), kind="stable") if area.size else []
    boxes = [boxes[j] for j in order]
    pad = int(math.ceil(3 * SCALES_PX[1])) + 2
    ratios = []
    for k, (a0, a1, b0, b1) in boxes[:max_grains]:
        r0, r1 = max(a0 - pad, 0), min(a1 + pad, lab.shape[0])
        c0, c1 = max(b0 - pad, 0), min(b1 + pad, lab.shape[1])
        crop = lab[r0:r1, c0:c1]
        m = crop == k
        edge = m & ~ndi.binary_erosion(m)
        # only the grain's own edges facing the background, not its cut to a neighbour
        edge &= ~ndi.binary_dilation((crop != k) & (crop != 0), iterations=3)
        if edge.sum() < 8:
            continue
        ratios.append(_peak_ratio(np.asarray(img[r0:r1, c0:c1], float), edge))
    if not ratios:
        return float("nan")
    r = np.concatenate(ratios)
    if r.size < MIN_EDGE_PIXELS:
        return float("nan")
    big = float(np.median(r))
    s1, s2 = SCALES_PX
    if not big > 1.0:
        return float("nan")
    var = (s2 ** 2 - big ** 2 * s1 ** 2) / (big ** 2 - 1.0)
    return float(math.sqrt(max(var, 0.0)))


def corner_radius_px(sigma_px: float, least_px: float) -> float:
    """Corner radius (pixels) the models are rounded to: ``CORNER_RADIUS_PER_SIGMA`` sigma, at least ``least_px``.

    Parameters
    ----------
    sigma_px : float
        Edge blur of the frame (:func:`edge_blur_px`); NaN leaves ``least_px``.
    least_px : float
        classify-habit's ``corner_radius_px`` (the rounding of a sharp frame's outlines by
        pixel digitisation and the outline's smoothing).

    Returns
    -------
    float
    """
    if not np.isfinite(sigma_px):
        return float(least_px)
    return float(max(least_px, CORNER_RADIUS_PER_SIGMA * sigma_px))
