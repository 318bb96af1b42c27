"""Builders the tests share: small frames with exact shapes, single rendered crystals, invented
results stores, and command-line runners. Every test module imports what it needs from here; no test
module imports another.

Everything drawn or stored here is invented test data (no measurement of a real emulsion).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import tifffile
import xarray as xr
from scipy import ndimage as ndi
from skimage.draw import disk, line_aa, polygon

from grainhabit.frame import FrameData
from grainhabit.plugins.habit import crystal as cr
from grainhabit.results import text_array, write_results
from grainhabit.plugins.survey import summarise_samples as summary


# ---------------------------------------------------------------- files and the command line


REPO = Path(__file__).resolve().parents[1]


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


# ---------------------------------------------------------------- drawn frames


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


def polygon_rows_cols(cy, cx, r, n=6, rot_deg=0.0):
    """Vertices (rows, cols) of a regular n-gon of circumradius r."""
    t = np.deg2rad(rot_deg) + np.arange(n) * 2 * np.pi / n
    return cy + r * np.sin(t), cx + r * np.cos(t)


def draw_faceted_frame(shape=(256, 256), grains=((128, 128, 40, 6, 0.0),), contrast="bright", seed=0,
               gradient=0.3, noise=0.03, facets=True, blur=1.0):
    """Draw faceted polygon grains; returns (raw float32 image, truth labels int32).

    ``grains`` holds (row, col, circumradius px, n corners, rotation deg);
    n = 0 draws a disc. Later grains lie on top of earlier ones.
    """
    rng = np.random.default_rng(seed)
    truth = np.zeros(shape, np.int32)
    signal = np.zeros(shape)
    for k, (cy, cx, r, n, rot) in enumerate(grains, 1):
        if n == 0:
            rr, cc = disk((cy, cx), r, shape=shape)
        else:
            rr, cc = polygon(*polygon_rows_cols(cy, cx, r, n, rot), shape)
        truth[rr, cc] = k
        signal[rr, cc] = 0.7
        yy, xx = rr, cc
        signal[yy, xx] += 0.15 * np.cos(3 * np.arctan2(yy - cy, xx - cx))  # facet shading
        if facets and n:
            vy, vx = polygon_rows_cols(cy, cx, r * 0.97, n, rot)
            for i in range(n):  # strong inner facet edges from the centre to each corner
                lr, lc, _ = line_aa(int(cy), int(cx), int(round(vy[i])), int(round(vx[i])))
                ok = (lr >= 0) & (lr < shape[0]) & (lc >= 0) & (lc < shape[1])
                signal[lr[ok], lc[ok]] = 0.05 if i % 2 else 1.1
    signal = ndi.gaussian_filter(signal, blur)
    xx = np.mgrid[0:shape[0], 0:shape[1]][1]
    background = 0.15 + gradient * xx / shape[1]
    img = background + (signal if contrast == "bright" else 0.9 - signal)
    img = img + rng.normal(0.0, noise, shape)
    return img.astype(np.float32), truth


def run_chain(raw, pixel_size_nm=5.0, seg_params=None, pre_params=None):
    """flatten-background then segment-grains on a drawn frame; the frame after both."""
    from grainhabit.plugins.preprocess import flatten_background as preprocess
    from grainhabit.plugins.segment import segment_grains as segment

    frame = FrameData(source="t.tif", sample="s", raw=raw, pixel_size_nm=pixel_size_nm)
    frame = preprocess.grainhabit_preprocess(frame=frame, params=pre_params or {})
    return segment.grainhabit_segment(frame=frame, params=seg_params or {})


def ramp_finish(signal, seed, noise=0.02):
    """Blur 1 px, a background of 0.15 with a ramp, Gaussian noise."""
    rng = np.random.default_rng(seed)
    img = 0.15 + 0.1 * np.mgrid[0:signal.shape[0], 0:signal.shape[1]][1] / signal.shape[1]
    img = img + ndi.gaussian_filter(signal, 1.0) + rng.normal(0.0, noise, signal.shape)
    return img.astype(np.float32)


def iou(a, b):
    """Intersection over union of two masks."""
    return (a & b).sum() / max((a | b).sum(), 1)


def half_height_reference(image, noise_level, edge_level):
    """``foreground.half_height_mask`` in its whole-frame form: scipy's labelled maximum (kept in float32,
    as the step keeps it), binary erosion and dilations and a comparison over every pixel."""
    from grainhabit.plugins.segment import foreground as seg_fg

    weak = image > noise_level
    lab, n = ndi.label(weak, structure=np.ones((3, 3), bool))
    peak = np.zeros(n + 1, np.float32)
    peak[1:] = ndi.maximum(image, lab, np.arange(1, n + 1))
    deep = ndi.binary_erosion(weak, structure=seg_fg.disk_structure(seg_fg.EDGE_BAND_PX), border_value=1)
    strong = weak & (image > edge_level * peak[lab])
    # the stain rule (segment-grains 2.5)
    faint = weak & (image <= seg_fg.STAIN_SHARE * peak[lab])
    stain = faint & deep & ~ndi.binary_dilation(strong, seg_fg.disk_structure(seg_fg.STRONG_REACH_PX))
    if stain.any():
        deep &= ~seg_fg.diffuse_parts(stain, ndi.binary_dilation(weak & ~deep, seg_fg.disk_structure(1.5)))
    return deep | strong


# ---------------------------------------------------------------- single crystals


def body_and_rotation(alpha, face, rotation_deg):
    return cr.wulff_polyhedron(alpha), cr.in_plane_rotation(rotation_deg) @ cr.resting_rotation(face)


def draw_crystal_frame(body, rot, ecd_px=70.0, size=128, contrast="bright", facets=True, mu_per_ecd=4.0,
               noise=0.0, seed=0):
    """Frame with one grain: SEM facet shading or TEM thickness contrast.

    ``facets=False`` draws a uniform interior (a flat plate look) in either contrast;
    ``mu_per_ecd`` is the attenuation per grain ECD of thickness (TEM).
    """
    k = ecd_px * np.sqrt((np.pi / 4) / cr.projected_area(body, rot))
    c = size / 2.0
    outline = cr.project(body, rot) * k
    rows, cols = c - outline[:, 1], c + outline[:, 0]          # lab y up -> rows down
    rr, cc = polygon(rows - 0.5, cols - 0.5, (size, size))     # pixel centres at index + 0.5
    labels = np.zeros((size, size), np.int32)
    labels[rr, cc] = 1
    if contrast == "bright":
        img = np.full((size, size), 0.1)
        if facets:
            for f in cr.visible_faces(body, rot):
                p = f.polygon * k
                fr, fc = polygon(c - p[:, 1] - 0.5, c + p[:, 0] - 0.5, (size, size))
                n = f.normal
                img[fr, fc] = 0.4 + 0.35 * (1 - n[2]) + 0.12 * n[0] - 0.08 * n[1]
        else:
            img[rr, cc] = 0.45
    else:
        x = (cc + 0.5 - c) / k
        y = (c - (rr + 0.5)) / k
        t = cr.thickness_map(body, rot, x, y) * k / ecd_px     # thickness in ECD units
        if not facets:
            t = np.full_like(t, np.mean(t))
        img = np.ones((size, size))
        img[rr, cc] = np.exp(-mu_per_ecd * t)
    if noise:
        img = img + np.random.default_rng(seed).normal(0, noise, img.shape)
    raw = img.astype(np.float32)
    image = raw if contrast == "bright" else (1.0 - raw)
    return FrameData(source="drawn", sample="invented", raw=raw, pixel_size_nm=10.0,
                     image=image.astype(np.float32), polarity=contrast, labels=labels,
                     grains={"label": np.array([1]), "edge_cut": np.array([False]),
                             "ecd_nm": np.array([10.0 * np.sqrt(4 * rr.size / np.pi)])})


def draw_polygon_frame(poly_xy, size=128, contrast="bright", level=0.45, transmission=0.6):
    """Frame with one uniform grain of the given outline (lab axes, pixels about the centre)."""
    c = size / 2.0
    rr, cc = polygon(c - poly_xy[:, 1] - 0.5, c + poly_xy[:, 0] - 0.5, (size, size))
    labels = np.zeros((size, size), np.int32)
    labels[rr, cc] = 1
    if contrast == "bright":
        img = np.full((size, size), 0.1)
        img[rr, cc] = level
        image = img
    else:
        img = np.ones((size, size))
        img[rr, cc] = transmission
        image = 1.0 - img
    return FrameData(source="drawn", sample="invented", raw=img.astype(np.float32), pixel_size_nm=10.0,
                     image=image.astype(np.float32), polarity=contrast, labels=labels,
                     grains={"label": np.array([1]), "edge_cut": np.array([False]),
                             "ecd_nm": np.array([10.0 * np.sqrt(4 * rr.size / np.pi)])})


def habit_chain_frame(grains, contrast, seed, quantise=False):
    """A rendered field of every habit with touching grains (invented), through the chain up to
    segmentation (``bench habit``'s chain): the frame ready for classify-habit. ``quantise`` stores the
    raw frame as uint16, as a 16-bit TIFF reads."""
    from grainhabit.plugins.bench import habit as bh
    from grainhabit.plugins.synthetic import render as sy

    mix = {"cube": 1.0, "cuboctahedron": 1.0, "octahedron": 1.0, "tabular_hexagon": 1.0, "tabular_triangle": 1.0,
           "rod": 0.5, "irregular": 0.5}
    field = sy.make_field(grains, (320, 320), 10.0, mix, 600.0, contrast=contrast, seed=seed, touching_fraction=0.4,
                          ecd_gsd=1.12, noise=0.02, blur_px=1.0, gradient=0.3)
    raw = sy.to_uint16(field.image) if quantise else field.image
    return bh.run_chain(FrameData(source="invented", sample="invented", raw=raw, pixel_size_nm=10.0,
                                  calibration="synthetic"))


# ---------------------------------------------------------------- invented results stores


OUTLINE_SIDES = {"cube": 4, "cuboctahedron": 8, "octahedron": 4, "tabular_hexagon": 6,
          "tabular_triangle": 3, "rod": 4, "irregular": 7}


def habit_outline(habit: str, ecd: float, cx: float, cy: float, rng) -> np.ndarray:
    """Polygon (k, 2) in nm of the habit's rough outline with area pi/4 ecd^2."""
    k = OUTLINE_SIDES[habit]
    t = np.linspace(0, 2 * np.pi, k, endpoint=False) + rng.uniform(0, np.pi)
    rad = np.ones(k)
    if habit == "irregular":
        rad = rng.uniform(0.6, 1.2, k)
    xy = np.c_[np.cos(t) * rad, np.sin(t) * rad]
    if habit == "rod":
        xy = xy * [2.2, 0.45]
    x, y = xy[:, 0], xy[:, 1]
    a = 0.5 * abs(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1)))
    xy *= np.sqrt(np.pi / 4 * ecd**2 / a)
    return xy + [cx, cy]


def make_groups(samples: dict, frames_per_sample: int = 3, grains_per_frame: int = 25, seed: int = 0,
                px_nm: float = 8.0, size_px: int = 1000, fail_one: bool = True, run_time: str = "2031-05-04T02:00:00"):
    """Build the groups and root attrs of a small invented results store.

    ``samples`` maps sample name -> dict(gm=nm, gsd=, habits={name: prob},
    alpha=(median, sd), batch=, date=).
    """
    rng = np.random.default_rng(seed)
    g_cols = {k: [] for k in ("frame", "source", "sample", "label", "centroid_x_nm", "centroid_y_nm",
                              "area_nm2", "ecd_nm", "habit", "habit_score", "alpha", "alpha_lo", "alpha_hi",
                              "alpha_note", "thickness_nm", "tabular_aspect_ratio", "edge_cut", "split")}
    f_cols = {k: [] for k in ("source", "sample", "status", "error", "grain_count", "pixel_size_nm",
                              "calibration", "content_hash", "notes", "rows", "cols", "batch", "date")}
    vx, vy, vg = [], [], []
    thumbs, tscale, trows, tcols = [], [], [], []
    field_nm = size_px * px_nm
    f = 0
    for name, spec in samples.items():
        for j in range(frames_per_sample):
            source = f"/invented/{name}/field_{j:02d}.tif"
            failed = fail_one and j == frames_per_sample - 1 and name == list(samples)[0]
            f_cols["source"].append(source)
            f_cols["sample"].append(name)
            f_cols["status"].append("failed" if failed else "ok")
            f_cols["error"].append("segment-grains: no foreground found" if failed else "")
            f_cols["pixel_size_nm"].append(px_nm)
            f_cols["calibration"].append("workflow")
            f_cols["content_hash"].append(f"{seed}-{name}-{j}")
            f_cols["notes"].append("")
            f_cols["rows"].append(size_px)
            f_cols["cols"].append(size_px)
            f_cols["batch"].append(spec.get("batch", name))
            f_cols["date"].append(spec.get("date", "2031-05-01"))
            scale = field_nm / 256
            img = np.full((256, 256), 40, np.uint8)
            img += rng.integers(0, 20, img.shape, dtype=np.uint8)
            n = 0 if failed else grains_per_frame
            habits = list(spec["habits"])
            probs = np.array([spec["habits"][h] for h in habits], float)
            for lab in range(1, n + 1):
                ecd = rng.lognormal(np.log(spec["gm"]), np.log(spec["gsd"]))
                # jittered grid, so grains rarely overlap; the outer ring can touch the border
                side = int(np.ceil(np.sqrt(grains_per_frame)))
                cell = field_nm / side
                cx, cy = (np.array([(lab - 1) % side, (lab - 1) // side]) + 0.5) * cell + rng.uniform(-0.2, 0.2, 2) * cell
                h = habits[rng.choice(len(habits), p=probs / probs.sum())]
                poly = habit_outline(h, ecd, cx, cy, rng)
                edge = bool((poly.min() < 0) or (poly.max() > field_nm))
                poly = np.clip(poly, 0, field_nm)
                x, y = poly[:, 0], poly[:, 1]
                area = 0.5 * abs(np.dot(x, np.roll(y, 1)) - np.dot(y, np.roll(x, 1)))
                if h in ("cube", "cuboctahedron", "octahedron"):
                    al = float(np.clip(rng.normal(*spec["alpha"]), 0.2, 4.0))
                    note = ""
                else:
                    al = np.nan
                    note = "outline class has no alpha"
                tab = h.startswith("tabular")
                thick = ecd / rng.uniform(5, 12) if tab else np.nan
                for key, val in (("frame", f), ("source", source), ("sample", name), ("label", lab),
                                 ("centroid_x_nm", x.mean()), ("centroid_y_nm", y.mean()), ("area_nm2", area),
                                 ("ecd_nm", np.sqrt(4 * area / np.pi)), ("habit", h),
                                 ("habit_score", rng.uniform(0.5, 1)), ("alpha", al), ("alpha_lo", al - 0.1),
                                 ("alpha_hi", al + 0.1), ("alpha_note", note), ("thickness_nm", thick),
                                 ("tabular_aspect_ratio", ecd / thick if tab else np.nan),
                                 ("edge_cut", edge), ("split", False)):
                    g_cols[key].append(val)
                gi = len(g_cols["frame"]) - 1
                vx.extend(x)
                vy.extend(y)
                vg.extend([gi] * len(x))
                rr, cc = polygon(y / scale, x / scale, img.shape)
                img[rr, cc] = 200
            f_cols["grain_count"].append(n)
            thumbs.append(img)
            tscale.append(scale)
            trows.append(256)
            tcols.append(256)
            f += 1
    text = {"source", "sample", "habit", "alpha_note", "status", "error", "calibration", "content_hash",
            "notes", "batch", "date"}

    def ds_of(cols, dim):
        data = {}
        for k, v in cols.items():
            arr = text_array(v) if k in text else np.asarray(v)
            data[k] = ((dim,), arr, {"units": "nm" if k.endswith("_nm") else ("" if k in text else "1"),
                                     "long_name": k.replace("_", " ")})
        return xr.Dataset(data)

    grains = ds_of(g_cols, "grain")
    frames = ds_of(f_cols, "frame")
    outlines = xr.Dataset({
        "grain": (("vertex",), np.asarray(vg, dtype=np.int64), {"units": "1", "long_name": "grain index"}),
        "x_nm": (("vertex",), np.asarray(vx), {"units": "nm", "long_name": "outline vertex x"}),
        "y_nm": (("vertex",), np.asarray(vy), {"units": "nm", "long_name": "outline vertex y"}),
    })
    thumbnails = xr.Dataset({
        "image": (("frame", "thumb_y", "thumb_x"), np.stack(thumbs), {"units": "1", "long_name": "thumbnail"}),
        "scale_nm": (("frame",), np.asarray(tscale), {"units": "nm", "long_name": "nm per thumbnail pixel"}),
        "thumb_rows": (("frame",), np.asarray(trows), {"units": "1", "long_name": "valid rows"}),
        "thumb_cols": (("frame",), np.asarray(tcols), {"units": "1", "long_name": "valid cols"}),
    })
    ok = np.asarray(f_cols["status"]) == "ok"
    groups = {"grains": grains, "frames": frames, "outlines": outlines, "thumbnails": thumbnails}
    groups.update(summary.summarise(grains, frames, {"bootstrap": 200, "group_by": ["batch"]}))
    assert ok.sum() > 0
    attrs = {
        "workflow": "version: 1\nname: invented-test-survey\n",
        "workflow_hash": f"hash{seed}",
        "versions": json.dumps({"grainhabit": "0.1.0"}),
        "runs": json.dumps([{"started": run_time, "finished": run_time, "frames": int(f)}]),
    }
    return groups, attrs


SAMPLES = {
    "batch_A": dict(gm=400.0, gsd=1.08, habits={"cube": 0.8, "cuboctahedron": 0.15, "irregular": 0.05},
                    alpha=(0.9, 0.15), batch="B01", date="2031-05-01"),
    "batch_B": dict(gm=650.0, gsd=1.35, habits={"octahedron": 0.5, "tabular_hexagon": 0.3,
                                                  "tabular_triangle": 0.1, "rod": 0.1},
                    alpha=(3.2, 0.3), batch="B02", date="2031-05-02"),
    "batch_C": dict(gm=500.0, gsd=1.15, habits={"cuboctahedron": 0.7, "cube": 0.2, "octahedron": 0.1},
                    alpha=(2.0, 0.3), batch="B03", date="2031-05-03"),
}


def make_store(path, samples=SAMPLES, **kw) -> str:
    """Write an invented results store at ``path`` with the lead's ``write_results``."""
    groups, attrs = make_groups(samples, **kw)
    write_results(path, groups, attrs)
    return str(path)


# ---------------------------------------------------------------- instrument-style files (readers)
# Each writes a file in the layout a microscope maker's software uses, with the values found in real
# files of that maker (the real files themselves never enter the repository).

OPTS = {"max_pixels": 10_000_000, "pixel_size_nm": None, "calibration": "auto"}


def noisy(shape, seed=0, mean=90, sd=12, dtype=np.uint8) -> np.ndarray:
    """A micrograph-like field: Gaussian noise around ``mean`` (no two rows flat)."""
    rng = np.random.default_rng(seed)
    info = np.iinfo(dtype)
    return np.clip(rng.normal(mean, sd, shape), info.min + 1, info.max - 1).astype(dtype)


def with_info_strip(image: np.ndarray, rows: int, background: int = 40, ink: int | None = None) -> np.ndarray:
    """``image`` with an instrument-style strip appended: flat background, text-like strokes, a frame line."""
    ink = int(np.iinfo(image.dtype).max) if ink is None else ink
    strip = np.full((rows, image.shape[1]), background, image.dtype)
    strip[0, :] = ink  # frame line
    for k, c0 in enumerate(range(6, image.shape[1] - 20, 24)):  # "letters": short strokes
        r0 = min(3 + (k % 3), rows - 2)
        strip[r0:r0 + 7, c0] = ink
        strip[min(r0 + 3, rows - 1), c0:c0 + 5] = ink
    return np.concatenate([image, strip], axis=0)


def write_fei(path: Path, rows=60, strip=8, cols=64, field_factor=1.0) -> Path:
    """FEI/Thermo SEM TIFF: INI text in tag 34682 (values of a real Helios file, 3.3724 µm pixels)."""
    image = with_info_strip(noisy((rows, cols)), strip)
    hfw = 3.3724e-06 * cols * field_factor
    text = ("[User]\r\nDate=06/13/2016\r\n[Scan]\r\nPixelWidth=3.3724e-06\r\nPixelHeight=3.3724e-06\r\n"
            f"HorFieldsize={hfw:.6g}\r\n[Image]\r\nResolutionX={cols}\r\nResolutionY={rows}\r\n"
            f"MagCanvasRealWidth={0.2072 * cols / 512:.6g}\r\n")
    tifffile.imwrite(path, image, resolution=(64, 64), resolutionunit="INCH",
                     extratags=[(34682, "s", 0, text, True)])
    return path


def write_zeiss(path: Path, cols=64, rows=48) -> Path:
    """Zeiss SEM TIFF: tag 34118 text (a real file: 5.965 µm wide, its 'Pixel Size' of the 1024-px store)."""
    width_um = 11.6504e-3 * cols
    text = ("0\r\n0\r\n0\r\n5.824988e-009\r\n5.000000e+004\r\n6\r\n1\r\n"
            "AP_WIDTH\r\nWidth = %.4f \xb5m\r\nAP_HEIGHT\r\nHeight = %.4f \xb5m\r\n"
            "AP_MAG\r\nMag =  50.00 K X\r\nAP_PIXEL_SIZE\r\nPixel Size = 5.825 nm\r\n"
            % (width_um, 11.6504e-3 * rows))
    tifffile.imwrite(path, noisy((rows, cols)), resolution=(1, 1), resolutionunit="NONE",
                     extratags=[(34118, "s", 0, text.encode("latin-1"), True)])
    return path


def write_tescan(path: Path, px_m="5.5000e-9", mag="50.000e3", cols=64, rows=48, strip=10) -> Path:
    """Tescan SEM TIFF: tag 50431 (thumbnail bytes, then key=value text; a real file: 5.5 nm, 50 kx)."""
    image = with_info_strip(noisy((rows, cols), dtype=np.uint16, mean=9000, sd=900), strip, background=20000)
    text = (f"AccFrames=1\r\nDevice=VEGA3 SBU\r\nImageStripSize={strip}\r\nMagnification={mag}\r\n"
            f"PixelSizeX={px_m}\r\nPixelSizeY={px_m}\r\nTagRevision=2\r\n")
    blob = b"\x00\x0cjP  \r\n\x87\n" + bytes(range(256)) + text.encode("ascii")
    # 109.6 dpi resolution tags as the real files carry them (a screen setting)
    tifffile.imwrite(path, image, resolution=(4294967295 / 39190872,) * 2, resolutionunit="INCH",
                     extratags=[(50431, "B", len(blob), blob, True)])
    return path


def write_jeol(path: Path, mode="MAG", selector="150000") -> Path:
    """JEOL TEM TIFF: TemReporter XML in ImageDescription, 93 dpi image-plane pitch (a real file: 1.8208 nm)."""
    xml = ('<?xml version="1.0"?>\n<TemReporter>\n  <Eos><EosMode>eosTEM</EosMode></Eos>\n'
           f'  <ImageFormingSystem><ModeString>{mode}</ModeString><SelectorValue>{selector}</SelectorValue>'
           '<SelectorUnitString>X</SelectorUnitString></ImageFormingSystem>\n</TemReporter>')
    tifffile.imwrite(path, noisy((32, 32), dtype=np.uint16, mean=3000, sd=100), description=xml,
                     resolution=(93, 93), resolutionunit="INCH", metadata=None,
                     extratags=[(271, "s", 0, "JEOL Ltd.", True)])
    return path


def write_gatan_tags(path: Path) -> Path:
    """Gatan TIFF export: private tags 65003/65004 (unit) and 65009/65010 (scale; a real file: 0.16867 µm)."""
    extratags = [(65003, "s", 0, "µm".encode("latin-1"), True), (65004, "s", 0, "µm".encode("latin-1"), True),
                 (65009, "d", 1, 0.16867469251155853, True), (65010, "d", 1, 0.16867469251155853, True)]
    tifffile.imwrite(path, noisy((32, 32)).astype(np.int32), resolution=(72, 72), resolutionunit="INCH",
                     extratags=extratags)
    return path


def classified_on_truth(grains, shape, contrast, px=5.0, seed=3):
    """Render ``grains`` (synthetic.render), preprocess, then measure and classify on the renderer's own
    labels (split = touching): the habit step judged apart from the segmentation."""
    from grainhabit.plugins.habit import classify_habit as cl
    from grainhabit.plugins.measure import measure_grains as measure
    from grainhabit.plugins.preprocess import flatten_background as preprocess
    from grainhabit.plugins.segment.segment_grains import edge_cut
    from grainhabit.plugins.synthetic import render as sy

    field = sy.render_field(grains, shape, px, contrast, seed=seed)
    frame = FrameData(source="invented", sample="invented", raw=field.image, pixel_size_nm=px,
                      calibration="synthetic")
    f = preprocess.grainhabit_preprocess(frame, preprocess.STEP.resolve({}))
    lab = field.labels.astype(np.int32)
    n = int(lab.max())
    touch = {a for pair in sy.touching_label_pairs(lab) for a in pair}
    f = f.replace(labels=lab, grains={}).with_columns(
        label=np.arange(1, n + 1), split=np.array([k in touch for k in range(1, n + 1)]), edge_cut=edge_cut(lab))
    f = measure.grainhabit_measure(f, measure.STEP.resolve({}))
    return cl.classify_frame(f, cl.STEP.resolve({}))


def noisy_discs(radius=14.0, contrast=40.0, noise_sd=40.0, shape=(320, 320), seed=0):
    """Nine dark discs on a brighter background under white Gaussian noise (a low-dose TEM field; invented).

    Returns the frame (grey levels about 150, discs ``contrast`` darker, blurred by 0.7 px) and the centres.
    """
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    frame = np.full(shape, 150.0)
    centres = [(60 + 100 * i, 60 + 100 * j) for i in range(3) for j in range(3)]
    for cy, cx in centres:
        frame[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius ** 2] -= contrast
    return ndi.gaussian_filter(frame, 0.7) + rng.normal(0, noise_sd, shape), centres


def resampled_discs(radius=22.0, contrast=80.0, noise_sd=37.0, zoom=2.5, shape=(320, 320), seed=0):
    """Nine bright discs, placed near a 3 x 3 grid with a random jitter, under a noise correlated over a few
    pixels: white noise drawn on a grid ``zoom`` times coarser and resampled by cubic interpolation (a figure
    scaled up for print, or a grainy film; invented). Returns the frame and the disc centres (row, col).
    """
    rng = np.random.default_rng(seed)
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    frame = np.full(shape, 110.0)
    centres = [(60 + 100 * i + int(rng.integers(-15, 16)), 60 + 100 * j + int(rng.integers(-15, 16)))
               for i in range(3) for j in range(3)]
    for cy, cx in centres:
        frame[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius ** 2] += contrast
    coarse = rng.normal(0, 1, (int(shape[0] / zoom) + 2, int(shape[1] / zoom) + 2))
    noise = ndi.zoom(coarse, zoom, order=3)[:shape[0], :shape[1]]
    return ndi.gaussian_filter(frame, 0.7) + noise_sd * noise / noise.std(), centres


def drawn_outline(alpha, face, rot_deg, ecd_px=70.0):
    """The habit engine's contour of one rendered crystal (Wulff body of ``alpha`` seen along ``face``)."""
    from grainhabit.plugins.habit import classify_habit as cl
    from grainhabit.plugins.habit import engine as gr

    body, rot = body_and_rotation(alpha, face, rot_deg)
    frame = draw_crystal_frame(body, rot, ecd_px=ecd_px, noise=0.02, seed=1)
    contour, _ = gr.grain_evidence(frame.labels, *cl.interior_signal(frame), cl.frame_contours(frame)[0], 1)
    return contour


def faint_objects_reference(low, high, min_area=0.0):
    """``foreground.faint_objects`` as it was: scipy's labelling, bincounts and find_objects over the frame."""
    from grainhabit.plugins.segment import foreground

    out = np.zeros(low.shape, bool)
    lab, n = ndi.label(low, structure=np.ones((3, 3), bool))
    if n == 0:
        return out
    areas = np.bincount(lab.ravel(), minlength=n + 1)
    shown_px = np.bincount(lab[high], minlength=n + 1)
    cand = ((areas >= max(foreground.FAINT_AREA_SHARE * min_area, 1.0))
            & (shown_px < foreground.FAINT_SHOWN_SHARE * areas))
    cand[0] = False
    if not cand.any():
        return out
    reach = int(np.ceil(foreground.FAINT_CLEARANCE_PX))
    rows, cols = low.shape
    boxes = ndi.find_objects(lab)
    for k in np.flatnonzero(cand):
        box = boxes[k - 1]
        r0, r1 = max(box[0].start - reach, 0), min(box[0].stop + reach, rows)
        c0, c1 = max(box[1].start - reach, 0), min(box[1].stop + reach, cols)
        own = lab[r0:r1, c0:c1] == k
        hi = high[r0:r1, c0:c1]
        if hi.any():
            parts, m = ndi.label(hi, structure=np.ones((3, 3), bool))
            big = np.bincount(parts.ravel(), minlength=m + 1) >= max(min_area, 1.0)
            for side in (parts[0], parts[-1], parts[:, 0], parts[:, -1]):
                big[side] = True
            big[0] = False
            if (big[parts] & foreground.dilate_disk(own, foreground.FAINT_CLEARANCE_PX)).any():
                continue
        out[r0:r1, c0:c1] |= own
    return out


def draw_text(shape, text, xy, size, ink):
    """A raster of ``text`` drawn with matplotlib's Agg renderer (bold serif), as a bool mask."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure(figsize=(shape[1] / 100, shape[0] / 100), dpi=100)
    fig.text(xy[0] / shape[1], 1 - xy[1] / shape[0], text, fontsize=size, fontweight="bold", family="serif",
             va="top", ha="left", color="black")
    fig.canvas.draw()
    arr = np.asarray(fig.canvas.buffer_rgba())[..., 0]
    plt.close(fig)
    return arr[: shape[0], : shape[1]] < 128


def faint_hexagon(level, noise_sd=0.05, side=30, seed=0):
    """A regular hexagon of ``side`` px at ``level`` in noise smoothed by 1 px; its largest half-level component
    (label 1); and its handbook area 3 sqrt(3) / 2 side^2."""
    from skimage.draw import polygon

    angles = np.deg2rad(np.arange(0, 360, 60))
    rr, cc = polygon(60 + side * np.sin(angles), 60 + side * np.cos(angles), (120, 120))
    img = np.zeros((120, 120), np.float32)
    img[rr, cc] = level
    rng = np.random.default_rng(seed)
    img = ndi.gaussian_filter(img, 1.0) + ndi.gaussian_filter(rng.normal(0, 1, img.shape), 1.0).astype(np.float32) \
        * np.float32(noise_sd / 0.282)          # noise smoothed by 1 px, scaled to noise_sd (1 / (2 sqrt(pi)) = 0.282)
    half = img > 0.5 * level
    lab, _ = ndi.label(half)
    sizes = np.bincount(lab.ravel())
    sizes[0] = 0
    labels = (lab == sizes.argmax()).astype(np.int32)
    return img, labels, 3 * np.sqrt(3) / 2 * side ** 2


def write_two_batches(data: Path, frames: int = 2) -> Path:
    """Invented frames of two samples, ``alpha-batch`` and ``beta-batch``, ``frames`` TIFFs each (5 nm/px),
    under ``data/<sample>/f<i>.tif``: discs and squares whose sizes differ a little by sample and frame."""
    for s, sample in enumerate(("alpha-batch", "beta-batch")):
        for i in range(frames):
            img = draw_frame(discs=[(60, 60, 20), (60, 180, 15 + 3 * s)],
                             squares=[(150, 40, 40), (150, 160, 30 + 2 * i)], seed=10 * s + i)
            write_tiff(data / sample / f"f{i}.tif", img, 5.0)
    return data

