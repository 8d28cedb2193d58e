"""Safe by construction: configs and stores never execute code."""

import ast
from pathlib import Path

import pytest
import zarr

from pipeline.config import parse_config
from pipeline.errors import HelisweepError

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


@pytest.mark.parametrize("path", sorted(PACKAGE.glob("*.py")), ids=lambda p: p.name)
def test_no_code_execution_or_pickle_in_the_package(path):
    bad = [(kind, name, line) for kind, name, line in _calls_and_imports(path)
           if (kind == "call" and (name in FORBIDDEN_CALLS or "." in name or "shell" in name))
           or (kind == "import" and name in FORBIDDEN_MODULES)]
    assert not bad, f"{path.name}: {bad}"


def test_store_codecs_are_plain_data(tmp_path, tiny_config_text, dask_clients):
    from pipeline.engine import run_sweep

    store = run_sweep(parse_config(tiny_config_text(realisations=1)), client=dask_clients[1],
                      store_path=tmp_path / "s.zarr", progress=False)
    group = zarr.open_group(str(store.path), mode="r")
    allowed = {"BytesCodec", "ZstdCodec", "Crc32cCodec", "VLenUTF8Codec"}
    for name, arr in group.arrays():
        codecs = {type(c).__name__ for c in arr.metadata.codecs}
        assert codecs <= allowed, (name, codecs)
        assert arr.dtype.kind in "fiub" or str(arr.dtype).startswith(("StringDType", "<U", "|O", "str")) \
            or "string" in str(arr.dtype).lower(), (name, arr.dtype)
    # and no file in the store is a pickle (protocol 2+ starts with 0x80)
    for f in Path(store.path).rglob("*"):
        if f.is_file():
            assert not f.read_bytes()[:1] == b"\x80", f


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
