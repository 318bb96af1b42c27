"""Command ``grainhabit score-masks``: score the grain finder against hand-drawn instance masks.

A facility that has annotated some of its own micrographs (one label image
per picture: 0 background, one integer per particle) can check how well the
default chain (or a workflow's preprocess and segment steps) finds its
particles, before trusting a night's survey.

The score is one that neither rewards a finder for outlining a particle
twice nor punishes it for disagreeing by a pixel about the outline:

- a found grain matches a particle when the grain's centroid lies inside the
  particle's mask, and a particle takes at most one grain (the first in
  label order); further grains on the same particle are false;
- recall is over the particles that do not touch the image border,
  precision over the found grains that do not touch it;
- the size error of a matched pair is ``|ECD_found - ECD_mask| / ECD_mask``
  with ``ECD = sqrt(4 A / pi)`` (ISO 9276-6), reported as the median over
  pairs whose particle does not touch the border.

A frame with particles in its mask where the chain found no grain and set no
QC flag counts as *silently empty*; the goal is none.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
from scipy import ndimage as ndi

from grainhabit import hookimpl

GRAINHABIT_API = 1

#: Picture suffixes looked for in the image folder.
IMAGE_SUFFIXES = (".png", ".tif", ".tiff", ".jpg", ".jpeg", ".bmp")
#: Files beside pictures that hold no pixels of their own (calibration text, a TIA series' index).
COMPANION_SUFFIXES = (".txt", ".hdr", ".emi", ".xml", ".json", ".csv", ".md")


def border_ids(labels: np.ndarray) -> np.ndarray:
    """Labels (other than 0) present on the outermost rows and columns.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)

    Returns
    -------
    ndarray of int
    """
    edge = np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]])
    ids = np.unique(edge)
    return ids[ids > 0]


def score_frame(truth: np.ndarray, found: np.ndarray) -> dict:
    """Centroid-in-mask score of one frame.

    Parameters
    ----------
    truth : ndarray of int, shape (rows, cols)
        Instance mask: 0 background, one integer per particle.
    found : ndarray of int, shape (rows, cols)
        The finder's labels: 0 background, 1..n grains.

    Returns
    -------
    dict
        ``particles`` (not touching the border), ``particles_found`` (of
        those, matched by a grain), ``grains`` (found grains not touching the
        border), ``grains_true`` (of those, the first grain on some
        particle), ``ecd_errors`` (list of relative ECD errors of matched
        pairs whose particle is off the border).

    Raises
    ------
    ValueError
        If the two label images differ in shape.
    """
    truth = np.asarray(truth)
    found = np.asarray(found)
    if truth.shape != found.shape:
        raise ValueError(f"mask shape {truth.shape} differs from the image shape {found.shape}")
    t_border = set(border_ids(truth).tolist())
    f_border = set(border_ids(found).tolist())
    t_ids = np.unique(truth)
    t_inner = [int(t) for t in t_ids if t > 0 and t not in t_border]
    t_area = np.bincount(truth.ravel().astype(np.int64))
    n = int(found.max()) if found.size else 0
    matched: dict[int, int] = {}
    grains = grains_true = 0
    errors = []
    if n:
        idx = np.arange(1, n + 1)
        ones = np.ones(found.shape, np.float32)
        area = ndi.sum(ones, found, idx)
        cents = ndi.center_of_mass(ones, found, idx)
        for k, a, (r, c) in zip(idx, area, cents):
            if a == 0:
                continue
            t = int(truth[int(round(r)), int(round(c))])
            first = t > 0 and t not in matched
            if first:
                matched[t] = int(k)
            if int(k) in f_border:
                continue
            grains += 1
            if first:
                grains_true += 1
                if t not in t_border:
                    d_true = np.sqrt(t_area[t])
                    errors.append(abs(np.sqrt(a) - d_true) / d_true)
    return {"particles": len(t_inner), "particles_found": sum(1 for t in t_inner if t in matched),
            "grains": grains, "grains_true": grains_true, "ecd_errors": errors}


def summarise(frames: list[dict]) -> dict:
    """Totals over frames scored by :func:`score_frame` (with ``found_any`` and ``qc`` added).

    Returns
    -------
    dict
        ``frames``, ``particles``, ``grains``, ``recall``, ``precision``,
        ``ecd_error_median`` (fraction; NaN without pairs),
        ``silently_empty`` (frames with particles, no grain and no QC flag)
        and ``flagged`` (frames with a QC flag).
    """
    p = sum(f["particles"] for f in frames)
    pf = sum(f["particles_found"] for f in frames)
    g = sum(f["grains"] for f in frames)
    gt = sum(f["grains_true"] for f in frames)
    errs = [e for f in frames for e in f["ecd_errors"]]
    return {"frames": len(frames), "particles": p, "grains": g,
            "recall": pf / p if p else float("nan"), "precision": gt / g if g else float("nan"),
            "ecd_error_median": float(np.median(errs)) if errs else float("nan"),
            "silently_empty": sum(1 for f in frames if f["particles"] and not f["found_any"] and not f["qc"]),
            "flagged": sum(1 for f in frames if f["qc"])}


def pair_files(images: Path, masks: Path, unpaired: list | None = None) -> list[tuple[Path, Path]]:
    """Pictures of ``images`` with a mask of the same stem in ``masks``.

    A picture may be in any format the readers read (TIFF, PNG, DM3/DM4,
    EMD, MRC, ...); companion files that hold no pixels (:data:`COMPANION_SUFFIXES`:
    calibration text beside a bitmap, a TIA ``.emi``) are not pictures.

    Parameters
    ----------
    images, masks : Path
        Folders.
    unpaired : list, optional
        Filled with the pictures that have no mask (they are not scored).

    Raises
    ------
    ValueError
        If a folder is missing, no picture has a mask, or two pictures share a mask.
    """
    for d in (images, masks):
        if not d.is_dir():
            raise ValueError(f"{d}: not a folder")
    by_stem = {p.stem: p for p in masks.iterdir() if p.suffix.lower() in IMAGE_SUFFIXES}
    pairs, seen = [], {}
    for p in sorted(images.iterdir()):
        if p.name.startswith(".") or not p.is_file() or p.suffix.lower() in COMPANION_SUFFIXES:
            continue
        if p.stem not in by_stem and unpaired is not None:
            unpaired.append(p)
        if p.stem in by_stem:
            if p.stem in seen:
                raise ValueError(f"{images}: two pictures for the mask {by_stem[p.stem].name}: "
                                 f"{seen[p.stem].name} and {p.name}")
            seen[p.stem] = p
            pairs.append((p, by_stem[p.stem]))
    if not pairs:
        raise ValueError(f"{images}: no picture has a mask of the same name in {masks}")
    return pairs


def _read(path: Path) -> np.ndarray:
    """Pixels of a picture: TIFF with tifffile, other formats with Pillow (a dependency of matplotlib)."""
    if path.suffix.lower() in (".tif", ".tiff"):
        import tifffile

        return np.asarray(tifffile.imread(path))
    from PIL import Image

    with Image.open(path) as im:
        return np.asarray(im)


def read_gray(path: Path) -> np.ndarray:
    """A picture as a 2-D float32 array (colour pictures averaged over their channels).

    Raises
    ------
    ValueError
        If the file cannot be read as an image.
    """
    try:
        arr = _read(path)
    except Exception as exc:  # the readers raise many kinds
        raise ValueError(f"{path}: cannot read as an image ({exc})") from None
    if arr.ndim == 3:
        arr = arr[..., :3].mean(axis=2) if arr.shape[2] >= 3 else arr[..., 0]
    if arr.ndim != 2:
        raise ValueError(f"{path}: expected a 2-D picture, got shape {arr.shape}")
    return arr.astype(np.float32)


def read_mask(path: Path) -> np.ndarray:
    """An instance mask as a 2-D integer array (first channel of a colour file)."""
    try:
        arr = _read(path)
    except Exception as exc:  # the readers raise many kinds
        raise ValueError(f"{path}: cannot read as a mask ({exc})") from None
    if arr.ndim == 3:
        arr = arr[..., 0]
    return arr.astype(np.int64)


def read_picture(host, path: Path, input_options: dict):
    """A picture read the way ``grainhabit run`` reads it.

    The readers that would list and read the file in a run do so here: an
    instrument's own format and calibration, an info strip cropped, drawn
    marks masked (:mod:`grainhabit.plugins.readers`); the pixel size follows
    ``input_options`` as in a run (:func:`grainhabit.task.read_calibrated`).
    Of a file holding several frames, the first is read.

    Parameters
    ----------
    host : grainhabit host
    path : Path
    input_options : dict
        A workflow's ``input`` section (``calibration``, ``pixel_size_nm``, ...).

    Returns
    -------
    FrameData

    Raises
    ------
    ValueError
        If no reader lists the file, or it cannot be read.
    """
    from grainhabit.task import read_calibrated

    refs = host.first_answer("grainhabit_list_frames", path=str(path), options=input_options)
    if not refs:
        raise ValueError(f"{path}: no reader recognises this file")
    return read_calibrated(host, refs[0], input_options)


def find_grains(host, frame, steps: list[tuple[str, dict]]) -> tuple[np.ndarray, list[str]]:
    """Run the preprocess and segment steps on one frame as read (:func:`read_picture`).

    Parameters
    ----------
    host : grainhabit host
    frame : FrameData
    steps : list of (step name, params)
        In chain order, e.g. ``[("flatten-background", {}), ("segment-grains", {})]``.

    Returns
    -------
    labels : ndarray of int32, shape of ``frame.raw``
    notes : list of str
        The frame's notes (QC flags among them).
    """
    for name, params in steps:
        frame = host.call_step(name, frame=frame, params=params)
    labels = frame.labels if frame.labels is not None else np.zeros(np.shape(frame.raw)[:2], np.int32)
    return labels, list(frame.notes)


def on_mask_grid(labels: np.ndarray, shape: tuple, source: str) -> np.ndarray:
    """Labels of a frame as read, placed on the grid of the picture's mask.

    A reader crops an info strip off the bottom of a picture; those rows get
    no grain. A frame resampled to square pixels cannot be compared with a
    mask drawn on the stored grid.

    Raises
    ------
    ValueError
        If the frame is not the picture's top rows.
    """
    rows, cols = labels.shape
    if (rows, cols) == tuple(shape):
        return labels
    if cols == shape[1] and rows < shape[0]:
        out = np.zeros(shape, labels.dtype)
        out[:rows] = labels
        return out
    raise ValueError(f"{source}: read as {rows} x {cols} pixels, the mask is {shape[0]} x {shape[1]} (a mask is "
                     "drawn on the picture's stored grid; a frame resampled to square pixels cannot be scored)")


def score_folder(images: Path, masks: Path, pixel_size_nm: float | None = None, every: int = 1,
                 steps: list[tuple[str, dict]] | None = None, host=None, progress=None,
                 offset: int = 0, input_options: dict | None = None) -> dict:
    """Score the chain on every ``every``-th annotated picture of a folder, from the ``offset``-th.

    Pictures are read as a run reads them (:func:`read_picture`).

    Parameters
    ----------
    images, masks : Path
        Folders; a picture is scored when ``masks`` holds a file of the same stem.
    pixel_size_nm : float, optional
        Pixel size (nm) used instead of the files' own; None: each file's own, and 1 nm (sizes in
        pixels) where a file states none.
    input_options : dict, optional
        A workflow's ``input`` section (its calibration settings apply).

    Returns
    -------
    dict
        :func:`summarise` totals plus ``per_frame`` (name, counts, qc, error).
        A picture whose reading or steps fail counts as found nothing, with its
        error recorded (and as flagged, since the run would record it as failed).
    """
    from grainhabit.manager import make_host
    from grainhabit.task import qc_codes

    if every < 1:
        raise ValueError(f"every must be >= 1, got {every}")
    options = dict(input_options or {})
    if pixel_size_nm is not None:
        if not pixel_size_nm > 0:
            raise ValueError(f"pixel_size_nm must be > 0, got {pixel_size_nm}")
        options.update(calibration="override", pixel_size_nm=float(pixel_size_nm))
    elif options.get("pixel_size_nm") is None:
        options["pixel_size_nm"] = 1.0
    host = host or make_host()
    steps = steps or [("flatten-background", {}), ("segment-grains", {})]
    frames = []
    unpaired: list = []
    for img_path, mask_path in pair_files(Path(images), Path(masks), unpaired)[offset::every]:
        truth = read_mask(mask_path)
        t0 = time.perf_counter()
        error = ""
        try:
            labels, notes = find_grains(host, read_picture(host, img_path, options), steps)
            labels = on_mask_grid(labels, truth.shape, str(img_path))
        except ValueError as exc:
            labels, notes, error = np.zeros(truth.shape, np.int32), [], str(exc)
        s = score_frame(truth, labels)
        s.update(name=img_path.name, found_any=bool(labels.max() > 0), error=error,
                 qc=qc_codes(notes, labels.max() == 0) if not error else "failed",
                 seconds=time.perf_counter() - t0)
        frames.append(s)
        if progress:
            progress(s)
    out = summarise(frames)
    out["per_frame"] = [{k: v for k, v in f.items() if k != "ecd_errors"} for f in frames]
    out["without_mask"] = [p.name for p in unpaired]
    return out


def unscored_lines(res: dict, masks) -> list[str]:
    """One line per picture of a :func:`score_folder` result that failed (its name and why), and one naming
    the pictures without a mask (not scored)."""
    lines = [f"{f['name']} failed: {f['error']}" for f in res.get("per_frame", ()) if f.get("error")]
    names = res.get("without_mask") or []
    if names:
        lines.append(f"{len(names)} picture(s) without a mask of the same name in {masks} not scored "
                     f"({', '.join(names[:3])}{', ...' if len(names) > 3 else ''})")
    return lines


def format_summary(res: dict) -> str:
    """Human-readable lines of a :func:`score_folder` result."""
    return (f"frames {res['frames']}  particles {res['particles']}  grains {res['grains']}\n"
            f"recall {res['recall']:.3f}  precision {res['precision']:.3f}  "
            f"median ECD error {100 * res['ecd_error_median']:.1f} %\n"
            f"frames flagged by QC (or failed) {res['flagged']}  silently empty {res['silently_empty']}")


def _run(args) -> int:
    steps = [("flatten-background", {}), ("segment-grains", {})]
    options = None
    try:
        if args.workflow:
            from grainhabit.manager import make_host
            from grainhabit.workflow import plugin_specs, validate

            host = make_host(tuple(plugin_specs(args.workflow)))
            plan = validate(args.workflow, host)
            steps = [(s.name, dict(s.params)) for s in plan.frame_steps if s.stage in ("preprocess", "segment")]
            options = dict(plan.config.get("input") or {})
        else:
            host = None
        if args.pixel_size_nm is not None and args.pixel_size_nm <= 0:
            raise ValueError(f"--pixel-size-nm must be > 0, got {args.pixel_size_nm}")

        def progress(s):
            if args.verbose:
                print(f"{s['name']}: {s['particles_found']}/{s['particles']} particles, "
                      f"{s['grains_true']}/{s['grains']} grains true{'  qc ' + s['qc'] if s['qc'] else ''}"
                      f"{': ' + s['error'] if s['error'] else ''}",
                      file=sys.stderr)

        res = score_folder(Path(args.images), Path(args.masks), args.pixel_size_nm, args.every, steps, host,
                           progress, input_options=options)
    except (ValueError, OSError) as exc:
        if getattr(args, "debug", False):
            raise
        print(f"grainhabit score-masks: {exc}", file=sys.stderr)
        return 2
    for line in unscored_lines(res, args.masks):
        # a picture that could not be scored counts as failed: say which and why, one line each
        print(f"grainhabit score-masks: {line}", file=sys.stderr)
    if args.json:
        print(json.dumps(res, indent=1, allow_nan=True))
    else:
        print(format_summary(res))
    return 0


@hookimpl
def grainhabit_add_commands(subparsers):
    """Add ``grainhabit score-masks``."""
    p = subparsers.add_parser(
        "score-masks", help="score grain finding against your own annotated pictures",
        description="Read every picture of IMAGES that has a mask of the same name in MASKS (0 background, one "
                    "integer per particle) as a run reads it, run the preprocess and segment steps and print "
                    "recall, precision (a grain counts when its centroid lies in a particle, one per particle; "
                    "border objects left out) and the median ECD error.")
    p.add_argument("images", help="folder of pictures in any format the readers read (TIFF, PNG, JPEG, DM3/DM4, "
                                  "EMD, MRC, ...)")
    p.add_argument("masks", help="folder of instance masks (PNG or TIFF) with the same file stems")
    p.add_argument("--pixel-size-nm", type=float, default=None,
                   help="pixel size used instead of the files' own (default: each file's own, and 1 where a file "
                        "states none, so that sizes are in pixels)")
    p.add_argument("--workflow", default=None,
                   help="take the preprocess and segment steps and the input section's calibration settings from "
                        "this workflow")
    p.add_argument("--every", type=int, default=1, help="score every N-th picture only (default 1)")
    p.add_argument("--json", action="store_true", help="print JSON with per-frame counts")
    p.add_argument("--verbose", action="store_true", help="print one line per picture on stderr")
    p.set_defaults(handler=_run)
