"""Reader plugin ``read-tia``: TIA SER series files and their EMI companions.

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). A ``.ser`` file holds the data (every
image of a series is a frame) with its calibration in m (source
``instrument``); the ``.emi`` file beside it holds only the acquisition
settings. So ``.ser`` files are read, and an ``.emi`` file is recognised
with no frames of its own when its ``.ser`` files are there (they are read
on their own), or refused when they are missing.
"""

from __future__ import annotations

import glob
import os

from grainhabit import hookimpl

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.2"
NAME = "read-tia"


def recognises(path: str) -> bool:
    """``.ser`` files that start with the series signature."""
    return suffix(path) == ".ser" and has_magic(path, "ser")


def series_of(emi_path: str) -> list[str]:
    """The ``.ser`` files that belong to an ``.emi`` file (``NAME_1.ser``, ``NAME_2.ser``, ...)."""
    stem = os.path.splitext(emi_path)[0]
    return sorted(glob.glob(glob.escape(stem) + "_*.ser") + glob.glob(glob.escape(stem) + "_*.SER"))


# a tuple, so that the plugin manager does not take the listing hook made here for a hook of its own
_SER_HOOKS = reader_hooks(NAME, "tia", lambda p: "SER", recognises, "SER calibration")
grainhabit_read_frame = _SER_HOOKS[1]


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List the images of a ``.ser`` file; an ``.emi`` file contributes none of its own."""
    if suffix(path) == ".emi":
        if not series_of(path):
            raise ValueError(f"{path}: an EMI file holds settings only; its .ser data files are missing")
        return []
    return _SER_HOOKS[0](path, options)
