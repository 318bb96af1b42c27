"""Step ``fit-growth-ratio``: the growth-rate parameter alpha of every polyhedral grain.

alpha = sqrt(3) v100 / v111 (the cube/octahedron growth parameter of the design
contract) is found by matching each grain against a library of kinetic Wulff
shapes (:mod:`plugins.crystal`) resting on a {100} or a {111} face, over a grid
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

from pipeline import hookimpl
from pipeline.params import Column, Param, StepInfo
from plugins import crystal as cr

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
    Ray-segment intersection: c + t d = a + s e with 0 <= s <= 1, solved for
    every ray and every edge at once by Cramer's rule.
    """
    n = _check_n(n_angles)
    p = _check_poly(poly)
    c, area = polygon_centroid(p)
    q = p - c
    e = np.roll(q, -1, axis=0) - q
    phi = 2.0 * np.pi * np.arange(n) / n
    dx, dy = np.cos(phi)[:, None], np.sin(phi)[:, None]
    det = -dx * e[None, :, 1] + e[None, :, 0] * dy
    ok = np.abs(det) > 1e-14
    det = np.where(ok, det, 1.0)
    t = (-q[None, :, 0] * e[None, :, 1] + e[None, :, 0] * q[None, :, 1]) / det
    s = (dx * q[None, :, 1] - dy * q[None, :, 0]) / det
    hit = ok & (s >= -1e-9) & (s <= 1 + 1e-9) & (t > 0)
    r = np.where(hit, t, 0.0).max(axis=1)
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


@functools.lru_cache(maxsize=4)
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
    n = _check_n(n_angles)
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
    """

    x: np.ndarray
    y: np.ndarray
    value: np.ndarray
    mode: str
    pixel: float = 0.0


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


def _interior_rss(interior: Interior, body, rotation, edge_px: float = 2.0) -> float:
    """Residual sum of squares of the interior under one placed model.

    'facets': one free level per visible facet plus a plane a x + b y (an
    illumination or detector gradient across the grain); 'thickness': an
    affine function of the model's projected thickness plus the same plane.
    The facet seen at (x, y) is the upward plane of lowest height there
    (convex body), the thickness z_top - z_bottom as in
    :func:`plugins.crystal.thickness_map`; samples just outside the model
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


def fit_alpha_cached(contour_xy, interior=None, **kw) -> AlphaFit:
    """:func:`fit_alpha` memoised on the bytes of its inputs (same inputs, same answer).

    The classify and fit steps of one frame fit the same grains; this keeps
    the second call free. The cache is bounded and per process.
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
              faces=("100", "111")) -> AlphaFit:
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

    Returns
    -------
    AlphaFit

    Notes
    -----
    Score of model m at rotation theta:
    ``S = (d_m(theta)^2 - d_min^2) / tau^2 + w (RSS_m(theta) - RSS_min) / s^2``,
    with d the signature distance (:func:`shift_distances`), RSS the interior
    residual sum of squares of the placed model, s^2 = RSS_min / (p - q) the
    residual variance of the best interior model (it absorbs blur and the
    shading the model leaves out), w = ``interior_weight``. For each model
    the rotations tried are the best outline rotation and that plus half the
    body symmetry angle (the dual-looking octagon / hexagon); the interior is
    evaluated only for models whose outline score is below 25 + tolerance.
    The score is profiled over faces (minimum); ``alpha_lo``/``alpha_hi`` are
    the outer edges of the grid cells (half a step either side of a grid
    alpha, clipped to the grid) whose score is within ``tolerance``.
    """
    lib = model_library() if library is None else library
    c = _check_poly(contour_xy, "contour_xy")
    _, area = polygon_centroid(c)
    n = lib.signatures.shape[1]
    sig = radial_signature(c, n)
    tau = max(outline_noise_px * pixel_scale / math.sqrt(area), outline_noise_floor)
    allowed = np.array([f in faces for f in lib.faces])
    if not allowed.any():
        raise ValueError(f"faces must include '100' or '111', got {faces!r}")

    # outline distance of each unique shape at all shifts
    uniq = np.unique(lib.shape_id)
    first = {int(s): int(np.flatnonzero(lib.shape_id == s)[0]) for s in uniq}
    cand = {}            # shape id -> list of (shift, d)
    for s, i in first.items():
        if not allowed[i]:
            continue
        d = shift_distances(sig, lib.signatures[i])
        k0 = int(np.argmin(d))
        half = lib.symmetry_deg[i] / 2 / 360 * n
        # the body is 4-fold ({100}) or 3-fold ({111}) but its outline looks
        # 4-fold / 6-fold and nearly 8-/12-fold: also try the best rotation
        # near each of those look-alike turns
        offsets = (half,) if lib.faces[i] == "100" else (half / 2, half, 1.5 * half)
        shifts = {k0}
        for off in offsets:
            win = (k0 + int(round(off)) + np.arange(-(n // 32), n // 32 + 1)) % n
            shifts.add(int(win[np.argmin(d[win])]))
        cand[s] = [(k, float(d[k])) for k in sorted(shifts)]
    dmin = min(dd for v in cand.values() for _, dd in v)
    out_score = {s: [((dd ** 2 - dmin ** 2) / tau ** 2) for _, dd in v] for s, v in cand.items()}

    use_int = interior is not None and interior.value.size >= 30
    rss = {}
    rmin = np.inf
    if use_int:
        limit = 25.0 + tolerance
        for s, v in cand.items():
            i = first[s]
            rss[s] = []
            for (k, _), so in zip(v, out_score[s]):
                if so > limit:
                    rss[s].append(np.inf)
                    continue
                rot = cr.in_plane_rotation(360.0 * k / n) @ lib.rotations[i]
                rss[s].append(_interior_rss(interior, lib.bodies[i], rot, facet_edge_px))
        rmin = min(r for v in rss.values() for r in v)
        q = 8
        s2 = rmin / max(interior.value.size - q, 1) if np.isfinite(rmin) else np.inf
        if not (s2 > 0 and np.isfinite(s2)):
            use_int = False

    best_per_shape = {}
    for s, v in cand.items():
        tot = []
        for j, ((k, dd), so) in enumerate(zip(v, out_score[s])):
            t = so
            if use_int:
                r = rss[s][j]
                t = t + (interior_weight * (r - rmin) / s2 if np.isfinite(r) else 1e9)
            tot.append((t, k, dd))
        best_per_shape[s] = min(tot)
    score = np.full(len(lib.alphas), np.inf)
    for i, s in enumerate(lib.shape_id):
        if allowed[i] and int(s) in best_per_shape:
            score[i] = best_per_shape[int(s)][0]
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
    _, kbest, dbest = best_per_shape[int(lib.shape_id[mbest])]
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
        if use_int:
            fchi = max(interior_weight * (_flat_rss(interior) - rmin) / s2, 0.0)
    return AlphaFit(alpha, lo, hi, lib.faces[mbest], 360.0 * kbest / n, dbest, "; ".join(notes), score,
                    fchi, level)


# ----------------------------------------------------------------------- frame

def _signal(frame) -> tuple[np.ndarray, str]:
    """Interior signal image and its mode from the frame's polarity."""
    raw = frame.raw if frame.raw is not None and np.shape(frame.raw) == np.shape(frame.labels) else None
    if frame.polarity == "dark":
        src = raw if raw is not None else frame.image
        return np.asarray(src, float), "thickness"
    src = raw if raw is not None else frame.image
    return np.asarray(src, float), "facets"


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
    sig, mode = _signal(frame)
    crop = sig[r0:r1, c0:c1]
    if mode == "thickness" and frame.raw is not None and sig is not frame.image:
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
                interior_weight=p["interior_weight"], facet_edge_px=p["facet_edge_px"])


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
            contours = _contours_for(frame)
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


def _contours_for(frame):
    from plugins.measure import grain_contours
    labs = np.asarray(frame.grains["label"], int)
    allc = grain_contours(frame.labels, int(frame.labels.max()), window=5)
    return [allc[l - 1] if 0 < l <= len(allc) else np.empty((0, 2)) for l in labs]


@hookimpl
def grainhabit_fit_growth(frame, params):
    """Add ``alpha``, ``alpha_lo``, ``alpha_hi``, ``alpha_note`` (see the module docstring)."""
    cols = fit_frame(frame, params)
    return frame.with_columns(**cols)
