"""Interior evidence of a grain: placed Wulff models against its pixels (the habit engine's interior half).

Secondary-electron contrast ('facets'): the brightness above the background of
the facet seen at each pixel follows its tilt, ``a (1 + k (sec(tilt) - 1))``
with one scale a >= 0 and k in :data:`TILT_GAIN_RANGE`, plus a detector term
``c . n_xy`` and a plane; transmission contrast ('thickness'): the attenuation
-ln(I / I_bg) is ``b t + a`` with the model's projected thickness t, b >= 0
and 0 <= a <= ``tem_offset_max`` times the mean attenuation, plus a plane.
Both are bounded least squares; a predicted facet or thickness relief that
the image does not show therefore costs. Pure functions on arrays.

References
----------
.. [1] L. Reimer, *Scanning Electron Microscopy*, 2nd ed., Springer (1998),
   ch. 4 (secondary-electron yield rising with tilt, roughly as sec(tilt);
   from memory).
"""
from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from typing import NamedTuple
from functools import cached_property

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.habit import crystal as cr
from grainhabit.plugins.habit.signature import polygon_centroid


#: Range of the gain k of the tilt law ``1 + k (sec(tilt) - 1)`` in secondary-electron
#: contrast: k = 1 is the secant law [3]_; detectors and the substrate's own yield soften or
#: sharpen it. The lower end is what makes a predicted but unseen facet cost.
TILT_GAIN_RANGE = (0.2, 3.0)


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

    @cached_property
    def points32(self) -> np.ndarray:
        """(x, y, 1) of every sample as rows of a (3, p) float32 array (the plane-height operand)."""
        return np.stack([self.x, self.y, np.ones_like(self.x)]).astype(np.float32)

    @cached_property
    def products(self) -> tuple:
        """x*x, x*y, y*y, x*v, y*v, v*v of every sample (the plane terms of the facet fit)."""
        x, y, v = self.x, self.y, self.value
        return x * x, x * y, y * y, x * v, y * v, v * v

    @cached_property
    def sums(self) -> tuple:
        """sum x, sum y, sum v, x.x, x.y, y.y, x.v, y.v, v.v and mean v (the plane and level terms)."""
        x, y, v = self.x, self.y, self.value
        return x.sum(), y.sum(), v.sum(), x @ x, x @ y, y @ y, x @ v, y @ v, v @ v, mean_of(v)

    @cached_property
    def spread(self) -> float:
        """|mean| + standard deviation of the values (the scale of the interior noise floor).

        ``abs(float(np.mean(v))) + float(np.std(v))``, by the operations numpy's mean and std make
        (one pairwise sum, the quotient by the count; the squared deviations from that mean summed,
        divided and rooted) without their per-call set-up (:func:`mean_and_std`).
        """
        mean, std = mean_and_std(self.value)
        return abs(mean) + std


def mean_and_std(values) -> tuple[float, float]:
    """``float(np.mean(values))`` and ``float(np.std(values))`` of a 1-D float64 array, the same numbers.

    numpy's mean is the pairwise sum (``np.add.reduce``) divided by the count; its std subtracts
    that mean, squares in place, sums the same way, divides by the count and takes the square root.
    Other arrays go to numpy itself.
    """
    v = np.asarray(values)
    if v.ndim != 1 or v.dtype != np.float64 or v.size == 0:
        return float(np.mean(v)), float(np.std(v))
    n = v.size
    mean = np.add.reduce(v) / n
    d = v - mean
    np.multiply(d, d, out=d)
    return float(mean), float(np.sqrt(np.add.reduce(d) / n))


def mean_of(values) -> float:
    """``float(np.mean(values))`` of a 1-D float64 array (the pairwise sum over the count), numpy's otherwise."""
    v = np.asarray(values)
    if v.ndim != 1 or v.dtype != np.float64 or v.size == 0:
        return float(np.mean(v))
    return float(np.add.reduce(v) / v.size)


def grain_interior(signal, mask, centroid_xy_px, ecd_px, mode, erode_px=2):
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

    Returns
    -------
    Interior or None
        None when fewer than 30 pixels remain.
    """
    if mode not in ("facets", "thickness"):
        raise ValueError(f"mode must be 'facets' or 'thickness', got {mode!r}")
    m = np.asarray(mask, bool)
    if erode_px > 0:
        m = diamond_morphology(m, int(erode_px), erode=True)
    rr, cc = np.nonzero(m)
    if rr.size < 30:
        return None
    x = (cc + 0.5 - centroid_xy_px[0]) / ecd_px
    y = -(rr + 0.5 - centroid_xy_px[1]) / ecd_px
    v = np.asarray(signal, float)[rr, cc]
    return Interior(x, y, v, mode, 1.0 / ecd_px)


def diamond_morphology(mask, radius: int, erode: bool) -> np.ndarray:
    """``scipy.ndimage.binary_erosion`` / ``binary_dilation`` of ``mask`` with ``iterations=radius``.

    Parameters
    ----------
    mask : ndarray of bool, shape (h, w)
    radius : int
        Iterations of the default (cross-shaped) structuring element, >= 1.
    erode : bool
        Erosion (True) or dilation (False); pixels outside the array count as background,
        as scipy's default ``border_value=0``.

    Returns
    -------
    ndarray of bool, shape (h, w)

    Notes
    -----
    ``radius`` steps of the cross are one step of their Minkowski sum, the diamond
    |di| + |dj| <= radius (the array is a box, so every path between a pixel and a diamond
    neighbour inside it stays inside it). That step is an AND (erosion) or OR (dilation) of
    2 r^2 + 2 r + 1 shifted views of the zero-padded mask: the same pixels as scipy's
    iterations, without its per-call overhead on a grain's crop (tested equal). Radii above 4
    go to scipy.
    """
    m = np.asarray(mask, bool)
    r = int(radius)
    if r < 1 or r > 4 or m.ndim != 2:
        op = ndi.binary_erosion if erode else ndi.binary_dilation
        return op(m, iterations=r) if r >= 1 else m.copy()
    h, w = m.shape
    pad = np.zeros((h + 2 * r, w + 2 * r), bool)
    pad[r:r + h, r:r + w] = m
    out = m.copy()
    comb = np.logical_and if erode else np.logical_or
    for di in range(-r, r + 1):
        k = r - abs(di)
        for dj in range(-k, k + 1):
            if di or dj:
                comb(out, pad[r + di:r + di + h, r + dj:r + dj + w], out=out)
    return out


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


def _top_facets(interior: Interior, body, rotation, edge_px: float):
    """Top facet of every sample, the facet tilt features and the edge mask (one model)."""
    x, y = interior.x, interior.y
    nl = body.face_normals @ np.asarray(rotation).T
    up = nl[:, 2] > 1e-9
    coef_up = np.vstack([-nl[up, 0], -nl[up, 1], body.face_offsets[up]]) / nl[up, 2]
    pts = np.column_stack([x, y, np.ones_like(x)])
    zup = pts @ coef_up
    idx = np.argmin(zup, axis=1)
    far = np.ones(x.size, bool)
    if up.sum() > 1 and edge_px > 0:
        g = coef_up[:2].T
        gd = np.linalg.norm(g[:, None, :] - g[None, :, :], axis=-1)
        ztop = zup[np.arange(x.size), idx]
        with np.errstate(divide="ignore", invalid="ignore"):
            dist = (zup - ztop[:, None]) / gd[idx]
        dist[np.arange(x.size), idx] = np.inf
        far = np.nanmin(np.where(np.isfinite(dist), dist, np.inf), axis=1) >= edge_px * interior.pixel
    return nl[up][idx], zup.min(axis=1), far


def interior_rss(interior: Interior, body, rotation, edge_px: float = 2.0,
                  tem_offset_max: float = 0.5) -> float:
    """Residual sum of squares of the interior under one placed model (the reference).

    Parameters
    ----------
    interior : Interior
    body : Polyhedron
    rotation : ndarray, shape (3, 3)
        Crystal -> lab rotation of the placed model.
    edge_px : float
        'facets': samples closer than this (pixels) to a predicted facet
        edge are left out and the RSS scaled back to all samples.
    tem_offset_max : float
        'thickness': bound of the thickness-independent term, as a share of
        the mean attenuation.

    Returns
    -------
    float

    Notes
    -----
    'facets' (secondary electrons, brightness above the background): the
    facet seen at (x, y) is the upward plane of lowest height there; its
    brightness is ``a (1 + k (sec(tilt) - 1)) + c_x n_x + c_y n_y`` plus a
    plane ``p_x x + p_y y`` (illumination gradient), with a >= 0 and k in
    :data:`TILT_GAIN_RANGE`. This reference solves it by brute force: linear
    least squares at 2001 values of k spread over the range (and a = 0), the
    smallest RSS kept. 'thickness'
    (transmission): ``b t + a + p_x x + p_y y`` with b >= 0 and
    0 <= a <= tem_offset_max * mean(value), solved by
    ``scipy.optimize.lsq_linear`` (bounded least squares).
    """
    from scipy.optimize import lsq_linear

    x, y, v = interior.x, interior.y, interior.value
    if interior.mode == "facets":
        n, _, far = _top_facets(interior, body, rotation, edge_px)
        scale = 1.0
        if far.sum() >= 30 and not far.all():
            scale = v.size / far.sum()
            x, y, v, n = x[far], y[far], v[far], n[far]
        sec = 1.0 / n[:, 2] - 1.0
        a0 = np.column_stack([n[:, 0], n[:, 1], x, y])
        coef, *_ = np.linalg.lstsq(a0, v, rcond=None)
        best = float(np.sum((v - a0 @ coef) ** 2))                  # a = 0
        for k in np.linspace(*TILT_GAIN_RANGE, 2001):
            a = np.column_stack([1.0 + k * sec, a0])
            coef, *_ = np.linalg.lstsq(a, v, rcond=None)
            if coef[0] >= 0:
                best = min(best, float(np.sum((v - a @ coef) ** 2)))
        return best * scale
    nl = body.face_normals @ np.asarray(rotation).T
    pts = np.column_stack([x, y, np.ones_like(x)])
    up, dn = nl[:, 2] > 1e-9, nl[:, 2] < -1e-9
    zup = pts @ (np.vstack([-nl[up, 0], -nl[up, 1], body.face_offsets[up]]) / nl[up, 2])
    zdn = pts @ (np.vstack([-nl[dn, 0], -nl[dn, 1], body.face_offsets[dn]]) / nl[dn, 2])
    t = np.maximum(zup.min(axis=1) - zdn.max(axis=1), 0.0)
    amax = max(tem_offset_max * float(np.mean(v)), 0.0)
    a = np.column_stack([t, np.ones_like(t), x, y])
    res = lsq_linear(a, v, bounds=([0.0, 0.0, -np.inf, -np.inf], [np.inf, amax + 1e-15, np.inf, np.inf]),
                     method="bvls", tol=1e-12)
    return float(np.sum((v - a @ res.x) ** 2))


FAR_HEIGHT = 1e6


def _facet_sets():
    kmin, kmax = TILT_GAIN_RANGE
    return _stack_sets((_active_set(6), _active_set(6, ((0, 0.0), (1, 0.0))), _active_set(6, tied=(0, 1, kmin)),
                        _active_set(6, tied=(0, 1, kmax))))


def face_planes(body, rotation, upward: bool):
    """Height gradients (k, 2) and origin heights (k,) of the up- or downward face planes."""
    nl = body.face_normals @ np.asarray(rotation).T
    sel = nl[:, 2] > 1e-9 if upward else nl[:, 2] < -1e-9
    nz = nl[sel, 2]
    return -nl[sel, :2] / nz[:, None], body.face_offsets[sel] / nz


def _active_set(k, fixed=(), tied=None):
    """(T, t0) of an active set over k unknowns: theta = T phi + t0.

    Parameters
    ----------
    k : int
        Number of unknowns.
    fixed : sequence of (index, value)
        Unknowns held at a value (their column of T is zero).
    tied : (i, j, ratio), optional
        Unknown j held at ``ratio`` times unknown i (column j of T zero, T[j, i] = ratio).
    """
    t = np.eye(k)
    t0 = np.zeros(k)
    for i, val in fixed:
        t[:, i] = 0.0
        t0[i] = val
    if tied is not None:
        i, j, ratio = tied
        t[:, j] = 0.0
        t[j, i] = ratio
    return t, t0


def _stack_sets(sets):
    """(T (S, k, k), t0 (S, k)) of a sequence of :func:`_active_set` results."""
    return np.stack([q[0] for q in sets]), np.stack([q[1] for q in sets])


def _solve_sets(nm, rhs, vv, sets):
    """Least squares of c small systems under several active sets, in one batched solve.

    Parameters
    ----------
    nm : ndarray, shape (c, k, k)
        Normal matrices A^T A.
    rhs : ndarray, shape (c, k)
        A^T v.
    vv : ndarray, shape (c,)
        v . v.
    sets : (ndarray (S, k, k), ndarray (S, k) or (S, c, k))
        :func:`_stack_sets` of the active sets (offsets shared, or one row per system): set s parametrises
        theta = T_s phi + t0_s (:func:`_active_set`); unknowns held at a value or
        tied to another have a zero column in T_s.

    Returns
    -------
    theta : ndarray, shape (S, c, k)
    rss : ndarray, shape (S, c)
        |v - A theta|^2 = v.v - 2 theta.rhs + theta^T nm theta, at least 0.

    Notes
    -----
    The normal equations of phi are (T^T N T) phi = T^T (r - N t0). A zero column of
    T gives a zero row and column there; a unit diagonal is put in its place, so that
    phi is 0 there and the rest is the least-squares solution of the reduced system.
    Every system gets the ridge 1e-12 times its trace (a guard against singular
    systems, e.g. a model with a single facet).
    """
    tm, t0 = sets                                                           # (S, k, k), (S, k)
    tt, dead_eye, eye = _set_constants(tm)
    if tm.shape[0] == 1 and _is_free(tm, t0):
        return _solve_free(nm, rhs, vv, eye)
    nf = tt[:, None] @ nm[None] @ tm[:, None]                               # (S, c, k, k)
    if t0.ndim == 3:
        # offsets per system (S, c, k): the same products and sums per system
        r = np.einsum("sak,sck->sca", tt, rhs[None] - np.einsum("ckj,scj->sck", nm, t0))
    else:
        r = np.einsum("sak,sck->sca", tt, rhs[None] - np.einsum("ckj,sj->sck", nm, t0))
    tr = np.einsum("scii->sc", nf)
    # nf + ridge + unit diagonal of the unused unknowns, added in place in that order
    nf += eye * (1e-12 * tr + 1e-300)[:, :, None, None]
    nf += dead_eye[:, None]
    phi = np.linalg.solve(nf, r[..., None])[..., 0]                         # (S, c, k)
    theta = np.einsum("sij,scj->sci", tm, phi) + (t0 if t0.ndim == 3 else t0[:, None, :])
    rss = vv - 2.0 * np.einsum("sci,ci->sc", theta, rhs) + np.einsum("sci,cij,scj->sc", theta, nm, theta)
    return theta, np.maximum(rss, 0.0)


def _solve_free(nm, rhs, vv, eye):
    """:func:`_solve_sets` of the one set with no unknown held (T the identity, t0 zero).

    T^T N T = N, T^T (r - N t0) = r and theta = phi hold exactly in floating point
    (products with 1 and 0, sums with 0), so the products with T are left out; the ridge,
    the solve and the RSS are the same operations (tested equal to the general path).
    """
    nf = nm[None].copy()                                                    # (1, c, k, k)
    tr = np.einsum("scii->sc", nf)
    nf += eye * (1e-12 * tr + 1e-300)[:, :, None, None]
    theta = np.linalg.solve(nf, rhs[None, ..., None])[..., 0]               # (1, c, k)
    rss = vv - 2.0 * np.einsum("sci,ci->sc", theta, rhs) + np.einsum("sci,cij,scj->sc", theta, nm, theta)
    return theta, np.maximum(rss, 0.0)


_FREE_SETS = {}


def _is_free(tm, t0) -> bool:
    """Whether a one-set stack holds no unknown (T the identity, t0 zero); kept per stack."""
    key = (tm.shape, tm.tobytes(), t0.tobytes())
    got = _FREE_SETS.get(key)
    if got is None:
        got = _FREE_SETS[key] = bool(np.array_equal(tm[0], np.eye(tm.shape[-1])) and not np.any(t0))
    return got


_SET_CONSTANTS = {}


def _set_constants(tm):
    """T^T, the unit diagonal of the unused unknowns (S, k, k) and the identity of a stack of active sets.

    Kept per stack (the module's two stacks are built once), so that a solve does not rebuild them.
    """
    key = (tm.shape, tm.tobytes())
    got = _SET_CONSTANTS.get(key)
    if got is None:
        k = tm.shape[-1]
        eye = np.eye(k)
        dead = ~np.any(tm != 0.0, axis=1)                                   # (S, k) unused unknowns
        got = _SET_CONSTANTS[key] = (np.swapaxes(tm, 1, 2), dead[:, :, None] * eye, eye)
    return got


#: Active sets of the facet fit over (a, b, c_x, c_y, p_x, p_y): none; a = b = 0;
#: b = kmin a; b = kmax a (see :func:`interior_rss_batch`).
_FACET_SETS = _facet_sets()
#: Active sets of the thickness fit over (b, a, p_x, p_y) with the bound amax = 1: none; a = 0;
#: a = amax; b = 0; b = a = 0; b = 0 and a = amax. Every held value is 0 or amax, so the
#: offsets of a grain's bound are these times its amax.
_THICKNESS_SETS = _stack_sets([_active_set(4, f) for f in ((), ((1, 0.0),), ((1, 1.0),), ((0, 0.0),),
                                                           ((0, 0.0), (1, 0.0)), ((0, 0.0), (1, 1.0)))])


def first_lowest(z, zmin) -> np.ndarray:
    """Index of the lowest of the planes of every (model, sample), the first one on ties.

    Parameters
    ----------
    z : ndarray, shape (M, c, p)
        Plane heights.
    zmin : ndarray, shape (c, p)
        ``z.min(axis=0)``.

    Returns
    -------
    ndarray of intp, shape (c, p)
        ``z.argmin(axis=0)``, computed without its strided scan over the first axis: plane j
        at the minimum scores M - j, and M minus the largest score is the first such j (one
        comparison, one product and one element-wise maximum over whole rows).
    """
    m = z.shape[0]
    if m > 255:
        return z.argmin(axis=0)
    score = _PLANE_SCORES.get(m)
    if score is None:
        score = _PLANE_SCORES[m] = np.arange(m, 0, -1, dtype=np.uint8)[:, None, None]
        score.setflags(write=False)
    # the comparison's bytes scored in place (a bool is the byte 0 or 1), then their maximum over the planes
    at_min = np.equal(z, zmin).view(np.uint8)
    np.multiply(at_min, score, out=at_min)
    return m - np.maximum.reduce(at_min, axis=0).astype(np.intp)


#: Descending uint8 scores of the planes of :func:`first_lowest`, per plane count.
_PLANE_SCORES = {}


def plane_gap_inverse(g_up) -> np.ndarray:
    """1 / |g_j - g_i| of every pair of upward planes (c, M, M), float32 (inf where equal).

    Rotation-invariant, so a library computes it once per shape at rest.
    """
    g = np.asarray(g_up, float)
    d = g[:, :, None, :] - g[:, None, :, :]
    with np.errstate(divide="ignore"):
        return (1.0 / np.hypot(d[..., 0], d[..., 1])).astype(np.float32)


def interior_rss_batch(interior: Interior, g_up, z_up, g_dn=None, z_dn=None, edge_px: float = 2.0,
                       tem_offset_max: float = 0.5, max_elements: int = 1_000_000,
                       gap_inv=None) -> np.ndarray:
    """:func:`interior_rss` of many placed models at once.

    Parameters
    ----------
    interior : Interior
        p samples.
    g_up, z_up : ndarray, shapes (c, M, 2) and (c, M)
        Upward planes of each model (:func:`placed_planes`), padded with
        flat planes at height ``FAR_HEIGHT``.
    g_dn, z_dn : ndarray, shapes (c, K, 2) and (c, K)
        Downward planes (needed for 'thickness'), padded at ``-FAR_HEIGHT``.
    edge_px, tem_offset_max : float
        As in :func:`interior_rss`.
    max_elements : int
        Models are processed in chunks of about this many (model, sample,
        plane) elements (memory bound).
    gap_inv : ndarray, shape (c, M, M), optional
        :func:`plane_gap_inverse` of ``g_up`` when the caller has it (a model
        library keeps it per shape); computed here otherwise.

    Returns
    -------
    ndarray, shape (c,)
        Residual sum of squares of each model, as :func:`interior_rss`.

    Notes
    -----
    Same model as :func:`interior_rss`. A plane's tilt follows from its
    height gradient g: n_z = 1 / sqrt(1 + |g|^2), (n_x, n_y) = -g n_z. The
    per-facet sums of the normal equations of all models come from one
    weighted ``bincount`` over (model, facet) bins. Both bounded fits are
    convex least-squares problems with a few linear inequality constraints,
    solved exactly by trying every active set (the best feasible candidate
    is the optimum): in 'facets' mode a >= 0 and k_min a <= b <= k_max a
    with b = k a, in 'thickness' mode b >= 0 and 0 <= a <= amax.
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
                               None if z_dn is None else z_dn[i:i + step], edge_px, tem_offset_max,
                               max_elements, None if gap_inv is None else gap_inv[i:i + step])
            for i in range(0, c, step)])
    return solve_normal_equations([normal_equations(interior, g_up, z_up, g_dn, z_dn, edge_px, tem_offset_max,
                                                    gap_inv)])[0]


class NormalEquations(NamedTuple):
    """Normal equations of c placed models over one grain's interior (:func:`normal_equations`).

    Attributes
    ----------
    mode : str
        'facets' (unknowns a, b, c_x, c_y, p_x, p_y) or 'thickness' (b, a, p_x, p_y).
    nm : ndarray, shape (c, k, k)
        A^T A of each model.
    rhs : ndarray, shape (c, k)
        A^T v.
    vv : ndarray, shape (c,)
        v . v.
    extra : ndarray, shape (c,)
        'facets': the factor of each model's RSS (samples near facet edges left out);
        'thickness': the bound amax of the offset a.
    """

    mode: str
    nm: np.ndarray
    rhs: np.ndarray
    vv: np.ndarray
    extra: np.ndarray


class FacetSums(NamedTuple):
    """What the facet-mode normal equations of c placed models take from their samples (:func:`normal_equations`).

    Attributes
    ----------
    g_up : ndarray, shape (c, M, 2)
        Height gradients of the models' upward planes.
    cnt, sx, sy, sv : ndarray, shape (c, M)
        Weighted count and sums of x, y and v of the samples under each plane.
    plane_terms : tuple of 6 ndarray, shape (c,)
        Weighted sums of x*x, x*y, y*y, x*v, y*v and v*v.
    scale : ndarray, shape (c,)
        Factor of each model's RSS (samples near facet edges left out).
    """

    g_up: np.ndarray
    cnt: np.ndarray
    sx: np.ndarray
    sy: np.ndarray
    sv: np.ndarray
    plane_terms: tuple
    scale: np.ndarray


def facet_equations(parts) -> NormalEquations:
    """The facet-mode :class:`NormalEquations` of the models of several :class:`FacetSums`, in their order.

    The chunks' models are stacked and their equations formed together: every entry is a product of a
    model's own sums and plane factors, or a sum of such products over that model's planes (einsum
    adds each model's planes in their order whatever the number of models stacked), so each model
    gets the bits of forming its chunk alone; ``tests/test_habit_speed21.py`` checks it against the
    previous per-chunk form on drawn grains and the grains of rendered fields, cut into chunks or
    not. All parts must have the same number of planes M.
    """
    if len(parts) == 1:
        g_up, cnt, sx, sy, sv, terms, scale = parts[0]
    else:
        g_up, cnt, sx, sy, sv = (np.concatenate([q[k] for q in parts]) for k in range(5))
        terms = tuple(np.concatenate([q.plane_terms[k] for q in parts]) for k in range(6))
        scale = np.concatenate([q.scale for q in parts])
    c, m = cnt.shape
    xx, xy, yy, xv, yv, vv = terms
    nz = 1.0 / np.sqrt(1.0 + np.einsum("cmi,cmi->cm", g_up, g_up))
    sec = 1.0 / nz - 1.0
    f = np.empty((c, m, 4))                                              # (1, sec, -g nz) per plane
    f[..., 0] = 1.0
    f[..., 1] = sec
    np.multiply(-g_up[..., 0], nz, out=f[..., 2])
    np.multiply(-g_up[..., 1], nz, out=f[..., 3])
    # unknowns (a, b, c_x, c_y, p_x, p_y) with b = k a: normal equations from per-facet sums
    nm = np.zeros((c, 6, 6))
    nm[:, :4, :4] = np.einsum("cm,cma,cmb->cab", cnt, f, f)
    nm[:, :4, 4] = nm[:, 4, :4] = np.einsum("cm,cma->ca", sx, f)
    nm[:, :4, 5] = nm[:, 5, :4] = np.einsum("cm,cma->ca", sy, f)
    nm[:, 4, 4], nm[:, 4, 5], nm[:, 5, 4], nm[:, 5, 5] = xx, xy, xy, yy
    rhs = np.concatenate([np.einsum("cm,cma->ca", sv, f), xv[:, None], yv[:, None]], axis=1)
    return NormalEquations("facets", nm, rhs, vv, scale)


def rss_requests(requests, max_elements: int = 1_000_000) -> list:
    """:func:`interior_rss_batch` of several requests (e.g. of many grains), the solves in one call per mode.

    Parameters
    ----------
    requests : sequence of tuple
        Each the arguments ``(interior, g_up, z_up, g_dn, z_dn, edge_px, tem_offset_max, gap_inv)``
        of :func:`interior_rss_batch`.
    max_elements : int
        As in :func:`interior_rss_batch` (per request).

    Returns
    -------
    list of ndarray
        The RSS of each request's models, the same numbers as one :func:`interior_rss_batch`
        call per request: the per-facet sums are taken per request (chunk), the facet-mode
        equations of all chunks are then formed in one stack per number of planes
        (:func:`facet_equations`), and the small least-squares systems of all requests are
        solved together (each system on its own).
    """
    eqs, owner, sums = [], [], {}
    for r, (interior, g_up, z_up, g_dn, z_dn, edge_px, tem, gap_inv) in enumerate(requests):
        g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
        c, m = z_up.shape
        if c == 0:
            continue
        step = max(1, int(max_elements // max(interior.value.size * max(m, 1), 1)))
        for i in range(0, c, step):
            got = normal_equations(interior, g_up[i:i + step], z_up[i:i + step],
                                   None if g_dn is None else g_dn[i:i + step],
                                   None if z_dn is None else z_dn[i:i + step], edge_px, tem,
                                   None if gap_inv is None else gap_inv[i:i + step],
                                   sums_only=interior.mode == "facets")
            if isinstance(got, FacetSums):
                # facet chunks: their equations are formed together, per number of planes (below)
                sums.setdefault(m, []).append((len(eqs), got))
                eqs.append(None)
            else:
                eqs.append(got)
            owner.append(r)
    # the facet chunks' equations, one stack per number of planes, each handed to the solve as one
    # entry and split again
    stacks = [facet_equations([q for _, q in parts]) for parts in sums.values()]
    whole = [e for e in eqs if e is not None]
    solved = solve_normal_equations(whole + stacks)
    got = [None] * len(eqs)
    it_whole = iter(solved[:len(whole)])
    for k, e in enumerate(eqs):
        if e is not None:
            got[k] = next(it_whole)
    for parts, stacked in zip(sums.values(), solved[len(whole):]):
        cut = np.cumsum([q.scale.size for _, q in parts])[:-1]
        for (k, _), g in zip(parts, np.split(stacked, cut)):
            got[k] = g
    out = [[] for _ in requests]
    for r, g in zip(owner, got):
        out[r].append(g)
    return [np.concatenate(o) if o else np.zeros(0) for o in out]


def solve_normal_equations(eqs) -> list:
    """RSS of every model of a list of :class:`NormalEquations`, solved under the bounds of their mode.

    Both bounded fits are convex least-squares problems with a few linear inequality
    constraints, solved exactly by trying every active set: where the unconstrained optimum
    is feasible it is the optimum, the constrained sets are solved only where it is not
    (each system is solved on its own, so stacking the systems of many requests gives the
    same bits as solving them request by request).

    Returns
    -------
    list of ndarray
        One (c,) array per entry of ``eqs``.
    """
    out = [None] * len(eqs)
    for mode, solve in (("facets", _solve_facets), ("thickness", _solve_thickness)):
        idx = [i for i, e in enumerate(eqs) if e.mode == mode]
        if not idx:
            continue
        if len(idx) == 1:
            e = eqs[idx[0]]
            out[idx[0]] = solve(e.nm, e.rhs, e.vv, e.extra)
            continue
        parts = [eqs[i] for i in idx]
        best = solve(*(np.concatenate([getattr(e, f) for e in parts]) for f in ("nm", "rhs", "vv", "extra")))
        cut = np.cumsum([e.vv.size for e in parts])[:-1]
        for i, b in zip(idx, np.split(best, cut)):
            out[i] = b
    return out


def _solve_facets(nm, rhs, vv, scale):
    """Facet fit RSS: a >= 0 and k_min a <= b <= k_max a (active sets: none; a = b = 0; b = kmin a; b = kmax a)."""
    eps = 1e-12
    kmin, kmax = TILT_GAIN_RANGE
    tm, t0 = _FACET_SETS
    th, rss = _solve_sets(nm, rhs, vv, (tm[:1], t0[:1]))
    ok = (th[0, :, 0] >= -eps) & (th[0, :, 1] >= kmin * th[0, :, 0] - eps) \
        & (th[0, :, 1] <= kmax * th[0, :, 0] + eps)
    best = rss[0]
    if not ok.all():
        bad = ~ok
        th, rss = _solve_sets(nm[bad], rhs[bad], vv[bad], (tm[1:], t0[1:]))
        sub = np.minimum(rss[0], np.where(th[1, :, 0] >= -eps, rss[1], np.inf))
        best[bad] = np.minimum(sub, np.where(th[2, :, 0] >= -eps, rss[2], np.inf))
    return best * scale


def _solve_thickness(nm, rhs, vv, amax):
    """Thickness fit RSS over (b, a, p_x, p_y): b >= 0, 0 <= a <= amax (amax per model).

    The held values of the constrained sets are 0 or amax, i.e. the sets' offsets times each
    model's amax (:data:`_THICKNESS_SETS`).
    """
    eps = 1e-12
    tm, t0 = _THICKNESS_SETS
    th, rss = _solve_sets(nm, rhs, vv, (tm[:1], t0[:1] * 0.0))
    best = rss[0]
    ok = (th[0, :, 0] >= -eps) & (th[0, :, 1] >= -eps) & (th[0, :, 1] <= amax + eps)
    if not ok.all():
        # the constrained sets only where the unconstrained optimum is not feasible
        bad = ~ok
        ab = amax[bad]
        th, rss = _solve_sets(nm[bad], rhs[bad], vv[bad], (tm[1:], t0[1:, None, :] * ab[None, :, None]))
        ok = (th[..., 0] >= -eps) & (th[..., 1] >= -eps) & (th[..., 1] <= ab + eps)
        best[bad] = np.where(ok, rss, np.inf).min(axis=0)
    return best


def normal_equations(interior: Interior, g_up, z_up, g_dn=None, z_dn=None, edge_px: float = 2.0,
                     tem_offset_max: float = 0.5, gap_inv=None, sums_only: bool = False):
    """The normal equations of :func:`interior_rss_batch` (one chunk of models), not yet solved.

    ``sums_only`` (facet mode): return the chunk's :class:`FacetSums` instead, for
    :func:`facet_equations` to make the equations of many chunks at once.
    """
    g_up, z_up = np.asarray(g_up, float), np.asarray(z_up, float)
    c, m = z_up.shape
    p = interior.value.size
    x, y, v = interior.x, interior.y, interior.value
    # plane heights laid out (plane, model, sample): reductions run over whole
    # rows; the geometry is float32 (heights ~1, edge distances ~1e-2 ECD),
    # the sums of the normal equations float64
    pts = interior.points32                                                  # (3, p)

    def heights(g, z0):
        # z0 + g . (x, y) of every plane, model and sample: one matrix product
        k = z0.shape[1]
        a = np.empty((k, c, 3), np.float32)
        a[..., :2] = np.swapaxes(g, 0, 1)
        a[..., 2] = z0.T
        return (a.reshape(-1, 3) @ pts).reshape(k, c, p)                    # (M, c, p)

    zup = heights(g_up, z_up)
    ztop = zup.min(axis=0)                                                   # (c, p)
    if interior.mode == "facets":
        idx = first_lowest(zup, ztop)                                        # (c, p) top plane
        bins = (np.arange(c)[:, None] * m + idx).ravel()                     # (model, top plane) of every sample
        if m > 1 and edge_px > 0:
            # distance to the line where plane j meets the top plane:
            # (z_j - z_top) / |g_j - g_top|; the top plane itself gives 0 * inf = NaN, skipped by fmin
            inv = plane_gap_inverse(g_up) if gap_inv is None else gap_inv                          # (c, top, j)
            # the row of 1 / |g_j - g_top| of every sample's top plane: one row gather, laid out (j, c, p)
            rows = np.take(np.ascontiguousarray(inv).reshape(c * m, m), bins, axis=0)
            zup -= ztop
            with np.errstate(invalid="ignore"):
                zup *= rows.T.reshape(m, c, p)
            near = np.fmin.reduce(zup, axis=0)
            far = ~(near < edge_px * interior.pixel)
            nfar = far.sum(axis=1)
            use = (nfar >= 30) & (nfar < p)
            wt = np.where(use[:, None], far, True).astype(float)
            scale = np.where(use, p / np.maximum(nfar, 1), 1.0)
        else:
            wt = np.ones((c, p))
            scale = np.ones(c)
        cnt = np.bincount(bins, wt.ravel(), minlength=c * m).reshape(c, m)
        sx = np.bincount(bins, (wt * x).ravel(), minlength=c * m).reshape(c, m)
        sy = np.bincount(bins, (wt * y).ravel(), minlength=c * m).reshape(c, m)
        sv = np.bincount(bins, (wt * v).ravel(), minlength=c * m).reshape(c, m)
        sums = FacetSums(g_up, cnt, sx, sy, sv, tuple(wt @ q for q in interior.products), scale)
        return sums if sums_only else facet_equations([sums])
    if g_dn is None or z_dn is None:
        raise ValueError("thickness mode needs the downward planes g_dn, z_dn")
    t = np.maximum(ztop - heights(g_dn, z_dn).max(axis=0), 0.0).astype(float)   # (c, p)
    nm = np.empty((c, 4, 4))
    st, sx_, sy_ = t.sum(axis=1), t @ x, t @ y
    nm[:, 0, 0] = np.einsum("cp,cp->c", t, t)
    nm[:, 0, 1], nm[:, 0, 2], nm[:, 0, 3] = st, sx_, sy_
    nm[:, 1:, 0] = nm[:, 0, 1:]
    sx_all, sy_all, sv_all, x_x, x_y, y_y, x_v, y_v, v_v, v_mean = interior.sums
    nm[:, 1:, 1:] = np.array([[p, sx_all, sy_all], [sx_all, x_x, x_y], [sy_all, x_y, y_y]])[None]
    rhs = np.empty((c, 4))
    rhs[:, 0] = t @ v
    rhs[:, 1:] = np.array([sv_all, x_v, y_v])[None]
    vv = np.full(c, v_v)
    amax = max(tem_offset_max * v_mean, 0.0)
    return NormalEquations("thickness", nm, rhs, vv, np.full(c, amax))


@functools.lru_cache(maxsize=1)
def _round_planes(n_planes: int = 120):
    """Plane tables of a sphere of unit diameter (a polyhedron of ``n_planes`` tangent planes)."""
    k = np.arange(n_planes) + 0.5
    z = 1.0 - 2.0 * k / n_planes
    phi = math.pi * (1.0 + math.sqrt(5.0)) * k                      # Fibonacci directions
    rxy = np.sqrt(1.0 - z * z)
    nrm = np.column_stack([rxy * np.cos(phi), rxy * np.sin(phi), z])
    body = cr.polyhedron_from_halfspaces(nrm, np.full(n_planes, 0.5), kind="sphere")
    g_up, z_up = face_planes(body, np.eye(3), True)
    g_dn, z_dn = face_planes(body, np.eye(3), False)
    return g_up[None], z_up[None], g_dn[None], z_dn[None]


def round_rss(interior: Interior, tem_offset_max: float) -> float:
    """RSS of the interior under a round body (a sphere of the grain's ECD), same models as the facets.

    A rounded grain shows brightness rising towards its rim (secondary electrons) or a
    thickness dome (transmission) without facets; facet evidence is counted against the
    better of this and a flat interior.
    """
    req = round_request(interior, tem_offset_max)
    return float(interior_rss_batch(*req[:7], gap_inv=req[7])[0])


def round_request(interior: Interior, tem_offset_max: float) -> tuple:
    """The :func:`interior_rss_batch` arguments of :func:`round_rss` (a request for :func:`rss_requests`)."""
    return (interior, *_round_planes(), 0.0, tem_offset_max, None)


#: Degree of the smooth surface a featureless interior may follow (:func:`smooth_rss`).
SMOOTH_INTERIOR_DEGREE = 3


def smooth_rss(interior: Interior, degree: int = SMOOTH_INTERIOR_DEGREE) -> float:
    """RSS of a smooth, featureless interior: a polynomial surface in x and y of ``degree`` (10 terms for 3).

    A round body need not be the sphere of :func:`round_rss`: a bead, a lump or a ripened grain, lit by a
    detector off to one side, charges, and shades as no ideal law says. Its interior is still smooth, and a
    cubic surface follows it; facets leave steps and kinks at their edges that no such surface follows.
    Facet evidence is counted against the best of this, :func:`round_rss` and :func:`flat_rss`.
    """
    x, y = interior.x, interior.y
    if degree == SMOOTH_INTERIOR_DEGREE == 3:
        # the columns x ** i * y ** j in the same order and to the same bits, each power taken once: numpy
        # gives x ** 0 as ones, x ** 1 as x and x ** 2 as x * x, and a product with ones is its other factor
        x2, y2 = x * x, y * y
        cols = [np.ones_like(x), y, y2, y ** 3, x, x * y, x * y2, x2, x2 * y, x ** 3]
    else:
        cols = [x ** i * y ** j for i in range(degree + 1) for j in range(degree + 1 - i)]
    return _surface_rss(cols, interior.value)


def flat_rss(interior: Interior) -> float:
    """RSS of a featureless interior: one level plus a plane a x + b y."""
    return _surface_rss([np.ones_like(interior.x), interior.x, interior.y], interior.value)


def _surface_rss(columns: list, v: np.ndarray) -> float:
    """Residual sum of squares of the least-squares fit of ``v`` by the ``columns`` (normal equations,
    a relative ridge of 1e-12 of their trace against a singular system)."""
    a = np.column_stack(columns)
    nm = a.T @ a
    rhs = a.T @ v
    coef = np.linalg.solve(nm + np.eye(len(columns)) * 1e-12 * np.trace(nm), rhs)
    return float(max(v @ v - coef @ rhs, 0.0))


def grain_evidence(labels, signal, mode, contour_px, label, erode_px=2):
    """Lab-frame contour and interior samples of one labelled grain.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Label image (0 background).
    signal : ndarray, shape (rows, cols)
        Brightness ('facets') or transmitted intensity ('thickness').
    mode : {'facets', 'thickness'}
        Secondary-electron contrast: the brightness above the median of a
        background ring around the grain is used; transmission contrast: the
        attenuation -ln(I / I_bg) with I_bg the ring's median.
    contour_px : ndarray, shape (k, 2)
        Sub-pixel outline in pixel coordinates (x = col + 0.5 at pixel
        centres, y down).
    label : int
        The grain's label.
    erode_px : int
        Pixels left out along the outline.

    Returns
    -------
    contour_lab : ndarray, shape (k, 2) or None
        Contour with y flipped (lab axes, y up), in pixels; None for fewer
        than 3 vertices.
    interior : Interior or None
    """
    contour_lab, get_interior = grain_evidence_lazy(labels, signal, mode, contour_px, label, erode_px)
    return contour_lab, get_interior()


def grain_evidence_lazy(labels, signal, mode, contour_px, label, erode_px=2, geometry=None):
    """:func:`grain_evidence` with the interior collected only when it is asked for.

    Parameters
    ----------
    labels, signal, mode, contour_px, label, erode_px
        As in :func:`grain_evidence`.

    geometry : (ndarray, float), optional
        ``polygon_centroid(contour_px)`` where the caller has it (the same numbers; else computed
        when the interior is collected).

    Returns
    -------
    contour_lab : ndarray, shape (k, 2) or None
        As in :func:`grain_evidence`.
    get_interior : callable
        ``get_interior()`` returns the :class:`Interior` (or None) of
        :func:`grain_evidence`, collected on the first call and kept. A grain
        whose habit its outline decides never pays for the crop, the
        background ring and the erosion.
    """
    c = np.asarray(contour_px, float)
    if len(c) < 3:
        return None, lambda: None
    contour_lab = np.column_stack([c[:, 0], -c[:, 1]])
    return contour_lab, _Once(_collect_interior, labels, signal, mode, c, label, erode_px, geometry)


class _Once:
    """``func(*args)`` on the first call, kept for the later ones (as ``functools.lru_cache(maxsize=1)`` of a
    closure, whose wrapper cost more to build than a grain's call of it)."""

    __slots__ = ("_func", "_args", "_value")

    def __init__(self, func, *args):
        self._func, self._args = func, args

    def __call__(self):
        if self._func is not None:
            self._value = self._func(*self._args)
            self._func = self._args = None
        return self._value


def median_of(values) -> float:
    """``float(np.median(values))`` of a small 1-D float array, without np.median's general-case overhead.

    The middle order statistics from one ``np.partition`` (the values at the asked positions do not
    depend on how the rest is arranged) and, for an even count, their mean as ``np.mean`` of two
    numbers forms it, (a + b) / 2; NaN where a value is NaN (it sorts last), as np.median.
    """
    v = np.asarray(values)
    k = v.size
    if k == 0 or v.ndim != 1 or v.dtype.kind != "f":
        return float(np.median(v))
    h = k // 2
    part = np.partition(v, [h - 1, h, k - 1] if k % 2 == 0 else [h, k - 1])
    if np.isnan(part[-1]):
        return float("nan")
    return float(part[h]) if k % 2 else float((part[h - 1] + part[h]) / 2)


def _collect_interior(labels, signal, mode, c, label, erode_px, geometry=None):
    """The interior samples of :func:`grain_evidence` (outline ``c`` in pixel coordinates, >= 3 vertices;
    ``geometry`` its :func:`polygon_centroid` where known)."""
    cen, area = polygon_centroid(c) if geometry is None else geometry
    ecd = math.sqrt(4 * area / math.pi)
    rows, cols = labels.shape
    pad = 4
    r0 = max(int(np.floor(c[:, 1].min())) - pad, 0)
    r1 = min(int(np.ceil(c[:, 1].max())) + pad + 1, rows)
    c0 = max(int(np.floor(c[:, 0].min())) - pad, 0)
    c1 = min(int(np.ceil(c[:, 0].max())) + pad + 1, cols)
    lab_crop = labels[r0:r1, c0:c1]
    mask = lab_crop == label
    crop = np.asarray(signal[r0:r1, c0:c1], float)
    ring = (lab_crop == 0) & ~diamond_morphology(mask, 2, erode=False)
    bg = median_of(crop[ring]) if ring.any() else float(np.percentile(crop, 5 if mode == "facets" else 95))
    if mode == "thickness":
        if bg <= 0:
            bg = float(np.max(crop))
        crop = -np.log(np.clip(crop, 1e-3 * bg, None) / bg) if bg > 0 else np.zeros_like(crop)
    else:
        crop = crop - bg
    return grain_interior(crop, mask, (cen[0] - c0, cen[1] - r0), ecd, mode, erode_px)
