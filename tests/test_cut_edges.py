"""Cuts between touching grains of different levels moved onto their edge (segment/cut_edges.py).

Invented test frames drawn here with scikit-image (``skimage.draw``). Areas are checked against
handbook geometry (a disc's area pi r^2); the watershed is scikit-image's.
"""

import numpy as np
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment import cut_edges


def plate_and_disc(plate_level=0.4, disc_level=1.0, seed=0):
    """A pale plate (rows 20-99, cols 10-89) with a bright disc of radius 22 lying over its right side."""
    img = np.zeros((120, 140), np.float32)
    img[20:100, 10:90] = plate_level
    rr, cc = disk((60, 95), 22, shape=img.shape)
    img[rr, cc] = disc_level
    truth = np.zeros(img.shape, np.int32)
    truth[20:100, 10:90] = 1
    truth[rr, cc] = 2
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(seed).normal(0, 0.02, img.shape).astype(np.float32)
    return img, truth


def straight_cut(truth, col):
    """The two grains' union cut by a vertical line at ``col`` (what a cut between notches gives)."""
    labels = np.zeros(truth.shape, np.int32)
    union = truth > 0
    labels[union] = 1
    labels[union & (np.arange(truth.shape[1])[None, :] >= col)] = 2
    return labels


def test_a_straight_cut_across_a_disc_lying_on_a_plate_moves_onto_the_disc_edge():
    img, truth = plate_and_disc()
    labels = straight_cut(truth, 80)           # the cut runs 7 px right of the disc's leftmost point (col 73)
    disc_area = np.pi * 22 ** 2                # handbook geometry
    before = abs(np.count_nonzero(labels == 2) - disc_area) / disc_area
    out, moved = cut_edges.snap_cuts(img, labels, np.array([True, True]))
    after = abs(np.count_nonzero(out == 2) - disc_area) / disc_area
    assert moved == 1
    assert before > 0.08 and after < 0.03
    # the union is kept: no pixel gained or lost
    assert np.array_equal(out > 0, labels > 0)
    # each grain stays in one piece
    assert all(ndi.label(out == k)[1] == 1 for k in (1, 2))


def test_grains_of_one_level_and_uncut_grains_keep_their_cut():
    img, truth = plate_and_disc(plate_level=1.0, disc_level=1.0)
    labels = straight_cut(truth, 80)
    out, moved = cut_edges.snap_cuts(img, labels, np.array([True, True]))
    assert moved == 0 and np.array_equal(out, labels)
    img, truth = plate_and_disc()
    labels = straight_cut(truth, 80)
    out, moved = cut_edges.snap_cuts(img, labels, np.array([False, False]))
    assert moved == 0 and np.array_equal(out, labels)


def test_neighbours_are_the_labels_that_meet_a_grain():
    lab = np.array([[1, 1, 0, 3, 3],
                    [0, 2, 0, 0, 4],
                    [5, 0, 0, 0, 0]])
    boxes = ndi.find_objects(lab)
    assert cut_edges.neighbours(lab, 2, boxes[1]) == [1, 5]
    assert cut_edges.neighbours(lab, 3, boxes[2]) == [4]
    assert cut_edges.neighbours(lab, 1, boxes[0]) == [2]


def test_a_part_level_reads_the_pixels_over_2_px_inside():
    # the erosion by a disk of radius 2 keeps the pixels whose Euclidean distance to the outside exceeds 2
    # (scipy.ndimage.distance_transform_edt as the reference)
    rng = np.random.default_rng(5)
    smooth = rng.random((40, 50)).astype(np.float32)
    mask = ndi.binary_opening(rng.random((40, 50)) < 0.7, iterations=1)
    inner = ndi.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1] > 2.0
    assert cut_edges.part_level(smooth, mask) == float(np.median(smooth[inner]))
