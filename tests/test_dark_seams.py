"""Grains divided along dark seams (plugins/segment/dark_seams.py).

The references are handbook geometry (the area of a square, side^2) and the
cases the module must leave alone (a convex grain, a grain with no seam).
"""

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.segment.dark_seams import divide_at_seams, split_at_dark_seams
from grainhabit.plugins.segment.segment_grains import segment_image

SIDE = 40


def _l_of_squares(seam_level=0.55, noise=0.02, seed=0):
    """Three squares of SIDE px in an L, face to face, 2-px seams at ``seam_level`` between them.

    Returns the blurred noisy image (background 0, squares 1) and the truth labels.
    """
    rng = np.random.default_rng(seed)
    img = np.zeros((160, 160), np.float32)
    truth = np.zeros(img.shape, np.int32)
    corners = [(30, 30), (30, 30 + SIDE), (30 + SIDE, 30)]
    for k, (r, c) in enumerate(corners, start=1):
        img[r:r + SIDE, c:c + SIDE] = 1.0
        truth[r:r + SIDE, c:c + SIDE] = k
    # the seams: where two squares meet, two pixels darker
    img[30:30 + SIDE, 30 + SIDE - 1:30 + SIDE + 1] = seam_level
    img[30 + SIDE - 1:30 + SIDE + 1, 30:30 + SIDE] = seam_level
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, noise, img.shape).astype(np.float32)
    return img, truth


def test_l_of_squares_is_divided_into_its_squares():
    img, truth = _l_of_squares()
    mask = truth > 0
    parts = divide_at_seams(img, mask, min_area=50)
    assert parts is not None and len(parts) == 3
    # each part one square: area side^2 within 10 % (handbook geometry), and on one truth square
    for part in parts:
        assert abs(part.sum() - SIDE ** 2) <= 0.1 * SIDE ** 2
        ids, counts = np.unique(truth[part], return_counts=True)
        assert counts.max() >= 0.9 * part.sum()
    assert np.array_equal(np.logical_or.reduce(parts), mask)


def test_no_seam_no_division():
    # the same L without dark seams: one grain (an L-shaped crystal, or a twin), nothing to divide along
    img, truth = _l_of_squares(seam_level=1.0)
    assert divide_at_seams(img, truth > 0, min_area=50) is None


def test_convex_textured_grain_is_never_divided():
    # a disc of radius 45 px with dark speckle texture inside: solidity ~1, not looked at
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[:120, :120]
    disc = (yy - 60) ** 2 + (xx - 60) ** 2 <= 45 ** 2
    img = np.where(disc, 1.0, 0.0).astype(np.float32)
    specks = ndi.gaussian_filter(rng.random(img.shape), 1.5) < 0.45
    img[disc & specks] = 0.4
    assert divide_at_seams(ndi.gaussian_filter(img, 1.0), disc, min_area=50) is None


def test_frame_pass_renumbers_in_raster_order_and_marks_split():
    img, truth = _l_of_squares()
    labels = (truth > 0).astype(np.int32)
    out, split, divided = split_at_dark_seams(img, labels, np.zeros(1, bool), min_area=50)
    assert divided == 1 and out.max() == 3 and split.all()
    # raster order: the label of each part's first pixel increases
    first = [np.flatnonzero(out.ravel() == k)[0] for k in range(1, 4)]
    assert first == sorted(first)


def test_segment_step_divides_a_staggered_pair_among_single_squares():
    # two squares face to face, the second set 8 px lower (a notch at each end of their seam), beside five
    # single squares: every grain one square (side^2 within 12 %, handbook geometry)
    rng = np.random.default_rng(1)
    img = np.zeros((300, 300), np.float32)
    img[30:30 + SIDE, 30:30 + SIDE] = 1.0
    img[38:38 + SIDE, 30 + SIDE:30 + 2 * SIDE] = 1.0
    img[38:30 + SIDE, 30 + SIDE - 1:30 + SIDE + 1] = 0.55  # the seam where the two faces meet
    for r, c in ((40, 200), (120, 220), (200, 40), (210, 130), (220, 230)):
        img[r:r + SIDE, c:c + SIDE] = 1.0
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, 0.02, img.shape).astype(np.float32)
    labels, split, notes = segment_image(img, 5.0)
    areas = np.bincount(labels.ravel())[1:]
    assert labels.max() == 7, notes
    assert np.all(np.abs(areas - SIDE ** 2) <= 0.12 * SIDE ** 2), areas


def test_facets_of_one_convex_crystal_are_not_divided():
    # a square crystal seen along a four-fold axis with its pyramid's edges dark (its diagonals): convex,
    # the facet edges meet the outline at its corners, not in notches; as large as three of its neighbours
    yy, xx = np.mgrid[:200, :200].astype(np.float32)
    img = np.zeros((200, 200), np.float32)
    big = (np.abs(yy - 60) <= 35) & (np.abs(xx - 60) <= 35)
    img[big] = 1.0
    diag = big & ((np.abs((yy - 60) - (xx - 60)) <= 1) | (np.abs((yy - 60) + (xx - 60)) <= 1))
    img[diag] = 0.5
    for r, c in ((130, 20), (130, 80), (130, 140), (20, 140)):
        img[r:r + 30, c:c + 30] = 1.0
    img = ndi.gaussian_filter(img, 1.0)
    labels = ndi.label(img > 0.3)[0]
    out, split, divided = split_at_dark_seams(img, labels, np.zeros(labels.max(), bool), min_area=50)
    assert divided == 0 and out.max() == 5


def test_a_staircase_of_eight_squares_is_divided_into_eight():
    # each square is an eighth of the grain: a part floor set as a share of the grain (0.15) kept such a
    # heap whole; the floor is a share of the largest part now. Areas: side^2 (handbook geometry)
    rng = np.random.default_rng(5)
    side = 30
    cells = [(0, 0), (0, 1), (1, 1), (1, 2), (2, 2), (2, 3), (3, 3), (3, 4)]
    img = np.zeros((4 * side + 40, 5 * side + 40), np.float32)
    truth = np.zeros(img.shape, np.int32)
    for k, (i, j) in enumerate(cells, start=1):
        r, c = 20 + i * side, 20 + j * side
        img[r:r + side, c:c + side] = 1.0
        truth[r:r + side, c:c + side] = k
    # two-pixel seams at 0.55 wherever two squares meet
    seam = np.zeros(img.shape, bool)
    seam[:, 1:] |= (truth[:, 1:] != truth[:, :-1]) & (truth[:, 1:] > 0) & (truth[:, :-1] > 0)
    seam[1:, :] |= (truth[1:, :] != truth[:-1, :]) & (truth[1:, :] > 0) & (truth[:-1, :] > 0)
    seam = ndi.binary_dilation(seam, structure=np.array([[0, 0, 0], [0, 1, 1], [0, 1, 1]], bool)) & (truth > 0)
    img[seam] = 0.55
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, 0.02, img.shape).astype(np.float32)
    parts = divide_at_seams(img, truth > 0, min_area=50)
    assert parts is not None and len(parts) == len(cells)
    for part in parts:
        assert abs(part.sum() - side ** 2) <= 0.12 * side ** 2
        ids, counts = np.unique(truth[part], return_counts=True)
        assert counts.max() >= 0.9 * part.sum()


def test_parts_are_looked_at_again_as_grains_of_their_own(monkeypatch):
    # the recursion alone: a stand-in division that halves a mask along its longer side while it is over
    # 100 px; three levels give eight parts of a 32 x 32 square, each an eighth of it
    import grainhabit.plugins.segment.dark_seams as ds

    def halve(image, mask, min_area, large=False):
        if mask.sum() <= 100:
            return None
        rr, cc = np.nonzero(mask)
        first = mask.copy()
        if np.ptp(rr) >= np.ptp(cc):
            first[rr.min() + (np.ptp(rr) + 1) // 2:, :] = False
        else:
            first[:, cc.min() + (np.ptp(cc) + 1) // 2:] = False
        return [first, mask & ~first]

    monkeypatch.setattr(ds, "divide_at_seams", halve)
    mask = np.zeros((40, 40), bool)
    mask[4:36, 4:36] = True
    parts = ds.divide_again(np.zeros(mask.shape), mask, 10.0, np.inf, rounds=3)
    assert len(parts) == 8 and all(p.sum() == 128 for p in parts)
    assert np.array_equal(np.logical_or.reduce(parts), mask)
    assert len(ds.divide_again(np.zeros(mask.shape), mask, 10.0, np.inf, rounds=1)) == 2


def _capsule(shape, top, left, radius, length, vertical=True):
    """A rod with round ends (a capsule) of ``radius`` and straight part ``length`` px, box corner (top, left)."""
    yy, xx = np.mgrid[:shape[0], :shape[1]]
    if vertical:
        y = np.clip(yy, top + radius, top + radius + length)
        return (yy - y) ** 2 + (xx - left - radius) ** 2 <= radius ** 2
    x = np.clip(xx, left + radius, left + radius + length)
    return (yy - top - radius) ** 2 + (xx - x) ** 2 <= radius ** 2


def test_a_bundle_of_rods_is_divided_though_one_part_is_no_rod():
    # five rods side by side along dark seams, and a sixth lying across the end of the last one with no seam
    # between them (an L that stays one part, solidity about 0.6): the four convex rods still come apart
    # (segment-grains 2.26; before, the whole bundle stayed one grain for that one part)
    shape = (150, 200)
    radius, length, pitch = 8, 60, 17
    img = np.zeros(shape, np.float32)
    truth = np.zeros(shape, np.int32)
    for k in range(5):
        rod = _capsule(shape, 40, 20 + k * pitch, radius, length)
        truth[rod & (truth == 0)] = k + 1
    cross = _capsule(shape, 40, 20 + 4 * pitch, radius, 50, vertical=False)  # from the top of the fifth rod
    truth[cross & (truth == 0)] = 5
    img[truth > 0] = 1.0
    # the seams: a grain's pixels next to another grain's are darker
    edge = (ndi.grey_dilation(truth, size=3) != truth) & (truth > 0)
    img[edge] = 0.45
    img = ndi.gaussian_filter(img, 0.8) + np.random.default_rng(1).normal(0, 0.02, shape).astype(np.float32)
    parts = divide_at_seams(img, truth > 0, min_area=50)
    assert parts is not None and len(parts) == 5
    solid = [p.sum() / ndi.binary_fill_holes(p).sum() for p in parts]
    rods = 0
    for part in parts:
        ids, counts = np.unique(truth[part], return_counts=True)
        k = ids[np.argmax(counts)]
        assert counts.max() >= 0.9 * part.sum()
        # a whole rod: pi r^2 + 2 r L (handbook area of a capsule) within 15 %
        if k < 5:
            rods += abs(part.sum() - (np.pi * radius ** 2 + 2 * radius * length)) <= 0.15 * (
                np.pi * radius ** 2 + 2 * radius * length)
    assert rods == 4 and min(solid) > 0
