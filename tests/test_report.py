"""Tests of the write-report step and the ``report`` command (invented test data)."""

from __future__ import annotations

import argparse
import base64
import io
import html
import itertools
import json
import re
import shutil
import subprocess
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
from grainhabit.plugins.survey import specs, verdicts
from grainhabit.plugins.survey import summarise_samples as summary
from grainhabit.results import text_array, write_results

from builders import SAMPLES, make_groups, make_store


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


SPEC = """\
version: 1
note: "invented products for the report test"
products:
  - name: product-one
    samples: ["batch_A", "batch_B"]
    min_grains: 20
    ecd_d50_nm: {target: 420, tolerance: 60}
    habit_number_fraction: {cube: {min: 0.5}}
"""


@pytest.fixture(scope="module")
def written(tmp_path_factory):
    """An invented store with verdicts, trends, a failed frame, a QC-flagged frame and a failed input that named no
    sample."""
    base = tmp_path_factory.mktemp("rep")
    groups, attrs = make_groups(SAMPLES)
    frames = groups["frames"]
    nfr = frames.sizes["frame"]
    frames["qc"] = ("frame", text_array(["polarity-uncertain"] + [""] * (nfr - 1)))  # a step's QC flag on frame 0
    phantom = {k: (("frame",), text_array([""]) if frames[k].dtype.kind in "OUT" else
                   np.zeros(1, dtype=frames[k].dtype), frames[k].attrs) for k in frames.data_vars}
    phantom["source"] = (("frame",), text_array([str(base / "incoming" / "unreadable.tif")]), {})
    phantom["status"] = (("frame",), text_array(["failed"]), {})
    phantom["error"] = (("frame",), text_array(["reader: not a readable TIFF"]), {})
    groups["frames"] = xr.concat([frames, xr.Dataset(phantom)], dim="frame")
    groups.update(summary.summarise(groups["grains"], groups["frames"], {"bootstrap": 200, "group_by": ["date"]}))
    spec = base / "products.yaml"
    spec.write_text(SPEC)
    groups.update(verdicts.judge(specs.load_specs(spec), groups, {"bootstrap": 200, "group_by": ["date"]}))
    attrs["spec_text"] = SPEC
    attrs["data_note"] = "invented data for the report test"
    store = base / "r.zarr"
    write_results(store, groups, attrs)
    files = report.write_report(store, base / "out", {"gallery_frames": 4})
    return base, files


def _page(written):
    base, files = written
    index = Path(files[0])
    text = index.read_text(encoding="utf-8")
    p = _Refs()
    p.feed(text)  # Python's html.parser as the reference parser
    p.close()
    return index, text, p


def test_page_is_one_self_contained_file_and_every_image_decodes(written):
    index, text, p = _page(written)
    assert index.name == "index.html"
    assert p.scripts == 0 and "http://" not in text and "https://" not in text
    assert len(p.images) >= 6
    for src in p.images:
        assert src.startswith(("data:image/png;base64,", "data:image/jpeg;base64,")), src[:40]
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
        with Image.open(io.BytesIO(raw)) as im:  # PIL opens and decodes every figure
            im.load()
            assert im.size[0] > 100 and im.size[1] > 100
    ids = set(re.findall(r"id='([^']+)'", text))
    for href in p.links:
        assert href.startswith("#") and href[1:] in ids, href  # only links within the page
    assert "@media print" in text


def test_page_opens_with_what_decides(written):
    _, text, _ = _page(written)
    order = [text.index(h) for h in ("Batch verdicts", "Failed and untrusted frames", "Products across",
                                     "Detail", "id='gallery'")]
    assert order == sorted(order)
    head = text[:text.index("Failed and untrusted frames")]
    assert "PASS" in head or "FAIL" in head or "UNDECIDED" in head
    assert "batch_C" in head and "matches no product" in head
    assert "reader: not a readable TIFF" in text and "segment-grains: no foreground found" in text
    assert "Western Electric rules 1-4" in text and "licensed practice" in text
    assert "from memory" not in text.lower()


def test_no_phantom_sample_from_an_input_without_a_name(written):
    base, _ = written
    _, text, _ = _page(written)
    summ = xr.open_zarr(base / "r.zarr", group="summary").load()
    assert "" in [str(s) for s in summ["sample"].values]  # the summary step saw the unnamed input ...
    verdict_table = text[text.index("Batch verdicts"):text.index("every criterion")]
    size_table = text[text.index("Size statistics"):text.index("D10, D50 and D90 are")]
    assert verdict_table.count("<tr>") == 4 and size_table.count("<tr>") == 4  # header + three named samples
    assert "<b></b>" not in text
    failed = text[text.index("Failed and untrusted frames"):text.index("Products across")]
    assert failed.count("(none)") == 1  # it is listed among the failed frames


def test_gallery_numbers_are_grain_rows(written):
    base, _ = written
    _, text, _ = _page(written)
    g = pd.read_csv(base / "out" / "data" / "grains.csv")
    assert list(g["grain"]) == list(range(len(g)))
    grains = xr.open_zarr(base / "r.zarr", group="grains").load()
    for first, last in re.findall(r"grains (\d+)&ndash;(\d+)\)", text):
        fr = set(np.asarray(grains["frame"].values)[int(first):int(last) + 1])
        assert len(fr) == 1  # a caption's number range is one frame's rows of the grains table


def test_exports_read_back(written):
    base, _ = written
    out = base / "out" / "data"
    g = pd.read_csv(out / "grains.csv")
    assert len(g) == xr.open_zarr(base / "r.zarr", group="grains", consolidated=False).sizes["grain"]
    assert len(pd.read_parquet(out / "grains.parquet")) == len(g)
    s = pd.read_csv(out / "summary.csv")
    assert {"batch_A", "batch_B", "batch_C"} <= set(s["sample"].dropna())
    h = pd.read_csv(out / "summary_habits.csv")
    assert len(h) == len(s) * len(st.HABITS)
    v = pd.read_csv(out / "verdicts.csv")
    assert set(v["sample"]) == {"batch_A", "batch_B", "batch_C"}
    with xr.open_dataset(out / "verdicts.nc", engine="scipy") as ds:
        assert ds.sizes["sample"] == 3 and "verdict" in ds
    with xr.open_dataset(out / "trends.nc", engine="scipy") as ds:
        assert set(ds["product"].values) == {"product-one"}


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


# --------------------------------------------------------------------------
# in a real browser, as a person would open it (skipped where none is installed)
# --------------------------------------------------------------------------


def _browser() -> str | None:
    for name in ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable"):
        path = shutil.which(name)
        if path:
            return path
    return None


#: Put into a copy of the page (the page itself has no script): records errors, then on load whether every
#: image decoded and how wide the page became, into an element that --dump-dom prints.
_PROBE = """<script>window.__errors=[];
window.addEventListener('error',function(e){__errors.push(String(e.message||(e.target&&e.target.src||'').slice(0,60)))},true);
window.addEventListener('load',function(){var im=Array.prototype.slice.call(document.images);
var bad=im.filter(function(i){return !(i.complete&&i.naturalWidth>0)}).map(function(i){return i.alt});
var d=document.createElement('pre');d.id='__probe';d.textContent=JSON.stringify({images:im.length,broken:bad,
errors:__errors,scroll_width:document.documentElement.scrollWidth,width:window.innerWidth});
document.body.appendChild(d);});</script>"""


@pytest.mark.skipif(_browser() is None, reason="no headless Chromium or Chrome installed")
@pytest.mark.parametrize("width", [1280, 700])
def test_real_browser_shows_every_image_without_errors(written, tmp_path, width):
    index, text, parsed = _page(written)
    probe = tmp_path / "probe.html"
    probe.write_text(text.replace("<head>", "<head>" + _PROBE, 1), encoding="utf-8")
    proc = subprocess.run([_browser(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
                           f"--window-size={width},900", "--virtual-time-budget=20000", "--dump-dom",
                           probe.as_uri()], capture_output=True, text=True, timeout=180)
    found = re.search(r'<pre id="__probe">(.*?)</pre>', proc.stdout, re.S)
    assert found, proc.stderr[-2000:]
    got = json.loads(html.unescape(found.group(1)))
    assert got["images"] == len(parsed.images) and got["broken"] == [] and got["errors"] == []
    assert got["scroll_width"] <= width  # the page never scrolls sideways; wide tables scroll in their own box


def test_report_command_judges_a_store_against_a_spec_file(tmp_path, capsys):

    store = make_store(tmp_path / "plain.zarr")  # a run without specs: no verdicts stored
    spec = tmp_path / "p.yaml"
    spec.write_text(SPEC)
    args = _parse(["report", store, "--out", str(tmp_path / "o"), "--specs", str(spec), "--gallery", "0"])
    assert args.handler(args) == 0
    page = (tmp_path / "o" / "index.html").read_text()
    assert "product-one" in page and "No product specs were given" not in page
    assert "one self-contained file" in capsys.readouterr().out
    spec.write_text(SPEC.replace("{cube:", "{cubes:"))
    args = _parse(["report", store, "--out", str(tmp_path / "o2"), "--specs", str(spec)])
    assert args.handler(args) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "habit_number_fraction.cubes" in err and "unknown habit" in err


def test_frames_flagged_by_qc_are_listed_as_untrusted(written):
    _, text, _ = _page(written)
    section = text[text.index("id='frames'"):]
    section = section[:section.index("<h2", 10)] if "<h2" in section[10:] else section
    assert "QC: polarity-uncertain" in section and "untrusted" in section
