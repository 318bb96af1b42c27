"""Step ``flatten-background``: denoise, flatten illumination, fix polarity.

The output image has the grains bright on a dark, flat background, scaled so
that the background sits at 0 and a typical grain at about 1. Everything that
has a physical scale is set in nm and converted with the frame's pixel size.

Method, in order:

1. Robust normalisation of the raw frame to [0, 1] (0.1 / 99.9 percentiles).
2. Denoising suited to Poisson + Gaussian detector noise: the noise level
   function ``var(I) = a I + b`` is fitted from neighbour differences binned by
   intensity, the generalised Anscombe transform [1]_ makes the noise roughly
   constant, a Gaussian (default), bilateral or non-local-means filter with a
   wavelet noise estimate (:func:`skimage.restoration.estimate_sigma` when
   PyWavelets is installed, the same estimator on Haar details otherwise)
   smooths it, and
   the algebraic inverse brings the intensities back.
3. Background estimate on a block-averaged copy: a robust quadratic surface
   (sigma-clipped least squares, grains on both sides rejected), then a masked
   Gaussian (normalised convolution [2]_) of the remaining background residual
   at the scale ``background_nm``. Pixels that look like grains are masked out
   of both fits, so grains larger than the scale are interpolated under, not
   flattened away. Once the polarity is known the background level and noise
   are those of the background's own histogram peak, on the side away from
   the grains, even where grains cover most of the frame
   (:mod:`grainhabit.plugins.preprocess.background_peak`).
4. Polarity: the strong edges of the flattened frame vote for the side round
   which they bend (grains are convex bodies; :mod:`grainhabit.plugins.preprocess.polarity`),
   which holds however much of the frame the grains cover. The confidence is
   the absolute mean vote; below 0.1 a note is added to the frame.

Frame-wide quantities (normalisation percentiles, noise model, background
surface, polarity, grain level) are computed by :func:`frame_levels` from a
stream of regions of the frame and then applied to any window of it by
:func:`apply_levels`, so that a frame too large for one worker's memory is
processed tile by tile with the same result as in one piece
(:mod:`grainhabit.chain_tiles`). Polarity and the grain level are taken on
a regular sample of at most :data:`SAMPLE_PIXELS` pixels (every pixel of
frames up to that size), the normalising percentiles on a sparser subgrid of
it. From the normalised frame on, frame-sized arrays are float32
(:data:`WORK_DTYPE`).
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo
from grainhabit.plugins.preprocess.background_peak import (  # noqa: F401  (one_sided_sigma: used by tests)
    background_peak, one_sided_sigma, otsu_of, peak_sigma,
)
from grainhabit.plugins.preprocess import smoothing_scale
from grainhabit.plugins.preprocess.plateau_edges import decide_polarity
from grainhabit.plugins.common.drawn_panels import drawn_panels
from grainhabit.plugins.common.image_stats import (
    CLIP_SIGMAS, LEVEL_SAMPLES, clipped_sigma, percentiles, regular_subsample, select_median,
)

GRAINHABIT_API = 1

STEP = StepInfo(
    name="flatten-background",
    stage="preprocess",
    version="1.9",
    summary="Variance-stabilised denoising, masked large-scale background removal, automatic polarity.",
    params=(
        Param("background_nm", float, 4000.0, unit="nm", low=0.0,
              doc="Scale (Gaussian sigma) of the illumination background; should exceed the largest grain."),
        Param("denoise", str, "gaussian", choices=("gaussian", "bilateral", "nlmeans", "none"),
              doc="Filter applied after variance stabilisation."),
        Param("smooth_nm", float, None, unit="nm", low=0.0,
              doc="Gaussian denoising sigma; unset: one pixel, or 2 or 3 px on a noisy frame whose grains "
                  "stand under 10 background sigmas at one pixel and reach 10 at the wider scale, or show on "
                  "far more of the frame there (chosen per frame)."),
        Param("polarity", str, "auto", choices=("auto", "bright", "dark"),
              doc="Contrast of grains in the raw frame: detect, or force bright-on-dark / dark-on-bright."),
    ),
)

#: Below this confidence (mean vote of the edges, see grainhabit.plugins.preprocess.polarity) an
#: auto-detected polarity gets a note.
LOW_CONFIDENCE = 0.1
#: The grain level is at least this many background sigmas (a frame without grains stays dark).
NOISE_FLOOR_SIGMAS = 10.0
#: The surface fitted with the narrow clip and Otsu's cut is kept when it leaves a background peak narrower
#: than this fraction of the other's (see fit_surface).
NARROWER_PEAK = 0.5
#: The narrow clip's surface is refused where a plane explains this share of its change from the wide one's
#: and the wide one keeps more blocks at the background (see tilted_away).
TILT_SHARE = 0.95
#: Lower clip of the output: background noise stays visible around 0.
LOW_CLIP = -0.25
#: Pixel differences used by the noise model, and pixels used for a background mode and sigma (regular
#: subsamples of larger frames; the estimates' standard errors are then well under 1 %).
NOISE_SAMPLES = 300_000
#: Pixels of the regular sample for frame-wide percentiles, polarity and grain level: every pixel of a frame
#: up to this size, every k-th row and column of a larger one.
SAMPLE_PIXELS = 4_000_000
#: Dtype of the frame-sized arrays from the normalised image on. float32 rounds to 6e-8 of a value; the
#: variance-stabilised values reach a few hundred, so the denoised image carries errors of about
#: 1e-7 x (1 + b / a) in normalised units (:func:`noise_model`), far below the noise it removes.
WORK_DTYPE = np.float32
#: Dtype of the grids of denoised values in :func:`frame_levels` (polarity, grain level, background mode).
#: The denoised values are WORK_DTYPE, so it holds them exactly, in half the memory of float64; every
#: difference taken with them is float64 (tests/test_image_stats_exact.py checks float64 grids give the same).
GRID_DTYPE = WORK_DTYPE
#: Bytes of one band of rows in the row pass of :func:`gaussian_nearest` (fits a processor's L2 cache).
CACHE_BAND_BYTES = 262_144


def _check_image(image) -> np.ndarray:
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise ValueError(f"image must be 2-D (rows, cols), got shape {arr.shape}")
    if min(arr.shape) < 8:
        raise ValueError(f"image must be at least 8 x 8 pixels, got shape {arr.shape}")
    arr = arr.astype(np.float64, copy=False)
    if not np.all(np.isfinite(arr)):
        raise ValueError("image contains NaN or infinite values")
    return arr


def _check_positive(name: str, value: float) -> float:
    value = float(value)
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    return value


def normalise(image: np.ndarray, low_pct: float = 0.1, high_pct: float = 99.9) -> np.ndarray:
    """Scale an image linearly so that two percentiles map to 0 and 1.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Any real intensities.
    low_pct, high_pct : float
        Percentiles mapped to 0 and 1.

    Returns
    -------
    ndarray of float64, shape (rows, cols)
        Not clipped; a flat image gives all zeros.
    """
    arr = _check_image(image)
    lo, hi = np.percentile(arr, [low_pct, high_pct])
    if hi <= lo:
        return np.zeros_like(arr)
    return (arr - lo) / (hi - lo)


def noise_model(image: np.ndarray, n_bins: int = 16) -> tuple[float, float]:
    """Fit the noise level function ``var(I) = a * I + b``.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Normalised intensities.
    n_bins : int
        Number of intensity quantile bins.

    Returns
    -------
    a, b : float
        Signal-dependent (Poisson-like) and constant (Gaussian) parts of the
        variance, both >= 0, in the units of ``image``.

    Notes
    -----
    Differences of vertically adjacent pixels, ``d = (I[r+1] - I[r]) / sqrt(2)``
    (disjoint row pairs, columns subsampled to about :data:`NOISE_SAMPLES`),
    have the pixel noise variance where the signal is locally flat. In each
    bin of local mean ``(I[r+1] + I[r]) / 2`` the variance is taken robustly as
    ``(1.4826 * MAD(d))**2`` so edges do not inflate it; a non-negative least
    squares line through the bins gives ``a`` and ``b``. Blur correlates
    neighbours and scales both parts alike; that leaves the shape of the
    stabilising transform unchanged.
    """
    arr = _check_image(image)
    # disjoint pairs of adjacent rows (0-1, 2-3, ...), every k-th column: about NOISE_SAMPLES differences
    rows = (arr.shape[0] // 2) * 2
    cstep = pair_column_step(arr.shape)
    return noise_model_from_pairs(arr[0:rows:2, ::cstep], arr[1:rows:2, ::cstep], n_bins)


def pair_column_step(shape: tuple) -> int:
    """Column step of the row pairs :func:`noise_model` uses (about :data:`NOISE_SAMPLES` pairs)."""
    rows = (shape[0] // 2) * 2
    return max(1, int(round((rows // 2) * shape[1] / NOISE_SAMPLES)))


def noise_model_from_pairs(top: np.ndarray, bottom: np.ndarray, n_bins: int = 16) -> tuple[float, float]:
    """:func:`noise_model` from its row pairs (pixel ``top`` lies just above pixel ``bottom``).

    Parameters
    ----------
    top, bottom : ndarray, same shape
        Normalised intensities of vertically adjacent pixels.
    n_bins : int

    Returns
    -------
    a, b : float
    """
    top, bottom = np.asarray(top, float), np.asarray(bottom, float)
    d = ((bottom - top) / np.sqrt(2.0)).ravel()
    m = (0.5 * (bottom + top)).ravel()
    # numpy's quantiles of the sorted copy: the same order statistics, so the same edges (image_stats.percentiles)
    edges = np.unique(np.quantile(np.sort(m), np.linspace(0, 1, n_bins + 1)))
    if len(edges) < 3:
        return 0.0, float(np.var(d))
    idx = quantile_bins(edges, m)
    # group the samples by bin with one (radix) sort instead of one mask per bin
    order = np.argsort(idx, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(idx, minlength=len(edges) - 1))])
    d_sorted, m_sorted = d[order], m[order]
    means, variances = [], []
    for k in range(len(edges) - 1):
        dk = d_sorted[bounds[k]:bounds[k + 1]]
        if dk.size < 50:
            continue
        mad = select_median(np.abs(dk - select_median(dk)))  # np.median's numbers, by selection
        means.append(np.mean(m_sorted[bounds[k]:bounds[k + 1]]))
        variances.append((1.4826 * mad) ** 2)
    if len(means) < 2:
        return 0.0, float(np.var(d))
    return nonnegative_line(np.asarray(means), np.asarray(variances))


def quantile_bins(edges: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Bin of each value: ``clip(searchsorted(edges, values, side="right") - 1, 0, len(edges) - 2)`` as int16.

    Parameters
    ----------
    edges : ndarray of float, shape (k,)
        Increasing bin edges, 2 <= k <= 1000.
    values : ndarray of float, shape (n,)

    Returns
    -------
    ndarray of int16, shape (n,)
        The number of edges at or below each value, less one, clipped to the bins. Without NaN among
        the values (the normalised row pairs of a frame) that count is summed from one comparison per
        edge, several times cheaper than numpy's binary search of ~3e5 unsorted values among 17 edges
        (the same bins, tests/test_seg9_kernels_exact.py); with NaN numpy's search decides.
    """
    edges = np.asarray(edges)
    values = np.asarray(values)
    if len(edges) > 1000 or np.isnan(values).any() or np.isnan(edges).any():
        return np.clip(np.searchsorted(edges, values, side="right") - 1, 0, len(edges) - 2).astype(np.int16)
    count = np.zeros(values.shape, np.int16)
    for e in edges:
        count += values >= e
    count -= 1
    return np.clip(count, 0, len(edges) - 2, out=count)


def nonnegative_line(x: np.ndarray, y: np.ndarray) -> tuple[float, float]:
    """Least-squares line ``y = a x + b`` with ``a, b >= 0`` (non-negative least squares).

    Parameters
    ----------
    x, y : ndarray, shape (k,)

    Returns
    -------
    a, b : float

    Notes
    -----
    ``scipy.optimize.nnls`` [1]_ on the design ``[x, 1]``.

    References
    ----------
    .. [1] C. L. Lawson and R. J. Hanson, "Solving Least Squares Problems",
       Prentice-Hall, 1974, chapter 23.
    """
    from scipy.optimize import nnls

    x, y = np.asarray(x, float), np.asarray(y, float)
    (a, b), _ = nnls(np.column_stack([x, np.ones_like(x)]), y)
    return float(a), float(b)


def anscombe(image: np.ndarray, a: float, b: float) -> np.ndarray:
    """Generalised Anscombe transform for Poisson + Gaussian noise.

    Parameters
    ----------
    image : ndarray
        Intensities with ``var(I) = a * I + b``.
    a, b : float
        Noise level function from :func:`noise_model`; ``a > 0``.

    Returns
    -------
    ndarray
        ``f(I) = (2 / a) * sqrt(max(a * I + 3 a^2 / 8 + b, 0))``, whose noise
        has unit variance.

    References
    ----------
    .. [1] M. Makitalo and A. Foi, "Optimal inversion of the generalized
       Anscombe transformation for Poisson-Gaussian noise", IEEE Trans. Image
       Process. 22(1), 91-103, 2013, doi:10.1109/TIP.2012.2202675
    """
    return (2.0 / a) * np.sqrt(np.maximum(a * image + 0.375 * a * a + b, 0.0))


def inverse_anscombe(values: np.ndarray, a: float, b: float) -> np.ndarray:
    """Algebraic inverse of :func:`anscombe` (monotone, enough before thresholding)."""
    return ((0.5 * a * values) ** 2 - 0.375 * a * a - b) / a


def noise_sigma(image: np.ndarray) -> float:
    """Standard deviation of white noise in an image (wavelet MAD estimator).

    Parameters
    ----------
    image : ndarray, shape (rows, cols)

    Returns
    -------
    float
        ``median(|HH|) / 0.6745`` of the finest diagonal wavelet detail.

    Notes
    -----
    Uses :func:`skimage.restoration.estimate_sigma` (Daubechies-2 wavelet)
    when PyWavelets is installed; otherwise the same estimator on the Haar
    diagonal detail ``HH = (I00 - I01 - I10 + I11) / 2`` of 2 x 2 blocks.

    References
    ----------
    .. [3] D. L. Donoho and I. M. Johnstone, "Ideal spatial adaptation by
       wavelet shrinkage", Biometrika 81(3), 425-455, 1994,
       doi:10.1093/biomet/81.3.425
    """
    arr = np.asarray(image, float)
    try:
        # without PyWavelets, skip scikit-image's estimator (its module imports scipy.stats, 0.4 s per worker)
        if not _have_pywavelets():
            raise ImportError("PyWavelets is not installed")
        from skimage.restoration import estimate_sigma

        return float(estimate_sigma(arr))
    except ImportError:
        r, c = (arr.shape[0] // 2) * 2, (arr.shape[1] // 2) * 2
        a = arr[:r, :c]
        hh = (a[0::2, 0::2] - a[0::2, 1::2] - a[1::2, 0::2] + a[1::2, 1::2]) / 2.0
        return float(np.median(np.abs(hh)) / 0.6745)


@functools.lru_cache(maxsize=1)
def _have_pywavelets() -> bool:
    """Whether PyWavelets can be imported (looked up once per process, not per frame)."""
    import importlib.util

    return importlib.util.find_spec("pywt") is not None


def denoise(image: np.ndarray, method: str = "gaussian", sigma_px: float = 1.0) -> tuple[np.ndarray, float]:
    """Variance-stabilise, filter and invert.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Normalised intensities.
    method : {"gaussian", "bilateral", "nlmeans", "none"}
        Filter applied in the stabilised domain.
    sigma_px : float
        Spatial sigma in pixels (Gaussian and bilateral).

    Returns
    -------
    denoised : ndarray of float64, shape (rows, cols)
    noise_sigma : float
        Noise standard deviation in the stabilised domain (:func:`noise_sigma`).
    """
    arr = _check_image(image)
    if method not in ("gaussian", "bilateral", "nlmeans", "none"):
        raise ValueError(f"unknown denoise method {method!r}")
    a, b = noise_model(arr)
    use_vst = a > 1e-9 and a > 1e-3 * b / max(float(np.mean(arr)), 1e-6)
    work = anscombe(arr, a, b) if use_vst else arr
    sigma = noise_sigma(work)
    if method == "none" or sigma_px <= 0:
        out = work
    elif method == "gaussian":
        out = ndi.gaussian_filter(work, sigma_px, mode="nearest")
    elif method == "bilateral":
        # imported here: scikit-image's denoisers import scipy.stats (0.4 s in a fresh worker)
        from skimage.restoration import denoise_bilateral

        lo, hi = float(work.min()), float(work.max())
        span = hi - lo if hi > lo else 1.0
        out = denoise_bilateral((work - lo) / span, sigma_color=max(2.0 * sigma / span, 1e-3),
                                sigma_spatial=max(sigma_px, 0.5)) * span + lo
    else:
        from skimage.restoration import denoise_nl_means

        out = denoise_nl_means(work, h=0.8 * sigma, sigma=sigma, patch_size=5,
                               patch_distance=6, fast_mode=True)
    if use_vst:
        out = inverse_anscombe(out, a, b)
    return out, sigma


def _poly_design(shape, order: int = 2) -> np.ndarray:
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(float)
    y = 2.0 * yy.ravel() / max(shape[0] - 1, 1) - 1.0
    x = 2.0 * xx.ravel() / max(shape[1] - 1, 1) - 1.0
    # columns by total degree: 1, x, y, x^2, xy, y^2, ...
    cols = [x ** (d - j) * y ** j for d in range(order + 1) for j in range(d + 1)]
    return np.column_stack(cols)


def estimate_background(image: np.ndarray, pixel_size_nm: float, background_nm: float = 4000.0,
                        grain_sign: int = 0) -> tuple[np.ndarray, np.ndarray, float]:
    """Large-scale background with grains masked out.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Denoised, normalised frame.
    pixel_size_nm : float
        Pixel side in nm.
    background_nm : float
        Gaussian sigma of the background in nm (0: quadratic surface only).
    grain_sign : {-1, 0, 1}
        Side of the background on which grains lie; 0 rejects both sides.

    Returns
    -------
    background : ndarray of float64, shape (rows, cols)
    is_background : ndarray of bool, shape (rows, cols)
        Pixels used as background in the last pass.
    sigma : float
        Robust standard deviation of the background residual.

    Notes
    -----
    On a copy block-averaged by ``f = round(background_px / 8)`` (at least 64 pixels left per side), a
    quadratic surface ``sum c_ij x^i y^j (i + j <= 2)`` is fitted by least
    squares to pixels within 3 sigma of the residual mode (five passes, of
    order 0, 1, 2, 2, 2, each on the previous pass's background pixels); the
    remaining background residual is smoothed by normalised convolution,
    ``G * (m r) / G * m`` with the background mask ``m`` [2]_, and the sum is
    interpolated back to full size (bilinear).

    References
    ----------
    .. [2] H. Knutsson and C.-F. Westin, "Normalized and differential
       convolution", Proc. IEEE CVPR, 515-523, 1993, doi:10.1109/CVPR.1993.341081
    """
    from skimage.transform import downscale_local_mean

    arr = _check_image(image)
    px = _check_positive("pixel_size_nm", pixel_size_nm)
    if background_nm < 0 or not np.isfinite(background_nm):
        raise ValueError(f"background_nm must be >= 0, got {background_nm!r}")
    scale_px = background_nm / px
    f = block_factor(arr.shape, scale_px)
    small = downscale_local_mean(arr, (f, f))
    # the last row/column block may be partial (zero padded): drop it if so
    small = small[: arr.shape[0] // f or 1, : arr.shape[1] // f or 1]
    surface = fit_surface(small, scale_px / f, grain_sign)
    bg = upsample_bilinear(surface, arr.shape)
    r_sub = regular_subsample(arr, LEVEL_SAMPLES) - regular_subsample(bg, LEVEL_SAMPLES)
    # grains on one side: the background is the peak on the other side and its free half gives the
    # noise, however much of the frame the grains cover (grainhabit.plugins.preprocess.background_peak)
    m, s_full = background_peak(r_sub, grain_sign)
    bg = bg + m
    dev = (arr - bg) / s_full
    is_bg = np.abs(dev) < CLIP_SIGMAS
    return bg, is_bg, s_full


def block_factor(shape: tuple, scale_px: float) -> int:
    """Side (px) of the blocks averaged before the background fit.

    Parameters
    ----------
    shape : tuple of int
        (rows, cols) of the frame.
    scale_px : float
        Background scale in pixels (0: quadratic surface only).

    Returns
    -------
    int
        ``round(scale_px / 8)``, at least 1, leaving at least 64 blocks per
        side (``min(shape) // 128`` without a background scale).
    """
    if scale_px > 0:
        return int(max(1, min(round(scale_px / 8.0), min(shape) // 64)))
    return max(1, min(shape) // 128)


def fit_surface(small: np.ndarray, scale_blocks: float, grain_sign: int = 0) -> np.ndarray:
    """Background surface of a block-averaged frame, grains masked out.

    Parameters
    ----------
    small : ndarray, shape (r, c)
        Block means of the denoised, normalised frame.
    scale_blocks : float
        Background scale in blocks (0: quadratic surface only).
    grain_sign : {-1, 0, 1}
        Side of the background on which grains lie; 0 rejects both sides.

    Returns
    -------
    ndarray of float64, shape (r, c)
        Robust quadratic surface plus the normalised convolution of the
        remaining background residual (see :func:`estimate_background`).

    Notes
    -----
    With a known grain side the fit is made twice: with a 3-sigma clip of
    the two-sided clipped sd, and with a 3-sigma clip of the sd of the
    background peak's free side (:func:`background_peak`) with the blocks of
    Otsu's grain class left out as well. An uneven background widens its own
    peak before the surface follows it, and a clip of that wide peak then
    takes grains in (grains covering much of the frame pull the surface up
    to them); the narrow clip and Otsu's classes, on the other hand, cut a
    strong illumination gradient in two. The second surface is kept when
    the background peak it leaves (half width at half maximum,
    :func:`peak_sigma`) is narrower than :data:`NARROWER_PEAK` times the
    first one's.
    """
    if not grain_sign:
        return _fit_surface(small, scale_blocks, 0, False)
    widths, surfaces, residuals = [], [], []
    for otsu_cut in (False, True):
        surfaces.append(_fit_surface(small, scale_blocks, grain_sign, otsu_cut))
        r = small - surfaces[-1]
        m, sd = background_peak(r, grain_sign)
        widths.append(min(sd, peak_sigma(r, m, -grain_sign)))
        residuals.append(r - m)
    # the narrow clip cuts a peak's top narrower wherever it leaves the rest of the background: it must
    # halve the width to be taken
    if not widths[1] < NARROWER_PEAK * widths[0]:
        return surfaces[0]
    # ... and it must not merely tilt the wide clip's surface away from most of the background: Otsu's
    # class can be one side of an illumination gradient (few or small grains), and the narrow fit to the
    # other side then leaves that one drifting off by a plane
    if tilted_away(residuals[0], residuals[1], surfaces[1] - surfaces[0], CLIP_SIGMAS * widths[1]):
        return surfaces[0]
    return surfaces[1]


def tilted_away(wide: np.ndarray, narrow: np.ndarray, change: np.ndarray, band: float) -> bool:
    """Whether the narrow clip's surface is the wide one tilted off most of the background.

    Parameters
    ----------
    wide, narrow : ndarray, shape (r, c)
        Block residuals of the two surfaces, each less its background peak's mode.
    change : ndarray, shape (r, c)
        Narrow surface minus wide surface.
    band : float
        Half width of the band round the mode that counts a block as background.

    Returns
    -------
    bool
        True when a plane explains at least :data:`TILT_SHARE` of the change's variance and the wide
        surface leaves more blocks within ``band`` than the narrow one. Grains that pull the wide surface
        up (packed frames) bend it under themselves, not by a plane over the frame, and leave fewer
        blocks at the background than the narrow fit does.
    """
    kept_wide = int(np.count_nonzero(np.abs(wide) < band))
    kept_narrow = int(np.count_nonzero(np.abs(narrow) < band))
    if kept_wide <= kept_narrow:
        return False
    d = change.ravel()
    if d.var() <= 0:
        return False
    plane = _poly_design(change.shape)[:, :3]
    rest = d - plane @ least_squares(plane, d)
    return bool(1.0 - rest.var() / d.var() >= TILT_SHARE)


def _fit_surface(small: np.ndarray, scale_blocks: float, grain_sign: int, otsu_cut: bool) -> np.ndarray:
    """:func:`fit_surface` with or without the blocks of Otsu's grain class left out."""
    A = _poly_design(small.shape)
    z = small.ravel()
    mask = np.ones(z.size, bool)
    s = 1.0
    # raise the order step by step: a quadratic fitted to every pixel would
    # follow a large central grain, a constant's mode cannot
    for order in (0, 1, 2, 2, 2):
        n_terms = (order + 1) * (order + 2) // 2
        coef = least_squares(A[mask][:, :n_terms], z[mask])
        surface_flat = A[:, :n_terms] @ coef
        r = z - surface_flat
        m, s_free = background_peak(r.reshape(small.shape), grain_sign)
        # the two-sided clipped sd, or the sd of the background peak's free side with Otsu's cut
        s = s_free if otsu_cut else clipped_sigma(r, m)
        dev = (r - m) / s
        if grain_sign:
            dev *= grain_sign
            mask = (dev < CLIP_SIGMAS) & (dev > -2 * CLIP_SIGMAS)
            if otsu_cut:
                # never the blocks within a sigma of the background's mode
                mask &= grain_sign * r <= max(otsu_of(grain_sign * r), grain_sign * m + s)
        else:
            mask = np.abs(dev) < CLIP_SIGMAS
        if mask.sum() < A.shape[1] * 4:
            mask = np.ones(z.size, bool)
            break
    surface = surface_flat.reshape(small.shape)
    resid = small - surface
    mask2 = ndi.binary_erosion(mask.reshape(small.shape), iterations=1, border_value=1)
    if mask2.sum() < 16:
        mask2 = mask.reshape(small.shape)
    if scale_blocks > 0:
        w = ndi.gaussian_filter(mask2.astype(float), scale_blocks, mode="reflect")
        num = ndi.gaussian_filter(np.where(mask2, resid, 0.0), scale_blocks, mode="reflect")
        smooth = np.where(w > 1e-3, num / np.maximum(w, 1e-3), 0.0)
        surface = surface + smooth
    return surface


def least_squares(a: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Least-squares coefficients ``c`` minimising ``|a c - z|`` by the normal equations.

    Parameters
    ----------
    a : ndarray, shape (n, k)
        Design matrix of full column rank (here the polynomial terms of
        :func:`_poly_design` on coordinates scaled to [-1, 1], at most 6
        columns, their Gram matrix well conditioned).
    z : ndarray, shape (n,)

    Returns
    -------
    ndarray, shape (k,)

    Notes
    -----
    ``solve(a^T a, a^T z)``: for a few well-conditioned columns the same
    solution as :func:`numpy.linalg.lstsq` (an SVD) to about 1e-12 relative
    (``tests/test_preprocess_speed.py`` keeps ``lstsq`` as the reference),
    several times cheaper on the 64 x 64 block grid, where the SVD's call
    overhead and threads dominate. A singular Gram matrix (fewer distinct
    points than terms) falls back to ``lstsq``.
    """
    a = np.asarray(a, float)
    z = np.asarray(z, float)
    try:
        return np.linalg.solve(a.T @ a, a.T @ z)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(a, z, rcond=None)[0]


def sample_step(shape: tuple, n: int) -> int:
    """Step of the regular grid with at most about ``n`` pixels (the step of :func:`regular_subsample`)."""
    return max(1, int(np.ceil(np.sqrt(shape[0] * shape[1] / n))))


def _grid_part(core: tuple, window: tuple, step: int, first_row: int = 0) -> tuple:
    """Where a core's pixels on a regular grid lie: (slices into the window, slices into the grid array)."""
    out_w, out_g = [], []
    for axis, start0 in ((0, first_row), (1, 0)):
        c, w = core[axis], window[axis]
        first = start0 + -(-(c.start - start0) // step) * step if c.start > start0 else start0
        stop = c.stop
        if first >= stop:
            return None
        out_w.append(slice(first - w.start, stop - w.start, step))
        g0 = (first - start0) // step
        out_g.append(slice(g0, g0 + len(range(first, stop, step))))
    return tuple(out_w), tuple(out_g)


def _grid_shape(shape: tuple, step: int) -> tuple:
    return (-(-shape[0] // step), -(-shape[1] // step))


def _grid_coords(shape: tuple, step: int) -> tuple:
    return np.arange(0, shape[0], step), np.arange(0, shape[1], step)


def _finite(raw, window) -> np.ndarray:
    """``raw`` as an array of its own dtype, refused with a one-line error if it holds NaN or infinity.

    One float64 sum checks a float array (a NaN or infinity makes it so); only where the sum is not
    finite (that, or values near the float64 limit) are the pixels tested one by one.
    """
    arr = np.asarray(raw)
    if arr.dtype.kind not in "biuf":
        arr = arr.astype(np.float64)
    if arr.dtype.kind == "f" and not np.isfinite(arr.sum(dtype=np.float64)) and not np.all(np.isfinite(arr)):
        raise ValueError(f"image contains NaN or infinite values (rows {window[0].start}-{window[0].stop - 1}, "
                         f"cols {window[1].start}-{window[1].stop - 1})")
    return arr


def _normalised(raw: np.ndarray, levels: dict) -> np.ndarray:
    """``(raw - lo) / span`` in :data:`WORK_DTYPE` (all zeros for a flat frame), a new array.

    ``lo`` and ``span`` only bring the values near [0, 1]: the noise model,
    the stabilising transform, the filters, the background and the grain
    level all follow an affine change of the intensities, so the step's
    output does not depend on them beyond rounding (they are the 0.1 and
    99.9 percentiles of a regular grid of about :data:`LEVEL_SAMPLES` pixels,
    see :func:`frame_levels`).
    """
    if levels["span"] <= 0:
        return np.zeros(np.shape(raw), WORK_DTYPE)
    out = np.subtract(raw, WORK_DTYPE(levels["lo"]), dtype=WORK_DTYPE)
    out *= WORK_DTYPE(1.0 / levels["span"])
    return out


def block_sums(a: np.ndarray, first: int, f: int) -> np.ndarray:
    """Sums of the rows of ``a`` over blocks of ``f`` frame rows, in float64.

    Parameters
    ----------
    a : ndarray, shape (n, cols)
        Rows ``first`` to ``first + n - 1`` of a frame (any float dtype).
    first : int
        Frame row of ``a[0]``.
    f : int
        Block side (px); block ``k`` holds frame rows ``k f`` to ``k f + f - 1``.

    Returns
    -------
    ndarray of float64, shape (last // f - first // f + 1, cols)
        Row ``i`` sums the rows of ``a`` in block ``first // f + i`` (a
        partial sum where ``a`` holds part of the block).

    Notes
    -----
    The rows are added in the order of their place in the block (``f``
    whole-array additions of every ``f``-th row), the same for every block
    whatever the memory layout of ``a``: a block held whole by one region
    of a frame gets the same sum in any cut of the frame.
    """
    n = a.shape[0]
    b0 = first // f
    out = np.zeros(((first + n - 1) // f - b0 + 1, a.shape[1]))
    for j in range(f):
        o = (j - first) % f  # the first row of a at place j of its block
        if o >= n:
            continue
        rows = a[o::f]
        b = (first + o) // f - b0
        out[b:b + rows.shape[0]] += rows
    return out


def denoise_reach(method: str, smooth_px: float) -> int:
    """Pixels around a window that :func:`apply_levels` needs to give the whole frame's values there."""
    if method == "gaussian" and smooth_px > 0:
        return int(4.0 * smooth_px + 0.5) + 1  # scipy's Gaussian radius at truncate = 4
    return 0


def raw_levels(regions, shape: tuple) -> dict:
    """The first pass of :func:`frame_levels`: what the raw values alone give (no smoothing scale).

    Parameters
    ----------
    regions : callable
        As for :func:`frame_levels` (read with no halo).
    shape : tuple of int
        (rows, cols) of the whole frame.

    Returns
    -------
    dict
        ``lo``, ``span`` (normalisation), ``a``, ``b``, ``use_vst`` (noise model), ``shape`` and
        ``raw_sample`` (the raw values on the grid of :data:`SAMPLE_PIXELS` pixels, float64).

    Notes
    -----
    Raw values on a regular grid of at most :data:`SAMPLE_PIXELS` pixels (percentiles, from its
    subgrid of about :data:`LEVEL_SAMPLES` pixels unless that sees one value only), the row pairs of
    :func:`noise_model` and the frame's mean. None of it depends on the denoising, so the trial
    scales of :func:`~grainhabit.plugins.preprocess.smoothing_scale.levels_at_best_scale` share one
    pass (the same numbers as a pass per scale).
    """
    rows_f, cols_f = int(shape[0]), int(shape[1])
    if min(rows_f, cols_f) < 8:
        raise ValueError(f"image must be at least 8 x 8 pixels, got shape {tuple(shape)}")
    k_s = sample_step(shape, SAMPLE_PIXELS)
    cstep = pair_column_step(shape)
    n_pairs = rows_f // 2
    raw_s = np.zeros(_grid_shape(shape, k_s))
    top = np.zeros((n_pairs, -(-cols_f // cstep)))
    bottom = np.zeros_like(top)
    total = 0.0
    for core, window, raw in regions(0):
        arr = _finite(raw, window)
        part = _grid_part(core, window, k_s)
        if part:
            raw_s[part[1]] = arr[part[0]]
        total += float(arr[core[0].start - window[0].start:core[0].stop - window[0].start,
                           core[1].start - window[1].start:core[1].stop - window[1].start].sum(dtype=np.float64))
        r0, r1 = core[0].start, min(core[0].stop, 2 * n_pairs)
        if r1 > r0:
            if r0 % 2:
                raise ValueError("regions must start on even rows")
            wr = slice(r0 - window[0].start, r1 - window[0].start)
            wc = slice(core[1].start - window[1].start, core[1].stop - window[1].start)
            block = arr[wr, wc]
            first = -(-core[1].start // cstep) * cstep
            cols = slice(first - core[1].start, None, cstep)
            g = slice(first // cstep, first // cstep + len(range(first, core[1].stop, cstep)))
            top[r0 // 2:(r1 + 1) // 2, g] = block[0::2, cols][: (r1 - r0) // 2]
            bottom[r0 // 2:(r1 + 1) // 2, g] = block[1::2, cols][: (r1 - r0) // 2]
    # the output does not depend on the affine scaling (see _normalised): a sparser grid serves, unless
    # it sees one value only (a frame almost all background), when the whole sample decides
    lo, hi = percentiles(regular_subsample(raw_s, LEVEL_SAMPLES), [0.1, 99.9])  # np.percentile's numbers
    if hi <= lo:
        lo, hi = percentiles(raw_s, [0.1, 99.9])
    span = float(hi - lo)
    if span <= 0:
        lo, span = float(lo), 0.0
    lv = {"lo": float(lo), "span": span, "shape": (rows_f, cols_f), "raw_sample": raw_s}
    norm = (lambda v: (v - lo) / span) if span > 0 else (lambda v: np.zeros_like(v))
    a, b = noise_model_from_pairs(norm(top), norm(bottom)) if n_pairs else (0.0, 0.0)
    mean = float(norm(np.float64(total / (rows_f * cols_f))))
    lv.update(a=a, b=b, use_vst=bool(a > 1e-9 and a > 1e-3 * b / max(mean, 1e-6)))
    return lv


def frame_levels(regions, shape: tuple, pixel_size_nm: float, background_nm: float = 4000.0,
                 denoise_method: str = "gaussian", smooth_px: float = 1.0, polarity: str = "auto",
                 whole: np.ndarray | None = None, preview: bool = True, raw_pass: dict | None = None) -> dict:
    """Frame-wide quantities of the step, from a stream of regions of the frame.

    Parameters
    ----------
    regions : callable
        ``regions(halo)`` yields ``(core, window, raw)`` for cores that
        partition the frame, each window its core grown by ``halo`` px
        (clipped to the frame), ``raw`` the frame's pixels in the window;
        cores start on even rows.
    shape : tuple of int
        (rows, cols) of the whole frame.
    pixel_size_nm : float
    background_nm, denoise_method, smooth_px, polarity
        As for :func:`flatten`.
    whole : ndarray, optional
        The denoised frame, when one region is the whole frame and it has
        been computed already (bilateral and non-local-means denoising need
        the whole frame: their noise estimate and range are frame-wide).
    preview : bool
        Also return ``preview`` and ``preview_step`` (for the steps after a frame processed by
        tiles); :func:`flatten`, which computes the whole output itself, leaves them out.
    raw_pass : dict, optional
        :func:`raw_levels` of the same regions, when the caller has it (it does not depend on the
        smoothing: :func:`~grainhabit.plugins.preprocess.smoothing_scale.levels_at_best_scale`
        computes it once for all trial scales); computed here otherwise.

    Returns
    -------
    dict
        ``lo``, ``span`` (normalisation), ``a``, ``b``, ``use_vst`` (noise
        model), ``method``, ``smooth_px``, ``surface`` (background on the
        block grid) and ``offset`` (its mode correction), ``sign`` (+1
        bright grains, -1 dark), ``polarity``, ``confidence``, ``level``
        (grain level), ``shape``, ``preview_step`` and ``preview`` (the
        step's output at every ``preview_step``-th row and column, float32).

    Notes
    -----
    Two passes over the regions: raw values on a regular grid of at most
    :data:`SAMPLE_PIXELS` pixels (percentiles, from its subgrid of about
    :data:`LEVEL_SAMPLES` pixels unless that sees one value only), the row
    pairs of :func:`noise_model` and the frame's mean; then the denoised
    frame's block sums in a fixed order (:func:`block_sums`, background fit), its values on the grid of
    :data:`LEVEL_SAMPLES` pixels (background mode and sigma) and on the
    sample grid (polarity and grain level). Every grid is indexed by frame
    coordinates, so the result does not depend on how the frame was cut into
    regions.
    """
    px = _check_positive("pixel_size_nm", pixel_size_nm)
    if background_nm < 0 or not np.isfinite(background_nm):
        raise ValueError(f"background_nm must be >= 0, got {background_nm!r}")
    first = raw_levels(regions, shape) if raw_pass is None else raw_pass
    rows_f, cols_f = first["shape"]
    k_s = sample_step(shape, SAMPLE_PIXELS)
    k_l = sample_step(shape, LEVEL_SAMPLES)
    raw_s = first["raw_sample"]
    lv = {"lo": first["lo"], "span": first["span"], "method": denoise_method, "smooth_px": float(smooth_px),
          "shape": (rows_f, cols_f), "a": first["a"], "b": first["b"], "use_vst": first["use_vst"]}

    scale_px = background_nm / px
    f = block_factor(shape, scale_px)
    nbr, nbc = rows_f // f or 1, cols_f // f or 1
    sums = np.zeros((nbr, nbc))
    x_s = np.zeros(_grid_shape(shape, k_s), GRID_DTYPE)
    x_l = np.zeros(_grid_shape(shape, k_l), GRID_DTYPE)
    reach = 0 if whole is not None else denoise_reach(denoise_method, smooth_px)
    for core, window, raw in regions(reach):
        if whole is not None:
            x = whole[window]
        else:
            x = _denoise_window(_normalised(raw, lv), lv)
            if x.shape == (rows_f, cols_f):
                lv["denoised"] = x  # one region holds the whole frame: apply_levels need not denoise again
        cr = slice(core[0].start - window[0].start, core[0].stop - window[0].start)
        cc = slice(core[1].start - window[1].start, core[1].stop - window[1].start)
        xc = x[cr, cc]
        for grid, step in ((x_s, k_s), (x_l, k_l)):
            part = _grid_part(core, window, step)
            if part:
                grid[part[1]] = x[part[0]]
        # block sums over the full blocks this core touches (a block may span cores: sums add up)
        rb0, cb0 = core[0].start // f, core[1].start // f
        rstop, cstop = min(core[0].stop, nbr * f), min(core[1].stop, nbc * f)
        if rstop > core[0].start and cstop > core[1].start:
            sub = xc[: rstop - core[0].start, : cstop - core[1].start]
            part_sums = block_sums(block_sums(sub, core[0].start, f).T, core[1].start, f).T
            sums[rb0:rb0 + part_sums.shape[0], cb0:cb0 + part_sums.shape[1]] += part_sums
    small = sums / float(f * f) if rows_f >= f and cols_f >= f else sums
    rs, cs = _grid_coords(shape, k_s)
    rl, cl = _grid_coords(shape, k_l)

    def background(sign: int):
        surf = fit_surface(small, scale_px / f if scale_px > 0 else 0.0, sign)
        r_sub = x_l - upsample_bilinear(surf, shape, rl, cl)
        m, sd = background_peak(r_sub, sign)
        return surf, m, sd, r_sub

    if polarity == "auto":
        # which side of the outlines is convex, not which histogram tail is heavier: grains may cover
        # more of the frame than the background (see grainhabit.plugins.preprocess.polarity); on the
        # preview grid (every pixel up to 4 Mpx), so a tiled frame decides as an untiled one. The vote
        # looks at derivatives only: the surface fitted without a grain side serves, without its
        # level (a constant). A weak vote gets a second look at the edges between plateaus alone
        # (grainhabit.plugins.preprocess.plateau_edges)
        surf = fit_surface(small, scale_px / f if scale_px > 0 else 0.0, 0)
        relief = upsample_bilinear(surf, shape, rs, cs)
        pol, conf = decide_polarity(np.subtract(x_s, relief, out=relief))  # x_s - surface, in one frame array
    else:
        pol, conf = polarity, 1.0
    sign = 1 if pol == "bright" else -1
    surf, m, sd, _ = background(sign)
    # sign * (x_s - (surface + m)), written into the interpolated surface (the same operations in float64)
    r = upsample_bilinear(surf, shape, rs, cs)
    r += m
    np.subtract(x_s, r, out=r)
    if sign < 0:
        np.negative(r, out=r)
    grain_side = r > CLIP_SIGMAS * sd
    panels = drawn_panels(raw_s)
    if panels.any():
        # a flat drawn box (behind a panel letter, a data bar) is no grain: it must not set the grain level
        grain_side &= ~panels
    fg = r[grain_side]
    level = float(percentiles(fg, [95])[0]) if fg.size >= 20 else 0.0  # np.percentile(fg, 95)
    # how far the grains stand above the background's noise at this smoothing (smoothing_scale)
    lv["grain_snr"] = level / sd if sd > 0 else float("inf")
    # and on how much of the frame they show at segmentation's noise threshold (SEEN_SIGMAS is above
    # CLIP_SIGMAS, so those pixels are all on the grain side: counted among fg)
    lv["grain_share"] = float(np.count_nonzero(fg > smoothing_scale.SEEN_SIGMAS * sd)) / r.size
    # never stretch pure noise up to grain level
    level = max(level, NOISE_FLOOR_SIGMAS * sd)
    lv.update(surface=surf, offset=float(m), sign=sign, polarity=pol, confidence=float(conf), level=level,
              sigma=float(sd))
    if preview:
        lv.update(preview_step=k_s, preview=np.clip(r / level, LOW_CLIP, 1.0).astype(np.float32))
    return lv


def _denoise_window(x: np.ndarray, lv: dict) -> np.ndarray:
    """Gaussian (or no) denoising of normalised pixels with the frame's noise model.

    :func:`anscombe`, :func:`gaussian_nearest` and :func:`inverse_anscombe`
    computed in place in the dtype of ``x`` (:data:`WORK_DTYPE`); ``x`` is
    overwritten. Each pixel goes through the same arithmetic wherever the
    window lies, so a tile gets the whole frame's values (beyond
    :func:`denoise_reach` of its inner edges).
    """
    a, b, method, sigma_px = lv["a"], lv["b"], lv["method"], lv["smooth_px"]
    if method not in ("gaussian", "none"):
        raise ValueError(f"denoise {method!r} needs the whole frame (its noise estimate and range are "
                         "frame-wide); a frame processed by tiles takes 'gaussian' or 'none'")
    work = x
    dt = work.dtype.type
    if lv["use_vst"]:  # anscombe(), in place
        work *= dt(a)
        work += dt(0.375 * a * a + b)
        np.maximum(work, 0.0, out=work)
        np.sqrt(work, out=work)
        work *= dt(2.0 / a)
    if method == "gaussian" and sigma_px > 0:
        work = gaussian_nearest(work, sigma_px)
    if lv["use_vst"]:  # inverse_anscombe(), in place
        work *= dt(0.5 * a)
        np.square(work, out=work)
        work -= dt(0.375 * a * a + b)
        work *= dt(1.0 / a)
    return work


def apply_levels(raw: np.ndarray, window: tuple, levels: dict, denoised: np.ndarray | None = None) -> np.ndarray:
    """The step's output on one window of a frame, from the frame's levels.

    Parameters
    ----------
    raw : ndarray, shape of the window
        The frame's pixels in ``window``.
    window : tuple of slice
        (rows, cols) of the window in the frame.
    levels : dict
        From :func:`frame_levels`.
    denoised : ndarray, optional
        The denoised, normalised window if already computed.

    Returns
    -------
    ndarray of float32, shape of the window
        ``clip(s (I - B) / L, -0.25, 1)`` (see :func:`flatten`). Pixels
        within :func:`denoise_reach` of an inner edge of the window differ
        from the whole frame's (the filter sees no pixels beyond the edge).
    """
    if denoised is None:
        x = _denoise_window(_normalised(_finite(raw, window), levels), levels)
    else:
        x = denoised
    rows = np.arange(window[0].start, window[0].stop)
    cols = np.arange(window[1].start, window[1].stop)
    # the background (surface plus mode offset, interpolated) in WORK_DTYPE; the result is written over it
    r = upsample_bilinear(levels["surface"] + levels["offset"], levels["shape"], rows, cols, dtype=WORK_DTYPE)
    if levels["sign"] > 0:
        np.subtract(x, r, out=r)
    else:
        np.subtract(r, x, out=r)
    r *= WORK_DTYPE(1.0 / levels["level"])
    return np.clip(r, LOW_CLIP, 1.0, out=r).astype(np.float32, copy=False)


def whole_frame_regions(image: np.ndarray):
    """``regions`` for :func:`frame_levels` of a frame held in memory: the whole frame as one region."""
    arr = np.asarray(image)
    full = (slice(0, arr.shape[0]), slice(0, arr.shape[1]))

    def regions(halo):
        yield full, full, arr

    return regions


def flatten(image: np.ndarray, pixel_size_nm: float, background_nm: float = 4000.0,
            denoise_method: str = "gaussian", smooth_px: float | None = 1.0,
            polarity: str = "auto") -> tuple[np.ndarray, str, float]:
    """The whole step on an array: grains bright on a flat zero background.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Raw frame, any intensity units.
    pixel_size_nm : float
        Pixel side in nm.
    background_nm : float
        Background scale in nm (see :func:`estimate_background`).
    denoise_method : str
        See :func:`denoise`.
    smooth_px : float or None
        Denoising sigma in pixels; None: chosen by
        :func:`~grainhabit.plugins.preprocess.smoothing_scale.levels_at_best_scale` (Gaussian denoising;
        one pixel with the other methods).
    polarity : {"auto", "bright", "dark"}
        Grain contrast in ``image``; "auto" detects it.

    Returns
    -------
    out : ndarray of float32, shape (rows, cols)
        In [-0.25, 1]; background 0, the 95th percentile of grain pixels 1.
    polarity : {"bright", "dark"}
    confidence : float
        Of the detection (1.0 when forced).

    Notes
    -----
    ``out = clip(s * (I - B) / L, -0.25, 1)`` (the background noise is kept on
    both sides of 0 so that later steps can measure it) with ``s = +1`` for bright and
    ``-1`` for dark grains, background ``B`` and ``L`` the 95th percentile of
    ``s (I - B)`` over pixels more than 3 sigma on the grain side, but at
    least 10 sigma, so that a frame without grains is not stretched.
    Computed as :func:`frame_levels` then :func:`apply_levels`, the path a
    tiled frame takes too. Frame-sized arrays are held in
    :data:`WORK_DTYPE` from the normalised image on, the Gaussian runs as two
    1-D passes (:func:`gaussian_nearest`), block means are summed in a fixed
    order (:func:`block_sums`) and the background is interpolated once
    (:func:`upsample_bilinear`); ``tests/test_speed_kernels.py`` keeps the
    step as it was (float64, scipy's Gaussian, scikit-image's resampling)
    and checks that both agree to 2e-4 of the output scale.
    """
    if polarity not in ("auto", "bright", "dark"):
        raise ValueError(f"polarity must be 'auto', 'bright' or 'dark', got {polarity!r}")
    whole = None
    if denoise_method in ("gaussian", "none"):
        arr = np.asarray(image)  # frame_levels checks its values; no float64 copy of the frame
        if arr.ndim != 2:
            raise ValueError(f"image must be 2-D (rows, cols), got shape {arr.shape}")
    else:
        arr = _check_image(image)
        whole, _ = denoise(normalise(arr), denoise_method, smoothing_scale.scales_for(smooth_px)[0])
        whole = whole.astype(WORK_DTYPE)
    # flatten computes its output itself: the levels without the preview (frame_levels' preview=False)
    lv = smoothing_scale.levels_at_best_scale(functools.partial(frame_levels, preview=False, whole=whole),
                                              whole_frame_regions(arr), arr.shape, pixel_size_nm, background_nm,
                                              denoise_method, polarity, smoothing_scale.scales_for(smooth_px),
                                              raw_levels=raw_levels)
    full = (slice(0, arr.shape[0]), slice(0, arr.shape[1]))
    out = apply_levels(arr, full, lv, denoised=whole if whole is not None else lv.pop("denoised", None))
    return out, lv["polarity"], lv["confidence"]


def gaussian_nearest(image: np.ndarray, sigma_px: float, truncate: float = 4.0) -> np.ndarray:
    """Gaussian filter with edge values repeated, as two 1-D passes.

    Parameters
    ----------
    image : ndarray of float, shape (rows, cols)
    sigma_px : float
        Standard deviation (px), the same along both axes.
    truncate : float
        The kernel reaches ``int(truncate * sigma_px + 0.5)`` pixels to each side.

    Returns
    -------
    ndarray, shape and dtype of ``image``

    Notes
    -----
    The same sampled, normalised kernel and edge rule as
    ``scipy.ndimage.gaussian_filter(image, sigma_px, mode="nearest")``
    (``tests/test_speed_kernels.py`` checks the two agree to float rounding).
    Along the columns scipy's ``correlate1d`` runs over contiguous rows; along
    the rows, where it would stride through memory, the kernel is applied as
    weighted sums of shifted whole rows (the kernel is symmetric: one multiply
    per pair of taps), about twice as fast on a 2048 px frame; in bands of
    rows of about :data:`CACHE_BAND_BYTES` (twice as fast again as whole-frame
    passes, the same values).
    """
    arr = np.asarray(image)
    radius = int(truncate * float(sigma_px) + 0.5)
    if radius < 1:
        return arr.copy()
    t = np.arange(-radius, radius + 1, dtype=np.float64)
    w = np.exp(-0.5 * (t / float(sigma_px)) ** 2)
    w /= w.sum()
    out = ndi.correlate1d(arr, w, axis=1, mode="nearest")
    n = out.shape[0]
    pad = np.concatenate([np.repeat(out[:1], radius, axis=0), out, np.repeat(out[-1:], radius, axis=0)])
    dt = out.dtype.type
    # the row pass in bands of rows small enough to stay in the processor's cache (about 256 kB each):
    # the same operations in the same order as over the whole frame at once, half the memory traffic
    band = max(8, CACHE_BAND_BYTES // max(out.shape[1] * out.itemsize, 1))
    tmp = np.empty((min(band, n), out.shape[1]), out.dtype)
    for a in range(0, n, band):
        b = min(a + band, n)
        res, tm = out[a:b], tmp[:b - a]
        np.multiply(pad[radius + a: radius + b], dt(w[radius]), out=res)
        for k in range(1, radius + 1):
            np.add(pad[radius - k + a: radius - k + b], pad[radius + k + a: radius + k + b], out=tm)
            tm *= dt(w[radius + k])
            res += tm
    return out


def upsample_bilinear(small: np.ndarray, shape: tuple[int, int], rows=None, cols=None,
                      dtype=np.float64) -> np.ndarray:
    """Bilinear interpolation of a small image to ``shape``, edges repeated; optionally at chosen pixels only.

    Parameters
    ----------
    small : ndarray of float, shape (r, c)
    shape : (rows, cols)
        Full output size.
    rows, cols : ndarray of int, optional
        Output rows and columns wanted, rows in increasing order (default
        all): the result is then ``upsample_bilinear(small,
        shape)[np.ix_(rows, cols)]``, computed for those pixels alone.
    dtype : numpy dtype
        Of the result.

    Returns
    -------
    ndarray, shape (len(rows), len(cols))

    Notes
    -----
    Output pixel ``i`` samples the input at ``(i + 0.5) r / rows - 0.5``
    (pixel centres of both grids aligned, positions beyond the outer centres
    take the edge value), as ``skimage.transform.resize(small, shape,
    order=1, mode="edge", anti_aliasing=False)`` does. The interpolation is
    separable: along the columns of the small image first (``part``), then
    each run of output rows between the same two rows of ``part`` is one
    broadcast multiply-add, ``part[j] + t (part[j + 1] - part[j])``, written
    straight into the result. The column pass runs in float64, the row pass
    in ``dtype``.
    """
    small = np.asarray(small, dtype=np.float64)
    rows = np.arange(shape[0]) if rows is None else np.asarray(rows)
    cols = np.arange(shape[1]) if cols is None else np.asarray(cols)
    j0c, j1c, tc = _bilinear_weights(small.shape[1], shape[1], cols)
    part = small[:, j0c] + tc * (small[:, j1c] - small[:, j0c])
    j0r, j1r, tr = _bilinear_weights(small.shape[0], shape[0], rows)
    # the row pass, over the whole output, runs in the output's dtype (no casts)
    part, tr = part.astype(dtype, copy=False), tr.astype(dtype, copy=False)
    out = np.empty((len(rows), len(cols)), dtype=dtype)
    starts = np.concatenate([[0], np.flatnonzero(np.diff(j0r)) + 1, [len(rows)]])
    for a, b in zip(starts[:-1], starts[1:]):
        if a == b:
            continue
        j = j0r[a]
        step = part[j1r[a]] - part[j]
        np.multiply(tr[a:b, None], step, out=out[a:b])
        out[a:b] += part[j]
    return out


def _bilinear_weights(n_in: int, n_out: int, index: np.ndarray):
    """Neighbours and weight of the second one for output positions ``index`` (see :func:`upsample_bilinear`)."""
    c = np.clip((index + 0.5) * (n_in / n_out) - 0.5, 0.0, n_in - 1)
    j0 = np.floor(c).astype(np.intp)
    j1 = np.minimum(j0 + 1, n_in - 1)
    return j0, j1, c - j0


@hookimpl
def grainhabit_preprocess(frame, params):
    """Flatten the background and set polarity; see the module docstring.

    A tile of a frame processed by tiles (``frame.meta["tile_levels"]``)
    gets the frame's levels (:func:`apply_levels`), not its own.
    """
    p = STEP.resolve(params)
    px = _check_positive("pixel_size_nm", frame.pixel_size_nm)
    src = frame.image if frame.image is not None else frame.raw
    smooth_px = None if p["smooth_nm"] is None else p["smooth_nm"] / px
    shared = frame.meta.get("tile_levels", {}).get(STEP.name)
    if shared is not None:
        out, pol, conf = apply_levels(src, frame.meta["tile_window"], shared), shared["polarity"], shared["confidence"]
    else:
        out, pol, conf = flatten(src, px, p["background_nm"], p["denoise"], smooth_px, p["polarity"])
    new = frame.replace(image=out, polarity=pol)
    if p["polarity"] == "auto" and conf < LOW_CONFIDENCE:
        new = new.with_note(f"flatten-background: qc polarity-uncertain: polarity auto-detected as {pol!r} "
                            f"with low confidence "
                            f"({conf:.2f}); set polarity to force it")
    return new


@hookimpl
def grainhabit_tile_levels(step, sample, params):
    """Frame-wide levels of this step for a frame processed by tiles (:func:`frame_levels`)."""
    if step != STEP.name:
        return None
    if sample.preview is not None:
        raise ValueError(f"{STEP.name} runs on the raw frame when it is processed by tiles; an earlier "
                         "preprocess step cannot be combined with it there")
    p = STEP.resolve(params)
    px = _check_positive("pixel_size_nm", sample.pixel_size_nm)
    smooth_px = None if p["smooth_nm"] is None else p["smooth_nm"] / px
    if p["denoise"] not in ("gaussian", "none"):
        raise ValueError(f"denoise {p['denoise']!r} needs the whole frame (its noise estimate and range are "
                         "frame-wide); a frame processed by tiles takes 'gaussian' or 'none'")
    lv = smoothing_scale.levels_at_best_scale(frame_levels, sample.regions, sample.shape, px, p["background_nm"],
                                              p["denoise"], p["polarity"], smoothing_scale.scales_for(smooth_px),
                                              raw_levels=raw_levels)
    lv.pop("denoised", None)
    return lv


@hookimpl
def grainhabit_prepare_worker(steps):
    """Import the scikit-image modules this step calls (resampling; restoration if it denoises with it)."""
    if STEP.name not in steps:
        return
    import scipy.optimize  # noqa: F401  (noise model)
    import skimage.transform  # noqa: F401  (background estimate)

    if STEP.resolve(steps[STEP.name])["denoise"] in ("bilateral", "nlmeans"):
        import skimage.restoration  # noqa: F401
