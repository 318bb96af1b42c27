"""The plugin manager: built-in plugins, entry-point plugins, step lookup.

Built-in features are ordinary plugin modules listed in :data:`DEFAULT_PLUGINS`
and registered by the same code path as third-party plugins, which are
found under the entry-point group ``grainhabit``. Set the environment
variable ``GRAINHABIT_NO_AUTOLOAD=1`` to skip entry points (handy in tests).
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.metadata
import importlib.util
import inspect
import os
import sys
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from types import ModuleType

import pluggy

from . import hookspecs
from .params import FRAME_STAGES, STAGES, StepInfo

#: Built-in plugin modules, registered in this order.
DEFAULT_PLUGINS = (
    "grainhabit.plugins.readers.tiff",
    "grainhabit.plugins.readers.archive",
    "grainhabit.plugins.readers.mrc",
    "grainhabit.plugins.readers.gatan",
    "grainhabit.plugins.readers.emd",
    "grainhabit.plugins.readers.tia",
    "grainhabit.plugins.readers.phenom",
    "grainhabit.plugins.readers.jeol",
    "grainhabit.plugins.readers.bruker",
    "grainhabit.plugins.readers.tvips",
    "grainhabit.plugins.readers.semper",
    "grainhabit.plugins.readers.digitalsurf",
    "grainhabit.plugins.readers.hspy",
    "grainhabit.plugins.readers.plain",
    "grainhabit.plugins.readers.sidecar",
    "grainhabit.plugins.preprocess.flatten_background",
    "grainhabit.plugins.segment.segment_grains",
    "grainhabit.plugins.segment.tiling",
    "grainhabit.plugins.measure.measure_grains",
    "grainhabit.plugins.habit.classify_habit",
    "grainhabit.plugins.habit.fit_growth_ratio",
    "grainhabit.plugins.thickness.known_thickness",
    "grainhabit.plugins.thickness.shadow_thickness",
    "grainhabit.plugins.survey.summarise_samples",
    "grainhabit.plugins.survey.write_report",
    "grainhabit.plugins.survey.compare",
    "grainhabit.plugins.survey.aggregate",
    "grainhabit.plugins.survey.score_masks",
    "grainhabit.plugins.synthetic.demo",
    "grainhabit.plugins.scaffold.new_plugin",
)

#: Built-in benchmarks: registered only by ``grainhabit bench`` (:func:`load_benchmarks`),
#: so neither a run nor a worker imports them.
BENCHMARK_PLUGINS = (
    "grainhabit.plugins.bench.accuracy",
    "grainhabit.plugins.bench.measure",
    "grainhabit.plugins.bench.habit",
    "grainhabit.plugins.bench.throughput",
    "grainhabit.plugins.bench.memory",
    "grainhabit.plugins.bench.profile",
    "grainhabit.plugins.bench.nightly",
    "grainhabit.plugins.bench.sizes",
    "grainhabit.plugins.bench.realdata",
)

#: Step used for a stage when the workflow names none. Stages missing here
#: (``thickness``) run only when the workflow asks for them.
DEFAULT_CHAIN = {
    "preprocess": "flatten-background",
    "segment": "segment-grains",
    "measure": "measure-grains",
    "classify": "classify-habit",
    "fit_growth": "fit-growth-ratio",
    "summarise": "summarise-samples",
    "report": "write-report",
}

ENTRY_POINT_GROUP = "grainhabit"


class PluginError(Exception):
    """A plugin could not be loaded or registered; the message names it."""


@dataclass
class LoadProblem:
    """A plugin that failed to load: its name, one-line reason, traceback."""

    name: str
    origin: str
    message: str
    traceback: str = ""


@dataclass
class PluginRecord:
    """Where a registered plugin came from (for ``grainhabit plugins``)."""

    name: str
    origin: str  # "built-in", "entry point <dist>", "workflow"
    module: str
    version: str
    location: str


@dataclass
class Host:
    """A plugin manager with the bookkeeping the CLI and runner need."""

    pm: pluggy.PluginManager
    records: dict[str, PluginRecord] = field(default_factory=dict)
    problems: list[LoadProblem] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    _callers: dict = field(default_factory=dict)

    # -- steps --------------------------------------------------------------
    def steps(self) -> dict[str, StepInfo]:
        """Every registered step, by name."""
        out = {}
        for plugin in self.pm.get_plugins():
            info = getattr(plugin, "STEP", None)
            if isinstance(info, StepInfo):
                out[info.name] = info
        return out

    def step_plugin(self, name: str):
        """The plugin object that provides step ``name``."""
        return self.pm.get_plugin(name)

    def call_step(self, name: str, **kwargs):
        """Call the stage hook of step ``name`` on that plugin alone.

        Uses :meth:`pluggy.PluginManager.subset_hook_caller`, so the hook
        machinery (tracing, wrappers) applies as for any hook call.
        """
        caller = self._callers.get(name)
        if caller is None:
            info = self.steps()[name]
            target = self.pm.get_plugin(name)
            others = [p for p in self.pm.get_plugins() if p is not target]
            caller = self.pm.subset_hook_caller(f"grainhabit_{info.stage}", remove_plugins=others)
            self._callers[name] = caller
        return caller(**kwargs)

    def first_answer(self, hook: str, **kwargs):
        """Call every implementation of a first-result hook, newest first, until one answers.

        Unlike a plain pluggy call, an implementation that raises does not
        hide the others: its error is kept, and the next implementation is
        tried. If none answers, the first error is raised again (so a reader
        that recognises a file but cannot read it still fails the frame).

        Returns
        -------
        result
            The first non-None result, or None if no implementation answered
            and none raised.
        """
        errors = []
        for name, result, exc in self._each(hook, kwargs):
            if exc is not None:
                errors.append((name, exc))
            elif result is not None:
                return result
        if errors:
            name, exc = errors[0]
            raise exc.__class__(f"{exc} [plugin {name}]") if _reraisable(exc) else exc
        return None

    def call_every(self, hook: str, **kwargs) -> list[tuple[str, Exception]]:
        """Call every implementation of a hook, newest first; one that raises does not stop the others.

        Returns
        -------
        list of (plugin name, exception)
            The implementations that raised; results are ignored.
        """
        return [(name, exc) for name, _, exc in self._each(hook, kwargs) if exc is not None]

    def _each(self, hook: str, kwargs: dict):
        """(plugin name, result, exception) of every implementation of ``hook``, newest first, lazily.

        Each implementation gets only the arguments it names (a hook
        implementation may leave out parameters it does not need).
        """
        for impl in reversed(getattr(self.pm.hook, hook).get_hookimpls()):
            try:
                result, exc = impl.function(**{k: kwargs[k] for k in impl.argnames}), None
            except Exception as err:
                result, exc = None, err
            yield impl.plugin_name, result, exc

    def hooks_of(self, plugin) -> list[str]:
        """Names of the hooks a plugin implements."""
        return sorted(h.name for h in (self.pm.get_hookcallers(plugin) or []))


def _reraisable(exc: Exception) -> bool:
    try:
        exc.__class__(str(exc))
        return True
    except Exception:
        return False


def _plugin_version(module: ModuleType) -> str:
    info = getattr(module, "STEP", None)
    if isinstance(info, StepInfo):
        return info.version
    return str(getattr(module, "__version__", "") or "")


def register(host: Host, module: ModuleType, origin: str) -> None:
    """Check and register one plugin module.

    Raises
    ------
    PluginError
        If the plugin was written for another hook API version, declares a
        step for an unknown stage, or does not implement its stage hook.
    """
    name = getattr(module, "__name__", repr(module))
    api = getattr(module, "GRAINHABIT_API", None)
    if api is None and origin != "built-in":
        host.warnings.append(f"plugin {name!r} does not declare GRAINHABIT_API; assuming hook API "
                             f"{hookspecs.API_VERSION}")
    if api is not None and api != hookspecs.API_VERSION:
        raise PluginError(
            f"plugin {name!r} was written for hook API {api}, this grainhabit has API {hookspecs.API_VERSION}"
        )
    info = getattr(module, "STEP", None)
    reg_name = getattr(module, "NAME", None) if isinstance(getattr(module, "NAME", None), str) else name
    if info is not None:
        if not isinstance(info, StepInfo):
            raise PluginError(f"plugin {name!r}: STEP must be a grainhabit.params.StepInfo")
        hook = f"grainhabit_{info.stage}"
        if not callable(getattr(module, hook, None)):
            raise PluginError(f"plugin {name!r}: step {info.name!r} declares stage {info.stage!r} but has no {hook}()")
        reg_name = info.name
        if host.pm.get_plugin(reg_name) is not None:
            raise PluginError(f"plugin {name!r}: step name {reg_name!r} is already taken")
    if host.pm.is_registered(module):
        return
    try:
        host.pm.register(module, name=reg_name)
    except (ValueError, pluggy.PluginValidationError) as exc:
        raise PluginError(f"plugin {name!r}: {exc}") from None
    location = getattr(module, "__file__", "") or ""
    host.records[reg_name] = PluginRecord(reg_name, origin, name, _plugin_version(module), location)
    host._callers.clear()


def _load_module(spec: str) -> ModuleType:
    """Import a plugin given as a module name or as a path to a ``.py`` file."""
    if spec.endswith(".py"):
        path = Path(spec)
        if not path.is_file():
            # on a remote worker the file arrives by Client.upload_file, importable by its stem
            if importlib.util.find_spec(path.stem) is not None:
                return importlib.import_module(path.stem)
            raise FileNotFoundError(f"no such plugin file: {spec}")
        digest = hashlib.sha1(str(path.resolve()).encode()).hexdigest()[:8]
        mod_name = f"grainhabit_local_{path.stem}_{digest}"
        if mod_name in sys.modules:
            return sys.modules[mod_name]
        module_spec = importlib.util.spec_from_file_location(mod_name, path)
        module = importlib.util.module_from_spec(module_spec)
        sys.modules[mod_name] = module
        try:
            module_spec.loader.exec_module(module)
        except BaseException:
            del sys.modules[mod_name]  # a failed import must fail again next time, not register half a module
            raise
        return module
    return importlib.import_module(spec)


def _try(host: Host, label: str, origin: str, load) -> None:
    try:
        register(host, load(), origin)
    except PluginError as exc:
        host.problems.append(LoadProblem(label, origin, str(exc), traceback.format_exc()))
    except Exception as exc:  # an import failure of a plugin must not stop the host
        host.problems.append(
            LoadProblem(label, origin, f"plugin {label!r} failed to load: {exc.__class__.__name__}: {exc}",
                        traceback.format_exc())
        )


def make_host(extra: tuple[str, ...] = (), autoload: bool | None = None) -> Host:
    """Create the plugin manager with built-in and third-party plugins.

    Parameters
    ----------
    extra : tuple of str
        Further plugins: module names or paths of ``.py`` files (a
        workflow's ``plugins:`` list).
    autoload : bool, optional
        Load entry-point plugins; default unless ``GRAINHABIT_NO_AUTOLOAD``
        is set.

    Returns
    -------
    Host
        Problems with individual plugins are collected in ``host.problems``
        rather than raised.
    """
    pm = _PluginManager("grainhabit")
    pm.add_hookspecs(hookspecs)
    host = Host(pm)
    load_builtins(host, DEFAULT_PLUGINS)
    if autoload is None:
        autoload = not os.environ.get("GRAINHABIT_NO_AUTOLOAD")
    if autoload:
        for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP):
            dist = ep.dist.name if ep.dist is not None else "?"
            _try(host, ep.name, f"entry point ({dist})", ep.load)
    for spec in extra:
        _try(host, spec, "workflow", lambda spec=spec: _load_module(spec))
    return host


def load_builtins(host: Host, modules: tuple[str, ...]) -> None:
    """Register built-in plugin modules (problems are collected in ``host.problems``)."""
    for mod in modules:
        if importlib.util.find_spec(mod) is None:
            continue  # a built-in left out of this installation (tests check none is)
        _try(host, mod, "built-in", lambda mod=mod: importlib.import_module(mod))


def load_benchmarks(host: Host) -> None:
    """Register the built-in benchmarks (:data:`BENCHMARK_PLUGINS`) into ``host``."""
    load_builtins(host, BENCHMARK_PLUGINS)


_WORKER_HOSTS: dict[tuple, Host] = {}


class _PluginManager(pluggy.PluginManager):
    """pluggy's manager, not looking inside modules that a plugin binds as attributes.

    pluggy inspects every attribute of a plugin module for the hook marker;
    for a module bound with :func:`grainhabit.lazy.lazy_module` that
    inspection alone would import it.
    """

    def parse_hookimpl_opts(self, plugin, name: str):
        if isinstance(inspect.getattr_static(plugin, name, None), ModuleType):
            return None  # isinstance on a (lazy) module reads only its type: nothing is imported
        return super().parse_hookimpl_opts(plugin, name)


def worker_host(extra: tuple[str, ...] = ()) -> Host:
    """The host of this process for ``extra``, built once (used on workers)."""
    key = tuple(extra)
    if key not in _WORKER_HOSTS:
        _WORKER_HOSTS[key] = make_host(extra)
    return _WORKER_HOSTS[key]


def stage_index(stage: str) -> int:
    """Position of a stage in the fixed order (frame stages, then survey)."""
    return STAGES.index(stage)


__all__ = [
    "BENCHMARK_PLUGINS", "DEFAULT_PLUGINS", "load_benchmarks", "DEFAULT_CHAIN", "FRAME_STAGES", "Host", "PluginError", "make_host", "worker_host",
    "register", "stage_index",
]
