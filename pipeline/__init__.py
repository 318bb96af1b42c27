"""grainhabit host: runs workflow files over micrograph frames with plugins.

Plugins implement the hooks in :mod:`grainhabit.hookspecs` and mark them with
:data:`hookimpl`::

    from grainhabit import hookimpl

    @hookimpl
    def grainhabit_segment(frame, params):
        ...
"""

import pluggy

__version__ = "0.1.0"

#: Marker for hook implementations: ``@hookimpl``.
hookimpl = pluggy.HookimplMarker("grainhabit")

__all__ = ["hookimpl", "__version__"]
