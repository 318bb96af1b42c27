"""The demo: its invented products' spec file and the verdicts it shows (invented data)."""

from __future__ import annotations

import re
from pathlib import Path

from builders import run_cli

from grainhabit.plugins.survey.specs import load_specs
from grainhabit.plugins.synthetic import demo

REPO = Path(__file__).resolve().parents[1]


def test_shipped_spec_file_is_the_demos_and_says_it_is_invented():
    shipped = REPO / "workflows" / "specs" / "demo-products.yaml"
    assert shipped.read_text() == demo.SPEC_TEXT
    specs = load_specs(shipped)
    assert "invented" in specs.note.lower() and "invented" in demo.SPEC_TEXT.splitlines()[0].lower()
    assert [p.name for p in specs.products] == ["kestrel-cubic-260", "kestrel-tabular-420"]
    # every batch of the demo but the trial batch has a product
    names = [b[1] for b in demo.BATCHES]
    assert [n for n in names if specs.product_of(n) is None] == ["KX-01"]


def test_demo_workflow_validates(tmp_path):
    from grainhabit.manager import make_host
    from grainhabit.workflow import validate

    plan = validate(str(REPO / "workflows" / "demo.yaml"), make_host())
    assert plan.specs is not None and plan.config["specs"].endswith("demo-products.yaml")


def test_demo_verdicts_pass_fail_undecided_and_one_report_file(tmp_path):
    proc = run_cli("demo", "--out", tmp_path / "d", "--scheduler", "serial")
    assert proc.returncode == 0, proc.stderr[-3000:]
    verdicts = dict(re.findall(r"^verdict (\S+)\s+\S+\s+(PASS|FAIL|UNDECIDED|matches no product)", proc.stdout,
                               re.M))
    assert len(verdicts) == len(demo.BATCHES)
    assert {"PASS", "FAIL", "UNDECIDED", "matches no product"} <= set(verdicts.values()), verdicts
    assert verdicts["KT-02"] == "FAIL" and verdicts["KX-01"] == "matches no product"
    report = tmp_path / "d" / "results" / "report" / "index.html"
    assert sorted(p.name for p in report.parent.iterdir()) == ["data", "index.html"]
    assert report.stat().st_size < 5e6  # one file that a mail client can carry
