"""A seam for watching a run: :class:`RunObserver`.

:func:`grainhabit.runner.run` reports its phases to an observer, so that a
benchmark or a monitoring plugin can time them without touching the host's
internals. The default observer does nothing.

Phases, in order: ``list`` (listing the inputs), ``stage_write`` (staging each
finished frame, in the main process), ``consolidate`` (reading staged frames
and building the datasets), ``summarise`` (the summarise steps),
``results_write`` (writing the results store) and ``report`` (the report
steps). The executor that runs the frames is handed to :meth:`executor`
before it starts, and may be wrapped there (to time its start, preparation,
results and close).
"""

from __future__ import annotations

import contextlib


class RunObserver:
    """Watches the phases of :func:`grainhabit.runner.run`; every method is a no-op here.

    Subclass it and override what you need.
    """

    @contextlib.contextmanager
    def phase(self, name: str):
        """Context manager around one phase of the run (see the module docstring)."""
        yield

    def executor(self, executor):
        """The executor the run is about to start; return it, or a wrapper with the same methods."""
        return executor


__all__ = ["RunObserver"]
