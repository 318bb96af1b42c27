"""Binary erosion, dilation and closing by a Euclidean disk, on rows packed 64 pixels to a word.

The disk of radius ``R`` (the offsets ``dy**2 + dx**2 <= R**2``, scikit-image's ``disk`` for an
integer ``R``) is the union of the rectangles ``|dy| <= a``, ``|dx| <= b(a)`` at the corners of its
staircase outline. An erosion by a union of structuring elements is the intersection of the
erosions by each [1]_, a dilation the union of the dilations, and a rectangle is a window along the
rows combined with one along the columns. With the rows packed into 64-bit words (numpy's
``packbits``), a shift along a row is two word shifts and an OR, so each window costs a few passes
over 1/8 of the bytes of a boolean frame. For the radii of the segmentation (2-3 px) the packing and
unpacking dominate, and the whole is several times cheaper than scipy's binary morphology with the
disk as structuring element, and equal to it pixel for pixel (tests/test_segment_speed.py).

References
----------
.. [1] P. Soille, "Morphological Image Analysis", 2nd ed., Springer, 2003, ch. 3
   (decomposition of structuring elements; erosion by a union is the intersection of the erosions;
   from memory)
"""

from __future__ import annotations

import numpy as np


def disk_rectangles(radius: float) -> list[tuple[int, int]]:
    """Half-sizes ``(a, b)`` of the rectangles whose union is the disk of ``radius``.

    Parameters
    ----------
    radius : float
        Disk radius (px), >= 0.

    Returns
    -------
    list of (int, int)
        For every row offset ``a`` where the disk's half-width ``b(a)`` (the
        largest ``b`` with ``a**2 + b**2 <= radius**2``) is larger than at
        ``a + 1`` (and for the last row): the rectangle ``|dy| <= a``,
        ``|dx| <= b(a)``.
    """
    k = int(np.floor(radius))
    r2 = radius * radius
    half = []
    for a in range(k + 1):
        b = int(np.floor(np.sqrt(max(r2 - a * a, 0.0))))
        while (b + 1) ** 2 + a * a <= r2:
            b += 1
        while b > 0 and b * b + a * a > r2:
            b -= 1
        half.append(b)
    return [(a, half[a]) for a in range(k + 1) if a == k or half[a] > half[a + 1]]


def erode_disk(mask: np.ndarray, radius: float, border_value: int = 0) -> np.ndarray:
    """``scipy.ndimage.binary_erosion(mask, structure=disk, border_value=border_value)``.

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
    radius : float
        Disk radius (px).
    border_value : {0, 1}
        Value of the pixels beyond the frame.

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        Pixels whose every offset within ``radius`` lands on ``mask`` (or
        beyond the frame, with ``border_value`` 1).
    """
    return _by_rectangles(np.asarray(mask, bool), radius, bool(border_value), np.bitwise_and)


def dilate_disk(mask: np.ndarray, radius: float) -> np.ndarray:
    """``scipy.ndimage.binary_dilation(mask, structure=disk)`` (nothing beyond the frame).

    Parameters
    ----------
    mask : ndarray of bool, shape (rows, cols)
    radius : float
        Disk radius (px).

    Returns
    -------
    ndarray of bool, shape (rows, cols)
        Pixels within ``radius`` of a pixel of ``mask``.
    """
    return _by_rectangles(np.asarray(mask, bool), radius, False, np.bitwise_or)


def close_disk(mask: np.ndarray, radius: float) -> np.ndarray:
    """``scipy.ndimage.binary_closing(mask, structure=disk, border_value=0)``: dilation, then erosion."""
    return erode_disk(dilate_disk(mask, radius), radius, 0)


def _by_rectangles(mask, radius, fill, combine):
    rects = disk_rectangles(radius)
    k = max(max(a, b) for a, b in rects)
    if k == 0:
        return mask.copy()
    rows, cols = mask.shape
    width = -(-(cols + 2 * k) // 64) * 64
    big = np.full((rows + 2 * k, width), fill, bool)
    big[k:k + rows, k:k + cols] = mask
    # bit i of word m of a row is the pixel in column 64 m + i (little-endian bits and words)
    words = np.packbits(big, axis=1, bitorder="little").view("<u8")
    out = None
    for a, b in rects:
        part = _rows_window(_cols_window(words, b, combine), a, combine)
        out = part if out is None else combine(out, part, out=out)
    bits = np.unpackbits(out.view(np.uint8), axis=1, bitorder="little")
    return bits[k:k + rows, k:k + cols].astype(bool)


def _shift_cols(words, d):
    """Column ``x`` of the result holds column ``x + d`` of ``words``' rows; bits shifted in are 0."""
    if d == 0:
        return words
    out = np.empty_like(words)
    s, t = np.uint64(abs(d)), np.uint64(64 - abs(d))
    if d > 0:
        np.right_shift(words, s, out=out)
        out[:, :-1] |= np.left_shift(words[:, 1:], t)
    else:
        np.left_shift(words, s, out=out)
        out[:, 1:] |= np.right_shift(words[:, :-1], t)
    return out


def _cols_window(words, b, combine):
    """``combine`` over the columns ``x - b .. x + b`` of every column ``x``, by doubling.

    The window ``0 .. s - 1`` combined with itself moved by ``t <= s`` covers ``0 .. s + t - 1``
    (``combine`` is an AND or an OR: idempotent and associative), so ``0 .. b`` takes about
    ``log2(b + 1)`` shifts and ``-b .. b`` one more, instead of ``2 b``. The same bits as one shift per
    offset at every column whose window lies within the array (the frame padded by the largest half-width,
    tests/test_segment_speed.py).
    """
    if b == 0:
        return words.copy()
    out, span = words, 1
    while span < b + 1:
        step = min(span, b + 1 - span)
        out = combine(out, _shift_cols(out, step))  # a new array: words stays as it is
        span += step
    return combine(out, _shift_cols(out, -b), out=out)


def _rows_window(words, a, combine):
    """``combine`` over the rows ``y - a .. y + a`` of every row ``y``, by doubling (as :func:`_cols_window`)."""
    out, span = words.copy(), 1
    while span < a + 1:
        step = min(span, a + 1 - span)
        nxt = out.copy()
        combine(nxt[:-step], out[step:], out=nxt[:-step])
        out = nxt
        span += step
    if a:
        nxt = out.copy()
        combine(nxt[a:], out[:-a], out=nxt[a:])
        out = nxt
    return out
