"""Reader plugin ``read-hspy``: HyperSpy's own HDF5 files (``.hspy``).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Images saved from HyperSpy (and every
image of a saved stack) are frames; spectra and other signals are skipped
with a note. The pixel size is the signal's own axes' calibration (source
``instrument``), none where its axes carry no length unit.
"""

from __future__ import annotations

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-hspy"


def recognises(path: str) -> bool:
    """``.hspy`` files that start with the HDF5 signature."""
    return suffix(path) == ".hspy" and has_magic(path, "hdf5")


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(NAME, "hspy", lambda p: "HSPY", recognises, "HyperSpy signal axes")
