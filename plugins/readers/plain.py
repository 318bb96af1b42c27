"""Reader plugin ``read-bitmap``: PNG, JPEG and BMP exports (Pillow).

Such exports carry no specimen scale of their own (their dots-per-inch are
a screen or print setting), so the frame gets the workflow's
``input.pixel_size_nm`` (source ``workflow``) unless a Hitachi SEM text
file lies beside the image (:mod:`.sidecar`). An info strip under the
image is cropped where the text file states the image height or image
analysis finds one; drawn scale bars and text are masked.
"""

from __future__ import annotations

import numpy as np

from grainhabit import hookimpl
from grainhabit.frame import FrameRef

from . import sidecar
from .common import check_size, describe, finish, has_magic, refs_for

GRAINHABIT_API = 1
__version__ = "1.1"
NAME = "read-bitmap"


def recognises(path: str) -> bool:
    """PNG, JPEG and BMP files, by their magic bytes."""
    return has_magic(path, "png") or has_magic(path, "jpeg") or has_magic(path, "bmp")


def _open(path: str):
    from PIL import Image

    try:
        return Image.open(path)
    except Exception as exc:
        raise ValueError(f"{path}: not a readable image ({exc.__class__.__name__}: {exc})") from None


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List a bitmap export (one frame; every frame of a multi-frame file)."""
    if not recognises(path):
        return None
    with _open(path) as im:
        shape = (im.height, im.width)
        n = int(getattr(im, "n_frames", 1) or 1)
        mode = im.mode
    check_size(path, shape, options)
    info = sidecar.read(path)
    return refs_for(path, NAME, [shape] * n, mode, describe(info.calibration if info else None, options))


@hookimpl
def grainhabit_read_frame(ref: FrameRef, options: dict):
    """Read a bitmap frame; the calibration is the workflow's unless a text file beside it has one."""
    if ref.reader != NAME:
        return None
    check_size(ref.source, ref.shape, options)
    with _open(ref.path) as im:
        if ref.page:
            im.seek(ref.page)
        if im.mode in ("P", "PA"):
            im = im.convert("RGBA" if "A" in im.mode else "RGB")
        elif im.mode in ("LA",):
            im = im.convert("L")
        data = np.asarray(im)
    info = sidecar.read(ref.path)
    cal = info.calibration if info else None
    notes = () if info else ("bitmap export: no specimen scale in the file",)
    return finish(ref, data, cal, options, notes=notes, meta={"format": ref.dtype},
                  image_rows=info.image_rows if info else None, strip_detail=info.maker if info else "",
                  look_for_overlays=True)
