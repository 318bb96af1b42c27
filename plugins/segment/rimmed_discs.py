"""A second look for round particles seen by their bright rims (segment-grains 2.28).

Heaps of SEM spheres often show faces as dark as the gaps between them: only
the rims stand above half the grain level, so the threshold gives rings and
crescents that hole filling cannot close, and TEM spheres with thin outlines
give no grains at all. Where the first segmentation shows the signs of this
case (:func:`needs_second_look`: most of the found grain area in grains far
less solid than their convex hull, or a frame with no grains or no background
found), circles are looked for with the circular Hough transform [1]_ on the
Canny edges [2]_ of the preprocessed frame (scikit-image [3]_
``skimage.transform.hough_circle``):

1. radii from 6 px to a fifth of the frame's short side, 40 of them spaced
   geometrically; peaks of the normalised accumulator at 0.4 or more;
2. a circle is kept only where its rim is seen around most of its
   perimeter: on at least ``MIN_SUPPORT`` of the sample points inside the
   frame the gradient of the frame smoothed at a scale proportional to the
   radius (so a textured face does not count) is stronger than the frame's
   75th percentile and points along the radius (``|cos|`` above 0.85),
   all pointing to the centre (brighter inside: the rim's outer edge; the
   radius is moved out, up to ``OUTER_REACH`` times the peak's, to the best
   supported one where the peak's circle is the rim's inner edge: darker
   inside on ``MIN_SUPPORT`` of its perimeter);
3. larger, better supported circles first (accumulator times radius), a
   circle overlapping an accepted one by more than 20 % of the smaller
   circle's area is dropped (non-maximum suppression);
4. a circle that contains a solid grain already found covering a quarter of
   the circle or more is not used (the grain is that particle, or the circle
   would merge it with another); otherwise the disc replaces the pieces it
   covers (grains with more than half their area inside the disc), and
   takes its pixels from grains it overlaps less; fewer than ``MIN_DISCS``
   discs in a frame are not used.

Ordinary and synthetic frames do not meet the trigger and are never changed.

References
----------
.. [1] R. O. Duda and P. E. Hart, "Use of the Hough transformation to detect
   lines and curves in pictures", Commun. ACM 15(1), 11-15, 1972,
   doi:10.1145/361237.361242
.. [2] J. Canny, "A computational approach to edge detection", IEEE Trans.
   Pattern Anal. Mach. Intell. 8(6), 679-698, 1986, doi:10.1109/TPAMI.1986.4767851
.. [3] S. van der Walt et al., "scikit-image: image processing in Python",
   PeerJ 2:e453, 2014, doi:10.7717/peerj.453
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: share of the found grain area in grains of solidity under ``RING_SOLIDITY`` that
#: triggers the second look (ring-like and crescent-like grains)
RING_SHARE = 0.5
RING_SOLIDITY = 0.8
#: share of the in-frame perimeter that must show the rim's radial gradient
MIN_SUPPORT = 0.6
#: smallest radius looked for (px): six times the Canny blur (sigma 2 px); smaller circles are
#: drawn by the texture of the particles' faces as often as by particles (measured on EMPS)
MIN_RADIUS = 12.0
#: the outline looked for out to this many times a peak's radius (its rim's outer edge)
OUTER_REACH = 1.35
#: normalised Hough accumulator threshold
PEAK_THRESHOLD = 0.4
#: at most this share of the smaller circle's area may overlap an accepted circle
MAX_OVERLAP = 0.2
#: fewest discs placed in a frame for any to be kept: a heap of rimmed particles shows several, a lone
#: circle is as often a chance alignment of edges (measured on the EMPS pictures: of 12 frames given
#: one or two discs, 3 gained a particle and 9 a false grain)
MIN_DISCS = 3
#: solidity of a grain taken as one whole particle already found
SOLID = 0.9


def needs_second_look(labels: np.ndarray, notes: list[str]) -> bool:
    """Whether the first segmentation shows the signs of rimmed round particles.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        Labels of the first segmentation (0 background).
    notes : list of str
        Its notes; ``qc no-grains`` and ``qc no-background`` trigger the look.

    Returns
    -------
    bool
        True when a ``qc no-grains`` / ``qc no-background`` note was given, or
        at least ``RING_SHARE`` of the found grain area (in pixels) lies in
        grains whose :func:`solidity` (area over convex-hull area) is under
        ``RING_SOLIDITY``.
    """
    if any("qc no-grains" in n or "qc no-background" in n for n in notes):
        return True
    labels = np.asarray(labels)
    n = int(labels.max())
    if n == 0:
        return False
    slices = ndi.find_objects(labels)
    area = np.array([np.count_nonzero(labels[sl] == k) if sl is not None else 0
                     for k, sl in enumerate(slices, start=1)], np.int64)
    total = int(area.sum())
    ring, unknown = 0, total
    # largest grains first; stop as soon as the answer is known (solid frames stop after half their area)
    for i in np.argsort(-area, kind="stable"):
        if area[i] == 0:
            break
        mask = labels[slices[i]] == i + 1
        # the hull lies inside the octagon of the pixels' corners: a grain filling RING_SOLIDITY of that is
        # solid enough without its hull
        if area[i] < RING_SOLIDITY * octagon_area(mask) and solidity(mask) < RING_SOLIDITY:
            ring += int(area[i])
        unknown -= int(area[i])
        if ring >= RING_SHARE * total:
            return True
        if ring + unknown < RING_SHARE * total:
            return False
    return False


def octagon_area(mask: np.ndarray) -> float:
    """Area of the smallest octagon with sides along the axes and diagonals holding a mask's pixel squares.

    Parameters
    ----------
    mask : ndarray of bool
        One object, not empty.

    Returns
    -------
    float
        The box of the pixels' corners less its four corner triangles cut by the lines ``r + c`` and
        ``r - c`` through the outermost corners: an upper bound of the convex hull's area (the hull of
        the corners lies inside this intersection of four slabs), so ``count / octagon_area`` is a
        lower bound of :func:`solidity` (0.95 of it for a disc, 1 for an axis-aligned rectangle).
    """
    r, c = np.nonzero(mask)
    r0, r1, c0, c1 = r.min() - 0.5, r.max() + 0.5, c.min() - 0.5, c.max() + 0.5
    s, d = r + c, r - c
    s0, s1, d0, d1 = s.min() - 1.0, s.max() + 1.0, d.min() - 1.0, d.max() + 1.0
    cuts = [max(0.0, s0 - (r0 + c0)), max(0.0, (r1 + c1) - s1), max(0.0, d0 - (r0 - c1)), max(0.0, (r1 - c0) - d1)]
    return float((r1 - r0) * (c1 - c0) - 0.5 * sum(t * t for t in cuts))


def solidity(mask: np.ndarray) -> float:
    """Pixel count over the area of the convex hull of the pixels' corners.

    Parameters
    ----------
    mask : ndarray of bool
        One object (cropped to its box or not).

    Returns
    -------
    float
        0 ... 1 (1 for a one-pixel object); the hull is that of the pixel
        squares' corners (scipy.spatial.ConvexHull, Qhull), so a convex
        object made of whole pixels scores close to 1.

    Notes
    -----
    Not :func:`grainhabit.plugins.segment.specks.solidity` (pixels over the pixels whose centres lie
    in the hull, a little higher): the trigger's ``RING_SOLIDITY`` was set on this measure, and on
    the 357 EMPS pictures' grains the other one changes the trigger's decision on 2 (3027f9ffe7,
    48f3a148f6).
    """
    from scipy.spatial import ConvexHull, QhullError
    edge = mask & ~ndi.binary_erosion(mask)
    rows, cols = np.nonzero(edge)
    n = int(mask.sum())
    if len(rows) < 3:
        return 1.0
    pts = np.concatenate([np.c_[rows + dy, cols + dx] for dy in (-0.5, 0.5) for dx in (-0.5, 0.5)])
    try:
        hull = ConvexHull(pts).volume   # the area, for 2-D points
    except QhullError:
        return 1.0
    return float(min(1.0, n / hull))


def _radii(shape: tuple) -> np.ndarray:
    """40 radii (px) spaced geometrically from ``MIN_RADIUS`` to a fifth of the short side."""
    top = max(MIN_RADIUS + 1.0, min(shape) / 5.0)
    return np.unique(np.round(np.geomspace(MIN_RADIUS, top, 40)).astype(int))


def rim_support(grads: dict, cy: float, cx: float, r: float, shape: tuple) -> tuple[float, float]:
    """Share of the circle's in-frame perimeter that shows a radial rim gradient.

    Parameters
    ----------
    grads : dict
        ``sigma -> (gy, gx, mag_threshold)`` from :func:`_gradients`.
    cy, cx : float
        Centre (px, row and column).
    r : float
        Radius (px).
    shape : tuple
        Frame shape.

    Returns
    -------
    inward, outward : float
        0 ... 1, the share of sample points whose gradient points to the
        centre (brighter inside) and away from it (darker inside); 0 when
        under 60 % of the perimeter lies in the frame.
    """
    sigma = _sigma_for(r, grads)
    gy, gx, thr = grads[sigma]
    n = max(24, int(2 * np.pi * r / 2))
    t = np.linspace(0, 2 * np.pi, n, endpoint=False)
    uy, ux = np.sin(t), np.cos(t)
    yy = np.round(cy + r * uy).astype(int)
    xx = np.round(cx + r * ux).astype(int)
    inside = (yy >= 0) & (yy < shape[0]) & (xx >= 0) & (xx < shape[1])
    if inside.mean() < 0.6:
        return 0.0, 0.0
    yy, xx, uy, ux = yy[inside], xx[inside], uy[inside], ux[inside]
    vy, vx = gy[yy, xx], gx[yy, xx]
    mag = np.hypot(vy, vx)
    cos = (vy * uy + vx * ux) / np.maximum(mag, 1e-12)
    strong = mag > thr
    return float(np.mean(strong & (cos < -0.85))), float(np.mean(strong & (cos > 0.85)))


def _sigma_for(r: float, grads: dict) -> float:
    keys = np.array(sorted(grads))
    want = max(1.0, r / 8.0)
    return float(keys[np.argmin(np.abs(np.log(keys / want)))])


def _gradients(arr: np.ndarray, radii: np.ndarray) -> dict:
    """Gaussian-derivative gradients (sigma in px) at the scales the radii need.

    Returns ``sigma -> (gy, gx, 75th percentile of |grad|)``.
    """
    out = {}
    for s in sorted({float(2.0 ** np.round(np.log2(max(1.0, r / 8.0)))) for r in radii}):
        gy = ndi.gaussian_filter(arr, s, order=(1, 0))
        gx = ndi.gaussian_filter(arr, s, order=(0, 1))
        out[s] = (gy, gx, float(np.percentile(np.hypot(gy, gx), 75)))
    return out


def find_circles(arr: np.ndarray) -> list[tuple[float, float, float, float]]:
    """Circles of rimmed round particles in a preprocessed frame.

    Parameters
    ----------
    arr : ndarray of float, shape (rows, cols)
        Preprocessed frame (background 0, grains about 1).

    Returns
    -------
    list of (row, col, radius, support)
        Accepted circles in px, best first, overlapping each other by at most
        ``MAX_OVERLAP`` of the smaller one's area.
    """
    from skimage.feature import canny
    from skimage.transform import hough_circle, hough_circle_peaks

    arr = np.asarray(arr, float)
    radii = _radii(arr.shape)
    edges = canny(arr, sigma=2)
    if not edges.any():
        return []
    acc = hough_circle(edges, radii)
    vals, cxs, cys, rs = hough_circle_peaks(acc, radii, threshold=PEAK_THRESHOLD,
                                            min_xdistance=3, min_ydistance=3, total_num_peaks=2000)
    if len(vals) == 0:
        return []
    grads = _gradients(arr, radii)
    cands = []
    for v, cx, cy, r in zip(vals, cxs, cys, rs):
        # grains are bright in the preprocessed frame: the rim's outer edge has its gradient pointing to the
        # centre. The peak may sit on the rim's inner edge (a concentric circle suppresses the other), so the
        # radius is moved out to the best supported one up to OUTER_REACH times the peak's where the peak's own
        # circle is seen darker inside all round (the inner edge of a bright rim).
        best_s, best_r = -1.0, r
        inner_edge = rim_support(grads, cy, cx, r, arr.shape)[1] >= MIN_SUPPORT   # darker inside: a rim's inner edge
        for rr in radii[(radii >= r) & (radii <= (OUTER_REACH if inner_edge else 1.0) * r)]:
            s = rim_support(grads, cy, cx, rr, arr.shape)[0]
            if s > best_s:
                best_s, best_r = s, rr
        if best_s >= MIN_SUPPORT:
            cands.append((float(v) * best_r * best_s, float(cy), float(cx), float(best_r), best_s))
    cands.sort(key=lambda c: -c[0])
    kept = []
    for _, cy, cx, r, s in cands:
        if all(_overlap(cy, cx, r, ky, kx, kr) <= MAX_OVERLAP for ky, kx, kr, _ in kept):
            kept.append((cy, cx, r, s))
    return kept


def _overlap(y1, x1, r1, y2, x2, r2) -> float:
    """Area of the lens of two circles over the smaller circle's area (handbook geometry)."""
    d = np.hypot(y1 - y2, x1 - x2)
    if d >= r1 + r2:
        return 0.0
    small = min(r1, r2)
    if d <= abs(r1 - r2):
        return 1.0
    a1 = r1 * r1 * np.arccos((d * d + r1 * r1 - r2 * r2) / (2 * d * r1))
    a2 = r2 * r2 * np.arccos((d * d + r2 * r2 - r1 * r1) / (2 * d * r2))
    a3 = 0.5 * np.sqrt(max(0.0, (-d + r1 + r2) * (d + r1 - r2) * (d - r1 + r2) * (d + r1 + r2)))
    return float((a1 + a2 - a3) / (np.pi * small * small))


def place_discs(labels: np.ndarray, split: np.ndarray, circles: list) -> tuple[np.ndarray, np.ndarray, int]:
    """Put the discs into the labels where they do not clash with whole grains.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
    split : ndarray of bool, shape (n,)
        Per-label flag of grains divided from a cluster.
    circles : list of (row, col, radius, support)
        From :func:`find_circles`, best first.

    Returns
    -------
    labels : ndarray of int32
        Renumbered 1..m in row-major order of the first pixel.
    split : ndarray of bool, shape (m,)
        Discs touching another grain are marked split.
    n_discs : int
        Discs placed.
    """
    from skimage.measure import regionprops
    labels = np.asarray(labels, np.int32).copy()
    n0 = int(labels.max())
    if not circles:
        return labels, split, 0
    props = {r.label: r for r in regionprops(labels)}
    area = np.bincount(labels.ravel(), minlength=n0 + 1)
    yy, xx = np.indices(labels.shape)
    out = labels.copy()
    disc_ids = []
    next_id = n0 + 1
    taken = np.zeros(labels.shape, bool)
    for cy, cx, r, _ in circles:
        disc = (yy - cy) ** 2 + (xx - cx) ** 2 <= r * r
        disc &= ~taken
        d_area = int(disc.sum())
        if d_area < 0.5 * np.pi * r * r:
            continue
        inside = np.bincount(labels[disc], minlength=n0 + 1)
        clash = False
        pieces = []
        for g in np.nonzero(inside[1:])[0] + 1:
            share_g = inside[g] / area[g]
            if share_g > 0.5:
                if props[g].solidity >= SOLID and area[g] >= 0.25 * d_area:
                    clash = True
                    break
                pieces.append(g)
        if clash:
            continue
        for g in pieces:
            out[out == g] = 0
        out[disc] = next_id
        taken |= disc
        disc_ids.append(next_id)
        next_id += 1
    if len(disc_ids) < MIN_DISCS:
        return labels, split, 0
    # renumber 1..m in row-major order of the first pixel
    flat = out.ravel()
    ids, first = np.unique(flat, return_index=True)
    keep = ids > 0
    ids, first = ids[keep], first[keep]
    order = ids[np.argsort(first)]
    lut = np.zeros(next_id, np.int32)
    lut[order] = np.arange(1, len(order) + 1, dtype=np.int32)
    new = lut[out]
    old_split = np.r_[False, np.asarray(split, bool), np.zeros(next_id - n0 - 1, bool)]
    dil = ndi.grey_dilation(out, size=3)
    ero = ndi.grey_erosion(np.where(out > 0, out, np.iinfo(np.int32).max), size=3)
    for d in disc_ids:
        m = out == d
        old_split[d] = bool(np.any((dil[m] != d) & (dil[m] > 0)) or np.any((ero[m] != d) & (ero[m] < np.iinfo(np.int32).max)))
    new_split = np.zeros(len(order), bool)
    new_split[lut[order] - 1] = old_split[order]
    return new, new_split, len(disc_ids)


def second_look(arr: np.ndarray, labels: np.ndarray, split: np.ndarray, notes: list[str]
                ) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Find rimmed round particles where the first segmentation shows their signs.

    Parameters
    ----------
    arr : ndarray of float, shape (rows, cols)
        Preprocessed frame.
    labels, split, notes
        The first segmentation's output.

    Returns
    -------
    labels, split, notes
        Unchanged unless :func:`needs_second_look`; otherwise with the discs
        placed and a note counting them.
    """
    if not needs_second_look(labels, notes):
        return labels, split, notes
    circles = find_circles(arr)
    labels, split, n = place_discs(labels, split, circles)
    if n:
        notes = [x for x in notes if "qc no-grains" not in x] + [
            f"segment-grains: {n} round particle(s) seen by their rims found by the circular Hough transform"]
    return labels, split, notes
