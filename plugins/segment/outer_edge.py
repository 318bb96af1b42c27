"""Outlines drawn to the outer edge of the blur, as hand-drawn masks are.

segment-grains places every outline at the half-height point of the edge (the
ridge of the gradient magnitude): for a step edge blurred by a symmetric point
spread function that point is the edge itself, so the pixel count of a grain is
an unbiased estimate of its projected area (handbook optics: a symmetric
blur of a step crosses half the step height at the step). People who outline
particles by hand draw along the outer edge of the visible blur instead. On
the EMPS training masks (real micrographs, hand-drawn instance masks) the
first pixel ring inside a mask's boundary has a median level of 0.18 of its
particle's level, where the half-height outline's ring has 0.50 (medians over
the matched pairs of every fourth picture), and the masks' equivalent circle
diameters are a median 8 % larger than the half-height outlines'.

:func:`grow_to_level` moves outlines outward to that convention: a grain takes
the background pixels next to it whose level is at least ``level`` times its
mean level, one pixel ring at a time for ``reach_px`` rings, each pixel going to
the nearest grain (so two grains never merge). Choose it where the sizes are to
be compared with hand measurements or hand-drawn masks; keep the half-height
outlines for calibrated projected areas.
"""

from __future__ import annotations

import numpy as np
from skimage.segmentation import expand_labels

#: Fraction of a grain's mean level down to which the outer outline reaches (the median level of the
#: EMPS masks' boundary ring is 0.18, the half-height outline's 0.50; 0.3, this project's choice, stays
#: clear of background noise of 0.05-0.1 of the grain level, where 0.2 would grow into it).
OUTER_LEVEL = 0.3
#: Pixel rings an outline may move outward (the masks lie a median 1.3 px outside the half-height outline
#: in equal-area radius).
OUTER_REACH_PX = 2


def grow_to_level(image: np.ndarray, labels: np.ndarray, level: float = OUTER_LEVEL,
                  reach_px: int = OUTER_REACH_PX) -> np.ndarray:
    """Grow every grain into the neighbouring pixels at least ``level`` of its own mean level.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
        Preprocessed frame: background 0, grains about 1 (image units).
    labels : ndarray of int, shape (rows, cols)
        Grains 1..n, background 0. Not changed.
    level : float
        Fraction of the grain's mean level a pixel must reach to join it.
    reach_px : int
        Pixel rings the outline may move outward.

    Returns
    -------
    ndarray of int32, shape (rows, cols)
        The grown labels: same numbering, every grain a superset of its input
        pixels, background pixels assigned to the nearest grain only.
    """
    out = np.asarray(labels).astype(np.int32, copy=True)
    n = int(out.max()) if out.size else 0
    if n == 0 or reach_px <= 0:
        return out
    img = np.asarray(image, np.float64)
    count = np.bincount(out.ravel(), minlength=n + 1)
    total = np.bincount(out.ravel(), weights=img.ravel(), minlength=n + 1)
    mean = total / np.maximum(count, 1)
    floor = np.where(count > 0, level * np.maximum(mean, 0.0), np.inf)
    floor[0] = np.inf
    for _ in range(int(reach_px)):
        near = expand_labels(out, 1)
        add = (out == 0) & (near > 0)
        add &= img >= floor[near]
        if not add.any():
            break
        out[add] = near[add]
    return out
