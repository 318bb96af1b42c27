"""The project's layout rules: one import package, folders by topic, one habit vocabulary.

These are house rules rather than science; they keep the layout that DEVELOPERS.md describes
("Where does X live") true as the code grows.
"""

from __future__ import annotations

import ast
import importlib
import importlib.util
import tomllib
from pathlib import Path

from grainhabit.plugins.habit import vocabulary

REPO = Path(__file__).resolve().parents[1]


def test_every_plugin_folder_is_an_installed_package():
    # pyproject lists the packages by hand (package-dir maps grainhabit -> pipeline/); a folder left out
    # would be missing from a plain (non-editable) install
    cfg = tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]
    assert cfg["package-dir"] == {"grainhabit": "pipeline", "grainhabit.plugins": "plugins"}
    folders = {"grainhabit.plugins." + d.name for d in (REPO / "plugins").iterdir() if (d / "__init__.py").exists()}
    assert folders <= set(cfg["packages"])
    assert not any(p.split(".")[0] in ("pipeline", "plugins") for p in cfg["packages"])


def test_import_package_is_grainhabit():
    import grainhabit
    import grainhabit.plugins

    assert Path(grainhabit.__file__).parent.name == "pipeline"
    assert Path(grainhabit.plugins.__file__).parent.name == "plugins"
    assert importlib.util.find_spec("grainhabit.__main__") is not None


def _modules():
    for path in sorted((REPO / "plugins").rglob("*.py")) + sorted((REPO / "pipeline").glob("*.py")):
        yield path, ast.parse(path.read_text(), str(path))


def _private(name: str) -> bool:
    return name.startswith("_") and not name.startswith("__")


def test_no_module_imports_another_modules_private_names():
    offences = []
    for path, tree in _modules():
        where = path.relative_to(REPO)
        aliases = set()  # names bound to grainhabit modules or objects by an import
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("grainhabit"):
                offences += [f"{where}: {node.module}.{a.name}" for a in node.names if _private(a.name)]
                aliases |= {a.asname or a.name for a in node.names}
            elif isinstance(node, ast.Import):
                aliases |= {a.asname for a in node.names if a.name.startswith("grainhabit") and a.asname}
        for node in ast.walk(tree):
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id in aliases and _private(node.attr)):
                offences.append(f"{where}: {node.value.id}.{node.attr}")
    assert offences == []


def test_habit_vocabulary_is_defined_once():
    habits = set(vocabulary.HABITS)
    assert vocabulary.HABITS == ("cube", "cuboctahedron", "octahedron", "tabular_hexagon", "tabular_triangle",
                                 "rod", "irregular")  # design contract's list
    for table in (vocabulary.HABIT_COLOURS, vocabulary.HABIT_LINES, vocabulary.HABIT_MARKERS):
        assert set(table) == habits
    copies = []
    for path, tree in _modules():
        for node in ast.walk(tree):
            if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
                names = {e.value for e in node.elts if isinstance(e, ast.Constant) and isinstance(e.value, str)}
                if names >= habits:
                    copies.append(str(path.relative_to(REPO)))
    assert copies == ["plugins/habit/vocabulary.py"]


def test_benchmarks_are_not_default_plugins():
    from grainhabit.manager import BENCHMARK_PLUGINS, DEFAULT_PLUGINS, load_benchmarks, make_host

    assert not set(BENCHMARK_PLUGINS) & set(DEFAULT_PLUGINS)
    host = make_host(autoload=False)
    assert not any(r.module.startswith("grainhabit.plugins.bench") for r in host.records.values())
    load_benchmarks(host)
    assert any(r.module.startswith("grainhabit.plugins.bench") for r in host.records.values())


def test_readers_register_under_their_public_names():
    from grainhabit.manager import make_host

    host = make_host(autoload=False)
    for mod in ("grainhabit.plugins.readers.tiff", "grainhabit.plugins.readers.archive"):
        name = importlib.import_module(mod).NAME
        assert host.records[name].module == mod


def test_tests_share_builders_through_one_module():
    # tests/builders.py holds what several test modules use; no test module imports another (nor conftest)
    offences = []
    for path in sorted((REPO / "tests").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            mods = ([node.module] if isinstance(node, ast.ImportFrom) and node.module else
                    [a.name for a in node.names] if isinstance(node, ast.Import) else [])
            offences += [f"{path.name}: {m}" for m in mods if m.startswith("test_") or m == "conftest"]
    assert offences == []


def test_plain_install_holds_only_the_grainhabit_package(tmp_path):
    # a wheel (what a plain `pip install .` installs) has the one top-level package and the templates
    import subprocess
    import sys
    import zipfile

    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation",
                    "-w", str(tmp_path), str(REPO)], check=True, capture_output=True, timeout=300)
    names = zipfile.ZipFile(next(tmp_path.glob("grainhabit-*.whl"))).namelist()
    assert {n.split("/")[0] for n in names if not n.split("/")[0].endswith(".dist-info")} == {"grainhabit"}
    assert "grainhabit/plugins/scaffold/templates/stages/segment.py.tmpl" in names
    assert "grainhabit/plugins/habit/vocabulary.py" in names
