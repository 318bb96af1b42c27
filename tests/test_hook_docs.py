"""Every hook is documented: a docstring in the spec and a section in DEVELOPERS.md.

Fails when a hook in :mod:`grainhabit.hookspecs` has no ``### <hookname>``
section in DEVELOPERS.md, when its docstring lacks a numpydoc ``Parameters``
section (for hooks that take parameters) or ``Returns`` section (for hooks
that return something), when a section does not mention every parameter or
says the wrong thing about "first result wins", or when DEVELOPERS.md
documents a hook that does not exist.
"""

from __future__ import annotations

import inspect
import re
from pathlib import Path

import pytest

from grainhabit import hookspecs

DEVELOPERS = Path(__file__).resolve().parents[1] / "DEVELOPERS.md"


def _hooks() -> dict:
    return {name: f for name, f in inspect.getmembers(hookspecs, inspect.isfunction)
            if name.startswith("grainhabit_") and hasattr(f, "grainhabit_spec")}


def _sections() -> dict[str, str]:
    text = DEVELOPERS.read_text(encoding="utf-8")
    parts = re.split(r"^### (\S+)\s*$", text, flags=re.M)
    # parts = [before, name1, body1, name2, body2, ...]; a body ends at the next heading of any level
    out = {}
    for name, body in zip(parts[1::2], parts[2::2]):
        out[name] = re.split(r"^#{1,3} ", body, maxsplit=1, flags=re.M)[0]
    return out


HOOKS = _hooks()


def test_hookspecs_are_found():
    assert len(HOOKS) >= 10
    assert "grainhabit_segment" in HOOKS and "grainhabit_list_frames" in HOOKS


@pytest.mark.parametrize("name", sorted(HOOKS))
def test_hook_docstring_has_parameters_and_returns(name):
    func = HOOKS[name]
    doc = inspect.getdoc(func) or ""
    assert doc.strip(), f"{name} has no docstring"
    params = list(inspect.signature(func).parameters)
    if params:
        assert re.search(r"^Parameters\n-{10}$", doc, flags=re.M), f"{name}: no Parameters section"
        for p in params:
            assert re.search(rf"^{p} :", doc, flags=re.M), f"{name}: parameter {p!r} not described"
    returns = inspect.signature(func).return_annotation
    if returns not in ("None", None):
        assert re.search(r"^Returns\n-{7}$", doc, flags=re.M), f"{name}: no Returns section"


@pytest.mark.parametrize("name", sorted(HOOKS))
def test_hook_has_a_developers_section(name):
    sections = _sections()
    assert name in sections, f"DEVELOPERS.md has no '### {name}' section"
    body = sections[name]
    for p in inspect.signature(HOOKS[name]).parameters:
        assert f"`{p}`" in body, f"DEVELOPERS.md '### {name}' does not describe the parameter `{p}`"
    assert "```python" in body and "@hookimpl" in body, f"'### {name}' has no example implementation"
    first = bool(HOOKS[name].grainhabit_spec.get("firstresult"))
    said = re.search(r"\*\*First result wins:\*\* (yes|no)", body)
    assert said, f"'### {name}' does not say whether the first result wins"
    assert (said.group(1) == "yes") == first, f"'### {name}' says first result wins: {said.group(1)}"


def test_no_section_for_a_hook_that_does_not_exist():
    stale = [n for n in _sections() if n.startswith("grainhabit_") and n not in HOOKS]
    assert not stale, f"DEVELOPERS.md documents unknown hooks: {stale}"


def test_required_sections_are_present():
    text = DEVELOPERS.read_text(encoding="utf-8")
    for heading in ("## Rules we keep", "## Running and resuming", "## Results store"):
        assert re.search(rf"^{re.escape(heading)}\s*$", text, flags=re.M), heading
