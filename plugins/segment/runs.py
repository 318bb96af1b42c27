"""Labelled statistics read from the runs of one label along the rows, at the labelled pixels only.

scipy's labelled statistics (``ndimage.maximum(values, labels, index)``) sort the labels of every pixel
of the image; a frame's objects cover a small share of it, and along a row the pixels of one object
come in runs. Here each run is reduced first (numpy's ``reduceat``), then the runs are gathered by
label: a few thousand runs instead of every pixel.
"""

from __future__ import annotations

import numpy as np


def labelled_maxima(values: np.ndarray, labels: np.ndarray, n: int) -> np.ndarray:
    """The largest value of every label, from the labelled pixels in row-major order.

    Parameters
    ----------
    values : ndarray, shape (k,)
        The values at the labelled pixels, in row-major (``numpy.flatnonzero``) order.
    labels : ndarray of int, shape (k,)
        Their labels, 1..n.
    n : int
        The largest label.

    Returns
    -------
    ndarray, shape (n + 1,), of the dtype of ``values`` (float64 for integers)
        Entry ``i``: ``max(values[labels == i])`` (``scipy.ndimage.maximum(image, label_image, i)``),
        -inf where label ``i`` has no pixel; entry 0 is -inf. A maximum is the same in any order, so
        the runs' maxima (``numpy.maximum.reduceat``) gathered by label (``numpy.maximum.at``) give it
        exactly (tests/test_seg9_kernels_exact.py).
    """
    values = np.asarray(values)
    dtype = values.dtype if values.dtype.kind == "f" else np.float64
    peak = np.full(n + 1, -np.inf, dtype)
    if values.size == 0:
        return peak
    labels = np.asarray(labels)
    starts = np.flatnonzero(np.r_[True, labels[1:] != labels[:-1]])
    np.maximum.at(peak, labels[starts], np.maximum.reduceat(values, starts).astype(dtype, copy=False))
    peak[0] = -np.inf
    return peak
