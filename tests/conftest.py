"""Shared helpers for the tests: small frames with exact shapes, CLI runner."""

from __future__ import annotations

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import tifffile
from scipy import ndimage as ndi
from skimage.draw import disk, polygon

REPO = Path(__file__).resolve().parents[1]


def draw_frame(shape=(256, 256), discs=(), squares=(), bright=True, background=0.15, level=0.8, noise=0.01,
               seed=0) -> np.ndarray:
    """A uint16 frame with discs ((row, col, radius)) and axis-aligned squares ((row0, col0, side)) in px."""
    img = np.full(shape, background, dtype=np.float64)
    for r, c, rad in discs:
        rr, cc = disk((r, c), rad, shape=shape)
        img[rr, cc] = level
    for r0, c0, side in squares:
        img[r0:r0 + side, c0:c0 + side] = level
    if not bright:
        img = 1.0 - img
    rng = np.random.default_rng(seed)
    img = img + rng.normal(0, noise, shape)
    return (np.clip(img, 0, 1) * 60000).astype(np.uint16)


def reference_gap_lines(mask: np.ndarray, cores: np.ndarray, min_area_px: int, reach_px: float):
    """Lines between grains that do not touch, built from scikit-image alone (reference for gap_lines).

    Bodies are the connected cores and the components of ``mask`` without a core (``faint``); specks
    under ``min_area_px`` take no part. The lines are the thick 4-neighbour boundaries
    (``find_boundaries``) of the bodies grown to their nearest-label regions (``expand_labels``),
    outside the bodies, and inside the mask only within ``reach_px`` of a body.

    Returns
    -------
    gaps, bodies, faint, n_cores
    """
    from skimage.segmentation import expand_labels, find_boundaries

    eight = np.ones((3, 3), bool)
    comp, n = ndi.label(cores, structure=eight)
    whole, _ = ndi.label(mask, structure=eight)
    faint = np.isin(whole, np.unique(whole[cores]), invert=True) & mask
    bodies = np.where(cores, comp, np.where(faint, whole + n, 0))
    area = np.bincount(bodies.ravel())
    bodies[area[bodies] < min_area_px] = 0
    near = ndi.distance_transform_edt(bodies == 0) <= reach_px
    gaps = find_boundaries(expand_labels(bodies, sum(mask.shape)), connectivity=1, mode="thick")
    gaps &= (bodies == 0) & (~mask | near)
    return gaps, bodies, faint, n


def write_tiff(path: Path, image: np.ndarray, pixel_size_nm: float | None = None) -> Path:
    """Write a TIFF with resolution tags in cm (or none)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    if pixel_size_nm:
        ppcm = 1e7 / pixel_size_nm
        tifffile.imwrite(path, image, resolution=(ppcm, ppcm), resolutionunit="CENTIMETER")
    else:
        tifffile.imwrite(path, image)
    return path


def write_workflow(path: Path, body: str) -> Path:
    path.write_text(textwrap.dedent(body))
    return path


def run_cli(*args, cwd=None, env=None, timeout=300) -> subprocess.CompletedProcess:
    """Run ``grainhabit ARGS`` in this process (fast); same result object as a subprocess.

    Use :func:`run_cli_subprocess` where a separate process matters (signals, locks).
    """
    import contextlib
    import io

    from grainhabit.cli import main

    out, err = io.StringIO(), io.StringIO()
    saved_env = dict(os.environ)
    saved_cwd = os.getcwd()
    os.environ.setdefault("GRAINHABIT_NO_AUTOLOAD", "1")
    os.environ.update(env or {})
    try:
        if cwd:
            os.chdir(cwd)
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                code = main([str(a) for a in args])
            except SystemExit as exc:  # argparse --help
                code = exc.code if isinstance(exc.code, int) else 0
    finally:
        os.chdir(saved_cwd)
        os.environ.clear()
        os.environ.update(saved_env)
    return subprocess.CompletedProcess(list(args), code, out.getvalue(), err.getvalue())


def run_cli_subprocess(*args, cwd=None, env=None, timeout=300) -> subprocess.CompletedProcess:
    """Run ``python -m grainhabit ARGS`` as a separate process; return the completed process (text)."""
    e = dict(os.environ)
    e.setdefault("GRAINHABIT_NO_AUTOLOAD", "1")
    e.update(env or {})
    return subprocess.run([sys.executable, "-m", "grainhabit", *map(str, args)], cwd=cwd, env=e,
                          capture_output=True, text=True, timeout=timeout)


@pytest.fixture
def small_survey(tmp_path):
    """Two samples of two frames each: discs and squares of known size, 5 nm pixels."""
    data = tmp_path / "data"
    for s, sample in enumerate(("alpha-batch", "beta-batch")):
        for i in range(2):
            img = draw_frame(discs=[(60, 60, 20), (60, 180, 15 + 3 * s)],
                             squares=[(150, 40, 40), (150, 160, 30 + 2 * i)], seed=10 * s + i)
            write_tiff(data / sample / f"f{i}.tif", img, 5.0)
    return tmp_path
