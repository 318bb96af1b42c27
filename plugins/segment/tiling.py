"""Tiled processing of frames too large for one pass, and label stitching.

A frame is cut into square *cores* of ``tile_px`` pixels; each tile is its
core plus a *halo* of ``halo_px`` pixels on every side (clipped at the frame).
A labelling function runs on every tile, in a local thread pool (most of
scikit-image and scipy.ndimage releases the GIL, so threads overlap well and
no cluster is needed; inside a dask worker one thread is used, because the
worker's own threads already keep the cores busy with other frames).

Stitching rule: a labelling function reports for every grain the *cluster*
(connected foreground component, before splitting touching grains) it came
from. A tile keeps a cluster, with all its grains, exactly when the cluster's
first pixel in row-major order lies in the tile's core. Cores partition the
frame, so every cluster is kept by exactly one tile and measured once. When
the halo is larger than every cluster and the labelling function depends
only on a neighbourhood smaller than the halo, the kept cluster is the same
as in an untiled run, so tiled and untiled labels are the same partition.
A kept cluster that touches an inner tile edge shows that the halo was too
small; such clusters are counted and reported.
"""

from __future__ import annotations

import os
import sys
from concurrent.futures import ThreadPoolExecutor
from typing import Callable

import numpy as np


def _check_tiling(shape, tile_px: int, halo_px: int) -> None:
    if len(shape) != 2:
        raise ValueError(f"tiling needs a 2-D shape, got {shape!r}")
    if int(tile_px) < 16:
        raise ValueError(f"tile_px must be >= 16, got {tile_px!r}")
    if int(halo_px) < 0:
        raise ValueError(f"halo_px must be >= 0, got {halo_px!r}")


def tile_grid(shape: tuple, tile_px: int, halo_px: int) -> list[tuple[tuple, tuple]]:
    """Cores and tiles covering a frame.

    Parameters
    ----------
    shape : tuple of int
        (rows, cols) of the frame.
    tile_px : int
        Side of a core in pixels (the last core in a row or column is
        smaller).
    halo_px : int
        Overlap added on every side of a core, clipped to the frame.

    Returns
    -------
    list of (core, tile)
        Each a pair of ``(row_slice, col_slice)`` in frame coordinates; cores
        partition the frame.
    """
    _check_tiling(shape, tile_px, halo_px)
    out = []
    rows, cols = shape
    for r0 in range(0, rows, tile_px):
        r1 = min(r0 + tile_px, rows)
        for c0 in range(0, cols, tile_px):
            c1 = min(c0 + tile_px, cols)
            core = (slice(r0, r1), slice(c0, c1))
            tile = (slice(max(r0 - halo_px, 0), min(r1 + halo_px, rows)),
                    slice(max(c0 - halo_px, 0), min(c1 + halo_px, cols)))
            out.append((core, tile))
    return out


def renumber_raster(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Relabel 1..n in the row-major order of each label's first pixel.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, any positive ids.

    Returns
    -------
    relabelled : ndarray of int32, shape (rows, cols)
    old_ids : ndarray of int, shape (n,)
        ``old_ids[k - 1]`` is the id that became label ``k``.

    Notes
    -----
    The order is the one :func:`skimage.measure.label` gives connected
    components, and it does not depend on how the frame was tiled.
    """
    flat = np.asarray(labels).ravel()
    ids, first = np.unique(flat, return_index=True)
    keep = ids > 0
    ids, first = ids[keep], first[keep]
    old_ids = ids[np.argsort(first, kind="stable")]
    lut = np.zeros(int(flat.max()) + 1 if flat.size else 1, np.int32)
    lut[old_ids] = np.arange(1, len(old_ids) + 1, dtype=np.int32)
    return lut[np.asarray(labels)], old_ids


def _auto_workers() -> int:
    if "distributed" in sys.modules:
        try:
            from distributed import get_worker

            get_worker()
            return 1
        except (ImportError, ValueError):
            pass
    return max(1, os.cpu_count() or 1)


def label_tiled(image: np.ndarray, func: Callable, tile_px: int, halo_px: int,
                workers: int = 0) -> tuple[np.ndarray, dict, int]:
    """Run a labelling function over overlapping tiles and stitch the labels.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Frame to label.
    func : callable
        ``func(tile_image) -> (labels, clusters, flags)``: ``labels`` int
        (tile shape, 0 background), ``clusters`` int (tile shape, the
        connected component each grain pixel belongs to), ``flags`` a dict
        of per-label boolean arrays indexed by label id (index 0 unused).
        Must be pure and thread-safe.
    tile_px : int
        Core side in pixels.
    halo_px : int
        Overlap in pixels; should exceed the largest cluster.
    workers : int
        Threads; 0 chooses automatically (see module docstring).

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
        1..n in row-major order of first pixels (:func:`renumber_raster`).
    flags : dict of str -> ndarray of bool, shape (n,)
        The function's flags, in label order.
    n_truncated : int
        Kept clusters that touched an inner tile edge (halo too small).
    """
    img = np.asarray(image)
    grid = tile_grid(img.shape, int(tile_px), int(halo_px))
    workers = int(workers) if workers and workers > 0 else _auto_workers()

    def one(item):
        core, tile = item
        lab, clu, flags = func(img[tile])
        lab = np.asarray(lab)
        clu = np.asarray(clu)
        r_off, c_off = tile[0].start, tile[1].start
        ids, first = np.unique(clu.ravel(), return_index=True)
        sel = ids > 0
        ids, first = ids[sel], first[sel]
        fr, fc = np.unravel_index(first, clu.shape)
        fr, fc = fr + r_off, fc + c_off
        in_core = ((fr >= core[0].start) & (fr < core[0].stop)
                   & (fc >= core[1].start) & (fc < core[1].stop))
        kept = ids[in_core]
        keep_mask = np.isin(clu, kept) & (lab > 0)
        # inner edges: tile edges that are not frame edges
        inner = np.zeros(clu.shape, bool)
        if tile[0].start > 0:
            inner[0, :] = True
        if tile[0].stop < img.shape[0]:
            inner[-1, :] = True
        if tile[1].start > 0:
            inner[:, 0] = True
        if tile[1].stop < img.shape[1]:
            inner[:, -1] = True
        truncated = int(np.unique(clu[inner & np.isin(clu, kept)]).size)
        return tile, lab, keep_mask, flags, truncated

    if workers == 1 or len(grid) == 1:
        results = [one(item) for item in grid]
    else:
        with ThreadPoolExecutor(max_workers=min(workers, len(grid))) as pool:
            results = list(pool.map(one, grid))

    out = np.zeros(img.shape, np.int64)
    flag_names = sorted({k for res in results for k in res[3]})
    gathered = {k: [np.zeros(1, bool)] for k in flag_names}
    offset = 0
    n_trunc = 0
    for tile, lab, keep_mask, flags, truncated in results:
        n_trunc += truncated
        nmax = int(lab.max()) if lab.size else 0
        view = out[tile]
        view[keep_mask] = lab[keep_mask].astype(np.int64) + offset
        for k in flag_names:
            arr = np.zeros(nmax + 1, bool)
            given = np.asarray(flags.get(k, arr), bool)
            arr[: min(len(given), nmax + 1)] = given[: nmax + 1]
            gathered[k].append(arr[1:])
        offset += nmax
    stitched, old_ids = renumber_raster(out)
    flags_out = {k: np.concatenate(v)[old_ids] for k, v in gathered.items()}
    return stitched, flags_out, n_trunc
