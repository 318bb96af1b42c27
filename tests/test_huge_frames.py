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


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="numpy advises huge pages on Linux only")
def test_numpy_huge_page_advice_is_off_after_keep_freed_memory(monkeypatch):
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE", raising=False)
    keep_freed_memory()
    from grainhabit.executors import _no_hugepage_advice

    assert _no_hugepage_advice() is True
    try:
        from numpy._core.multiarray import _get_madvise_hugepage
    except ImportError:  # pragma: no cover
        pytest.skip("numpy without _get_madvise_hugepage")
    assert _get_madvise_hugepage() is False
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    assert _no_hugepage_advice() is False  # the environment's choice stands
