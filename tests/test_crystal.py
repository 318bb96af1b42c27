"""Tests of the crystal shape model against closed-form (handbook) geometry.

Formulas are derived in the comments; the sources are named beside each check.
"""
import numpy as np
import pytest
from scipy.spatial import ConvexHull
from scipy.spatial.transform import Rotation

from grainhabit.plugins.habit import crystal as cr

SQ2, SQ3 = np.sqrt(2.0), np.sqrt(3.0)


def families(poly):
    return sorted({cr.face_family(m) for m in poly.face_miller})


def edge_lengths(poly2d):
    return np.linalg.norm(np.roll(poly2d, -1, axis=0) - poly2d, axis=1)


# ----------------------------------------------------------------- 3-D bodies

@pytest.mark.parametrize("alpha", [0.5, 0.8, 1.0])
def test_cube_for_alpha_at_most_one(alpha):
    # source: closed-form geometry (cube of half-width d: V = 8 d^3, S = 24 d^2)
    p = cr.wulff_polyhedron(alpha, d100=1.5)
    assert len(p.vertices) == 8 and len(p.faces) == 6
    assert families(p) == ["100"]
    assert p.volume == pytest.approx(8 * 1.5 ** 3, rel=1e-12)
    assert p.surface_area == pytest.approx(24 * 1.5 ** 2, rel=1e-12)
    assert all(len(f) == 4 for f in p.faces)


@pytest.mark.parametrize("alpha", [3.0, 3.5, 5.0])
def test_octahedron_for_alpha_at_least_three(alpha):
    # source: handbook geometry. Vertices at D = sqrt(3) d111 on the axes, edge
    # a = D sqrt(2): V = sqrt(2)/3 a^3 = 4/3 D^3, S = 2 sqrt(3) a^2.
    p = cr.wulff_polyhedron(alpha)
    D = SQ3 * (SQ3 / alpha)
    a = D * SQ2
    assert len(p.vertices) == 6 and len(p.faces) == 8
    assert families(p) == ["111"]
    assert p.volume == pytest.approx(SQ2 / 3 * a ** 3, rel=1e-12)
    assert p.surface_area == pytest.approx(2 * SQ3 * a ** 2, rel=1e-12)
    assert np.allclose(np.sort(np.abs(p.vertices).max(axis=1)), D)


def test_cuboctahedron_at_alpha_three_halves():
    # source: handbook geometry. {111} planes through the cube-edge midpoints:
    # 12 vertices, 14 faces (6 squares, 8 triangles), edge a = d sqrt(2),
    # V = 5 sqrt(2)/3 a^3, S = (6 + 2 sqrt(3)) a^2.
    p = cr.wulff_polyhedron(1.5)
    a = SQ2
    assert len(p.vertices) == 12 and len(p.faces) == 14
    assert sorted(len(f) for f in p.faces) == [3] * 8 + [4] * 6
    assert p.volume == pytest.approx(5 * SQ2 / 3 * a ** 3, rel=1e-12)
    assert p.surface_area == pytest.approx((6 + 2 * SQ3) * a ** 2, rel=1e-12)


@pytest.mark.parametrize("alpha", [1.2, 2.0, 2.6])
def test_truncated_shapes_volume_matches_scipy_hull(alpha):
    # source: scipy ConvexHull as reference library for volume and area
    p = cr.wulff_polyhedron(alpha)
    hull = ConvexHull(p.vertices)
    assert len(p.vertices) == 24 and len(p.faces) == 14
    assert p.volume == pytest.approx(hull.volume, rel=1e-9)
    assert p.surface_area == pytest.approx(hull.area, rel=1e-9)


def test_faces_are_ccw_from_outside_and_normals_unit():
    p = cr.wulff_polyhedron(2.2, d110=0.9)
    assert families(p) == ["100", "110", "111"]
    assert np.allclose(np.linalg.norm(p.face_normals, axis=1), 1.0)
    for f, n, d in zip(p.faces, p.face_normals, p.face_offsets):
        v = p.vertices[f]
        assert np.allclose(v @ n, d)
        # Newell normal of a CCW polygon points along the outward normal
        newell = np.sum(np.cross(v, np.roll(v, -1, axis=0)), axis=0)
        assert np.dot(newell, n) > 0


def test_truncated_cube_corner_triangles():
    # source: closed-form geometry. For 1 < alpha < 3/2 the {111} plane
    # x + y + z = 3 d / alpha cuts a cube corner; the cut is an equilateral
    # triangle whose vertices are (d, d, 3d/alpha - 2d) etc., edge
    # sqrt(2) (3d - 3d/alpha).
    alpha = 1.2
    p = cr.wulff_polyhedron(alpha)
    k = p.face_miller.index((1, 1, 1))
    tri = p.vertices[p.faces[k]]
    assert len(tri) == 3
    assert np.allclose(edge_lengths(tri), SQ2 * (3 - 3 / alpha))


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="alpha"):
        cr.wulff_polyhedron(-1.0)
    with pytest.raises(ValueError, match="face"):
        cr.resting_rotation("210")
    with pytest.raises(ValueError, match="edge_ratio"):
        cr.tabular_prism(1.5, 0.1)
    with pytest.raises(ValueError, match="aspect"):
        cr.rod_prism(0.5)


# ---------------------------------------------------------------- projections

@pytest.mark.parametrize("alpha", [0.7, 1.0, 1.3, 1.5])
def test_square_outline_on_100_up_to_three_halves(alpha):
    # source: closed-form geometry: the {111} planes reach the silhouette
    # corner (d, d, 0) only when x + y = 2 d exceeds sqrt(3) d111 = 3 d / alpha
    out = cr.project(cr.wulff_polyhedron(alpha), cr.resting_rotation("100"))
    assert len(out) == 4
    assert np.allclose(edge_lengths(out), 2.0)


@pytest.mark.parametrize("alpha", [1.6, 2.0, 2.5, 2.9])
def test_octagon_outline_on_100_edge_lengths(alpha):
    # source: closed-form geometry. Resting on (001), the silhouette is
    # limited by x <= d and, on the diagonal, by the sum of the (1,1,1) and
    # (1,1,-1) constraints: x + y <= sqrt(3) d111 = 3 d / alpha (at z = 0).
    # Axis edges: 2 d (3/alpha - 1); diagonal edges: sqrt(2) d (2 - 3/alpha).
    d = 1.0
    out = cr.project(cr.wulff_polyhedron(alpha, d100=d), cr.resting_rotation("100"))
    assert len(out) == 8
    lengths = edge_lengths(out)
    axis = np.isclose(np.abs(np.diff(np.roll(out, -1, axis=0) - out, axis=1))[:, 0],
                      lengths)  # |dx - dy| == length only for axis-parallel edges
    assert axis.sum() == 4
    assert np.allclose(lengths[axis], 2 * d * (3 / alpha - 1))
    assert np.allclose(lengths[~axis], SQ2 * d * (2 - 3 / alpha))
    assert cr.polygon_area(out) == pytest.approx(4 * d * d - 2 * (2 * d - 3 * d / alpha) ** 2)


def test_rotated_square_on_100_at_alpha_three():
    # source: closed-form geometry: octahedron vertices at (+-d, 0), (0, +-d)
    out = cr.project(cr.wulff_polyhedron(3.0), cr.resting_rotation("100"))
    assert len(out) == 4
    assert np.allclose(edge_lengths(out), SQ2)
    assert np.allclose(np.sort(np.abs(out).max(axis=1)), 1.0)
    assert np.allclose(np.sort(np.abs(out).min(axis=1)), 0.0, atol=1e-12)


@pytest.mark.parametrize("alpha,side", [
    # cube of half-width d along its body diagonal: vertex distance from the
    # axis sqrt(3 d^2 - d^2/3) = 2 d sqrt(2/3) (handbook geometry)
    (0.8, 2 * np.sqrt(2 / 3)), (1.0, 2 * np.sqrt(2 / 3)),
    # octahedron with vertices at D = 3/alpha: distance D sqrt(2/3)
    (3.0, 1 * np.sqrt(2 / 3) * 1), (4.0, 0.75 * np.sqrt(2 / 3))])
def test_regular_hexagon_on_111_at_both_ends(alpha, side):
    out = cr.project(cr.wulff_polyhedron(alpha), cr.resting_rotation("111"))
    assert len(out) == 6
    assert np.allclose(edge_lengths(out), side)
    assert np.allclose(np.linalg.norm(out, axis=1), side)   # regular: R = side


def test_twelve_sided_outline_on_111_between():
    out = cr.project(cr.wulff_polyhedron(2.0), cr.resting_rotation("111"))
    assert len(out) == 12


def test_resting_face_is_down_and_flat():
    for face, m in (("100", (0, 0, -1)), ("111", (-1, -1, -1)), ("110", (-1, -1, 0))):
        r = cr.resting_rotation(face)
        n = r @ (np.array(m, float) / np.linalg.norm(m))
        assert np.allclose(n, [0, 0, -1])
        assert np.isclose(np.linalg.det(r), 1.0)


def test_outline_model_has_unit_ecd():
    # source: definition of ECD (ISO 9276-6): area = pi/4 * ECD^2
    for alpha in (1.0, 2.0, 3.0):
        for face in ("100", "111"):
            out = cr.outline_model(alpha, face)
            assert cr.polygon_area(out) == pytest.approx(np.pi / 4)


@pytest.mark.parametrize("alpha", [1.0, 1.5, 3.0])
def test_cauchy_mean_projection_is_quarter_surface(alpha):
    # source: Cauchy's projection formula: the mean projected area of a convex
    # body over uniformly random orientations equals S / 4
    p = cr.wulff_polyhedron(alpha)
    rots = Rotation.random(4000, random_state=12345).as_matrix()
    # projected area of a convex body: (1/2) sum_i A_i |n_i . z| (each point of
    # the shadow is covered once by the upper and once by the lower surface)
    areas = 0.5 * np.abs(rots[:, 2, :] @ p.face_normals.T) @ p.face_areas
    assert areas.mean() == pytest.approx(p.surface_area / 4, rel=0.01)
    # the silhouette polygons from project() have the same areas
    hull_areas = [cr.polygon_area(cr.project(p, r)) for r in rots[:300]]
    assert np.allclose(hull_areas, areas[:300], rtol=1e-9)
    assert np.mean(hull_areas) == pytest.approx(p.surface_area / 4, rel=0.03)
    assert np.allclose(areas[:20], [cr.projected_area(p, r) for r in rots[:20]])


# -------------------------------------------------------- maps from above

def test_thickness_map_cube_and_octahedron():
    # source: closed-form geometry. Cube on (001): thickness 2 d everywhere
    # inside. Octahedron on (001) with vertex D: thickness 2 (D - |x| - |y|).
    r = cr.resting_rotation("100")
    x = np.array([0.0, 0.3, 0.99, 1.01])
    y = np.array([0.0, -0.5, 0.99, 0.0])
    assert np.allclose(cr.thickness_map(cr.wulff_polyhedron(1.0), r, x, y), [2, 2, 2, 0])
    t = cr.thickness_map(cr.wulff_polyhedron(3.0), r, x, y)
    assert np.allclose(t, np.maximum(2 * (1 - np.abs(x) - np.abs(y)), 0))


def test_thickness_integrates_to_volume():
    # source: Cavalieri's principle: V = integral of thickness over the outline
    p = cr.wulff_polyhedron(2.2)
    r = cr.in_plane_rotation(17) @ cr.resting_rotation("111")
    g = np.linspace(-2.5, 2.5, 801)
    xx, yy = np.meshgrid(g, g)
    t = cr.thickness_map(p, r, xx, yy)
    vol = t.sum() * (g[1] - g[0]) ** 2
    assert vol == pytest.approx(p.volume, rel=5e-3)


def test_top_face_map_matches_visible_faces():
    p = cr.wulff_polyhedron(3.0)
    r = cr.resting_rotation("111")
    vis = cr.visible_faces(p, r)
    # octahedron on (111): top (111) face plus three faces inclined at
    # arccos(1/3) = 70.53 deg (handbook: {111} interplanar angle)
    nz = sorted(round(float(f.normal[2]), 6) for f in vis)
    assert nz == [round(1 / 3, 6)] * 3 + [1.0]
    assert vis[[f.miller for f in vis].index((1, 1, 1))].normal[2] == pytest.approx(1.0)
    from matplotlib.path import Path
    rng = np.random.default_rng(0)
    pts = rng.uniform(-1.5, 1.5, size=(2000, 2))
    idx = cr.top_face_map(p, r, pts[:, 0], pts[:, 1])
    for f in vis:
        inside = Path(f.polygon).contains_points(pts)
        assert np.all(idx[inside] == f.index)
    normals = cr.top_normal_map(p, r, pts[:, 0], pts[:, 1])
    assert np.all(np.isnan(normals[idx < 0]))
    assert np.allclose(normals[idx >= 0][:, 2] > 0, True)


# ------------------------------------------------------------- plates and rods

@pytest.mark.parametrize("e,n_sides", [(0.0, 3), (0.3, 6), (1.0, 6)])
def test_tabular_prism_outline(e, n_sides):
    # source: closed-form geometry of the cut triangle (see tabular_prism Notes)
    p = cr.tabular_prism(e, 0.1)
    out = cr.project(p, cr.resting_rotation("111"))
    assert len(out) == n_sides
    assert cr.polygon_area(out) == pytest.approx(np.pi / 4)     # unit ECD
    lengths = np.sort(edge_lengths(out))
    if n_sides == 6:
        assert lengths[0] / lengths[-1] == pytest.approx(e)
    # thickness 0.1 ECD, uniform inside
    t = cr.thickness_map(p, cr.resting_rotation("111"), np.array([0.0, 0.1]), np.array([0.0, -0.1]))
    assert np.allclose(t, 0.1)


def test_rod_prism_outline():
    out = cr.project(cr.rod_prism(5.0), cr.resting_rotation("100"))
    assert sorted(np.round(edge_lengths(out), 12)) == [1, 1, 5, 5]


@pytest.mark.parametrize("alpha,face", [(1.0, "111"), (2.0, "100"), (2.4, "111"), (3.0, "111")])
def test_visible_faces_tile_the_outline(alpha, face):
    # source: closed-form geometry: the upper surface of a convex body projects
    # one-to-one onto its silhouette, so the visible faces' projected areas sum
    # to the outline area, and each is A_i * n_z (area projection)
    p = cr.wulff_polyhedron(alpha)
    r = cr.in_plane_rotation(23.0) @ cr.resting_rotation(face)
    vis = cr.visible_faces(p, r)
    areas = [cr.polygon_area(f.polygon) for f in vis]
    assert all(a > 0 for a in areas)                       # CCW from above
    assert sum(areas) == pytest.approx(cr.polygon_area(cr.project(p, r)), rel=1e-9)
    for f, a in zip(vis, areas):
        assert a == pytest.approx(p.face_areas[f.index] * f.normal[2], rel=1e-9)


def test_in_plane_rotation_is_counter_clockwise():
    assert np.allclose(cr.in_plane_rotation(90.0) @ [1, 0, 0], [0, 1, 0])
    out0 = cr.project(cr.rod_prism(4.0), cr.resting_rotation("100"))
    out30 = cr.project(cr.rod_prism(4.0), cr.in_plane_rotation(30.0) @ cr.resting_rotation("100"))
    # the long axis turns from 0 to 30 degrees
    def long_axis_deg(o):
        e = np.roll(o, -1, axis=0) - o
        k = np.argmax(np.linalg.norm(e, axis=1))
        return np.degrees(np.arctan2(e[k, 1], e[k, 0])) % 180
    assert long_axis_deg(out0) == pytest.approx(0.0, abs=1e-9) or \
        long_axis_deg(out0) == pytest.approx(180.0, abs=1e-9)
    assert long_axis_deg(out30) == pytest.approx(30.0, abs=1e-9)
