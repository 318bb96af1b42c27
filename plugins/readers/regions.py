"""Reading a TIFF frame by regions, for frames too large to read whole.

:class:`TiffRegions` knows a frame's shape and calibration from the file's
tags (no pixels read) and reads any window of it: through a memory map
where the page is stored uncompressed and contiguous
(:func:`tifffile.memmap`), otherwise through tifffile's zarr store of the
page (``TiffPageSeries.aszarr``), which decodes only the strips or tiles
that the window touches.

A frame read this way gets the calibration rules of a whole read
(:func:`grainhabit.plugins.readers.common.finish`) and the info strip
stated in the maker's metadata is cropped; the image analysis that looks
for an unstated info strip and for drawn scale bars and text needs the
whole frame and is left out (a note says so). Non-square pixels are
refused (resampling needs the whole frame).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from grainhabit.frame import FrameRef

from .calibration import check_plausible
from .common import check_size, to_luminance


@dataclass(frozen=True)
class TiffRegions:
    """One frame of a TIFF file, read by regions (picklable: holds the path, not an open file).

    Attributes
    ----------
    path : str
    series : int
        Series index in the file.
    page : int
        Frame index within the series.
    shape : tuple of int
        (rows, cols) of the frame after the info strip is cropped.
    pixel_size_nm : float
        NaN where the file has no calibration of its own.
    calibration : str
    notes : tuple of str
    meta : dict
    rgb : bool
        Stored as RGB(A) samples (read as BT.709 luminance).
    """

    path: str
    series: int
    page: int
    shape: tuple
    pixel_size_nm: float
    calibration: str
    notes: tuple = ()
    meta: dict = field(default_factory=dict)
    rgb: bool = False

    def read(self, window: tuple) -> np.ndarray:
        """Pixels of ``window`` ((row slice, col slice) in the frame) as float32.

        Raises
        ------
        ValueError
            If the window leaves the frame.
        """
        import tifffile

        rs, cs = window
        if not (0 <= rs.start < rs.stop <= self.shape[0] and 0 <= cs.start < cs.stop <= self.shape[1]):
            raise ValueError(f"{self.path}: window rows {rs.start}:{rs.stop}, cols {cs.start}:{cs.stop} "
                             f"leaves the frame of {self.shape[0]} x {self.shape[1]} px")
        with tifffile.TiffFile(self.path) as tif:
            series = tif.series[self.series]
            page = series.pages[self.page] if self.page < len(series.pages) else None
            if page is not None and getattr(page, "is_memmappable", False) and not self.rgb:
                data = tifffile.memmap(self.path, series=self.series, level=0, mode="r")
                lead = data.ndim - 2
                where = tuple(int(i) for i in np.unravel_index(self.page, data.shape[:lead])) if lead > 0 else ()
                block = np.asarray(data[where + (rs, cs)], dtype=np.float32)
                del data
                return block
            import zarr

            store = series.aszarr()
            try:
                arr = zarr.open(store, mode="r")
                lead = arr.ndim - (3 if self.rgb else 2)
                where = tuple(int(i) for i in np.unravel_index(self.page, arr.shape[:lead])) if lead > 0 else ()
                block = arr[where + (rs, cs)]
            finally:
                store.close()
        block = np.asarray(block)
        if self.rgb:
            return to_luminance(block)
        return block.astype(np.float32, copy=False)


def open_tiff(ref: FrameRef, options: dict, locate, calibrate) -> TiffRegions:
    """Open a listed TIFF frame for region reads (tags only).

    Parameters
    ----------
    ref : FrameRef
    options : dict
        The workflow's ``input`` section.
    locate : callable
        ``locate(tif, index) -> (series_index, series, local_index, frame_shape, rgb)``.
    calibrate : callable
        ``calibrate(tif, page, path, series_index) -> (cal, info, notes)``.

    Returns
    -------
    TiffRegions

    Raises
    ------
    ValueError
        If the frame exceeds ``input.max_pixels``, its pixels are not square,
        or its calibration contradicts the file.
    """
    import tifffile

    with tifffile.TiffFile(ref.path) as tif:
        si, series, local, fshape, rgb = locate(tif, ref.page)
        check_size(ref.source, fshape, options)
        page = series.pages[0] if series.pages else tif.pages[0]
        cal, info, notes = calibrate(tif, page, ref.path, si)
        meta = {"tiff_series": series.name or "", "dtype": str(series.dtype)}
    notes = list(notes)
    rows, cols = int(fshape[0]), int(fshape[1])
    image_rows = getattr(info, "image_rows", None)
    strip_rows = getattr(info, "strip_rows", None)
    cut = 0
    if image_rows and 0 < image_rows < rows:
        cut = rows - int(image_rows)
    elif strip_rows and 0 < strip_rows < rows:
        cut = int(strip_rows)
    if cut:
        notes.append(f"info strip removed: bottom {cut} of {rows} rows (the file states it)")
    notes.append("read by regions: no image analysis for an unstated info strip or drawn scale bars and text")
    if rgb:
        notes.append("RGB converted to luminance (BT.709)")
    px, source = math.nan, ""
    mode = options.get("calibration") or "auto"
    if mode == "override" and options.get("pixel_size_nm"):
        px, source = float(options["pixel_size_nm"]), "workflow"
    elif cal is not None:
        check_plausible(cal, cols, ref.source)
        if not cal.square:
            raise ValueError(f"{ref.source}: pixels are not square ({cal.text()}); resampling needs the whole "
                             "frame, which exceeds the frame budget")
        px, source = cal.x_nm, cal.source
        if cal.detail:
            notes.append(f"pixel size from {cal.detail}")
    return TiffRegions(path=ref.path, series=si, page=local, shape=(rows - cut, cols), pixel_size_nm=px,
                       calibration=source, notes=tuple(notes), meta=meta, rgb=bool(rgb))


@dataclass(frozen=True)
class ArchiveRegions:
    """One frame of an archive made by ``grainhabit ingest``, read by regions (its zarr chunks are tiles).

    Attributes
    ----------
    path : str
        The archive (a zarr group).
    key : str
        The frame's array in the group ``frames``.
    shape, pixel_size_nm, calibration, notes, meta
        As :class:`TiffRegions`.
    """

    path: str
    key: str
    shape: tuple
    pixel_size_nm: float
    calibration: str
    notes: tuple = ()
    meta: dict = field(default_factory=dict)

    def read(self, window: tuple) -> np.ndarray:
        """Pixels of ``window`` ((row slice, col slice) in the frame) as float32; only its chunks are read."""
        import zarr

        rs, cs = window
        if not (0 <= rs.start < rs.stop <= self.shape[0] and 0 <= cs.start < cs.stop <= self.shape[1]):
            raise ValueError(f"{self.path}: window rows {rs.start}:{rs.stop}, cols {cs.start}:{cs.stop} "
                             f"leaves the frame of {self.shape[0]} x {self.shape[1]} px")
        arr = zarr.open_group(self.path, mode="r")["frames"][self.key]
        return np.asarray(arr[rs, cs], dtype=np.float32)
