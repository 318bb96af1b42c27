"""Step ``fit-growth-ratio``: the growth-rate parameter alpha of every polyhedral grain.

alpha = sqrt(3) v100 / v111 (the cube/octahedron growth parameter of the design
contract) is found by matching each grain against a library of kinetic Wulff
shapes (:mod:`grainhabit.plugins.habit.crystal`) resting on a {100} or a {111} face, over a grid
of alpha, using

1. the outline: a scale- and rotation-invariant distance between the
   centroid-distance radial signatures of the observed and the model outline;
2. where visible, the interior: the model's facet layout (SEM, bright
   polarity: every facet has its own, unknown, uniform brightness) or its
   projected-thickness map (TEM, dark polarity: attenuation -ln(I / I_bg) is
   an unknown linear function of thickness), laid over the grain at the
   rotation the outline match found.

Both give a misfit in units of its own noise, summed into a chi-square-like
score per (alpha, face); alpha is its minimum, and ``alpha_lo``/``alpha_hi``
bound every alpha (either face) whose score is within ``tolerance`` of the
minimum: the range the evidence cannot tell apart.

Why the radial signature
------------------------
The Wulff projections are convex and centrally symmetric, so the distance
r(phi) from the centroid is single-valued and a complete description of the
outline. Normalised by sqrt(area) it is scale invariant; a rotation is a
cyclic shift of the samples, so the distance at every rotation is one FFT
circular cross-correlation (O(N log N), no search). It integrates the outline
(a corner that blur rounds by a pixel moves r by a pixel, locally), whereas a
turning function differentiates it and turns digitisation noise into large
angle spikes. Its weakness, a re-entrant (non-star) outline, does not occur
for the convex bodies fitted here.

What the outline alone can tell (see the tests)
-----------------------------------------------
On {100} the outline is a square for every alpha <= 1.5 (the {111} cuts do not
reach the equator), an octagon for 1.5 < alpha < 3 and a square again (turned
45 degrees) at alpha >= 3; an octagon and the one with its straight and
diagonal edges swapped are the same shape turned 45 degrees (the regular
octagon, alpha = 3 / sqrt(2) ~ 2.12, is its own twin), so the outline
alone leaves two windows of alpha. On {111} the outline is a hexagon at alpha = 1, 1.5 and >= 3 and a
nearly regular 12-gon between: the outline says little. The interior breaks
these ties: the top {100} square shrinks as alpha grows on {100}, the top
{111} face grows (to half the outline at alpha >= 3) on {111}. Where the
interior is flat or unseen, the range stays wide and says so in ``alpha_note``.

References
----------
.. [1] G. Wulff, Z. Kristallogr. 34, 449-530, 1901 (the Wulff construction).
.. [2] D. Zhang, G. Lu, "Review of shape representation and description
   techniques", Pattern Recognition 37(1), 1-19, 2004,
   doi:10.1016/j.patcog.2003.07.008 (centroid-distance shape signatures).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl
from grainhabit.params import Column, Param, StepInfo
from grainhabit.plugins.habit import crystal as cr

GRAINHABIT_API = 1

POLYHEDRAL = ("cube", "cuboctahedron", "octahedron")

STEP = StepInfo(
    name="fit-growth-ratio",
    stage="fit_growth",
    version="1.0",
    summary="Growth-rate parameter alpha from outline and facet layout, with the range the data allow.",
    params=(
        Param("alpha_min", float, 0.5, low=0.1, high=1.0,
              doc="Lowest alpha of the model grid (a cube gives only an upper bound, so alpha_lo lands here)."),
        Param("alpha_max", float, 4.0, low=3.0, high=10.0,
              doc="Highest alpha of the model grid (an octahedron gives only a lower bound)."),
        Param("alpha_step", float, 0.02, low=0.005, high=0.2, doc="Spacing of the model grid."),
        Param("n_angles", int, 256, low=32, high=4096,
              doc="Samples of the radial signature around the outline."),
        Param("min_face_share", float, 0.002, low=0.0, high=0.16,
              doc="Least share of the surface area of one face for a body to rest on it."),
        Param("tolerance", float, 4.0, low=0.0,
              doc="Score difference (chi-square units) from the best fit that bounds alpha_lo..alpha_hi."),
        Param("outline_noise_px", float, 0.25, unit="px", low=0.01,
              doc="RMS outline error in pixels (digitisation, blur) that sets the outline misfit unit."),
        Param("outline_noise_floor", float, 0.003, low=0.0,
              doc="Least outline misfit unit (model imperfection), relative to sqrt(area)."),
        Param("interior", bool, True, doc="Use the facet layout / thickness inside the grain."),
        Param("interior_weight", float, 0.05, low=0.0,
              doc="Pixels per independent interior sample, inverse (blur makes neighbours correlated)."),
        Param("erode_px", int, 2, unit="px", low=0,
              doc="Pixels left out along the outline before reading the interior (rim, blur)."),
        Param("facet_edge_px", float, 2.0, unit="px", low=0.0,
              doc="SEM: pixels this close to a predicted facet edge (bright edge lines) are left out."),
        Param("interior_samples", int, 2500, low=30, high=100000,
              doc="Interior samples compared with each model; more pixels are thinned to a lattice, "
                  "each kept sample counting for those it replaces."),
        Param("search", str, "coarse", choices=("coarse", "exhaustive"),
              doc="'coarse': coarse alpha grid, refined around the best fits; "
                  "'exhaustive': place every candidate model (slow reference)."),
        Param("fit_edge_cut", bool, False,
              doc="Also fit grains that touch the frame border (their outline is cut)."),
    ),
    outputs=(
        Column("alpha_note", "", "why alpha is NaN, or what bounds its range"),
        Column("rest_face", "", "resting face family of the best model: 100 or 111"),
        Column("fit_rotation_deg", "deg", "in-plane rotation of the best model, counter-clockwise on screen"),
        Column("outline_misfit", "1", "RMS radial-signature distance of the best model / sqrt(area)"),
    ),
)


# --------------------------------------------------------------------------- checks

def _check_poly(poly, name="outline") -> np.ndarray:
    p = np.asarray(poly, dtype=float)
    if p.ndim != 2 or p.shape[1] != 2 or len(p) < 3:
        raise ValueError(f"{name} must have shape (k >= 3, 2), got {p.shape}")
    if not np.all(np.isfinite(p)):
        raise ValueError(f"{name} contains non-finite coordinates")
    return p


def _check_n(n_angles: int) -> int:
    if int(n_angles) != n_angles or n_angles < 8:
        raise ValueError(f"n_angles must be an integer >= 8, got {n_angles!r}")
    return int(n_angles)


# ------------------------------------------------------------------ signatures

def polygon_centroid(poly) -> tuple[np.ndarray, float]:
    """Centroid and unsigned area of a simple polygon.

    Parameters
    ----------
    poly : array_like, shape (k, 2)

    Returns
    -------
    centroid : ndarray, shape (2,)
    area : float

    Notes
    -----
    c = (1 / 6A) sum (p_i + p_{i+1}) (x_i y_{i+1} - x_{i+1} y_i).
    """
    p = _check_poly(poly)
    x, y = p[:, 0], p[:, 1]
    x1, y1 = np.roll(x, -1), np.roll(y, -1)
    cross = x * y1 - x1 * y
    a = 0.5 * cross.sum()
    if abs(a) < 1e-12:
        raise ValueError("outline has zero area")
    c = np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * a)
    return c, abs(a)


def radial_signature(poly, n_angles: int = 256) -> np.ndarray:
    """Centroid-distance signature of a closed outline, normalised by sqrt(area).

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Closed outline (x, y) in any length unit, first vertex not repeated;
        a polygon or a dense contour. Axes x right, y up: the samples run
        counter-clockwise.
    n_angles : int
        Number of ray directions phi_j = 2 pi j / n_angles.

    Returns
    -------
    ndarray, shape (n_angles,)
        r(phi_j) / sqrt(A): distance from the centroid to the outline along
        direction phi_j (the farthest crossing), divided by the square root of
        the enclosed area. A disc gives 1 / sqrt(pi) everywhere, a square of
        side s gives 1/2 at phi = 0.

    Notes
    -----
    Ray-segment intersection: c + t d = a + s e with 0 <= s <= 1, solved by
    Cramer's rule. Only the (ray, edge) pairs that can meet are solved: the
    rays within the angle an edge subtends at the centroid, widened by one
    ray either side (an edge nearly through the centroid is tried against
    every ray), so the work grows as n + k rather than n k.
    """
    n = _check_n(n_angles)
    p = _check_poly(poly)
    c, area = polygon_centroid(p)
    q = p - c
    e = np.roll(q, -1, axis=0) - q
    k = len(q)
    a0 = np.arctan2(q[:, 1], q[:, 0]) * (n / (2.0 * np.pi))        # vertex angle in ray steps
    da = np.roll(a0, -1) - a0
    da = (da + n / 2) % n - n / 2                                    # signed, in [-n/2, n/2)
    lo = np.floor(np.minimum(a0, a0 + da)).astype(np.int64) - 1
    cnt = np.floor(np.maximum(a0, a0 + da)).astype(np.int64) + 2 - lo
    wide = np.abs(da) > n / 2 - 2
    lo[wide], cnt[wide] = 0, n
    cnt = np.minimum(cnt, n)
    edge = np.repeat(np.arange(k), cnt)
    start = np.cumsum(cnt) - cnt
    ray = (lo[edge] + np.arange(edge.size) - start[edge]) % n
    phi = 2.0 * np.pi * ray / n
    dx, dy = np.cos(phi), np.sin(phi)
    qe, ee = q[edge], e[edge]
    det = -dx * ee[:, 1] + ee[:, 0] * dy
    ok = np.abs(det) > 1e-14
    det = np.where(ok, det, 1.0)
    t = (-qe[:, 0] * ee[:, 1] + ee[:, 0] * qe[:, 1]) / det
    s = (dx * qe[:, 1] - dy * qe[:, 0]) / det
    hit = ok & (s >= -1e-9) & (s <= 1 + 1e-9) & (t > 0)
    r = np.zeros(n)
    np.maximum.at(r, ray[hit], t[hit])
    return r / math.sqrt(area)


def shift_distances(sig_obs, sig_model) -> np.ndarray:
    """RMS distance between two signatures at every cyclic shift.

    Parameters
    ----------
    sig_obs, sig_model : array_like, shape (n,)
        Radial signatures (:func:`radial_signature`).

    Returns
    -------
    ndarray, shape (n,)
        ``d[s] = sqrt(mean_j (r_obs[j + s] - r_model[j])^2)``: the observed
        outline matches the model turned counter-clockwise by 2 pi s / n.

    Notes
    -----
    sum_j (a_{j+s} - b_j)^2 = |a|^2 + |b|^2 - 2 C[s] with the circular
    cross-correlation C = IFFT(FFT(a) conj(FFT(b))).
    """
    a = np.asarray(sig_obs, float)
    b = np.asarray(sig_model, float)
    if a.shape != b.shape or a.ndim != 1:
        raise ValueError(f"signatures must be 1-D of equal length, got {a.shape} and {b.shape}")
    cc = np.fft.irfft(np.fft.rfft(a) * np.conj(np.fft.rfft(b)), len(a))
    d2 = (np.dot(a, a) + np.dot(b, b) - 2.0 * cc) / len(a)
    return np.sqrt(np.maximum(d2, 0.0))


# --------------------------------------------------------------------- library

@dataclass(frozen=True)
class ModelLibrary:
    """Wulff shapes at rest over an alpha grid, with their radial signatures.

    Attributes
    ----------
    alphas : ndarray, shape (m,)
        Alpha of each model.
    faces : tuple of str, length m
        Resting face family, '100' or '111'.
    signatures : ndarray, shape (m, n_angles)
    shape_id : ndarray of int, shape (m,)
        Models with the same id have the same body (alpha <= 1 on {100} are
        all the cube; alpha >= 3 on {111} all the octahedron).
    bodies : tuple of Polyhedron
        Each scaled so that its projected outline has unit ECD, in the crystal
        frame; rotate with ``rotations[i]``.
    rotations : tuple of ndarray (3, 3)
        Resting rotation (crystal -> lab) of each model.
    symmetry_deg : ndarray, shape (m,)
        In-plane rotation that maps the body onto itself (90 on {100}, 120 on {111}).
    grid : ndarray
        The alpha grid itself.
    """

    alphas: np.ndarray
    faces: tuple
    signatures: np.ndarray
    shape_id: np.ndarray
    bodies: tuple
    rotations: tuple
    symmetry_deg: np.ndarray
    grid: np.ndarray


def _face_share(alpha: float, face: str) -> float:
    """Largest share of the surface area carried by one face of a family."""
    p = cr.wulff_polyhedron(alpha)
    fam = np.array([cr.face_family(m) for m in p.face_miller])
    sel = fam == face
    return float(p.face_areas[sel].max() / p.surface_area) if sel.any() else 0.0


def model_library(alpha_min: float = 0.5, alpha_max: float = 4.0, step: float = 0.02,
                  n_angles: int = 256, min_face_share: float = 0.002) -> ModelLibrary:
    """Build (once per process and argument set) the model library.

    Parameters
    ----------
    alpha_min, alpha_max, step : float
        Grid ``alpha_min, alpha_min + step, ..., <= alpha_max``.
    n_angles : int
        Samples of each radial signature.
    min_face_share : float
        A body rests on a face only if one face of that family carries at least
        this fraction of the surface area.

    Returns
    -------
    ModelLibrary

    Notes
    -----
    A body can rest only on a face it has, and not on a vanishing one: {100}
    models for alpha below about 2.7 (the octahedron has no {100} face),
    {111} models above about 1.08 (the cube has no {111} face) with the
    default ``min_face_share``; an octahedron balanced on a vertex is not
    modelled. Identical bodies share one shape id and one computed body.
    """
    # one cache entry per argument set, however the arguments were passed
    return _build_library(float(alpha_min), float(alpha_max), float(step), _check_n(n_angles),
                          float(min_face_share))


@functools.lru_cache(maxsize=4)
def _build_library(alpha_min, alpha_max, step, n_angles, min_face_share) -> ModelLibrary:
    n = n_angles
    if not (0 < alpha_min < 1.0 <= 3.0 < alpha_max) or not (0 < step < 1):
        raise ValueError(f"need 0 < alpha_min < 1, alpha_max > 3 and 0 < step < 1, "
                         f"got {alpha_min!r}, {alpha_max!r}, {step!r}")
    grid = np.round(np.arange(alpha_min, alpha_max + step / 2, step), 6)
    alphas, faces, sigs, ids, bodies, rots, sym = [], [], [], [], [], [], []
    cache = {}
    for face in ("100", "111"):
        rot = cr.resting_rotation(face)
        for a in grid:
            if (face == "100" and a >= 3.0) or (face == "111" and a <= 1.0):
                continue
            if _face_share(float(a), face) < min_face_share:
                continue
            key = (face, 1.0 if (face == "100" and a <= 1.0) else (3.0 if a >= 3.0 else float(a)))
            if key not in cache:
                body = cr.wulff_polyhedron(key[1])
                body = body.scaled(math.sqrt((math.pi / 4) / cr.projected_area(body, rot)))
                cache[key] = (len(cache), body, radial_signature(cr.project(body, rot), n))
            sid, body, sig = cache[key]
            alphas.append(float(a))
            faces.append(face)
            sigs.append(sig)
            ids.append(sid)
            bodies.append(body)
            rots.append(rot)
            sym.append(90.0 if face == "100" else 120.0)
    return ModelLibrary(np.asarray(alphas), tuple(faces), np.asarray(sigs), np.asarray(ids),
                        tuple(bodies), tuple(rots), np.asarray(sym), grid)


# ---------------------------------------------------------------- interior data

@dataclass(frozen=True)
class Interior:
    """Pixels inside one grain, ready to compare with a model's facets.

    Attributes
    ----------
    x, y : ndarray, shape (p,)
        Pixel centres in the lab frame of the grain: origin at the outline
        centroid, x right, y up, in units of the grain's ECD.
    value : ndarray, shape (p,)
        Brightness (SEM) or attenuation -ln(I / I_bg) (TEM) at those pixels.
    mode : str
        'facets' (uniform brightness per facet) or 'thickness' (linear in
        projected thickness).
    pixel : float
        One pixel in the same units (1 / ECD in pixels).
    weight : float
        Pixels each sample stands for (1 as collected; more after
        :func:`subsample_interior`): the interior evidence is multiplied by it.
    """

    x: np.ndarray
    y: np.ndarray
    value: np.ndarray
    mode: str
    pixel: float = 0.0
    weight: float = 1.0


def grain_interior(signal, mask, centroid_xy_px, ecd_px, mode, erode_px=2, max_pixels=2500):
    """Collect the interior samples of one grain.

    Parameters
    ----------
    signal : ndarray, shape (h, w)
        Crop of the brightness or attenuation image.
    mask : ndarray of bool, shape (h, w)
        The grain's pixels in the crop.
    centroid_xy_px : (float, float)
        Outline centroid in crop pixel coordinates (x = col + 0.5, y = row + 0.5).
    ecd_px : float
        ECD in pixels.
    mode : {'facets', 'thickness'}
    erode_px : int
        Binary erosion of the mask first (the rim and the blurred edge).
    max_pixels : int
        Keep at most about this many pixels (regular subsampling).

    Returns
    -------
    Interior or None
        None when fewer than 30 pixels remain.
    """
    if mode not in ("facets", "thickness"):
        raise ValueError(f"mode must be 'facets' or 'thickness', got {mode!r}")
    m = np.asarray(mask, bool)
    if erode_px > 0:
        m = ndi.binary_erosion(m, iterations=int(erode_px))
    rr, cc = np.nonzero(m)
    if rr.size < 30:
        return None
    if rr.size > max_pixels:
        k = int(math.ceil(rr.size / max_pixels))
        rr, cc = rr[::k], cc[::k]
    x = (cc + 0.5 - centroid_xy_px[0]) / ecd_px
    y = -(rr + 0.5 - centroid_xy_px[1]) / ecd_px
    v = np.asarray(signal, float)[rr, cc]
    return Interior(x, y, v, mode, 1.0 / ecd_px)


def subsample_interior(interior: Interior, max_samples: int) -> Interior:
    """Keep at most about ``max_samples`` interior samples, on a regular pixel lattice.

    Parameters
    ----------
    interior : Interior
    max_samples : int
        Sample budget (>= 30).

    Returns
    -------
    Interior
        ``interior`` itself when it is within budget; else the samples on
        every s-th row and column (s = ceil(sqrt(p / max_samples))), with
        ``weight`` multiplied by p / p_kept so that sums of squares over the
        kept samples estimate those over all of them.

    Notes
    -----
    A lattice keeps the samples evenly spread in both directions, so every
    facet keeps its share; a raster stride is used instead when the lattice
    would keep under a quarter of the budget (an already thinned sample).
    """
    if int(max_samples) != max_samples or max_samples < 30:
        raise ValueError(f"max_samples must be an integer >= 30, got {max_samples!r}")
    p = interior.value.size
    if p <= max_samples:
        return interior
    if interior.pixel > 0:
        ix = np.rint((interior.x - interior.x.min()) / interior.pixel).astype(np.int64)
        iy = np.rint((interior.y - interior.y.min()) / interior.pixel).astype(np.int64)
        st = int(math.ceil(math.sqrt(p / max_samples)))
        keep = np.flatnonzero((ix % st == 0) & (iy % st == 0))
    else:
        keep = np.zeros(0, int)
    if keep.size < max_samples / 4 or keep.size > max_samples:
        keep = np.arange(0, p, int(math.ceil(p / max_samples)))
    return Interior(interior.x[keep], interior.y[keep], interior.value[keep], interior.mode,
                    interior.pixel, interior.weight * p / keep.size)


def _interior_rss(interior: Interior, body, rotation, edge_px: float = 2.0) -> float:
    """Residual sum of squares of the interior under one placed model.

    'facets': one free level per visible facet plus a plane a x + b y (an
    illumination or detector gradient across the grain); 'thickness': an
    affine function of the model's projected thickness plus the same plane.
    The facet seen at (x, y) is the upward plane of lowest height there
    (convex body), the thickness z_top - z_bottom as in
    :func:`grainhabit.plugins.habit.crystal.thickness_map`; samples just outside the model
    outline take the nearest facet. In 'facets' mode samples closer than
    ``edge_px`` pixels to a predicted facet edge are left out (secondary
    electrons make edges bright lines, which would otherwise pull every
    boundary towards the brighter facet) and the RSS is scaled back to all
    samples, RSS * p / p_kept, so models stay comparable.
    """
    x, y, v = interior.x, interior.y, interior.value
    nl = body.face_normals @ np.asarray(rotation).T
    up = nl[:, 2] > 1e-9
    # height of every upward plane at (x, y): z = (d - n_x x - n_y y) / n_z
    coef_up = np.vstack([-nl[up, 0], -nl[up, 1], body.face_offsets[up]]) / nl[up, 2]
    pts = np.column_stack([x, y, np.ones_like(x)])
    zup = pts @ coef_up
    scale = 1.0
    if interior.mode == "facets":
        idx = np.argmin(zup, axis=1)
        m = int(up.sum())
        if m > 1 and edge_px > 0:
            g = coef_up[:2].T                                   # (m, 2) height gradients
            gd = np.linalg.norm(g[:, None, :] - g[None, :, :], axis=-1)
            ztop = zup[np.arange(v.size), idx]
            with np.errstate(divide="ignore", invalid="ignore"):
                dist = (zup - ztop[:, None]) / gd[idx]
            dist[np.arange(v.size), idx] = np.inf
            far = np.nanmin(np.where(np.isfinite(dist), dist, np.inf), axis=1) >= edge_px * interior.pixel
            if far.sum() >= 30 and not far.all():
                scale = v.size / far.sum()
                x, y, v, idx = x[far], y[far], v[far], idx[far]
        cnt = np.bincount(idx, minlength=m).astype(float)
        keep = np.flatnonzero(cnt > 0)
        k = keep.size
        # normal equations of [group indicators, x, y] from per-group sums
        nm = np.zeros((k + 2, k + 2))
        rhs = np.empty(k + 2)
        nm[np.arange(k), np.arange(k)] = cnt[keep]
        sx = np.bincount(idx, x, minlength=m)[keep]
        sy = np.bincount(idx, y, minlength=m)[keep]
        nm[:k, k], nm[k, :k] = sx, sx
        nm[:k, k + 1], nm[k + 1, :k] = sy, sy
        nm[k, k], nm[k, k + 1], nm[k + 1, k + 1] = x @ x, x @ y, y @ y
        nm[k + 1, k] = nm[k, k + 1]
        rhs[:k] = np.bincount(idx, v, minlength=m)[keep]
        rhs[k], rhs[k + 1] = x @ v, y @ v
    else:
        dn = nl[:, 2] < -1e-9
        coef_dn = np.vstack([-nl[dn, 0], -nl[dn, 1], body.face_offsets[dn]]) / nl[dn, 2]
        t = np.maximum(zup.min(axis=1) - (pts @ coef_dn).max(axis=1), 0.0)
        a = np.column_stack([t, np.ones_like(t), x, y])
        nm = a.T @ a
        rhs = a.T @ v
    nm = nm + np.eye(len(rhs)) * 1e-12 * np.trace(nm)
    coef = np.linalg.solve(nm, rhs)
    return float(max(v @ v - coef @ rhs, 0.0)) * scale


# ------------------------------------------------------- batched model tables

@dataclass(frozen=True)
class _Tables:
    """Per-shape arrays of a library for the batched fit (built once per library).

    ``face`` (u,), ``pos`` (u,) rank of the shape among its face's shapes by
    alpha, ``sym_deg`` (u,), ``sig_fft`` (u, n // 2 + 1) conjugate spectra of
    the signatures and ``sig_sq`` (u,) their squared norms; ``g_up`` (u, M, 2)
    and ``z_up`` (u, M) the height gradient and height at the origin of each
    upward plane at rest (z = z_up + g . (x, y)), padded with flat planes at
    height ``_FAR``; ``g_dn``/``z_dn`` the same for the downward planes,
    padded at ``-_FAR``; ``model_shape`` (m,) the shape row of every library
    model.
    """

    face: np.ndarray
    pos: np.ndarray
    sym_deg: np.ndarray
    sig_fft: np.ndarray
    sig_sq: np.ndarray
    g_up: np.ndarray
    z_up: np.ndarray
    g_dn: np.ndarray
    z_dn: np.ndarray
    model_shape: np.ndarray


_FAR = 1e6
_TABLES: list = []


def _planes(body, rotation, upward: bool):
    """Height gradients (k, 2) and origin heights (k,) of the up- or downward face planes."""
    nl = body.face_normals @ np.asarray(rotation).T
    sel = nl[:, 2] > 1e-9 if upward else nl[:, 2] < -1e-9
    nz = nl[sel, 2]
    return -nl[sel, :2] / nz[:, None], body.face_offsets[sel] / nz


def prepare_fit(params=None) -> ModelLibrary:
    """Build the model library of this step's parameters and its plane tables now, as the first fit would.

    Both are kept for the life of the process (``lru_cache`` and the tables
    cache), so a worker that calls this before its first frame pays nothing
    for them in a frame.

    Returns
    -------
    ModelLibrary
        The library :func:`fit_kwargs` gives for ``params``.
    """
    lib = fit_kwargs(params)["library"]
    library_tables(lib)
    return lib


def library_tables(lib: ModelLibrary) -> _Tables:
    """The :class:`_Tables` of ``lib`` (cached per library object)."""
    for owner, tab in _TABLES:
        if owner is lib:
            return tab
    uniq = np.unique(lib.shape_id)
    first = np.array([int(np.flatnonzero(lib.shape_id == u)[0]) for u in uniq])
    face = np.array([lib.faces[i] for i in first])
    pos = np.zeros(uniq.size, int)
    for f in ("100", "111"):
        sel = np.flatnonzero(face == f)
        pos[sel[np.argsort(lib.alphas[first[sel]], kind="stable")]] = np.arange(sel.size)
    sigs = lib.signatures[first]
    ups = [_planes(lib.bodies[i], lib.rotations[i], True) for i in first]
    dns = [_planes(lib.bodies[i], lib.rotations[i], False) for i in first]

    def pad(planes, fill):
        m = max(len(z) for _, z in planes)
        g = np.zeros((len(planes), m, 2))
        z = np.full((len(planes), m), fill)
        for j, (gg, zz) in enumerate(planes):
            g[j, :len(zz)], z[j, :len(zz)] = gg, zz
        return g, z

    g_up, z_up = pad(ups, _FAR)
    g_dn, z_dn = pad(dns, -_FAR)
    tab = _Tables(face, pos, lib.symmetry_deg[first], np.conj(np.fft.rfft(sigs, axis=1)),
                  np.einsum("ij,ij->i", sigs, sigs), g_up, z_up, g_dn, z_dn,
                  np.searchsorted(uniq, lib.shape_id))
    _TABLES.append((lib, tab))
    del _TABLES[:-8]
    return tab


def outline_candidates(sig, tab: _Tables):
    """Signature distance of every library shape at its candidate rotations, in one batch.

    Parameters
    ----------
    sig : ndarray, shape (n,)
        Observed radial signature.
    tab : _Tables
        Library tables (:func:`library_tables`).

    Returns
    -------
    shifts : ndarray of int, shape (u, 4)
        Candidate cyclic shifts of each shape: the best one, then the best
        within +-n/32 of each look-alike turn (half the body symmetry on
        {100}; a quarter, a half and three quarters of it on {111}).
    dist : ndarray, shape (u, 4)
        RMS signature distance at those shifts (:func:`shift_distances`).
    valid : ndarray of bool, shape (u, 4)
        False for unused slots and repeated shifts.

    Notes
    -----
    All cross-correlations are one inverse real FFT of the (u, n/2+1)
    product of the observed spectrum with the stored conjugate model
    spectra: d^2[s] = (|a|^2 + |b|^2 - 2 C[s]) / n.
    """
    a = np.asarray(sig, float)
    n = a.size
    cc = np.fft.irfft(np.fft.rfft(a)[None, :] * tab.sig_fft, n, axis=1)
    d = (a @ a + tab.sig_sq[:, None] - 2.0 * cc) / n            # squared distances
    u = d.shape[0]
    rows = np.arange(u)
    k0 = np.argmin(d, axis=1)
    half = tab.sym_deg / 2 / 360 * n
    is100 = tab.face == "100"
    offs = np.where(is100[:, None], np.column_stack([half, np.full(u, np.nan), np.full(u, np.nan)]),
                    np.column_stack([half / 2, half, 1.5 * half]))
    shifts = np.zeros((u, 4), int)
    valid = np.zeros((u, 4), bool)
    shifts[:, 0], valid[:, 0] = k0, True
    w = np.arange(-(n // 32), n // 32 + 1)
    for j in range(3):
        ok = np.isfinite(offs[:, j])
        o = np.round(np.nan_to_num(offs[:, j])).astype(int)
        win = (k0[:, None] + o[:, None] + w[None, :]) % n
        best = win[rows, np.argmin(d[rows[:, None], win], axis=1)]
        dup = np.any((shifts[:, :j + 1] == best[:, None]) & valid[:, :j + 1], axis=1)
        shifts[:, j + 1] = best
        valid[:, j + 1] = ok & ~dup
    return shifts, np.sqrt(np.maximum(d[rows[:, None], shifts], 0.0)), valid


def placed_planes(tab: _Tables, shape, shift, n: int):
    """Plane tables of shapes turned in-plane by ``2 pi shift / n``.

    Parameters
    ----------
    tab : _Tables
    shape, shift : ndarray of int, shape (c,)
    n : int
        Signature length.

    Returns
    -------
    g_up, z_up, g_dn, z_dn : ndarray
        As in :class:`_Tables`, for the c placed models.

    Notes
    -----
    A turn R about z leaves every plane's height at the origin and its
    up/down sense alone and turns its height gradient: g' = R g.
    """
    t = 2.0 * np.pi * np.asarray(shift, float) / n
    c, s = np.cos(t)[:, None], np.sin(t)[:, None]

    def turn(g):
        return np.stack([c * g[..., 0] - s * g[..., 1], s * g[..., 0] + c * g[..., 1]], axis=-1)

    return turn(tab.g_up[shape]), tab.z_up[shape], turn(tab.g_dn[shape]), tab.z_dn[shape]


def interior_rss_batch(interior: Interior, g_up, z_up, g_dn=None, z_dn=None, edge_px: float = 2.0,
                       max_elements: int = 1_000_000) -> np.ndarray:
    """:func:`_interior_rss` of many placed models at once.

    Parameters
    ----------
    interior : Interior
        p samples.
    g_up, z_up : ndarray, shapes (c, M, 2) and (c, M)
        Upward planes of each model (:func:`placed_planes`), padded with
        flat planes at height ``_FAR``.
    g_dn, z_dn : ndarray, shapes (c, K, 2) and (c, K)
        Downward planes (needed for 'thickness'), padded at ``-_FAR``.
    edge_px : float
        As in :func:`_interior_rss`.
    max_elements : int
        Models are processed in chunks of about this many (model, sample,
        plane) elements (memory bound).

    Returns
    -------
    ndarray, shape (c,)
        Residual sum of squares of each model, as :func:`_interior_rss`.

    Notes
    -----
    Same model as :func:`_interior_rss`. The per-facet sums of the normal
    equations of all models come from one weighted ``bincount`` over
    (model, facet) bins; a facet that no sample sees gets a unit diagonal and
    a zero right-hand side (its level is then 0 and it adds nothing), and the
    c small systems are solved together by ``numpy.linalg.solve``.
    """
    g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
    c, m = z_up.shape
    if c == 0:
        return np.zeros(0)
    p = interior.value.size
    step = max(1, int(max_elements // max(p * max(m, 1), 1)))
    if c > step:
        return np.concatenate([
            interior_rss_batch(interior, g_up[i:i + step], z_up[i:i + step],
                               None if g_dn is None else g_dn[i:i + step],
                               None if z_dn is None else z_dn[i:i + step], edge_px, max_elements)
            for i in range(0, c, step)])
    x, y, v = interior.x, interior.y, interior.value
    # plane heights laid out (plane, model, sample): reductions run over whole
    # rows; the geometry is float32 (heights ~1, edge distances ~1e-2 ECD),
    # the sums of the normal equations float64
    x32, y32 = x.astype(np.float32), y.astype(np.float32)

    def heights(g, z0):
        gt = np.asarray(g, np.float32).transpose(2, 1, 0)                  # (2, M, c)
        return (np.asarray(z0, np.float32).T[:, :, None] + gt[0][:, :, None] * x32
                + gt[1][:, :, None] * y32)                                  # (M, c, p)

    zup = heights(g_up, z_up)
    ztop = zup.min(axis=0)                                                   # (c, p)
    if interior.mode == "facets":
        idx = zup.argmin(axis=0)                          # lowest plane, first index on ties
        wt = np.ones((c, p))
        scale = np.ones(c)
        if m > 1 and edge_px > 0:
            # distance to the line where plane j meets the top plane:
            # (z_j - z_top) / |g_j - g_top|; the top plane itself gives 0 * inf = NaN, skipped by fmin
            gd = np.linalg.norm(g_up[:, :, None, :] - g_up[:, None, :, :], axis=-1)   # (c, M, M)
            with np.errstate(divide="ignore"):
                inv = (1.0 / gd).astype(np.float32).transpose(2, 0, 1)                # (j, c, top)
            zup -= ztop
            with np.errstate(invalid="ignore"):
                zup *= inv[:, np.arange(c)[:, None], idx]
            near = np.fmin.reduce(zup, axis=0)
            far = ~(near < edge_px * interior.pixel)
            nfar = far.sum(axis=1)
            use = (nfar >= 30) & (nfar < p)
            wt = np.where(use[:, None], far, True).astype(float)
            scale = np.where(use, p / np.maximum(nfar, 1), 1.0)
        bins = (np.arange(c)[:, None] * m + idx).ravel()
        cnt = np.bincount(bins, wt.ravel(), minlength=c * m).reshape(c, m)
        sx = np.bincount(bins, (wt * x).ravel(), minlength=c * m).reshape(c, m)
        sy = np.bincount(bins, (wt * y).ravel(), minlength=c * m).reshape(c, m)
        sv = np.bincount(bins, (wt * v).ravel(), minlength=c * m).reshape(c, m)
        xx, xy, yy = wt @ (x * x), wt @ (x * y), wt @ (y * y)
        xv, yv, vv = wt @ (x * v), wt @ (y * v), wt @ (v * v)
        seen = cnt > 0
        nm = np.zeros((c, m + 2, m + 2))
        ii = np.arange(m)
        nm[:, ii, ii] = np.where(seen, cnt, 1.0)
        nm[:, :m, m], nm[:, m, :m] = sx, sx
        nm[:, :m, m + 1], nm[:, m + 1, :m] = sy, sy
        nm[:, m, m], nm[:, m, m + 1], nm[:, m + 1, m], nm[:, m + 1, m + 1] = xx, xy, xy, yy
        rhs = np.concatenate([sv, xv[:, None], yv[:, None]], axis=1)
        trace = cnt.sum(axis=1) + xx + yy
    else:
        if g_dn is None or z_dn is None:
            raise ValueError("thickness mode needs the downward planes g_dn, z_dn")
        t = np.maximum(ztop - heights(g_dn, z_dn).max(axis=0), 0.0).astype(float)   # (c, p)
        nm = np.empty((c, 4, 4))
        st, sx_, sy_ = t.sum(axis=1), t @ x, t @ y
        nm[:, 0, 0] = np.einsum("cp,cp->c", t, t)
        nm[:, 0, 1], nm[:, 0, 2], nm[:, 0, 3] = st, sx_, sy_
        nm[:, 1:, 0] = nm[:, 0, 1:]
        nm[:, 1:, 1:] = np.array([[p, x.sum(), y.sum()], [x.sum(), x @ x, x @ y],
                                  [y.sum(), x @ y, y @ y]])[None]
        rhs = np.empty((c, 4))
        rhs[:, 0] = t @ v
        rhs[:, 1:] = np.array([v.sum(), x @ v, y @ v])[None]
        vv = np.full(c, v @ v)
        scale = np.ones(c)
        trace = np.einsum("cii->c", nm)
    k = nm.shape[1]
    nm = nm + np.eye(k)[None] * (1e-12 * trace)[:, None, None]
    coef = np.linalg.solve(nm, rhs[:, :, None])[:, :, 0]
    return np.maximum(vv - np.einsum("ci,ci->c", coef, rhs), 0.0) * scale


# ------------------------------------------------------------------------ fit

@dataclass(frozen=True)
class AlphaFit:
    """Result of fitting one grain.

    Attributes
    ----------
    alpha, alpha_lo, alpha_hi : float
        Best alpha and the range within ``tolerance`` of the best score.
    face : str
        Resting face of the best model.
    rotation_deg : float
        Its in-plane rotation (counter-clockwise, lab frame).
    outline_misfit : float
        Its RMS signature distance.
    note : str
        What bounds the range ('' when both ends are inside the grid).
    score : ndarray, shape (m,)
        Score of every library model (lower is better, 0 at the best).
    facet_chi2 : float
        Interior evidence for facets: ``w (RSS_flat - RSS_best) / s^2``, the
        score by which the best placed model beats a featureless interior
        (one level plus a plane); NaN without interior samples.
    interior_level : float
        Mean interior value (brightness, or attenuation for TEM); NaN without.
    signature : ndarray, shape (n_angles,)
        The grain's radial signature (:func:`radial_signature`).
    """

    alpha: float
    alpha_lo: float
    alpha_hi: float
    face: str
    rotation_deg: float
    outline_misfit: float
    note: str
    score: np.ndarray
    facet_chi2: float = float("nan")
    interior_level: float = float("nan")
    signature: np.ndarray | None = None


def _flat_rss(interior: Interior) -> float:
    """RSS of a featureless interior: one level plus a plane a x + b y."""
    a = np.column_stack([np.ones_like(interior.x), interior.x, interior.y])
    nm = a.T @ a
    rhs = a.T @ interior.value
    coef = np.linalg.solve(nm + np.eye(3) * 1e-12 * np.trace(nm), rhs)
    v = interior.value
    return float(max(v @ v - coef @ rhs, 0.0))


_FIT_CACHE: dict = {}
_FIT_CACHE_MAX = 4096


def clear_fit_cache() -> None:
    """Forget every memoised fit of :func:`fit_alpha_cached`."""
    _FIT_CACHE.clear()


def fit_alpha_cached(contour_xy, interior=None, **kw) -> AlphaFit:
    """:func:`fit_alpha` memoised on the bytes of its inputs (same inputs, same answer).

    The classify and fit steps of one frame fit the same grains; this keeps
    the second call free. The cache is bounded and per process, and
    classify-habit empties it (:func:`clear_fit_cache`) when it starts a
    frame, so a frame's time never depends on the frames before it.
    """
    import hashlib

    h = hashlib.sha1(np.ascontiguousarray(contour_xy, dtype=float).tobytes())
    if interior is not None:
        for arr in (interior.x, interior.y, interior.value):
            h.update(np.ascontiguousarray(arr, dtype=float).tobytes())
        h.update(interior.mode.encode())
    lib = kw.get("library")
    h.update(repr(sorted((k, v) for k, v in kw.items() if k != "library")).encode())
    h.update(repr(None if lib is None else (lib.grid[0], lib.grid[-1], lib.grid.size,
                                            lib.signatures.shape, lib.alphas.size)).encode())
    key = h.hexdigest()
    hit = _FIT_CACHE.get(key)
    if hit is None:
        hit = fit_alpha(contour_xy, interior, **kw)
        if len(_FIT_CACHE) >= _FIT_CACHE_MAX:
            _FIT_CACHE.clear()
        _FIT_CACHE[key] = hit
    return hit


def fit_alpha(contour_xy, interior: Interior | None = None, *, pixel_scale: float = 1.0,
              library: ModelLibrary | None = None, tolerance: float = 4.0,
              outline_noise_px: float = 0.25, outline_noise_floor: float = 0.003,
              interior_weight: float = 0.05, facet_edge_px: float = 2.0,
              faces=("100", "111"), search: str = "coarse", interior_samples: int = 2500,
              search_samples: int = 250, coarse_every: int = 4, search_margin: float = 25.0
              ) -> AlphaFit:
    """Fit alpha (and the resting face) of one grain.

    Parameters
    ----------
    contour_xy : array_like, shape (k, 2)
        Closed outline in lab axes (x right, y up), any length unit.
    interior : Interior, optional
        Interior samples (:func:`grain_interior`); None for outline only.
    pixel_scale : float
        Length of one pixel in the unit of ``contour_xy`` (sets the outline
        noise unit).
    library : ModelLibrary, optional
        Default: :func:`model_library` with its defaults.
    tolerance : float
        Score difference bounding ``alpha_lo``/``alpha_hi``.
    outline_noise_px, outline_noise_floor : float
        Outline misfit unit ``tau = max(outline_noise_px * pixel / sqrt(A),
        outline_noise_floor)``.
    interior_weight : float
        Independent samples per interior pixel.
    facet_edge_px : float
        See :func:`_interior_rss` (``edge_px``).
    faces : tuple of str
        Resting faces allowed.
    search : {'coarse', 'exhaustive', 'quick'}
        'exhaustive' places the interior of every candidate model (the
        reference); 'coarse' searches a coarse alpha grid with a sparse
        sample and refines where it matters (see Notes); 'quick' scores
        alpha by the outline alone and places only the eight outline-best
        models, for ``facet_chi2`` (a lower bound on the full search's; used
        by classify-habit for grains whose outline decides the habit).
    interior_samples : int
        At most this many interior samples are compared with each model
        (:func:`subsample_interior`; each sample then stands for the pixels
        it replaces, so the evidence keeps its weight).
    search_samples, coarse_every, search_margin : float
        'coarse' only: samples of the search stage, spacing of its alpha
        grid (in shapes of one face) and the score margin above its best
        within which a coarse grid point is refined.

    Returns
    -------
    AlphaFit

    Notes
    -----
    Score of model m at rotation theta:
    ``S = (d_m(theta)^2 - d_min^2) / tau^2 + w (RSS_m(theta) - RSS_min) / s^2``,
    with d the signature distance (:func:`outline_candidates`), RSS the
    interior residual sum of squares of the placed model, s^2 = RSS_min /
    (p - q) the residual variance of the best interior model (it absorbs blur
    and the shading the model leaves out), w = ``interior_weight`` times the
    pixels each sample stands for. For each model the rotations tried are the
    best outline rotation and those near the look-alike turns; the interior
    is placed only for models whose outline score is below 25 + tolerance.
    The score is profiled over faces (minimum); ``alpha_lo``/``alpha_hi`` are
    the outer edges of the grid cells (half a step either side of a grid
    alpha, clipped to the grid) whose score is within ``tolerance``.

    'coarse' search: (1) every ``coarse_every``-th candidate shape of each
    face (and the last) is placed, all its candidate rotations, over a
    sparse sample of the interior (``search_samples``); (2) the shapes
    around every coarse point within ``search_margin`` of the stage's best
    score, and around its least-RSS model, are placed over the full sample
    at the rotations that won nearby; (3) while a shape within ``tolerance``
    of the best has an unplaced neighbour, that neighbour is placed too, so
    the range edges are those of the exhaustive search whenever its minimum
    lies in a refined region. Shapes never placed over the full sample get
    their score from stage 1 (offset to the stage-2 best) or, between coarse
    points, by linear interpolation in alpha, never below their outline
    score: they lie outside the range and matter only for
    :func:`grainhabit.plugins.habit.classify_habit.class_scores`.
    """
    lib = model_library() if library is None else library
    if search not in ("coarse", "exhaustive", "quick"):
        raise ValueError(f"search must be 'coarse', 'exhaustive' or 'quick', got {search!r}")
    tab = library_tables(lib)
    c = _check_poly(contour_xy, "contour_xy")
    _, area = polygon_centroid(c)
    n = lib.signatures.shape[1]
    sig = radial_signature(c, n)
    tau = max(outline_noise_px * pixel_scale / math.sqrt(area), outline_noise_floor)
    shape_ok = np.array([f in faces for f in tab.face])
    if not shape_ok.any():
        raise ValueError(f"faces must include '100' or '111', got {faces!r}")

    shifts, dist, valid = _outline_memo(sig, tab)
    valid &= shape_ok[:, None]
    dmin = dist[valid].min()
    osc = np.where(valid, (dist ** 2 - dmin ** 2) / tau ** 2, np.inf)      # (u, 4)

    use_int = interior is not None and interior.value.size >= 30
    tot = np.where(valid, osc, np.inf)
    shape_best = None
    rmin, s2, w_eff, full = np.inf, np.inf, 0.0, None
    evidence = False
    if use_int:
        full = subsample_interior(interior, interior_samples)
        w_eff = interior_weight * full.weight
        gated = valid & (osc <= 25.0 + tolerance)
        if search == "quick":
            # facet evidence from the outline-best models; alpha from the outline alone
            order = np.argsort(np.where(gated, osc, np.inf), axis=None, kind="stable")[:_QUICK_MODELS]
            pick = np.zeros(osc.shape, bool)
            pick.flat[order] = True
            res = _place_all(tab, shifts, osc, pick & gated, full, n, facet_edge_px, w_eff)
            if res is not None:
                rmin, s2 = res[2], res[3]
                evidence = True
            res, use_int = None, False
        elif search == "coarse":
            res = _coarse_search(tab, shifts, osc, gated, interior, full, n, tolerance, facet_edge_px,
                                 interior_weight, search_samples, coarse_every, search_margin)
            if res is None:
                res = _place_all(tab, shifts, osc, gated, full, n, facet_edge_px, w_eff)
        else:
            res = _place_all(tab, shifts, osc, gated, full, n, facet_edge_px, w_eff)
        if use_int and res is None:
            use_int = False
        elif use_int:
            tot, shape_best, rmin, s2 = res
            evidence = True
    if shape_best is None:
        shape_best = tot.min(axis=1)

    ms = tab.model_shape
    score = np.where(shape_ok[ms], shape_best[ms], np.inf)
    score = score - np.min(score)

    # profile over faces: score(alpha) = min over faces
    grid = lib.grid
    prof = np.full(grid.size, np.inf)
    gi = np.searchsorted(grid, lib.alphas - 1e-9)
    np.minimum.at(prof, gi, score)
    inside = np.flatnonzero(prof <= tolerance)
    best_val = prof.min()
    ties = np.flatnonzero(prof <= best_val + 1e-9)
    # identical bodies tie exactly: report the middle of the tied run
    ib = int(ties[len(ties) // 2])
    alpha = float(grid[ib])
    mbest = int(np.flatnonzero((np.abs(lib.alphas - alpha) < 1e-9) & (score <= best_val + 1e-9))[0])
    ub = int(ms[mbest])
    row = np.where(np.isfinite(tot[ub]), tot[ub], np.inf)
    # lowest score, then the smallest shift (as the candidates were listed in order)
    jb = int(np.lexsort((shifts[ub], row))[0])
    kbest, dbest = int(shifts[ub, jb]), float(dist[ub, jb])
    # each grid alpha stands for the cell of half a step either side
    half = 0.5 * (grid[1] - grid[0]) if grid.size > 1 else 0.0
    lo = float(max(grid[inside.min()] - half, grid[0]))
    hi = float(min(grid[inside.max()] + half, grid[-1]))
    notes = []
    if inside.min() == 0:
        notes.append(f"alpha_lo at grid minimum {grid[0]:g}: only an upper bound")
    if inside.max() == grid.size - 1:
        notes.append(f"alpha_hi at grid maximum {grid[-1]:g}: only a lower bound")
    if not use_int:
        notes.append("outline only")
    fchi, level = float("nan"), float("nan")
    if interior is not None and interior.value.size >= 30:
        level = float(np.mean(interior.value))
        if evidence:
            fchi = max(w_eff * (_flat_rss(full) - rmin) / s2, 0.0)
    return AlphaFit(alpha, lo, hi, lib.faces[mbest], 360.0 * kbest / n, dbest, "; ".join(notes), score,
                    fchi, level, sig)


_QUICK_MODELS = 8
_OUTLINE_MEMO: list = [None]


def _outline_memo(sig, tab):
    """:func:`outline_candidates`, remembering the last answer (classify asks twice per grain)."""
    key = (id(tab), sig.tobytes())
    hit = _OUTLINE_MEMO[0]
    if hit is None or hit[0] != key:
        hit = (key, outline_candidates(sig, tab))
        _OUTLINE_MEMO[0] = hit
    shifts, dist, valid = hit[1]
    return shifts, dist, valid.copy()


def _rss_of(tab, shifts, pairs, interior, n, edge_px):
    """Interior RSS of the (shape, slot) ``pairs`` (k, 2) placed over ``interior``."""
    if len(pairs) == 0:
        return np.zeros(0)
    u, j = pairs[:, 0], pairs[:, 1]
    return interior_rss_batch(interior, *placed_planes(tab, u, shifts[u, j], n), edge_px=edge_px)


def _totals(osc, rss, placed, s_count, w):
    """Scores of placed candidates; None if the residual variance is not usable."""
    rmin = rss[placed].min()
    s2 = rmin / max(s_count - 8, 1)
    if not (s2 > 0 and np.isfinite(s2)):
        return None
    return np.where(placed, osc + w * (rss - rmin) / s2, np.inf), rmin, s2


def _place_all(tab, shifts, osc, gated, interior, n, edge_px, w):
    """Exhaustive interior fit: every gated candidate over ``interior``."""
    pairs = np.argwhere(gated)
    rss = np.full(osc.shape, np.inf)
    rss[gated] = _rss_of(tab, shifts, pairs, interior, n, edge_px) if len(pairs) else []
    if not gated.any():
        return None
    r = _totals(osc, rss, gated, interior.value.size, w)
    if r is None:
        return None
    tot, rmin, s2 = r
    # candidates the outline ruled out keep a prohibitive score, as before
    tot = np.where(np.isfinite(osc) & ~gated, osc + 1e9, tot)
    return tot, tot.min(axis=1), rmin, s2


def _coarse_search(tab, shifts, osc, gated, interior, full, n, tolerance, edge_px, weight,
                   search_samples, every, margin):
    """Coarse-to-fine interior fit (see :func:`fit_alpha`); None falls back to the exhaustive one."""
    u = osc.shape[0]
    gshape = gated.any(axis=1)
    if not gshape.any():
        return None
    seqs = []                                   # gated shapes of each face, by alpha
    for f in ("100", "111"):
        sel = np.flatnonzero(gshape & (tab.face == f))
        if sel.size:
            seqs.append(sel[np.argsort(tab.pos[sel])])
    coarse = np.zeros(u, bool)
    for q in seqs:
        coarse[q[::every]] = True
        coarse[q[-1]] = True
    # stage 1: coarse shapes, all gated rotations, sparse sample
    sparse = subsample_interior(interior, search_samples)
    m1 = gated & coarse[:, None]
    rss1 = np.full(osc.shape, np.inf)
    rss1[m1] = _rss_of(tab, shifts, np.argwhere(m1), sparse, n, edge_px)
    r1 = _totals(osc, rss1, m1, sparse.value.size, weight * sparse.weight)
    if r1 is None:
        return None
    tot1 = r1[0]
    sb1 = tot1.min(axis=1)
    best1 = sb1.min()
    won1 = tot1 <= sb1[:, None] + margin / 2              # rotations worth refining, per coarse shape
    # seeds: coarse local minima (one per basin) within the margin, and the least-RSS model
    seeds = np.zeros(u, bool)
    for q in seqs:
        cq = q[coarse[q]]
        val = sb1[cq]
        left = np.r_[np.inf, val[:-1]]
        right = np.r_[val[1:], np.inf]
        seeds[cq[(val <= left) & (val <= right) & (val <= best1 + margin)]] = True
    seeds[np.unravel_index(np.argmin(np.where(m1, rss1, np.inf)), rss1.shape)[0]] = True
    # brackets: runs of shapes from one coarse shape to the next
    brackets, where = [], {}
    for q in seqs:
        cpos = np.flatnonzero(coarse[q])
        if cpos.size == 1:
            cpos = np.array([0, 0])
        for a, b in zip(cpos[:-1], cpos[1:]):
            for s in q[a:b + 1]:
                where.setdefault(int(s), []).append(len(brackets))
            brackets.append(q[a:b + 1])
    want = np.zeros(osc.shape, bool)
    taken = np.zeros(len(brackets), bool)

    def take(k, extra=None):
        run = brackets[k]
        slots = won1[run[0]] | won1[run[-1]]
        if extra is not None:
            slots = slots | extra
        for s in run:
            w = slots & gated[s]
            want[s] |= w if w.any() else gated[s]
        taken[k] = True

    for s in np.flatnonzero(seeds):
        for k in where.get(int(s), []):
            take(k)
    # stage 2: full sample; grow while a shape within tolerance has an unplaced neighbour
    rss2 = np.full(osc.shape, np.inf)
    done = np.zeros(osc.shape, bool)
    pos_of = {int(s): (q, i) for q in seqs for i, s in enumerate(q)}
    for _ in range(len(brackets) + 1):
        new = want & ~done
        if new.any():
            rss2[new] = _rss_of(tab, shifts, np.argwhere(new), full, n, edge_px)
            done |= new
        res = _totals(osc, rss2, done, full.value.size, weight * full.weight)
        if res is None:
            return None
        tot2 = res[0]
        sb2 = tot2.min(axis=1)
        grew = False
        for s in np.flatnonzero(sb2 <= sb2.min() + tolerance):
            q, i = pos_of[int(s)]
            for k in (i - 1, i + 1):
                if 0 <= k < len(q) and not done[q[k]].any():
                    for b in where[int(q[k])]:
                        if not taken[b]:
                            take(b, tot2[s] <= sb2[s] + tolerance)
                            grew = True
        if not grew:
            break
    tot2, rmin, s2 = res
    sb2 = tot2.min(axis=1)
    best2 = sb2.min()
    # scores of shapes not placed over the full sample (outside the range)
    placed = done.any(axis=1)
    est = np.where(placed, sb2, np.where(coarse & gshape, sb1 - best1 + best2, np.nan))
    for q in seqs:
        known = np.isfinite(est[q])
        if not known.all():
            idx = np.arange(q.size)
            est[q[~known]] = np.interp(idx[~known], idx[known], est[q][known])
    lower = np.where(gated, osc, np.inf).min(axis=1)
    est = np.where(placed, est, np.maximum(est, lower))
    # shapes the outline ruled out keep a prohibitive score, as in the exhaustive fit
    ruled_out = np.where(np.isfinite(osc), osc, np.inf).min(axis=1) + 1e9
    shape_best = np.where(gshape, est, ruled_out)
    tot = np.where(done, tot2, np.where(np.isfinite(osc) & ~gated, osc + 1e9, np.inf))
    return tot, shape_best, rmin, s2


# ----------------------------------------------------------------------- frame

def _signal(frame) -> tuple[np.ndarray, str]:
    """Interior signal image and its mode from the frame's polarity."""
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.labels) else None
    if frame.polarity == "dark":
        src = raw if raw is not None else frame.image
        return src, "thickness"
    src = raw if raw is not None else frame.image
    return src, "facets"


def _attenuation(crop, mask, ring):
    """-ln(I / I_bg) with I_bg the median of the background ring (TEM)."""
    bg = np.median(crop[ring]) if ring.any() else np.percentile(crop, 95)
    if bg <= 0:
        bg = np.max(crop)
    return -np.log(np.clip(crop, 1e-3 * bg, None) / bg)


def grain_evidence(frame, contours_px, index, erode_px=2):
    """Lab-frame contour (pixels) and interior samples of grain ``index``.

    Parameters
    ----------
    frame : FrameData
        With ``labels`` and ``raw``/``image``.
    contours_px : list of ndarray
        Sub-pixel contours in frame pixel coordinates (x = col + 0.5 at
        pixel centres, y down).
    index : int
        Row of the grain (label ``frame.grains['label'][index]``).
    erode_px : int

    Returns
    -------
    contour_lab : ndarray, shape (k, 2)
        Contour with y flipped (lab axes, y up), in pixels.
    interior : Interior or None
    """
    lab = int(frame.grains["label"][index])
    c = np.asarray(contours_px[index], float)
    if len(c) < 3:
        return None, None
    cen, area = polygon_centroid(c)
    ecd = math.sqrt(4 * area / math.pi)
    rows, cols = frame.labels.shape
    pad = 4
    r0 = max(int(np.floor(c[:, 1].min())) - pad, 0)
    r1 = min(int(np.ceil(c[:, 1].max())) + pad + 1, rows)
    c0 = max(int(np.floor(c[:, 0].min())) - pad, 0)
    c1 = min(int(np.ceil(c[:, 0].max())) + pad + 1, cols)
    lab_crop = frame.labels[r0:r1, c0:c1]
    mask = lab_crop == lab
    src, mode = _signal(frame)
    crop = np.asarray(src[r0:r1, c0:c1], float)  # convert the crop only: a whole-frame copy per grain was quadratic
    if mode == "thickness" and frame.raw is not None and src is not frame.image:
        ring = (lab_crop == 0) & ~ndi.binary_dilation(mask, iterations=2)
        crop = _attenuation(crop, mask, ring)
    contour_lab = np.column_stack([c[:, 0], -c[:, 1]])
    interior = grain_interior(crop, mask, (cen[0] - c0, cen[1] - r0), ecd, mode, erode_px)
    return contour_lab, interior


def fit_kwargs(params=None) -> dict:
    """Keyword arguments of :func:`fit_alpha` from this step's parameters (defaults for None)."""
    p = STEP.resolve(params)
    lib = model_library(p["alpha_min"], p["alpha_max"], p["alpha_step"], p["n_angles"],
                        p["min_face_share"])
    return dict(pixel_scale=1.0, library=lib, tolerance=p["tolerance"],
                outline_noise_px=p["outline_noise_px"], outline_noise_floor=p["outline_noise_floor"],
                interior_weight=p["interior_weight"], facet_edge_px=p["facet_edge_px"],
                interior_samples=p["interior_samples"], search=p["search"])


def fit_frame(frame, params=None) -> dict:
    """Fit every polyhedral grain of a frame; the columns of this step."""
    p = STEP.resolve(params)
    n = frame.n_grains
    out = {
        "alpha": np.full(n, np.nan), "alpha_lo": np.full(n, np.nan), "alpha_hi": np.full(n, np.nan),
        "alpha_note": np.full(n, "", dtype=object), "rest_face": np.full(n, "", dtype=object),
        "fit_rotation_deg": np.full(n, np.nan), "outline_misfit": np.full(n, np.nan),
    }
    if n == 0:
        return out
    if frame.labels is None:
        raise ValueError("fit-growth-ratio needs frame.labels: run segment and measure steps first")
    habit = frame.grains.get("habit")
    if habit is None:
        raise ValueError("fit-growth-ratio needs the habit column: run a classify step first")
    edge = frame.grains.get("edge_cut", np.zeros(n, bool))
    contours = None
    for i in range(n):
        h = str(habit[i])
        if h not in POLYHEDRAL:
            out["alpha_note"][i] = {
                "tabular_hexagon": "tabular plate: alpha not defined (edge_ratio gives the truncation)",
                "tabular_triangle": "tabular plate: alpha not defined (edge_ratio gives the truncation)",
                "rod": "rod: elongated prism, not a Wulff shape",
                "irregular": "irregular: fits no polyhedron",
            }.get(h, f"habit {h!r} is not polyhedral")
            continue
        if bool(edge[i]) and not p["fit_edge_cut"]:
            out["alpha_note"][i] = "touches the frame border: outline cut"
            continue
        if contours is None:
            contours = contours_for(frame)
        contour, interior = grain_evidence(frame, contours, i, p["erode_px"])
        if contour is None:
            out["alpha_note"][i] = "outline too small"
            continue
        fit = fit_alpha_cached(contour, interior if p["interior"] else None, **fit_kwargs(params))
        out["alpha"][i], out["alpha_lo"][i], out["alpha_hi"][i] = fit.alpha, fit.alpha_lo, fit.alpha_hi
        out["alpha_note"][i] = fit.note
        out["rest_face"][i] = fit.face
        out["fit_rotation_deg"][i] = fit.rotation_deg
        out["outline_misfit"][i] = fit.outline_misfit
    return out


def contours_for(frame):
    """Smoothed outline of every grain of a frame (pixel units), in the order of its label column."""
    from grainhabit.plugins.common.contours import grain_contours
    labs = np.asarray(frame.grains["label"], int)
    allc = grain_contours(frame.labels, int(frame.labels.max()), window=5)
    return [allc[l - 1] if 0 < l <= len(allc) else np.empty((0, 2)) for l in labs]


@hookimpl
def grainhabit_fit_growth(frame, params):
    """Add ``alpha``, ``alpha_lo``, ``alpha_hi``, ``alpha_note`` (see the module docstring)."""
    cols = fit_frame(frame, params)
    return frame.with_columns(**cols)


@hookimpl
def grainhabit_prepare_worker(steps):
    """Build the model library of this step's parameters and its plane tables once per worker."""
    if STEP.name not in steps:
        return
    prepare_fit(steps[STEP.name])
