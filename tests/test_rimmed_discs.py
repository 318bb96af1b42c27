"""Round particles seen by their bright rims: the second look by the circular Hough transform (segment-grains 2.28)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk
from skimage.feature import canny
from skimage.transform import hough_circle, hough_circle_peaks

from grainhabit.plugins.preprocess import flatten_background
from grainhabit.plugins.segment import rimmed_discs, segment_grains


def _rimmed_heap(seed=0, r=26.0, gap=6.0):
    """Nine SEM-like spheres in a hexagonal heap, `gap` px apart: faces as dark as the gaps between them,
    brightening towards the edge as (d / r)^6 (the edge effect), each rim fading out over part of its
    perimeter on a different side."""
    shape = (260, 300)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    img = np.full(shape, 0.15)
    step = 2 * r + gap
    bodies = []
    for k, (i, j) in enumerate((i, j) for i in range(3) for j in range(3)):
        cy, cx = 60 + step * i * math.sqrt(3) / 2, 70 + step * j + (step / 2 if i % 2 else 0)
        d = np.hypot(yy - cy, xx - cx)
        body = d <= r
        fade = np.clip(1.0 + np.cos(np.arctan2(yy - cy, xx - cx) - 0.7 * k), 0, 1)
        img[body] = (0.15 + 0.85 * (d / r) ** 6 * fade)[body]
        bodies.append(body)
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(seed).normal(0.0, 0.03, shape)
    raw = (np.clip(0.1 + 0.6 * img, 0, 1) * 60000).astype(np.uint16)
    return raw, bodies


def test_touching_rimmed_discs_are_found_whole():
    r = 26.0
    raw, bodies = _rimmed_heap(r=r)
    # handbook geometry: a disc of radius r has area pi r^2 (pixel digitisation of a 52 px disc: under 1 %)
    assert all(abs(b.sum() - math.pi * r * r) / (math.pi * r * r) < 0.01 for b in bodies)
    image, _, _ = flatten_background.flatten(raw, 5.0, polarity="bright")
    before, _, notes_before = segment_grains.segment_image(image, 5.0, {"rimmed_discs": False}, raw)
    labels, split, notes = segment_grains.segment_image(image, 5.0, {}, raw)
    # the first look finds none of them whole: the rims are thin arcs, the faces as dark as the gaps
    assert not any(np.logical_and(before > 0, b).sum() > 0.5 * b.sum() and
                   np.bincount(before[b]).argmax() > 0 for b in bodies)
    assert any("round particle(s) seen by their rims" in n for n in notes)
    assert int(labels.max()) == len(bodies) and len(split) == len(bodies)
    for body in bodies:
        g = np.bincount(labels[body], minlength=2)[1:].argmax() + 1
        grain = labels == g
        iou = np.logical_and(grain, body).sum() / np.logical_or(grain, body).sum()
        assert iou > 0.85
        # the outline sits at the foot of the blurred rim: ECD within 5 % of the disc's 2 r
        ecd = 2 * math.sqrt(grain.sum() / math.pi)
        assert abs(ecd - 2 * r) / (2 * r) < 0.05
    # one disc per particle: no disc spans two spheres
    for g in range(1, int(labels.max()) + 1):
        assert sum(np.logical_and(labels == g, b).sum() > 0.2 * b.sum() for b in bodies) == 1


def test_textured_frame_is_left_alone():
    """A frame of texture alone (faces of textured spheres at 2 px grain): the Hough transform finds
    circles in it, the rim test drops them all, and the labels do not change."""
    rng = np.random.default_rng(1)
    tex = ndi.gaussian_filter(rng.normal(0.0, 1.0, (256, 256)), 2.0)
    tex = (tex - tex.min()) / np.ptp(tex)
    raw = (np.clip(0.2 + 0.5 * tex, 0, 1) * 60000).astype(np.uint16)
    image, _, _ = flatten_background.flatten(raw, 5.0, polarity="bright")
    arr = segment_grains.check_image(image)
    radii = rimmed_discs._radii(arr.shape)
    peaks = hough_circle_peaks(hough_circle(canny(arr, sigma=2), radii), radii,
                               threshold=rimmed_discs.PEAK_THRESHOLD)[0]
    assert len(peaks) > 0
    assert rimmed_discs.find_circles(arr) == []
    off = segment_grains.segment_image(image, 5.0, {"rimmed_discs": False}, raw)
    on = segment_grains.segment_image(image, 5.0, {}, raw)
    assert rimmed_discs.needs_second_look(off[0], off[2])  # the frame shows the signs: no grains found
    assert np.array_equal(off[0], on[0]) and np.array_equal(off[1], on[1]) and off[2] == on[2]


def test_solid_grains_do_not_trigger_the_second_look():
    """Ordinary frames (solid grains) never pay for the Hough transform."""
    labels = np.zeros((128, 128), np.int32)
    for k, (cy, cx) in enumerate(((30, 30), (30, 90), (90, 60)), start=1):
        labels[disk((cy, cx), 20, shape=labels.shape)] = k
    assert not rimmed_discs.needs_second_look(labels, [])
    ring = labels.copy()
    ring[disk((30, 30), 15, shape=ring.shape)] = 0   # one ring of three: under half the grain area
    assert not rimmed_discs.needs_second_look(ring, [])
    for c in ((30, 90), (90, 60)):
        ring[disk(c, 15, shape=ring.shape)] = 0
    assert rimmed_discs.needs_second_look(ring, [])


def test_lens_overlap_matches_pixel_count():
    """The overlap of two circles (handbook lens area) against skimage.draw.disk pixel counts."""
    shape = (400, 400)
    for (y1, x1, r1), (y2, x2, r2) in (((200, 150, 60), (200, 230, 40)), ((200, 200, 80), (230, 210, 30)),
                                       ((100, 100, 50), (300, 300, 50)), ((200, 200, 70), (200, 300, 70))):
        a, b = np.zeros(shape, bool), np.zeros(shape, bool)
        a[disk((y1, x1), r1, shape=shape)] = True
        b[disk((y2, x2), r2, shape=shape)] = True
        want = np.logical_and(a, b).sum() / min(a.sum(), b.sum())
        assert abs(rimmed_discs._overlap(y1, x1, r1, y2, x2, r2) - want) < 0.02


def test_solidity_matches_scikit_image():
    """The corner-hull solidity against skimage.measure.regionprops' solidity (convex-hull image)."""
    from skimage.measure import regionprops
    from skimage.draw import polygon
    labels = np.zeros((200, 200), np.int32)
    labels[disk((50, 50), 30, shape=labels.shape)] = 1
    rr, cc = polygon([110, 190, 190, 170, 170, 110], [20, 20, 90, 90, 40, 40], labels.shape)
    labels[rr, cc] = 2                                          # an L: solidity well under 1
    labels[disk((60, 150), 35, shape=labels.shape)] = 3
    labels[disk((60, 150), 28, shape=labels.shape)] = 0         # a ring
    for p in regionprops(labels):
        assert abs(rimmed_discs.solidity(labels == p.label) - p.solidity) < 0.03


def test_octagon_area_bounds_the_hull_of_the_pixel_corners():
    # the hull of the pixels' corners lies in the octagon of the four slabs (scipy's Qhull as the reference);
    # an axis-aligned rectangle fills its octagon (its box), a disc about pi / (8 tan 22.5 deg) = 0.95 of it
    from scipy.spatial import ConvexHull

    from grainhabit.plugins.segment.rimmed_discs import octagon_area

    rng = np.random.default_rng(4)
    for _ in range(100):
        m = np.zeros((40, 40), bool)
        for r, c in rng.integers(5, 35, (rng.integers(1, 5), 2)):
            top, left = max(r - rng.integers(0, 6), 0), max(c - rng.integers(0, 6), 0)
            m[top:r + rng.integers(1, 6), left:c + rng.integers(1, 6)] = True
        rr, cc = np.nonzero(m)
        corners = np.concatenate([np.c_[rr + dy, cc + dx] for dy in (-0.5, 0.5) for dx in (-0.5, 0.5)])
        assert octagon_area(m) >= ConvexHull(corners).volume - 1e-9
    box = np.zeros((30, 30), bool)
    box[5:15, 3:25] = True
    assert octagon_area(box) == 10 * 22
    yy, xx = np.mgrid[:101, :101]
    disc = (yy - 50) ** 2 + (xx - 50) ** 2 <= 40 ** 2
    assert disc.sum() / octagon_area(disc) == pytest.approx(np.pi / (8 * np.tan(np.pi / 8)), abs=0.02)
