"""Frame-wide threshold levels of the segmentation, computed once per frame and shared by all tiles.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Trans. Syst. Man Cybern. 9(1), 62-66, 1979, doi:10.1109/TSMC.1979.4310076
"""

from __future__ import annotations

import numpy as np

from grainhabit.plugins.preprocess.background_peak import background_peak


def check_image(image) -> np.ndarray:
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise ValueError(f"image must be 2-D (rows, cols), got shape {arr.shape}")
    if arr.size == 0:
        raise ValueError("image is empty")
    arr = arr.astype(np.float32, copy=False)
    if not np.all(np.isfinite(arr)):
        raise ValueError("image contains NaN or infinite values")
    return arr


def odd_size(n: float) -> int:
    n = max(3, int(round(n)))
    return n if n % 2 else n + 1


def otsu_threshold(image: np.ndarray, max_samples: int = 2_000_000) -> float:
    """Global Otsu threshold, on a regular subsample of large frames.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    max_samples : int
        Above this many pixels every k-th row and column is used.

    Returns
    -------
    float
        The threshold; the image's value if it is constant.
    """
    from skimage.filters import threshold_otsu

    from grainhabit.plugins.common.image_stats import regular_subsample

    sub = regular_subsample(check_image(image), max_samples)
    if float(sub.min()) == float(sub.max()):
        return float(sub.min())
    return float(threshold_otsu(sub))


#: Pixels of the regular subsample the frame-wide levels are taken on (segment-grains 2.8; 2e6 before).
LEVEL_MAX_SAMPLES = 600_000


def frame_levels(image: np.ndarray, noise_k: float = 5.0, max_samples: int = LEVEL_MAX_SAMPLES,
                 faint_k: float | None = None) -> dict:
    """Frame-wide threshold levels, computed once and shared by all tiles.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Preprocessed frame (background about 0, grains about 1).
    noise_k : float
        Background sigmas above the background mode for the noise threshold.
    max_samples : int
        Above this many pixels a regular subsample is used (every k-th row and column: between a
        quarter of this and this many pixels). Frames of up to 600 000 px (774 px square) are taken
        whole, as before segment-grains 2.8; on a 2048 px frame every third row and column
        (466 489 px instead of 1 048 576) moved the noise threshold by at most 0.25 background
        sigmas and Otsu's threshold by at most 0.01 (image units, grains about 1) on rendered frames
        (tests/test_segment_passes.py), at less than half the cost; the labels of four rendered 2048 px
        frames kept their grain counts, with at most 27 of ~5e5 labelled pixels changed (ECD within 0.5 %).
    faint_k : float, optional
        Background sigmas of the lower threshold at which objects wholly
        below the noise threshold are found (``faint``); None: none.

    Returns
    -------
    dict
        ``otsu`` (Otsu threshold), ``background`` and ``sigma`` (mode and
        noise sd of the background's peak,
        :func:`grainhabit.plugins.preprocess.background_peak.background_peak`) and ``noise`` =
        ``background + noise_k * sigma``; with ``faint_k``, also ``faint`` =
        ``background + faint_k * sigma``.
    """
    from grainhabit.plugins.common.image_stats import regular_subsample

    sub = regular_subsample(check_image(image), max_samples)
    # values clipped by the preprocessing (grains at 1, the low clip) pile up in one histogram bin that
    # can outnumber the background's mode: leave them out of the background's level and noise
    inner = (sub > sub.min()) & (sub < sub.max())
    # grains are bright here: the background is the peak below them and the lower half of that peak
    # alone gives the noise, however much of the frame the grains cover
    bg, sigma = background_peak(sub, 1, inner if inner.sum() >= 0.25 * sub.size else None, half_width=False)
    levels = {"otsu": otsu_threshold(sub), "background": bg, "sigma": sigma, "noise": bg + noise_k * sigma}
    if faint_k is not None:
        levels["faint"] = bg + faint_k * sigma
    return levels
