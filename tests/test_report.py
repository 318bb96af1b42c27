"""Tests of the write-report step and the ``report`` command (invented test data)."""

from __future__ import annotations

import argparse
import itertools
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from PIL import Image
from skimage.color import deltaE_ciede2000, rgb2lab

from grainhabit.plugins.survey import write_report as report
from grainhabit.plugins.survey import statistics as st
from builders import make_store


class _Refs(HTMLParser):
    def __init__(self):
        super().__init__()
        self.images, self.links, self.tags, self.scripts = [], [], [], 0

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "img":
            self.images.append(a["src"])
        if tag == "a":
            self.links.append(a["href"])
        if tag == "script":
            self.scripts += 1


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    base = tmp_path_factory.mktemp("rep")
    store = make_store(base / "r.zarr")
    files = report.write_report(store, base / "out", {"gallery_frames": 4})
    return base, files


def test_page_is_valid_and_every_image_opens(written):
    base, files = written
    index = Path(files[0])
    assert index.name == "index.html"
    text = index.read_text(encoding="utf-8")
    p = _Refs()
    p.feed(text)  # Python's html.parser as the reference parser
    p.close()
    assert p.scripts == 0 and "http://" not in text and "https://" not in text
    assert len(p.images) >= 8
    for src in p.images:
        path = index.parent / src
        assert path.is_file(), src
        with Image.open(path) as im:  # PIL opens and decodes every figure
            im.load()
            assert im.size[0] > 100 and im.size[1] > 100
    for href in p.links:
        assert (index.parent / href).is_file(), href
    # provenance, verdicts, QC
    assert "invented-test-survey" in text and str((base / "r.zarr").resolve()) in text
    assert "monodisperse" in text and "polydisperse" in text
    assert "segment-grains: no foreground found" in text  # the failed frame's reason
    assert "trend.png" in text  # three batches


def test_exports_read_back(written):
    base, _ = written
    out = base / "out"
    g = pd.read_csv(out / "grains.csv")
    assert len(g) == xr.open_zarr(base / "r.zarr", group="grains", consolidated=False).sizes["grain"]
    assert len(pd.read_parquet(out / "grains.parquet")) == len(g)
    s = pd.read_parquet(out / "summary.parquet")
    assert set(s["sample"]) == {"batch_A", "batch_B", "batch_C"}
    h = pd.read_csv(out / "summary_habits.csv")
    assert len(h) == 3 * len(st.HABITS)
    with xr.open_dataset(out / "summary.nc", engine="scipy") as ds:
        assert ds.sizes["sample"] == 3 and "habit_area_fraction" in ds
    with xr.open_dataset(out / "grains.nc", engine="scipy") as ds:
        assert ds.sizes["grain"] == len(g)


def _machado(rgb, m):
    # dichromat simulation in linear RGB; matrices of Machado, Oliveira and Fernandes,
    # IEEE TVCG 15 (6), 2009, severity 1.0 (values from memory)
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    s = np.clip(lin @ np.asarray(m).T, 0, 1)
    return np.where(s <= 0.0031308, 12.92 * s, 1.055 * s ** (1 / 2.4) - 0.055)


def test_habit_palette_stays_distinct_under_colour_vision_deficiency():
    rgb = np.array([[int(c[i:i + 2], 16) / 255 for i in (1, 3, 5)] for c in report.HABIT_COLOURS.values()])
    sims = {
        "normal": np.eye(3),
        "protan": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216], [-0.003882, -0.048116, 1.051998]],
        "deutan": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413], [-0.011820, 0.042940, 0.968881]],
        "tritan": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602], [0.004733, 0.691367, 0.303900]],
    }
    assert list(report.HABIT_COLOURS) == list(st.HABITS)
    for name, m in sims.items():
        lab = rgb2lab(_machado(rgb, m)[None])[0]  # scikit-image as reference for CIELAB and CIEDE2000
        worst = min(deltaE_ciede2000(lab[i], lab[j]) for i, j in itertools.combinations(range(len(rgb)), 2))
        assert worst >= 20, (name, worst)


def _parse(argv):
    parser = argparse.ArgumentParser(prog="grainhabit")
    sub = parser.add_subparsers()
    report.grainhabit_add_commands(subparsers=sub)
    return parser.parse_args(argv)


def test_command_missing_store_returns_2_with_one_line(tmp_path, capsys):
    args = _parse(["report", str(tmp_path / "nope.zarr"), "--out", str(tmp_path / "o")])
    assert args.handler(args) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "no such results store" in err
    (tmp_path / "junk.zarr").mkdir()
    args = _parse(["report", str(tmp_path / "junk.zarr"), "--out", str(tmp_path / "o")])
    assert args.handler(args) == 2
    assert "not a grainhabit results store" in capsys.readouterr().err


def test_hook_and_step():
    assert report.GRAINHABIT_API == 1 and report.STEP.stage == "report"
    assert report.STEP.resolve({"gallery_frames": 0})["gallery_frames"] == 0
