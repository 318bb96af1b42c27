"""Reader plugin ``read-tvips``: TVIPS camera stream files (``NAME_000.tvips``, ``NAME_001.tvips``, ...).

Read with the optional electron-microscopy file library (:mod:`.signals`;
``pip install grainhabit[all]``). A recording is split over numbered files;
the first (``_000``) is read, and the library follows it into the others,
so a later part is recognised with no frames of its own when its first
part lies beside it. Every image of the recording is a frame. The pixel
size is the file's own calibration (source ``instrument``); a recording
whose header states none (0 nm) needs ``input.pixel_size_nm``.
"""

from __future__ import annotations

import os
import re

from grainhabit import hookimpl

from .common import has_magic, suffix
from .signals import reader_hooks

GRAINHABIT_API = 1
__version__ = "1.0"
NAME = "read-tvips"

#: ``NAME_NNN.tvips``: the part number of a recording split over several files.
_PART = re.compile(r"^(?P<stem>.*)_(?P<part>\d{3})\.tvips$", re.IGNORECASE)


def recognises(path: str) -> bool:
    """``.tvips`` files that start with the stream header's size (256, little-endian)."""
    return suffix(path) == ".tvips" and has_magic(path, "tvips")


def first_part(path: str) -> str | None:
    """The ``_000`` file of the recording a later part belongs to, if it lies beside it; else None."""
    m = _PART.match(os.path.basename(path))
    if m is None or int(m.group("part")) == 0:
        return None
    first = os.path.join(os.path.dirname(path), f"{m.group('stem')}_000{os.path.splitext(path)[1]}")
    return first if os.path.isfile(first) else None


# a tuple, so that the plugin manager does not take the listing hook made here for a hook of its own
_RECORDING_HOOKS = reader_hooks(NAME, "tvips", lambda p: "TVIPS", recognises, "TVIPS header pixel size")
grainhabit_read_frame = _RECORDING_HOOKS[1]


@hookimpl
def grainhabit_list_frames(path: str, options: dict):
    """List the images of a recording from its first part; a later part contributes none of its own."""
    if suffix(path) == ".tvips" and first_part(path) is not None:
        return []
    return _RECORDING_HOOKS[0](path, options)
