"""Fewer whole-frame passes in segment-grains (issue 19, seventh round), each against the pass it replaces.

The grains' boxes that ``label_grains`` notes stand in for whole-frame counts and relabellings in the
steps after it (debris floor, rafts, drawn marks); each boxed path is checked against the step's own
whole-frame path, and the boxes against scipy's ``find_objects`` (reference library: scipy.ndimage).
The frame-wide levels on a smaller subsample are the one change that is not exact: its tolerance is
checked here. Frames are invented (rendered or drawn here).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import disk

from grainhabit.plugins.segment import annotations, population
from grainhabit.plugins.segment import segment_grains as sg
from grainhabit.plugins.segment.levels import frame_levels
from grainhabit.plugins.segment.packed import split_rafts


def _labels_with_debris(seed, size=300, n=40):
    """Grains 1..n in raster order: discs of radius 6-14 px and specks of radius 1-2 px (invented)."""
    rng = np.random.default_rng(seed)
    lab = np.zeros((size, size), np.int32)
    k = 0
    for _ in range(n):
        r = rng.uniform(6, 14) if rng.random() > 0.3 else rng.uniform(1, 2.5)
        y, x = rng.uniform(r, size - r, 2)
        rr, cc = disk((y, x), r, shape=lab.shape)
        if (lab[rr, cc] > 0).any():
            continue
        k += 1
        lab[rr, cc] = k
    from grainhabit.plugins.segment.tiling import renumber_raster

    lab, _ = renumber_raster(lab)
    return lab


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("share", [0.0, 0.02, 0.3])
def test_debris_floor_in_boxes_equals_the_whole_frame_floor(seed, share):
    # reference: population.drop_below_population (whole-frame bincount and lookup) on the same labels
    lab = _labels_with_debris(seed)
    n = int(lab.max())
    split = np.random.default_rng(seed).random(n) > 0.5
    boxes = ndi.find_objects(lab)
    got = sg.drop_below_population_boxed(lab, split, boxes, share)
    ref = population.drop_below_population(lab, split, share)
    np.testing.assert_array_equal(got[0], ref[0])
    assert got[0].dtype == np.asarray(ref[0]).dtype
    np.testing.assert_array_equal(got[1], ref[1])
    assert got[2] == ref[2]
    if share == 0.3:
        assert got[2] > 0  # the specks go


def _raft_frame(radius=9, gap=3, rows=5, cols=6, gap_level=0.65, size=256, seed=0):
    """Preprocessed frame (background 0, particles 1): discs on a hexagonal lattice whose thin gaps lie at
    ``gap_level`` (one object to the threshold), and a few single discs beside them (invented)."""
    a = 2 * radius + gap
    discs = np.zeros((size, size), bool)
    for i in range(rows):
        for j in range(cols):
            rr, cc = disk((40 + i * a * np.sqrt(3) / 2, 30 + j * a + (a / 2 if i % 2 else 0.0)), radius,
                          shape=discs.shape)
            discs[rr, cc] = True
    island = ndi.binary_closing(discs, np.ones((2 * gap + 3,) * 2, bool))
    for y, x in ((200, 40), (210, 120), (190, 200)):
        rr, cc = disk((y, x), radius, shape=discs.shape)
        discs[rr, cc] = True
    img = np.where(discs, 1.0, np.where(island, gap_level, 0.0))
    img = ndi.gaussian_filter(img, 1.0) + np.random.default_rng(seed).normal(0, 0.03, img.shape)
    return img.astype(np.float32)


@pytest.mark.parametrize("seed", [0, 1])
def test_rafts_with_boxes_equal_rafts_without(seed):
    # reference: split_rafts' own whole-frame path (bincount, scipy's find_objects) on the same labels
    img = _raft_frame(seed=seed)
    labels, _, flags = sg.label_grains(img, 1.0, frame_levels(img), method="auto", min_ecd_nm=0.0)
    assert flags["boxes"] == ndi.find_objects(labels)  # the boxes handed on are scipy's
    split = flags["split"][1:]
    got = split_rafts(img, labels, split, 30.0, flags["boxes"])
    ref = split_rafts(img, labels, split, 30.0)
    assert ref[2] >= 1  # the raft is divided
    np.testing.assert_array_equal(got[0], ref[0])
    np.testing.assert_array_equal(got[1], ref[1])
    assert got[2] == ref[2]


def _inked_frame(seed=0, size=320):
    """A raw frame (grey film, darker grains, a black ring glyph and a black bar drawn in flat ink) and the
    preprocessed frame the segmentation sees (background 0, grains and marks about 1); invented."""
    rng = np.random.default_rng(seed)
    objects = np.zeros((size, size), bool)
    ink = np.zeros((size, size), bool)
    for y, x, r in ((60, 60, 16), (60, 150, 14), (150, 70, 18), (160, 170, 15), (250, 250, 17), (80, 260, 12)):
        rr, cc = disk((y, x), r, shape=objects.shape)
        objects[rr, cc] = True
    rr, cc = disk((250, 80), 22, shape=ink.shape)
    ring = np.zeros_like(ink)
    ring[rr, cc] = True
    rr, cc = disk((250, 80), 14, shape=ink.shape)
    ring[rr, cc] = False
    ink |= ring
    ink[296:304, 140:230] = True  # a scale bar
    raw = np.where(ink, 0.0, np.where(objects, 0.3, 0.55)) + rng.normal(0, 0.02, (size, size))
    raw = np.where(ink, 0.0, ndi.gaussian_filter(raw, 0.8))
    image = ndi.gaussian_filter(np.where(ink | objects, 1.0, 0.0), 1.0) + rng.normal(0, 0.02, (size, size))
    return raw.astype(np.float32), image.astype(np.float32)


@pytest.mark.parametrize("seed", [0, 1])
def test_drawn_marks_dropped_in_boxes_equal_the_whole_frame_path(seed):
    # reference: drop_drawn_marks without the boxes (tiling.renumber_raster over the frame, scipy's
    # find_objects), then the whole-frame debris floor; the boxes handed on equal scipy's find_objects
    raw, image = _inked_frame(seed)
    p = sg.STEP.resolve({})
    levels = frame_levels(image, p["noise_k"], faint_k=p["faint_k"])
    labels, clusters, flags = sg.label_grains(image, 1.0, levels, method="auto", min_ecd_nm=0.0)
    split = flags["split"][1:]
    args = (image, raw, levels, p, labels, split, clusters, flags["split"], [flags["rejected"]])
    got = sg.drop_drawn_marks(*args, [], flags["boxes"], flags["cluster_of"])
    ref = sg.drop_drawn_marks(*args, [])
    assert int(labels.max()) - int(ref[0].max()) >= 1  # ink was dropped
    np.testing.assert_array_equal(got[0], ref[0])
    np.testing.assert_array_equal(got[1], ref[1])
    assert got[2] == ref[2]
    assert ref[3] is None and got[3] == ndi.find_objects(got[0])
    for share in (0.02, 0.5):
        q = dict(p, min_area_share=share)
        a = sg.drop_debris(got[0], got[1], [], got[3], q)
        b = sg.drop_debris(ref[0], ref[1], [], None, q)
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
        assert a[2] == b[2]


def test_hole_test_asks_for_the_background_only_when_it_looks_for_a_hole():
    # reference: is_drawn given the background level itself; a ring glyph reaches the hole test, a flat
    # black disc (solid ink) does not ask for the level at all
    yy, xx = np.mgrid[:41, :41]
    r = np.hypot(yy - 20, xx - 20)
    ring = (r <= 18) & (r >= 10)
    part = r <= 18
    raw = np.where(ring, 0.0, 0.55).astype(np.float64)
    low, high = 0.02, 0.98
    asked = []

    def level():
        asked.append(1)
        return 0.55

    assert annotations.is_drawn(part, raw, low, high, level) == annotations.is_drawn(part, raw, low, high, 0.55)
    assert asked
    asked.clear()
    solid = np.where(part, 0.0, 0.55)
    assert annotations.is_drawn(part, solid, low, high, level) == annotations.is_drawn(part, solid, low, high, 0.55)
    assert not asked


def test_frame_levels_subsample_tolerance():
    # frames of up to 600 000 px keep every pixel (the levels of segment-grains 2.7 bit for bit); a 2048 px
    # rendered frame (invented) takes every third row and column: the noise threshold stays within 0.25
    # background sigmas and Otsu's threshold within 0.01 image units (1 % of the grain level) of the levels
    # of the 2e6-sample subsample
    from grainhabit.plugins.bench import harness as bu
    from grainhabit.plugins.preprocess import flatten_background as pp

    rng = np.random.default_rng(5)
    small = (ndi.gaussian_filter(rng.random((700, 850)), 3) > 0.52).astype(np.float32) + \
        rng.normal(0, 0.02, (700, 850)).astype(np.float32)
    assert frame_levels(small, faint_k=4.0) == frame_levels(small, max_samples=2_000_000, faint_k=4.0)
    raw = bu.render_frames(1, 2048, seed=3)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    new, old = frame_levels(arr, faint_k=4.0), frame_levels(arr, max_samples=2_000_000, faint_k=4.0)
    assert abs(new["noise"] - old["noise"]) <= 0.25 * old["sigma"]
    assert abs(new["faint"] - old["faint"]) <= 0.25 * old["sigma"]
    assert new["otsu"] == pytest.approx(old["otsu"], abs=0.01)


@pytest.mark.parametrize("radius", [1, 1.5, 3, 4.2])
def test_dilation_read_at_pixels_equals_the_whole_dilation(radius):
    # reference: disk_morphology.dilate_disk (equal to scipy's binary_dilation by the disk) read at the pixels
    from grainhabit.plugins.segment.disk_morphology import dilate_disk
    from grainhabit.plugins.segment.foreground import dilated_at

    rng = np.random.default_rng(int(10 * radius))
    for shape, few in (((300, 410), 0.002), ((300, 410), 0.2), ((9, 13), 0.3)):
        m = rng.random(shape) > 0.97
        at = np.flatnonzero(rng.random(shape) < few)
        at = np.r_[at, 0, m.size - 1]  # corners: the frame's edge counts as nothing
        np.testing.assert_array_equal(dilated_at(m, radius, at), dilate_disk(m, radius).ravel()[at])


def _half_height_mask_reference(image, noise_level, edge_level=0.5, faint_level=None, faint_min_area=0.0):
    """segment-grains 2.7's half_height_mask: the stain test over the whole frame (two frame dilations)."""
    from grainhabit.plugins.segment import foreground as fg
    from grainhabit.plugins.segment.disk_morphology import dilate_disk, erode_disk

    weak = image > noise_level
    if faint_level is not None and faint_level < noise_level:
        weak |= fg.faint_objects(image > faint_level, weak, faint_min_area)
    lab, n = ndi.label(weak, structure=np.ones((3, 3), bool))
    if n == 0:
        return weak
    peak = np.full(n + 1, -np.inf, np.float32)
    at = np.flatnonzero(weak)
    own, value = lab.ravel()[at], image.ravel()[at]
    np.maximum.at(peak, own, value)
    peak[0] = 0.0
    deep = erode_disk(weak, fg.EDGE_BAND_PX, 1)
    strong = np.zeros(weak.shape, bool)
    strong.ravel()[at[value > edge_level * peak[own]]] = True
    faint = np.zeros(weak.shape, bool)
    faint.ravel()[at[value <= fg.STAIN_SHARE * peak[own]]] = True
    stain = faint & deep & ~dilate_disk(strong, fg.STRONG_REACH_PX)
    if stain.any():
        deep &= ~fg.diffuse_parts(stain, dilate_disk(weak & ~deep, 1.5))
    deep |= strong
    return deep


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_stain_test_at_its_pixels_equals_the_whole_frame_test(seed):
    # reference: the whole-frame form above on frames with faint stains beside bright grains (invented): a
    # diffuse ring of low level round some grains and dark crevices inside others
    from grainhabit.plugins.segment.foreground import half_height_mask

    rng = np.random.default_rng(seed)
    size = 400
    yy, xx = np.mgrid[:size, :size]
    img = np.zeros((size, size))
    for _ in range(14):
        y, x, r = rng.uniform(40, size - 40), rng.uniform(40, size - 40), rng.uniform(8, 22)
        d = np.hypot(yy - y, xx - x)
        img = np.maximum(img, np.where(d <= r, 1.0, 0.0))
        if rng.random() < 0.5:  # a faint stain winding round the grain
            img = np.maximum(img, np.where((d > r) & (d <= 2.2 * r) & (np.sin(3 * np.arctan2(yy - y, xx - x)) > 0),
                                           0.15, 0.0))
        elif rng.random() < 0.5:  # a dark crevice inside the grain
            img = np.where((d < 0.5 * r) & (np.abs(yy - y) < 2), 0.12, img)
    img = ndi.gaussian_filter(img, 1.0) + rng.normal(0, 0.01, img.shape)
    img = img.astype(np.float32)
    got = half_height_mask(img, 0.05, 0.5, 0.04, 30.0)
    ref = _half_height_mask_reference(img, 0.05, 0.5, 0.04, 30.0)
    np.testing.assert_array_equal(got, ref)
    assert (got != (img > 0.05)).any()  # the skirts and stains were cut


def test_small_and_dim_box_by_box_is_the_whole_frame_rule():
    # reference: population.drop_below_population with the image (scipy.ndimage.mean over the whole frame)
    rng = np.random.default_rng(11)
    shape = (300, 300)
    img = np.zeros(shape, np.float32)
    yy, xx = np.ogrid[:shape[0], :shape[1]]
    for r in range(20, 300, 40):
        for c in range(20, 300, 40):
            rad, level = (14, 1.0) if rng.random() < 0.7 else (4, rng.choice([0.2, 0.35, 0.9]))
            img[(yy - r) ** 2 + (xx - c) ** 2 <= rad ** 2] = level + rng.normal(0, 0.02)
    lab, n = ndi.label(img > 0)
    boxes = ndi.find_objects(lab)
    split = np.zeros(n, bool)
    got = sg.drop_below_population_boxed(lab.astype(np.int32), split, boxes, 0.02, img)
    ref = population.drop_below_population(lab.astype(np.int32), split, 0.02, img)
    assert got[2] == ref[2] > 0
    assert np.array_equal(got[0], ref[0])
