"""Crystal shape model for cubic crystals: kinetic Wulff shapes, plates and rods.

Pure geometry on arrays. A body is the intersection of half-spaces ``n . p <= d``
(unit outward normal ``n``, offset ``d``) built with
:class:`scipy.spatial.HalfspaceIntersection`, kept as a :class:`Polyhedron`.

Frames
------
*Crystal frame*: the cubic axes, so the {100} normals are the coordinate axes
and the {111} normals the body diagonals.
*Lab frame*: the substrate is the plane z = const, the viewer looks along -z
from above (+z); x points right and y up as the viewer sees them. A rotation
``R`` (3, 3) maps crystal to lab coordinates, ``p_lab = R @ p_crystal``.
Projected outlines are polygons in the lab (x, y) plane, counter-clockwise
(positive signed area) in that right-handed plane. A renderer that draws rows
downward must flip y to avoid a mirror image.

Growth parameter
----------------
``alpha = sqrt(3) * d100 / d111``: the distances of the {100} and {111} planes
from the centre are proportional to the growth rates (kinetic Wulff
construction), so alpha = sqrt(3) v100 / v111. alpha <= 1 gives a cube,
alpha = 3/2 the cuboctahedron proper (the {111} planes pass through the cube
edge midpoints), alpha >= 3 an octahedron; between are truncated cubes
(1 < alpha < 3/2) and truncated octahedra (3/2 < alpha < 3).

References
----------
(Cited from memory.)

.. [1] G. Wulff, "Zur Frage der Geschwindigkeit des Wachsthums und der
   Auflösung der Krystallflächen", Z. Kristallogr. 34, 449-530, 1901.
.. [2] A. L. Cauchy, "Mémoire sur la rectification des courbes et la
   quadrature des surfaces courbes", 1841 (mean projection = S / 4).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
from scipy.spatial import ConvexHull, HalfspaceIntersection

__all__ = [
    "Polyhedron",
    "VisibleFace",
    "wulff_polyhedron",
    "tabular_prism",
    "rod_prism",
    "polyhedron_from_halfspaces",
    "resting_rotation",
    "in_plane_rotation",
    "rotate",
    "project",
    "projected_area",
    "visible_faces",
    "thickness_map",
    "top_face_map",
    "top_normal_map",
    "outline_model",
    "face_family",
    "polygon_area",
    "MILLER_100",
    "MILLER_111",
    "MILLER_110",
]

SQRT2 = np.sqrt(2.0)
SQRT3 = np.sqrt(3.0)

#: The six {100} plane indices.
MILLER_100: tuple[tuple[int, int, int], ...] = (
    (1, 0, 0), (-1, 0, 0), (0, 1, 0), (0, -1, 0), (0, 0, 1), (0, 0, -1))
#: The eight {111} plane indices.
MILLER_111: tuple[tuple[int, int, int], ...] = tuple(
    (i, j, k) for i in (1, -1) for j in (1, -1) for k in (1, -1))
#: The twelve {110} plane indices.
MILLER_110: tuple[tuple[int, int, int], ...] = tuple(
    t for i in (1, -1) for j in (1, -1)
    for t in ((i, j, 0), (i, 0, j), (0, i, j)))

_VERTEX_TOL = 1e-7   # relative, for merging repeated vertices
_PLANE_TOL = 1e-7    # relative, for a vertex lying on a plane
_AREA_TOL = 1e-12    # relative (to the squared scale), for a face to count


# --------------------------------------------------------------------------- data

@dataclass(frozen=True)
class Polyhedron:
    """A convex polyhedron with its faces.

    Attributes
    ----------
    vertices : ndarray, shape (n, 3)
        Distinct vertices (length units of the caller).
    faces : list of ndarray of int
        Vertex indices of each face, counter-clockwise seen from outside.
    face_normals : ndarray, shape (m, 3)
        Unit outward normal of each face.
    face_offsets : ndarray, shape (m,)
        Plane offset ``d`` of each face: the face lies in ``n . p = d``.
    face_miller : list of tuple of int
        Miller-type index of each face's plane (e.g. ``(1, 0, 0)``,
        ``(-1, 1, 1)``); for prism side faces the integer direction used.
    face_areas : ndarray, shape (m,)
    volume : float
    surface_area : float
    """

    vertices: np.ndarray
    faces: list
    face_normals: np.ndarray
    face_offsets: np.ndarray
    face_miller: list
    face_areas: np.ndarray
    volume: float
    surface_area: float
    kind: str = field(default="polyhedron")

    @property
    def n_faces(self) -> int:
        return len(self.faces)

    def scaled(self, factor: float) -> "Polyhedron":
        """Return the body scaled about the origin by ``factor`` (> 0)."""
        _check_positive("factor", factor)
        f = float(factor)
        return Polyhedron(
            vertices=self.vertices * f,
            faces=[fc.copy() for fc in self.faces],
            face_normals=self.face_normals.copy(),
            face_offsets=self.face_offsets * f,
            face_miller=list(self.face_miller),
            face_areas=self.face_areas * f * f,
            volume=self.volume * f ** 3,
            surface_area=self.surface_area * f * f,
            kind=self.kind,
        )


class VisibleFace(NamedTuple):
    """A face seen from above (+z) after a rotation."""

    index: int              #: index into ``Polyhedron.faces``
    polygon: np.ndarray     #: (k, 2) projected polygon, counter-clockwise
    normal: np.ndarray      #: (3,) unit outward normal in the lab frame
    miller: tuple           #: Miller-type index in the crystal frame


# --------------------------------------------------------------------- validation

def _check_positive(name: str, value: float) -> None:
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be a finite number > 0, got {value!r}")


def _check_rotation(rotation) -> np.ndarray:
    r = np.asarray(rotation, dtype=float)
    if r.shape != (3, 3):
        raise ValueError(f"rotation must have shape (3, 3), got {r.shape}")
    if not np.allclose(r @ r.T, np.eye(3), atol=1e-8) or np.linalg.det(r) < 0:
        raise ValueError("rotation must be a proper orthogonal (3, 3) matrix")
    return r


def _check_alpha(alpha: float) -> float:
    if not (np.isfinite(alpha) and alpha > 0):
        raise ValueError(f"alpha must be a finite number > 0, got {alpha!r}")
    return float(alpha)


# ------------------------------------------------------------------ construction

def polygon_area(poly: np.ndarray) -> float:
    """Signed area of a 2-D polygon (shoelace formula), positive if CCW.

    Parameters
    ----------
    poly : array_like, shape (k, 2)

    Returns
    -------
    float
    """
    p = np.asarray(poly, dtype=float)
    if p.ndim != 2 or p.shape[1] != 2:
        raise ValueError(f"polygon must have shape (k, 2), got {p.shape}")
    x, y = p[:, 0], p[:, 1]
    return 0.5 * float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))


def _dedupe(points: np.ndarray, tol: float) -> np.ndarray:
    """Merge points closer than ``tol`` (keeps the first of each cluster)."""
    dist = np.linalg.norm(points[:, None, :] - points[None, :, :], axis=-1)
    close = np.triu(dist <= tol, k=1)
    keep = np.ones(len(points), dtype=bool)
    for i in np.flatnonzero(close.any(axis=1)):
        if keep[i]:
            keep[close[i]] = False
    return points[keep]


def polyhedron_from_halfspaces(normals, offsets, miller=None, kind: str = "polyhedron"
                               ) -> Polyhedron:
    """Build the convex body ``{p : n_i . p <= d_i}`` containing the origin.

    Parameters
    ----------
    normals : array_like, shape (m, 3)
        Outward plane normals (normalised here).
    offsets : array_like, shape (m,)
        Plane distances from the origin, all > 0 (the origin is interior).
    miller : sequence of tuple, optional
        Label of each plane; defaults to the rounded normal.
    kind : str
        Free-text name of the body.

    Returns
    -------
    Polyhedron
        Only planes that carry a face of non-zero area are kept.

    Notes
    -----
    Volume from the divergence theorem, ``V = (1/3) sum_i d_i A_i``; surface
    area ``S = sum_i A_i``.
    """
    n = np.asarray(normals, dtype=float)
    d = np.asarray(offsets, dtype=float)
    if n.ndim != 2 or n.shape[1] != 3 or d.shape != (n.shape[0],):
        raise ValueError(f"normals (m, 3) and offsets (m,) expected, got {n.shape} and {d.shape}")
    if np.any(~np.isfinite(d)) or np.any(d <= 0):
        raise ValueError(f"all offsets must be finite and > 0 (origin interior), got {d}")
    n = n / np.linalg.norm(n, axis=1, keepdims=True)
    if miller is None:
        miller = [tuple(int(v) for v in np.round(row * 1e6) / 1e6) for row in n]
    miller = list(miller)
    scale = float(np.max(d))
    hs = HalfspaceIntersection(np.hstack([n, -d[:, None]]), np.zeros(3))
    verts = _dedupe(hs.intersections, _VERTEX_TOL * scale)

    faces, fnormals, foffsets, fmiller, fareas = [], [], [], [], []
    on_plane = (np.abs(verts @ n.T - d) <= _PLANE_TOL * scale).T     # (m, n_vertices)
    count = on_plane.sum(axis=1)
    # in-plane basis (u, w = n x u) of every plane, from the coordinate axis
    # least aligned with its normal
    axis = np.eye(3)[np.argmin(np.abs(n), axis=1)]
    u = np.cross(n, axis)
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    w = np.cross(n, u)
    cen = (on_plane @ verts) / np.maximum(count, 1)[:, None]
    rel = verts[None, :, :] - cen[:, None, :]                           # (m, n_v, 3)
    ca = np.einsum("mvk,mk->mv", rel, u)
    cb = np.einsum("mvk,mk->mv", rel, w)
    # counter-clockwise about the outward normal; vertices off the plane last
    ang = np.where(on_plane, np.arctan2(cb, ca), np.inf)
    order = np.argsort(ang, axis=1)
    for i in np.flatnonzero(count >= 3):
        idx = order[i, :count[i]]
        a2, b2 = ca[i, idx].tolist(), cb[i, idx].tolist()
        k = len(a2)
        area = 0.5 * sum(a2[j] * b2[(j + 1) % k] - a2[(j + 1) % k] * b2[j] for j in range(k))
        if area <= _AREA_TOL * scale * scale:
            continue
        faces.append(idx.astype(int))
        fnormals.append(n[i])
        foffsets.append(d[i])
        fmiller.append(tuple(miller[i]))
        fareas.append(area)
    fareas_a = np.asarray(fareas)
    foff_a = np.asarray(foffsets)
    return Polyhedron(
        vertices=verts,
        faces=faces,
        face_normals=np.asarray(fnormals),
        face_offsets=foff_a,
        face_miller=fmiller,
        face_areas=fareas_a,
        volume=float(np.dot(foff_a, fareas_a) / 3.0),
        surface_area=float(fareas_a.sum()),
        kind=kind,
    )


def wulff_polyhedron(alpha: float, d100: float = 1.0, d110: float | None = None) -> Polyhedron:
    """Kinetic Wulff shape of a cubic crystal bounded by {100}, {111} (and {110}).

    Parameters
    ----------
    alpha : float
        Growth parameter ``sqrt(3) * v100 / v111`` (> 0).
    d100 : float
        Distance of the six {100} planes from the centre (length units).
    d110 : float, optional
        Distance of the twelve {110} planes; ``None`` (default) leaves them out.

    Returns
    -------
    Polyhedron
        Faces labelled with their Miller indices.

    Notes
    -----
    ``d111 = sqrt(3) * d100 / alpha``. A cube corner (d, d, d) lies at
    ``sqrt(3) d`` along [111], so the {111} planes cut the cube only when
    ``d111 < sqrt(3) d100``, i.e. alpha > 1; the octahedron vertex on [100]
    lies at ``sqrt(3) d111`` and the {100} planes cut it only when
    ``sqrt(3) d111 > d100``, i.e. alpha < 3.

    Examples
    --------
    >>> p = wulff_polyhedron(1.0)
    >>> len(p.vertices), len(p.faces)
    (8, 6)
    """
    alpha = _check_alpha(alpha)
    _check_positive("d100", d100)
    d111 = SQRT3 * d100 / alpha
    normals = [np.array(m, float) for m in MILLER_100] + [np.array(m, float) / SQRT3 for m in MILLER_111]
    offsets = [d100] * 6 + [d111] * 8
    miller = list(MILLER_100) + list(MILLER_111)
    if d110 is not None:
        _check_positive("d110", d110)
        normals += [np.array(m, float) / SQRT2 for m in MILLER_110]
        offsets += [float(d110)] * 12
        miller += list(MILLER_110)
    return polyhedron_from_halfspaces(np.asarray(normals), np.asarray(offsets), miller,
                                      kind=f"wulff(alpha={alpha:g})")


def _tabular_cut_offset(edge_ratio: float) -> float:
    """Offset of the corner-cutting planes for a triangle of unit inradius.

    Notes
    -----
    Equilateral triangle with inradius r: corners at 2r from the centre, side
    length ``2 sqrt(3) r``. A cut plane at distance c (r <= c <= 2r) facing a
    corner leaves a short edge ``s = 2 (2r - c) / sqrt(3)`` and shortens each
    long edge by s at both ends, ``l = 2 sqrt(3) r - 2 s``. Solving
    ``s = e l`` gives ``c = r (2 + e) / (1 + 2 e)``: e = 0 -> 2r (triangle),
    e = 1 -> r (regular hexagon).
    """
    e = float(edge_ratio)
    return (2.0 + e) / (1.0 + 2.0 * e)


def tabular_prism(edge_ratio: float, thickness_ratio: float) -> Polyhedron:
    """Flat twinned plate: a triangle with its corners cut, as a right prism.

    The plate lies in the crystal (111) plane (large faces (111) and
    (-1,-1,-1)); its six side faces are vertical, with normals of the
    <2-1-1> family in the plate plane. Rest it with ``resting_rotation('111')``.

    Parameters
    ----------
    edge_ratio : float
        Short/long edge length of the hexagonal outline, in [0, 1]:
        0 gives a triangle, 1 a regular hexagon.
    thickness_ratio : float
        Plate thickness divided by the ECD of the plate outline (> 0).

    Returns
    -------
    Polyhedron
        Scaled so that the plate outline has unit ECD.

    Notes
    -----
    Outline area for inradius r = 1: triangle ``3 sqrt(3)`` minus three
    equilateral corners of side s, ``3 (sqrt(3)/4) s^2``, with
    ``s = 2 sqrt(3) e / (1 + 2 e)``; ``ECD = sqrt(4 A / pi)``.
    """
    if not (np.isfinite(edge_ratio) and 0.0 <= edge_ratio <= 1.0):
        raise ValueError(f"edge_ratio must be in [0, 1], got {edge_ratio!r}")
    _check_positive("thickness_ratio", thickness_ratio)
    e = float(edge_ratio)
    s = 2 * SQRT3 * e / (1 + 2 * e)
    area = 3 * SQRT3 - 3 * (SQRT3 / 4) * s * s
    ecd = np.sqrt(4 * area / np.pi)
    half_t = 0.5 * thickness_ratio * ecd
    side = [(2, -1, -1), (-1, 2, -1), (-1, -1, 2)]
    cut = [(-2, 1, 1), (1, -2, 1), (1, 1, -2)]
    normals = [np.array(m, float) / np.sqrt(6) for m in side + cut]
    offsets = [1.0] * 3 + [_tabular_cut_offset(e)] * 3
    miller = side + cut
    normals += [np.array((1, 1, 1), float) / SQRT3, np.array((-1, -1, -1), float) / SQRT3]
    offsets += [half_t, half_t]
    miller += [(1, 1, 1), (-1, -1, -1)]
    kind = f"tabular(edge_ratio={e:g}, thickness_ratio={thickness_ratio:g})"
    return polyhedron_from_halfspaces(np.asarray(normals), np.asarray(offsets), miller,
                                      kind=kind).scaled(1.0 / ecd)


def rod_prism(aspect: float) -> Polyhedron:
    """Elongated square prism bounded by {100}: length along [100], unit width.

    Parameters
    ----------
    aspect : float
        Length / width (>= 1).

    Returns
    -------
    Polyhedron
        Width 1 (half-width 0.5 on y and z), length ``aspect`` along x. Rests
        on a {100} side face with ``resting_rotation('100')``.
    """
    if not (np.isfinite(aspect) and aspect >= 1.0):
        raise ValueError(f"aspect must be a finite number >= 1, got {aspect!r}")
    offsets = np.array([aspect / 2, aspect / 2, 0.5, 0.5, 0.5, 0.5])
    return polyhedron_from_halfspaces(np.asarray(MILLER_100, float), offsets, list(MILLER_100),
                                      kind=f"rod(aspect={aspect:g})")


def face_family(miller: tuple) -> str:
    """Family name of a Miller index: ``'100'``, ``'110'``, ``'111'`` or the sorted |h k l|."""
    a = sorted((abs(int(v)) for v in miller), reverse=True)
    return "".join(str(v) for v in a)


# --------------------------------------------------------------------- rotations

_RESTING = {
    # rows: lab x, y, z axes expressed in crystal coordinates; the resting face's
    # outward normal is minus the third row (it points down, -z).
    "100": np.eye(3),
    "111": np.array([[1, -1, 0] / SQRT2, [1, 1, -2] / np.sqrt(6), [1, 1, 1] / SQRT3]),
    "110": np.array([[1, -1, 0] / SQRT2, [0, 0, -1], [1, 1, 0] / SQRT2]),
}


def resting_rotation(face: str) -> np.ndarray:
    """Rotation (crystal -> lab) that puts a face of a family down on the substrate.

    Parameters
    ----------
    face : {'100', '111', '110'}
        Family of the face that rests on the substrate. The face
        (0, 0, -1), (-1, -1, -1) or (-1, -1, 0) respectively is brought to
        the outward normal (0, 0, -1); its opposite face is then on top.

    Returns
    -------
    ndarray, shape (3, 3)
        Proper rotation ``R``, ``p_lab = R @ p_crystal``.
    """
    key = str(face).strip("{}() ")
    if key not in _RESTING:
        raise ValueError(f"face must be one of {sorted(_RESTING)}, got {face!r}")
    return _RESTING[key].copy()


def in_plane_rotation(deg: float) -> np.ndarray:
    """Rotation about the lab z axis by ``deg`` degrees, counter-clockwise seen from above.

    Parameters
    ----------
    deg : float

    Returns
    -------
    ndarray, shape (3, 3)
    """
    if not np.isfinite(deg):
        raise ValueError(f"deg must be finite, got {deg!r}")
    t = np.deg2rad(float(deg))
    c, s = np.cos(t), np.sin(t)
    return np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])


def rotate(poly: Polyhedron, rotation) -> Polyhedron:
    """Return the body rotated into the lab frame (Miller labels stay crystal indices)."""
    r = _check_rotation(rotation)
    return Polyhedron(
        vertices=poly.vertices @ r.T,
        faces=[f.copy() for f in poly.faces],
        face_normals=poly.face_normals @ r.T,
        face_offsets=poly.face_offsets.copy(),
        face_miller=list(poly.face_miller),
        face_areas=poly.face_areas.copy(),
        volume=poly.volume,
        surface_area=poly.surface_area,
        kind=poly.kind,
    )


# ------------------------------------------------------------------- projections

def project(poly: Polyhedron, rotation) -> np.ndarray:
    """Projected outline (silhouette) seen from above after a rotation.

    Parameters
    ----------
    poly : Polyhedron
    rotation : array_like, shape (3, 3)
        Crystal -> lab rotation.

    Returns
    -------
    ndarray, shape (k, 2)
        Convex hull of the rotated vertices' (x, y), counter-clockwise.
    """
    r = _check_rotation(rotation)
    xy = (poly.vertices @ r.T)[:, :2]
    hull = ConvexHull(xy)
    return xy[hull.vertices]   # scipy returns 2-D hull vertices counter-clockwise


def projected_area(poly: Polyhedron, rotation) -> float:
    """Area of the projected outline, ``(1/2) sum_i A_i |n_i . z|`` for a convex body."""
    r = _check_rotation(rotation)
    nz = (poly.face_normals @ r.T)[:, 2]
    return 0.5 * float(np.sum(poly.face_areas * np.abs(nz)))


def visible_faces(poly: Polyhedron, rotation, tol: float = 1e-9) -> list[VisibleFace]:
    """Faces seen from above (outward normal with positive z) after a rotation.

    Parameters
    ----------
    poly : Polyhedron
    rotation : array_like, shape (3, 3)
    tol : float
        Faces with ``n_z <= tol`` (vertical or facing down) are left out.

    Returns
    -------
    list of VisibleFace
        Each with its projected polygon (counter-clockwise) and lab normal.
    """
    r = _check_rotation(rotation)
    v = poly.vertices @ r.T
    nl = poly.face_normals @ r.T
    out = []
    for i, f in enumerate(poly.faces):
        if nl[i, 2] > tol:
            out.append(VisibleFace(i, v[f, :2].copy(), nl[i].copy(), poly.face_miller[i]))
    return out


def _planes(poly: Polyhedron, rotation) -> tuple[np.ndarray, np.ndarray]:
    r = _check_rotation(rotation)
    return poly.face_normals @ r.T, poly.face_offsets


def _z_bounds(nl: np.ndarray, d: np.ndarray, x: np.ndarray, y: np.ndarray, tol: float = 1e-12):
    """z_top, z_bottom, top face index and side-plane feasibility at (x, y)."""
    shape = np.broadcast(x, y).shape
    x = np.broadcast_to(x, shape)[..., None]
    y = np.broadcast_to(y, shape)[..., None]
    rhs = d - nl[:, 0] * x - nl[:, 1] * y          # (..., m): n_z z <= rhs
    up = nl[:, 2] > tol
    dn = nl[:, 2] < -tol
    side = ~(up | dn)
    ztop_all = rhs[..., up] / nl[up, 2]
    zbot_all = rhs[..., dn] / nl[dn, 2]
    itop = np.argmin(ztop_all, axis=-1)
    z_top = np.take_along_axis(ztop_all, itop[..., None], axis=-1)[..., 0]
    z_bot = np.max(zbot_all, axis=-1)
    ok = np.all(rhs[..., side] >= 0, axis=-1) if side.any() else np.ones(shape, bool)
    return z_top, z_bot, np.flatnonzero(up)[itop], ok


def thickness_map(poly: Polyhedron, rotation, x, y) -> np.ndarray:
    """Path length along z through the body at lab points (x, y).

    Parameters
    ----------
    poly : Polyhedron
    rotation : array_like, shape (3, 3)
    x, y : array_like
        Lab coordinates (broadcast together), same units as the body.

    Returns
    -------
    ndarray
        ``max(z_top - z_bottom, 0)``; 0 outside the outline.

    Notes
    -----
    For a convex body ``n_i . p <= d_i``: ``z_top = min_{n_z > 0} (d - n_x x -
    n_y y) / n_z`` and ``z_bottom = max_{n_z < 0}`` of the same; vertical
    planes only restrict (x, y).
    """
    nl, d = _planes(poly, rotation)
    z_top, z_bot, _, ok = _z_bounds(nl, d, np.asarray(x, float), np.asarray(y, float))
    t = np.maximum(z_top - z_bot, 0.0)
    return np.where(ok, t, 0.0)


def top_face_map(poly: Polyhedron, rotation, x, y) -> np.ndarray:
    """Index (into ``poly.faces``) of the face seen from above at (x, y); -1 outside."""
    nl, d = _planes(poly, rotation)
    z_top, z_bot, itop, ok = _z_bounds(nl, d, np.asarray(x, float), np.asarray(y, float))
    return np.where(ok & (z_top > z_bot), itop, -1)


def top_normal_map(poly: Polyhedron, rotation, x, y) -> np.ndarray:
    """Lab-frame unit normal of the face seen from above at (x, y).

    Returns
    -------
    ndarray, shape x.shape + (3,)
        NaN outside the outline.
    """
    idx = top_face_map(poly, rotation, x, y)
    nl, _ = _planes(poly, rotation)
    out = nl[np.maximum(idx, 0)]
    out[idx < 0] = np.nan
    return out


def outline_model(alpha: float, face: str = "100", rotation_deg: float = 0.0) -> np.ndarray:
    """Projected outline of the Wulff shape at rest, normalised to unit ECD.

    Parameters
    ----------
    alpha : float
        Growth parameter.
    face : {'100', '111', '110'}
        Resting face family.
    rotation_deg : float
        In-plane rotation.

    Returns
    -------
    ndarray, shape (k, 2)
        Counter-clockwise polygon about the centre with area ``pi / 4``.
    """
    poly = wulff_polyhedron(alpha)
    rot = in_plane_rotation(rotation_deg) @ resting_rotation(face)
    out = project(poly, rot)
    area = polygon_area(out)
    return out * np.sqrt((np.pi / 4) / area)
