"""Reader plugin ``read-gatan-dm``: Gatan DM3 and DM4 files.

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Every 2-D image in a file is a frame (a
stack gives one frame per image); other signals (spectra, line profiles)
are skipped with a note. The pixel size is the image's own calibration
(source ``instrument``), per axis: non-square pixels are resampled to
square ones with a note, or refused when too far from square.
"""

from __future__ import annotations

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.2"
NAME = "read-gatan-dm"


def recognises(path: str) -> bool:
    """``.dm3`` / ``.dm4`` files that start with the format's version number."""
    ext = suffix(path)
    return ext in (".dm3", ".dm4") and has_magic(path, ext[1:])


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(
    NAME, "digitalmicrograph", lambda p: suffix(p)[1:].upper(), recognises, "Gatan DM image calibration")
