"""A grain lying partly over another: the front grain's edges carried on across the overlap.

Frames drawn here (invented data): a square lying over a disc, blurred by scipy's Gaussian filter.
Reference: handbook geometry (the square's area, side squared) and the drawn shapes themselves.
"""

import numpy as np
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment import cut_edges, overlap_front


def square_over_disc(front=1.0, back=0.5):
    """A 40 px square (rows 40-79, cols 55-94) at ``front`` over a disc of radius 25 px at ``back``."""
    shape = (110, 110)
    disc = np.zeros(shape, bool)
    disc[disk((50, 45), 25, shape=shape)] = True
    square = np.zeros(shape, bool)
    square[40:80, 55:95] = True
    img = np.where(square, front, np.where(disc, back, 0.0))
    return ndi.gaussian_filter(img, 1.0), disc, square


def chord_split(disc, square):
    """The pair cut along the straight line between the notches, as the splitter cuts it.

    The notches are where the circle (centre (50, 45), radius 25) crosses the square's left side
    (column 55: row 50 + sqrt(25^2 - 10^2) = 72.9) and its top side (row 40: column 45 + 22.9 = 67.9).
    """
    union = disc | square
    (r1, c1), (r2, c2) = (72.9, 55.0), (40.0, 67.9)
    rr, cc = np.mgrid[:union.shape[0], :union.shape[1]]
    side = np.sign((c2 - c1) * (rr - r1) - (r2 - r1) * (cc - c1))
    b = union & (side == side[60, 90])  # the square's side of the line
    return union & ~b, b


def iou(a, b):
    return (a & b).sum() / (a | b).sum()


def test_the_front_square_is_completed_across_the_disc_behind():
    img, disc, square = square_over_disc()
    a, b = chord_split(disc, square)
    before = iou(b, square)
    res = overlap_front.complete_front(ndi.gaussian_gradient_magnitude(img, 1.0), a, b)
    assert res is not None
    new_a, new_b = res
    assert (new_a | new_b).sum() == (a | b).sum() and not (new_a & new_b).any()
    # handbook geometry: the square's area is its side squared (40 px)
    assert abs(new_b.sum() - 40 * 40) / 1600 < 0.05
    assert iou(new_b, square) > 0.95 > before


def test_two_grains_of_one_level_keep_the_straight_cut():
    # no edge in the image along either completion: nothing tells which grain is in front
    img, disc, square = square_over_disc(front=1.0, back=1.0)
    a, b = chord_split(disc, square)
    assert overlap_front.complete_front(ndi.gaussian_gradient_magnitude(img, 1.0), a, b) is None


def test_snap_cuts_applies_the_completion_to_a_split_pair():
    img, disc, square = square_over_disc()
    a, b = chord_split(disc, square)
    labels = np.where(a, 1, np.where(b, 2, 0)).astype(np.int32)
    out, moved = cut_edges.snap_cuts(img, labels, np.array([True, True]))
    assert moved == 1 and iou(out == 2, square) > 0.95
