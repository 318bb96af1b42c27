"""Heaps of many touching grains split grain by grain; rods and long plates touched by grains never cut.

The frames are drawn here (skimage.draw discs and rectangles with a 1 px blur, a ramp and noise); they
are invented test data. References: handbook geometry (area of a disc pi r^2; the lens where two discs
of radius r with centres d apart overlap, 2 r^2 acos(d / 2r) - (d / 2) sqrt(4 r^2 - d^2), halved by
the common chord) and scikit-image's marker-controlled watershed of the distance map.
"""

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk, rectangle
from skimage.segmentation import watershed

from grainhabit.plugins.segment import touching
from builders import iou, ramp_finish as finish, run_chain








def lens_area(r, d):
    """Area where two discs of radius r, centres d apart, overlap (handbook geometry)."""
    return 2 * r * r * np.arccos(d / (2 * r)) - 0.5 * d * np.sqrt(4 * r * r - d * d)


def draw_discs(shape, centres, r, seed, level=0.7):
    """Discs of one radius, each grain a slightly different level; returns the frame and the truth labels."""
    rng = np.random.default_rng(seed)
    sig = np.zeros(shape)
    truth = np.zeros(shape, np.int32)
    for k, c in enumerate(centres, 1):
        rr, cc = disk(c, r, shape=shape)
        sig[rr, cc] = level + rng.uniform(-0.05, 0.05)
        truth[rr, cc] = k
    return finish(sig, seed), truth


def one_grain_each(labels, centres):
    """The found label at every centre: all present and all different."""
    ids = [int(labels[int(round(r)), int(round(c))]) for r, c in centres]
    return all(ids) and len(set(ids)) == len(ids), ids


def test_zigzag_chain_of_fifteen_overlapping_discs_gives_fifteen_grains():
    # 15 discs of radius 12 px, centres 21 px apart along a zigzag (rows 14 px apart): one component of
    # more than ten grains, each a tenth of the heap or less; every disc comes out on its own, its area the
    # disc less half of each lens it shares with a neighbour (handbook geometry)
    r, d = 12.0, 21.0
    step = np.sqrt(d * d - 14.0 ** 2)
    centres = [(40 + 14 * (i % 2), 30 + step * i) for i in range(15)]
    raw, truth = draw_discs((100, int(60 + step * 14)), centres, r, seed=11)
    assert ndi.label(truth > 0)[1] == 1
    out = run_chain(raw)
    ok, ids = one_grain_each(out.labels, centres)
    assert ok and out.n_grains == 15
    lens = lens_area(r, d)
    for i, k in enumerate(ids):
        neighbours = 1 if i in (0, 14) else 2
        expected = np.pi * r * r - neighbours * lens / 2
        assert (out.labels == k).sum() == pytest.approx(expected, rel=0.12)


def test_hexagonal_heap_of_fifteen_discs_splits_like_the_distance_map_watershed():
    # 3 x 5 discs in hexagonal order (radius 11.5 px, centres 23.5 px apart: packed, half a pixel apart,
    # one component after the blur): interior discs have no notch on the heap's outline; reference:
    # scikit-image's watershed of the negated distance map of the drawn heap (gaps closed) from markers at
    # the centres
    r, d = 11.5, 23.5
    centres = [(25 + j * d * np.sqrt(3) / 2, 25 + i * d + (j % 2) * d / 2) for j in range(5) for i in range(3)]
    shape = (140, 120)
    raw, truth = draw_discs(shape, centres, r, seed=12)
    heap = ndi.binary_closing(truth > 0, structure=np.ones((3, 3)))
    assert ndi.label(heap)[1] == 1
    out = run_chain(raw)
    ok, ids = one_grain_each(out.labels, centres)
    assert ok and out.n_grains == 15
    markers = np.zeros(shape, np.int32)
    for k, (rr, cc) in enumerate(centres, 1):
        markers[int(round(rr)), int(round(cc))] = k
    ref = watershed(-ndi.distance_transform_edt(heap), markers, mask=heap)
    for k, found in enumerate(ids, 1):
        assert iou(out.labels == found, ref == k) > 0.8


def test_ring_of_twelve_discs_round_a_gap_gives_twelve_grains():
    # 12 discs of radius 11 px on a circle of radius 38 px (neighbours overlap): the gap in the middle is
    # filled as a hole by the foreground; it is background, and each disc is a grain
    r, ring = 11.0, 38.0
    angles = np.arange(12) * 2 * np.pi / 12
    centres = [(70 + ring * np.sin(a), 70 + ring * np.cos(a)) for a in angles]
    raw, truth = draw_discs((140, 140), centres, r, seed=13)
    assert ndi.label(truth > 0)[1] == 1
    out = run_chain(raw)
    ok, _ = one_grain_each(out.labels, centres)
    assert ok and out.n_grains == 12
    assert out.labels[70, 70] == 0


def rod_touched_at_its_sides(width, length, seed, grain="disc", n=2, size=9):
    """A rod (rectangle) along the rows, ``n`` grains touching its long sides, on alternate sides."""
    shape = (length + 60, width + 100)
    c0 = 50
    sig = np.zeros(shape)
    rod = np.zeros(shape, bool)
    rod[rectangle((30, c0), extent=(length, width), shape=shape)] = True
    sig[rod] = 0.6
    rng = np.random.default_rng(seed)
    others = []
    for k, row in enumerate(np.linspace(30 + 0.25 * length, 30 + 0.75 * length, n)):
        g = np.zeros(shape, bool)
        if grain == "disc":
            side = c0 - size if k % 2 == 0 else c0 + width + size - 1
            g[disk((row, side), size, shape=shape)] = True
        else:
            left = c0 - 2 * size if k % 2 == 0 else c0 + width - 1
            g[rectangle((int(row) - size, left), extent=(2 * size, 2 * size + 1), shape=shape)] = True
        g &= ~rod
        sig[g] = 0.75 + rng.uniform(-0.05, 0.05)
        others.append(g)
    return finish(sig, seed), rod, others


@pytest.mark.parametrize("width, length, grain, n, size", [(10, 80, "disc", 2, 9), (12, 120, "square", 2, 9),
                                                           (16, 200, "disc", 2, 14)])
def test_rod_or_long_plate_with_grains_at_its_sides_is_never_cut(width, length, grain, n, size):
    # a rod 10 x 80 px touched by two discs of radius 9 px, a plate seen edge-on 12 x 120 px by two
    # squares of 18 px and a long thin plate 16 x 200 px by two discs of radius 14 px, on opposite sides:
    # the grains come off, the rod stays one grain (its area within 15 % of the drawn rectangle: handbook
    # geometry)
    raw, rod, others = rod_touched_at_its_sides(width, length, seed=width, grain=grain, n=n, size=size)
    assert ndi.label(rod | np.any(others, axis=0))[1] == 1
    out = run_chain(raw)
    ids, counts = np.unique(out.labels[rod], return_counts=True)
    main = ids[np.argmax(counts)]
    assert main > 0 and counts.max() >= 0.95 * rod.sum()
    assert (out.labels == main).sum() == pytest.approx(width * length, rel=0.15)


def test_bare_rod_and_long_plate_are_single_grains():
    # a rod of 10 x 80 px and a thin plate of 14 x 200 px alone: convex, never split
    for width, length in ((10, 80), (14, 200)):
        shape = (length + 40, width + 40)
        sig = np.zeros(shape)
        sig[rectangle((20, 20), extent=(length, width), shape=shape)] = 0.7
        out = run_chain(finish(sig, seed=length))
        assert out.n_grains == 1 and not out.grains["split"].any()


def test_pockets_are_background_enclosed_by_grains_only():
    # a drawn ring of grains around a dark gap has a pocket; a grain with a darker (but not background)
    # patch inside has none
    yy, xx = np.mgrid[0:60, 0:60]
    rad = np.hypot(yy - 30, xx - 30)
    mask = rad <= 25
    image = np.where(mask, 0.8, 0.0)
    image[rad <= 10] = 0.02
    pocket = touching.enclosed_pockets(mask, image, 20.0)
    assert pocket is not None and iou(pocket, rad <= 9) > 0.7
    image[rad <= 10] = 0.5
    assert touching.enclosed_pockets(mask, image, 20.0) is None
