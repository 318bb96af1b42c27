"""Sums of ``f x f`` blocks of an image by strided slices (shared by the host's thumbnails and plugins).

The host keeps no image science; this is arithmetic both sides need: the thumbnail of every frame
(:func:`grainhabit.task.thumbnail`) and the coarse copy of segment-grains' packed-field test
(``plugins/segment/packed.block_average``) sum whole numbers in blocks, where integer sums are exact
in any order.
"""

from __future__ import annotations

import numpy as np


def block_sums(x: np.ndarray, f: int, dtype) -> np.ndarray:
    """Sums of the ``f x f`` blocks of ``x`` (whose sides are multiples of ``f``) in an accumulator of ``dtype``.

    Parameters
    ----------
    x : ndarray, shape (r, c)
        An image whose sides ``r`` and ``c`` are multiples of ``f``.
    f : int
        Block side (px), >= 1.
    dtype : numpy dtype
        The accumulator (e.g. int32 or int64); the caller makes sure no sum overflows it.

    Returns
    -------
    ndarray of ``dtype``, shape (r // f, c // f)
        ``x.reshape(r // f, f, c // f, f).sum(axis=(1, 3), dtype=dtype)``: the blocks' rows added by
        strided slices, then their columns (no copy of the whole frame in the accumulator's type).
    """
    acc = x[0::f].astype(dtype)
    for i in range(1, f):
        acc += x[i::f]
    sums = acc[:, 0::f].copy()
    for j in range(1, f):
        sums += acc[:, j::f]
    return sums
