"""Every imported third-party package is declared, and the pins are honest.

* Each import in ``pipeline/``, ``scripts/`` and ``benchmarks/`` (the package and the scripts
  CI runs; imports inside functions count too) belongs to a distribution named in
  ``pyproject.toml``'s ``dependencies``; each import in ``tests/`` to one named there or in
  the ``test`` extra. Import names are mapped to distributions with
  ``importlib.metadata.packages_distributions()`` of this environment.
* ``pyproject.toml`` holds ranges only; ``requirements/constraints.txt`` holds exact pins
  only, one for every declared distribution; pip is pinned at 23.3 or later (CVE-2023-5752).
"""

import ast
import importlib.metadata as md
import re
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
CONSTRAINTS = (ROOT / "requirements" / "constraints.txt").read_text()


def _name(requirement: str) -> str:
    """Normalised distribution name of a requirement string (PEP 503)."""
    return re.sub(r"[-_.]+", "-", re.match(r"[A-Za-z0-9._-]+", requirement).group(0)).lower()


def _imports(folder: Path) -> dict[str, list[str]]:
    """Top-level module names imported by the files under ``folder`` -> files importing them."""
    out: dict[str, list[str]] = {}
    local = ({folder.name} | {p.stem for p in folder.rglob("*.py")}
             | {p.name for p in folder.rglob("*") if p.is_dir()})
    for path in sorted(folder.rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(), filename=str(path))):
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                names = [node.module]
            else:
                continue
            for name in names:
                top = name.split(".")[0]
                if top in sys.stdlib_module_names or top == "pipeline" or top in local:
                    continue
                out.setdefault(top, []).append(str(path.relative_to(ROOT)))
    return out


def _undeclared(folders, declared: set[str]) -> list[str]:
    owners = md.packages_distributions()
    problems = []
    for folder in folders:
        for module, files in sorted(_imports(ROOT / folder).items()):
            dists = {_name(d) for d in owners.get(module, [])}
            if not dists:
                problems.append(f"{module} (imported by {files[0]}) belongs to no installed "
                                f"distribution")
            elif not dists & declared:
                problems.append(f"{module} (imported by {files[0]}) comes from "
                                f"{' or '.join(sorted(dists))}, which is not declared")
    return problems


def test_the_import_walk_sees_known_imports():
    # the walk itself: these imports exist (inside functions for pandas, in benchmarks for psutil)
    found = _imports(ROOT / "pipeline")
    assert {"numpy", "kwant", "pandas", "threadpoolctl"} <= set(found)
    assert "psutil" in _imports(ROOT / "benchmarks")


def test_every_imported_package_is_declared():
    declared = {_name(r) for r in PROJECT["dependencies"]}
    assert not _undeclared(("pipeline", "scripts", "benchmarks"), declared)


def test_every_package_the_tests_import_is_declared():
    declared = {_name(r) for r in PROJECT["dependencies"]}
    declared |= {_name(r) for r in PROJECT["optional-dependencies"]["test"]}
    assert not _undeclared(("tests",), declared)


def test_pyproject_has_ranges_and_constraints_exact_pins():
    requirements = PROJECT["dependencies"] + PROJECT["optional-dependencies"]["test"]
    exact = [r for r in requirements if "==" in r or "===" in r]
    assert not exact, f"exact versions belong in requirements/constraints.txt: {exact}"
    pins = {}
    for line in CONSTRAINTS.splitlines():
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        m = re.fullmatch(r"([A-Za-z0-9._-]+)==([0-9][0-9A-Za-z.+-]*)", line)
        assert m, f"constraints.txt: {line!r} is not an exact pin NAME==VERSION"
        pins[_name(m.group(1))] = m.group(2)
    missing = sorted({_name(r) for r in requirements} - set(pins))
    assert not missing, f"declared but not pinned in constraints.txt: {missing}"
    # the pins satisfy the declared ranges (the lower bounds, compared numerically)
    for req in requirements:
        for op, bound in re.findall(r"(>=|<)\s*([0-9][0-9.]*)", req):
            have = tuple(int(x) for x in re.findall(r"\d+", pins[_name(req)])[:3])
            want = tuple(int(x) for x in bound.split("."))
            assert (have >= want) if op == ">=" else (have < want), (req, pins[_name(req)])


@pytest.mark.parametrize("name", ["pip", "kwant"])
def test_build_pins(name):
    pins = dict(re.findall(r"^([a-z0-9-]+)==(\S+)", CONSTRAINTS, flags=re.M))
    assert name in pins
    if name == "pip":
        # Source: CVE-2023-5752 (pip: Mercurial configuration injectable through a VCS URL),
        # fixed in pip 23.3 according to its advisory (from memory)
        assert tuple(int(x) for x in pins["pip"].split(".")[:2]) >= (23, 3)
    else:
        assert any(_name(r) == "kwant" and ">=" in r for r in PROJECT["dependencies"])
