"""Split grains whose true edges meet at right angles are not completed three-fold (classify-habit 2.8).

Outlines are handbook polygons drawn on a pixel grid (scikit-image's polygon fill) and traced back by
scikit-image's marching squares (`find_contours`), so their edges carry the pixel staircase.
"""

import numpy as np
import pytest
from skimage.draw import polygon
from skimage.measure import find_contours

from grainhabit.plugins.habit.classify_habit import right_angled_edges


def traced(vertices, shape=(200, 200)):
    """The pixel outline (x, y) of a filled polygon given as (x, y) vertices."""
    v = np.asarray(vertices, float)
    mask = np.zeros(shape, bool)
    rr, cc = polygon(v[:, 1], v[:, 0], shape)
    mask[rr, cc] = True
    c = max(find_contours(mask.astype(float), 0.5), key=len)
    return c[:, ::-1]


def rotated(vertices, deg, centre=(100, 100)):
    t = np.radians(deg)
    rot = np.array([[np.cos(t), -np.sin(t)], [np.sin(t), np.cos(t)]])
    return (np.asarray(vertices, float) - centre) @ rot.T + centre


@pytest.mark.parametrize("deg", [0, 17, 40])
def test_three_squares_in_an_l_and_two_side_by_side_meet_at_right_angles(deg):
    # three cubes of side 30 left joined in an L (the outline of EMPS f664201c62's packed SEM cubes), and two
    # side by side (a 2:1 rectangle): every corner 90 or 270 degrees
    ell = [(40, 40), (100, 40), (100, 70), (70, 70), (70, 100), (40, 100)]
    pair = [(40, 70), (100, 70), (100, 100), (40, 100)]
    for shape in (ell, pair):
        c = traced(rotated(shape, deg))
        assert right_angled_edges(c, np.ones(len(c), bool))


@pytest.mark.parametrize("deg", [0, 17, 40])
def test_a_cut_triangle_and_a_hexagonal_plate_do_not(deg):
    # a triangular plate of side 100 with one corner cut off by a straight line (its interior angles 60
    # degrees, the cut's 120), and a hexagon with alternating edges of 60 and 25 px (120-degree corners)
    tri = np.array([(50, 150), (150, 150), (100, 150 - 100 * np.sqrt(3) / 2)])
    cut = [tri[0], tri[1], tri[1] + 0.3 * (tri[2] - tri[1]), tri[0] + 0.3 * (tri[2] - tri[0])]
    ang = np.radians(np.arange(6) * 60.0)
    long, short = 60.0, 25.0
    hexagon, p = [], np.array([60.0, 60.0])
    for k in range(6):
        hexagon.append(p.copy())
        side = long if k % 2 == 0 else short
        p = p + side * np.array([np.cos(ang[k]), np.sin(ang[k])])
    for shape in (cut, hexagon):
        c = traced(rotated(shape, deg))
        free = np.ones(len(c), bool)
        assert not right_angled_edges(c, free)


def test_the_cut_side_does_not_count():
    # the same L, its long bottom edge along a cut to a neighbour (not a true edge): the rest still meets at
    # right angles; with no true edge at all, nothing is said
    c = traced([(40, 40), (100, 40), (100, 70), (70, 70), (70, 100), (40, 100)])
    assert right_angled_edges(c, c[:, 1] < 99)
    assert not right_angled_edges(c, np.zeros(len(c), bool))
