"""A run's first frames, processed while its local cluster starts.

Starting a local dask cluster takes the run's process about 0.4 s (loading
``distributed``, the scheduler, forking the nannies and their workers), and
preparing the workers about 0.1 s more; that start keeps about one core
busy, so on a two-core machine the other is idle until the first frame is
submitted. :class:`EarlyFrames` forks a process from the run's own (which has
already imported the plugins and their libraries, as a forked worker has)
before the cluster starts, and that process reads and processes the first
frames one after another (:func:`grainhabit.task.prepare_worker`, then
:func:`grainhabit.task.process_frame`) exactly as a worker would: one BLAS
and OpenMP thread, SIGINT ignored, the same result dicts. The cluster gets
the other frames. Each result is the same to the bit as a worker's
(``tests/test_early_frame.py`` compares the results stores of a run with and
without it).

It takes one frame per worker of the cluster, but no more than each worker
gets (:func:`early_frame_count`): the rest then divides among the workers as
the whole list would have. With
one early frame on two workers, eleven frames of twelve left one worker a
frame more than the other, and that frame's time at the end cost what the
start had saved (a model of the run with the benchmark's frame times: 5.44
s against 5.42 s without it, 5.20 s with two).

It is used only for a local cluster whose workers are forked: a remote or
batch cluster has its own machines, and a spawned worker could differ from
the run's process in what it has imported. Where the process dies before
answering for a frame, that frame goes to the cluster like any other
(:meth:`EarlyFrames.lost`).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import queue
import threading

log = logging.getLogger("grainhabit")

#: Environment variable that turns the early frame off (``0``).
ENV_SWITCH = "GRAINHABIT_EARLY_FRAME"


def early_frame_count(executor, n_items: int) -> int:
    """How many of a run's first frames to process in a forked process while ``executor`` starts.

    One per worker of the cluster (the rest then divides among the workers as all of it would have),
    but no more than each worker gets: ``min(workers, n_items // (workers + 1))``, so that on a
    machine of many cores the early process, one of them, does not finish last.

    Parameters
    ----------
    executor : executor of :mod:`grainhabit.executors` (or a wrapper of one)
    n_items : int
        Frames the run will process.

    Returns
    -------
    int
        0 unless ``executor`` is a local cluster (no address, no batch system) whose workers are
        forked, or where the environment sets ``GRAINHABIT_EARLY_FRAME=0``.
    """
    from .executors import start_method

    if os.environ.get(ENV_SWITCH, "").strip() == "0":
        return 0
    if getattr(executor, "in_process", True) or getattr(executor, "address", None) or getattr(executor, "batch", None):
        return 0
    try:
        if start_method(getattr(executor, "start_method", "auto")) != "fork":
            return 0
    except (ValueError, TypeError):
        return 0
    workers = getattr(executor, "workers", "auto")
    n = (os.cpu_count() or 1) if workers in ("auto", None) else int(workers)
    n = max(1, n)
    return max(0, min(n, int(n_items) // (n + 1)))


def _child(conn, items) -> None:
    """Entry of the forked process: prepare as a worker, process the frames one by one, send each result."""
    from .quiet_worker import dask_setup
    from .task import prepare_worker, process_frame

    dask_setup()  # as a local worker: SIGINT ignored, one BLAS and OpenMP thread
    for key, args in items:
        try:
            prepare_worker(args[2])  # once per process (the job's own check)
            res = process_frame(*args)
        except BaseException as exc:  # process_frame catches a plugin's errors itself; this is the host's own
            res = RuntimeError(f"{exc.__class__.__name__}: {exc}")
        conn.send((key, res))
    conn.close()


class EarlyFrames:
    """The first frames of a run processed, one after another, in a process forked from this one.

    A thread of this process receives each result as soon as it is sent (the forked process never
    waits for the run to read a result).

    Parameters
    ----------
    items : list of (str, tuple)
        ``(key, (ref, sample, job))``: each frame's staging key and the arguments of
        :func:`grainhabit.task.process_frame`.
    """

    _END = object()

    def __init__(self, items: list):
        ctx = multiprocessing.get_context("fork")
        self.items = list(items)
        self._waiting = {key for key, _ in self.items}
        conn, send = ctx.Pipe(duplex=False)
        self._proc = ctx.Process(target=_child, args=(send, self.items), name="grainhabit-early-frames", daemon=True)
        self._proc.start()
        send.close()
        #: The forked process's id.
        self.pid = self._proc.pid
        self._got: queue.Queue = queue.Queue()
        self._open = True
        self._reader = threading.Thread(target=self._read, args=(conn,), name="grainhabit-early-frames", daemon=True)
        self._reader.start()

    def _read(self, conn) -> None:
        try:
            for _ in self.items:
                self._got.put(conn.recv())
        except (EOFError, OSError):
            pass
        finally:
            conn.close()
            self._got.put(self._END)

    def results(self, wait: bool):
        """Yield ``(key, result)`` of the frames done so far; with ``wait``, of all of them.

        A result is what :func:`grainhabit.task.process_frame` returned (or an exception raised around it,
        outside the plugins). Where the process ends without answering for some frames, they are left out
        here and listed by :meth:`lost`.
        """
        while self._open:
            try:
                got = self._got.get(block=wait)
            except queue.Empty:
                return
            if got is self._END:
                self._finish()
                if self._waiting:
                    log.warning("the process of the first frames ended without %d result(s) (exit code %s); they "
                                "go to the cluster", len(self._waiting), self._proc.exitcode)
                return
            self._waiting.discard(got[0])
            yield got

    def lost(self) -> list:
        """The items whose results never came (after :meth:`results` with ``wait``)."""
        return [item for item in self.items if item[0] in self._waiting]

    def _finish(self) -> None:
        self._open = False
        self._proc.join(timeout=10)
        if self._proc.is_alive():
            self._proc.kill()
            self._proc.join()

    def stop(self) -> None:
        """End the process if it still runs (the run was interrupted or failed)."""
        if self._proc.is_alive():
            self._proc.kill()
        self._proc.join(timeout=10)
        self._reader.join(timeout=10)
        self._open = False
