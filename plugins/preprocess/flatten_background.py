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
   flattened away.
4. Polarity: the strong edges of the flattened frame vote for the side round
   which they bend (grains are convex bodies; :mod:`grainhabit.plugins.preprocess.polarity`),
   which holds however much of the frame the grains cover. The confidence is
   the absolute mean vote; below 0.1 a note is added to the frame.
   (:func:`detect_polarity`, the older histogram-tail test, is kept for callers.)
"""

from __future__ import annotations

import functools

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo
from grainhabit.plugins.preprocess.polarity import detect_polarity as convex_polarity
from grainhabit.plugins.common.image_stats import (
    CLIP_SIGMAS, LEVEL_SAMPLES, clipped_sigma, histogram_mode, regular_subsample,
)

GRAINHABIT_API = 1

STEP = StepInfo(
    name="flatten-background",
    stage="preprocess",
    version="1.2",
    summary="Variance-stabilised denoising, masked large-scale background removal, automatic polarity.",
    params=(
        Param("background_nm", float, 4000.0, unit="nm", low=0.0,
              doc="Scale (Gaussian sigma) of the illumination background; should exceed the largest grain."),
        Param("denoise", str, "gaussian", choices=("gaussian", "bilateral", "nlmeans", "none"),
              doc="Filter applied after variance stabilisation."),
        Param("smooth_nm", float, None, unit="nm", low=0.0,
              doc="Gaussian denoising sigma; unset means one pixel."),
        Param("polarity", str, "auto", choices=("auto", "bright", "dark"),
              doc="Contrast of grains in the raw frame: detect, or force bright-on-dark / dark-on-bright."),
    ),
)

#: Below this confidence (mean vote of the edges, see grainhabit.plugins.preprocess.polarity) an
#: auto-detected polarity gets a note.
LOW_CONFIDENCE = 0.1
#: The grain level is at least this many background sigmas (a frame without grains stays dark).
NOISE_FLOOR_SIGMAS = 10.0
#: Lower clip of the output: background noise stays visible around 0.
LOW_CLIP = -0.25
#: Pixel differences used by the noise model, and pixels used for a background mode and sigma (regular
#: subsamples of larger frames; the estimates' standard errors are then well under 1 %).
NOISE_SAMPLES = 300_000


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
    cstep = max(1, int(round((rows // 2) * arr.shape[1] / NOISE_SAMPLES)))
    top, bottom = arr[0:rows:2, ::cstep], arr[1:rows:2, ::cstep]
    d = ((bottom - top) / np.sqrt(2.0)).ravel()
    m = (0.5 * (bottom + top)).ravel()
    edges = np.unique(np.quantile(m, np.linspace(0, 1, n_bins + 1)))
    if len(edges) < 3:
        return 0.0, float(np.var(d))
    idx = np.clip(np.searchsorted(edges, m, side="right") - 1, 0, len(edges) - 2).astype(np.int16)
    # group the samples by bin with one (radix) sort instead of one mask per bin
    order = np.argsort(idx, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(idx, minlength=len(edges) - 1))])
    d_sorted, m_sorted = d[order], m[order]
    means, variances = [], []
    for k in range(len(edges) - 1):
        dk = d_sorted[bounds[k]:bounds[k + 1]]
        if dk.size < 50:
            continue
        mad = np.median(np.abs(dk - np.median(dk)))
        means.append(np.mean(m_sorted[bounds[k]:bounds[k + 1]]))
        variances.append((1.4826 * mad) ** 2)
    if len(means) < 2:
        return 0.0, float(np.var(d))
    return nonnegative_line(np.asarray(means), np.asarray(variances))


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
    from skimage.transform import downscale_local_mean, resize

    arr = _check_image(image)
    px = _check_positive("pixel_size_nm", pixel_size_nm)
    if background_nm < 0 or not np.isfinite(background_nm):
        raise ValueError(f"background_nm must be >= 0, got {background_nm!r}")
    scale_px = background_nm / px
    f = int(max(1, min(round(scale_px / 8.0), min(arr.shape) // 64))) if scale_px > 0 else \
        max(1, min(arr.shape) // 128)
    small = downscale_local_mean(arr, (f, f))
    # the last row/column block may be partial (zero padded): drop it if so
    small = small[: arr.shape[0] // f or 1, : arr.shape[1] // f or 1]
    A = _poly_design(small.shape)
    z = small.ravel()
    mask = np.ones(z.size, bool)
    s = 1.0
    # raise the order step by step: a quadratic fitted to every pixel would
    # follow a large central grain, a constant's mode cannot
    for order in (0, 1, 2, 2, 2):
        n_terms = (order + 1) * (order + 2) // 2
        coef, *_ = np.linalg.lstsq(A[mask][:, :n_terms], z[mask], rcond=None)
        surface_flat = A[:, :n_terms] @ coef
        r = z - surface_flat
        m = histogram_mode(r)
        s = clipped_sigma(r, m)
        dev = (r - m) / s
        if grain_sign > 0:
            mask = (dev < CLIP_SIGMAS) & (dev > -2 * CLIP_SIGMAS)
        elif grain_sign < 0:
            mask = (dev > -CLIP_SIGMAS) & (dev < 2 * CLIP_SIGMAS)
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
    if scale_px > 0:
        sig = scale_px / f
        w = ndi.gaussian_filter(mask2.astype(float), sig, mode="reflect")
        num = ndi.gaussian_filter(np.where(mask2, resid, 0.0), sig, mode="reflect")
        smooth = np.where(w > 1e-3, num / np.maximum(w, 1e-3), 0.0)
        surface = surface + smooth
    bg = resize(surface, arr.shape, order=1, mode="edge", anti_aliasing=False) if f > 1 else surface
    r_sub = regular_subsample(arr, LEVEL_SAMPLES) - regular_subsample(bg, LEVEL_SAMPLES)
    m = histogram_mode(r_sub)
    s_full = clipped_sigma(r_sub, m)
    if grain_sign:
        # grains lie on one side: the other half of the background peak alone gives its width, however
        # much of the frame the grains cover (a two-sided clip starts from a spread the grains inflate)
        s_full = min(s_full, one_sided_sigma(r_sub, m, -grain_sign))
    bg = bg + m
    dev = (arr - bg) / s_full
    is_bg = np.abs(dev) < CLIP_SIGMAS
    return bg, is_bg, s_full


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
        half of the peak that the grains leave alone.
    """
    d = (np.asarray(r, float).ravel() - centre) * side
    d = d[d > 0]
    if d.size < 10:
        return float("inf")
    return max(1.4826 * float(np.median(d)), 1e-9)


def detect_polarity(residual: np.ndarray, sigma: float) -> tuple[str, float]:
    """Decide whether grains are brighter or darker than the background.

    Parameters
    ----------
    residual : ndarray, shape (rows, cols)
        Frame minus background (background mode at 0).
    sigma : float
        Robust standard deviation of the background.

    Returns
    -------
    polarity : {"bright", "dark"}
    confidence : float
        ``|B - D| / (B + D)`` in [0, 1], where ``B`` and ``D`` are the summed
        excess ``|r| - 3 sigma`` of pixels beyond 3 sigma above and below the
        mode; 0 when neither tail holds more than 0.2 % of the pixels.
    """
    r = np.asarray(residual, float)
    t = CLIP_SIGMAS * sigma
    up = r[r > t] - t
    dn = -r[r < -t] - t
    B, D = float(up.sum()), float(dn.sum())
    if max(up.size, dn.size) < 0.002 * r.size or B + D <= 0:
        return "bright", 0.0
    return ("bright" if B >= D else "dark"), abs(B - D) / (B + D)


def flatten(image: np.ndarray, pixel_size_nm: float, background_nm: float = 4000.0,
            denoise_method: str = "gaussian", smooth_px: float = 1.0,
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
    smooth_px : float
        Denoising sigma in pixels.
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
    """
    if polarity not in ("auto", "bright", "dark"):
        raise ValueError(f"polarity must be 'auto', 'bright' or 'dark', got {polarity!r}")
    x = normalise(image)
    x, _ = denoise(x, denoise_method, smooth_px)
    bg, _, s = estimate_background(x, pixel_size_nm, background_nm, grain_sign=0)
    if polarity == "auto":
        # which side of the outlines is convex, not which histogram tail is heavier: grains may cover
        # more of the frame than the background (see grainhabit.plugins.preprocess.polarity)
        pol, conf = convex_polarity(x - bg)
    else:
        pol, conf = polarity, 1.0
    sign = 1 if pol == "bright" else -1
    bg, _, s = estimate_background(x, pixel_size_nm, background_nm, grain_sign=sign)
    r = sign * (x - bg)
    fg = r[r > CLIP_SIGMAS * s]
    level = float(np.percentile(fg, 95)) if fg.size >= 20 else 0.0
    # never stretch pure noise up to grain level
    level = max(level, NOISE_FLOOR_SIGMAS * s)
    out = np.clip(r / level, LOW_CLIP, 1.0).astype(np.float32)
    return out, pol, conf


@hookimpl
def grainhabit_preprocess(frame, params):
    """Flatten the background and set polarity; see the module docstring."""
    p = STEP.resolve(params)
    px = _check_positive("pixel_size_nm", frame.pixel_size_nm)
    src = frame.image if frame.image is not None else frame.raw
    smooth_px = 1.0 if p["smooth_nm"] is None else p["smooth_nm"] / px
    out, pol, conf = flatten(src, px, p["background_nm"], p["denoise"], smooth_px, p["polarity"])
    new = frame.replace(image=out, polarity=pol)
    if p["polarity"] == "auto" and conf < LOW_CONFIDENCE:
        new = new.with_note(f"flatten-background: qc polarity-uncertain: polarity auto-detected as {pol!r} "
                            f"with low confidence "
                            f"({conf:.2f}); set polarity to force it")
    return new


@hookimpl
def grainhabit_prepare_worker(steps):
    """Import the scikit-image modules this step calls (resampling; restoration if it denoises with it)."""
    if STEP.name not in steps:
        return
    import scipy.optimize  # noqa: F401  (noise model)
    import skimage.transform  # noqa: F401  (background estimate)

    if STEP.resolve(steps[STEP.name])["denoise"] in ("bilateral", "nlmeans"):
        import skimage.restoration  # noqa: F401
