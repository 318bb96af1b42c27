"""Reader plugin ``read-phenom-elid``: Phenom ELID project files.

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Every image of the project is a frame;
spectra are skipped with a note. The pixel size is the image's own
calibration (source ``instrument``).
"""

from __future__ import annotations

from .common import suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.2"
NAME = "read-phenom-elid"


def recognises(path: str) -> bool:
    """``.elid`` files."""
    return suffix(path) == ".elid"


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(
    NAME, "phenom", lambda p: "ELID", recognises, "ELID image calibration")
