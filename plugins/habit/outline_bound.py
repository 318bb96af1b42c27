"""Outline match with a proven lower bound: compare at every shift only the shapes that can matter.

The outline match (:func:`engine.outline_candidates`) compares a grain's radial signature a
with every library shape's signature b at all n cyclic shifts s, by the squared RMS distance

    D(s) = |a - roll(b, s)|^2 / n = (|a|^2 + |b|^2 - 2 C(s)) / n,

C the circular cross-correlation, one inverse FFT per shape. A lower bound of min_s D(s) that
needs no inverse FFT follows from the discrete Fourier transform: with A_k, B_k the DFTs of a and b
(k = 0 .. n-1), C(s) = (1/n) sum_k A_k conj(B_k) exp(2 pi i k s / n) (the correlation theorem),
so by the triangle inequality |C(s)| <= (1/n) sum_k |A_k| |B_k| for every s, and

    min_s D(s) >= (|a|^2 + |b|^2 - (2/n) sum_k |A_k| |B_k|) / n = (1/n^2) sum_k (|A_k| - |B_k|)^2,

the last form by Parseval's theorem (|a|^2 = (1/n) sum_k |A_k|^2). For real signals
|A_{n-k}| = |A_k|, so the sum over the half spectrum of ``rfft`` counts k = 1 .. n/2 - 1 twice.
The magnitude spectra of the shapes are fixed, so the bound of all shapes is one small
matrix-vector product (see e.g. Oppenheim & Schafer, Discrete-Time Signal Processing, on the
DFT's circular correlation and Parseval's relation; the bound is the Cauchy-Schwarz/triangle
step applied term by term).

:func:`shapes_to_compare` uses the bound to pick the shapes whose exact distances can reach what
the fit reads from the outline match (:func:`engine.fit_alpha_steps`, :func:`engine.class_scores`,
:func:`engine.outline_settles`): every shape whose outline score (with its view prior) may lie
within ``within`` chi-square units of the best, in every habit class the best shape and the best
among those beyond that, and the shape of least distance (over all views and over the allowed
ones). The others are left out; no decision of the fit reads their distances (see
:func:`shapes_to_compare`). Oppenheim & Schafer is cited from memory.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Safety margin of every comparison, relative to (|a|^2 + max |b|^2) / n: covers the rounding of
#: the FFT distances (of order log2(n) times the unit roundoff of that scale; FFT error analysis,
#: from memory) and of the bound (a sum of n/2 + 1 products), by more than four orders of magnitude.
BOUND_MARGIN = 1e-9


@dataclass(frozen=True)
class SpectralBound:
    """Per-library tables of the bound (built once per library, :attr:`engine.ModelLibrary.spectral_bound`).

    Attributes
    ----------
    weighted_mag : ndarray, shape (levels, u, n // 2 + 1)
        ``(2 / n) w_k |B_k|`` of every shape's signature at every rounding level, w_k = 1 at
        k = 0 and k = n/2 (n even), 2 elsewhere (the half spectrum standing for the whole).
    sq_max : ndarray, shape (levels,)
        Largest squared signature norm of each level (sets the safety margin).
    class_mask : ndarray of bool, shape (classes, u)
        The shapes of each habit class (cube, cuboctahedron, octahedron).
    """

    weighted_mag: np.ndarray
    sq_max: np.ndarray
    class_mask: np.ndarray


def spectral_bound(sig_fft, sig_sq, n: int, shape_class, n_classes: int = 3) -> SpectralBound:
    """The :class:`SpectralBound` of a library's shapes.

    Parameters
    ----------
    sig_fft : ndarray, shape (levels, u, n // 2 + 1)
        Spectra (or their conjugates) of the shapes' signatures.
    sig_sq : ndarray, shape (levels, u)
        Their squared norms.
    n : int
        Signature length.
    shape_class : ndarray of int, shape (u,)
        Habit class of every shape (0 cube, 1 cuboctahedron, 2 octahedron).
    n_classes : int
    """
    k = sig_fft.shape[-1]
    w = np.full(k, 2.0)
    w[0] = 1.0
    if n % 2 == 0:
        w[-1] = 1.0
    wm = np.ascontiguousarray(np.abs(sig_fft) * (w * (2.0 / n)))
    mask = np.asarray(shape_class)[None, :] == np.arange(n_classes)[:, None]
    return SpectralBound(wm, np.asarray(sig_sq).max(axis=1), mask)


def lower_bounds(spec_a, aa: float, sig_sq, weighted_mag, n: int, margin: float):
    """Safe lower bound of min over shifts of every shape's squared distance (see the module docstring).

    Parameters
    ----------
    spec_a : ndarray, shape (n // 2 + 1,)
        ``rfft`` of the observed signature.
    aa : float
        Its squared norm.
    sig_sq, weighted_mag : ndarray
        One rounding level's rows of the shapes' squared norms (u,) and of
        :attr:`SpectralBound.weighted_mag` (u, n // 2 + 1).
    n : int
        Signature length.
    margin : float
        Subtracted from the bound (the rounding of the bound and of the FFT distances).

    Returns
    -------
    ndarray, shape (u,)
        A value at most the computed minimum distance of each shape.
    """
    return (aa + sig_sq - weighted_mag @ np.abs(spec_a)) / n - margin


@dataclass(frozen=True)
class ComparePlan:
    """What :func:`shapes_to_compare` reads of a library and a set of allowed views (:func:`compare_plan`).

    Attributes
    ----------
    prior_ok : ndarray, shape (u,)
        -2 ln P(view | body) of every allowed shape, inf for the others.
    class_inf : ndarray, shape (classes, u)
        0 where the shape is an allowed shape of the class, inf elsewhere.
    cls : ndarray of int, shape (u,)
        Class of every allowed shape; ``classes`` for the others.
    all_ok : bool
        Every shape allowed.
    prior_spread : float
        Largest minus least prior of the allowed shapes.
    """

    prior_ok: np.ndarray
    class_inf: np.ndarray
    cls: np.ndarray
    all_ok: bool
    prior_spread: float


def compare_plan(bound: SpectralBound, prior, shape_ok) -> ComparePlan:
    """The :class:`ComparePlan` of a library's bound tables, shape priors and allowed shapes."""
    ok = np.asarray(shape_ok, bool)
    mask = bound.class_mask & ok
    n_cls = mask.shape[0]
    pr = np.asarray(prior, float)[ok]
    return ComparePlan(np.where(ok, prior, np.inf), np.where(mask, 0.0, np.inf),
                       np.where(mask.any(axis=0), mask.argmax(axis=0), n_cls), bool(ok.all()),
                       float(pr.max() - pr.min()) if pr.size else 0.0)


@dataclass
class CompareState:
    """The shapes :func:`shapes_to_compare` has compared for one outline.

    Attributes
    ----------
    comp : ndarray of bool, shape (u,)
        Compared shapes.
    dmin : ndarray, shape (u,)
        Least squared distance of each compared shape (inf for the others).
    """

    comp: np.ndarray
    dmin: np.ndarray


def shapes_to_compare(lb, tau2: float, within: float, plan: ComparePlan, distances, margin: float,
                      state: CompareState | None = None):
    """Choose, round by round, the shapes whose exact distances the fit needs, and compute them.

    Parameters
    ----------
    lb : ndarray, shape (u,)
        :func:`lower_bounds` of every shape's least squared distance D.
    tau2 : float
        Square of the outline misfit unit. The outline score of a shape is
        (D - D_min) / tau^2 + prior, offset to its least value, so in D units the key
        D + tau^2 prior orders the scores.
    within : float
        Every shape whose score may lie within this many chi-square units of the best is compared.
    plan : ComparePlan
        The allowed shapes (the scores are taken over these), their priors and classes.
    distances : callable
        ``distances(rows)`` -> (len(rows), n) squared distances at every shift of those shapes.
    margin : float
        Added to every comparison (the same as in :func:`lower_bounds`).
    state : CompareState, optional
        The shapes compared by an earlier call for the same outline (with a smaller ``within``):
        the rounds go on from there. Updated in place.

    Returns
    -------
    rows : ndarray of int
        The shapes compared by this call (each once, in the order computed; none compared before).
    d : ndarray, shape (len(rows), n)
        Their distance rows.
    state : CompareState
        The shapes compared so far, with their least distances.

    Notes
    -----
    On return, with K the least key over the compared allowed shapes (then the least key over all
    allowed shapes), every shape not compared

    - has a key above K + tau^2 ``within`` + margin (so its score is above ``within``: every shape
      the fit gates for its interior, or counts in a range or a tie, is compared),
    - has, in its habit class, a key at least margin above that of a compared shape of the class
      whose key lies above that gate (so each class's least score among the shapes beyond the gate,
      and each class's least score, is a compared shape's),
    - has D at least margin above the least D of the compared shapes, and of the compared allowed
      shapes where it is allowed (the least distance over all views and over the allowed ones is a
      compared shape's). Where every shape is allowed and ``within`` is at least the spread of the
      priors this follows from the first point: the shape v of least D and the shape b of least key
      have key_v = D_v + tau^2 prior_v <= D_b + tau^2 prior_b + tau^2 (prior_v - prior_b).

    The first round takes the shapes whose bound lies within the gate of the least bound (all of
    them lie within the final gate) and the shape of least bound of each class (and of least D
    bound where the last point is not implied); every later round adds the shapes that break one
    of these for the shapes compared so far (a class with no compared shape beyond the gate adds
    its shape of least bound). The rounds end when none does, at the latest when every shape is
    compared.
    """
    inf = np.inf
    t2p = tau2 * plan.prior_ok                  # inf for the shapes of other views
    lbk = lb + t2p
    gate = tau2 * within + margin
    d_free = not (plan.all_ok and within >= plan.prior_spread)

    def more(comp, dmin):
        # the shapes that break a condition of the Notes for the shapes compared so far
        key = dmin + t2p                        # inf where not compared or not allowed
        top = float(key.min()) + gate
        # per class: the least key beyond the gate among the compared shapes; a class without
        # one takes its open shape of least bound
        m = (np.where(key > top, key, inf) + plan.class_inf).min(axis=1).tolist()
        lbk_open = np.where(comp, inf, lbk)
        low = (lbk_open + plan.class_inf).min(axis=1).tolist()
        top_up = math.nextafter(top, inf)
        lim = [max(mc + margin if mc < inf else math.nextafter(lc, inf), top_up) for mc, lc in zip(m, low)]
        new = lbk_open < np.array(lim + [top_up])[plan.cls]
        if d_free:
            # the least distance, over all views and over the allowed ones
            ok = np.isfinite(plan.prior_ok)
            lb_open = np.where(comp, inf, lb)
            new |= lb_open < dmin.min() + margin
            new |= (lb_open < np.where(ok, dmin, inf).min() + margin) & ok
        return new

    if state is None:
        state = CompareState(np.zeros(lb.size, bool), np.full(lb.size, inf))
        new = lbk <= lbk.min() + gate
        new[(lbk + plan.class_inf).argmin(axis=1)] = True
        if d_free:
            new[lb.argmin()] = True
            new[np.where(np.isfinite(plan.prior_ok), lb, inf).argmin()] = True
    else:
        new = more(state.comp, state.dmin)
    comp, dmin = state.comp, state.dmin
    rows, blocks = [], []
    while new.any():
        idx = np.flatnonzero(new)
        d = distances(idx)
        dmin[idx] = d.min(axis=1)
        comp[idx] = True
        rows.append(idx)
        blocks.append(d)
        if comp.all():
            break
        new = more(comp, dmin)
    if len(rows) == 1:
        return rows[0], blocks[0], state
    if not rows:
        return np.zeros(0, np.intp), np.zeros((0, 0)), state
    return np.concatenate(rows), np.concatenate(blocks), state
