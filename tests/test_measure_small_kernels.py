"""Measure-grains' corner clean-up reading its contour's vertices as it needs them, against the whole
list of Python floats it made before (``ndarray.tolist``), bit for bit. Outlines of invented shapes
drawn with scikit-image (``skimage.draw``) and traced by ``skimage.measure.find_contours``."""
import numpy as np
from skimage.draw import ellipse, polygon
from skimage.measure import find_contours

from grainhabit.plugins.measure import outline


def _contours():
    out = []
    rng = np.random.default_rng(3)
    for _ in range(25):
        img = np.zeros((120, 120))
        k = int(rng.integers(3, 9))
        t = np.sort(rng.uniform(0, 2 * np.pi, k))
        r = rng.uniform(15, 50)
        rr, cc = polygon(60 + r * np.sin(t), 60 + r * np.cos(t), img.shape)
        img[rr, cc] = 1
        out.append(np.ascontiguousarray(find_contours(img, 0.5)[0][:-1, ::-1]))
    img = np.zeros((120, 120))
    rr, cc = ellipse(60, 60, 30, 45, img.shape)
    img[rr, cc] = 1
    out.append(np.ascontiguousarray(find_contours(img, 0.5)[0][:-1, ::-1]))
    return out


def test_vertex_floats_equal_tolist():
    for c in _contours():
        v, ref = outline._VertexFloats(c), c.tolist()
        for i in list(range(len(c))) + [np.int64(2), 0, len(c) - 1]:
            assert v[i] == ref[i] and type(v[i][0]) is float


def test_polygons_equal_those_with_the_whole_vertex_list(monkeypatch):
    cs = _contours()
    sizes = [float(np.sqrt(4 * abs(outline.polygon_area(c)) / np.pi)) for c in cs]
    for refine in (True, False):
        now = outline.fit_polygons(cs, sizes, refine=refine)
        monkeypatch.setattr(outline, "_VertexFloats", lambda c: c.tolist())
        before = outline.fit_polygons(cs, sizes, refine=refine)
        monkeypatch.undo()
        assert all(np.array_equal(a, b) for a, b in zip(now, before))


def test_sum_xy_equals_numpy_sum_along_the_pairs():
    # the sum of each (x, y) pair by one addition against numpy's row-by-row reduction, bit for bit
    # (signed zeros, infinities and NaN included)
    rng = np.random.default_rng(5)
    for n in (0, 1, 7, 1000, 90000):
        v = rng.standard_normal((n, 2)) * rng.choice([1.0, 1e-8, 1e12], (n, 2))
        special = rng.choice([0.0, -0.0, np.inf, -np.inf, np.nan], (n, 2))
        pick = rng.uniform(size=(n, 2)) < 0.05
        v[pick] = special[pick]
        with np.errstate(invalid="ignore"):                     # inf + -inf is NaN in both
            got, ref = outline.sum_xy(v), v.sum(axis=1)
        same = (got.view(np.int64) == ref.view(np.int64)) | (np.isnan(got) & np.isnan(ref))
        assert same.all()


def test_shifted_equals_roll():
    rng = np.random.default_rng(1)
    for n in (0, 1, 2, 5, 300):
        for a in (rng.standard_normal(n), rng.standard_normal((n, 2))):
            for step in (-1, 1):
                assert np.array_equal(outline._shifted(a, step), np.roll(a, step, axis=0))
