"""Reader plugin ``read-bruker-bcf``: Bruker Esprit composite files (``.bcf``).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). A ``.bcf`` file holds the SEM images of
an X-ray map and the map itself: every image is a frame, the spectrum image
is skipped with a note. The pixel size is the images' own calibration
(source ``instrument``).
"""

from __future__ import annotations

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-bruker-bcf"


def recognises(path: str) -> bool:
    """``.bcf`` files that start with the container's signature."""
    return suffix(path) == ".bcf" and has_magic(path, "bcf")


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(NAME, "bruker", lambda p: "BCF", recognises, "BCF image calibration")
