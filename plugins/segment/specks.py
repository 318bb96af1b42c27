"""Specks: small objects that do not stand out of the texture around them.

A rough substrate, a grainy support film or the amplified noise of a dark,
vignetted corner makes small blobs a few noise sds above the frame's
background. Taken one by one they pass a frame-wide threshold, yet each is
no brighter than its own neighbourhood is rough. A real grain, however
small, stands well above its surroundings. So a small object is judged
against the pixels around it, not against a size limit (which would lose
real small grains, wanted down to about 8 px ECD):

    contrast = (mean of the object - median of its ring) / (1.4826 MAD of its ring)

with the ring the pixels between :data:`RING_GAP_PX` and
``max(RING_MIN_PX, RING_FACTOR * ECD)`` px from the object that belong to no
foreground object (the median absolute deviation, scaled to a normal sd,
common practice). An object of ECD below :data:`SMALL_ECD_PX` whose contrast
is below :data:`MIN_CONTRAST` is a speck. The ring's robust sd measures the
local texture and noise together, so the rule follows a dark corner, a rough
patch and a clean area alike.

The threshold is a signal-detection margin: for pure Gaussian noise the mean
of ``n`` independent pixels has sd ``sigma / sqrt(n)``, so a blob of noise
averages well under one sigma; texture correlated over the blob's size
averages up to a couple of sigmas. :data:`MIN_CONTRAST` sits above that.
Below :data:`COMPACT_MIN_ECD_PX` the margin grows as ``1 / ECD``
(:func:`least_contrast`: 8 sds at 5 px, 10 at 4 px), as the noise of a mean
over ``n ~ ECD^2`` pixels does: the smaller an object, the more blobs of
texture of its size a frame holds and the higher the highest of them rise.
On the EMPS training pictures (segment-grains 2.14, the smallest grain
lowered from 6 to 4 px ECD at the same time) objects of 4-6 px on hand-masked
particles stood a median 18 ring sds up, those off them 6.5; the 1 / ECD
margin keeps 48 of 54 of the former and 131 of 418 of the latter, and on the
Tescan 10000x survey file of ``../shared/realdata`` 213 of its 228 crystals
under 6 px (their 5th percentile 8.3 sds).

A compact object (convex: solidity at least :data:`COMPACT_SOLIDITY`) of
:data:`COMPACT_MIN_ECD_PX` or more needs only :data:`COMPACT_MIN_CONTRAST`:
texture that rises a few sds over a patch of that size breaks up into
ragged shapes, where a particle is a convex body. Streaks along the scan
lines (SEM charging, drift) inflate the ring's spread without making specks:
on such a frame (EMPS 482193653a; B. Yildirim, J. M. Cole, J. Chem. Inf.
Model. 61 (2021) 1136) round particles of 10-14 px stood 3-4 ring sds up and
were all dropped by the single threshold. On the 357 EMPS training pictures
the compact rule finds 48 particles more for 12 false grains more.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import robust_sd
from grainhabit.plugins.segment.hull_fill import hull_pixel_count

#: Objects with an equivalent circle diameter below this (px) are judged; larger ones are never specks.
SMALL_ECD_PX = 24.0
#: Least contrast (object mean above the ring's median, in the ring's robust sds) of a small object.
MIN_CONTRAST = 4.0
#: The ring starts this far (px) from the object (its blurred edge left out).
RING_GAP_PX = 2.0
#: The ring reaches this many ECDs from the object, and at least RING_MIN_PX.
RING_FACTOR = 1.5
RING_MIN_PX = 6.0
#: Fewest ring pixels for a judgement (a small object packed among others is kept).
MIN_RING_PIXELS = 24
#: A compact small object (solidity at least COMPACT_SOLIDITY, ECD at least COMPACT_MIN_ECD_PX) needs this contrast.
COMPACT_MIN_CONTRAST = 3.0
COMPACT_SOLIDITY = 0.9
COMPACT_MIN_ECD_PX = 10.0


def local_contrast(part: np.ndarray, box: tuple, image: np.ndarray, occupied: np.ndarray) -> float:
    """Contrast of an object against the ring of free pixels around it.

    Parameters
    ----------
    part : ndarray of bool
        The object within ``box``.
    box : tuple of slice
        Where ``part`` lies in ``image``.
    image : ndarray, shape (rows, cols)
        Preprocessed frame (grains bright).
    occupied : ndarray of bool, shape of ``image``
        Foreground pixels (objects); left out of the ring.

    Returns
    -------
    float
        ``(mean(object) - median(ring)) / (1.4826 MAD(ring))``; infinity
        when the ring has fewer than :data:`MIN_RING_PIXELS` pixels or no
        spread.
    """
    area = int(part.sum())
    ecd = np.sqrt(4.0 * area / np.pi)
    reach = max(RING_MIN_PX, RING_FACTOR * ecd)
    pad = int(np.ceil(reach)) + 1
    r0, r1 = max(box[0].start - pad, 0), min(box[0].stop + pad, image.shape[0])
    c0, c1 = max(box[1].start - pad, 0), min(box[1].stop + pad, image.shape[1])
    obj = np.zeros((r1 - r0, c1 - c0), bool)
    obj[box[0].start - r0:box[0].stop - r0, box[1].start - c0:box[1].stop - c0] = part
    d = ndi.distance_transform_edt(~obj)
    ring = (d > RING_GAP_PX) & (d <= reach) & ~occupied[r0:r1, c0:c1]
    if ring.sum() < MIN_RING_PIXELS:
        return float("inf")
    win = image[r0:r1, c0:c1]
    med, sd = robust_sd(win[ring])
    if sd <= 0:
        return float("inf")
    return (float(win[obj].mean()) - med) / sd


def least_contrast(ecd: float) -> float:
    """Contrast (ring sds) a small object of equivalent circle diameter ``ecd`` (px) needs to be no speck.

    :data:`MIN_CONTRAST` from :data:`COMPACT_MIN_ECD_PX` up; below it the margin grows as ``1 / ecd``,
    as the noise of an object's mean does (its sd is the pixels' sd over the square root of its area):
    ``MIN_CONTRAST * COMPACT_MIN_ECD_PX / ecd``, 8 sds at 5 px, 10 at 4 px.

    >>> least_contrast(20.0), least_contrast(5.0)
    (4.0, 8.0)
    """
    return MIN_CONTRAST * max(1.0, COMPACT_MIN_ECD_PX / max(float(ecd), 1e-9))


def is_speck(part: np.ndarray, box: tuple, image: np.ndarray, occupied: np.ndarray) -> bool:
    """Whether a small object is a speck of texture (see the module docstring)."""
    ecd = np.sqrt(4.0 * float(part.sum()) / np.pi)
    if ecd >= SMALL_ECD_PX:
        return False
    contrast = local_contrast(part, box, image, occupied)
    if contrast >= least_contrast(ecd):
        return False
    if contrast < COMPACT_MIN_CONTRAST or ecd < COMPACT_MIN_ECD_PX:
        return True
    return solidity(part) < COMPACT_SOLIDITY


def solidity(part: np.ndarray) -> float:
    """Pixels of ``part`` over the pixels of its convex hull (ISO 9276-6 solidity, on the pixel grid)."""
    return float(np.count_nonzero(part)) / max(float(hull_pixel_count(part)), 1.0)


def drop_specks(parts: list, box: tuple, image: np.ndarray, occupied: np.ndarray) -> list:
    """The objects of ``parts`` (masks within ``box``) that are not specks."""
    return [q for q in parts if not is_speck(q, box, image, occupied)]
