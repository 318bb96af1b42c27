"""What an instrument or an image program draws onto a micrograph.

Two kinds of pixels are not specimen and must never become grains:

- the info strip ("databar") that SEM software puts under the scanned
  image: full-width rows of flat colour with text, a scale bar and frame
  lines. A reader crops it, from the row count the file states where it
  does (:func:`crop_rows`), otherwise where :func:`find_info_strip` finds
  it by image analysis;
- scale bars and text burned into the image itself: thin strokes and bars
  drawn in the image's extreme grey value. :func:`annotation_mask` marks
  them; the frame's ``valid`` mask is False there and segmentation leaves
  those pixels out.

Both work on the stored values (before any scaling): drawn pixels have
exactly one value, where a micrograph's rows are noisy.
"""

from __future__ import annotations

import numpy as np

#: A row is flat when at least this fraction of its pixels has the row's most common value.
FLAT_ROW_FRACTION = 0.45

#: In an info strip, the median row has at least this fraction of its pixels at its background value.
MOSTLY_FLAT = 0.75

#: An info strip is at least this many rows (and 2 % of the height) and at most 30 % of the height.
MIN_STRIP_ROWS = 8
MAX_STRIP_FRACTION = 0.30

#: A drawn mark differs from its surroundings by at least this fraction of the grey range.
MIN_MARK_CONTRAST = 0.3

#: Lossy 8-bit exports (a JPEG-compressed figure): a strip's background pixels lie within this many grey
#: levels of the row's most common value (measured on the EMPS figure crops: +-1-3 levels on drawn fills).
LOSSY_TOLERANCE = 3
#: ... and a row of the strip holds at least this fraction of such pixels (rows through large text: 0.34).
LOSSY_MIN_BACKGROUND = 0.3
#: ... and at least this fraction of the columns change across the strip's top edge (a drawn strip
#: starts along a straight full-width line; a particle reaching into a smooth background does not).
LOSSY_MIN_EDGE = 0.6

#: Strokes of text span at most this many pixels across the line of text.
MAX_TEXT_HEIGHT = 40


def _row_flatness(image: np.ndarray, rows: range) -> dict[int, float]:
    """Fraction of each row's pixels that share the row's most common value."""
    if len(rows) == 0:
        return {}
    block = np.sort(image[rows.start:rows.stop], axis=1)
    n, cols = block.shape
    starts = np.ones(block.shape, bool)
    starts[:, 1:] = block[:, 1:] != block[:, :-1]
    run = np.cumsum(starts, axis=1) - 1 + (np.arange(n) * cols)[:, None]
    longest = np.bincount(run.ravel(), minlength=n * cols).reshape(n, cols).max(axis=1)
    return {r: float(c) / cols for r, c in zip(rows, longest)}


class _LazyFlatRows:
    """``row -> flatness >= FLAT_ROW_FRACTION`` for the rows from ``lowest`` down, worked out on first use.

    :func:`find_info_strip` walks up from the bottom row and stops after a few noisy rows, so on
    a micrograph without a strip it reads about six rows; the flatness of all ~30 % of the rows
    it might read (a sort of each, ~20 ms on a 2048 px frame) is taken only as far as the walk
    goes, in blocks of :attr:`BLOCK` rows from the bottom. Each row's flatness depends on that
    row alone, so the answers are those of :func:`_row_flatness` over the whole range.
    """

    BLOCK = 16

    def __init__(self, image: np.ndarray, lowest: int):
        self.image, self.lowest, self.done_from = image, lowest, image.shape[0]
        self.flat: dict[int, bool] = {}

    def __getitem__(self, r: int) -> bool:
        if not self.lowest <= r < self.image.shape[0]:
            raise KeyError(r)
        while r < self.done_from:
            start = max(self.lowest, self.done_from - self.BLOCK)
            for row, f in _row_flatness(self.image, range(start, self.done_from)).items():
                self.flat[row] = f >= FLAT_ROW_FRACTION
            self.done_from = start
        return self.flat[r]


def find_info_strip(image: np.ndarray, flat_rows=None) -> int:
    """Rows of an info strip at the bottom of an image, found by image analysis.

    Exactly flat rows first (:func:`exact_info_strip`, what an instrument
    writes); in an 8-bit image where none are, rows flat within the noise of
    lossy compression (:func:`lossy_info_strip`, a micrograph exported into
    a JPEG figure). Parameters and return value as :func:`exact_info_strip`.
    """
    cut = exact_info_strip(image, flat_rows)
    if cut == 0 and flat_rows is None and image.ndim == 2 and image.dtype == np.uint8:
        cut = lossy_info_strip(image)
    return cut


def exact_info_strip(image: np.ndarray, flat_rows=None) -> int:
    """Rows of an info strip whose background is flat to the stored value, found by image analysis.

    The strip is the block of bottom rows that are flat (most pixels share
    one value: background of the strip, interrupted by text) above which the
    image rows are not flat (a micrograph's noise). At most two noisy rows
    at the very bottom are allowed (some writers pad the last row), and at
    most 15 % of the strip's rows may be non-flat (rows through dense text).
    A block whose every row is flat to the pixel holds no text or lines, and
    one whose median row is flat only in places (:data:`MOSTLY_FLAT`) holds
    grains on a clipped background: neither is a strip.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Stored pixel values (integer images; a float image has no exactly
        repeated values and gives 0).
    flat_rows : mapping, optional
        ``row -> bool`` (flatness at least :data:`FLAT_ROW_FRACTION`) for the candidate rows;
        None: :class:`_LazyFlatRows`, which works a row out when the walk reaches it (the tests
        hand in every row worked out up front, the form it replaced).

    Returns
    -------
    int
        Number of rows to drop at the bottom (0 if no strip is found, or if
        the image itself is flat so that no boundary can be told).
    """
    if image.ndim != 2 or image.dtype.kind not in "ui" or image.shape[0] < 50 or image.shape[1] < 50:
        return 0
    n_rows = image.shape[0]
    lowest = max(0, n_rows - int(MAX_STRIP_FRACTION * n_rows) - 6)
    flat = _LazyFlatRows(image, lowest) if flat_rows is None else flat_rows
    r = n_rows - 1
    skipped = 0
    while r >= lowest and not flat[r] and skipped < 2:
        r, skipped = r - 1, skipped + 1
    bottom = r
    top = _strip_top(flat, r, lowest)
    if top is None:
        return 0
    height = n_rows - top
    block = [flat[i] for i in range(top, bottom + 1)]
    if height < max(MIN_STRIP_ROWS, 0.02 * n_rows) or height > MAX_STRIP_FRACTION * n_rows:
        return 0
    if sum(block) < 0.85 * len(block):
        return 0
    flatness = np.array(list(_row_flatness(image, range(top, n_rows)).values()))
    if flatness.min() >= 0.999 or np.median(flatness) < MOSTLY_FLAT:
        # flat to the pixel (no text or lines: a clipped, saturated part of the image), or only half flat
        # (grains on a saturated background): not a strip
        return 0
    above = _row_flatness(image, range(max(0, top - 40), top))
    if not above or np.median(list(above.values())) >= 0.25:
        return 0  # the image above is as flat as the strip: no boundary to trust
    return int(height)


def _strip_top(of_strip, r: int, lowest: int) -> int | None:
    """Walk up from row ``r`` to ``lowest``: the highest row of the strip's kind before 4 rows of another kind.

    ``of_strip[row]`` tells whether a row is of the strip's kind; None when no row from ``r`` up is.
    """
    top, other = None, 0
    while r >= lowest:
        if of_strip[r]:
            top, other = r, 0
        else:
            other += 1
            if other >= 4:
                break
        r -= 1
    return top


def _row_modes(block: np.ndarray, tolerance: int) -> tuple[np.ndarray, np.ndarray]:
    """Each row's most common value, and the fraction of its pixels within ``tolerance`` of it (8-bit rows)."""
    if block.shape[0] == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    offsets = (np.arange(block.shape[0]) * 256)[:, None]
    counts = np.bincount((block.astype(np.int64) + offsets).ravel(), minlength=256 * block.shape[0])
    modes = counts.reshape(block.shape[0], 256).argmax(axis=1)
    near = (np.abs(block.astype(np.int64) - modes[:, None]) <= tolerance).mean(axis=1)
    return modes, near


def lossy_info_strip(image: np.ndarray) -> int:
    """Rows of an info strip in an 8-bit image whose flat colours lossy compression has roughened.

    The same walk up from the bottom as :func:`exact_info_strip`, with a row
    of the strip one whose most common value is the strip's background
    colour (within 2 :data:`LOSSY_TOLERANCE`) and that holds at least
    :data:`LOSSY_MIN_BACKGROUND` of pixels within :data:`LOSSY_TOLERANCE` of
    it; the walk stops after 4 rows of another kind (frame lines and a
    scale bar's rows pass). Then the strip must

    - be 8 rows (and 2 % of the height) to 30 % of the height, 85 % of its
      rows of the strip's kind;
    - hold something drawn: at least 1 % of its pixels
      :data:`MIN_MARK_CONTRAST` of the grey range off its background;
    - start along a straight edge: at least :data:`LOSSY_MIN_EDGE` of the
      columns change (by over 4 :data:`LOSSY_TOLERANCE`) between the 3 rows
      above and the 3 rows below its top;
    - lie under an image that is not of its kind (under 25 % of the 40 rows
      above are rows of the strip's colour) and not blank (its median row
      under 90 % one stored value).

    A smooth background with particles reaching into it (common in SEM
    figures) is flat within the tolerance too; the straight full-width edge
    is what tells a drawn strip from it. On the 357 EMPS training pictures
    (B. Yildirim, J. M. Cole, J. Chem. Inf. Model. 61 (2021) 1136) this
    found 27 strips the exact walk does not, each looked at: all drawn data
    bars, under a few hand-masked pixels of particles touching a bar's top.

    Parameters
    ----------
    image : ndarray of uint8, shape (rows, cols)

    Returns
    -------
    int
        Rows to drop at the bottom (0: no strip).
    """
    tol = LOSSY_TOLERANCE
    n_rows = image.shape[0]
    if image.ndim != 2 or image.dtype != np.uint8 or n_rows < 50 or image.shape[1] < 50:
        return 0
    lowest = max(0, n_rows - int(MAX_STRIP_FRACTION * n_rows) - 6)
    modes, near = _row_modes(image[n_rows - 3:], tol)
    if not (near >= FLAT_ROW_FRACTION).any():
        return 0  # a micrograph's noisy bottom rows: no strip (the common case, three rows read)
    modes, near = _row_modes(image[lowest:], tol)
    i = len(modes) - 1
    skipped = 0
    while i >= 0 and near[i] < FLAT_ROW_FRACTION and skipped < 2:
        i, skipped = i - 1, skipped + 1
    background = int(modes[i])
    of_strip = (np.abs(modes - background) <= 2 * tol) & (near >= LOSSY_MIN_BACKGROUND)
    top = _strip_top(of_strip, i, 0)
    if top is None:
        return 0
    height = len(modes) - top
    if height < max(MIN_STRIP_ROWS, 0.02 * n_rows) or height > MAX_STRIP_FRACTION * n_rows:
        return 0
    if of_strip[top:].mean() < 0.85:
        return 0
    start = lowest + top
    grey_range = float(image.max()) - float(image.min())
    drawn = np.abs(image[start:].astype(np.int64) - background) >= MIN_MARK_CONTRAST * grey_range
    if drawn.mean() < 0.01:
        return 0
    if start < 10:
        return 0
    above = image[max(0, start - 40):start]
    above_modes, above_near = _row_modes(above, tol)
    if ((np.abs(above_modes - background) <= 2 * tol) & (above_near >= LOSSY_MIN_BACKGROUND)).mean() >= 0.25:
        return 0  # the image above is of the strip's colour: no boundary to trust
    if np.median(list(_row_flatness(image, range(max(0, start - 40), start)).values())) >= 0.9:
        return 0  # a blank image above (flat to the stored value): nothing imaged to tell the strip from
    up = image[max(0, start - 3):start].astype(np.float64).mean(axis=0)
    down = image[start:start + 3].astype(np.float64).mean(axis=0)
    if (np.abs(up - down) > 4 * tol).mean() < LOSSY_MIN_EDGE:
        return 0
    return int(height)


def crop_rows(image: np.ndarray, keep_rows: int):
    """The top ``keep_rows`` rows of an image (the rest is the info strip)."""
    return image[: int(keep_rows)]


def annotation_mask(image: np.ndarray) -> np.ndarray | None:
    """Pixels of scale bars and text drawn into an image (True = drawn).

    Drawn marks have exactly the image's lowest or highest value. Connected
    sets of such pixels (8-connected) are marks when they are thin strokes
    (no pixel more than 2 px from the set's edge: letters, digits, frame
    lines) of at least 12 px, at most 40 px across, enclosing at most three
    times their own area (a clipped bright rim round a grain encloses the
    grain and is kept), or long narrow bars (length at least 5 times
    the width and at most 12 px wide: scale bars), and when they stand out
    from what surrounds them (median of the 1-px ring around them at least
    30 % of the grey range away: drawn, not a clipped rim or core of a
    grain). Solid blobs, such as grains clipped at the top of the grey
    range, are kept. The marks are
    grown by 2 px so that anti-aliased edges go too.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Stored integer values; float images return None.

    Returns
    -------
    ndarray of bool, shape (rows, cols), or None
        None when nothing was found.
    """
    from scipy import ndimage

    if image.ndim != 2 or image.dtype.kind not in "ui" or image.size == 0:
        return None
    lo, hi = image.min(), image.max()
    if lo == hi:
        return None
    marks = np.zeros(image.shape, bool)
    for value in (lo, hi):
        candidate = image == value
        where = np.flatnonzero(candidate)
        if where.size > 0.2 * image.size:  # a clipped background, not marks
            continue
        # all of it in the box of these pixels grown by 2 px: there the sets are labelled in the same (raster)
        # order as in the whole frame, and the 3 x 3 neighbourhood of every pixel next to a set lies inside
        r0, r1, c0, c1 = _box(where, image.shape, 2)
        candidate = candidate[r0:r1, c0:c1]
        where = np.flatnonzero(candidate)
        labels, n = ndimage.label(candidate, structure=np.ones((3, 3)))
        if n == 0:
            continue
        of_pixel = labels.ravel()[where]
        sizes = np.bincount(of_pixel, minlength=n + 1)
        sizes[0] = 0
        keep = np.zeros(n + 1, bool)
        big = np.flatnonzero(sizes >= 12)  # specks of clipped noise are not marks
        if big.size == 0:
            continue
        # the 1-px ring round each large set, in the box of the large sets grown by 2 px
        is_big = np.zeros(n + 1, bool)
        is_big[big] = True
        b0, b1, d0, d1 = _box(where[is_big[of_pixel]], labels.shape, 2)
        ring = ndimage.grey_dilation(labels[b0:b1, d0:d1], size=(3, 3)) * ~candidate[b0:b1, d0:d1]
        around = ring_medians(image[r0 + b0:r0 + b1, c0 + d0:c0 + d1], ring, big)
        contrast = np.abs(around - float(value)) / (float(hi) - float(lo))
        slices = ndimage.find_objects(labels)
        for lab, c in zip(big, contrast):
            if not c >= MIN_MARK_CONTRAST:  # NaN: every ring pixel went to a neighbouring set; not judged a mark
                continue
            sl = slices[lab - 1]
            h, w = sl[0].stop - sl[0].start, sl[1].stop - sl[1].start
            own = labels[sl] == lab
            thick = ndimage.distance_transform_edt(np.pad(own, 1)).max()
            long, short = max(h, w), min(h, w)
            hole = int(ndimage.binary_fill_holes(own).sum()) - int(sizes[lab])
            # a line of text is short across; a clipped rim round a grain encloses much more than it covers
            stroke = thick <= 2.0 and short <= MAX_TEXT_HEIGHT and hole <= 3 * sizes[lab]
            bar = short <= 12 and long >= 5 * short and long >= 20 and sizes[lab] >= 0.6 * h * w
            keep[lab] = stroke or bar
        if keep.any():
            marks[r0:r1, c0:c1] |= keep[labels]
    if not marks.any():
        return None
    return ndimage.binary_dilation(marks, iterations=2)


def fill_marks(image: np.ndarray, marks: np.ndarray) -> np.ndarray:
    """A copy of ``image`` with each mark replaced by the median grey level of the 1-px ring around it.

    The pixels under a drawn mark are lost; filling them with their
    surroundings keeps a mark from looking like a grain to any step, also
    one that does not read ``FrameData.valid``.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    marks : ndarray of bool, shape (rows, cols)

    Returns
    -------
    ndarray
        Same dtype as ``image``.
    """
    from scipy import ndimage

    labels, n = ndimage.label(marks, structure=np.ones((3, 3)))
    if n == 0:
        return image
    ring = ndimage.grey_dilation(labels, size=(3, 3)) * ~marks
    level = ring_medians(image, ring, np.arange(1, n + 1))
    level = np.where(np.isfinite(level), level, float(np.median(image[~marks])) if (~marks).any() else 0.0)
    out = image.copy()
    out[marks] = np.concatenate([[0.0], level])[labels[marks]].astype(image.dtype)
    return out


def ring_medians(image: np.ndarray, ring: np.ndarray, index) -> np.ndarray:
    """Median of ``image`` over the pixels of each ring label in ``index`` (NaN where a label has none).

    The same values as ``scipy.ndimage.median(image, ring, index=index)``
    for every label that has pixels (scipy returns an arbitrary value for one
    that has none), computed over the ring pixels alone: scipy's labelled
    median orders every pixel of the image, about 0.3 s on a 2048 px frame,
    for rings of a few hundred pixels.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
    ring : ndarray of int, shape (rows, cols)
        0 outside the rings.
    index : sequence of int
        Ring labels (none of them 0).

    Returns
    -------
    ndarray of float64, shape (len(index),)
    """
    from scipy import ndimage

    index = np.asarray(index)
    on = ring > 0
    if not on.any():
        return np.full(index.shape, np.nan)
    out = np.asarray(ndimage.median(image[on], ring[on], index=index), float).reshape(index.shape)
    counts = np.bincount(ring[on].ravel(), minlength=int(index.max(initial=0)) + 1)
    out[counts[index] == 0] = np.nan
    return out


def _box(flat_index: np.ndarray, shape: tuple[int, int], margin: int) -> tuple[int, int, int, int]:
    """Rows ``r0:r1`` and columns ``c0:c1`` of the bounding box of pixels given by flat index, grown by ``margin`` px (inside the image)."""
    rows, cols = np.divmod(flat_index, shape[1])
    return (max(int(rows.min()) - margin, 0), min(int(rows.max()) + margin + 1, shape[0]),
            max(int(cols.min()) - margin, 0), min(int(cols.max()) + margin + 1, shape[1]))
