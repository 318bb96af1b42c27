"""Reader plugin ``read-jeol``: JEOL Analysis Station image files (``.img``, ``.map``).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). An ``.img`` file holds one SEM or STEM
image, a ``.map`` file one element map of the same scan; the pixel size is
the scanned field over the magnification as the file states it (source
``instrument``). The project file (``.asw``) and the spectrum files
(``.pts``, ``.eds``) are not read: the images they refer to are files of
their own.
"""

from __future__ import annotations

from .common import has_magic, head, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-jeol"


def recognises(path: str) -> bool:
    """``.img`` and ``.map`` files that start with the JEOL image signature (a little-endian 52).

    A ``.map`` file with the MRC2014 word ``MAP`` at byte 208 is an MRC map of 52 columns (``read-mrc``).
    """
    if suffix(path) not in (".img", ".map") or not has_magic(path, "jeol-img"):
        return False
    return suffix(path) != ".map" or head(path, 212)[208:211] != b"MAP"


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(NAME, "jeol", lambda p: "JEOL " + suffix(p)[1:].upper(), recognises, "JEOL image calibration (scan size over magnification)")
