"""Level and noise of the background, whatever share of the frame the grains cover.

The background of a micrograph is usually its most common level, and the
width of that histogram peak is the noise. Neither holds when grains cover
most of the frame (packed spheres, close-set cubes, a few large crystals):
the grains then make the main mode, and a median absolute deviation taken
round the background's mode measures the distance to the grains, not the
noise. Once the side on which grains lie is known (the polarity), the
background is the peak on the other side:

1. ``m`` = main mode of the values (grain side made positive).
2. If ``m`` lies above Otsu's threshold ``t`` [1]_ (in the grain class), the
   values below ``t`` hold at least :data:`MIN_BACKGROUND_FRACTION` of the
   pixels, and the mode ``m_low`` of those lies more than
   :data:`MIN_SEPARATION` of their noise sds below ``m``, the background is
   ``m_low``: a distinct peak of its own, not the lower flank of the
   grains' peak (a single noisy peak that Otsu cuts in two fails this test),
   and its values lie all over the frame (:func:`spread_out`). A distinct
   low peak confined to a strip (a data bar) is left out and the test made
   once more on the other values.
3. The noise sd is taken on the side free of grains, as the smaller of the
   median absolute deviation (:func:`one_sided_sigma`) and the half width
   at half maximum (:func:`half_width_sigma`), never more than the
   two-sided clipped sd.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from grainhabit.plugins.common.image_stats import (
    SortedSample, clipped_sigma, histogram_mode, select_median, sorted_histogram, sorted_histogram_mode,
)

#: Least share of the values below Otsu's threshold for them to be the background.
MIN_BACKGROUND_FRACTION = 0.02
#: Least share of the rows, and of the columns, holding values of the lower peak (see spread_out).
MIN_SPREAD = 0.5
#: Least distance, in noise sds of the lower peak, between the grains' mode and the lower peak's mode.
MIN_SEPARATION = 4.0
#: From this many values on, background_peak takes its statistics from one sorted copy (_sorted_background_peak):
#: the same numbers, and fewer passes; the 64 x 64 px blocks of the surface fit too (8.7 -> 5.0 ms a frame).
SORTED_MIN = 1024


def one_sided_sigma(r: np.ndarray, centre: float, side: int) -> float:
    """Noise sd from one side of a symmetric peak.

    Parameters
    ----------
    r : ndarray
        Values; the background peak is centred on ``centre``.
    centre : float
        The peak's mode.
    side : {-1, 1}
        The side free of grains.

    Returns
    -------
    float
        ``1.4826 * median(|r - centre|)`` over the values on ``side`` of the
        centre: the MAD estimator of a normal sd (common practice), on the
        half of the peak that the grains leave alone; infinity with fewer
        than 10 such values.
    """
    d = (np.asarray(r, float).ravel() - centre) * side
    d = d[d > 0]
    if d.size < 10:
        return float("inf")
    return max(1.4826 * float(select_median(d)), 1e-9)  # np.median's number (image_stats.select_median)


def half_width_sigma(r: np.ndarray, centre: float, side: int, guess: float) -> float:
    """Noise sd from the half width at half maximum of one side of a peak.

    Parameters
    ----------
    r : ndarray
        Values; a peak is centred on ``centre``.
    centre : float
        The peak's mode.
    side : {-1, 1}
        The side measured.
    guess : float
        A rough sd (an upper bound, e.g. :func:`one_sided_sigma`): the
        histogram spans 4 of them on either side of the centre.

    Returns
    -------
    float
        ``HWHM / sqrt(2 ln 2)``, the sd of a normal peak of that half width
        (handbook: FWHM = 2.3548 sd); infinity when the histogram never falls
        to half its height on ``side``.

    Notes
    -----
    The median absolute deviation of one side counts a long tail (halos
    round the grains, texture, a drawn letter) as noise; the half width
    looks at the top of the peak only, which a tail holding less than half
    the peak's height leaves alone.
    """
    v = np.asarray(r, float).ravel()
    if not np.isfinite(guess) or guess <= 0:
        return float("inf")
    near = v[np.abs(v - centre) <= 4.0 * guess]
    return _half_width_of(near, centre, side, guess, lambda a, bins, rng: np.histogram(a, bins=bins, range=rng))


def _half_width_of(near, centre, side, guess, histogram) -> float:
    """:func:`half_width_sigma` from the values within 4 ``guess`` of the centre; ``histogram(values, bins,
    range)`` gives numpy's counts and edges (``numpy.histogram``, or :func:`sorted_histogram` of sorted values)."""
    if near.size < 64:
        return float("inf")
    bins = int(np.clip(np.sqrt(near.size), 16, 256))
    hist, edges = histogram(near, bins, (centre - 4.0 * guess, centre + 4.0 * guess))
    hist = ndi.gaussian_filter1d(hist.astype(float), 1.0)
    width = edges[1] - edges[0]
    k0 = int(np.clip((centre - edges[0]) // width, 0, bins - 1))
    # the peak's top within a bin or two of the given centre
    lo, hi = max(k0 - 2, 0), min(k0 + 3, bins)
    k0 = lo + int(np.argmax(hist[lo:hi]))
    half = 0.5 * hist[k0]
    k = k0
    while 0 <= k < bins and hist[k] > half:
        k += side
    if not 0 <= k < bins:
        return float("inf")
    # linear interpolation between the last bin above half height and the first below it
    h_in, h_out = hist[k - side], hist[k]
    frac = (h_in - half) / (h_in - h_out) if h_in > h_out else 0.0
    hwhm = (abs(k - k0) - 1 + frac) * width
    return max(hwhm / np.sqrt(2.0 * np.log(2.0)), 1e-9)


def peak_sigma(r: np.ndarray, centre: float, side: int) -> float:
    """Noise sd of the peak at ``centre`` from its side ``side``: the smaller of MAD and half-width estimates."""
    mad = one_sided_sigma(r, centre, side)
    return min(mad, half_width_sigma(r, centre, side, mad))


def otsu_of(values: np.ndarray) -> float:
    """Otsu's threshold of a sample (:func:`skimage.filters.threshold_otsu`, 256 bins); its value if constant."""
    from skimage.filters import threshold_otsu

    v = np.asarray(values, float).ravel()
    if v.size == 0 or float(v.min()) == float(v.max()):
        return float(v[0]) if v.size else 0.0
    return float(threshold_otsu(v))


def background_peak(values: np.ndarray, grain_sign: int, valid: np.ndarray | None = None,
                    half_width: bool = True) -> tuple[float, float]:
    """Mode and noise sd of the background, grains on the side ``grain_sign``.

    Parameters
    ----------
    values : ndarray
        Pixel values, a sample of the frame: 2-D (rows, cols) on a regular
        grid, or 1-D (then the lower peak is not checked for spread).
    grain_sign : {-1, 0, 1}
        +1 when grains are brighter than the background, -1 darker; 0 when
        unknown (then the main mode and its clipped sd).
    valid : ndarray of bool, shape of ``values``, optional
        Pixels to use (e.g. leaving out values clipped by an earlier step).

    Returns
    -------
    mode, sigma : float
        See the module docstring.
    """
    arr = np.asarray(values, float)
    ok = np.ones(arr.shape, bool) if valid is None else np.asarray(valid, bool)
    v = arr[ok]
    if v.size >= SORTED_MIN and grain_sign in (-1, 0, 1) and np.isfinite(v).all():
        found = _sorted_background_peak(v, grain_sign, half_width)
        if found is not None:
            return found
    m = histogram_mode(v)
    if grain_sign == 0:
        return m, clipped_sigma(v, m)
    # grain_sign * arr and its valid values, without a copy for +1 (the same values; negation is exact)
    if grain_sign in (1, -1):
        signed, s = (arr, v) if grain_sign == 1 else (-arr, -v)
    else:
        signed = grain_sign * arr
        s = signed[ok]
    for _ in range(2):
        ms = grain_sign * m
        t = otsu_of(s)
        if ms <= t:
            break
        low = s[s <= t]
        if low.size < max(MIN_BACKGROUND_FRACTION * s.size, 64):
            break
        m_low = histogram_mode(low)
        s_low = peak_sigma(low, m_low, -1)
        if ms - m_low <= MIN_SEPARATION * s_low:
            break
        if spread_out(signed, ok, m_low, s_low):
            ms = m_low
            break
        # a peak in a strip (a data bar): leave its values out and look again once
        ok = ok & ~(np.abs(signed - m_low) <= 2.0 * s_low)
        s = signed[ok]
    free = peak_sigma(s, ms, -1) if half_width else one_sided_sigma(s, ms, -1)
    return grain_sign * ms, min(clipped_sigma(s, ms), free)


def _sorted_background_peak(v: np.ndarray, grain_sign: int, half_width: bool) -> tuple[float, float] | None:
    """:func:`background_peak` of a large sample whose background mode lies below Otsu's threshold, or None.

    The same numbers as the steps of :func:`background_peak` (tests/test_sorted_stats.py), from one sorted
    copy of the values (:class:`~grainhabit.plugins.common.image_stats.SortedSample`): the main mode's
    percentiles and histograms, Otsu's histogram, the medians of the one-sided and absolute deviations and
    the half-width histogram are order statistics, read off the sorted copy instead of a partition or a
    pass over all values each (two 2048 px frames' levels: about 45 -> 20 ms). Only the clipped sd's means
    stay on the values in their own order. None when the grains' mode lies above Otsu's threshold (a lower
    peak may be the background): the caller then takes its own steps.
    """
    whole = SortedSample(v)  # the values and one sorted copy, for every order statistic below
    m = sorted_histogram_mode(whole)
    if grain_sign == 0:
        return m, clipped_sigma(v, m, mad=whole.abs_dev_median(m))
    # grain_sign * v and its sorted copy (negation is exact and reverses the order)
    sample = whole if grain_sign == 1 else SortedSample(-v, np.negative(whole.srt[::-1]))
    s, ss = sample.values, sample.srt
    ms = grain_sign * m
    t = _sorted_otsu(s, ss)
    if not ms <= t:
        return None
    free = _sorted_one_sided_sigma(ss, ms)
    if half_width:
        free = min(free, _sorted_half_width_sigma(sample, ms, free))
    return grain_sign * ms, min(clipped_sigma(s, ms, mad=sample.abs_dev_median(ms)), free)


def _sorted_otsu(s: np.ndarray, ss: np.ndarray) -> float:
    """:func:`otsu_of` of ``s``, sorted ``ss``: skimage's threshold from the same 256-bin histogram."""
    from skimage.filters import threshold_otsu

    if float(ss[0]) == float(ss[-1]):
        return float(s[0])
    counts, edges = sorted_histogram(ss, 256)  # skimage: numpy.histogram over (min, max)
    return float(threshold_otsu(hist=(counts, (edges[:-1] + edges[1:]) / 2.0)))


def _sorted_one_sided_sigma(ss: np.ndarray, centre: float) -> float:
    """:func:`one_sided_sigma` ``(s, centre, -1)`` of sorted values ``ss``."""
    p = int(np.searchsorted(ss, centre, side="left"))  # (x - centre) * -1 > 0 exactly for x < centre
    if p < 10:
        return float("inf")
    # the deviations (x - centre) * -1 of those values, ascending, are the first p sorted values reversed
    mid = np.array([(ss[p - 1 - k] - centre) * -1 for k in sorted({(p - 1) // 2, p // 2})])
    return max(1.4826 * float(np.median(mid)), 1e-9)


def _sorted_half_width_sigma(sample: SortedSample, centre: float, guess: float) -> float:
    """:func:`half_width_sigma` ``(s, centre, -1, guess)`` of a sorted sample."""
    if not np.isfinite(guess) or guess <= 0:
        return float("inf")
    near = sample.within(centre, 4.0 * guess)
    return _half_width_of(near, centre, -1, guess, sorted_histogram)


def spread_out(s: np.ndarray, valid: np.ndarray, centre: float, sigma: float) -> bool:
    """Whether the values within 2 sds of ``centre`` lie across the frame, not in one strip.

    Parameters
    ----------
    s : ndarray
        Values (grain side positive); 1-D samples always pass.
    valid : ndarray of bool, shape of ``s``
    centre, sigma : float
        The candidate background peak.

    Returns
    -------
    bool
        For a 2-D ``s``: such values occur in at least :data:`MIN_SPREAD` of
        the rows and of the columns. The data bar of a microscope (a flat
        dark strip along one edge) or a flat panel beside a figure makes a
        distinct low peak too, but only in a few rows or columns; the gaps
        between packed grains run all over the frame.
    """
    if s.ndim != 2:
        return True
    near = valid & (np.abs(s - centre) <= 2.0 * sigma)
    return bool(near.any(axis=1).mean() >= MIN_SPREAD and near.any(axis=0).mean() >= MIN_SPREAD)
