"""Fixtures of the tests; the builders they use live in builders.py."""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile

import pytest

from builders import write_two_batches

# model tables cached on disk (plugins/habit/disk_cache.py) go to a folder of this test session, shared by
# the workers and command-line runs it starts, never to the user's own cache
os.environ["GRAINHABIT_CACHE"] = tempfile.mkdtemp(prefix="grainhabit-test-cache-")
atexit.register(shutil.rmtree, os.environ["GRAINHABIT_CACHE"], True)


@pytest.fixture
def small_survey(tmp_path):
    """Two samples of two frames each: discs and squares of known size, 5 nm pixels."""
    data = tmp_path / "data"
    write_two_batches(data)
    return tmp_path
