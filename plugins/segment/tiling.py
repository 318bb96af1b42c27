"""Tiled processing of frames too large for one pass, and label stitching.

A frame is cut into square *cores* of ``tile_px`` pixels; each tile is its
core plus a *halo* of ``halo_px`` pixels on every side (clipped at the
frame). A labelling function runs on every tile; the tiles of one frame are
spread over every worker of the cluster the frame runs on, or over the local
cores outside a cluster (:func:`grainhabit.executors.fan_out`).

Stitching rule. The labelling function reports for every grain the
*cluster* (connected foreground component, before touching grains are split)
it came from, and is assumed *local*: what it makes of a cluster depends
only on the pixels within ``margin = halo_px // 2`` of the cluster. A
cluster whose bounding box lies at least ``margin`` from every inner edge of
its tile (an edge that is not the frame's) is therefore exactly the cluster
of an untiled run; it is *safe*. A tile keeps its safe clusters whose first
pixel (row-major) lies in its core; cores partition the frame, so no cluster
is kept twice. Every other cluster that reaches into a core is labelled
again, in a window of its own: the bounding box of what was seen of it
grown by the halo, grown again until the cluster is safe in the window
(:func:`_resolve_open`). So the tiled labels equal the untiled ones for
clusters of any size, and the halo only needs to exceed twice the reach of
the labelling function, not the largest cluster.

The same module lets ``segment-grains`` run on the tiles of a frame that
the host processes tile by tile through the whole chain
(:mod:`grainhabit.chain_tiles`): :func:`grainhabit_tile_levels` computes
the frame-wide thresholds once, from the preprocess step's preview of the
frame, and :func:`segment_tile` labels one tile with them.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from grainhabit import hookimpl
from grainhabit.chain_tiles import box_is_safe, first_pixels, owned_clusters

GRAINHABIT_API = 1
#: The name this plugin module is registered under (it adds no step of its own).
NAME = "segment-tiles"
#: The step whose tiles this module serves.
SEGMENT_STEP = "segment-grains"


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


def renumber_raster(labels: np.ndarray, boxes: list | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Relabel 1..n in the row-major order of each label's first pixel.

    Parameters
    ----------
    labels : ndarray of int, shape (rows, cols)
        0 background, any positive ids.
    boxes : list of tuple of slice, optional
        ``scipy.ndimage.find_objects(labels)``, where known (:func:`~grainhabit.chain_tiles.first_pixels`).

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
    lab = np.asarray(labels)
    first = first_pixels(lab, boxes=boxes)
    present = np.flatnonzero(first >= 0) + 1
    old_ids = present[np.argsort(first[present - 1], kind="stable")]
    n = int(lab.max()) if lab.size else 0
    if len(old_ids) == n and n and old_ids[0] == 1 and bool(np.all(np.diff(old_ids) == 1)):
        # already 1..n in raster order (a refinement moved no first pixel past another's): lut[lab] is the
        # identity, so a copy of the labels gives its values without the lookup of every pixel
        return np.array(lab, dtype=np.int32), old_ids
    lut = np.zeros(n + 1, np.int32)
    lut[old_ids] = np.arange(1, len(old_ids) + 1, dtype=np.int32)
    return lut[lab], old_ids


def label_one_tile(func: Callable, tile_image: np.ndarray, core: tuple, tile: tuple,
                   frame_shape: tuple, margin: int) -> tuple[np.ndarray, dict, int, np.ndarray]:
    """Label one tile; keep its safe clusters that start in its core, list the open ones.

    Parameters
    ----------
    func : callable
        The labelling function of :func:`label_tiled`.
    tile_image : ndarray
        ``image[tile]``.
    core, tile : tuple of slice
        Core and tile in frame coordinates (from :func:`tile_grid`).
    frame_shape : tuple of int
    margin : int
        Reach of ``func`` in pixels (see the module docstring).

    Returns
    -------
    kept : ndarray of int32, shape of the tile
        The tile's label ids on the grains of kept clusters, -1 on the other
        pixels of kept clusters, 0 elsewhere.
    flags : dict
        The function's per-label flags (indexed by the tile's label ids).
    n_labels : int
        Largest label id of the tile.
    open_pixels : ndarray of int64, shape (k,)
        Row-major frame indices of the core pixels of clusters that are not
        safe in this tile (to be labelled again).
    """
    lab, clu, flags = func(tile_image)
    lab = np.asarray(lab)
    clu = np.asarray(clu)
    keep, open_pixels = owned_clusters(clu, tile, core, frame_shape, margin)
    kept = np.where(keep[clu], np.where(lab > 0, lab, -1), 0).astype(np.int32)
    n_labels = int(lab.max()) if lab.size else 0
    return kept, flags, n_labels, open_pixels


def _resolve_open(img: np.ndarray, func: Callable, out: np.ndarray, pending: np.ndarray, halo: int,
                  margin: int, offset: int, gathered: dict) -> tuple[int, int]:
    """Label the clusters that were open in their tiles, each in a window where it is safe.

    Writes into ``out`` (frame labels, ids from ``offset + 1`` on; -1 on the
    other pixels of a written cluster) and appends their flags to
    ``gathered``.

    Returns
    -------
    offset : int
        The last id used.
    unresolved : int
        Open pixels whose cluster could not be found again (0 for a local
        labelling function).
    """
    from scipy import ndimage as ndi

    rows, cols = img.shape
    flat = out.reshape(-1)
    todo = np.zeros(out.size, bool)
    todo[pending] = True
    todo &= flat == 0
    unresolved = 0
    for q in pending:
        if not todo[q]:
            continue
        qr, qc = divmod(int(q), cols)
        box = [qr, qr + 1, qc, qc + 1]
        while True:
            win = (slice(max(box[0] - halo, 0), min(box[1] + halo, rows)),
                   slice(max(box[2] - halo, 0), min(box[3] + halo, cols)))
            lab, clu, flags = func(img[win])
            lab, clu = np.asarray(lab), np.asarray(clu)
            cid = int(clu[qr - win[0].start, qc - win[1].start])
            if cid == 0:
                break
            cbox = ndi.find_objects((clu == cid).astype(np.uint8))[0]
            if box_is_safe(cbox, clu.shape, win, img.shape, margin):
                break
            grown = [cbox[0].start + win[0].start, cbox[0].stop + win[0].start,
                     cbox[1].start + win[1].start, cbox[1].stop + win[1].start]
            box = [min(box[0], grown[0]), max(box[1], grown[1]), min(box[2], grown[2]), max(box[3], grown[3])]
        if cid == 0:
            todo[q] = False
            unresolved += 1
            continue
        member = clu == cid
        rr, cc = np.nonzero(member)
        idx = (rr + win[0].start) * cols + cc + win[1].start
        todo[idx] = False
        if (flat[idx] != 0).any():
            continue  # kept whole by a tile already
        ids = np.unique(lab[member])
        ids = ids[ids > 0]
        lut = np.zeros(int(lab.max()) + 1, np.int64)
        lut[ids] = np.arange(offset + 1, offset + 1 + len(ids))
        vals = lut[lab[member]]
        flat[idx] = np.where(vals > 0, vals, -1)
        for k in gathered:
            given = np.zeros(int(lab.max()) + 1, bool)
            f = np.asarray(flags.get(k, given), bool)[: len(given)]
            given[: len(f)] = f
            gathered[k].append(given[ids])
        offset += len(ids)
    return offset, unresolved


def label_tiled(image: np.ndarray, func: Callable, tile_px: int, halo_px: int,
                workers: int = 0) -> tuple[np.ndarray, dict, int]:
    """Run a labelling function over overlapping tiles and stitch the labels.

    Parameters
    ----------
    image : ndarray, shape (rows, cols)
        Frame to label.
    func : callable
        ``func(window_image) -> (labels, clusters, flags)``: ``labels`` int
        (window shape, 0 background), ``clusters`` int (window shape, the
        connected component each grain pixel belongs to), ``flags`` a dict
        of per-label boolean arrays indexed by label id (index 0 unused).
        Must be pure, thread-safe, picklable (cloudpickle) and local (see
        the module docstring).
    tile_px : int
        Core side in pixels.
    halo_px : int
        Overlap in pixels; at least twice the reach of ``func``.
    workers : int
        0: spread the tiles over every worker of the cluster the frame runs
        on, or over the local cores outside a cluster
        (:func:`grainhabit.executors.fan_out`); 1: one after another in this
        thread; n > 1: n local threads (outside a cluster).

    Returns
    -------
    labels : ndarray of int32, shape (rows, cols)
        1..n in row-major order of first pixels (:func:`renumber_raster`).
    flags : dict of str -> ndarray of bool, shape (n,)
        The function's flags, in label order.
    n_unresolved : int
        Open clusters that could not be labelled again (0 for a local
        labelling function).
    """
    from grainhabit.executors import fan_out

    img = np.asarray(image)
    halo = int(halo_px)
    margin = max(1, halo // 2)
    grid = tile_grid(img.shape, int(tile_px), halo)
    items = [(func, img[tile], core, tile, img.shape, margin) for core, tile in grid]
    workers = int(workers) if workers and workers > 0 else 0
    if workers > 1 and _in_worker():
        workers = 0  # thread counts apply outside a cluster; inside, the cluster's workers share the tiles
    results = fan_out(label_one_tile, items, threads=workers)

    out = np.zeros(img.shape, np.int32)
    flag_names = sorted({k for res in results for k in res[1]})
    gathered = {k: [np.zeros(1, bool)] for k in flag_names}
    offset = 0
    pending = []
    for (core, tile), (kept, flags, nmax, open_pixels) in zip(grid, results):
        view = out[tile]
        view[kept > 0] = kept[kept > 0] + offset
        view[kept < 0] = -1
        pending.append(open_pixels)
        for k in flag_names:
            arr = np.zeros(nmax + 1, bool)
            given = np.asarray(flags.get(k, arr), bool)
            arr[: min(len(given), nmax + 1)] = given[: nmax + 1]
            gathered[k].append(arr[1:])
        offset += nmax
    pending = np.concatenate(pending) if pending else np.zeros(0, np.int64)
    offset, unresolved = _resolve_open(img, func, out, pending, halo, margin, offset, gathered)
    out[out < 0] = 0
    stitched, old_ids = renumber_raster(out)
    flags_out = {k: np.concatenate(v)[old_ids] for k, v in gathered.items()}
    return stitched, flags_out, unresolved


def _in_worker() -> bool:
    from grainhabit.executors import in_dask_worker

    return in_dask_worker() is not None


@hookimpl
def grainhabit_tile_levels(step, sample, params):
    """Frame-wide thresholds of ``segment-grains`` for a frame processed by tiles.

    Computed by :func:`grainhabit.plugins.segment.levels.frame_levels`
    on the preprocess step's preview of the frame (every pixel of a frame up
    to its sample size, a regular grid of a larger one), with the frame-level
    checks of an untiled run on the same preview.

    Returns
    -------
    dict or None
        ``levels`` (the thresholds) and ``empty`` (a qc note when the frame
        holds no grains, else empty), for ``step == "segment-grains"``.
    """
    if step != SEGMENT_STEP:
        return None
    from grainhabit.plugins.segment import segment_grains as sg
    from grainhabit.plugins.segment.levels import frame_levels

    p = sg.STEP.resolve(params)
    if sample.preview is None:
        raise ValueError("segment-grains on a frame processed by tiles needs a preprocess step that gives a "
                         "preview of the frame (flatten-background)")
    arr = np.asarray(sample.preview, np.float32)
    levels = frame_levels(arr, p["noise_k"], faint_k=p["faint_k"])
    notes = []
    try:
        empty = sg.check_frame(arr, levels, p)
    except ValueError as err:
        # as on a whole frame (segment_grains.segment_image), without its packed-field second look
        sg.few_above_noise(arr, levels, p, str(err), notes)
        empty = ""
    return {"levels": levels, "empty": empty, "notes": notes + ([empty] if empty else [])}


def segment_tile(frame, params):
    """``segment-grains`` on one tile of a frame processed by tiles, with the frame's thresholds.

    Parameters
    ----------
    frame : FrameData
        A tile: ``image`` preprocessed, ``meta["tile_levels"]["segment-grains"]``
        from :func:`grainhabit_tile_levels`.
    params : dict
        The step's parameters.

    Returns
    -------
    FrameData
        ``labels``, the columns ``label``, ``split`` and ``edge_cut`` (a
        grain touching the tile's edge; the host keeps only grains away
        from inner edges, so kept grains touch the frame's edge), and
        ``meta["clusters"]`` (the connected component each grain pixel
        belongs to, for the host's ownership rule).
    """
    import inspect

    from grainhabit.plugins.segment import segment_grains as sg

    if frame.image is None:
        raise ValueError("segment-grains needs frame.image: run a preprocess step (flatten-background) first")
    p = sg.STEP.resolve(params)
    shared = frame.meta["tile_levels"][SEGMENT_STEP]
    shape = np.shape(frame.image)
    if shared.get("empty"):
        labels = np.zeros(shape, np.int32)
        clusters = labels
        flags = {"split": np.zeros(1, bool), "rejected": {"line": 0, "stroke": 0}}
    else:
        accepted = inspect.signature(sg.label_grains).parameters
        kw = {k: v for k, v in p.items() if k in accepted and k not in ("image", "pixel_size_nm", "levels")}
        kw["method"] = p["threshold"]
        labels, clusters, flags = sg.label_grains(frame.image, frame.pixel_size_nm, shared["levels"], **kw)
    n = int(labels.max()) if labels.size else 0
    split = np.asarray(flags["split"], bool)[1:n + 1]
    notes = []
    if n:
        # the outlines refined as an untiled frame's are (segment_grains.refine_outlines); a pixel a grain
        # takes from the background joins its grain's cluster
        refined, split, old = sg.refine_outlines(frame.image, labels, split, shared["levels"]["sigma"], notes)
        if old is not None:
            clusters = np.asarray(clusters)
            cluster_of = np.zeros(n + 1, clusters.dtype)
            cluster_of[labels] = clusters          # one cluster per grain (entry 0 is never read below)
            clusters = np.where(refined > 0, cluster_of[np.r_[0, old][refined]], clusters)
            labels = refined
    new = frame.replace(labels=labels.astype(np.int32), grains={}, meta={**frame.meta, "clusters": clusters})
    new = new.with_columns(label=np.arange(1, n + 1, dtype=np.int64), split=split, edge_cut=sg.edge_cut(labels))
    rej = flags.get("rejected", {})
    if rej.get("line") or rej.get("stroke"):
        new = new.with_note(f"segment-grains: {rej.get('line', 0)} line-like and {rej.get('stroke', 0)} "
                            "stroke-like object(s) dropped as drawn marks (scale bars, letters, text, streaks)")
    for note in notes:
        new = new.with_note(note)
    return new
