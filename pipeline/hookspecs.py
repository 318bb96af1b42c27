"""Hook specifications: the whole contract between the host and plugins.

The host knows no image science. Everything grainhabit does with a frame is
one of these hooks, implemented by the built-in plugins in ``plugins/`` or
by third-party plugins registered under the entry-point group
``grainhabit``.

Step hooks (per frame and per survey) are called for one step at a time:
the host calls only the plugin that the workflow names for that step, with
that step's resolved parameters, so each is ``firstresult``. Reader hooks
are called across every plugin; the first one that recognises the input
answers.

A plugin module states the hook API it was written for as
``GRAINHABIT_API = 1``; a plugin that declares another version is refused
at registration.
"""

from __future__ import annotations

import argparse
from typing import Callable

import pluggy

from .frame import FrameData, FrameRef

#: Version of this hook API. Bump on any incompatible change of a spec.
API_VERSION = 1

hookspec = pluggy.HookspecMarker("grainhabit")

# --------------------------------------------------------------------------
# reading frames
# --------------------------------------------------------------------------


@hookspec(firstresult=True)
def grainhabit_list_frames(path: str, options: dict) -> list[FrameRef] | None:
    """List the frames stored in one input path, without reading pixels.

    Called for every file matched by ``input.paths`` and for
    ``input.archive``; the first plugin that recognises the file answers
    (``firstresult``), the others return ``None``.

    Parameters
    ----------
    path : str
        File or archive path, as found.
    options : dict
        The workflow's ``input`` section after validation (``pixel_size_nm``,
        ``max_pixels``, ...).

    Returns
    -------
    list of FrameRef or None
        One reference per frame (page) with its declared shape and dtype,
        or ``None`` if this plugin does not read such files.

    Raises
    ------
    ValueError
        If the file is recognised but unreadable; the message names the file.
    """


@hookspec(firstresult=True)
def grainhabit_read_frame(ref: FrameRef, options: dict) -> FrameData | None:
    """Read the pixels and calibration of one listed frame.

    Called on the worker that processes the frame. The plugin named in
    ``ref.reader`` answers; others return ``None``.

    Parameters
    ----------
    ref : FrameRef
        As returned by :func:`grainhabit_list_frames`.
    options : dict
        The workflow's ``input`` section.

    Returns
    -------
    FrameData or None
        ``raw`` as float32, shape (rows, cols) (RGB converted to luminance
        with a note); ``pixel_size_nm`` in nm from the file's own
        calibration, or NaN when the file has none (the host then applies
        ``input.pixel_size_nm``); ``calibration`` naming the source;
        ``sample`` left empty (the host sets it).

    Raises
    ------
    ValueError
        If the frame cannot be read or its declared size exceeds
        ``options["max_pixels"]``; the frame is recorded as failed.
    """


@hookspec(firstresult=True)
def grainhabit_open_regions(ref: FrameRef, options: dict) -> object | None:
    """Open one listed frame for reading by regions, without reading its pixels.

    Called on the worker of a frame whose estimated working memory exceeds
    the frame budget (``execution.frame_memory``, else the worker's memory
    limit); the frame is then processed tile by tile
    (:mod:`grainhabit.chain_tiles`). The plugin named in ``ref.reader``
    answers; others return ``None`` (and a frame that no plugin opens fails
    with a one-line error).

    Parameters
    ----------
    ref : FrameRef
        As returned by :func:`grainhabit_list_frames`.
    options : dict
        The workflow's ``input`` section.

    Returns
    -------
    object or None
        A picklable object with ``shape`` ((rows, cols) of the frame as
        :func:`grainhabit_read_frame` would return it), ``pixel_size_nm``
        (NaN where the file has none), ``calibration``, ``notes`` (tuple of
        str), ``meta`` (dict) and ``read(window) -> ndarray`` giving the
        float32 pixels of ``window`` (a (row slice, col slice) pair) without
        reading the rest of the frame; or ``None``.
    """


@hookspec(firstresult=True)
def grainhabit_tile_levels(step: str, sample: object, params: dict) -> dict | None:
    """Frame-wide quantities of one step, for a frame processed tile by tile.

    Called once per frame and step, in chain order, before the tiles are
    processed; the plugin that implements step ``step`` answers (first
    result wins), others return ``None``. A step without an answer is
    taken to be local: its result on a grain depends only on pixels near it.
    Every tile then gets the answers in ``frame.meta["tile_levels"]`` (by
    step name) and its place in ``frame.meta["tile_window"]`` (row and
    column slices in the frame), so that all tiles use the same levels.

    Parameters
    ----------
    step : str
        Name of the step.
    sample : grainhabit.chain_tiles.FrameSample
        The frame's ``shape``, ``pixel_size_nm``, ``regions(halo)`` (yields
        ``(core, window, raw)`` over the frame, read region by region),
        ``preview`` (the previous step's output at every ``preview_step``-th
        row and column, or None) and ``levels`` (earlier answers).
    params : dict
        The step's parameters as the workflow gives them.

    Returns
    -------
    dict or None
        The step's frame-wide quantities (picklable); optional keys
        ``preview`` and ``preview_step`` (this step's output on a regular
        grid, for the next step) and ``notes`` (list of str for the frame
        record).
    """


# --------------------------------------------------------------------------
# per-frame stages (one step at a time, in the order of FRAME_STAGES)
# --------------------------------------------------------------------------


@hookspec
def grainhabit_prepare_worker(steps: dict) -> None:
    """Get a worker process ready for frames, once, before its first frame.

    Called in every worker process of a run (and in the main process of a
    serial run) before any frame task starts there, on every plugin, with
    the run's per-frame steps. A plugin imports what its steps need and
    builds its lookup tables here, so that no frame pays for them: the
    first frame's recorded time is then its own, and the import of a broken
    plugin fails before frames are dispatched. An implementation that
    raises is logged as a warning; the run goes on (frames that then fail
    name the error).

    Parameters
    ----------
    steps : dict of str -> dict
        Name of each per-frame step of the run -> its resolved parameters.

    Returns
    -------
    None
        Results are ignored.
    """


@hookspec(firstresult=True)
def grainhabit_preprocess(frame: FrameData, params: dict) -> FrameData:
    """Prepare ``frame.raw`` for segmentation.

    Parameters
    ----------
    frame : FrameData
        With ``raw`` and ``pixel_size_nm`` set; ``image`` is set if an
        earlier preprocess step ran (then work on ``image``).
    params : dict
        This step's resolved parameters (see its ``STEP.params``).

    Returns
    -------
    FrameData
        With ``image`` (float32, shape (rows, cols), grains bright, roughly
        in [0, 1]) and ``polarity`` (``"bright"`` or ``"dark"``) set.
    """


@hookspec(firstresult=True)
def grainhabit_segment(frame: FrameData, params: dict) -> FrameData:
    """Find the grains: label image and the first per-grain columns.

    Parameters
    ----------
    frame : FrameData
        With ``image`` set by preprocessing.
    params : dict
        This step's resolved parameters.

    Returns
    -------
    FrameData
        With ``labels`` (int32, shape (rows, cols), 0 background, 1..n
        consecutive) and columns ``label`` (int), ``split`` (bool: the grain
        came from splitting a touching cluster) and ``edge_cut`` (bool: the
        grain touches the frame border).
    """


@hookspec(firstresult=True)
def grainhabit_measure(frame: FrameData, params: dict) -> FrameData:
    """Measure every labelled grain in calibrated units.

    Parameters
    ----------
    frame : FrameData
        With ``labels`` and the segment columns set.
    params : dict
        This step's resolved parameters.

    Returns
    -------
    FrameData
        With the morphology columns of the results' ``grains`` group
        (``centroid_x_nm``, ``centroid_y_nm``, ``area_nm2``, ``ecd_nm``,
        ``perimeter_nm``, ``feret_max_nm``, ``feret_min_nm``,
        ``feret_ratio``, ``form_factor``, ``circularity``, ``solidity``, ``n_corners``,
        ``edge_ratio``, ...) and ``outlines`` (one (k, 2) polygon in nm per
        grain).
    """


@hookspec(firstresult=True)
def grainhabit_classify(frame: FrameData, params: dict) -> FrameData:
    """Assign each grain a crystal habit.

    Parameters
    ----------
    frame : FrameData
        With measurements and outlines set.
    params : dict
        This step's resolved parameters.

    Returns
    -------
    FrameData
        With columns ``habit`` (str, one of ``cube``, ``cuboctahedron``,
        ``octahedron``, ``tabular_hexagon``, ``tabular_triangle``, ``rod``,
        ``irregular``) and ``habit_score`` (float in [0, 1]).
    """


@hookspec(firstresult=True)
def grainhabit_fit_growth(frame: FrameData, params: dict) -> FrameData:
    """Estimate the growth-rate parameter alpha = sqrt(3) * v100 / v111.

    Parameters
    ----------
    frame : FrameData
        With habits set.
    params : dict
        This step's resolved parameters.

    Returns
    -------
    FrameData
        With columns ``alpha``, ``alpha_lo``, ``alpha_hi`` (dimensionless;
        NaN where not determined) and ``alpha_note`` (str, why NaN).
    """


@hookspec(firstresult=True)
def grainhabit_thickness(frame: FrameData, params: dict) -> FrameData:
    """Measure or assign the thickness of tabular grains.

    Parameters
    ----------
    frame : FrameData
        With habits set.
    params : dict
        This step's resolved parameters.

    Returns
    -------
    FrameData
        With columns ``thickness_nm`` (nm) and ``tabular_aspect_ratio``
        (ECD / thickness), NaN for grains that are not tabular.
    """


# --------------------------------------------------------------------------
# survey stages (once, over the consolidated results)
# --------------------------------------------------------------------------


@hookspec(firstresult=True)
def grainhabit_summarise(grains, frames, summary: dict, params: dict) -> dict:
    """Compute per-sample (and per-group) statistics from the consolidated tables.

    Parameters
    ----------
    grains : xarray.Dataset
        The ``grains`` group (dim ``grain``), failed frames already absent.
    frames : xarray.Dataset
        The ``frames`` group (dim ``frame``), with any extra text fields the
        workflow derives per frame (``input.fields``, sidecar CSV).
    summary : dict of str -> xarray.Dataset
        What earlier summarise steps produced (empty for the first).
    params : dict
        This step's resolved parameters.

    Returns
    -------
    dict of str -> xarray.Dataset
        Group name to dataset. ``"summary"`` (dims ``sample`` and
        ``habit``) is required; further groups such as
        ``"summary_by_batch"`` are written as they are. Every variable has
        ``units`` and ``long_name``.
    """


@hookspec(firstresult=True)
def grainhabit_report(results: str, out_dir: str, params: dict) -> list[str]:
    """Write a report of a results store.

    Parameters
    ----------
    results : str
        Path of a results zarr store.
    out_dir : str
        Folder to write into (created if missing).
    params : dict
        This step's resolved parameters.

    Returns
    -------
    list of str
        Paths of the files written, the main page first.
    """


# --------------------------------------------------------------------------
# commands and benchmarks
# --------------------------------------------------------------------------


@hookspec
def grainhabit_add_commands(subparsers: argparse._SubParsersAction) -> None:
    """Add sub-commands to the ``grainhabit`` command line.

    Each added parser must set a handler with
    ``parser.set_defaults(handler=func)``; ``func(args) -> int`` returns the
    exit code.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        From ``ArgumentParser.add_subparsers``.

    Returns
    -------
    None
        Results are ignored; every plugin's commands are added.
    """


@hookspec
def grainhabit_benchmarks() -> dict[str, Callable[[list[str]], int]]:
    """Offer benchmarks to ``grainhabit bench NAME``.

    Returns
    -------
    dict of str -> callable
        Benchmark name to a function taking the remaining command-line
        arguments and returning an exit code. Names must be unique across
        plugins.
    """
