"""Dividing lines between grains that do not touch: the discrete Voronoi diagram of the grain cores.

References
----------
.. [4] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for
   computing exact Euclidean distance transforms of binary images in
   arbitrary dimensions", IEEE Trans. Pattern Anal. Mach. Intell. 25(2),
   265-270, 2003, doi:10.1109/TPAMI.2003.1177156 (the algorithm of
   scipy.ndimage.distance_transform_edt, from memory)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: Components of the thresholded mask smaller than this (pixels) are specks, not grains kept apart.
GAP_MIN_AREA_PX = 20
#: Inside the thresholded mask a gap line reaches at most this far (px) from the nearest grain core.
GAP_REACH_PX = 4.0
_EIGHT = np.ones((3, 3), bool)


def gap_lines(mask: np.ndarray, cores: np.ndarray, reach_px: float = GAP_REACH_PX,
              min_area_px: int = GAP_MIN_AREA_PX) -> np.ndarray:
    """Pixels on the dividing lines between grains that do not touch.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
        Thresholded frame (before any closing).
    cores : ndarray of bool, shape (rows, cols)
        Pixels well above the background (``image > gap_level``), a subset
        of ``mask``.
    reach_px : float
        Inside ``mask`` a line is kept only up to this distance (px) from
        the nearest core: a gap up to about twice as wide that the noise
        threshold filled.
    min_area_px : int
        Components smaller than this (pixels; noise specks next to a grain)
        take no part.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        Pixels outside every core where the nearest body (Euclidean
        distance) changes between 4-neighbours: the lines of the discrete
        Voronoi diagram of the bodies, two pixels wide, so they also cut
        8-connected paths. The bodies are the connected cores and the
        components of ``mask`` that hold no core (faint grains).

    Notes
    -----
    A closing bridges a gap narrower than its diameter, and the outline
    refinement has no background seed in it; the noise threshold, a few
    background sigmas up, fills a gap of a few pixels between two blurred
    grains by itself. The bright cores of two such grains stay apart, and
    the pixels between them, dimmer than ``gap_level``, are background
    that the blur lifted. The closing is kept off these lines and the
    refinement floods the background from them, so grains that do not touch
    stay apart; facet lines that notch a grain from its outline are still
    bridged, and a dark facet line across a grain (blurred, it keeps most
    of the grain level) never drops below ``gap_level``. The nearest body
    comes from the Euclidean distance transform with feature indices [4]_.
    """
    cores = cores & mask
    comp, n = ndi.label(cores, structure=_EIGHT)
    faint, n_faint = ndi.label(mask, structure=_EIGHT)
    if n + n_faint < 2:
        return np.zeros(mask.shape, bool)
    # components of the mask without a core are bodies of their own
    has_core = np.zeros(n_faint + 1, bool)
    has_core[np.unique(faint[cores])] = True
    has_core[0] = True  # the background is no body
    faint = np.where(has_core[faint], 0, faint + n)
    bodies = np.where(cores, comp, faint)
    area = np.bincount(bodies.ravel())
    keep = area >= min_area_px
    keep[0] = False
    if keep.sum() < 2:
        return np.zeros(mask.shape, bool)
    bodies = np.where(keep[bodies], bodies, 0)
    dist, (ri, ci) = ndi.distance_transform_edt(bodies == 0, return_indices=True)
    nearest = bodies[ri, ci]
    out = np.zeros(mask.shape, bool)
    down = nearest[1:, :] != nearest[:-1, :]
    right = nearest[:, 1:] != nearest[:, :-1]
    out[1:, :] |= down
    out[:-1, :] |= down
    out[:, 1:] |= right
    out[:, :-1] |= right
    return out & (dist > 0) & (~mask | (dist <= reach_px))
