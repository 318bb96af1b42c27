"""How a local cluster starts its workers: forked from the run's process on Linux, spawned elsewhere."""

from __future__ import annotations

import sys

import pytest

from grainhabit.executors import DaskExecutor, start_method


def test_auto_forks_on_linux_and_spawns_elsewhere(monkeypatch):
    monkeypatch.setattr(sys, "platform", "linux")
    assert start_method("auto") == "fork"
    for other in ("darwin", "win32"):
        monkeypatch.setattr(sys, "platform", other)
        assert start_method("auto") == "spawn"
    assert start_method("spawn") == "spawn" and start_method("fork") == "fork"


def _worker_facts():
    import os
    import sys

    from threadpoolctl import threadpool_info

    return {"pid": os.getpid(), "threads": max((p["num_threads"] for p in threadpool_info()), default=1),
            "inherited": "grainhabit.plugins.habit.engine" in sys.modules}


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="fork is the default on Linux only")
def test_forked_worker_inherits_imports_and_runs_one_blas_thread():
    # the run's process has loaded numpy's BLAS with its own thread count before the fork; the worker
    # must compute with one thread, as a spawned worker (OMP_NUM_THREADS=1 and kin) and a serial run do
    import os

    import grainhabit.plugins.habit.engine  # noqa: F401  (imported here, so a forked worker has it)
    import numpy as np

    np.ones((64, 64)) @ np.ones((64, 64))  # BLAS loaded and used in this process
    ex = DaskExecutor(workers=1, start_method="fork")
    ex.start()
    try:
        facts = list(ex.client.run(_worker_facts).values())
    finally:
        ex.close()
    assert len(facts) == 1
    assert facts[0]["pid"] != os.getpid()
    assert facts[0]["inherited"]
    assert facts[0]["threads"] == 1
