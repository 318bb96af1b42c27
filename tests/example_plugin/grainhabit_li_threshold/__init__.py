"""Step ``segment-li``: grains by Li's minimum cross-entropy threshold.

A worked example of a third-party grainhabit plugin (see DEVELOPERS.md). The
module is registered through the entry point ``segment-li`` of the group
``grainhabit`` in this package's ``pyproject.toml``.

Method, on the preprocessed frame (grains bright, background near 0):

1. threshold at Li's level ``t`` [1]_ [2]_ (``skimage.filters.threshold_li``),
   the level that minimises the cross entropy between the image and the
   two-level image made of the mean of each class;
2. fill enclosed background inside foreground regions (optional);
3. label connected regions (side neighbours, or side and corner neighbours);
4. drop regions whose equivalent circle diameter is below ``min_ecd_nm``
   and number the rest 1..n in scan order.

Touching grains are not split (``split`` is False for every grain); pair the
step with a splitting step of your own if your specimens touch.

References
----------
.. [1] C. H. Li and C. K. Lee, "Minimum cross entropy thresholding",
   Pattern Recognition 26(4), 617-625, 1993, doi:10.1016/0031-3203(93)90115-D
.. [2] C. H. Li and P. K. S. Tam, "An iterative algorithm for minimum cross
   entropy thresholding", Pattern Recognition Letters 19(8), 771-776, 1998,
   doi:10.1016/S0167-8655(98)00057-9
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi
from skimage.filters import threshold_li
from skimage.measure import label as label_regions
from skimage.segmentation import relabel_sequential

from grainhabit import hookimpl
from grainhabit.params import Param, StepInfo

#: Hook API this plugin was written for; the host refuses other versions.
GRAINHABIT_API = 1

STEP = StepInfo(
    name="segment-li",
    stage="segment",
    version="1.0",
    summary="Li minimum cross-entropy threshold, hole filling, connected regions (example plugin).",
    params=(
        Param("min_ecd_nm", float, 40.0, unit="nm", low=0.0,
              doc="Regions with a smaller equivalent circle diameter are dropped."),
        Param("fill_holes", bool, True,
              doc="Fill enclosed background inside a region (facet lines, bright rims)."),
        Param("connectivity", int, 2, low=1, high=2,
              doc="1: pixels touch by their sides only; 2: by their corners too."),
    ),
)


def _check_image(image) -> np.ndarray:
    arr = np.asarray(image)
    if arr.ndim != 2:
        raise ValueError(f"image must be 2-D (rows, cols), got shape {arr.shape}")
    if arr.size == 0 or not np.all(np.isfinite(arr)):
        raise ValueError(f"image must be non-empty and finite, got shape {arr.shape}")
    return arr.astype(np.float64, copy=False)


def li_labels(image: np.ndarray, pixel_size_nm: float, min_ecd_nm: float = 40.0,
              fill_holes: bool = True, connectivity: int = 2) -> tuple[np.ndarray, float]:
    """Label the grains of a preprocessed image by Li's threshold.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Grains bright, background dark (any real scale).
    pixel_size_nm : float
        Side of one square pixel in nm (> 0).
    min_ecd_nm : float
        Regions with an equivalent circle diameter below this (nm) are dropped.
    fill_holes : bool
        Fill background enclosed by a region before labelling.
    connectivity : int
        1 (side neighbours) or 2 (side and corner neighbours).

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
        0 background, grains 1..n in scan order.
    threshold : float
        Li's level, in the units of ``image``; foreground is ``image > threshold``.

    Notes
    -----
    The equivalent circle diameter of a region of ``A`` pixels is
    ``ECD = 2 * sqrt(A * px**2 / pi)`` (ISO 9276-6). A constant image has no
    threshold; it gives no grains and ``threshold = nan``.

    References
    ----------
    See the module docstring.

    Examples
    --------
    >>> img = np.zeros((32, 32)); img[8:16, 8:16] = 1.0
    >>> labels, t = li_labels(img, pixel_size_nm=10.0)
    >>> int(labels.max()), int((labels == 1).sum())
    (1, 64)
    """
    arr = _check_image(image)
    if not (np.isfinite(pixel_size_nm) and pixel_size_nm > 0):
        raise ValueError(f"pixel_size_nm must be a positive number, got {pixel_size_nm!r}")
    if connectivity not in (1, 2):
        raise ValueError(f"connectivity must be 1 or 2, got {connectivity!r}")
    if min_ecd_nm < 0:
        raise ValueError(f"min_ecd_nm must be >= 0, got {min_ecd_nm!r}")
    if float(arr.max()) == float(arr.min()):
        return np.zeros(arr.shape, np.int32), float("nan")
    t = float(threshold_li(arr))
    mask = arr > t
    if fill_holes:
        mask = ndi.binary_fill_holes(mask)
    labels = label_regions(mask, connectivity=connectivity)
    area_nm2 = np.bincount(labels.ravel()) * float(pixel_size_nm) ** 2
    ecd_nm = 2.0 * np.sqrt(area_nm2 / np.pi)
    small = ecd_nm < min_ecd_nm
    small[0] = False
    labels[small[labels]] = 0
    labels, _, _ = relabel_sequential(labels)
    return labels.astype(np.int32), t


def touches_border(labels: np.ndarray) -> np.ndarray:
    """Which of the labels 1..n touch the frame border.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, grains 1..n.

    Returns
    -------
    ndarray of bool, shape (n,)
    """
    n = int(labels.max()) if labels.size else 0
    hit = np.zeros(n + 1, bool)
    for edge in (labels[0, :], labels[-1, :], labels[:, 0], labels[:, -1]):
        hit[edge] = True
    return hit[1:]


@hookimpl
def grainhabit_segment(frame, params):
    """Label the grains of ``frame.image`` by Li's threshold.

    Parameters
    ----------
    frame : grainhabit.frame.FrameData
        With ``image`` (float, shape (rows, cols), grains bright) and
        ``pixel_size_nm`` set.
    params : dict
        This step's resolved parameters (see :data:`STEP`).

    Returns
    -------
    grainhabit.frame.FrameData
        With ``labels`` (int32, shape (rows, cols)) and the columns
        ``label`` (int32, 1..n), ``split`` (bool, all False) and
        ``edge_cut`` (bool), plus a note with the threshold used.

    Raises
    ------
    ValueError
        If no preprocess step has set ``frame.image``.
    """
    p = STEP.resolve(params)
    if frame.image is None:
        raise ValueError("segment-li needs frame.image: run a preprocess step first")
    labels, t = li_labels(frame.image, frame.pixel_size_nm, p["min_ecd_nm"], p["fill_holes"],
                          p["connectivity"])
    n = int(labels.max())
    grains = {"label": np.arange(1, n + 1, dtype=np.int32), "split": np.zeros(n, bool),
              "edge_cut": touches_border(labels)}
    out = frame.replace(labels=labels, grains=grains, outlines=())
    return out.with_note(f"segment-li: Li threshold {t:.4g}, {n} grains")
