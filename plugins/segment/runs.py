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


#: Below this many pixels :func:`label` and :func:`label_with_boxes` leave the labelling to scipy (its
#: call costs less than the run bookkeeping on small crops).
RUNS_MIN_PIXELS = 1 << 14


def row_runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The runs of True pixels along the rows of a mask, in row-major order.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)

    Returns
    -------
    rows, starts, stops : ndarray of int64, shape (k,)
        Run ``i`` covers columns ``starts[i] .. stops[i] - 1`` of row ``rows[i]``; the runs are ordered
        by row, then column (the order of their pixels in ``numpy.flatnonzero(mask)``).

    Notes
    -----
    One copy of the mask with a zero column after each row, so no run crosses a row's end, and one
    comparison of neighbouring bytes: the changes alternate between the starts and the ends of runs.
    """
    m = np.asarray(mask, bool)
    n_rows, cols = m.shape
    buf = np.zeros((n_rows, cols + 1), np.int8)
    buf[:, :cols] = m
    flat = buf.ravel()
    change = np.flatnonzero(flat[1:] != flat[:-1]) + 1
    if flat.size and flat[0]:
        change = np.r_[0, change]
    first, last = change[0::2], change[1::2]
    rows = first // (cols + 1)
    return rows, first - rows * (cols + 1), last - rows * (cols + 1)


def connect_runs(rows: np.ndarray, starts: np.ndarray, stops: np.ndarray, cols: int,
                 eight: bool = True) -> tuple[np.ndarray, int]:
    """Connected components of a mask's runs (:func:`row_runs`), numbered as ``scipy.ndimage.label`` numbers them.

    Parameters
    ----------
    rows, starts, stops : ndarray of int
        The runs, in row-major order.
    cols : int
        Width of the mask.
    eight : bool
        8-connectivity (``structure=np.ones((3, 3))``); False: 4-connectivity (scipy's default).

    Returns
    -------
    labels : ndarray of int32, shape (k,)
        The component of every run, 1..n in the row-major order of the components' first pixels (the
        order of their first runs), which is scipy's numbering.
    n : int

    Notes
    -----
    Two runs of neighbouring rows touch when their column ranges, each grown by one pixel for
    8-connectivity, overlap. The runs of the row above that touch a run form one contiguous range in
    row-major order, found by two binary searches over keys ``row * (cols + 2) + column``; the
    components of the graph of touching runs come from ``scipy.sparse.csgraph.connected_components``.
    """
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    k = rows.size
    if k == 0:
        return np.zeros(0, np.int32), 0
    width = int(cols) + 2
    grow = 1 if eight else 0
    base = (rows - 1) * width
    lo = np.searchsorted(rows * width + stops, base + starts - grow, side="right")
    hi = np.searchsorted(rows * width + starts, base + stops + grow, side="left")
    count = np.maximum(hi - lo, 0)
    total = int(count.sum())
    below = np.repeat(np.arange(k), count)
    above = np.repeat(lo - (np.cumsum(count) - count), count) + np.arange(total)
    graph = coo_matrix((np.ones(total, np.int8), (above, below)), shape=(k, k))
    n, comp = connected_components(graph, directed=False)
    first = np.full(n, k, np.int64)
    np.minimum.at(first, comp, np.arange(k))
    number = np.empty(n, np.int32)
    number[np.argsort(first, kind="stable")] = np.arange(1, n + 1, dtype=np.int32)
    return number[comp], int(n)


def run_pixels(rows: np.ndarray, starts: np.ndarray, stops: np.ndarray, cols: int) -> np.ndarray:
    """Flat (row-major) indices of the runs' pixels: ``numpy.flatnonzero`` of the mask they came from."""
    lengths = stops - starts
    first = rows * int(cols) + starts
    return np.repeat(first - (np.cumsum(lengths) - lengths), lengths) + np.arange(int(lengths.sum()))


def paint_runs(shape: tuple, rows: np.ndarray, starts: np.ndarray, stops: np.ndarray,
               values: np.ndarray) -> np.ndarray:
    """An int32 image holding ``values[i]`` on the pixels of run ``i`` and 0 elsewhere."""
    out = np.zeros(int(shape[0]) * int(shape[1]), np.int32)
    out[run_pixels(rows, starts, stops, shape[1])] = np.repeat(np.asarray(values, np.int32), stops - starts)
    return out.reshape(shape)


def run_boxes(rows: np.ndarray, starts: np.ndarray, stops: np.ndarray, labels: np.ndarray, n: int) -> list:
    """``scipy.ndimage.find_objects`` of the labelled runs: the bounding box of every label 1..n.

    Returns
    -------
    list of tuple of slice
        Entry ``i - 1``: ``(slice(first_row, last_row + 1), slice(first_col, last_col + 1))`` of label
        ``i`` (every label 1..n has a run).
    """
    if n == 0:
        return []
    order = np.argsort(labels, kind="stable")
    lab = labels[order]
    group = np.flatnonzero(np.r_[True, lab[1:] != lab[:-1]])
    r = rows[order]
    r0 = r[group].tolist()  # runs in row-major order: a label's first run lies in its first row
    r1 = np.maximum.reduceat(r, group).tolist()
    c0 = np.minimum.reduceat(starts[order], group).tolist()
    c1 = np.maximum.reduceat(stops[order], group).tolist()
    return [(slice(a, b + 1), slice(c, d)) for a, b, c, d in zip(r0, r1, c0, c1)]


def label(mask: np.ndarray, eight: bool = True) -> tuple[np.ndarray, int]:
    """``scipy.ndimage.label(mask, structure)`` of a 2-D mask, from its runs along the rows.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
    eight : bool
        8-connectivity (``structure=np.ones((3, 3))``); False: scipy's default 4-connectivity.

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
    n : int
        The same labels and count as scipy (tests/test_seg9_kernels_exact.py): about 3x cheaper on a
        2048 px frame of grains, whose ~5e5 pixels form ~1e4 runs. Masks of fewer than
        :data:`RUNS_MIN_PIXELS` pixels go to scipy.
    """
    labels, n, _ = _label(mask, eight, False)
    return labels, n


def label_with_boxes(mask: np.ndarray, eight: bool = True) -> tuple[np.ndarray, int, list]:
    """:func:`label` and ``scipy.ndimage.find_objects`` of the labels (boxes from the runs, no pass over the frame)."""
    return _label(mask, eight, True)


def _label(mask, eight, boxes):
    from scipy import ndimage as ndi

    m = np.asarray(mask, bool)
    if m.ndim != 2 or m.size < RUNS_MIN_PIXELS:
        lab, n = ndi.label(m, structure=np.ones((3, 3), bool) if eight else None)
        return lab, int(n), (ndi.find_objects(lab) if boxes else None)
    rows, starts, stops = row_runs(m)
    run_labels, n = connect_runs(rows, starts, stops, m.shape[1], eight)
    lab = paint_runs(m.shape, rows, starts, stops, run_labels)
    return lab, n, (run_boxes(rows, starts, stops, run_labels, n) if boxes else None)


def maxima_by_label(values: np.ndarray, labels: np.ndarray, n: int) -> np.ndarray:
    """``scipy.ndimage.maximum(values, labels, index=np.arange(1, n + 1))`` for float images.

    Parameters
    ----------
    values : ndarray of float, shape (h, w)
    labels : ndarray of int, shape (h, w)
    n : int
        Labels 1..n are asked for.

    Returns
    -------
    ndarray, shape (n,), dtype of ``values``
        The largest value of each label; 0 for a label without pixels (as scipy). scipy sorts the labels of
        every pixel for it (its ``_select``); here the labelled pixels are reduced run by run
        (:func:`labelled_maxima`). Integer images and values with NaN go to scipy
        (tests/test_seg9_kernels_exact.py).
    """
    from scipy import ndimage as ndi

    v = np.asarray(values)
    lab = np.asarray(labels)
    if v.dtype.kind != "f" or v.shape != lab.shape or n < 1:
        return ndi.maximum(v, lab, index=np.arange(1, n + 1))
    at = np.flatnonzero((lab > 0) & (lab <= n))
    own = lab.ravel()[at]
    vals = v.ravel()[at]
    if np.isnan(vals).any():
        return ndi.maximum(v, lab, index=np.arange(1, n + 1))
    out = labelled_maxima(vals, own, n)[1:]
    out[np.bincount(own, minlength=n + 1)[1:] == 0] = 0
    return out
