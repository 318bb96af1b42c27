"""Faster kernels of the segmentation, each against the slower reference it replaces.

References named beside each check: scikit-image's nearest-label expansion and boundaries
(``expand_labels``, ``find_boundaries``) for the dividing lines between grains; scipy's binary
morphology with the same structuring element for the disk erosions, dilations and closings; scipy's
whole-frame Euclidean distance transform for every windowed one.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.common import image_stats
from grainhabit.plugins.bench import harness as bu
from grainhabit.plugins.preprocess import flatten_background as pp
from grainhabit.plugins.segment import annotations, band_flood, foreground as seg_fg, gaps as seg_gaps, levels as seg_levels
from grainhabit.plugins.segment import disk_morphology, hull_fill, mark_shapes, segment_grains as seg_grains, touching

from builders import half_height_reference, reference_gap_lines


def _bodies_and_specks(seed, shape=(220, 300)):
    """Cores, faint components, specks under GAP_MIN_AREA_PX, one speck far from every body, wide dim rims."""
    rng = np.random.default_rng(seed)
    seeds = rng.random(shape) > 0.998
    seeds[:, 200:] = False
    cores = ndi.binary_dilation(seeds[:, :150], iterations=4)
    cores = np.pad(cores, ((0, 0), (0, shape[1] - 150)))
    mask = ndi.binary_dilation(seeds, iterations=7) | (rng.random(shape) > 0.997) | cores
    mask[:, 200:] = False
    mask[110:113, 270:273] = True  # a lone speck 70 px from the nearest body
    # a speck on the bisector of two bodies 80 px apart: the lines through it need both
    for c in (205, 285):
        cores[150:161, c:c + 11] = True
        mask[148:163, c - 2:c + 13] = True
    mask[154:157, 249:252] = True
    return mask, cores


@pytest.mark.parametrize("seed", [13, 4, 21])
@pytest.mark.parametrize("near_px", [3.0, 6.5, 12.0])
def test_gap_lines_near_the_mask_equal_the_whole_frame_lines(seed, near_px):
    # reference library: scikit-image expand_labels + find_boundaries over the whole frame (reference_gap_lines);
    # the windowed lines must equal them at every pixel within near_px of the mask, and add none elsewhere
    mask, cores = _bodies_and_specks(seed)
    ref, *_ = reference_gap_lines(mask, cores, seg_gaps.GAP_MIN_AREA_PX, seg_gaps.GAP_REACH_PX)
    near = seg_gaps.gap_lines(mask, cores, near_px=near_px)
    zone = ndi.binary_dilation(mask, structure=seg_fg.disk_structure(near_px))
    assert (ref & zone).any()
    np.testing.assert_array_equal(near & zone, ref & zone)
    assert not (near & ~zone).any()
    # the speck on the bisector: its first window holds no body, the lines there come from a grown one
    # (without growing the windows this test fails)
    assert (near[140:170, 240:260] & ref[140:170, 240:260]).any()
    # the whole-frame path is the reference too
    np.testing.assert_array_equal(seg_gaps.gap_lines(mask, cores), ref)


def _full_lines(mask, cores, near_px=None, **kw):
    return seg_gaps.gap_lines(mask, cores, **kw)


def _whole_frame_flood(image, markers, band, label, boxes=None, reach=None):
    from skimage.filters import sobel
    from skimage.segmentation import watershed

    return watershed(sobel(image), np.where(band, markers, 0), mask=band) == label


@pytest.mark.parametrize("seed", [1, 2])
def test_band_flood_equals_one_whole_frame_watershed(seed):
    # reference library: skimage.segmentation.watershed on skimage.filters.sobel of the whole frame; pieces
    # of the band touch the frame's edges, some hold no seed of the label asked for
    rng = np.random.default_rng(seed)
    image = ndi.gaussian_filter(rng.random((160, 210)), 2.0).astype(np.float32)
    blobs = ndi.gaussian_filter(rng.random(image.shape), 4.0)
    inside = blobs > np.quantile(blobs, 0.6)
    band = ndi.binary_dilation(inside, iterations=3) & ~ndi.binary_erosion(inside, iterations=3)
    markers = np.zeros(image.shape, np.int32)
    markers[~ndi.binary_dilation(inside, iterations=2)] = 1
    markers[ndi.binary_erosion(inside, iterations=2)] = 2
    markers[rng.random(image.shape) > 0.995] = 3
    near = ndi.binary_dilation(band & (markers == 0), structure=ndi.generate_binary_structure(2, 1))
    assert near[0].any() or near[:, 0].any() or near[-1].any() or near[:, -1].any()
    for label in (1, 2, 3):
        got = band_flood.flood_band(image, markers, near, label)
        np.testing.assert_array_equal(got, _whole_frame_flood(image, markers, near, label))


@pytest.mark.parametrize("seed, kw", [(0, {}), (3, {"refine_nm": 6 * bu.PIXEL_SIZE_NM, "close_nm": 3 * bu.PIXEL_SIZE_NM}),
                                      (5, {"method": "noise"})])
def test_foreground_equals_the_one_with_whole_frame_kernels(seed, kw, monkeypatch):
    # reference: the same foreground with the dividing lines computed over the whole frame (checked above
    # against scikit-image) and the refinement flooded by one scikit-image watershed over the whole frame;
    # a rendered field of 640 px with 40 grains (invented data)
    raw = bu.render_frames(1, 640, grains=40, seed=seed)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    levels = seg_levels.frame_levels(arr)
    kw = {"method": "auto", **kw}
    fast = seg_fg.foreground(arr, bu.PIXEL_SIZE_NM, levels, **kw)
    monkeypatch.setattr(seg_fg, "gap_lines", _full_lines)
    monkeypatch.setattr(seg_fg, "flood_band", _whole_frame_flood)
    slow = seg_fg.foreground(arr, bu.PIXEL_SIZE_NM, levels, **kw)
    assert slow.sum() > 0.05 * slow.size
    np.testing.assert_array_equal(fast, slow)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16, np.int16, np.float32])
def test_histogram_median_equals_numpy_median(dtype):
    # reference library: numpy.median (odd and even counts, a single value, a constant run)
    rng = np.random.default_rng(7)
    top = 200 if dtype == np.uint8 else 60000 if dtype == np.uint16 else 3000
    for n in (1, 2, 3, 10, 11, 4096, 4097):
        values = rng.integers(0, top, n).astype(dtype)
        assert image_stats.median(values) == float(np.median(values))
    assert image_stats.median(np.full(6, 9, dtype)) == 9.0


@pytest.mark.parametrize("seed", range(4))
def test_inscribed_radii_equal_two_distance_transforms(seed):
    # reference library: scipy.ndimage.distance_transform_edt of each padded mask on its own
    rng = np.random.default_rng(seed)
    for h, w in ((1, 1), (3, 17), (25, 9), (40, 40)):
        a = ndi.binary_opening(rng.random((h, w)) > 0.3) if min(h, w) > 2 else rng.random((h, w)) > 0.3
        b = a & (rng.random((h, w)) > 0.2)
        got = mark_shapes.inscribed_radii(a, b)
        want = tuple(float(ndi.distance_transform_edt(np.pad(m, 1)).max()) for m in (a, b))
        assert got == want


@pytest.mark.parametrize("radius", [0, 0.5, 1, 1.5, 2, 2.3, 3, 3.7, 5, 6.5, 31, 33.5])
def test_disk_morphology_equals_scipy_binary_morphology(radius):
    # reference library: scipy.ndimage.binary_erosion / binary_dilation / binary_closing with the disk as
    # structuring element (scikit-image's disk for whole radii), both border values, widths around 64
    from skimage.morphology import disk

    structure = seg_fg.disk_structure(radius)
    if float(radius).is_integer():
        np.testing.assert_array_equal(structure, disk(int(radius)).astype(bool))
    rng = np.random.default_rng(int(radius * 10))
    for shape in ((97, 131), (5, 64), (70, 1), (64, 60), (33, 129)):
        m = rng.random(shape) > 0.4
        if min(shape) > 2:
            m = ndi.binary_opening(m)
        for border in (0, 1):
            np.testing.assert_array_equal(disk_morphology.erode_disk(m, radius, border),
                                          ndi.binary_erosion(m, structure, border_value=border))
        np.testing.assert_array_equal(disk_morphology.dilate_disk(m, radius), ndi.binary_dilation(m, structure))
        np.testing.assert_array_equal(disk_morphology.close_disk(m, radius),
                                      ndi.binary_closing(m, structure, border_value=0))


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_half_height_mask_equals_whole_frame_form(dtype):
    # reference library: scipy.ndimage.maximum per label and binary_erosion over the whole frame
    raw = bu.render_frames(1, 512, grains=20, seed=9)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    arr = arr.astype(dtype)
    noise = seg_levels.frame_levels(arr)["noise"]
    for edge in (0.3, 0.5, 0.8):
        np.testing.assert_array_equal(seg_fg.half_height_mask(arr, noise, edge),
                                      half_height_reference(arr, noise, edge))


def _annotation_kind_reference(part, raw):
    """The shape test with both inscribed radii from scipy's distance transform, always."""
    from skimage.morphology import convex_hull_image

    area = float(part.sum())
    if area < 4:
        return None
    if mark_shapes.aligned_bar(part) is not None:  # the same bar rule in both
        return "line"
    r = float(ndi.distance_transform_edt(np.pad(part, 1)).max())
    elong = area / (4.0 * r * r)
    if elong > mark_shapes.LINE_ELONGATION and r <= 2 * mark_shapes.STROKE_MAX_HALF_WIDTH_PX:
        return "line"
    raw = raw & part
    raw_area = float(raw.sum())
    if raw_area > 0:
        r_raw = float(ndi.distance_transform_edt(np.pad(raw, 1)).max())
        if r_raw <= mark_shapes.STROKE_MAX_HALF_WIDTH_PX and raw_area / (4.0 * r_raw * r_raw) > mark_shapes.STROKE_ELONGATION:
            if raw_area < mark_shapes.STROKE_SOLIDITY * float(convex_hull_image(raw).sum()):
                return "stroke"
    if elong > mark_shapes.STROKE_ELONGATION and r <= mark_shapes.STROKE_MAX_HALF_WIDTH_PX:
        if area / max(float(convex_hull_image(part).sum()), 1.0) < mark_shapes.STROKE_SOLIDITY:
            return "stroke"
    return None


def test_annotation_kind_equals_the_distance_transform_form():
    # reference library: scipy.ndimage.distance_transform_edt for both radii on every object; objects:
    # rendered grains (invented data), bars of widths 1-17 px, rings, arcs and random blobs
    from skimage.draw import disk as draw_disk

    shapes = []
    raw = bu.render_frames(1, 512, grains=24, seed=4)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    levels = seg_levels.frame_levels(arr)
    fg = seg_fg.foreground(arr, bu.PIXEL_SIZE_NM, levels, "auto")
    above = arr > levels["noise"]
    lab, _ = ndi.label(fg)
    for k, box in enumerate(ndi.find_objects(lab), start=1):
        shapes.append((lab[box] == k, above[box]))
    rng = np.random.default_rng(5)
    for w in (1, 2, 3, 5, 8, 9, 12, 17):
        for length in (20, 90, 300):
            bar = np.ones((w, length), bool)
            shapes.append((bar, bar))
            shapes.append((bar, bar & (rng.random(bar.shape) > 0.3)))
    for outer, inner in ((10, 7), (14, 11), (20, 12), (30, 27)):
        yy, xx = np.mgrid[-outer:outer + 1, -outer:outer + 1]
        ring = (yy * yy + xx * xx <= outer * outer) & (yy * yy + xx * xx > inner * inner)
        shapes.append((ring | (yy * yy + xx * xx <= inner * inner), ring))
        shapes.append((ring & (xx < outer // 3), ring & (xx < outer // 3)))
    for _ in range(40):
        blob = np.zeros((60, 70), bool)
        for _ in range(rng.integers(1, 5)):
            blob[draw_disk((rng.integers(10, 50), rng.integers(10, 60)), rng.integers(2, 12), shape=blob.shape)] = True
        shapes.append((blob, blob & (rng.random(blob.shape) > rng.random() * 0.5)))
    kinds = [_annotation_kind_reference(p, a) for p, a in shapes]
    assert {"line", "stroke", None} <= set(kinds)
    assert [mark_shapes.annotation_kind(p, a) for p, a in shapes] == kinds


def _hull_test_shapes():
    """Random masks (noise, opened noise, single pixels, lines, empty) and the split parts of a rendered
    field of 512 px (invented data)."""
    from skimage.draw import line as draw_line

    rng = np.random.default_rng(11)
    shapes = [np.zeros((5, 7), bool), np.ones((1, 1), bool), np.ones((3, 1), bool), np.ones((1, 9), bool)]
    for _ in range(600):
        h, w = (int(v) for v in rng.integers(1, 48, 2))
        m = rng.random((h, w)) > rng.random()
        if rng.random() < 0.5 and min(h, w) > 2:
            m = ndi.binary_opening(m)
        shapes.append(m)
    for _ in range(40):
        m = np.zeros((40, 50), bool)
        r0, r1 = (int(v) for v in rng.integers(0, 40, 2))
        c0, c1 = (int(v) for v in rng.integers(0, 50, 2))
        m[draw_line(r0, c0, r1, c1)] = True
        shapes.append(m)
    raw = bu.render_frames(1, 512, grains=24, seed=2)[0]
    arr, _, _ = pp.flatten(raw, bu.PIXEL_SIZE_NM)
    lab, _, _ = seg_grains.label_grains(arr, bu.PIXEL_SIZE_NM, seg_levels.frame_levels(arr), method="auto")
    shapes += [np.pad(lab[box] == k, 1) for k, box in enumerate(ndi.find_objects(lab), start=1)]
    return shapes


def test_convex_hull_mask_equals_scikit_image_convex_hull_image():
    # reference library: skimage.morphology.convex_hull_image (default options: pixel-edge midpoints,
    # borders included), pixel for pixel
    import warnings

    from skimage.morphology import convex_hull_image

    for m in _hull_test_shapes():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # scikit-image warns on an empty mask
            want = convex_hull_image(m)
        np.testing.assert_array_equal(hull_fill.convex_hull_mask(m), want)


def _concavity_depth_reference(mask):
    """Deepest concavity with scikit-image's hull and scipy's distance transform of the whole box."""
    from skimage.morphology import convex_hull_image

    if mask.sum() < 3:
        return 0.0
    pocket = convex_hull_image(mask) & ~mask
    if not pocket.any():
        return 0.0
    return float(ndi.distance_transform_edt(~mask)[pocket].max())


def test_concavity_depth_equals_the_scikit_image_hull_form():
    # reference library: skimage.morphology.convex_hull_image and scipy.ndimage.distance_transform_edt;
    # every shape twice in a row (the second answer comes from the one-shape memory) and once mirrored
    for m in _hull_test_shapes():
        want = _concavity_depth_reference(m)
        assert touching.concavity_depth(m) == want
        assert touching.concavity_depth(m.copy()) == want
        assert touching.concavity_depth(m[::-1].copy()) == _concavity_depth_reference(m[::-1])


@pytest.mark.parametrize("radius", [0, 1, 2.5, 4, 5.3, 8])
def test_survives_disk_erosion_equals_the_erosion(radius):
    # reference: scipy.ndimage.binary_erosion of the padded mask by the disk (border 0); bars of every
    # width around the radius, rings, random blobs and rendered grains' parts
    shapes = _hull_test_shapes()[::3]
    for w in range(1, 20):
        shapes.append(np.ones((w, 40), bool))
        shapes.append(np.ones((40, w), bool))
    for m in shapes:
        want = ndi.binary_erosion(np.pad(m, 1), seg_fg.disk_structure(radius), border_value=0).any()
        assert mark_shapes.survives_disk_erosion(m, radius) == want


def _convexity_defects_reference(mask, min_depth):
    """Every hull edge's distance profile handed to scipy.signal.find_peaks, however low."""
    from scipy.signal import find_peaks
    from scipy.spatial import ConvexHull, QhullError
    from skimage.measure import find_contours

    contours = find_contours(np.pad(mask, 1).astype(np.float32), 0.5)
    pts = max(contours, key=len)[:-1] - 1.0 if contours else np.zeros((0, 2))
    try:
        hv = np.sort(ConvexHull(pts).vertices) if len(pts) >= 8 else None
    except QhullError:
        hv = None
    if hv is None:
        return []
    out = []
    for k in range(len(hv)):
        i, j = hv[k], hv[(k + 1) % len(hv)]
        idx = np.arange(i, j + 1) if j > i else np.r_[np.arange(i, len(pts)), np.arange(0, j + 1)]
        if len(idx) < 3:
            continue
        a, b = pts[i], pts[j]
        ab = b - a
        norm = float(np.hypot(*ab))
        if norm == 0:
            continue
        seg = pts[idx]
        dist = np.abs(ab[0] * (seg[:, 1] - a[1]) - ab[1] * (seg[:, 0] - a[0])) / norm
        peaks = find_peaks(np.r_[0.0, dist, 0.0], height=min_depth, prominence=0.5 * min_depth)[0]
        out.extend((seg[m - 1], float(dist[m - 1])) for m in peaks)
    return out


def test_convexity_defects_equal_scipy_find_peaks_on_every_hull_edge():
    # reference library: scipy.signal.find_peaks on the distance profile of every hull edge (the shortcut
    # skips edges whose profile never reaches the height); rendered grains and their unions (touching pairs)
    shapes = [m for m in _hull_test_shapes() if m.sum() >= 30 and min(m.shape) >= 5]
    for a, b in zip(shapes[::2], shapes[1::2]):
        h, w = max(a.shape[0], b.shape[0]), a.shape[1] + b.shape[1] - 3
        pair = np.zeros((h, w), bool)
        pair[:a.shape[0], :a.shape[1]] |= a
        pair[:b.shape[0], w - b.shape[1]:] |= b
        shapes.append(pair)
    found = 0
    for m in shapes:
        for depth in (2.0, 3.5):
            got = touching.convexity_defects(m, depth)
            want = _convexity_defects_reference(m, depth)
            assert len(got) == len(want)
            for (p, d), (q, e) in zip(got, want):
                np.testing.assert_array_equal(p, q)
                assert d == e
            found += len(got)
    assert found > 20


def test_fill_holes_equals_scipy_with_one_or_many_outer_pieces():
    # reference library: scipy.ndimage.binary_fill_holes; masks with no hole, with holes and one background
    # piece touching the edge, with several such pieces (a band across the frame), and a full frame
    rng = np.random.default_rng(3)
    cases = []
    blobs = ndi.gaussian_filter(rng.random((120, 150)), 2.5)
    for level in (0.52, 0.5, 0.48):
        m = blobs > level
        cases.append(m)
        ring = m.copy()
        ring[30:50, 30:50] = True
        ring[35:45, 35:45] = False
        cases.append(ring)
        band = ring.copy()
        band[:, 70:73] = True
        cases.append(band)
    ring = np.zeros((30, 40), bool)
    ring[5:20, 5:25] = True
    ring[8:12, 8:12] = False
    cases += [ring, np.ones((4, 4), bool), np.zeros((4, 4), bool), np.pad(np.ones((3, 3), bool), 1)]
    kinds = set()
    for m in cases:
        back, n = ndi.label(~m)
        outer = np.unique(np.concatenate([back[0], back[-1], back[:, 0], back[:, -1]]))
        kinds.add((min(int((outer > 0).sum()), 2), n > (outer > 0).sum()))  # (pieces at the edge, any hole)
        np.testing.assert_array_equal(seg_fg.fill_holes(m), ndi.binary_fill_holes(m))
    assert {(1, True), (2, True), (1, False), (0, False)} <= kinds
