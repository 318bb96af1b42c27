"""Reader plugin ``read-digitalsurf``: Digital Surf files (``.sur``, ``.pro``).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). Images (SEM and AFM pictures and
surfaces saved as studiables) are frames; profiles and spectra are skipped
with a note. The pixel size is the file's own calibration (source
``instrument``).
"""

from __future__ import annotations

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-digitalsurf"


def recognises(path: str) -> bool:
    """``.sur`` and ``.pro`` files that start with a Digital Surf signature."""
    return suffix(path) in (".sur", ".pro") and has_magic(path, "digitalsurf")


grainhabit_list_frames, grainhabit_read_frame = reader_hooks(NAME, "digitalsurf", lambda p: "Digital Surf " + suffix(p)[1:].upper(), recognises, "Digital Surf calibration")
