"""The package's own habits: every module says what it exports, and the
package ships its type marker (PEP 561)."""

from __future__ import annotations

import importlib
import pkgutil
import sys
from pathlib import Path

import pytest

import hierarchy

ROOT = Path(__file__).resolve().parents[1]

def modules():
    """Every module of the package, by name; `__main__` is the command's
    entry script (importing it runs the command), not a module to import."""
    return sorted(m.name for m in pkgutil.walk_packages(hierarchy.__path__, "hierarchy.")
                  if not m.name.endswith(".__main__")) + ["hierarchy"]


def test_the_walk_finds_every_stage():
    found = set(modules())
    assert {"hierarchy.spec.model", "hierarchy.graph", "hierarchy.loop.gains", "hierarchy.design.search",
            "hierarchy.studies.sweep", "hierarchy.report.drawing", "hierarchy.cli"} <= found


@pytest.mark.parametrize("name", modules())
def test_every_module_lists_its_exports_and_they_exist(name):
    module = importlib.import_module(name)
    assert hasattr(module, "__all__"), f"{name} has no __all__"
    exported = list(module.__all__)
    assert len(exported) == len(set(exported)), f"{name}.__all__ names something twice"
    assert all(isinstance(n, str) for n in exported)
    missing = [n for n in exported if not hasattr(module, n)]
    assert not missing, f"{name}.__all__ names what it does not have: {missing}"


def test_star_import_of_the_package_gives_its_api():
    space: dict = {}
    exec("from hierarchy import *", space)
    assert {"load", "design", "evaluate", "Circuit", "Gains"} <= set(space)


def test_the_type_marker_is_shipped():
    assert (ROOT / "hierarchy" / "py.typed").is_file()
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover - Python 3.10
        tomllib = pytest.importorskip("tomli")
    data = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert "py.typed" in data["tool"]["setuptools"]["package-data"]["hierarchy"]


def test_exported_names_stay_what_they_are_after_every_module_is_imported():
    # A function named like a module of its package (`studies.sweep` in
    # studies/sweep.py, `hierarchy.design` beside the design package) is
    # replaced by the module when that module is first imported after the
    # package; importing every module, as the doctest run does, must leave
    # every exported name as it was.
    import types

    for name in modules():
        importlib.import_module(name)
    for name in modules():
        module = importlib.import_module(name)
        turned = [n for n in getattr(module, "__all__", ()) if isinstance(getattr(module, n), types.ModuleType)]
        assert not turned, f"{name}: these exports are now modules: {turned}"
