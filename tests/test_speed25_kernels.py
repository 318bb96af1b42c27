"""Kernels of issue 19's speed25 round, each against the scipy form it replaced (same pixels, same numbers).

Reference library: scipy.ndimage (binary_dilation with its default border value 0, label, center_of_mass).
Masks are random blobs and drawn pairs (invented data).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import overlap_front

from builders import faint_hexagon

_FOUR = ndi.generate_binary_structure(2, 1)
_EIGHT = np.ones((3, 3), bool)


def _blobs(seed, shape=(61, 47), fill=0.5):
    rng = np.random.default_rng(seed)
    return ndi.gaussian_filter(rng.random(shape), 2.0) > fill


@pytest.mark.parametrize("seed", range(6))
def test_dilations_are_scipys(seed):
    m = _blobs(seed, fill=0.5 + 0.01 * seed)
    m[0, :3] = m[-1, -2:] = m[5:9, 0] = True  # pixels on the border: outside counts as False in both
    for radius in (1, 2, 3):
        assert np.array_equal(overlap_front.dilate_square(m, radius), ndi.binary_dilation(m, _EIGHT, iterations=radius))
    assert np.array_equal(overlap_front.dilate_cross(m), ndi.binary_dilation(m, _FOUR))
    one = np.zeros((1, 5), bool)
    one[0, 2] = True
    assert np.array_equal(overlap_front.dilate_square(one, 2), ndi.binary_dilation(one, _EIGHT, iterations=2))


def _notch_points_scipy(a_mask, b_mask):
    """The form notch_points had before (scipy's dilations, labelling of the whole box, center_of_mass)."""
    union = a_mask | b_mask
    contact = a_mask & ndi.binary_dilation(b_mask, _FOUR)
    ends = contact & ndi.binary_dilation(~union, _EIGHT, iterations=2)
    lab, n = ndi.label(ends, _EIGHT)
    if n != 2:
        return None
    return [np.array(c) for c in ndi.center_of_mass(ends, lab, [1, 2])]


def _pairs():
    """Touching pairs cut by straight lines through random blobs and discs (some with 1 or 3+ notches)."""
    out = []
    rr, cc = np.mgrid[:70, :90]
    for seed in range(40):
        rng = np.random.default_rng(100 + seed)
        if seed % 2:
            union = _blobs(seed, (70, 90), 0.5)
        else:
            union = np.zeros((70, 90), bool)
            for _ in range(2):
                r0, c0, rad = rng.uniform(15, 55), rng.uniform(15, 75), rng.uniform(10, 22)
                union |= (rr - r0) ** 2 + (cc - c0) ** 2 <= rad ** 2
        angle = rng.uniform(0, np.pi)
        side = (rr - rng.uniform(20, 50)) * np.cos(angle) + (cc - rng.uniform(25, 65)) * np.sin(angle) > 0
        out.append((union & side, union & ~side))
    return out


def test_notch_points_are_the_scipy_forms():
    found = 0
    for a, b in _pairs():
        want = _notch_points_scipy(a, b)
        got = overlap_front.notch_points(a, b)
        assert (want is None) == (got is None)
        if want is not None:
            found += 1
            for w, g in zip(want, got):
                assert np.array_equal(w, g)  # bit for bit: the same sums over the same counts
    assert found >= 10


def test_edge_direction_unchanged_by_shared_pixels():
    # complete_front reads the front grain's border pixels once for both notches
    for a, b in _pairs():
        ends = overlap_front.notch_points(a, b)
        if ends is None:
            continue
        union = a | b
        outer = union & ndi.binary_dilation(~union, _EIGHT)
        rr, cc = np.nonzero(a & outer)
        for p in ends:
            want = overlap_front.edge_direction(a, union, p)
            got = overlap_front._direction_at(rr, cc, p)
            assert (want is None) == (got is None)
            if want is not None:
                assert np.array_equal(want, got)


def _square_over_disc():
    """A 40 px square at 1.0 over a disc of radius 25 px at 0.5, blurred; the pair cut along the straight line
    between the notches (the circle crosses the square's sides at (72.9, 55) and (40, 67.9))."""
    from skimage.draw import disk

    shape = (110, 110)
    disc = np.zeros(shape, bool)
    disc[disk((50, 45), 25, shape=shape)] = True
    square = np.zeros(shape, bool)
    square[40:80, 55:95] = True
    img = ndi.gaussian_filter(np.where(square, 1.0, np.where(disc, 0.5, 0.0)), 1.0)
    union = disc | square
    (r1, c1), (r2, c2) = (72.9, 55.0), (40.0, 67.9)
    rr, cc = np.mgrid[:110, :110]
    side = np.sign((c2 - c1) * (rr - r1) - (r2 - r1) * (cc - c1))
    b = union & (side == side[60, 90])
    return img, union & ~b, b


def _refinement_frame(seed):
    """A faint hexagon (its dents filled) beside a square lying over a disc (its cut moved), invented."""
    img = np.zeros((130, 250), np.float32)
    labels = np.zeros((130, 250), np.int32)
    hexagon, hex_labels, _ = faint_hexagon(0.25, seed=seed)
    img[5:125, 0:120] = hexagon
    labels[5:125, 0:120] = hex_labels
    pair, a, b = _square_over_disc()
    img[10:120, 130:240] = np.maximum(img[10:120, 130:240], pair.astype(np.float32) * 0.3)
    labels[10:120, 130:240][a] = 2
    labels[10:120, 130:240][b] = 3
    return img, labels, np.array([False, True, True])


@pytest.mark.parametrize("seed", range(3))
def test_refinements_keep_the_boxes_scipy_finds(seed):
    # reference: scipy.ndimage.find_objects of the refined labels; the refinements give the same labels
    # whether they are handed the boxes or find them
    from grainhabit.plugins.segment import cut_edges, faint_outline, segment_grains

    img, labels, split = _refinement_frame(seed)
    boxes = ndi.find_objects(labels)
    filled, n_filled = faint_outline.fill_faint_dents(img, labels, 0.05, boxes)
    assert n_filled >= 1 and boxes == ndi.find_objects(filled)
    assert np.array_equal(filled, faint_outline.fill_faint_dents(img, labels, 0.05)[0])
    snapped, moved = cut_edges.snap_cuts(img, filled, split, boxes)
    assert moved >= 1 and boxes == ndi.find_objects(snapped)
    assert np.array_equal(snapped, cut_edges.snap_cuts(img, filled, split)[0])
    given = ndi.find_objects(labels)
    notes_a, notes_b = [], []
    got = segment_grains.refine_outlines(img, labels, split, 0.05, notes_a, given)
    want = segment_grains.refine_outlines(img, labels, split, 0.05, notes_b)
    assert given == ndi.find_objects(labels)  # the caller's list is left as it was
    for g, w in zip(got, want):
        assert np.array_equal(g, w)
    assert notes_a == notes_b and len(notes_a) == 2


def test_first_pixels_from_given_boxes():
    from grainhabit.chain_tiles import first_pixels

    lab, n = ndi.label(_blobs(3, (80, 90), 0.55))
    assert n > 3
    assert np.array_equal(first_pixels(lab, boxes=ndi.find_objects(lab)), first_pixels(lab))


def test_lazy_interior_is_collected_once():
    # interior._Once stands for functools.lru_cache(maxsize=1) of a closure: one call, the value kept; a call
    # that raises is not kept (the next call tries again), as with lru_cache
    from grainhabit.plugins.habit.interior import _Once

    calls = []

    def collect(x, y):
        calls.append((x, y))
        if len(calls) == 1:
            raise RuntimeError("first call fails")
        return {"sum": x + y}

    once = _Once(collect, 2, 3)
    with pytest.raises(RuntimeError):
        once()
    first = once()
    assert first == {"sum": 5} and once() is first and len(calls) == 2
