"""The outline refinement's flood, one window per connected piece of the undecided band.

:func:`grainhabit.plugins.segment.foreground.foreground` floods the Sobel gradient magnitude from two
markers (grain, background) inside a thin band around every outline. A flood never leaves the
connected piece of the band it starts in, so each piece can be flooded on its own, in its bounding
box, and the gradient computed there only (with one pixel of real neighbours on every side cut out of
the frame, so that the 3x3 operator sees the same pixels). Over a 2048 px frame with ~150 grains
this avoids the whole-frame gradient and the whole-frame padding, raveling and marker scan of
scikit-image's watershed; the result equals the whole-frame flood (tests/test_segment_speed.py).

A frame has about 150 such pieces, and most of the cost of ``skimage.segmentation.watershed`` on one
of them is its argument checks and paddings, not the flood. :func:`watershed_window` builds the
padded arrays that function builds (float64 image, int8 mask, int32 labels, one pixel of zeros
around) and hands them to the same compiled flood scikit-image calls; it falls back to the public
function where that routine is missing or refuses the arguments. Same routine, same arrays: the same
labels (tests/test_band_flood_direct.py compares the two).

References
----------
.. [1] F. Meyer and S. Beucher, "Morphological segmentation", J. Visual
   Commun. Image Represent. 1(1), 21-46, 1990, doi:10.1016/1047-3203(90)90014-M
.. [2] I. Sobel and G. Feldman, "A 3x3 isotropic gradient operator for image
   processing", 1968 (as implemented by ``skimage.filters.sobel``; from memory)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

_CROSS = ndi.generate_binary_structure(2, 1)

try:  # the compiled flood behind skimage.segmentation.watershed (checked against it in the tests)
    from skimage.segmentation._watershed_cy import watershed_raveled as _flood_raveled
except ImportError:  # pragma: no cover - another scikit-image layout: the public function is used
    _flood_raveled = None


def watershed_window(gradient: np.ndarray, seeds: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """``skimage.segmentation.watershed(gradient, seeds, mask=mask)`` (connectivity 1) for a small window.

    Parameters
    ----------
    gradient : ndarray of float, shape (h, w)
        The relief flooded.
    seeds : ndarray of int32, shape (h, w)
        Marker labels, 0 elsewhere; zero outside ``mask``.
    mask : ndarray of bool, shape (h, w)
        Where the flood may run.

    Returns
    -------
    ndarray of int32, shape (h, w)
        The labels scikit-image's watershed gives.

    Notes
    -----
    scikit-image pads its float64 image, int8 mask and labels with one pixel of zeros, lists the
    nonzero labels in raster order, and floods with the neighbour offsets ``(-W, -1, 1, W)`` (``W``
    the padded width, its 4-neighbourhood in its own order), compactness 0 and no watershed line.
    The same arrays are built here in one step each and passed to the same routine.
    """
    seeds = np.asarray(seeds)
    if _flood_raveled is None or seeds.dtype != np.int32:
        from skimage.segmentation import watershed

        return watershed(gradient, seeds, mask=mask)
    h, w = gradient.shape
    big_w = w + 2
    relief = np.zeros((h + 2, big_w), np.float64)
    relief[1:-1, 1:-1] = gradient
    allowed = np.zeros((h + 2, big_w), np.int8)
    allowed[1:-1, 1:-1] = mask
    out = np.zeros((h + 2, big_w), np.int32)
    out[1:-1, 1:-1] = seeds
    try:
        _flood_raveled(relief.ravel(), np.flatnonzero(out), np.array([-big_w, -1, 1, big_w], np.intp),
                       allowed.ravel(), np.array([big_w, 1], np.intp), 0.0, out.ravel(), False)
    except (TypeError, ValueError):  # pragma: no cover - the routine's signature changed: the public function
        from skimage.segmentation import watershed

        return watershed(gradient, seeds, mask=mask)
    return out[1:-1, 1:-1]


#: The two 3x3 kernels of ``skimage.filters.sobel`` (the edge weights [1, 0, -1] along one axis times the
#: smoothing weights [1, 2, 1] / 4 along the other), built as scikit-image builds them.
_SOBEL_KERNELS = (np.reshape([1, 0, -1], (3, 1)) * np.reshape(np.array([1, 2, 1]) / 4, (1, 3)),
                  np.reshape([1, 0, -1], (1, 3)) * np.reshape(np.array([1, 2, 1]) / 4, (3, 1)))


def sobel_magnitude(image: np.ndarray) -> np.ndarray:
    """``skimage.filters.sobel(image)`` of a 2-D float32 or float64 array, without its per-call set-up.

    Parameters
    ----------
    image : ndarray of float32 or float64, shape (h, w)

    Returns
    -------
    ndarray, same shape and dtype
        ``sqrt((G0**2 + G1**2) / 2)`` as scikit-image computes it: each ``G`` from
        ``scipy.ndimage.convolve`` with reflect borders, squared in place and summed in the same
        order, the root divided by ``sqrt(2)`` in the image's precision. The outline refinement asks
        for it ~150 times per frame on small windows, where scikit-image's argument handling costs
        more than the two convolutions (equal bit for bit, tests/test_foreground_exact.py). Other
        dtypes go to scikit-image.
    """
    if image.ndim != 2 or image.dtype not in (np.float32, np.float64):
        from skimage.filters import sobel

        return sobel(image)
    out = ndi.convolve(image, _SOBEL_KERNELS[0], mode="reflect", cval=0.0)
    out *= out
    g = ndi.convolve(image, _SOBEL_KERNELS[1], mode="reflect", cval=0.0)
    g *= g
    out += g
    np.sqrt(out, out=out)
    out /= np.sqrt(2, dtype=out.dtype)
    return out


#: Above this many boxes :func:`box_clusters` is not used (its overlap table grows with the square).
MAX_CLUSTER_BOXES = 3000


def box_clusters(boxes: list, grow: int, shape: tuple) -> list[list[int]] | None:
    """Groups of boxes that overlap or touch once each is grown by ``grow`` pixels on every side.

    Parameters
    ----------
    boxes : list of tuple of slice or None
        Boxes (``scipy.ndimage.find_objects`` order); None entries are left out.
    grow : int
        Pixels added on every side (clipped to the frame).
    shape : tuple of int
        The frame's shape.

    Returns
    -------
    list of list of int or None
        Indices into ``boxes``, one list per group (connected through pairs of grown boxes that overlap
        or share an edge); None when there are more than :data:`MAX_CLUSTER_BOXES` boxes.
    """
    from scipy.sparse import csr_matrix
    from scipy.sparse.csgraph import connected_components

    idx = [i for i, b in enumerate(boxes) if b is not None]
    if len(idx) > MAX_CLUSTER_BOXES:
        return None
    if not idx:
        return []
    rows, cols = shape
    y0 = np.array([max(boxes[i][0].start - grow, 0) for i in idx])
    y1 = np.array([min(boxes[i][0].stop + grow, rows) for i in idx])
    x0 = np.array([max(boxes[i][1].start - grow, 0) for i in idx])
    x1 = np.array([min(boxes[i][1].stop + grow, cols) for i in idx])
    # overlapping or sharing an edge: the boxes grown by one more pixel overlap
    near = ((y0[:, None] <= y1[None, :]) & (y0[None, :] <= y1[:, None])
            & (x0[:, None] <= x1[None, :]) & (x0[None, :] <= x1[:, None]))
    n, group = connected_components(csr_matrix(near), directed=False)
    order = np.argsort(group, kind="stable")
    cuts = np.flatnonzero(np.diff(group[order])) + 1
    return [[idx[int(k)] for k in part] for part in np.split(order, cuts)]


def flood_band(image: np.ndarray, markers: np.ndarray, band: np.ndarray, label: int = 2,
               boxes: list | None = None, reach: int | None = None) -> np.ndarray:
    """Pixels of ``band`` that the marker-controlled watershed gives to ``label``.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        The frame; the flood runs on its Sobel gradient magnitude.
    markers : ndarray of int, shape (rows, cols)
        Marker labels (0: to be flooded).
    band : ndarray of bool, shape (rows, cols)
        Where the flood may run (markers outside it are ignored).
    label : int
        The marker label asked for.

    boxes : list of tuple of slice, optional
        Boxes of objects (e.g. the grains' components) with every pixel of ``band`` within ``reach``
        pixels of one of them: the band is then flooded cluster by cluster (:func:`box_clusters`)
        without labelling its pieces. Where a pixel of the band lies outside every box so grown, the
        pieces are labelled after all.
    reach : int, optional
        See ``boxes``.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        ``watershed(sobel(image), np.where(band, markers, 0), mask=band) == label``
        (scikit-image, connectivity 1).

    Notes
    -----
    A flood never leaves the 4-connected piece of the band it starts in, and the pixels of one piece are
    taken from the queue in the same order whatever other pieces are flooded in the same call (the
    queue orders them by relief and then by the order they were put in, and a piece's pixels are put
    in by its own pixels only). So the pieces can be flooded one window each (their boxes from one
    labelling of the band), or several in one window. With ``boxes``, a window is the box of a cluster
    of boxes grown by ``reach`` (overlapping or touching; grown by one more pixel for the 3x3
    gradient), its mask the band within the cluster's grown boxes: a band pixel there is within
    ``reach`` of a box of the cluster, and of no box of another cluster (the two grown boxes would
    touch), so each piece is flooded whole, in one window only (tests/test_split_kernels_exact.py).
    """
    rows, cols = band.shape
    if boxes is not None and reach is not None:
        out = _flood_clusters(image, markers, band, label, boxes, int(reach))
        if out is not None:
            return out
    out = np.zeros(band.shape, bool)
    pieces, _ = ndi.label(band, structure=_CROSS)
    for j, box in enumerate(ndi.find_objects(pieces), start=1):
        if box is None:
            continue
        y0, y1 = max(box[0].start - 1, 0), min(box[0].stop + 1, rows)
        x0, x1 = max(box[1].start - 1, 0), min(box[1].stop + 1, cols)
        win = (slice(y0, y1), slice(x0, x1))
        _flood_window(image, markers, pieces[win] == j, win, label, out)
    return out


def _flood_window(image: np.ndarray, markers: np.ndarray, own: np.ndarray, win: tuple, label: int,
                  out: np.ndarray) -> None:
    """Flood one window's band pixels ``own`` from its markers; set ``out`` where ``label`` won."""
    seeds = np.where(own, markers[win], 0)
    if not (seeds == label).any():
        return
    flooded = watershed_window(sobel_magnitude(image[win]), seeds.astype(np.int32, copy=False), own)
    out[win] |= flooded == label


def _flood_clusters(image: np.ndarray, markers: np.ndarray, band: np.ndarray, label: int, boxes: list,
                    reach: int) -> np.ndarray | None:
    """:func:`flood_band` window by window over clusters of grown boxes; None where that does not apply."""
    rows, cols = band.shape
    clusters = box_clusters(boxes, reach, band.shape)
    if clusters is None:
        return None
    grown = [None if b is None else (max(b[0].start - reach, 0), min(b[0].stop + reach, rows),
                                     max(b[1].start - reach, 0), min(b[1].stop + reach, cols)) for b in boxes]
    covered = np.zeros(band.shape, bool)
    for g in grown:
        if g is not None:
            covered[g[0]:g[1], g[2]:g[3]] = True
    if np.count_nonzero(band) != np.count_nonzero(band & covered):
        return None  # a band pixel beyond every grown box: the pieces are labelled instead
    out = np.zeros(band.shape, bool)
    for members in clusters:
        ys0, ys1, xs0, xs1 = (min(grown[i][0] for i in members), max(grown[i][1] for i in members),
                              min(grown[i][2] for i in members), max(grown[i][3] for i in members))
        # one pixel of real neighbours round the cluster's grown boxes (the 3x3 gradient)
        y0, y1, x0, x1 = max(ys0 - 1, 0), min(ys1 + 1, rows), max(xs0 - 1, 0), min(xs1 + 1, cols)
        win = (slice(y0, y1), slice(x0, x1))
        if len(members) == 1:
            own = np.zeros((y1 - y0, x1 - x0), bool)
            own[ys0 - y0:ys1 - y0, xs0 - x0:xs1 - x0] = True
        else:
            own = np.zeros((y1 - y0, x1 - x0), bool)
            for i in members:
                g = grown[i]
                own[g[0] - y0:g[1] - y0, g[2] - x0:g[3] - x0] = True
        own &= band[win]
        _flood_window(image, markers, own, win, label, out)
    return out
