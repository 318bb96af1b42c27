"""Fixtures of the tests; the builders they use live in builders.py."""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile

import pytest

from builders import draw_frame, write_tiff

# model tables cached on disk (plugins/habit/disk_cache.py) go to a folder of this test session, shared by
# the workers and command-line runs it starts, never to the user's own cache
os.environ["GRAINHABIT_CACHE"] = tempfile.mkdtemp(prefix="grainhabit-test-cache-")
atexit.register(shutil.rmtree, os.environ["GRAINHABIT_CACHE"], True)


@pytest.fixture
def small_survey(tmp_path):
    """Two samples of two frames each: discs and squares of known size, 5 nm pixels."""
    data = tmp_path / "data"
    for s, sample in enumerate(("alpha-batch", "beta-batch")):
        for i in range(2):
            img = draw_frame(discs=[(60, 60, 20), (60, 180, 15 + 3 * s)],
                             squares=[(150, 40, 40), (150, 160, 30 + 2 * i)], seed=10 * s + i)
            write_tiff(data / sample / f"f{i}.tif", img, 5.0)
    return tmp_path
