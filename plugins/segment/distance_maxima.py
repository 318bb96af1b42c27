"""h-maxima of a Euclidean distance map, with one sort of small whole-number ranks.

The splitting of touching grains seeds its distance-map floods from the h-maxima of the distance map
(:func:`grainhabit.plugins.segment.touching._distance_floods`), five values of h per shape.
``skimage.morphology.h_maxima`` [1]_ reconstructs ``image - h`` under ``image`` by dilation
(``skimage.morphology.reconstruction``) and keeps the pixels where the residue is h or more. Its
reconstruction sorts the seed and mask values together twice (``numpy.argsort`` of twice the padded
image, once for the order of the pixels, once more in ``rank_order`` for their ranks), which is most
of its cost on the small boxes of a component.

A Euclidean distance map holds few distinct values: every value is the square root of a whole number
(the squared distance to the nearest background pixel; ``scipy.ndimage.distance_transform_edt``
takes the square root of a sum of squared whole-number offsets, correctly rounded). So the ranks of
the seed and mask values come from the few distinct values (a count of the squared distances and one
sort of a few hundred numbers), and the pixels are ordered by a stable sort of those whole-number
ranks (a radix sort). The same arrays then go to the compiled reconstruction loop scikit-image itself
calls, so the reconstruction and the residue are the same numbers: the reconstruction by dilation is
one well-defined image, whatever order equal values are visited in (tests/test_split_kernels_exact.py
checks the result equal to ``skimage.morphology.h_maxima`` pixel for pixel, ties included).

References
----------
.. [1] P. Soille, "Morphological Image Analysis: Principles and Applications", 2nd edition, Springer,
   2003, chapter 6 (regional extrema, h-maxima, reconstruction by dilation); as implemented by
   scikit-image's ``h_maxima`` and ``reconstruction``.
.. [2] L. Vincent, "Morphological grayscale reconstruction in image analysis: applications and
   efficient algorithms", IEEE Trans. Image Process. 2(2), 176-201, 1993, doi:10.1109/83.217222
"""

from __future__ import annotations

import numpy as np

try:  # the compiled loop behind skimage.morphology.reconstruction (checked against h_maxima in the tests)
    from skimage.morphology._grayreconstruct import reconstruction_loop as _reconstruction_loop
except ImportError:  # pragma: no cover - another scikit-image layout: the public function is used
    _reconstruction_loop = None

#: The 8 neighbours of a pixel (scikit-image's default footprint, a 3x3 square less its centre), in
#: the order scikit-image lists them.
_NEIGHBOURS = [(dr, dc) for dr in (-1, 0, 1) for dc in (-1, 0, 1) if (dr, dc) != (0, 0)]


def squared_distances(dist: np.ndarray) -> np.ndarray | None:
    """The whole numbers whose square roots a distance map holds, or None if it is no such map.

    Parameters
    ----------
    dist : ndarray of float64
        A Euclidean distance map (``scipy.ndimage.distance_transform_edt``).

    Returns
    -------
    ndarray of int64 or None
        ``k`` with ``sqrt(k) == dist`` exactly at every pixel; None where that fails.
    """
    if dist.dtype != np.float64 or dist.size == 0:
        return None
    top = float(dist.max())
    if not (np.isfinite(top) and float(dist.min()) >= 0.0 and top < 2.0 ** 20):
        return None
    k = np.rint(dist * dist).astype(np.int64)
    if not np.array_equal(np.sqrt(k), dist):
        return None
    return k


def distance_h_maxima(dist: np.ndarray, h: float, squared: np.ndarray | None = None) -> np.ndarray:
    """``skimage.morphology.h_maxima(dist, h)`` for a 2-D Euclidean distance map.

    Parameters
    ----------
    dist : ndarray of float64, shape (rows, cols)
        A Euclidean distance map: every value the square root of a whole number. Other images go to
        scikit-image's function.
    h : float
        Smallest height of a maximum (> 0).
    squared : ndarray of int64, optional
        :func:`squared_distances` of ``dist``, if already worked out (several h over one map).

    Returns
    -------
    ndarray of uint8, shape (rows, cols)
        1 on the maxima of height ``h`` or more (and the global maxima), 0 elsewhere: the same pixels
        as scikit-image's function.

    Notes
    -----
    As scikit-image does: the seed is ``dist - h - 2 * res * |dist|`` (``res`` the float64
    resolution, 1e-15), both images are padded by one pixel of the seed's minimum, the seed is
    reconstructed by dilation under ``dist`` (8-neighbours) and the pixels where ``dist`` less the
    reconstruction is at least ``h`` are kept. Only the ranks and the order of the pixels are found
    differently (see the module's notes).
    """
    dist = np.asarray(dist)
    k = squared if squared is not None else squared_distances(dist)
    if _reconstruction_loop is None or dist.ndim != 2 or k is None or h <= 0:
        from skimage.morphology import h_maxima

        return h_maxima(dist, h)
    if h > np.ptp(dist):
        return np.zeros(dist.shape, np.uint8)
    # the distinct values of the mask (dist) and of the seed, as scikit-image computes the seed
    present = np.flatnonzero(np.bincount(k.ravel()))
    mask_values = np.sqrt(present)  # the same float64 numbers as dist holds
    resolution = 2 * np.finfo(np.float64).resolution * np.abs(mask_values)
    seed_values = mask_values - h - resolution
    values = np.unique(np.concatenate([mask_values, seed_values]))  # rank_order's value map
    lut_mask = np.zeros(present[-1] + 1, np.int64)
    lut_seed = np.zeros(present[-1] + 1, np.int64)
    lut_mask[present] = np.searchsorted(values, mask_values)
    lut_seed[present] = np.searchsorted(values, seed_values)
    pad_rank = int(lut_seed[present].min())  # the seed's minimum, scikit-image's padding value
    rows, cols = dist.shape
    ranks = np.full((2, rows + 2, cols + 2), pad_rank, np.int64)
    ranks[0, 1:-1, 1:-1] = lut_seed[k]
    ranks[1, 1:-1, 1:-1] = lut_mask[k]
    isize = ranks.size
    signed = np.result_type(np.min_scalar_type(-isize), np.int32)
    unsigned = np.dtype(signed.char.upper())
    flat = ranks.reshape(-1)
    small = flat.astype(np.uint16) if values.size <= 65535 else flat  # a radix sort for 16-bit ranks
    # highest rank first, as scikit-image's reversed argsort (the order among equal ranks does not change
    # the reconstruction)
    order = np.argsort(small, kind="stable")[::-1].astype(signed)
    prev = np.full(isize, -1, signed)
    nxt = np.full(isize, -1, signed)
    prev[order[1:]] = order[:-1]
    nxt[order[:-1]] = order[1:]
    width = cols + 2
    strides = np.array([dr * width + dc for dr, dc in _NEIGHBOURS], signed)
    value_rank = flat.astype(unsigned)
    image_stride = (rows + 2) * width
    try:
        _reconstruction_loop(value_rank, prev, nxt, strides, order[0], image_stride)
    except (TypeError, ValueError):  # pragma: no cover - the routine's signature changed: the public function
        from skimage.morphology import h_maxima

        return h_maxima(dist, h)
    rec = values[value_rank[:image_stride]].reshape(rows + 2, width)[1:-1, 1:-1]
    return ((dist - rec) >= h).astype(np.uint8)
