"""Reader plugin ``read-semper``: Semper unformatted image files (``.unf``).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Every 2-D image (and every layer of a
3-D picture) is a frame; the pixel size is the file's own calibration
(source ``instrument``), none where the file carries no length unit.
"""

from __future__ import annotations

from .common import suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-semper"


def recognises(path: str) -> bool:
    """``.unf`` files (the format has no signature of its own: Fortran record lengths come first)."""
    return suffix(path) == ".unf"


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(NAME, "semper", lambda p: "Semper UNF", recognises, "Semper UNF calibration")
