"""Objects far below a frame's grains dropped as debris (plugins/segment/population.py).

Everything drawn here is invented test data.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment.population import (below_population, drop_below_population, edge_strips, small_and_dim,
                                                    typical_area)
from grainhabit.plugins.segment.segment_grains import segment_image


def test_typical_area_of_a_lognormal_sample_follows_hatch_choate():
    # Hatch-Choate: for a count-lognormal diameter (median CMD, geometric sd sg) the median of the
    # distribution weighted by d^2 (projected area) is CMD exp(2 ln^2 sg) (handbook: W. C. Hinds, Aerosol
    # Technology, 2nd ed., 1999, ch. 4)
    rng = np.random.default_rng(3)
    cmd, sg = 40.0, 1.4
    d = cmd * np.exp(np.log(sg) * rng.standard_normal(200_000))
    area_median_d = np.sqrt(4.0 * typical_area(np.pi / 4.0 * d ** 2) / np.pi)
    assert area_median_d == pytest.approx(cmd * np.exp(2.0 * np.log(sg) ** 2), rel=0.01)


def test_many_specks_do_not_pull_the_reference_down():
    areas = np.r_[np.full(200, 9.0), np.full(20, 700.0)]  # specks outnumber the grains ten to one
    assert typical_area(areas) == 700.0
    drop = below_population(areas, 0.02)
    assert drop[:200].all() and not drop[200:].any()


def test_a_strip_along_the_frame_edge_sets_no_typical_area():
    # a bright strip along the right edge (charging, the scan's border), cut into long pieces, and small
    # particles of 25 px: with the strip as reference the particles are under 2 % of it and dropped; the
    # strip left out, they are the frame's grains and kept (a grain cut by the edge keeps counting)
    labels = np.zeros((512, 685), np.int32)
    labels[0:176, 662:685] = 1                  # 176 x 23 px along the right edge
    labels[201:339, 664:685] = 2                # 138 x 21
    k = 3
    for r in range(40, 480, 40):
        for c in range(40, 600, 80):
            labels[r:r + 5, c:c + 5] = k        # 25 px particles
            k += 1
    labels[300:320, 0:15] = k                   # a grain cut by the left edge: 20 along it, 15 deep
    areas = np.bincount(labels.ravel())[1:]
    boxes = ndi.find_objects(labels)
    strips = edge_strips(boxes, labels.shape)
    assert strips[:2].all() and not strips[2:].any()
    assert below_population(areas, 0.02)[2:-1].all()
    assert not below_population(areas, 0.02, ~strips)[2:-1].any()
    out, _, n = drop_below_population(labels, np.zeros(k, bool))
    assert n == 0


def test_share_zero_or_an_empty_frame_drops_nothing():
    assert not below_population([1.0, 1000.0], 0.0).any()
    labels = np.zeros((5, 5), np.int32)
    out, split, n = drop_below_population(labels, np.zeros(0, bool))
    assert n == 0 and out is labels


def test_drop_keeps_the_raster_numbering_and_the_flags():
    labels = np.zeros((40, 40), np.int32)
    labels[2:4, 2:4] = 1          # 4 px speck
    labels[5:35, 5:25] = 2        # 600 px grain
    labels[6:8, 30:32] = 3        # 4 px speck
    labels[20:38, 28:38] = 4      # 180 px grain
    out, split, n = drop_below_population(labels, np.array([True, False, True, True]), 0.02)
    assert n == 2
    assert np.array_equal(np.unique(out), [0, 1, 2])
    assert (out[5:35, 5:25] == 1).all() and (out[20:38, 28:38] == 2).all()
    assert split.tolist() == [False, True]


def test_segmentation_drops_dust_beside_grains_and_notes_it():
    # 16 grains of radius 28 px (ECD 56 px) and 40 dust specks of radius 3.5 px (ECD about 7 px, above
    # min_ecd_px 6): the specks' area is under 0.02 of the grains' (ECD under 1/7 of theirs), so the area
    # share is what drops them (scikit-image disk geometry)
    shape = (480, 480)
    img = np.zeros(shape, np.float32)
    for i in range(4):
        for j in range(4):
            rr, cc = disk((60 + 115 * i, 60 + 115 * j), 28, shape=shape)
            img[rr, cc] = 1.0
    rng = np.random.default_rng(0)
    dust = 0
    while dust < 40:
        r, c = rng.integers(5, 475, 2)
        if img[max(r - 6, 0):r + 7, max(c - 6, 0):c + 7].any():
            continue
        rr, cc = disk((r, c), 3.5, shape=shape)
        img[rr, cc] = 1.0
        dust += 1
    img = ndi.gaussian_filter(img, 0.8) + rng.normal(0.0, 0.03, shape).astype(np.float32)
    on, _, notes = segment_image(img, 1.0)
    off, _, _ = segment_image(img, 1.0, {"min_area_share": 0.0})
    assert on.max() == 16
    assert off.max() > 16 + 20  # the specks pass every other rule
    assert any("typical grain area dropped" in n for n in notes)



def test_specks_at_the_resolution_floor_go_beside_large_grains_but_not_among_grains_as_small():
    # Handbook disc areas pi/4 d^2: grains of 24 px ECD (452 px^2) with specks of 4.5 px ECD (16 px^2,
    # 3.5 % of the grains' area: over the 2 % share, under the 5 % one and under a 6 px disc) -> the specks
    # go. A frame whose grains are all 5-6 px across (the Tescan 10000x crystals of the shared instrument
    # files) keeps every one: the typical area is theirs.
    grain, speck = np.pi / 4 * 24 ** 2, np.pi / 4 * 4.5 ** 2
    areas = np.array([grain] * 20 + [speck] * 5)
    drop = below_population(areas, 0.02)
    assert drop[20:].all() and not drop[:20].any()
    small = np.pi / 4 * np.array([5.0, 5.5, 6.0] * 30)
    assert not below_population(small, 0.02).any()
    # share 0 (a blend of a fine and a coarse emulsion) drops nothing, specks included
    assert not below_population(areas, 0.0).any()


def test_small_dim_blobs_go_but_small_bright_grains_and_large_faint_ones_stay():
    # twelve grains of radius 15 px at level 1; beside them blobs of radius 5 px (an area share of
    # (5/15)^2 = 0.11, handbook disc areas) at level 0.3 (stains of a film), grains of radius 5 px at level 1,
    # and two large faint grains of radius 15 px at level 0.3 (thin plates)
    plan = [("grain", 15, 1.0)] * 12 + [("stain", 5, 0.3)] * 4 + [("small grain", 5, 1.0)] * 4 \
        + [("faint plate", 15, 0.3)] * 2
    shape = (420, 400)
    img = np.zeros(shape, np.float32)
    centres = [(r0, c0) for r0 in range(30, 420, 60) for c0 in range(30, 400, 90)][:len(plan)]
    for (kind, radius, level), (r0, c0) in zip(plan, centres):
        rr, cc = disk((r0, c0), radius, shape=shape)
        img[rr, cc] = level
    labels, n = ndi.label(img > 0)  # raster order, as the step numbers grains
    assert n == len(plan)
    kind_of = {int(labels[r0, c0]): kind for (kind, _, _), (r0, c0) in zip(plan, centres)}
    kept, _, dropped = drop_below_population(labels, np.zeros(n, bool), 0.02, image=img)
    assert dropped == 4
    left = sorted(kind_of[int(k)] for k in np.unique(labels[kept > 0]))
    assert left.count("stain") == 0 and left.count("small grain") == 4 and left.count("faint plate") == 2
    # without the image (or with min_area_share 0) the area rule alone drops none of them
    assert drop_below_population(labels, np.zeros(n, bool), 0.02)[2] == 0
    assert drop_below_population(labels, np.zeros(n, bool), 0.0, image=img)[2] == 0
    # the rule on its own: the same four
    areas = np.bincount(labels.ravel())[1:]
    levels = ndi.mean(img, labels, np.arange(1, n + 1))
    assert sorted(kind_of[int(k) + 1] for k in np.flatnonzero(small_and_dim(areas, levels))) == ["stain"] * 4
