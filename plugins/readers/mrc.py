"""Reader plugin ``read-mrc``: MRC / MRC2014 images and stacks (mrcfile, BSD).

Every section of a stack (or of a volume) is a frame. The pixel size is the
header's ``voxel_size`` (Å, from cell size over sampling; source
``instrument``); a header whose voxel size is 0 or 1 Å by default carries
no calibration, so the workflow's is used. Non-square pixels are resampled
or refused (see :func:`.calibration.resample_square`).
"""

from __future__ import annotations

import warnings

import mrcfile
import numpy as np

from grainhabit import hookimpl
from grainhabit.frame import FrameRef

from .calibration import Calibration, make
from .common import MAGIC, check_size, describe, finish, head, refs_for, suffix

GRAINHABIT_API = 1
__version__ = "1.1"
NAME = "read-mrc"
SUFFIXES = (".mrc", ".mrcs", ".st", ".ali", ".rec", ".map")


def recognises(path: str) -> bool:
    """MRC suffixes, or the ``MAP`` word at byte 208 of an MRC2014 header.

    A ``.map`` file that starts with the JEOL image signature and lacks that word is a JEOL element map
    (``read-jeol``), not an MRC map.
    """
    ext = suffix(path)
    if ext in SUFFIXES and ext != ".map":
        return True
    start = head(path, 212)
    has_word = len(start) == 212 and start[208:211] == b"MAP"
    if ext == ".map":
        return has_word or not any(start.startswith(m) for m in MAGIC["jeol-img"])
    return has_word


def calibration(mrc) -> tuple[Calibration | None, str]:
    """Pixel size from the header (Å -> nm), None when the header holds the defaults 0 or 1 Å."""
    vs = mrc.voxel_size
    x, y = float(vs.x), float(vs.y)
    if x <= 0 or y <= 0 or (x == 1.0 and y == 1.0 and float(mrc.header.cella.x) == float(mrc.header.mx)):
        return None, "the MRC header holds no pixel size (cell size 0, or 1 Å per pixel by default)"
    return make(x / 10.0, y / 10.0, "instrument", "MRC header cell size over sampling"), ""


def _open(path: str):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # permissive mode warns about headers it still reads
            return mrcfile.mmap(path, mode="r", permissive=True)
    except Exception as exc:
        raise ValueError(f"{path}: not a readable MRC file ({exc.__class__.__name__}: {exc})") from None


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List every section of an MRC file."""
    if not recognises(path):
        return None
    with _open(path) as mrc:
        if mrc.data is None:
            raise ValueError(f"{path}: the MRC file holds no data")
        shape = mrc.data.shape
        if len(shape) < 2:
            raise ValueError(f"{path}: the MRC file holds no image (shape {shape})")
        frame_shape = tuple(shape[-2:])
        check_size(path, frame_shape, options)
        n = int(np.prod(shape[:-2])) if len(shape) > 2 else 1
        cal, _ = calibration(mrc)
        return refs_for(path, NAME, [frame_shape] * n, str(mrc.data.dtype), describe(cal, options))


@hookimpl
def grainhabit_read_frame(ref: FrameRef, options: dict):
    """Read one section of an MRC file with the header's pixel size."""
    if ref.reader != NAME:
        return None
    with _open(ref.path) as mrc:
        data = mrc.data
        check_size(ref.source, data.shape[-2:], options)
        img = np.array(data.reshape((-1,) + data.shape[-2:])[ref.page] if data.ndim > 2 else data)
        cal, why = calibration(mrc)
        n = int(np.prod(data.shape[:-2])) if data.ndim > 2 else 1
    notes = (why,) if why else ()
    return finish(ref, img, cal, options, notes=notes, meta={"section": ref.page, "sections": n})
