"""Read, measure and habit kernels of the ninth speed round (issue 19), each equal to the form it replaces.

The references are the forms as they stood before (kept here, not in the package). Test images are
invented: noisy frames with and without drawn info strips (the builders of the reader tests), and
label images drawn with scikit-image (``skimage.draw``); the outlines keep their check against
``skimage.measure.find_contours`` in ``tests/test_contours_exact.py``.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from builders import noisy, with_info_strip

from grainhabit.plugins.common import contours as co
from grainhabit.plugins.readers import overlays

# ------------------------------------------------------------------ info strip: rows read lazily


def _find_info_strip_reference(image):
    """``overlays.find_info_strip`` as it stood before: the flatness of every candidate row worked out up front."""
    if image.ndim != 2 or image.dtype.kind not in "ui" or image.shape[0] < 50 or image.shape[1] < 50:
        return 0
    n_rows = image.shape[0]
    lowest = max(0, n_rows - int(overlays.MAX_STRIP_FRACTION * n_rows) - 6)
    flat = {r: f >= overlays.FLAT_ROW_FRACTION
            for r, f in overlays._row_flatness(image, range(lowest, n_rows)).items()}
    return overlays.find_info_strip(image, flat_rows=flat)


def _strip_images():
    rng = np.random.default_rng(3)
    out = []
    for shape in ((200, 256), (64, 80), (517, 300), (1000, 120)):
        for strip in (0, 1, 5, 8, 15, 22, 40, int(0.29 * shape[0]), int(0.35 * shape[0])):
            img = noisy(shape, seed=int(rng.integers(1 << 30)))
            if strip:
                img = with_info_strip(img, strip)
            out.append(img)
            # padded last rows, a noisy band through the strip, a flat image, a flat band above the strip
            odd = img.copy()
            odd[-1] = rng.integers(0, 255, shape[1])
            out.append(odd)
            if strip > 10:
                odd = img.copy()
                odd[-strip // 2:-strip // 2 + 3] = rng.integers(0, 255, (3, shape[1]))
                out.append(odd)
                odd = img.copy()
                odd[-strip - 30:-strip] = 90
                out.append(odd)
    out.append(np.zeros((200, 256), np.uint8))
    out.append(np.full((300, 300), 7, np.uint16))
    stripes = np.zeros((300, 200), np.uint16)
    stripes[::2] = rng.integers(0, 4, (150, 200))   # every other row flat
    out.append(stripes)
    out.append(noisy((200, 256), seed=9).astype(np.float32))   # float: never a strip
    return out


def test_info_strip_rows_read_lazily_give_the_eager_answer():
    images = _strip_images()
    found = [overlays.find_info_strip(img) for img in images]
    assert found == [_find_info_strip_reference(img) for img in images]
    assert sum(f > 0 for f in found) >= 10 and found.count(0) >= 10    # both answers occur


def test_lazy_flat_rows_cover_exactly_the_candidate_rows():
    img = with_info_strip(noisy((200, 256), seed=1), 22)
    lowest, rows = 100, img.shape[0]
    flat = overlays._LazyFlatRows(img, lowest)
    eager = overlays._row_flatness(img, range(lowest, rows))
    for r in (rows - 1, 150, 100, rows - 19, rows - 22, rows - 23):
        assert flat[r] == (eager[r] >= overlays.FLAT_ROW_FRACTION)
    for r in (99, rows):
        with pytest.raises(KeyError):
            flat[r]


# ------------------------------------------------------------------ outlines: the last trace remembered


def _label_images():
    from skimage.draw import disk, polygon

    rng = np.random.default_rng(11)
    out = []
    for dtype in (np.int32, np.int64, np.uint16):
        lab = np.zeros((140, 170), dtype)
        for i in range(1, 13):
            r, c = rng.integers(8, 132), rng.integers(8, 162)
            if i % 2:
                rr, cc = disk((r, c), rng.integers(3, 14), shape=lab.shape)
            else:
                rr, cc = polygon(r + rng.integers(-12, 12, 5), c + rng.integers(-12, 12, 5), shape=lab.shape)
            lab[rr, cc] = i
        out.append(lab)
    out.append((rng.random((60, 70)) < 0.4).astype(np.int32) * rng.integers(1, 9, (60, 70)).astype(np.int32))
    return out


def _fresh(lab, n, window):
    """Outlines traced without the memo (the code before it)."""
    xy, offsets, raw_area, pix = co._raw_outlines(lab, n)
    smooth = co._smooth_all(xy, offsets, window) if window > 1 else xy
    return smooth, offsets, xy, raw_area, pix


def _same(outl, ref):
    for got, want in zip((outl.xy, outl.offsets, outl.raw_xy, outl.raw_area, outl.pixel_xy), ref):
        assert got.dtype == want.dtype and np.array_equal(got, want)


@pytest.mark.parametrize("window", [0, 5, 9])
def test_remembered_trace_equals_a_new_trace(window):
    for lab in _label_images():
        n = int(lab.max())
        ref = _fresh(lab, n, window)
        _same(co.trace_outlines(lab, n, window), ref)           # traced and remembered
        _same(co.trace_outlines(lab.copy(), n, window), ref)    # an equal array: from the memo
        _same(co.trace_outlines(lab, n, 9 if window != 9 else 5), _fresh(lab, n, 9 if window != 9 else 5))
        # one label more than present: traced again, the extra outline empty
        _same(co.trace_outlines(lab, n + 1, window), _fresh(lab, n + 1, window))


def test_memo_sees_a_label_image_changed_in_place_and_hands_out_copies():
    lab = _label_images()[0].copy()
    n = int(lab.max())
    first = co.trace_outlines(lab, n, 0)
    first.raw_xy[:] = -1.0                        # a caller writing into its outlines changes nothing held
    first.offsets[:] = 0
    _same(co.trace_outlines(lab, n, 0), _fresh(lab, n, 0))
    rr, cc = np.nonzero(lab == 3)
    lab[rr[0], cc[0]] = 0                         # one pixel changed in place, where the cheap look may miss it
    _same(co.trace_outlines(lab, n, 5), _fresh(lab, n, 5))
    lab64 = lab.astype(np.int64)                  # same values, another data type
    _same(co.trace_outlines(lab64, n, 5), _fresh(lab64, n, 5))


def test_memo_skips_label_images_above_its_size_limit(monkeypatch):
    monkeypatch.setattr(co._TraceMemo, "MAX_PIXELS", 100)
    memo = co._TraceMemo()
    lab = _label_images()[0]
    memo.get(lab, int(lab.max()))
    assert memo.labels is None and memo.result is None


# ------------------------------------------------------------------ measure: coordinate sums over row runs


def _label_moments_reference(labels, image=None, n_labels=None):
    """``measure_grains.label_moments`` as it stood before: one ``np.bincount`` per moment over the pixels."""
    lab = np.asarray(labels)
    n = int(lab.max()) if n_labels is None else int(n_labels)
    flat = lab.ravel()
    fg = np.flatnonzero(flat != 0)
    ids = flat[fg].astype(np.intp)
    rows, cols = np.divmod(fg, lab.shape[1])
    x = cols.astype(np.float64)
    y = rows.astype(np.float64)
    size = n + 1

    def total(w=None):
        return np.bincount(ids, w, size)[1:size]

    area = total().astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = 1.0 / area
        mx, my = total(x) * inv, total(y) * inv
        mxx = total(x * x) * inv - mx * mx + 1.0 / 12.0
        myy = total(y * y) * inv - my * my + 1.0 / 12.0
        mxy = total(x * y) * inv - mx * my
        out = {"area": area, "cx": mx + 0.5, "cy": my + 0.5, "mxx": mxx, "myy": myy, "mxy": mxy}
        if image is not None:
            vals = np.asarray(image).ravel()[fg].astype(np.float64)
            mean = total(vals) * inv
            dv = vals - np.concatenate([[0.0], mean])[ids]
            out["mean"] = mean
            out["std"] = np.sqrt(total(dv * dv) * inv)
    return out


def test_moments_from_row_runs_equal_the_per_pixel_sums():
    from grainhabit.plugins.measure import measure_grains as mg

    rng = np.random.default_rng(5)
    images = _label_images()
    big = np.zeros((1500, 1300), np.int32)           # sums of x^2 near 1e12: still exact, still equal
    big[200:1450, 3:1290] = 2
    big[5:40, 1250:1300] = 1
    images += [big, np.zeros((30, 40), np.int32), np.ones((1, 7), np.int64), np.ones((9, 1), np.uint8)]
    for lab in images:
        img = rng.normal(100.0, 20.0, lab.shape).astype(np.float32)
        for image, n in ((None, None), (img, None), (img, int(lab.max()) + 2)):
            got = mg.label_moments(lab, image, n)
            want = _label_moments_reference(lab, image, n)
            assert got.keys() == want.keys()
            for k in want:
                assert got[k].dtype == want[k].dtype and np.array_equal(got[k], want[k], equal_nan=True), k


def test_moments_fall_back_to_pixel_sums_where_run_sums_could_round(monkeypatch):
    from grainhabit.plugins.measure import measure_grains as mg

    monkeypatch.setattr(mg, "_EXACT_INTEGER_SUM", 10)  # every frame counts as too large: the per-pixel form
    lab = _label_images()[1]
    got, want = mg.label_moments(lab), _label_moments_reference(lab)
    assert all(np.array_equal(got[k], want[k], equal_nan=True) for k in want)


# ------------------------------------------------------------------ measure: the corner clean-up's tables


def _cleaner_contours():
    rng = np.random.default_rng(17)
    out = []
    for m in (12, 40, 97, 256, 611):
        t = np.sort(rng.uniform(0, 2 * np.pi, m))
        r = 20.0 + 3.0 * np.cos(4 * t) + rng.normal(0, 0.3, m)
        out.append(np.column_stack([300.5 + r * np.cos(t), 41.25 + r * np.sin(t)]))
    lab = _label_images()[0]
    outl = co.trace_outlines(lab, int(lab.max()), 9)
    out += [outl[i] for i in range(len(outl)) if len(outl[i]) >= 8]
    return out


def test_cleaner_running_sums_equal_the_vertex_by_sum_table():
    from grainhabit.plugins.measure import outline as ol

    for c in _cleaner_contours():
        cl = ol._Cleaner(c)
        # the table as it stood before: (vertex, sum), cumulative sums down the columns
        cx, cy = (float(v) for v in c.mean(axis=0))
        cc = np.concatenate([c, c]) - (cx, cy)
        x, y = cc[:, 0], cc[:, 1]
        before = np.zeros((2 * len(c) + 1, 5))
        np.cumsum(np.stack([x, y, x * x, y * y, x * y], axis=1), axis=0, out=before[1:])
        assert np.array_equal(cl.cum.T, before)


def test_cleaner_polygon_equals_the_line_by_line_form():
    from grainhabit.plugins.measure import outline as ol

    rng = np.random.default_rng(23)
    for c in _cleaner_contours():
        m = len(c)
        fast, slow = ol._Cleaner(c), ol._Cleaner(c)
        for _ in range(12):            # several index sets on one cleaner: lines and corners come from its caches
            k = int(rng.integers(3, min(m, 14) + 1))
            idx = sorted(int(i) for i in rng.choice(m, k, replace=False))
            reach = float(rng.uniform(1.0, 6.0))
            poly, lines = fast.polygon(idx, True, reach)
            # the form before: one line() call per edge, corners as in polygon()
            want_lines = [slow.line(idx[j], idx[(j + 1) % k]) for j in range(k)]
            want = []
            for j in range(k):
                vx, vy = slow.pts[idx[j]]
                p = slow.meet(want_lines[j - 1], want_lines[j])
                want.append(p if p is not None and math.hypot(p[0] - vx, p[1] - vy) <= reach else (vx, vy))
            assert lines == want_lines and poly == want
