"""Polarity on weak votes: count only the edges that lie between two plateaus.

The convex-side vote of :mod:`grainhabit.plugins.preprocess.polarity` counts
every strong edge. A bright line drawn round a grain has two edges that vote
against each other: its outer flank bends round the bright line (a vote for
bright grains), its inner flank bends round the darker inside (a vote for dark
grains). Such lines are common: the edge brightening of secondary-electron
images makes every outline of a grain brighter than both the grain and the
substrate [1]_, and hollow or drawn outlines are lines too. Where most edges
are flanks of lines the two kinds of vote nearly cancel, the vote is weak, and
its sign is a matter of chance.

A flank of a thin line is told from the outline of a body by looking along
the gradient: past an outline the bright side stays brighter and the dark
side stays darker than the edge pixel over a distance; past the flank of a line
the bright side falls back after the line's width. :func:`plateau_vote` keeps
only the edge pixels whose profile stays on its side of the edge level at
1, 2, ..., :data:`REACH_SIGMAS` Gaussian scales on both sides (a step edge at
that scale), and casts the convex-side vote of those alone. Specks, pits and
gaps narrower than that reach drop out as well.

:func:`decide_polarity` keeps the ordinary vote, and on a weak vote
(``|vote| <`` :data:`WEAK_VOTE`) takes the plateau vote instead only when it
points the other way and is the stronger of the two. On a frame of plain step
edges both votes count the same pixels and agree, so clear frames never change.

On the 357 EMPS training micrographs (B. Yildirim and J. M. Cole, J. Chem.
Inf. Model. 61 (2021) 1136; polarity taken as the sign of the median inside
the hand-drawn masks minus the median in a ring 2-6 px around them; measured
on the raw frames for this module) the ordinary vote is wrong on 15 frames,
14 of them among the 78 with ``|vote| < 0.2``; with this decision 9 and 8
(8 frames of SEM rods, cubes and packed spheres with bright rims set right,
2 frames of one particle each set wrong). See DEVELOPERS.md, "Polarity on
weak votes".

References
----------
.. [1] J. I. Goldstein et al., *Scanning Electron Microscopy and X-Ray
   Microanalysis*, 4th ed., Springer, 2018 (the edge effect of secondary
   electrons: edges and thin features brighter than flat surfaces; from memory)
.. [2] J. J. Koenderink and A. J. van Doorn, "Representation of local geometry
   in the visual system", Biol. Cybern. 55, 367-375, 1987 (isophote curvature)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import kth_smallest
from grainhabit.plugins.preprocess.polarity import EDGE_FRACTION, SCALES_PX, convex_side_vote, multiscale_vote

#: Below this ``|vote|`` of the ordinary convex-side vote the plateau vote is consulted.
WEAK_VOTE = 0.2
#: Edge profiles are checked at 1, 2, ... this many Gaussian scales on each side of the edge.
REACH_SIGMAS = 4
#: Fewest kept edge pixels at one scale for that scale to vote.
MIN_KEPT = 10
#: The finer pair of scales (px of the working copy) of the second look: gaps between packed grains
#: narrower than the reach at the ordinary scales are plateaus at these.
FINE_SCALES_PX = (2.0, 4.0)


def _scale_vote(arr: np.ndarray, sigma: float, edge_fraction: float, reach: int) -> float | None:
    """Convex-side vote of the step edges at one Gaussian scale (None when too few are kept)."""
    g = ndi.gaussian_filter(np.asarray(arr, np.float32), sigma)
    iy, ix = np.gradient(g)
    iyy, iyx = np.gradient(iy)
    ixx = np.gradient(ix, axis=1)
    g2 = ix * ix + iy * iy
    grad = np.sqrt(g2)
    k = int((1.0 - edge_fraction) * (grad.size - 1))
    t = kth_smallest(grad, k)  # np.partition's value
    r, c = np.nonzero((grad >= t) & (grad > 0))
    if r.size < MIN_KEPT:
        return None
    uy, ux = iy[r, c] / grad[r, c], ix[r, c] / grad[r, c]
    level = g[r, c]
    keep = np.ones(r.size, bool)
    for step in range(1, int(reach) + 1):
        d = step * sigma
        up = ndi.map_coordinates(g, [r + d * uy, c + d * ux], order=1, mode="nearest")
        down = ndi.map_coordinates(g, [r - d * uy, c - d * ux], order=1, mode="nearest")
        keep &= (up > level) & (down < level)
    if keep.sum() < MIN_KEPT:
        return None
    r, c = r[keep], c[keep]
    itt = (ixx[r, c] * iy[r, c] ** 2 - 2.0 * iyx[r, c] * ix[r, c] * iy[r, c]
           + iyy[r, c] * ix[r, c] ** 2) / g2[r, c]
    return float(np.mean(np.sign(-itt)))


def plateau_vote(image: np.ndarray, scales=SCALES_PX, edge_fraction: float = EDGE_FRACTION,
                 reach: int = REACH_SIGMAS) -> float:
    """Convex-side vote of the strong edges that separate two plateaus.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Any intensities.
    scales : sequence of float
        Gaussian scales in pixels of the working copy (the frame block-averaged
        to at most :data:`~grainhabit.plugins.preprocess.polarity.MAX_SIDE_PX`
        per side); a scale of 8 px or more is taken on a copy halved again at
        half the scale, as in :func:`~grainhabit.plugins.preprocess.polarity.convex_side_vote`.
    edge_fraction : float
        Fraction of pixels (largest gradient) that are edge candidates.
    reach : int
        An edge pixel is kept when the smoothed intensity at 1, ..., ``reach``
        scales along the gradient stays above its own and at as many scales
        against the gradient stays below it.

    Returns
    -------
    float
        In [-1, 1]: +1 when every kept edge bends round its bright side
        (bright grains), -1 round its dark side; 0 when no scale keeps
        :data:`MIN_KEPT` edges.
    """
    return multiscale_vote(image, scales, lambda arr, sigma: _scale_vote(arr, sigma, edge_fraction, reach))


def decide_polarity(image: np.ndarray) -> tuple[str, float]:
    """Whether grains are brighter or darker than their surroundings, with a second look on weak votes.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Frame, any intensity units (denoised or not).

    Returns
    -------
    polarity : {"bright", "dark"}
    confidence : float
        ``|vote|`` of the vote that decided, in [0, 1].

    Notes
    -----
    The ordinary convex-side vote decides unless it is weaker than
    :data:`WEAK_VOTE`; then the :func:`plateau_vote` decides if it points the
    other way and is larger in size. The plateau vote is taken at the ordinary
    scales and at :data:`FINE_SCALES_PX`, and the larger in size of the two
    serves (the scale at which the frame's edges speak most clearly): at the
    ordinary scales the dark gaps between packed spheres are narrower than the
    reach, at the finer ones the textured inside of large grains breaks up. A frame whose vote is at least
    :data:`WEAK_VOTE` gets the same answer as
    :func:`~grainhabit.plugins.preprocess.polarity.detect_polarity`.
    """
    vote = convex_side_vote(image)
    if abs(vote) < WEAK_VOTE:
        second = max(plateau_vote(image), plateau_vote(image, scales=FINE_SCALES_PX), key=abs)
        if (second * vote < 0 and abs(second) > abs(vote)) or (vote == 0 and second != 0):
            vote = second
    return ("bright" if vote >= 0 else "dark"), abs(vote)
