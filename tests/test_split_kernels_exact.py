"""Kernels of the splitting of touching grains (issue 19, eighth round), each against the form it replaces.

References named beside each check: scikit-image's ``h_maxima`` and ``watershed`` (the distance-map
floods), scipy's ``ConvexHull`` (Quickhull, which gave the hull's vertices before) and scikit-image's
``convex_hull_image``. Shapes are invented (random blobs, discs in rows and heaps).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage as ndi

from grainhabit.plugins.segment import band_flood, distance_maxima, foreground, hull_fill, touching


def _blobs(seed, n=40):
    """Random shapes: smoothed noise at several scales, touching discs, sparse pixels (invented)."""
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        shape = tuple(int(v) for v in rng.integers(2, 90, 2))
        kind = rng.random()
        if kind < 0.6:
            m = ndi.gaussian_filter(rng.random(shape), rng.uniform(0.7, 6.0)) > rng.uniform(0.45, 0.55)
        elif kind < 0.85:
            yy, xx = np.mgrid[:shape[0], :shape[1]]
            m = np.zeros(shape, bool)
            for _ in range(int(rng.integers(1, 7))):
                cy, cx = rng.uniform(0, shape[0]), rng.uniform(0, shape[1])
                m |= np.hypot(yy - cy, xx - cx) < rng.uniform(2, 20)
        else:
            m = rng.random(shape) > rng.uniform(0.7, 0.97)
        out.append(m)
    return out


@pytest.mark.parametrize("seed", range(6))
def test_distance_h_maxima_equals_scikit_image_h_maxima(seed):
    # reference library: skimage.morphology.h_maxima on the Euclidean distance map (scipy's
    # distance_transform_edt), at the h values the splitter uses and at values on the map's own levels
    # (sqrt of whole numbers: ties between seed and mask values)
    from skimage.morphology import h_maxima

    rng = np.random.default_rng(100 + seed)
    checked = 0
    for m in _blobs(seed):
        dist = ndi.distance_transform_edt(m)
        dmax = float(dist.max())
        hs = [max(f * dmax, touching.H_MIN_PX) for f in touching.H_FRACTIONS]
        hs += [1.0, 2.0, float(np.sqrt(5.0)), float(rng.uniform(0.1, 3.0)), dmax + 1.0]
        squared = distance_maxima.squared_distances(dist)
        assert squared is not None
        for h in hs:
            want = h_maxima(dist, h)
            got = distance_maxima.distance_h_maxima(dist, h)
            assert got.dtype == want.dtype
            np.testing.assert_array_equal(got, want)
            np.testing.assert_array_equal(distance_maxima.distance_h_maxima(dist, h, squared), want)
            checked += 1
    assert checked >= 200


def test_distance_h_maxima_of_other_images_takes_scikit_image():
    # reference library: skimage.morphology.h_maxima; an image that is no distance map goes the public way
    from skimage.morphology import h_maxima

    rng = np.random.default_rng(3)
    image = ndi.gaussian_filter(rng.random((40, 50)), 2.0)
    assert distance_maxima.squared_distances(image) is None
    np.testing.assert_array_equal(distance_maxima.distance_h_maxima(image, 0.01), h_maxima(image, 0.01))
    assert distance_maxima.squared_distances(np.float32(image)) is None


def _floods_reference(dist, mask):
    """touching._distance_floods as it was: scikit-image's h_maxima and watershed."""
    from skimage.morphology import h_maxima
    from skimage.segmentation import watershed

    dmax = float(dist.max())
    for frac in touching.H_FRACTIONS:
        h = max(frac * dmax, touching.H_MIN_PX)
        if h >= dmax:
            continue
        markers, n = ndi.label(h_maxima(dist, h), structure=np.ones((3, 3), bool))
        if n < 2:
            continue
        ws = watershed(-dist, markers, mask=mask)
        yield ws, n


@pytest.mark.parametrize("seed", range(3))
def test_distance_floods_equal_scikit_image_floods(seed):
    # reference library: skimage.morphology.h_maxima + skimage.segmentation.watershed (the form replaced)
    floods = 0
    for m in _blobs(50 + seed, n=30):
        m = ndi.binary_fill_holes(m)
        dist = ndi.distance_transform_edt(m)
        want = list(_floods_reference(dist, m))
        got = list(touching._distance_floods(dist, m))
        assert len(got) == len(want)
        for (ws, parts, n), (ws_ref, n_ref) in zip(got, want):
            assert n == n_ref
            assert ws.dtype == ws_ref.dtype
            np.testing.assert_array_equal(ws, ws_ref)
            floods += 1
    assert floods > 5


def _quickhull_vertices(mask):
    """hull_fill.hull_vertices2 as it was: Quickhull (scipy.spatial.ConvexHull) over the same points."""
    from scipy.spatial import ConvexHull

    m = np.asarray(mask, bool)
    rows, cols = np.nonzero(m)
    # every pixel's four edge midpoints, doubled (a superset of the points hull_vertices2 keeps)
    ys = np.concatenate([2 * rows - 1, 2 * rows + 1, 2 * rows, 2 * rows])
    xs = np.concatenate([2 * cols, 2 * cols, 2 * cols - 1, 2 * cols + 1])
    pts = np.unique(np.stack([ys, xs], axis=1), axis=0)
    return pts[ConvexHull(pts.astype(float)).vertices]


@pytest.mark.parametrize("seed", range(4))
def test_hull_vertices_equal_quickhull(seed):
    # reference library: scipy.spatial.ConvexHull (Quickhull) of the doubled edge midpoints of every pixel;
    # the same vertex set, in order around the hull, and the same hull image as scikit-image's
    # convex_hull_image
    from skimage.morphology import convex_hull_image

    shapes = _blobs(200 + seed) + [np.ones((1, 1), bool), np.ones((1, 7), bool), np.ones((6, 1), bool),
                                   np.eye(5, dtype=bool), np.eye(6, dtype=bool)[::-1]]
    for m in shapes:
        if not m.any():
            continue
        got = hull_fill.hull_vertices2(m)
        want = _quickhull_vertices(m)
        assert set(map(tuple, got.tolist())) == set(map(tuple, want.tolist()))
        # in order around the hull: every turn the same way (no collinear vertex kept)
        if len(got) >= 3:
            e = np.roll(got, -1, axis=0) - got
            turn = e[:, 0] * np.roll(e, -1, axis=0)[:, 1] - e[:, 1] * np.roll(e, -1, axis=0)[:, 0]
            assert (turn > 0).all() or (turn < 0).all()
        np.testing.assert_array_equal(hull_fill.convex_hull_mask(m), convex_hull_image(m))


def test_split_component_equals_the_scikit_image_kernels(monkeypatch):
    # reference library: skimage.morphology.h_maxima and skimage.segmentation.watershed put back in the
    # splitter; the parts of touching discs in chains and heaps (invented shapes) are the same
    from skimage.morphology import h_maxima
    from skimage.segmentation import watershed

    rng = np.random.default_rng(9)
    yy, xx = np.mgrid[:120, :160]
    shapes = []
    for _ in range(8):
        m = np.zeros((120, 160), bool)
        for _ in range(int(rng.integers(2, 9))):
            m |= np.hypot(yy - rng.uniform(20, 100), xx - rng.uniform(20, 140)) < rng.uniform(8, 22)
        lab, n = ndi.label(m)
        big = np.argmax(np.bincount(lab.ravel())[1:]) + 1
        shapes.append(ndi.binary_fill_holes(lab == big))
    got = [touching.split_component(m, 30.0) for m in shapes]
    monkeypatch.setattr(touching, "distance_h_maxima", lambda dist, h, squared=None: h_maxima(dist, h))
    monkeypatch.setattr(touching, "watershed_window", lambda image, seeds, mask: watershed(image, seeds, mask=mask))
    want = [touching.split_component(m, 30.0) for m in shapes]
    assert sum(len(p) for p in want) > len(shapes)  # some were split
    for g, w in zip(got, want):
        assert len(g) == len(w)
        for a, b in zip(g, w):
            np.testing.assert_array_equal(a, b)


@pytest.mark.parametrize("seed", range(3))
def test_inscribed_radius_in_the_box_equals_the_whole_transform(seed):
    # reference library: scipy.ndimage.distance_transform_edt of the whole array (parts touching the array's
    # edge, parts in pieces, single pixels)
    for m in _blobs(300 + seed) + [np.ones((5, 7), bool), np.zeros((4, 4), bool)]:
        want = float(ndi.distance_transform_edt(m).max())
        assert touching._inscribed_radius(m) == want


def test_distance_map_is_the_transform_and_remembered_read_only():
    # reference library: scipy.ndimage.distance_transform_edt
    for m in _blobs(400, n=10):
        want = ndi.distance_transform_edt(m)
        got = touching._distance_map(m)
        np.testing.assert_array_equal(got, want)
        assert touching._distance_map(m.copy()) is got  # the same shape again: not computed twice
        assert not got.flags.writeable
    a = np.zeros((6, 6), bool)
    a[1:4, 1:4] = True
    b = np.zeros((6, 6), bool)
    b[2:5, 2:5] = True
    np.testing.assert_array_equal(touching._distance_map(a), ndi.distance_transform_edt(a))
    np.testing.assert_array_equal(touching._distance_map(b), ndi.distance_transform_edt(b))


def _band_case(seed):
    """A rendered-like band: blobs (invented), their band of 3 px each side, markers 1/2 and stray 3s."""
    rng = np.random.default_rng(seed)
    image = ndi.gaussian_filter(rng.random((170, 230)), 2.0).astype(np.float32)
    blobs = ndi.gaussian_filter(rng.random(image.shape), 4.0)
    inside = blobs > np.quantile(blobs, 0.6)
    markers = np.zeros(image.shape, np.int8)
    markers[~ndi.binary_dilation(inside, iterations=3)] = 1
    markers[ndi.binary_erosion(inside, iterations=3)] = 2
    markers[rng.random(image.shape) > 0.995] = 3
    near = ndi.binary_dilation(markers == 0, structure=ndi.generate_binary_structure(2, 1))
    lab, _ = ndi.label(inside, structure=np.ones((3, 3), bool))
    return image, markers, near, ndi.find_objects(lab)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_band_flood_by_box_clusters_equals_one_whole_frame_watershed(seed):
    # reference library: skimage.segmentation.watershed on skimage.filters.sobel of the whole frame (the
    # band within 4 px of the blobs' boxes: the clusters path; and with a reach too short: the labelled path)
    from skimage.filters import sobel
    from skimage.segmentation import watershed

    image, markers, near, boxes = _band_case(seed)
    assert len(band_flood.box_clusters(boxes, 4, near.shape)) < len(boxes)  # some clusters of several boxes
    for label in (1, 2, 3):
        want = watershed(sobel(image), np.where(near, markers, 0).astype(np.int32), mask=near) == label
        for reach in (4, 1):
            got = band_flood.flood_band(image, markers, near, label, boxes, reach)
            np.testing.assert_array_equal(got, want)
    clustered = band_flood._flood_clusters(image, markers, near, 2, boxes, 4)
    assert clustered is not None  # the clusters path ran
    assert band_flood._flood_clusters(image, markers, near, 2, boxes, 1) is None  # too short a reach: refused


def test_box_clusters_join_boxes_that_touch_once_grown():
    # reference: handbook geometry of rectangles (two boxes grown by g overlap or share an edge when at most
    # 2 g pixels lie between them)
    boxes = [(slice(0, 5), slice(0, 5)), None, (slice(0, 5), slice(9, 14)), (slice(30, 35), slice(30, 35))]
    assert band_flood.box_clusters(boxes, 2, (100, 100)) == [[0, 2], [3]]  # 4 px between: 2 + 2
    assert band_flood.box_clusters(boxes, 1, (100, 100)) == [[0], [2], [3]]  # 4 px > 1 + 1


def test_markers_of_equals_two_boolean_assignments():
    # reference: numpy boolean-mask assignment, the form replaced
    rng = np.random.default_rng(5)
    bg, grains = rng.random((50, 60)) > 0.5, rng.random((50, 60)) > 0.7
    want = np.zeros(bg.shape, np.int8)
    want[bg] = 1
    want[grains] = 2
    got = foreground.markers_of(bg, grains)
    assert got.dtype == np.int8
    np.testing.assert_array_equal(got, want)


@pytest.mark.parametrize("seed", range(3))
def test_concavity_depth_equals_the_whole_array_reference(seed):
    # reference library: skimage.morphology.convex_hull_image and scipy.ndimage.distance_transform_edt over the
    # whole array, max over the hull's pocket; the same shapes placed at other offsets in larger arrays
    from skimage.morphology import convex_hull_image

    rng = np.random.default_rng(500 + seed)
    touching._DEPTHS.clear()
    for m in _blobs(500 + seed, n=25):
        lab, n = ndi.label(m, structure=np.ones((3, 3), bool))
        if n == 0:
            continue
        shape = lab == 1 + int(np.argmax(np.bincount(lab.ravel())[1:]))
        if shape.sum() < 3:
            continue
        pocket = convex_hull_image(shape) & ~shape
        want = float(ndi.distance_transform_edt(~shape)[pocket].max()) if pocket.any() else 0.0
        assert touching.concavity_depth(shape) == want
        big = np.zeros((shape.shape[0] + 9, shape.shape[1] + 14), bool)
        dy, dx = int(rng.integers(0, 10)), int(rng.integers(0, 15))
        big[dy:dy + shape.shape[0], dx:dx + shape.shape[1]] = shape
        assert touching.concavity_depth(big) == want
        touching._DEPTHS.clear()
        assert touching.concavity_depth(big) == want  # computed afresh at the other offset


def _defects_reference(mask, min_depth):
    """touching.convexity_defects as it was: every hull edge visited in turn."""
    from scipy.spatial import ConvexHull
    from skimage.measure import find_contours

    contours = find_contours(np.pad(mask, 1).astype(np.float32), 0.5)
    pts = max(contours, key=len)[:-1] - 1.0
    if len(pts) < 8:
        return []
    hv = np.sort(ConvexHull(pts).vertices)
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
        peaks = touching.find_peaks(np.r_[0.0, dist, 0.0], height=min_depth, prominence=0.5 * min_depth)
        out.extend((seg[m - 1], float(dist[m - 1])) for m in peaks)
    return out


@pytest.mark.parametrize("seed", range(3))
def test_convexity_defects_equal_the_edge_by_edge_loop(seed):
    # reference: the loop over every hull edge (scipy.spatial.ConvexHull of skimage.measure.find_contours'
    # outline, scipy.signal.find_peaks' rule through touching.find_peaks, itself checked against scipy)
    found = 0
    for m in _blobs(600 + seed, n=30):
        lab, n = ndi.label(m, structure=np.ones((3, 3), bool))
        if n == 0:
            continue
        shape = ndi.binary_fill_holes(lab == 1 + int(np.argmax(np.bincount(lab.ravel())[1:])))
        if shape.sum() < 20:
            continue
        for min_depth in (0.5, 1.0, 2.0, 3.5):
            got = touching.convexity_defects(shape, min_depth)
            want = _defects_reference(shape, min_depth)
            assert len(got) == len(want)
            for (p, d), (q, e) in zip(got, want):
                np.testing.assert_array_equal(p, q)
                assert d == e
            found += len(got)
    assert found > 20


@pytest.mark.parametrize("margin", [1, 2, 8])
def test_pocket_depth_in_a_window_equals_the_whole_transform(margin, monkeypatch):
    # reference library: scipy.ndimage.distance_transform_edt of the whole array, max over the hull's pocket
    # (skimage.morphology.convex_hull_image); blobs, a C, an L and a cross (invented shapes); small first
    # margins make the window grow
    from skimage.morphology import convex_hull_image

    monkeypatch.setattr(touching, "POCKET_WINDOW_PX", margin)
    yy, xx = np.mgrid[:90, :90]
    ring = (np.hypot(yy - 45, xx - 45) < 40) & (np.hypot(yy - 45, xx - 45) > 28) & ~((xx > 45) & (abs(yy - 45) < 12))
    ell = np.zeros((60, 60), bool)
    ell[:, :8] = True
    ell[-8:, :] = True
    cross = np.zeros((61, 61), bool)
    cross[27:34, :] = True
    cross[:, 27:34] = True
    shapes = [ring, ell, cross] + [m for m in _blobs(700 + margin, n=20)]
    deep_cases = 0
    for shape in shapes:
        lab, n = ndi.label(shape, structure=np.ones((3, 3), bool))
        if n == 0:
            continue
        shape = lab == 1 + int(np.argmax(np.bincount(lab.ravel())[1:]))
        pocket = convex_hull_image(shape) & ~shape
        if not pocket.any():
            continue
        want = float(ndi.distance_transform_edt(~shape)[pocket].max())
        assert touching._pocket_depth(shape, pocket) == want
        deep_cases += want >= 2.0
    assert deep_cases >= 3


def _seam_contrast_reference(image, mask, parts, rr, cc):
    """touching.seam_contrast in the slower form: two distance transforms and a frame grey erosion."""
    smooth = ndi.gaussian_filter(np.asarray(image, np.float32), 1.0)
    dist = ndi.distance_transform_edt(mask)
    on = dist[rr, cc] > touching.EDGE_PX
    if on.sum() < 3:
        return 0.0
    darkest = ndi.grey_erosion(smooth, footprint=np.ones((3, 3), bool))
    seam = float(darkest[rr[on], cc[on]].mean())
    # the lines beside the cut (SEAM_SIDE_PX along its normal), read on the frame's grey erosion
    dr, dc = float(rr[-1] - rr[0]), float(cc[-1] - cc[0])
    norm = np.hypot(dr, dc)
    sides = []
    for sign in (1.0, -1.0):
        r = np.rint(rr[on] + sign * touching.SEAM_SIDE_PX * -dc / max(norm, 1e-300)).astype(int)
        c = np.rint(cc[on] + sign * touching.SEAM_SIDE_PX * dr / max(norm, 1e-300)).astype(int)
        ok = (r >= 0) & (r < mask.shape[0]) & (c >= 0) & (c < mask.shape[1])
        ok[ok] = dist[r[ok], c[ok]] > touching.EDGE_PX
        sides.append(darkest[r[ok], c[ok]].mean() if ok.sum() >= 3 else None)
    if norm > 0 and None not in sides and min(sides) > 0 and 1.0 - seam / min(sides) < touching.SEAM_SIDE_DIP:
        return 1.0 - seam / float(min(sides))
    line = np.ones(mask.shape, bool)
    line[rr, cc] = False
    clear = ndi.distance_transform_edt(line) > touching.SEAM_CLEAR_PX
    levels = []
    for part in parts:
        inner = part & (dist > touching.EDGE_PX) & clear
        if inner.sum() < 3:
            return 0.0
        levels.append(float(np.median(smooth[inner])))
    low = min(levels)
    return 1.0 - seam / low if low > 0 else 0.0


@pytest.mark.parametrize("seed", range(4))
def test_seam_contrast_equals_the_distance_transform_form(seed):
    # reference library: scipy.ndimage.distance_transform_edt and grey_erosion (the form replaced); two discs
    # meeting at a seam (invented), cuts across them at random rows, some reaching the box's edge
    from skimage.draw import line

    rng = np.random.default_rng(800 + seed)
    yy, xx = np.mgrid[:50, :80]
    mask = (np.hypot(yy - 25, xx - 22) < 20) | (np.hypot(yy - 25, xx - 56) < 21)
    if seed == 3:
        mask = np.ones((50, 80), bool)  # no background in the box
    image = (mask * 1.0 + rng.normal(0, 0.05, mask.shape)).astype(np.float32)
    image[:, 38:41] *= 0.6  # a darker seam
    seen = 0
    for _ in range(12):
        r0, r1 = int(rng.integers(0, 50)), int(rng.integers(0, 50))
        c = int(rng.integers(30, 50))
        rr, cc = line(r0, c + int(rng.integers(-3, 4)), r1, c)
        parts = [mask & (xx < c), mask & (xx >= c)]
        want = _seam_contrast_reference(image, mask, parts, rr, cc)
        got = touching.seam_contrast(image, mask, parts, rr, cc)
        assert got == want
        seen += want != 0.0
    assert seen > 0


@pytest.mark.parametrize("seed", range(3))
def test_packed_euler_number_equals_scikit_image(seed):
    # reference library: skimage.measure.euler_number (connectivity 2); widths round multiples of 64 (the packed
    # words' edges), random masks and blobs with holes (invented)
    from skimage.measure import euler_number

    rng = np.random.default_rng(900 + seed)
    for cols in (1, 2, 61, 62, 63, 64, 65, 126, 127, 128, 129, 200):
        rows = int(rng.integers(1, 40))
        for m in (rng.random((rows, cols)) > 0.5,
                  ndi.gaussian_filter(rng.random((rows, cols)), 1.5) > 0.5, np.ones((rows, cols), bool)):
            assert foreground._euler_number8_packed(m) == euler_number(m, connectivity=2)
