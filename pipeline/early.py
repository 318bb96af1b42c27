"""A run's first frame, processed while its local cluster starts.

Starting a local dask cluster takes the run's process about 0.4 s (loading
``distributed``, the scheduler, forking the nannies and their workers), and
preparing the workers about 0.1 s more; that start keeps about one core
busy, so on a two-core machine the other is idle until the first frame is
submitted. :class:`EarlyFrame` forks a process from the run's own (which has
already imported the plugins and their libraries, as a forked worker has)
before the cluster starts, and that process reads and processes the first
frame (:func:`grainhabit.task.prepare_worker`, then
:func:`grainhabit.task.process_frame`) exactly as a worker would: one BLAS
and OpenMP thread, SIGINT ignored, the same result dict. The cluster gets the
other frames. The frame's result is the same to the bit as a worker's
(``tests/test_early_frame.py`` compares the results stores of a run with and
without it).

It is used only for a local cluster whose workers are forked
(:func:`use_early_frame`): a remote or batch cluster has its own machines,
and a spawned worker could differ from the run's process in what it has
imported. Where the process dies without an answer, the frame goes to the
cluster like any other (:meth:`EarlyFrame.take` gives None).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import signal

log = logging.getLogger("grainhabit")

#: Environment variable that turns the early frame off (``0``).
ENV_SWITCH = "GRAINHABIT_EARLY_FRAME"


def use_early_frame(executor, n_items: int) -> bool:
    """Whether a run should process its first frame in a forked process while ``executor`` starts.

    Parameters
    ----------
    executor : executor of :mod:`grainhabit.executors` (or a wrapper of one)
    n_items : int
        Frames the run will process.

    Returns
    -------
    bool
        True for a local cluster (no address, no batch system) whose
        workers are forked, with at least two frames to process, unless
        the environment sets ``GRAINHABIT_EARLY_FRAME=0``.
    """
    from .executors import start_method

    if os.environ.get(ENV_SWITCH, "").strip() == "0" or n_items < 2:
        return False
    if getattr(executor, "in_process", True) or getattr(executor, "address", None) or getattr(executor, "batch", None):
        return False
    try:
        return start_method(getattr(executor, "start_method", "auto")) == "fork"
    except (ValueError, TypeError):
        return False


def _child(conn, job, args) -> None:
    """Entry of the forked process: prepare as a worker, process one frame, send the result, exit."""
    if hasattr(signal, "SIGINT"):
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # as a local worker (grainhabit.quiet_worker)
    from threadpoolctl import threadpool_limits

    from .task import prepare_worker, process_frame

    with threadpool_limits(limits=1):
        try:
            prepare_worker(job)
            res = process_frame(*args)
        except BaseException as exc:  # process_frame catches a plugin's errors itself; this is the host's own
            res = RuntimeError(f"{exc.__class__.__name__}: {exc}")
    conn.send(res)
    conn.close()


class EarlyFrame:
    """One frame processed in a process forked from this one.

    Parameters
    ----------
    key : str
        The frame's staging key (given back with its result).
    args : tuple
        ``(ref, sample, job)``, the arguments of :func:`grainhabit.task.process_frame`.
    """

    def __init__(self, key: str, args: tuple):
        ctx = multiprocessing.get_context("fork")
        self.key, self.args = key, args
        self._conn, send = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_child, args=(send, args[2], args), name="grainhabit-early-frame",
                                 daemon=True)
        self._proc.start()
        send.close()
        self._taken = False
        #: The forked process's id.
        self.pid = self._proc.pid

    @property
    def pending(self) -> bool:
        """True until :meth:`take` has been answered."""
        return not self._taken

    def ready(self) -> bool:
        """Whether :meth:`take` would answer at once (a result arrived, or the process ended)."""
        if self._taken:
            return False
        try:
            return self._conn.poll() or not self._proc.is_alive()
        except (OSError, EOFError):
            return True

    def take(self):
        """The frame's result (waits for it), or None where the process died without one.

        Returns
        -------
        dict, Exception or None
            What :func:`grainhabit.task.process_frame` returned (an
            exception raised around it, outside the plugins); None if no
            answer came: the caller processes the frame elsewhere.
        """
        self._taken = True
        try:
            res = self._conn.recv()
        except (EOFError, OSError):
            res = None
            log.warning("the process of the first frame ended without a result (exit code %s); the frame goes to "
                        "the cluster", self._proc.exitcode)
        finally:
            self._conn.close()
        self._proc.join(timeout=10)
        if self._proc.is_alive():
            self._proc.kill()
            self._proc.join()
        return res

    def stop(self) -> None:
        """End the process if it still runs (the run was interrupted or failed)."""
        if self._proc.is_alive():
            self._proc.kill()
        self._proc.join(timeout=10)
        if not self._taken:
            self._taken = True
            self._conn.close()
