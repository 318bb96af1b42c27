"""Dents in the outlines of faint grains filled from a smoother image.

An outline is drawn where the image crosses half the grain's level. For a
grain whose level stands only a few noise standard deviations above the
background (a thin plate, a grain on a defocused frame) the noise along its
edge dips under that level here and there, and the outline carries dents of
2-4 px that the habit step reads as concavities ("concave outline", "fits no
model family": a clean hexagonal plate named irregular).

:func:`fill_faint_dents` looks at every grain whose level is at most
:data:`FAINT_SNR` background standard deviations and whose inscribed radius
is :data:`MIN_RADIUS_PX` or more. On the image smoothed by a Gaussian of
:data:`SMOOTH_PX`, the dents are shallower: smoothing white noise with a
Gaussian of standard deviation ``s`` px divides its standard deviation by
``2 s sqrt(pi)`` (handbook: the filter's squared weights sum to
``1 / (4 pi s^2)``), while the half-height point of a straight edge stays where
it was (a symmetric blur of a step crosses half its height at the step). The
grain takes the pixels above half its level on that image (its level there:
the smoothing lowers a small grain's middle) that are connected to it, within
:data:`REACH_PX` of its outline, and not another grain's; its holes are
filled. It loses no pixel: drawing the whole outline again on the smoother
image also shaved the grains of real micrographs whose edges are not steps
(EMPS, ../shared/realdata: median ECD error 8.2 -> 8.4 %), where filling the
dents alone moved it to 8.1 %. A grain that would grow by more than
:data:`MAX_AREA_CHANGE` is left as it is.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import select_median
from grainhabit.plugins.segment.cut_edges import grown_box, mask_box
from grainhabit.plugins.segment.disk_morphology import dilate_disk, erode_disk
from grainhabit.plugins.segment.foreground import fill_holes

#: Grains at most this many background standard deviations above the background are looked at.
FAINT_SNR = 8.0
#: Standard deviation (px) of the Gaussian the outline is drawn on.
SMOOTH_PX = 2.0
#: Grains whose inscribed radius (px) is under this are left as they are (three smoothing sds).
MIN_RADIUS_PX = 3 * SMOOTH_PX
#: Pixels taken lie within this many px of the grain.
REACH_PX = 3.0
#: A grain that would grow by more than this share of its area is left as it is.
MAX_AREA_CHANGE = 0.15
#: Pixels more than this far (px) inside a grain count for its level.
INNER_PX = 2.0
#: Margin (px) of a grain's box: its reach and the Gaussian's support (scipy truncates at 4 sd).
MARGIN_PX = int(REACH_PX + 4 * SMOOTH_PX) + 1


def fill_faint_dents(image: np.ndarray, labels: np.ndarray, noise_sd: float,
                     boxes: list | None = None) -> tuple[np.ndarray, int]:
    """Faint grains grown into the pixels above half their level on the image smoothed by :data:`SMOOTH_PX`.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
        Preprocessed frame: background 0, grains bright (image units).
    labels : ndarray of int32, shape (rows, cols)
        Grains 1..n.
    noise_sd : float
        Standard deviation of the background (image units).
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)`` where the caller has it; it is then updated in place to
        the boxes of the labels returned (a grain only grows, into background pixels of its grown box).

    Returns
    -------
    labels : ndarray of int32
        The same grains and numbering (a new array where an outline moved).
    filled : int
        How many grains took pixels.
    """
    n = int(labels.max()) if labels.size else 0
    if n == 0 or not noise_sd > 0:
        return labels, 0
    img = np.asarray(image, np.float32)
    out = labels
    filled = 0
    for k, box in enumerate(ndi.find_objects(labels) if boxes is None else list(boxes), start=1):
        if box is None:
            continue
        grown = grown_box(box, labels.shape, MARGIN_PX)
        window = out[grown]
        own = window == k
        inner = erode_disk(own, INNER_PX, 0)
        if np.count_nonzero(inner) < 20:
            continue
        patch = img[grown]
        level = float(select_median(patch[inner]))  # np.median's number, by selection
        if level <= 0 or level > FAINT_SNR * noise_sd or not erode_disk(own, MIN_RADIUS_PX, 0).any():
            continue
        smooth = ndi.gaussian_filter(patch, SMOOTH_PX)
        # half the level the grain has on the smoothed image (a small grain's middle is lowered by the smoothing)
        free = (window == 0) | own
        above = (smooth > 0.5 * float(select_median(smooth[inner]))) & free & dilate_disk(own, REACH_PX)
        parts, count = ndi.label(above)
        if count == 0:
            continue
        overlap = np.bincount(parts[own], minlength=count + 1)
        overlap[0] = 0
        if overlap.max() == 0:
            continue
        new = fill_holes(own | (parts == int(overlap.argmax()))) & free
        area = float(np.count_nonzero(own))
        if float(np.count_nonzero(new)) - area > MAX_AREA_CHANGE * area or np.array_equal(new, own):
            continue
        if out is labels:  # the caller's labels are left as they are
            out = labels.copy()
            window = out[grown]
        window[new] = k
        filled += 1
        if boxes is not None:  # its pixels all lie in the grown box now: their box there
            boxes[k - 1] = mask_box(window == k, grown)
    return out, filled
