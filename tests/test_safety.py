"""Safe by construction: configs and stores never execute code."""

import ast
import json
from pathlib import Path

import pytest
import xarray as xr
from conftest import tiny_config

from pipeline.errors import HelisweepError
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.store import SampleStore

PACKAGE = Path(__file__).resolve().parents[1] / "pipeline"
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__"}
FORBIDDEN_MODULES = {"pickle", "cPickle", "dill", "cloudpickle", "marshal", "shelve"}


def _calls_and_imports(path: Path):
    tree = ast.parse(path.read_text(), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            yield "call", node.func.id, node.lineno
        elif isinstance(node, ast.Import):
            for alias in node.names:
                yield "import", alias.name.split(".")[0], node.lineno
        elif isinstance(node, ast.ImportFrom) and node.module:
            yield "import", node.module.split(".")[0], node.lineno
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
            if node.func.attr in ("load", "loads") and isinstance(node.func.value, ast.Name) \
                    and node.func.value.id in ("yaml", "pickle"):
                yield "call", f"{node.func.value.id}.{node.func.attr}", node.lineno
            for kw in node.keywords:
                if kw.arg == "shell" and isinstance(kw.value, ast.Constant) and kw.value.value:
                    yield "call", "subprocess(shell=True)", node.lineno


#: every module of the package, subpackages included
MODULES = sorted(PACKAGE.rglob("*.py"))
#: Zarr v3 data types and codecs of plain numbers and strings (no object, no pickle)
PLAIN_DATA_TYPES = {"bool", "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32",
                    "uint64", "float32", "float64", "string"}
PLAIN_CODECS = {"bytes", "zstd", "crc32c", "vlen-utf8"}
#: the store's string coordinates (contact names and measurement labels)
STRING_COORDS = {"lead", "lead_to", "lead_from", "measurement"}


def test_every_module_of_the_package_is_checked():
    assert len(MODULES) > 20 and any(p.parent != PACKAGE for p in MODULES)


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE)))
def test_no_code_execution_or_pickle_in_the_package(path):
    bad = [(kind, name, line) for kind, name, line in _calls_and_imports(path)
           if (kind == "call" and (name in FORBIDDEN_CALLS or "." in name or "shell" in name))
           or (kind == "import" and name in FORBIDDEN_MODULES)]
    assert not bad, f"{path.relative_to(PACKAGE)}: {bad}"


@pytest.fixture(scope="module")
def tiny_store(tmp_path_factory, dask_clients) -> Path:
    """A finished store of the tiny sweep (one realisation)."""
    d = tmp_path_factory.mktemp("safety")
    store = run_sweep(parse_config(tiny_config(d / "run", realisations=1)),
                      client=dask_clients[1], store_path=d / "s.zarr", progress=False)
    return Path(store.path)


def test_store_metadata_declares_only_plain_data(tiny_store):
    root = tiny_store
    # Zarr v3 only: version 2 metadata (.zarray) could name a pickle or object codec
    assert not [f for f in root.rglob(".z*")], "the store has Zarr v2 metadata"
    arrays = {}
    for meta_file in root.rglob("zarr.json"):
        meta = json.loads(meta_file.read_text())
        assert meta["zarr_format"] == 3, meta_file
        if meta["node_type"] == "array":
            arrays[meta_file.parent.relative_to(root).as_posix()] = meta
    assert {"transmission", "modes", "measurements", "status"} | STRING_COORDS <= set(arrays)
    for name, meta in arrays.items():
        assert meta["data_type"] in PLAIN_DATA_TYPES, (name, meta["data_type"])
        codecs = [c["name"] for c in meta["codecs"]]
        assert set(codecs) <= PLAIN_CODECS, (name, codecs)
        assert not any("pickle" in c or "object" in c for c in codecs), (name, codecs)
    assert {name for name, meta in arrays.items() if meta["data_type"] == "string"} == STRING_COORDS


def test_store_strings_decode_as_plain_str(tiny_store):
    group = SampleStore.open(tiny_store).group
    ds = xr.open_zarr(str(tiny_store), consolidated=False)
    for name in sorted(STRING_COORDS):
        for values in (group[name][...], ds[name].values):
            assert values.dtype.kind != "O", (name, values.dtype)
            assert values.size and all(type(v) is str for v in values.tolist()), (name, values)
    assert ds["lead"].values.tolist() == ["L", "R"]
    assert ds["measurement"].values.tolist() == ["G(L,R)", "R(L,R;L,R)"]


def test_config_strings_are_data_not_code(tmp_path, tiny_config_text):
    marker = tmp_path / "pwned"
    payload = f"__import__('os').system('touch {marker}')"
    text = tiny_config_text(**{'template = "strip"': f'template = "{payload}"'})
    with pytest.raises(HelisweepError, match="not a template"):
        parse_config(text)
    text = tiny_config_text(**{'name = "tiny"': f'name = "{payload}"'})
    with pytest.raises(HelisweepError, match="run.name"):
        parse_config(text)
    assert not marker.exists()
