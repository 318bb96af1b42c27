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
    med = float(select_median(v))
    return med, 1.4826 * float(select_median(np.abs(v - med)))


def clipped_sigma(r: np.ndarray, centre: float, mad=None) -> float:
    """Standard deviation of the central core of ``r`` around ``centre`` (iterative 3-sigma clip).

    ``mad``, when given, is ``numpy.median(numpy.abs(r - centre))`` already known (e.g.
    :meth:`SortedSample.abs_dev_median`): the first estimate, ``1.4826 mad``.
    """
    dev = np.abs(r - centre)
    s = 1.4826 * float(select_median(dev) if mad is None else mad)
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
    spread = 1.4826 * float(select_median(dev))  # the peak's width, robustly
    if width > 0.25 * spread > 0:
        near = r[dev <= 4 * spread]
        if near.size >= 64:
            mode, _ = _coarse_mode(near)
    return mode


def _coarse_mode(r: np.ndarray) -> tuple[float, float]:
    """Mode of the smoothed histogram and its bin width (see :func:`histogram_mode`)."""
    lo, hi = percentiles(r, (0.5, 99.5))
    if hi <= lo:
        return float(select_median(r)), 0.0
    bins = int(np.clip(np.sqrt(r.size), 16, 256))
    hist, edges = np.histogram(r, bins=bins, range=(lo, hi))
    hist = ndi.gaussian_filter1d(hist.astype(float), 2.0)
    k = int(np.argmax(hist))
    return float(0.5 * (edges[k] + edges[k + 1])), float(edges[1] - edges[0])


def median(values: np.ndarray) -> float:
    """``float(numpy.median(values))``, by selection (:func:`select_median`).

    Parameters
    ----------
    values : ndarray
        At least one value.

    Returns
    -------
    float
        The middle value, or the mean of the two middle values of an even
        count (as numpy). Earlier forms counted the levels of 8/16-bit
        integers (``numpy.bincount``, :func:`median_of_counts`) and the bits
        of float32 values (:func:`float32_median`); numpy's vectorised
        selection about one rank is faster than either (a million values:
        uint16 1.2 -> 0.2 ms, float32 1.8 -> 0.7 ms) and gives the same
        number.
    """
    return float(select_median(np.asarray(values).ravel()))


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
        numpy's own selection: an earlier form counted the bits of large float32 samples
        (:func:`float32_ranks`), which numpy's vectorised selection about one rank now beats
        (1024 x 1024 gradient magnitudes: 1.9 -> 0.6 ms).
    """
    flat = np.asarray(values).ravel()
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
        Equal to numpy's bit for bit. For at least :data:`FLOAT32_COUNTING_MIN` float64 values
        without NaN the neighbouring order statistics come from :func:`select_ranks` (numpy's
        partition about one rank at a time, its vectorised selection, instead of its partition about
        all of them at once: 2.7 -> 0.7 ms for 262144 values), and are interpolated with numpy's own
        arithmetic: virtual index ``(n - 1) q / 100``, weight its fractional part ``g``, value
        ``a + (b - a) g``, or ``b - (b - a) (1 - g)`` where ``g >= 0.5``. Other float and integer
        samples of at least :data:`SORTED_MIN` values go to numpy as a sorted copy (the same order
        statistics, so the same numbers, in about half the time); the rest to numpy as they are.
    """
    a = np.asarray(values)
    qs = np.true_divide(np.asarray(q, dtype=np.float64), 100)
    if a.dtype == np.float64 and a.size >= FLOAT32_COUNTING_MIN and qs.ndim == 1:
        n = a.size
        virtual = (n - 1) * qs
        if np.all(virtual >= 0) and np.all(virtual < n - 1):
            flat = a.ravel()
            if not np.isnan(flat).any():  # with a NaN numpy decides
                prev = np.floor(virtual).astype(np.intp)
                ranks = sorted(set(prev.tolist()) | set((prev + 1).tolist()))
                value = dict(zip(ranks, select_ranks(flat, ranks)))
                below = np.array([value[k] for k in prev.tolist()], np.float64)
                above = np.array([value[k + 1] for k in prev.tolist()], np.float64)
                gamma = virtual - prev
                diff = above - below
                out = np.add(below, diff * gamma)
                np.subtract(above, diff * (1 - gamma), out=out, where=gamma >= 0.5)
                return out
    if a.dtype.kind in "fiu" and a.size >= SORTED_MIN:
        # numpy's percentiles of the sorted copy: the same order statistics, so the same numbers
        return np.percentile(np.sort(a, axis=None), np.asarray(q, dtype=np.float64))
    return np.percentile(a, np.asarray(q, dtype=np.float64))


#: From this many values (float or integer) on, :func:`percentiles` hands numpy a sorted copy, and
#: :class:`SortedSample` users (``background_peak``) take their statistics from one.
SORTED_MIN = 1 << 14


def select_ranks(flat: np.ndarray, ranks) -> list:
    """``numpy.sort(flat)[k]`` for each ``k`` of ``ranks`` (ascending), by partitions about one rank each.

    Parameters
    ----------
    flat : ndarray, shape (n,)
        No NaN.
    ranks : sequence of int
        Ascending, each in ``0 .. n - 1``.

    Returns
    -------
    list of numpy scalars
        A rank one above the previous one is the smallest value right of it in that partition
        (``numpy.partition`` puts every larger-or-equal value there); any other rank takes a
        partition of its own. numpy selects about a single rank with its vectorised quickselect, and
        about several ranks at once (as ``numpy.median`` and ``numpy.percentile`` ask) with its
        generic introselect, several times slower on large samples.
    """
    out = []
    part, anchor = None, None
    for k in ranks:
        if part is not None and k == anchor + 1:
            out.append(part[k:].min())
        else:
            part, anchor = np.partition(flat, k), k
            out.append(part[k])
    return out


def select_median(values: np.ndarray):
    """``numpy.median(values)`` (every value, no axis), from partitions about one rank each.

    Parameters
    ----------
    values : ndarray
        At least one value.

    Returns
    -------
    numpy scalar
        ``numpy.median(values)``: numpy's median is the mean of the middle one or two order
        statistics (``numpy.mean`` of them, in their order), which :func:`select_ranks` finds; the
        mean is numpy's own, of the same values (``numpy.median`` of those one or two). From
        :data:`SELECT_MIN` float or integer values without NaN this is 5-10x faster than numpy's
        median, whose partition about two ranks (and the last, for its NaN check) cannot use its
        vectorised selection (262144 float64 values: 2.5 -> 0.35 ms). Other samples go to numpy. The
        two are equal numbers in every case; where both signs of zero are in the sample the sign of
        a zero median may differ. Checked against numpy in tests/test_sorted_stats.py.
    """
    a = np.asarray(values)
    if a.dtype.kind not in "fiu" or a.size < SELECT_MIN:
        return np.median(a)
    flat = a.ravel()
    if a.dtype.kind == "f" and np.isnan(flat).any():
        return np.median(a)
    n = flat.size
    mid = select_ranks(flat, sorted({(n - 1) // 2, n // 2}))
    return np.median(np.array(mid, dtype=a.dtype))


#: From this many values on, :func:`select_median` selects instead of calling ``numpy.median``.
SELECT_MIN = 1 << 10


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


def sorted_histogram(srt: np.ndarray, bins: int, range=None) -> tuple[np.ndarray, np.ndarray]:
    """``numpy.histogram(values, bins, range)`` of equal-width bins, from the values sorted (``srt``).

    Parameters
    ----------
    srt : ndarray of float64, shape (n,)
        The values, sorted ascending, n >= 1, finite.
    bins : int
    range : (float, float), optional
        Default ``(srt[0], srt[-1])``, as numpy's (the smallest and largest value).

    Returns
    -------
    counts : ndarray of intp, shape (bins,)
    edges : ndarray of float64, shape (bins + 1,)
        numpy's: the same ``numpy.linspace`` edges, and numpy's documented bins (every bin half-open,
        ``edges[k] <= x < edges[k + 1]``, but the last, which holds its right edge too; values outside
        the range left out), counted by binary searches of the edges in the sorted values instead of a
        pass over all of them. Checked against numpy in tests/test_sorted_stats.py.
    """
    if range is None:
        first, last = srt[0], srt[-1]
    else:
        first, last = range
    if first == last:  # numpy's _get_outer_edges
        first, last = first - 0.5, last + 0.5
    edges = np.linspace(first, last, bins + 1, endpoint=True, dtype=np.result_type(first, last, srt))
    below = np.searchsorted(srt, edges, side="left")  # values < each edge
    counts = np.diff(below)
    counts[-1] = np.searchsorted(srt, edges[-1], side="right") - below[-2]
    return counts, edges


class SortedSample:
    """A sample of float64 values and a sorted copy: order statistics without a partition per question.

    Parameters
    ----------
    values : ndarray of float64, shape (n,)
        n >= 1, no NaN.
    srt : ndarray, optional
        ``numpy.sort(values)`` when already known.

    Notes
    -----
    Every statistic here is a function of the values' order statistics (the multiset of values), so it
    is taken from the sorted copy and gives numpy's own number on the values as they are: medians and
    percentiles by numpy on the sorted copy, histograms by :func:`sorted_histogram`, the median
    absolute deviation about a centre from two ordered runs (:meth:`abs_dev_median`). Only means, whose
    float sums depend on the order of the terms, are left to the values in their own order.
    """

    def __init__(self, values: np.ndarray, srt: np.ndarray | None = None):
        self.values = values
        self.srt = np.sort(values) if srt is None else srt

    @property
    def size(self) -> int:
        return self.srt.size

    def abs_dev_sorted(self, centre: float) -> tuple[np.ndarray, np.ndarray]:
        """``|values - centre|`` as two ascending runs (below the centre, reversed; from it upwards).

        ``|x - c|`` of the sorted values falls, then rises: ``x - c`` is rounded monotonically, so it
        is negative exactly where ``x < c`` and never decreases.
        """
        dev = np.abs(self.srt - centre)
        p = int(np.searchsorted(self.srt, centre, side="left"))
        return dev[:p][::-1], dev[p:]

    def abs_dev_median(self, centre: float):
        """``numpy.median(numpy.abs(values - centre))``, from the two ascending runs of the deviations."""
        a, b = self.abs_dev_sorted(centre)
        n = a.size + b.size
        middle = [_kth_of_two(a, b, k) for k in sorted({(n - 1) // 2, n // 2})]
        # numpy's median is the mean of the middle one or two order statistics: the same mean of the same values
        return np.median(np.array(middle, dtype=self.srt.dtype))

    def within(self, centre: float, reach: float) -> np.ndarray:
        """The sorted values with ``|x - centre| <= reach`` (``values[|values - centre| <= reach]``, sorted)."""
        keep = np.abs(self.srt - centre) <= reach
        idx = np.flatnonzero(keep)
        return self.srt[idx[0]:idx[-1] + 1] if idx.size else self.srt[:0]


def _kth_of_two(a: np.ndarray, b: np.ndarray, k: int):
    """The value of rank ``k`` (0: the smallest) of two ascending arrays taken together."""
    lo, hi = max(0, k + 1 - b.size), min(k + 1, a.size)
    while lo < hi:  # the fewest taken from a such that a's next is no smaller than the last taken from b
        i = (lo + hi) // 2
        if a[i] < b[k - i]:
            lo = i + 1
        else:
            hi = i
    i, j = lo, k + 1 - lo
    if i == 0:
        return b[j - 1]
    if j == 0:
        return a[i - 1]
    return max(a[i - 1], b[j - 1])


def sorted_histogram_mode(sample: SortedSample) -> float:
    """:func:`histogram_mode` of ``sample.values``, from its sorted copy: the same number (tests/test_sorted_stats.py)."""
    mode, width = _sorted_coarse_mode(sample.srt)
    spread = 1.4826 * float(sample.abs_dev_median(mode))
    if width > 0.25 * spread > 0:
        near = sample.within(mode, 4 * spread)
        if near.size >= 64:
            mode, _ = _sorted_coarse_mode(near)
    return mode


def _sorted_coarse_mode(srt: np.ndarray) -> tuple[float, float]:
    """:func:`_coarse_mode` of sorted values."""
    lo, hi = np.percentile(srt, (0.5, 99.5))
    if hi <= lo:
        return float(np.median(srt)), 0.0
    bins = int(np.clip(np.sqrt(srt.size), 16, 256))
    hist, edges = sorted_histogram(srt, bins, (lo, hi))
    hist = ndi.gaussian_filter1d(hist.astype(float), 2.0)
    k = int(np.argmax(hist))
    return float(0.5 * (edges[k] + edges[k + 1])), float(edges[1] - edges[0])
