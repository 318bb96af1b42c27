"""Sub-pixel outlines of every labelled grain at once (a helper of measure and habit).

The outline of a grain is the marching-squares contour at level 0.5 of its
mask, which passes through the middles of the pixel edges between grain and
not-grain, with 8-connected grain pixels kept together (the vertices of
``skimage.measure.find_contours(mask, 0.5, fully_connected="high")`` [1]_),
here traced for all grains of a label image at once by following the cracks
between pixels. A smoothed version (cyclic Savitzky-Golay [2]_ over
``window`` vertices) is also returned.

References
----------
.. [1] W. E. Lorensen, H. E. Cline, "Marching cubes: a high resolution 3D
   surface construction algorithm", SIGGRAPH Computer Graphics 21(4),
   163-169, 1987. DOI: 10.1145/37402.37422
.. [2] A. Savitzky, M. J. E. Golay, "Smoothing and differentiation of data by
   simplified least squares procedures", Anal. Chem. 36(8), 1627-1639, 1964.
"""

from __future__ import annotations

import threading

import numpy as np


def check_labels(labels, image=None, pixel_size_nm=1.0):
    """The label image as an array; ValueError naming what is wrong (shape, dtype, negative labels, pixel size)."""
    lab = np.asarray(labels)
    if lab.ndim != 2:
        raise ValueError(f"labels must be 2-D, got shape {lab.shape}")
    if not np.issubdtype(lab.dtype, np.integer):
        raise ValueError(f"labels must be an integer array, got dtype {lab.dtype}")
    if lab.size and lab.min() < 0:
        raise ValueError(f"labels must be >= 0, got minimum {lab.min()}")
    if image is not None and np.shape(image) != lab.shape:
        raise ValueError(f"image shape {np.shape(image)} differs from labels shape {lab.shape}")
    if not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise ValueError(f"pixel_size_nm must be a positive number, got {pixel_size_nm!r}")
    return lab


# crack directions k: 0 +x (next column), 1 +y (next row), 2 -x, 3 -y
_DROW = np.array([0, 1, 0, -1])
_DCOL = np.array([1, 0, -1, 0])


def _trace_cracks(labels):
    """Every boundary crack of every label, with its successor along the outline.

    A crack is a pair (pixel p of label L, direction k) whose neighbour
    p + dir_k is not L; its contour vertex is the crack's midpoint, where
    marching squares at level 0.5 on L's mask puts it. The successor is the
    next crack met walking along the outline with the grain on the left in
    (x, y) axes (positive shoelace area for an outer boundary), with grain
    pixels 8-connected.

    Returns
    -------
    succ : ndarray of intp, shape (N,)
        Index of each crack's successor.
    lab : ndarray, shape (N,)
        Label of each crack.
    x, y : ndarray of float64, shape (N,)
        Crack midpoints in pixel units (pixel centres at index + 0.5).
    k : ndarray of int, shape (N,)
        Direction of each crack from its grain pixel (0 +x, 1 +y, 2 -x, 3 -y).
    """
    lab = np.asarray(labels)
    rows_o, cols_o = lab.shape
    flat_o = lab.ravel()
    # cracks are coded on the frame padded by one background pixel all round (pixel index of the
    # padded frame times 4 plus the direction); the padded frame itself is never built: its pixels
    # are read from the frame where they lie inside it, 0 on the border
    width = cols_o + 2
    step = np.array([1, width, -1, -width])

    def padded_at(idx):
        r, c = np.divmod(idx, width)
        inside = (r >= 1) & (r <= rows_o) & (c >= 1) & (c <= cols_o)
        return np.where(inside, flat_o[np.where(inside, (r - 1) * cols_o + (c - 1), 0)], 0)

    # neighbour pairs inside the frame that differ (full-frame passes), then which pixel of each pair
    # is a grain pixel (gathers at the pairs only, which lie along outlines); grain pixels on the
    # frame's edge meet the background border
    h_diff = np.flatnonzero(lab[:, :-1] != lab[:, 1:])     # (r, c) differs from (r, c + 1)
    hr, hc = np.divmod(h_diff, max(cols_o - 1, 1))
    h_left = hr * cols_o + hc                                # frame index of (r, c)
    h_pad = (hr + 1) * width + hc + 1                        # padded index of (r, c)
    v_diff = np.flatnonzero(lab[:-1, :] != lab[1:, :])     # (r, c) differs from (r + 1, c)
    vr, vc = np.divmod(v_diff, cols_o)
    v_pad = (vr + 1) * width + vc + 1
    edge_r = np.arange(rows_o)
    edge_c = np.arange(cols_o)
    first_col = edge_r[lab[:, 0] != 0]
    last_col = edge_r[lab[:, -1] != 0]
    first_row = edge_c[lab[0, :] != 0]
    last_row = edge_c[lab[-1, :] != 0]
    found = [
        h_pad[flat_o[h_left] != 0] * 4 + 0,
        (last_col + 1) * width * 4 + cols_o * 4 + 0,
        v_pad[flat_o[v_diff] != 0] * 4 + 1,
        (rows_o * width + last_row + 1) * 4 + 1,
        (h_pad[flat_o[h_left + 1] != 0] + 1) * 4 + 2,
        ((first_col + 1) * width + 1) * 4 + 2,
        (v_pad[flat_o[v_diff + cols_o] != 0] + width) * 4 + 3,
        (width + first_row + 1) * 4 + 3,
    ]
    crack = np.sort(np.concatenate(found))
    p, k = np.divmod(crack, 4)
    L = padded_at(p)
    # walking direction t: the grain (on the -dir_k side) lies to its left
    tk = (k + 1) % 4
    ahead = p + step[tk]
    diag = ahead + step[k]
    in_diag = padded_at(diag) == L
    in_ahead = padded_at(ahead) == L
    # turn outwards if the diagonal pixel is L (8-connected), else go
    # straight if the pixel ahead is L, else turn inwards round p
    nxt_pix = np.where(in_diag, diag, np.where(in_ahead, ahead, p))
    nxt_k = np.where(in_diag, (tk + 2) % 4, np.where(in_ahead, k, tk))
    succ = np.searchsorted(crack, nxt_pix * 4 + nxt_k)
    rows, cols = np.divmod(p, width)
    x = cols - 0.5 + 0.5 * _DCOL[k]
    y = rows - 0.5 + 0.5 * _DROW[k]
    return succ, L, x, y, k


def _rank_cycles(succ):
    """Cycle id (smallest member) and position from it, by pointer jumping."""
    n = len(succ)
    root = np.arange(n)
    nxt = succ.copy()
    span = 1
    while span < n:
        # root covers the 2*span members starting at each crack after this
        root = np.minimum(root, root[nxt])
        nxt = nxt[nxt]
        span *= 2
        if np.array_equal(root[succ], root):
            break
    # cut each cycle before its root and rank by list ranking (Wyllie's pointer jumping): every list
    # ends in one extra node n that points to itself with distance 0, so each pass updates all members
    # at once (adding 0 and staying at n where a member has reached the end)
    is_root = root == np.arange(n)
    cur = np.append(np.where(is_root[succ], n, succ), n)
    dist = (cur != n).astype(np.intp)
    while True:
        if not (cur != n).any():
            break
        dist = dist + dist[cur]
        cur = cur[cur]
    return root, dist[:n]


class Outlines:
    """Outer outlines of all labels of a label image, stored end to end.

    Attributes
    ----------
    xy : ndarray of float64, shape (N, 2)
        Vertices (x, y) in pixel units, pixel centres at index + 0.5; the
        outline of label i + 1 is ``xy[offsets[i]:offsets[i + 1]]``, in order
        with positive signed area.
    offsets : ndarray of intp, shape (n + 1,)
    raw_xy : ndarray of float64, shape (N, 2)
        The same vertices before smoothing (midpoints of the boundary pixel
        edges), same offsets.
    raw_area : ndarray of float64, shape (n,)
        Area enclosed by the unsmoothed outline (pixel count - 1/2 for a
        simply connected grain).
    pixel_xy : ndarray of float64, shape (N, 2)
        Centre of the grain pixel on the inner side of each raw vertex
        (same offsets; a pixel repeats once per boundary edge).
    """

    def __init__(self, xy, offsets, raw_xy, raw_area, pixel_xy):
        self.xy = xy
        self.offsets = offsets
        self.raw_xy = raw_xy
        self.raw_area = raw_area
        self.pixel_xy = pixel_xy

    def __len__(self):
        return len(self.offsets) - 1

    def __getitem__(self, i):
        return self.xy[self.offsets[i]:self.offsets[i + 1]]

    def as_list(self):
        """The outlines as a list of (m_i, 2) arrays (views)."""
        return [self[i] for i in range(len(self))]


def trace_outlines(labels, n_labels=None, window=9):
    """Sub-pixel outer outline of every label, all labels at once.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains.
    n_labels : int, optional
        n (default ``labels.max()``); absent labels get empty outlines.
    window : int
        Smoothing window in vertices (see
        :func:`grainhabit.plugins.measure.outline.smooth_closed_contour`, order 2); 0 or 1
        keeps the marching-squares vertices.

    Returns
    -------
    Outlines

    Notes
    -----
    The vertices are those of ``skimage.measure.find_contours(mask, 0.5,
    fully_connected="high")`` on each label's mask padded with background:
    the midpoints of the pixel edges between the label and anything else.
    They are found and ordered for all labels together: every boundary
    crack gets its successor from its 2 x 2 neighbourhood, then pointer
    jumping finds each closed outline and the order along it (about
    log2(outline length) array passes). Per label the outline of largest
    signed area is kept (the outer boundary; holes run the other way round
    and are dropped, as are smaller pieces of a label in several parts).
    Smoothing is a cyclic Savitzky-Golay filter along each outline, applied
    to outlines longer than the window.
    """
    lab = check_labels(labels)
    n = int(lab.max()) if n_labels is None and lab.size else int(n_labels or 0)
    if n == 0 or not np.any(lab):
        return Outlines(np.empty((0, 2)), np.zeros(n + 1, dtype=np.intp), np.empty((0, 2)),
                        np.zeros(n), np.empty((0, 2)))
    xy, offsets, raw_area, pix = _LAST_TRACE.get(lab, n)
    smooth = _smooth_all(xy, offsets, int(window)) if window > 1 else xy
    return Outlines(smooth, offsets, xy, raw_area, pix)


def _raw_outlines(lab, n):
    """The unsmoothed part of :func:`trace_outlines`: raw vertices, offsets, raw areas, pixel centres."""
    succ, L, x, y, kdir = _trace_cracks(lab)
    root, dist = _rank_cycles(succ)
    # signed area of each cycle (shoelace over successor pairs)
    cross = x * y[succ] - x[succ] * y
    cyc_area = np.bincount(root, cross, minlength=len(succ)) * 0.5
    roots = np.flatnonzero(root == np.arange(len(succ)))
    # per label, the cycle of largest signed area
    order = np.lexsort((cyc_area[roots], L[roots]))
    r_sorted = roots[order]
    lab_sorted = L[r_sorted]
    last = np.ones(len(r_sorted), dtype=bool)
    last[:-1] = lab_sorted[1:] != lab_sorted[:-1]
    keep_root = r_sorted[last]
    keep = np.zeros(len(succ), dtype=bool)
    keep[keep_root] = True
    members = np.flatnonzero(keep[root])
    length = np.bincount(root[members], minlength=len(succ))
    # order the kept cracks by label, then along the outline from the root
    pos = length[root[members]] - 1 - dist[members]
    seq = members[np.lexsort((pos, L[members]))]
    counts = np.bincount(L[seq], minlength=n + 1)[1:n + 1]
    offsets = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(counts, out=offsets[1:])
    xy = np.stack([x[seq], y[seq]], axis=1)
    # centres of the boundary pixels, in outline order (repeats where a
    # pixel has several boundary edges)
    pix = xy - 0.5 * np.stack([_DCOL[kdir[seq]], _DROW[kdir[seq]]], axis=1)
    raw_area = np.zeros(n)
    raw_area[L[keep_root] - 1] = cyc_area[keep_root]
    return xy, offsets, raw_area, pix


class _TraceMemo:
    """The last label image traced and its raw outlines, handed out again for an equal label image.

    measure-grains and classify-habit trace the same label image one after the other (with
    different smoothing windows); the crack tracing is about 25-35 ms on a 2048 px frame. The
    memo keeps a private copy of the last label image (up to :attr:`MAX_PIXELS`) and answers
    only for an array of the same shape, data type, label count and every value equal (checked
    in full, so an array changed in place is traced again), with fresh copies of the stored
    results: a caller cannot change what the next caller gets. The answer is therefore the one
    a new trace gives, bit for bit; the memo carries no state that could change a result.
    """

    #: Label images above this many pixels are traced every time (the copy would be large).
    MAX_PIXELS = 1 << 23

    def __init__(self):
        self.labels = None
        self.n = -1
        self.result = None
        self.lock = threading.Lock()

    def matches(self, lab, n) -> bool:
        """Whether ``lab`` and ``n`` equal the stored label image and label count."""
        held = self.labels
        if held is None or n != self.n or held.shape != lab.shape or held.dtype != lab.dtype:
            return False
        step = max(1, lab.size // 4096)
        if not np.array_equal(held.ravel()[::step], lab.ravel()[::step]):   # a cheap look first
            return False
        return bool(np.array_equal(held, lab))

    def get(self, lab, n):
        """Raw outlines of ``lab`` (:func:`_raw_outlines`), from the memo where it holds them.

        Reading and replacing the memo hold a lock (a worker may run frame tasks in several
        threads); the trace itself runs outside it.
        """
        with self.lock:
            if self.matches(lab, n):
                return tuple(a.copy() for a in self.result)
        result = _raw_outlines(lab, n)
        keep = lab.size <= self.MAX_PIXELS
        copied = (np.array(lab, copy=True), tuple(a.copy() for a in result)) if keep else (None, None)
        with self.lock:
            self.labels, self.result = copied
            self.n = n if keep else -1
        return result


#: One memo per process.
_LAST_TRACE = _TraceMemo()


def _smooth_all(xy, offsets, window, order=2):
    """Cyclic Savitzky-Golay smoothing of every outline at once.

    Each outline is extended by ``window // 2`` vertices wrapped from its
    other end, the whole end-to-end array is convolved once per
    coordinate, and the valid part of each outline is taken back; outlines
    with no more vertices than the window are left as they are.
    """
    if window % 2 == 0 or window <= order:
        raise ValueError(f"contour window must be odd and greater than {order}, got {window}")
    coef = savgol_coefficients(window, order)
    h = window // 2
    counts = np.diff(offsets)
    n = len(counts)
    ext_counts = counts + 2 * h
    ext_off = np.zeros(n + 1, dtype=np.intp)
    np.cumsum(ext_counts, out=ext_off[1:])
    gid = np.repeat(np.arange(n), ext_counts)
    local = np.arange(int(ext_off[-1])) - ext_off[:-1][gid] - h
    src = offsets[:-1][gid] + local % np.maximum(counts[gid], 1)
    ext = xy[np.minimum(src, max(len(xy) - 1, 0))]
    out = xy.copy()
    if len(ext) < window:
        return out
    conv = np.stack([np.convolve(ext[:, j], coef[::-1], mode="valid") for j in range(2)], axis=1)
    # conv[i] is the window centred on ext[i + h]
    centre = np.arange(len(xy)) - offsets[:-1][np.repeat(np.arange(n), counts)]
    pos = ext_off[:-1][np.repeat(np.arange(n), counts)] + centre
    smooth = np.repeat(counts > window, counts)
    out[smooth] = conv[pos[smooth]]
    return out


def grain_contours(labels, n_labels=None, window=9):
    """Sub-pixel outer outline of every label, as a list.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, 1..n grains.
    n_labels : int, optional
        n (default ``labels.max()``).
    window : int
        Smoothing window in vertices; 0 or 1 keeps the raw contour.

    Returns
    -------
    list of ndarray, shape (m_i, 2)
        Outline of label i + 1 as (x, y) in pixel units (pixel centres at
        index + 0.5), positive signed area, first vertex not repeated;
        empty (0, 2) for an absent label. See :func:`trace_outlines`.
    """
    return trace_outlines(labels, n_labels, window).as_list()


def savgol_coefficients(window: int, order: int) -> np.ndarray:
    """Savitzky-Golay smoothing coefficients, ``scipy.signal.savgol_coeffs(window, order)`` without scipy.signal.

    Parameters
    ----------
    window : int
        Odd number of samples, greater than ``order``.
    order : int
        Degree of the local polynomial.

    Returns
    -------
    ndarray of float64, shape (window,)
        The weights that, convolved with a signal, give the value at each
        sample of the least-squares polynomial of degree ``order`` through
        the ``window`` samples around it [1]_.

    Notes
    -----
    The least-squares solution ``c`` of ``A c = e_0`` with ``A[i, j] = x_j^i``,
    ``x = (h, h - 1, ..., -h)`` (reversed for convolution) and ``h = window //
    2``, solved by ``scipy.linalg.lstsq`` with ``cond = eps * window``: the
    computation of ``scipy.signal.savgol_coeffs`` (SciPy 1.17) for the
    smoothing case, so the weights are the same bit for bit
    (``tests/test_measure_exact.py``). Importing scipy.signal brings
    scipy.stats with it, about 0.6 s of CPU in every fresh worker process;
    scipy.linalg is imported there anyway.

    References
    ----------
    .. [1] A. Savitzky, M. J. E. Golay, "Smoothing and differentiation of data
       by simplified least squares procedures", Analytical Chemistry 36(8),
       1627-1639, 1964. DOI: 10.1021/ac60214a047
    """
    from scipy.linalg import lstsq

    window, order = int(window), int(order)
    if window % 2 == 0 or not 0 <= order < window:
        raise ValueError(f"window must be odd and greater than order={order}, got {window}")
    h = window // 2
    x = np.flip(np.arange(-h, window - h, dtype=np.float64))
    a = x ** np.arange(order + 1, dtype=np.float64).reshape(-1, 1)
    y = np.zeros(order + 1, dtype=np.float64)
    y[0] = 1.0
    coef, _, _, _ = lstsq(a, y, cond=np.finfo(np.float64).eps * max(a.shape))
    return coef
