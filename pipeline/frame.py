"""The record that travels through the per-frame stages.

Every per-frame hook receives a :class:`FrameData` and returns a new one
(use :meth:`FrameData.replace` or :meth:`FrameData.with_columns`); stages never
mutate what they were given, so a task is pure and can be retried.

Conventions (from the design contract):

- arrays are indexed ``[row, col]``; x runs along columns, y along rows;
- the origin is the top-left corner of the top-left pixel, so a pixel's
  centre is at ``((col + 0.5) * px, (row + 0.5) * px)`` in nm;
- per-grain columns are 1-D arrays of equal length, one row per grain, in
  the order of ``grains["label"]``.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

import numpy as np


@dataclass(frozen=True)
class FrameRef:
    """Where a frame lives, known before its pixels are read.

    Parameters
    ----------
    source : str
        Path as found, with ``#N`` appended for page ``N`` (0-based) of a
        multi-page file.
    path : str
        File or archive path.
    page : int
        Page (or archive frame) index inside ``path``.
    shape : tuple of int
        Declared shape of the stored image, e.g. ``(rows, cols)`` or
        ``(rows, cols, 3)``.
    dtype : str
        Declared dtype name.
    reader : str
        Name of the reader plugin that listed the frame.
    content_hash : str
        Hash of the frame's stored bytes (or of the file for single-page
        files); empty if the reader cannot tell without reading.
    calibration : str
        The calibration the reader will use, as one line for
        ``grainhabit check`` (e.g. ``"5.5 nm (instrument: Tescan text tag
        50431, PixelSizeX)"``); empty if known only when the frame is read.
    """

    source: str
    path: str
    page: int = 0
    shape: tuple = ()
    dtype: str = ""
    reader: str = ""
    content_hash: str = ""
    calibration: str = ""


@dataclass(frozen=True)
class FrameData:
    """One frame and everything found in it so far.

    Parameters
    ----------
    source : str
        See :class:`FrameRef`.
    sample : str
        Sample name derived from the path (``input.sample`` template).
    raw : ndarray of float32, shape (rows, cols)
        Frame as read (luminance), in the file's intensity units.
    pixel_size_nm : float
        Side of one (square) pixel in nm.
    calibration : str
        Where ``pixel_size_nm`` came from: ``"instrument"``, ``"ome"``,
        ``"tiff-description"``, ``"tiff-resolution"`` or ``"workflow"``
        (the design contract's labels).
    image : ndarray of float32, shape (rows, cols), optional
        Preprocessed frame, flattened and scaled so that grains are bright
        and background is dark, roughly in [0, 1]. Set by preprocess steps.
    polarity : str
        ``"bright"`` if grains were brighter than background in ``raw``,
        ``"dark"`` if darker; set by preprocess steps.
    labels : ndarray of int32, shape (rows, cols), optional
        0 background, 1..n grains. Set by segment steps.
    grains : dict of str -> ndarray, shape (n_grains,)
        Per-grain columns. Segment steps set ``label``, ``split`` and
        ``edge_cut``; measure steps add the morphology; classify and fit
        steps add ``habit``, ``habit_score``, ``alpha`` and so on.
    outlines : tuple of ndarray, shape (k, 2)
        Fitted outline polygon of each grain as (x_nm, y_nm) vertices, in
        the order of ``grains["label"]``. Set by measure steps.
    notes : tuple of str
        Remarks for the frame record (e.g. "RGB converted to luminance").
    meta : dict
        Free-form acquisition metadata from the reader.
    valid : ndarray of bool, shape (rows, cols), optional
        False on pixels that are not specimen (scale bars and text drawn
        into the image); segmentation leaves them out. None: every pixel
        is specimen. Set by readers.
    """

    source: str
    sample: str
    raw: np.ndarray
    pixel_size_nm: float
    calibration: str = ""
    image: np.ndarray | None = None
    polarity: str = ""
    labels: np.ndarray | None = None
    grains: dict = field(default_factory=dict)
    outlines: tuple = ()
    notes: tuple = ()
    meta: dict = field(default_factory=dict)
    valid: np.ndarray | None = None

    @property
    def n_grains(self) -> int:
        """Number of grains found so far (0 before segmentation)."""
        lab = self.grains.get("label")
        return 0 if lab is None else int(len(lab))

    def replace(self, **changes: Any) -> "FrameData":
        """Return a copy with the given fields replaced."""
        return dataclasses.replace(self, **changes)

    def with_columns(self, **columns: np.ndarray) -> "FrameData":
        """Return a copy with per-grain columns added or replaced.

        Raises
        ------
        ValueError
            If a column's length differs from the number of grains.
        """
        n = self.n_grains if "label" in self.grains else None
        new = dict(self.grains)
        for name, values in columns.items():
            arr = np.asarray(values)
            if arr.ndim != 1:
                raise ValueError(f"column {name!r} must be 1-D, got shape {arr.shape}")
            if n is not None and len(arr) != n:
                raise ValueError(f"column {name!r} has {len(arr)} rows, frame has {n} grains")
            new[name] = arr
        return dataclasses.replace(self, grains=new)

    def with_note(self, note: str) -> "FrameData":
        """Return a copy with one more note for the frame record."""
        return dataclasses.replace(self, notes=self.notes + (note,))
