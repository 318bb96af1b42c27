"""Worker preload: dask worker processes of a local cluster ignore SIGINT, and use one BLAS thread.

Ctrl-C on a terminal signals the whole foreground process group, the local
cluster's worker processes too; each then died with its own traceback
(about 90 lines before the run's one-line message). Loaded in every worker
of the local cluster (dask's ``distributed.worker.preload``), this module
makes the worker ignore SIGINT: the run's own process takes the Ctrl-C and
shuts its cluster down. SIGTERM and SIGKILL work on the workers as before.

A worker forked from the run's process (``execution.start_method: fork``)
inherits the BLAS and OpenMP thread pools that process's libraries set up
when they were loaded, before dask's nanny set ``OMP_NUM_THREADS=1`` and its
kin; :func:`dask_setup` limits them to one thread, as a spawned worker has
them, so both give the serial executor's results to the bit.
"""

from __future__ import annotations

import signal
import threading


def _ignore_sigint() -> None:
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGINT, signal.SIG_IGN)


_ignore_sigint()


#: The thread-pool limits set in this worker (kept for its lifetime).
_LIMITS: list = []


def dask_setup(worker=None) -> None:
    """dask's preload hook (called in the worker process at its start)."""
    _ignore_sigint()
    from threadpoolctl import threadpool_limits

    _LIMITS.append(threadpool_limits(limits=1))
