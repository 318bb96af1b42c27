"""Reader plugin ``read-emd``: EMD files (HDF5), as Velox and other programs write them.

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Every 2-D image (and every image of an
image stack) is a frame; spectra and spectrum images are skipped with a
note. The pixel size is the image's own calibration (source
``instrument``).
"""

from __future__ import annotations

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.2"
NAME = "read-emd"


def recognises(path: str) -> bool:
    """``.emd`` files that start with the HDF5 signature."""
    return suffix(path) == ".emd" and has_magic(path, "hdf5")


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(
    NAME, "emd", lambda p: "EMD", recognises, "EMD image calibration")
