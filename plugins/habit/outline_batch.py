"""The outline matches of many grains at once: the same numbers as one grain at a time, fewer array calls.

A grain's outline match (:func:`engine.match_outline` with a reach ``within``) is a few dozen numpy
calls on arrays of a few hundred numbers: the radial signature, its spectrum, the lower bounds of
every shape's distance, two or three rounds of choosing the shapes to compare
(:func:`outline_bound.shapes_to_compare`) and the look-alike windows of the compared rows. Its cost
is the calls, not the arithmetic. :func:`match_outlines` does the same for the outlines of many
grains, each step one call over all of them:

- the signatures from the edges of all outlines laid end to end (every element of the ray-edge
  crossings is computed as for one outline; the farthest crossing of each ray of each grain by
  one ``np.maximum.at``);
- the spectra by one ``rfft`` of the (grains, n) signatures (each row transformed on its own:
  the bits of one call per grain);
- the choice of the shapes to compare by rounds over all grains at once, each grain's
  conditions on its own row (minima, comparisons and ``nextafter`` only: exact);
- the distance rows of every (grain, shape) pair a round adds by inverse FFTs of :data:`ROWS_AT_ONCE`
  rows (each row on its own), each block's row minima and look-alike windows
  (:func:`engine.candidates_of_rows`, row by row by construction) taken while the block is in cache;
  only their (rows, 4) results are kept, not the (rows, n) distance rows.

Each grain's :class:`engine.OutlineMatch` carries a :class:`engine.BoundedOutline` in the state that
grain's own match leaves, so a fit that needs a wider reach goes on from it as before. Every
number is the one :func:`engine.match_outline` gives (tested in ``tests/test_outline_batch.py``).
"""
from __future__ import annotations

import math

import numpy as np

from grainhabit.plugins.habit import engine as en
from grainhabit.plugins.habit import outline_bound
from grainhabit.plugins.habit.signature import (  # noqa: F401  (radial_signatures_about: tests call it here too)
    check_polygon, polygon_centroid, radial_signatures_about,
)


#: Distance rows computed by one inverse FFT: a block's spectra and rows (about 1 MB) stay in cache
#: (measured: 256-512 rows 0.28-0.31 ms per outline, every row at once 0.33-0.56).
ROWS_AT_ONCE = 256


def distance_rows_of(spec, aa, sig_fft, sig_sq, n: int) -> np.ndarray:
    """:func:`engine._distance_rows` of rows that each pair one outline with one shape.

    Parameters
    ----------
    spec : ndarray, shape (k, n // 2 + 1)
        ``rfft`` of the outline of each row; ``aa`` (k,) its squared norm.
    sig_fft, sig_sq : ndarray, shape (k, n // 2 + 1) and (k,)
        The conjugate spectrum and squared norm of the shape of each row.
    n : int
        Signature length.

    Returns
    -------
    ndarray, shape (k, n)
        Squared RMS distances at every cyclic shift: row j the bits of
        ``_distance_rows(spec[j], aa[j], sig_fft[j:j+1], sig_sq[j:j+1], n)`` (the same
        element-wise operations; the inverse FFT transforms each row on its own).
    """
    return en.squared_distances_in_place(np.fft.irfft(spec * sig_fft, n, axis=1), aa + sig_sq, n)


def choose_and_compare(lb, tau2, within: float, plan, compare, margin):
    """:func:`outline_bound.shapes_to_compare` of many outlines at once, each from no earlier state.

    Parameters
    ----------
    lb : ndarray, shape (g, u)
        :func:`outline_bound.lower_bounds` of every outline (row) and shape.
    tau2 : ndarray, shape (g,)
        Squares of the outlines' misfit units.
    within : float
        As for :func:`outline_bound.shapes_to_compare` (the same for all outlines).
    plan : outline_bound.ComparePlan
        The same views for all outlines.
    compare : callable
        ``compare(grains, rows)`` -> ``(least, found)``: ``least`` (len(rows),) the least squared
        distance over every shift of the shape ``rows[j]`` to the outline ``grains[j]``, ``found``
        a tuple of arrays with one row per pair (what the caller keeps of each distance row).
    margin : ndarray, shape (g,)
        Each outline's margin.

    Returns
    -------
    grains, rows : ndarray of int
        The (outline, shape) pairs compared, each once.
    found : tuple of ndarray
        ``compare``'s ``found`` of those pairs, in that order (``None`` where no pair was compared).
    comp, dmin : ndarray, shape (g, u)
        The state each outline's own :func:`outline_bound.shapes_to_compare` leaves
        (:class:`outline_bound.CompareState`).

    Notes
    -----
    Each round applies, row by row, the conditions of :func:`outline_bound.shapes_to_compare`
    (its ``more``) to every outline that is still adding shapes; the rounds of one outline are
    those of its own call, so the same shapes are compared.
    """
    inf = np.inf
    g, u = lb.shape
    t2p = tau2[:, None] * plan.prior_ok[None, :]
    lbk = lb + t2p
    gate = tau2 * within + margin
    d_free = not (plan.all_ok and within >= plan.prior_spread)
    class_inf = plan.class_inf                                     # (classes, u)
    cls = plan.cls
    ok_view = np.isfinite(plan.prior_ok)

    def more(live, comp, dmin):
        # outline_bound.shapes_to_compare's ``more`` on the rows ``live``
        key = dmin[live] + t2p[live]
        top = key.min(axis=1) + gate[live]
        m = (np.where(key > top[:, None], key, inf)[:, None, :] + class_inf[None]).min(axis=2)   # (l, classes)
        lbk_open = np.where(comp[live], inf, lbk[live])
        low = (lbk_open[:, None, :] + class_inf[None]).min(axis=2)
        top_up = np.nextafter(top, inf)
        lim = np.where(m < inf, m + margin[live][:, None], np.nextafter(low, inf))
        lim = np.maximum(lim, top_up[:, None])
        lim = np.concatenate([lim, top_up[:, None]], axis=1)        # the shapes of no allowed class
        new = lbk_open < np.take_along_axis(lim, np.broadcast_to(cls, (live.size, u)), axis=1)
        if d_free:
            lb_open = np.where(comp[live], inf, lb[live])
            dm = dmin[live]
            new |= lb_open < (dm.min(axis=1) + margin[live])[:, None]
            new |= (lb_open < (np.where(ok_view, dm, inf).min(axis=1) + margin[live])[:, None]) & ok_view
        return new

    comp = np.zeros((g, u), bool)
    dmin = np.full((g, u), inf)
    new = lbk <= (lbk.min(axis=1) + gate)[:, None]
    new[np.arange(g)[:, None], (lbk[:, None, :] + class_inf[None]).argmin(axis=2)] = True
    if d_free:
        new[np.arange(g), lb.argmin(axis=1)] = True
        new[np.arange(g), np.where(ok_view, lb, inf).argmin(axis=1)] = True
    live = np.arange(g)
    grains, rows, blocks = [], [], []
    while live.size:
        gi, ri = np.nonzero(new)
        if gi.size == 0:
            break
        gi = live[gi]
        least, found = compare(gi, ri)
        dmin[gi, ri] = least
        comp[gi, ri] = True
        grains.append(gi)
        rows.append(ri)
        blocks.append(found)
        # an outline goes on while it added shapes and has shapes left (its own call's loop)
        live = np.unique(gi)
        live = live[~comp[live].all(axis=1)]
        if live.size == 0:
            break
        new = more(live, comp, dmin)
    if not rows:
        return np.zeros(0, np.intp), np.zeros(0, np.intp), None, comp, dmin
    return (np.concatenate(grains), np.concatenate(rows), tuple(np.concatenate(f) for f in zip(*blocks)),
            comp, dmin)


def match_outlines(contours, library, pixel_scale: float, outline_noise_px: float, outline_noise_floor: float,
                   corner_radius_px: float, within: float, faces) -> list:
    """:func:`engine.match_outline` (with ``within``) of many outlines: the same matches, fewer array calls.

    Parameters
    ----------
    contours : sequence of array_like, shape (k_i, 2)
        Closed outlines in lab axes.
    library, pixel_scale, outline_noise_px, outline_noise_floor, corner_radius_px, within, faces
        As for :func:`engine.match_outline` (the same for all outlines; ``within`` a number).

    Returns
    -------
    list of engine.OutlineMatch
        Entry i equal, field by field and bit by bit, to ``match_outline(contours[i], ...)``,
        its ``compared`` in the state that call leaves.
    """
    if not contours:
        return []
    n = library.signatures.shape[-1]
    polys = [check_polygon(c, "contour_xy") for c in contours]
    cen_area = [polygon_centroid(c) for c in polys]
    sigs = radial_signatures_about(polys, [ca[0] for ca in cen_area], [ca[1] for ca in cen_area], n)
    g = len(polys)
    areas = [ca[1] for ca in cen_area]
    taus = [max(outline_noise_px * pixel_scale / math.sqrt(a), outline_noise_floor) for a in areas]
    levels_at = np.asarray(en.ROUNDING_LEVELS)
    levels = np.array([int(np.argmin(np.abs(levels_at - corner_radius_px / (math.sqrt(4.0 * a / math.pi)
                                                                                 / pixel_scale))))
                       for a in areas], np.intp)
    tab = library.tables
    bound = library.spectral_bound
    plan = library.compare_plan(tuple(faces))
    spec = np.fft.rfft(sigs, axis=1)
    aa = np.array([s @ s for s in sigs])
    margin = outline_bound.BOUND_MARGIN * (aa + bound.sq_max[levels]) / n
    lb = np.stack([outline_bound.lower_bounds(spec[i], aa[i], tab.sig_sq[levels[i]], bound.weighted_mag[levels[i]],
                                              n, margin[i]) for i in range(g)])
    tau2 = np.array([t * t for t in taus])

    def compare(gi, ri):
        # each block of distance rows gives its row minima and look-alike windows while in cache
        # (both row by row: the bits of taking them from all rows at once)
        lv = levels[gi]
        least, found = [], []
        for a in range(0, gi.size, ROWS_AT_ONCE):
            g_, r_, l_ = gi[a:a + ROWS_AT_ONCE], ri[a:a + ROWS_AT_ONCE], lv[a:a + ROWS_AT_ONCE]
            d = distance_rows_of(spec[g_], aa[g_], tab.sig_fft[l_, r_], tab.sig_sq[l_, r_], n)
            least.append(d.min(axis=1))
            found.append(en.candidates_of_rows(d, tab.turn_win[r_], tab.turn_off[r_], tab.turn_ok[r_]))
        if len(least) == 1:
            return least[0], found[0]
        return np.concatenate(least), tuple(np.concatenate(f) for f in zip(*found))

    gi, ri, found, comp, dmin = choose_and_compare(lb, tau2, float(within), plan, compare, margin)
    u = tab.face.size
    shifts = np.zeros((g, u, 4), np.int64)
    dist = np.full((g, u, 4), np.inf)
    valid = np.zeros((g, u, 4), bool)
    if ri.size:
        shifts[gi, ri], dist[gi, ri], valid[gi, ri] = found
    out = []
    for i in range(g):
        compared = en.BoundedOutline.resumed(sigs[i], spec[i], aa[i], library, int(levels[i]), taus[i],
                                             float(margin[i]), lb[i], plan,
                                             outline_bound.CompareState(comp[i], dmin[i]), float(within),
                                             shifts[i], dist[i], valid[i])
        out.append(en.OutlineMatch(sigs[i], shifts[i].copy(), dist[i].copy(), valid[i].copy(), float(taus[i]),
                                   float(areas[i]), int(levels[i]), float(within), tuple(faces), compared))
    return out


def outline_fits(matches, library, tolerance: float) -> list:
    """:func:`engine.fit_alpha` without interior of many matches: alpha from the outline alone, together.

    Parameters
    ----------
    matches : sequence of engine.OutlineMatch
        Made over every view (``faces``).
    library : engine.ModelLibrary
        The library the matches were made with.
    tolerance : float
        As for :func:`engine.fit_alpha`.

    Returns
    -------
    list of engine.AlphaFit
        Entry i equal, field by field and bit by bit, to ``fit_alpha(contour_i, None,
        library=library, tolerance=tolerance, match=matches[i])`` (whose other options an
        outline-only fit does not read). The steps of that fit, each over all matches at once:
        element-wise arithmetic, minima and first or middle positions (no sums).
    """
    g = len(matches)
    if g == 0:
        return []
    if any(m.faces != en.VIEWS for m in matches):
        raise ValueError("outline_fits takes matches made over every view")
    if any(m.within < tolerance for m in matches):
        # matches of a smaller reach: each fit takes its own on (engine.OutlineMatch.reaching)
        return [en.fit_alpha(None, None, library=library, tolerance=tolerance, match=m) for m in matches]
    lib, inf = library, np.inf
    tab = lib.tables
    n = lib.signatures.shape[-1]
    valid = np.stack([m.valid for m in matches])                          # (g, u, 4)
    dist = np.stack([m.dist for m in matches])
    shifts = np.stack([m.shifts for m in matches])
    ax = (1, 2)
    dmin = np.where(valid, dist, inf).min(axis=ax)
    # squares of scalars as the fit of one grain forms them: numpy's power of a float64 scalar (the C
    # library's pow, which can differ from x * x by one unit in the last place) and Python's of a float
    dmin2 = np.array([d ** 2 for d in dmin])
    tau2 = np.array([m.tau ** 2 for m in matches])
    with np.errstate(invalid="ignore"):
        osc = np.where(valid, (dist ** 2 - dmin2[:, None, None]) / tau2[:, None, None]
                       + tab.prior[None, :, None], inf)
    osc = osc - np.where(valid, osc, inf).min(axis=ax)[:, None, None]
    tot = np.where(valid, osc, inf)
    ms = tab.model_shape
    score = en.slot_min(tot)[:, ms]                                        # (g, m)
    score = score - score.min(axis=1)[:, None]
    grid = lib.grid
    prof = lib.profile_over_faces(score)
    inside = prof <= tolerance
    if not inside.any(axis=1).all():
        return [en.fit_alpha(None, None, library=library, tolerance=tolerance, match=m) for m in matches]
    best_val = prof.min(axis=1)
    ties = prof <= (best_val + 1e-9)[:, None]
    # the middle of each tied run: the (count // 2)-th tie, counted from 0
    ib = np.argmax(np.cumsum(ties, axis=1) > (ties.sum(axis=1) // 2)[:, None], axis=1)
    mbest = np.argmax(lib.at_grid[ib] & (score <= (best_val + 1e-9)[:, None]), axis=1)
    rows = np.arange(g)
    ub = ms[mbest]
    row = tot[rows, ub]                                                   # (g, 4), inf where not finite
    sh = shifts[rows, ub]
    # lowest score, then the smallest shift, then the first slot (np.lexsort is stable)
    low = row == en.slot_min(row)[:, None]
    jb = np.argmax(low & (sh == en.slot_min(np.where(low, sh, np.iinfo(sh.dtype).max))[:, None]), axis=1)
    kbest, dbest = sh[rows, jb], dist[rows, ub, jb]
    i_lo = np.argmax(inside, axis=1)
    i_hi = grid.size - 1 - np.argmax(inside[:, ::-1], axis=1)
    half = 0.5 * (grid[1] - grid[0]) if grid.size > 1 else 0.0
    out = []
    for i, m in enumerate(matches):
        a, b = int(i_lo[i]), int(i_hi[i])
        lo = float(max(grid[a] - half, grid[0]))
        hi = float(min(grid[b] + half, grid[-1]))
        notes = []
        bounded = a == 0 or b == grid.size - 1
        if a == 0:
            notes.append(f"only bounded: alpha <= {hi:.2f} (alpha_lo is the grid minimum {grid[0]:g})")
        if b == grid.size - 1:
            notes.append(f"only bounded: alpha >= {lo:.2f} (alpha_hi is the grid maximum {grid[-1]:g})")
        notes.append("outline only")
        alpha = float(grid[ib[i]])
        out.append(en.AlphaFit(float("nan") if bounded else alpha, lo, hi, alpha, lib.faces[int(mbest[i])],
                               360.0 * int(kbest[i]) / n, float(dbest[i]), "; ".join(notes), score[i].copy(),
                               float("nan"), float("nan"), m.signature, float("nan")))
    return out
