"""The Euclidean distance transform and its feature transform, without scipy's per-call conversions.

``scipy.ndimage.distance_transform_edt`` turns its input into an int8 array through a full-size
``int64`` copy (``np.where(input, 1, 0).astype(np.int8)``), runs its compiled feature transform, and
then builds the distances from a full-size index grid (``np.indices``), converted to float64, squared
and summed. The segmentation asks for the transform some 140 times per 2048 px frame (the gap lines'
windows, the packed test's 512 px copy, the splitter's crops), and on those arrays the conversions cost
a good part of the transform itself.

Here a boolean mask is handed to the same compiled routine as an int8 view of its bytes (the same 0/1
values scipy builds), and the distances are the square roots of the summed squared index differences,
summed in integers: every such sum is a whole number far below 2**53, so it is the same float64 number
scipy sums, and the square root (correctly rounded, IEEE 754) is the same to the bit
(tests/test_segspeed_exact.py checks both against scipy). Where the private routine is missing or refuses
the arguments, scipy's public function is used.

References
----------
.. [1] C. R. Maurer, R. Qi and V. Raghavan, "A linear time algorithm for computing exact Euclidean
   distance transforms of binary images in arbitrary dimensions", IEEE Trans. PAMI 25(2), 265-270,
   2003, doi:10.1109/TPAMI.2003.1177156 (the algorithm behind scipy's feature transform; from memory)
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

try:  # the compiled feature transform behind scipy.ndimage.distance_transform_edt (checked against it in the tests)
    from scipy.ndimage._nd_image import euclidean_feature_transform as _feature_transform_raw
except ImportError:  # pragma: no cover - another scipy layout: the public function is used
    _feature_transform_raw = None


def feature_transform(mask: np.ndarray) -> np.ndarray:
    """``scipy.ndimage.distance_transform_edt(mask, return_distances=False, return_indices=True)``.

    Parameters
    ----------
    mask : ndarray, at least 1-D
        Nonzero: the pixels whose nearest zero pixel is looked for.

    Returns
    -------
    ndarray of int32, shape ``(mask.ndim,) + mask.shape``
        For every pixel, the indices of the nearest zero pixel (Euclidean), as scipy gives them.
    """
    m = np.asarray(mask)
    if _feature_transform_raw is None or m.ndim == 0:
        return ndi.distance_transform_edt(m, return_distances=False, return_indices=True)
    # scipy's np.where(input, 1, 0).astype(np.int8): the 0/1 bytes of a boolean array, viewed in place
    flags = np.ascontiguousarray(m if m.dtype == bool else m != 0).view(np.int8)
    ft = np.zeros((m.ndim,) + m.shape, np.int32)
    try:
        _feature_transform_raw(flags, None, ft)
    except (TypeError, ValueError, RuntimeError):  # pragma: no cover - the routine's signature changed
        return ndi.distance_transform_edt(m, return_distances=False, return_indices=True)
    return ft


def distances_from_features(ft: np.ndarray) -> np.ndarray:
    """The Euclidean distances scipy computes from a feature transform (:func:`feature_transform`).

    Parameters
    ----------
    ft : ndarray of int, shape ``(ndim,) + shape``

    Returns
    -------
    ndarray of float64, shape ``shape``
        ``sqrt(sum_i (ft[i] - index_i)**2)``; the sum taken in integers (int32 where it cannot overflow,
        int64 otherwise), equal to scipy's float64 sum of float64 squares (whole numbers below 2**53).
    """
    shape = ft.shape[1:]
    reach = sum((max(s, 1) - 1) ** 2 for s in shape)
    dtype = np.int32 if reach < 2 ** 31 else np.int64
    total = np.zeros(shape, dtype)
    for axis, size in enumerate(shape):
        index = np.arange(size, dtype=dtype).reshape((-1,) + (1,) * (len(shape) - axis - 1))
        d = np.subtract(ft[axis], index, dtype=dtype)
        d *= d
        total += d
    return np.sqrt(total, dtype=np.float64)


def distance_map(mask: np.ndarray) -> np.ndarray:
    """``scipy.ndimage.distance_transform_edt(mask)``: the distance of every pixel to the nearest zero pixel.

    Parameters
    ----------
    mask : ndarray, at least 1-D

    Returns
    -------
    ndarray of float64, shape of ``mask``
        Equal to scipy's bit for bit (module docstring).
    """
    m = np.asarray(mask)
    if _feature_transform_raw is None or m.ndim == 0:
        return ndi.distance_transform_edt(m)
    return distances_from_features(feature_transform(m))
