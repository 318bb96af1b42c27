"""A body lying on an edge shows the facets that meet along it (classify-habit 2.7; invented test data).

Handbook geometry: a cube of edge ``a`` resting on an edge (seen along [110]) projects to a rectangle
``a`` by ``a sqrt(2)`` (the face diagonal), split along its long midline by the ridge where its two upper
faces meet, each face tilted 45 degrees from the view. In secondary-electron contrast those two faces are
lit differently by a detector off to one side. A grain whose outline only such a body fits but whose
interior is one flat level shows none of that: its habit is left undetermined (``irregular``, habit_score
<= 0.25), where it used to be named ``cube`` with full confidence (lumps of 20-40 px on the hard survey).
Outside references: the handbook geometry above, polygons filled by skimage.draw, Gaussian blur from
scipy.ndimage.
"""
import math

import numpy as np
import pytest
from scipy import ndimage as ndi
from skimage.draw import polygon

from grainhabit.frame import FrameData
from grainhabit.plugins.habit import classify_habit as cl


def edge_view_rectangle(a, rot_deg):
    """Corners of the a x a sqrt(2) outline of a cube on an edge (lab axes, px) and the unit ridge normal."""
    t = math.radians(rot_deg)
    u = np.array([math.cos(t), math.sin(t)])             # along the ridge (length a)
    v = np.array([-math.sin(t), math.cos(t)])            # across it (width a sqrt 2)
    h, w = a / 2.0, a * math.sqrt(2.0) / 2.0
    return np.array([h * u + w * v, -h * u + w * v, -h * u - w * v, h * u - w * v]), v


def frame_of(poly, shade, contrast="bright", size=120, sigma=1.0, noise=0.01, seed=0):
    """One grain of outline ``poly`` (lab axes, px, about the frame centre) with pixel values
    ``shade(x, y)`` inside, blurred by scipy's Gaussian, labelled by the half-height threshold."""
    c = size / 2.0
    rr, cc = polygon(c - poly[:, 1] - 0.5, c + poly[:, 0] - 0.5, (size, size))
    inside = np.zeros((size, size))
    inside[rr, cc] = 1.0
    yy, xx = np.mgrid[0:size, 0:size]
    x, y = xx + 0.5 - c, c - (yy + 0.5)
    level = np.where(inside > 0, shade(x, y), 0.0)
    image = 0.1 + ndi.gaussian_filter(level, sigma) + np.random.default_rng(seed).normal(0.0, noise, inside.shape)
    raw = image if contrast == "bright" else 1.0 - image       # transmission: the grain darkens the beam
    lab = (ndi.gaussian_filter(inside, sigma) >= 0.5).astype(np.int32)
    return FrameData(source="drawn", sample="invented", raw=raw.astype(np.float32), pixel_size_nm=10.0,
                     image=image.astype(np.float32), polarity=contrast, labels=lab,
                     grains={"label": np.array([1]), "edge_cut": np.array([False]),
                             "ecd_nm": np.array([10.0 * math.sqrt(4 * lab.sum() / math.pi)])})


def classify(frame):
    out = cl.classify_frame(frame, cl.STEP.resolve({}))
    return {k: v[0] for k, v in out.items()}


def test_the_edge_view_outline_has_the_handbook_proportions():
    poly, _ = edge_view_rectangle(30.0, 20.0)
    sides = np.linalg.norm(np.roll(poly, -1, axis=0) - poly, axis=1)
    assert sorted(sides)[:2] == pytest.approx([30.0, 30.0])
    assert sorted(sides)[2:] == pytest.approx([30.0 * math.sqrt(2)] * 2)
    # diagonal of the a x a sqrt(2) rectangle: a sqrt(3), the cube's body diagonal
    assert np.linalg.norm(poly[0] - poly[2]) == pytest.approx(30.0 * math.sqrt(3))


@pytest.mark.parametrize("rot", [10.0, 37.0, 71.0])
def test_a_cube_on_an_edge_with_lit_faces_stays_a_cube(rot):
    poly, v = edge_view_rectangle(32.0, rot)
    # the two faces meeting at the ridge, lit 0.45 and 0.30 (a detector off to one side)
    row = classify(frame_of(poly, lambda x, y: np.where(x * v[0] + y * v[1] > 0, 0.45, 0.30)))
    assert row["habit"] == "cube"
    assert row["rest_face"] == "110"


@pytest.mark.parametrize("rot", [10.0, 37.0, 71.0])
def test_a_flat_grain_only_an_edge_view_fits_is_left_undetermined(rot):
    poly, _ = edge_view_rectangle(32.0, rot)
    row = classify(frame_of(poly, lambda x, y: np.full(x.shape, 0.4)))
    assert row["habit"] == "irregular"
    assert row["habit_score"] <= 0.25
    assert row["habit_note"].startswith("undetermined")


def test_in_transmission_the_interior_is_not_asked():
    # in transmission a body's facets show only as kinks of its thickness; the rule is not applied there
    poly, v = edge_view_rectangle(32.0, 37.0)
    ridge = lambda x, y: 0.4 * (1.0 - np.abs(x * v[0] + y * v[1]) / (32.0 * math.sqrt(2) / 2))
    row = classify(frame_of(poly, ridge, contrast="dark"))
    assert not row["habit_note"].startswith("undetermined")
