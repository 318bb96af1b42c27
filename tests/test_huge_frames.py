"""Huge frames: reuse of freed frame-sized arrays in a worker (glibc malloc settings)."""

import resource
import sys

import numpy as np
import pytest

from grainhabit.executors import keep_freed_memory


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc mallopt")
def test_freed_frame_sized_array_is_reused_without_new_page_faults():
    assert keep_freed_memory() is True
    assert keep_freed_memory() is True  # idempotent
    n = 64 * 1024 * 1024 // 8  # a 64 MiB float64 array: above glibc's largest mmap threshold
    a = np.ones(n)
    del a
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    b = np.ones(n)  # written in full: every page touched
    faults = resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before
    assert float(b.sum()) == n
    # a fresh mapping would fault in 16384 small pages (or 32 huge ones with their zeroing); a reused heap
    # chunk faults in (almost) none
    assert faults < 16
