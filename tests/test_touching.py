"""Touching and partly overlapping grains split at their necks, single grains left whole.

The frames are drawn here (skimage.draw shapes with shading, blur and noise);
they are invented test data. References: handbook geometry (areas of squares,
polygons and discs, the chord where two circles cross) and scikit-image's
marker-controlled watershed of the distance map.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk, polygon, rectangle
from skimage.segmentation import watershed

from grainhabit.plugins.segment import touching

from builders import draw_faceted_frame
from builders import iou, ramp_finish as finish, run_chain








def best_match(labels, truth_mask):
    ids, counts = np.unique(labels[truth_mask], return_counts=True)
    counts, ids = counts[ids > 0], ids[ids > 0]
    if ids.size == 0:
        return 0.0
    return iou(labels == ids[np.argmax(counts)], truth_mask)


def test_touching_cubes_of_different_size_split_at_the_neck():
    # a 36 px cube face to face against the middle of a 60 px cube: the outline narrows by 12 px on
    # either side; the parts are the two squares, 3600 and 1296 px^2 (handbook geometry)
    shape = (140, 180)
    sig = np.zeros(shape)
    big, small = np.zeros(shape, bool), np.zeros(shape, bool)
    big[rectangle((40, 30), extent=(60, 60), shape=shape)] = True
    small[rectangle((52, 90), extent=(36, 36), shape=shape)] = True
    sig[big] = 0.65
    sig[small] = 0.75
    out = run_chain(finish(sig, seed=1))
    assert out.n_grains == 2 and out.grains["split"].all()
    for truth, area in ((big, 3600), (small, 1296)):
        k = out.labels[tuple(np.round(np.argwhere(truth).mean(0)).astype(int))]
        assert k > 0
        assert (out.labels == k).sum() == pytest.approx(area, rel=0.08)
        assert iou(out.labels == k, truth) > 0.88
    # the dividing line is the big cube's face (column 90), within 2 px
    k_small = out.labels[70, 108]
    assert abs(np.nonzero(out.labels == k_small)[1].min() - 90) <= 2


def test_chain_of_five_corner_touching_squares_gives_five():
    # five squares standing on a corner (circumradius 22 px, 30 px apart): neighbours overlap at their corners
    row = tuple((80, 60 + 30 * i, 22, 4, 0.0) for i in range(5))
    raw, truth = draw_faceted_frame((160, 300), grains=row, seed=3)
    assert ndi.label(truth > 0)[1] == 1
    out = run_chain(raw)
    assert out.n_grains == 5 and out.grains["split"].all()
    for k in range(1, 6):
        assert best_match(out.labels, truth == k) > 0.75


@pytest.mark.parametrize("seed", range(4))
def test_single_rounded_grain_with_a_ragged_outline_is_never_split(seed):
    # a disc of radius 16-28 px whose outline wanders by up to +-4 px (several bumps and dents), as low-contrast
    # particles come out of the threshold: concave, yet one grain
    rng = np.random.default_rng(seed)
    shape = (100, 100)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    r0 = 16 + 4 * seed
    theta = np.arctan2(yy - 50, xx - 50)
    wobble = sum(rng.uniform(0.5, 1.0) * np.sin(k * theta + rng.uniform(0, 2 * np.pi)) for k in (5, 7, 11))
    grain = np.hypot(yy - 50, xx - 50) <= r0 + 5.0 * wobble / 2.5
    assert not touching.is_convex(grain)
    out = run_chain(finish(np.where(grain, 0.7, 0.0), seed=seed, noise=0.03))
    assert out.n_grains == 1 and not out.grains["split"].any()


def test_single_cuboid_of_aspect_3_is_never_split():
    # a 96 x 32 px cuboid with rounded corners and a dark facet line along its length
    shape = (100, 160)
    sig = np.zeros(shape)
    mask = np.zeros(shape, bool)
    mask[rectangle((34, 32), extent=(32, 96), shape=shape)] = True
    for r, c in ((38, 36), (38, 123), (61, 36), (61, 123)):
        corner = np.zeros(shape, bool)
        corner[disk((r, c), 4.5, shape=shape)] = True
        box = np.zeros(shape, bool)
        box[r - 4:r + 5, c - 4:c + 5] = True
        mask &= ~(box & ~corner & ~ndi.binary_erosion(mask, iterations=5))
    sig[mask] = 0.7
    sig[50, 40:120] = 0.3
    out = run_chain(finish(sig, seed=5))
    assert out.n_grains == 1 and not out.grains["split"].any()


def test_partly_overlapping_pair_splits_like_the_distance_map_watershed():
    # two discs (radii 30 and 24 px, centres 46 px apart), the smaller one in front; reference: scikit-image's
    # watershed of the negated distance map from markers at the two centres, on the drawn union
    shape = (120, 180)
    back, front = np.zeros(shape, bool), np.zeros(shape, bool)
    back[disk((60, 60), 30, shape=shape)] = True
    front[disk((60, 106), 24, shape=shape)] = True
    sig = np.where(back, 0.6, 0.0)
    sig[front] = 0.75
    out = run_chain(finish(sig, seed=6))
    assert out.n_grains == 2 and out.grains["split"].all()
    union = back | front
    markers = np.zeros(shape, np.int32)
    markers[60, 60], markers[60, 106] = 1, 2
    ref = watershed(-ndi.distance_transform_edt(union), markers, mask=union)
    for k, (r, c) in enumerate(((60, 60), (60, 106)), 1):
        found = out.labels == out.labels[r, c]
        assert iou(found, ref == k) > 0.9
    # the dividing line lies within 3 px of the chord where the two circles cross (handbook geometry)
    d, r1, r2 = 46.0, 30.0, 24.0
    x_chord = 60 + (d * d + r1 * r1 - r2 * r2) / (2 * d)
    cols = np.nonzero(out.labels == out.labels[60, 106])[1]
    assert abs(cols.min() - x_chord) <= 3


def cuboid_pair(seam):
    """Two 64 x 30 px cuboids face to face along their long side, corners rounded; ``seam`` 0.0-1.0 dims the
    3 px line between them to that fraction of the grain level (1.0: no seam)."""
    shape = (120, 140)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    truth = np.zeros(shape, np.int32)
    for k, r0 in enumerate((30, 60), 1):
        # a rounded rectangle: within 6 px of a 52 x 18 px core rectangle
        dy = np.maximum(np.maximum(r0 + 6 - yy, yy - (r0 + 23)), 0)
        dx = np.maximum(np.maximum(38 - xx, xx - 101), 0)
        truth[np.hypot(dy, dx) <= 6.0] = k
    sig = np.where(truth > 0, 0.7, 0.0)
    sig[58:61, 32:108] *= np.where(truth[58:61, 32:108] > 0, seam, 1.0)
    return sig, truth


def test_face_to_face_cuboids_split_along_a_dark_seam_only():
    sig, truth = cuboid_pair(seam=0.45)
    out = run_chain(finish(sig, seed=7))
    assert out.n_grains == 2 and out.grains["split"].all()
    for k in (1, 2):
        assert best_match(out.labels, truth == k) > 0.85
    # the same outline without the seam is one rounded block: nothing shows two grains
    sig, _ = cuboid_pair(seam=1.0)
    out = run_chain(finish(sig, seed=7))
    assert out.n_grains == 1 and not out.grains["split"].any()


def test_seam_contrast_of_a_drawn_line():
    # worked example: two flat parts at 1.0 meeting along a 5 px line at 0.4: the line is 60 % darker;
    # a cut across a flat shape has no seam
    shape = (60, 80)
    mask = np.zeros(shape, bool)
    mask[10:50, 10:70] = True
    img = np.where(mask, 1.0, 0.0).astype(np.float32)
    flat = img.copy()
    img[10:50, 38:43] = 0.4
    rr, cc = np.arange(10, 50), np.full(40, 40)
    parts = [mask & (np.arange(80) < 40)[None, :], mask & (np.arange(80) >= 40)[None, :]]
    assert touching.seam_contrast(img, mask, parts, rr, cc) == pytest.approx(0.6, abs=0.05)
    assert abs(touching.seam_contrast(flat, mask, parts, rr, cc)) < 0.02


def test_a_dark_line_of_a_textured_grain_is_no_seam():
    # A 40 x 80 px block with a rough surface (white noise smoothed by 1 px, spread 0.35 of its level,
    # as SEM bacteria and rough grains show; invented data), cut straight across at 11 places on each of
    # 4 noise seeds. The darkest-of-3 x 3 line along a cut is darker than the parts' median by the
    # texture alone (about half of the 44 cuts measured 15 % darker when this test was written), but the
    # lines 4 px beside it are as dark: at most 10 of the 44 count as a seam. A groove at half the level
    # and 2 px wide along one cut of the same rough block is a seam on every seed.
    shape = (60, 100)
    mask = np.zeros(shape, bool)
    mask[10:50, 10:90] = True
    cols = np.arange(100)[None, :]
    passed = 0
    for seed in range(4):
        rough = ndi.gaussian_filter(np.random.default_rng(seed).normal(size=shape), 1.0)
        img = np.where(mask, 1.0 + 0.35 * rough / rough.std(), 0.0).astype(np.float32)
        for col in range(30, 71, 4):
            rr, cc = np.arange(10, 50), np.full(40, col)
            parts = [mask & (cols < col), mask & (cols > col)]
            passed += touching.seam_contrast(img, mask, parts, rr, cc) >= touching.SEAM_DIP
        grooved = img.copy()
        grooved[10:50, 49:51] *= 0.5
        rr, cc = np.arange(10, 50), np.full(40, 50)
        assert touching.seam_contrast(grooved, mask, [mask & (cols < 50), mask & (cols > 50)], rr, cc) \
            >= touching.SEAM_DIP
    assert passed <= 10


def test_triangle_pressed_against_a_square_is_two_grains_without_neck_or_seam():
    # A 40 px square and a triangle whose 50 px base lies along the square's side, one flat grey (no
    # seam): the contact is as long as the grains, so no neck, but the shape is far from convex and
    # falls into two convex parts along the contact. The parts are the drawn polygons
    # (scikit-image's polygon raster as the reference), IoU > 0.9 each.
    shape = (100, 140)
    square = np.zeros(shape, bool)
    square[25:65, 20:61] = True
    triangle = np.zeros(shape, bool)
    rr, cc = polygon([20, 70, 45], [61, 61, 105], shape)
    triangle[rr, cc] = True
    mask = square | triangle
    parts = touching.split_component(mask, 50.0, 0.08, np.where(mask, 1.0, 0.0))
    assert len(parts) == 2
    for part in parts:
        iou = max((part & t).sum() / (part | t).sum() for t in (square, triangle))
        assert iou > 0.9
