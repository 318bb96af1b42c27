"""Robust image statistics shared by preprocessing and segmentation.

Background level and noise of an image from its histogram mode and a
clipped standard deviation, taken on a regular subsample of about
:data:`LEVEL_SAMPLES` pixels (robust statistics need no more).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

#: Background pixels are those within this many background sigmas of the mode.
CLIP_SIGMAS = 3.0
#: Pixels used for robust levels (mode, clipped sigma): a regular subsample.
LEVEL_SAMPLES = 300_000


def background_level(values: np.ndarray) -> tuple[float, float]:
    """Level and noise of the background: main histogram mode and clipped sigma.

    Parameters
    ----------
    values : ndarray
        Pixel values; the background must be the most common level. An
        image (2-D) is regularly subsampled to about :data:`LEVEL_SAMPLES`
        pixels.

    Returns
    -------
    mode, sigma : float
        See :func:`histogram_mode` and :func:`clipped_sigma`.
    """
    v = np.asarray(values, float)
    v = (regular_subsample(v, LEVEL_SAMPLES) if v.ndim == 2 else v).ravel()
    m = histogram_mode(v)
    return m, clipped_sigma(v, m)


def regular_subsample(image: np.ndarray, n: int) -> np.ndarray:
    """Every k-th row and column of an image, k the smallest step leaving at most about ``n`` pixels.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    n : int
        Pixels wanted (the result has at most ``n`` pixels, about ``n / 4`` at least).

    Returns
    -------
    ndarray
        A view of ``image``; ``image`` itself when it has ``n`` pixels or fewer.
    """
    k = max(1, int(np.ceil(np.sqrt(image.size / n))))
    return image[::k, ::k]


def robust_sd(values: np.ndarray) -> tuple[float, float]:
    """Median and robust standard deviation ``1.4826 MAD`` of ``values``.

    Parameters
    ----------
    values : ndarray
        At least one value.

    Returns
    -------
    median, sd : float
        The median and 1.4826 times the median absolute deviation from it,
        the standard deviation for normal values (consistency factor
        1 / Phi^-1(3/4)).
    """
    v = np.asarray(values, float).ravel()
    med = float(np.median(v))
    return med, 1.4826 * float(np.median(np.abs(v - med)))


def clipped_sigma(r: np.ndarray, centre: float) -> float:
    """Standard deviation of the central core of ``r`` around ``centre`` (iterative 3-sigma clip)."""
    dev = np.abs(r - centre)
    s = 1.4826 * float(np.median(dev))
    dev2 = dev * dev  # squared once: the same values as squaring each clipped sample
    for _ in range(8):
        core = dev2[dev < CLIP_SIGMAS * s]
        if core.size < 10:
            break
        # a 3-sigma clipped normal has sd 0.9866 of the full one
        s_new = float(np.sqrt(np.mean(core))) / 0.9866
        if abs(s_new - s) <= 1e-3 * s:
            s = s_new
            break
        s = s_new
    return max(s, 1e-9)


def histogram_mode(r: np.ndarray) -> float:
    """Main mode of a sample from a smoothed histogram, refined once.

    ``sqrt(n)`` bins (the square-root rule), 16 at least and 256 at most, over the
    0.5-99.5 percentile range, smoothed with a Gaussian of 2 bins. Where a bin is
    wider than a quarter of the peak's width (median absolute deviation about
    the mode; a small frame whose range is stretched by bright grains), the
    histogram is drawn again over the values within 4 such widths of the first
    mode, so the mode is resolved to a fraction of the peak's width.
    """
    mode, width = _coarse_mode(r)
    dev = np.abs(r - mode)
    spread = 1.4826 * float(np.median(dev))  # the peak's width, robustly
    if width > 0.25 * spread > 0:
        near = r[dev <= 4 * spread]
        if near.size >= 64:
            mode, _ = _coarse_mode(near)
    return mode


def _coarse_mode(r: np.ndarray) -> tuple[float, float]:
    """Mode of the smoothed histogram and its bin width (see :func:`histogram_mode`)."""
    lo, hi = percentiles(r, (0.5, 99.5))
    if hi <= lo:
        return float(np.median(r)), 0.0
    bins = int(np.clip(np.sqrt(r.size), 16, 256))
    hist, edges = np.histogram(r, bins=bins, range=(lo, hi))
    hist = ndi.gaussian_filter1d(hist.astype(float), 2.0)
    k = int(np.argmax(hist))
    return float(0.5 * (edges[k] + edges[k + 1])), float(edges[1] - edges[0])


def median(values: np.ndarray) -> float:
    """``float(numpy.median(values))``, by counting instead of sorting for 8/16-bit integers and float32.

    Parameters
    ----------
    values : ndarray
        At least one value.

    Returns
    -------
    float
        The middle value, or the mean of the two middle values of an even
        count (as numpy). For 8/16-bit unsigned integers the counts of every level
        (``numpy.bincount``) give it without sorting: equal to numpy's, 5-10x
        faster on the millions of background pixels of a frame. Large float32
        samples without NaN (frames as the readers give them) take
        :func:`float32_median`, equal to numpy's and about 3x faster.
    """
    values = np.asarray(values).ravel()
    if values.dtype == np.float32 and values.size >= FLOAT32_COUNTING_MIN and not np.isnan(values).any():
        return float32_median(values)
    if values.dtype.kind != "u" or values.dtype.itemsize > 2:
        return float(np.median(values))
    return median_of_counts(np.bincount(values), values.size)


#: Below this many values :func:`median` leaves float32 samples to numpy (its selection is fast enough there).
FLOAT32_COUNTING_MIN = 1 << 16
#: The 65536 values of the upper 16 bits of a float32 in the order of the numbers they begin: the negative
#: numbers (sign bit set) from the largest magnitude down, then the positive ones up.
_UPPER_ORDER = np.r_[np.arange(0xFFFF, 0x7FFF, -1), np.arange(0, 0x8000)]


def float32_median(values: np.ndarray) -> float:
    """``float(numpy.median(values))`` of float32 values without NaN, from two rounds of counting.

    Parameters
    ----------
    values : ndarray of float32, shape (n,)
        n >= 1, no NaN.

    Returns
    -------
    float
        The middle value, or numpy's mean of the two middle values (the same
        ``numpy.mean`` of a float32 pair numpy takes), so the result equals
        numpy's bit for bit (the two are equal numbers in every case: the sign
        of a zero may differ when both signs of zero are in the sample).

    Notes
    -----
    The bits of a float32, read as an unsigned integer, order the positive
    numbers as the numbers, and the negative ones in reverse (IEEE 754
    sign-magnitude). The upper 16 bits of every value are counted
    (``numpy.bincount``), the counts put in the order of the numbers, and
    the group that holds the wanted rank found from their running sum; the
    lower 16 bits of that group's values are counted the same way, which
    gives the value's every bit. Two passes over the values and one over a
    small group, where ``numpy.median`` partitions all of them.
    """
    v = np.ascontiguousarray(values, dtype=np.float32).ravel()
    n = v.size
    picked = float32_ranks(v, sorted({(n - 1) // 2, n // 2}))
    # one value for an odd count, the two middle ones for an even count: numpy's own mean of them
    return float(np.mean(np.array(picked, dtype=np.float32)))


def float32_ranks(v: np.ndarray, ranks) -> list:
    """The values of the given ranks (0: the smallest) of float32 values without NaN, by counting their bits.

    Parameters
    ----------
    v : ndarray of float32, shape (n,)
        Contiguous, no NaN.
    ranks : sequence of int
        Each in ``0 .. n - 1``.

    Returns
    -------
    list of numpy.float32
        ``numpy.sort(v)[k]`` for each ``k`` of ``ranks`` (see :func:`float32_median` for the counting;
        ranks whose values share their upper 16 bits share the second count).
    """
    bits = v.view(np.uint32)
    upper = bits >> 16
    cum = np.cumsum(np.bincount(upper, minlength=1 << 16)[_UPPER_ORDER])
    lows = {}
    picked = []
    for k in ranks:
        j = int(np.searchsorted(cum, k, side="right"))
        rank = k - (int(cum[j - 1]) if j else 0)
        top = int(_UPPER_ORDER[j])
        if top not in lows:
            counts = np.bincount(bits[upper == top] & 0xFFFF, minlength=1 << 16)
            # negative numbers: a larger magnitude is a smaller number
            lows[top] = np.cumsum(counts[::-1]) if top >= 0x8000 else np.cumsum(counts)
        if top >= 0x8000:
            low = 0xFFFF - int(np.searchsorted(lows[top], rank, side="right"))
        else:
            low = int(np.searchsorted(lows[top], rank, side="right"))
        picked.append(np.uint32((top << 16) | low).view(np.float32))
    return picked


def kth_smallest(values: np.ndarray, k: int):
    """``numpy.partition(values.ravel(), k)[k]``: the value of rank ``k`` (0: the smallest).

    Parameters
    ----------
    values : ndarray
        At least ``k + 1`` values.
    k : int

    Returns
    -------
    numpy scalar of the dtype of ``values``
        Large float32 samples without NaN (the gradient magnitudes of the polarity votes) take
        :func:`float32_ranks` (two counts of the values' bits: the same value, about twice as fast
        as numpy's selection); other samples go to numpy.
    """
    flat = np.asarray(values).ravel()
    if flat.dtype == np.float32 and flat.size >= FLOAT32_COUNTING_MIN and 0 <= k < flat.size \
            and not np.isnan(flat).any():
        return float32_ranks(np.ascontiguousarray(flat), [int(k)])[0]
    return np.partition(flat, k)[k]


def percentiles(values: np.ndarray, q) -> np.ndarray:
    """``numpy.percentile(values, q)`` (its default linear method), by counting for large samples of float32 values.

    Parameters
    ----------
    values : ndarray
        At least one value.
    q : sequence of float
        Percentiles, each in [0, 100).

    Returns
    -------
    ndarray of float64, shape (len(q),)
        Equal to numpy's bit for bit. For at least :data:`FLOAT32_COUNTING_MIN` float64 values that
        are all float32 numbers (a frame as read or converted, the usual case here) the neighbouring
        order statistics come from :func:`float32_ranks` instead of numpy's partition of the whole
        sample (about twice as fast), and are interpolated with numpy's own arithmetic: virtual
        index ``(n - 1) q / 100``, weight its fractional part ``g``, value ``a + (b - a) g``, or
        ``b - (b - a) (1 - g)`` where ``g >= 0.5``. Other samples go to numpy.
    """
    a = np.asarray(values)
    qs = np.true_divide(np.asarray(q, dtype=np.float64), 100)
    if a.dtype == np.float64 and a.size >= FLOAT32_COUNTING_MIN and qs.ndim == 1:
        n = a.size
        virtual = (n - 1) * qs
        if np.all(virtual >= 0) and np.all(virtual < n - 1):
            flat = a.ravel()
            v32 = flat.astype(np.float32)
            if np.array_equal(v32, flat):  # float32 numbers only (a NaN is never equal: numpy decides)
                prev = np.floor(virtual).astype(np.intp)
                ranks = sorted(set(prev.tolist()) | set((prev + 1).tolist()))
                value = dict(zip(ranks, float32_ranks(v32, ranks)))
                below = np.array([value[k] for k in prev.tolist()], np.float64)
                above = np.array([value[k + 1] for k in prev.tolist()], np.float64)
                gamma = virtual - prev
                diff = above - below
                out = np.add(below, diff * gamma)
                np.subtract(above, diff * (1 - gamma), out=out, where=gamma >= 0.5)
                return out
    return np.percentile(a, np.asarray(q, dtype=np.float64))


def median_of_counts(counts: np.ndarray, n: int) -> float:
    """The median of ``n`` >= 1 non-negative integer values given by their counts (``counts[v]`` values ``v``).

    Returns
    -------
    float
        The middle value, or the mean of the two middle values of an even count (as :func:`median`).
    """
    cum = np.cumsum(counts)
    lo = int(np.searchsorted(cum, (n - 1) // 2, side="right"))
    hi = int(np.searchsorted(cum, n // 2, side="right"))
    return (float(lo) + float(hi)) / 2.0
