"""Radial signatures of closed outlines: the outline half of the habit engine.

The centroid-distance signature r(phi) / sqrt(A) of a convex, centrally
symmetric outline is single-valued, scale invariant, and turns a rotation into
a cyclic shift, so the distance to a model at every rotation is one FFT
cross-correlation (:func:`shift_distances`). Pure functions on arrays.

References
----------
.. [1] D. Zhang, G. Lu, "Review of shape representation and description
   techniques", Pattern Recognition 37(1), 1-19, 2004,
   doi:10.1016/j.patcog.2003.07.008 (centroid-distance shape signatures).
"""
from __future__ import annotations

import functools
import math

import numpy as np


def check_polygon(poly, name="outline") -> np.ndarray:
    p = np.asarray(poly, dtype=float)
    if p.ndim != 2 or p.shape[1] != 2 or len(p) < 3:
        raise ValueError(f"{name} must have shape (k >= 3, 2), got {p.shape}")
    if not np.all(np.isfinite(p)):
        raise ValueError(f"{name} contains non-finite coordinates")
    return p


def check_n_angles(n_angles: int) -> int:
    if int(n_angles) != n_angles or n_angles < 8:
        raise ValueError(f"n_angles must be an integer >= 8, got {n_angles!r}")
    return int(n_angles)


def _next(a: np.ndarray) -> np.ndarray:
    """``np.roll(a, -1, axis=0)`` (the next vertex of each), without roll's general-case overhead."""
    return np.concatenate((a[1:], a[:1]))


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
    p = check_polygon(poly)
    x, y = p[:, 0], p[:, 1]
    x1, y1 = _next(x), _next(y)
    cross = x * y1 - x1 * y
    a = 0.5 * cross.sum()
    if abs(a) < 1e-12:
        raise ValueError("outline has zero area")
    c = np.array([((x + x1) * cross).sum(), ((y + y1) * cross).sum()]) / (6.0 * a)
    return c, abs(a)


@functools.lru_cache(maxsize=8)
def _ray_directions(n: int) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin of the ray angles phi_j = 2 pi j / n, j = 0 ... n - 1 (read-only).

    The same floats as ``np.cos(2.0 * np.pi * j / n)`` computed for any subset of rays
    (numpy evaluates each element on its own; ``tests/test_habit_frame_speed.py`` checks it).
    """
    phi = 2.0 * np.pi * np.arange(n) / n
    out = np.cos(phi), np.sin(phi)
    for a in out:
        a.flags.writeable = False
    return out


def ray_directions(n: int) -> tuple[np.ndarray, np.ndarray]:
    """cos and sin of the ray angles 2 pi j / n of the signatures (read-only; the same floats for any subset)."""
    return _ray_directions(int(n))


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
    p = check_polygon(poly)
    c, area = polygon_centroid(p)
    return radial_signature_about(p, c, area, n_angles)


def radial_signature_about(poly, centroid, area: float, n_angles: int = 256) -> np.ndarray:
    """:func:`radial_signature` of an outline whose centroid and area are known already.

    Parameters
    ----------
    poly : ndarray of float, shape (k, 2)
        Closed outline, as checked by :func:`check_polygon`.
    centroid : ndarray, shape (2,)
        Its centroid, and
    area : float
        its unsigned area, both as :func:`polygon_centroid` gives them (the same numbers
        give the same signature as :func:`radial_signature`).
    n_angles : int
        Number of ray directions.

    Returns
    -------
    ndarray, shape (n_angles,)
        As :func:`radial_signature`.
    """
    return radial_signatures_about([poly], [centroid], [area], n_angles)[0]


def radial_signatures_about(polys, centroids, areas, n_angles: int = 256) -> np.ndarray:
    """:func:`radial_signature_about` of many outlines, one row each.

    Parameters
    ----------
    polys : sequence of ndarray, shape (k_i, 2)
        Closed outlines, as checked by :func:`check_polygon`.
    centroids : sequence of ndarray, shape (2,)
        Their centroids, and
    areas : sequence of float
        their unsigned areas (:func:`polygon_centroid`).
    n_angles : int
        Number of ray directions.

    Returns
    -------
    ndarray, shape (len(polys), n_angles)
        Row i the signature of outline i alone, whatever the others (the one-outline form is the
        one-row case): every element is computed by the same operation on the same operands, the
        edges of all outlines laid end to end (each edge's next vertex taken within its own outline).
    """
    n = check_n_angles(n_angles)
    g = len(polys)
    if g == 0:
        return np.zeros((0, n))
    k = np.array([len(p) for p in polys], np.int64)
    q = np.concatenate([p - c for p, c in zip(polys, centroids)])
    first = np.cumsum(k) - k
    # the next vertex of each vertex within its own outline (the last one's is its outline's first)
    nxt = np.arange(1, q.shape[0] + 1)
    nxt[first + k - 1] = first
    e = q[nxt] - q
    a0 = np.arctan2(q[:, 1], q[:, 0]) * (n / (2.0 * np.pi))
    da = a0[nxt] - a0
    da = (da + n / 2) % n - n / 2
    lo = np.floor(np.minimum(a0, a0 + da)).astype(np.int64) - 1
    cnt = np.floor(np.maximum(a0, a0 + da)).astype(np.int64) + 2 - lo
    wide = np.abs(da) > n / 2 - 2
    lo[wide], cnt[wide] = 0, n
    cnt = np.minimum(cnt, n)
    edge = np.repeat(np.arange(q.shape[0]), cnt)
    start = np.cumsum(cnt) - cnt
    ray = (lo[edge] + np.arange(edge.size) - start[edge]) % n
    cos_ray, sin_ray = _ray_directions(n)
    dx, dy = cos_ray[ray], sin_ray[ray]
    ex, ey, qx, qy = e[:, 0][edge], e[:, 1][edge], q[:, 0][edge], q[:, 1][edge]
    det = -dx * ey + ex * dy
    ok = np.abs(det) > 1e-14
    det = np.where(ok, det, 1.0)
    t = (-q[:, 0] * e[:, 1] + e[:, 0] * q[:, 1])[edge] / det
    s = (dx * qy - dy * qx) / det
    hit = ok & (s >= -1e-9) & (s <= 1 + 1e-9) & (t > 0)
    grain = np.repeat(np.arange(g), k)[edge]
    r = np.zeros(g * n)
    np.maximum.at(r, (grain * n + ray)[hit], t[hit])
    r = r.reshape(g, n)
    return r / np.array([math.sqrt(a) for a in areas])[:, None]


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


def rounded_outline(poly, radius: float, arc_step_deg: float = 10.0) -> np.ndarray:
    """A convex polygon with its corners rounded: the opening by a disc of ``radius``.

    Parameters
    ----------
    poly : array_like, shape (k, 2)
        Convex polygon, counter-clockwise.
    radius : float
        Disc radius, in the polygon's unit (0 returns the polygon).
    arc_step_deg : float
        Angular spacing of the points on each corner arc.

    Returns
    -------
    ndarray, shape (q, 2)
        Dense polygon of the rounded outline.

    Notes
    -----
    The opening of a convex set K by a disc D_r is (K shrunk by r) + D_r
    (Minkowski sum): every edge moves in by r (edges shorter than the
    rounding vanish), and each corner of the shrunk polygon becomes an arc
    of radius r. Blur followed by a threshold rounds the corners of a
    grain's outline in much this way.
    """
    p = check_polygon(poly, "poly")
    if radius <= 0:
        return p
    x, y = p[:, 0], p[:, 1]
    if np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y) < 0:
        p = p[::-1]
    e = np.roll(p, -1, axis=0) - p
    nrm = np.column_stack([e[:, 1], -e[:, 0]]) / np.linalg.norm(e, axis=1, keepdims=True)  # outward (CCW)
    off = np.einsum("ij,ij->i", nrm, p) - radius
    # shrunk polygon: clip a large square by every shifted edge half-plane n . x <= off
    big = 4.0 * np.abs(p).max() + 4.0 * radius
    q = np.array([[-big, -big], [big, -big], [big, big], [-big, big]])
    for nv, ov in zip(nrm, off):
        val = q @ nv - ov
        out = []
        for i in range(len(q)):
            a, b, va, vb = q[i], q[(i + 1) % len(q)], val[i], val[(i + 1) % len(q)]
            if va <= 0:
                out.append(a)
            if (va <= 0) != (vb <= 0):
                out.append(a + (b - a) * (va / (va - vb)))
        if len(out) < 3:
            raise ValueError(f"radius {radius!r} is larger than the polygon's inradius")
        q = np.asarray(out)
    # Minkowski sum with the disc: an arc at every corner between the adjacent edge normals
    pts = []
    m = len(q)
    for i in range(m):
        ein = q[i] - q[i - 1]
        eout = q[(i + 1) % m] - q[i]
        t0 = math.atan2(-ein[0], ein[1])
        t1 = math.atan2(-eout[0], eout[1])
        dt = (t1 - t0) % (2 * math.pi)
        k = max(int(math.ceil(math.degrees(dt) / arc_step_deg)), 1)
        th = t0 + dt * np.arange(k + 1) / k
        pts.append(q[i] + radius * np.column_stack([np.cos(th), np.sin(th)]))
    return np.concatenate(pts)


#: Harmonics of a rounded outline without corners (:func:`smooth_residual`): an elongation
#: (2) and lumps of 3, 4 and 5 per turn.
SMOOTH_HARMONICS = 5


def smooth_residual(sig, k_max: int = SMOOTH_HARMONICS, keep=None) -> float:
    """RMS distance of a radial signature from its best curve of harmonics 0 ... ``k_max``.

    Parameters
    ----------
    sig : array_like, shape (n,)
        Radial signature (:func:`radial_signature`), samples evenly spaced in angle.
    k_max : int
        Highest harmonic of the smooth curve (>= 0; 0 is the disc).
    keep : array_like of bool, shape (n,), optional
        Samples to fit and measure (e.g. the part of a cut outline on the grain's true
        edges); default all.

    Returns
    -------
    float
        sqrt(mean over the kept samples of (sig - fit)^2), fit the least-squares curve
        ``c_0 + sum_k (a_k cos k phi + b_k sin k phi)``, k = 1 ... ``k_max``.

    Notes
    -----
    With every sample kept the Fourier basis is orthogonal on the evenly spaced angles,
    so the residual is the power above ``k_max`` (Parseval's theorem):
    ``sum_{k > k_max} |F_k|^2 w_k / n^2`` with w_k = 2 (1 at the Nyquist term), F the
    discrete Fourier transform. A polygon's corners put power into high harmonics (a
    square's fundamental is the fourth, with the eighth, twelfth, ... for its corners;
    a hexagon's the sixth), which no such curve holds; a rounded, lumpy outline has
    little power above the fifth.
    """
    s = np.asarray(sig, float)
    n = s.size
    k_max = int(k_max)
    if k_max < 0 or 2 * k_max + 1 > n:
        raise ValueError(f"k_max must be in [0, (n - 1) / 2], got {k_max!r} for n = {n}")
    if keep is None:
        f = np.fft.rfft(s)[k_max + 1:]
        w = np.full(f.size, 2.0)
        if n % 2 == 0 and f.size:
            w[-1] = 1.0
        return float(math.sqrt(max(float(np.sum(w * np.abs(f) ** 2)) / n ** 2, 0.0)))
    m = np.asarray(keep, bool)
    if m.shape != s.shape:
        raise ValueError(f"keep must have shape {s.shape}, got {m.shape}")
    if m.sum() <= 2 * k_max + 1:
        return float("nan")
    phi = 2.0 * np.pi * np.arange(n)[m] / n
    k = np.arange(1, k_max + 1)
    a = np.column_stack([np.ones(phi.size), np.cos(np.outer(phi, k)), np.sin(np.outer(phi, k))])
    coef, *_ = np.linalg.lstsq(a, s[m], rcond=None)
    return float(math.sqrt(np.mean((s[m] - a @ coef) ** 2)))
