"""The package's shape is checked, not hoped for.

* the layers contract in ``pyproject.toml`` (``[tool.importlinter]``): a stage imports only the
  stages below it (``lint-imports``);
* no import cycle between any two modules, counting imports inside functions too;
* no private name (``_x``) imported from another subpackage;
* imports inside functions only for a heavy dependency named in :data:`HEAVY`, with a comment
  on the line saying so;
* ``ruff check`` is clean (rules in ``pyproject.toml``).
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "pipeline"
BIN = Path(sys.executable).parent

#: third-party packages that may be imported inside a function, and why: each costs a
#: noticeable start-up time or memory and is needed only on some paths
HEAVY = {
    "kwant": "builds systems; not needed to read stores or write reports",
    "matplotlib": "drawing only",
    "dask": "only where a cluster is used",
    "distributed": "only where a cluster is used",
    "dask_jobqueue": "only on Slurm",
    "xarray": "only where datasets are built or read",
    "zarr": "only where stores are opened",
    "pandas": "only for an optional table export",
    "psutil": "only for memory readings",
    "h5py": "only to check the NetCDF writer is available",
    "gdstk": "only when a GDSII file is read",
}


def _modules() -> dict[str, tuple[Path, ast.Module]]:
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(ROOT).with_suffix("")
        parts = rel.parts[:-1] if rel.name == "__init__" else rel.parts
        out[".".join(parts)] = (path, ast.parse(path.read_text(), filename=str(path)))
    return out


def _resolve(module: str, node: ast.ImportFrom, is_package: bool) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".")
    base = base if is_package else base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(modules):
    """(importer, imported module, names, node, inside a function) for every import."""
    for name, (path, tree) in modules.items():
        is_package = path.name == "__init__.py"
        parents = {}
        for node in ast.walk(tree):
            for child in ast.iter_child_nodes(node):
                parents[child] = node
        for node in ast.walk(tree):
            if not isinstance(node, (ast.Import, ast.ImportFrom)):
                continue
            inside, p = False, parents.get(node)
            while p is not None:
                if isinstance(p, (ast.FunctionDef, ast.AsyncFunctionDef)):
                    inside = True
                p = parents.get(p)
            if isinstance(node, ast.Import):
                for a in node.names:
                    yield name, a.name, [], node, inside, path
            else:
                target = _resolve(name, node, is_package)
                names = [a.name for a in node.names]
                if target == "pipeline" or any(f"{target}.{n}" in modules for n in names):
                    for n in names:  # "from pipeline.x import module"
                        full = f"{target}.{n}"
                        yield (name, full, [], node, inside, path) if full in modules else \
                            (name, target, [n], node, inside, path)
                else:
                    yield name, target, names, node, inside, path


@pytest.fixture(scope="module")
def modules():
    return _modules()


def _subpackage(module: str) -> str:
    parts = module.split(".")
    return ".".join(parts[:2])


def test_layers_contract_is_kept():
    out = subprocess.run([str(BIN / "lint-imports")], cwd=ROOT, capture_output=True, text=True)
    assert out.returncode == 0 and "0 broken" in out.stdout, out.stdout[-3000:] + out.stderr


def test_no_import_cycles(modules):
    graph = {m: set() for m in modules}
    for importer, target, _, _, _, _ in _imports(modules):
        while target and target not in modules:
            target = target.rpartition(".")[0]
        if target and target != importer and not importer.startswith(target + ".") \
                and target != "pipeline":
            graph[importer].add(target)
    # Tarjan's strongly connected components
    index, low, stack, on, cycles, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    sys.setrecursionlimit(10000)
    for v in graph:
        if v not in index:
            visit(v)
    assert not cycles, f"import cycles: {cycles}"


def test_no_private_names_across_subpackages(modules):
    bad = []
    for importer, target, names, node, _, path in _imports(modules):
        if not target.startswith("pipeline.") or _subpackage(importer) == _subpackage(target):
            continue
        bad += [f"{path.relative_to(ROOT)}:{node.lineno}: {n} from {target}"
                for n in names if n.startswith("_") and not n.startswith("__")]
        if target.rpartition(".")[2].startswith("_"):
            bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: module {target}")
    assert not bad, "private names imported across subpackages:\n" + "\n".join(bad)


def test_imports_inside_functions_only_for_heavy_dependencies(modules):
    bad = []
    for _, target, _, node, inside, path in _imports(modules):
        if not inside:
            continue
        top = target.split(".")[0]
        line = path.read_text().splitlines()[node.lineno - 1]
        if top not in HEAVY:
            bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: {target} (import it at the top)")
        elif "#" not in line:
            bad.append(f"{path.relative_to(ROOT)}:{node.lineno}: {target} needs a comment "
                       f"saying why it is imported here ({HEAVY[top]})")
    assert not bad, "imports inside functions:\n" + "\n".join(bad)


def test_ruff_is_clean():
    out = subprocess.run([str(BIN / "ruff"), "check", "--no-cache", "."], cwd=ROOT,
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr
