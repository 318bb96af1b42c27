"""The host itself: every built-in plugin loads, example workflows validate, DEFAULT_CHAIN is complete."""

from __future__ import annotations

import importlib
from pathlib import Path

import pytest

from grainhabit.manager import DEFAULT_CHAIN, DEFAULT_PLUGINS, make_host
from grainhabit.workflow import validate

from builders import REPO


def test_every_built_in_plugin_loads():
    host = make_host(autoload=False)
    assert host.problems == []
    for mod in DEFAULT_PLUGINS:
        assert importlib.util.find_spec(mod) is not None, mod
        assert any(r.module == mod for r in host.records.values()), mod
    steps = host.steps()
    for stage, name in DEFAULT_CHAIN.items():
        assert name in steps and steps[name].stage == stage


@pytest.mark.parametrize("path", sorted((REPO / "workflows").glob("*.yaml")), ids=lambda p: p.name)
def test_example_workflows_validate(path):
    plan = validate(str(path), make_host(autoload=False))
    assert plan.frame_steps and plan.survey_steps


def test_step_is_called_on_its_own_plugin_only(tmp_path):
    """Two steps of the same stage: the host calls the one the workflow names (subset_hook_caller)."""
    (tmp_path / "twins.py").write_text('''
from grainhabit import hookimpl
from grainhabit.params import StepInfo
GRAINHABIT_API = 1
STEP = StepInfo(name="twin-a", stage="thickness")
@hookimpl
def grainhabit_thickness(frame, params):
    return frame.with_note("a ran")
''')
    (tmp_path / "twin_b.py").write_text('''
from grainhabit import hookimpl
from grainhabit.params import StepInfo
GRAINHABIT_API = 1
STEP = StepInfo(name="twin-b", stage="thickness")
@hookimpl
def grainhabit_thickness(frame, params):
    return frame.with_note("b ran")
''')
    import numpy as np

    from grainhabit.frame import FrameData

    host = make_host(extra=(str(tmp_path / "twins.py"), str(tmp_path / "twin_b.py")), autoload=False)
    f = FrameData(source="x", sample="s", raw=np.zeros((4, 4), np.float32), pixel_size_nm=1.0)
    assert host.call_step("twin-a", frame=f, params={}).notes == ("a ran",)
    assert host.call_step("twin-b", frame=f, params={}).notes == ("b ran",)
