"""The Python interface: the package root exports it lazily, and the session of
docs/python-api.md runs exactly as written."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import pipeline
import pipeline.api as api
from pipeline.errors import ConfigError, HelisweepError, StoreError

ROOT = Path(__file__).resolve().parents[1]
DOC = ROOT / "docs" / "python-api.md"


def _python_blocks(text: str) -> list[str]:
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)


def test_root_exports_the_api_names_and_nothing_else():
    assert set(pipeline.__all__) == {"__version__", *api.__all__}
    for name in api.__all__:
        assert getattr(pipeline, name) is getattr(api, name), name
    assert set(pipeline.__all__) <= set(dir(pipeline))
    with pytest.raises(AttributeError, match="has no attribute 'no_such_name'.*load_config"):
        pipeline.no_such_name  # noqa: B018


def test_importing_the_package_loads_no_stage():
    code = ("import sys, pipeline\n"
            "heavy = [m for m in ('pipeline.api', 'pipeline.sweep', 'xarray', 'dask', 'kwant', "
            "'zarr', 'matplotlib') if m in sys.modules]\n"
            "assert not heavy, heavy\n"
            "pipeline.load_config\n"
            "assert 'pipeline.api' in sys.modules\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stderr


def test_every_documented_name_is_exported():
    text = DOC.read_text()
    table = re.findall(r"^\| `(\w+)", text, flags=re.M)
    assert table and set(table) == set(api.__all__)
    for block in _python_blocks(text):
        for name in re.findall(r"\bhs\.(\w+)", block):
            assert name in pipeline.__all__, name


def test_bad_arguments_are_refused_before_any_compute(tmp_path):
    with pytest.raises(ConfigError, match="Pass one of the two"):
        api.run(ROOT / "configs" / "api-quickstart.toml", client=object(), workers=2)
    with pytest.raises(ConfigError, match="neither a SweepConfig nor the path"):
        api.run(42)
    with pytest.raises(StoreError, match=r"neither a config file \(\.toml\), a run directory"):
        api.open_samples(tmp_path)
    with pytest.raises(HelisweepError, match="does not exist"):
        api.summarize(tmp_path / "missing.toml")


@pytest.mark.slow
def test_the_documented_session_runs_as_written(tmp_path):
    """Every python block of docs/python-api.md, in order, in a fresh interpreter whose working
    directory holds only the config the session reads (``python -c``: as in a notebook, the
    main module is not a file the Dask workers would import again)."""
    code = "\n".join(_python_blocks(DOC.read_text()))
    assert "hs.run(" in code and "savefig(" in code
    (tmp_path / "configs").mkdir()
    shutil.copy(ROOT / "configs" / "api-quickstart.toml", tmp_path / "configs")
    env = {**os.environ, "MPLBACKEND": "Agg"}
    out = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=900)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-3000:]
    plot = tmp_path / "conductance-vs-length.png"
    assert plot.is_file() and plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert (tmp_path / "runs" / "api-quickstart" / "summary.nc").is_file()
    assert "'done': 96, 'failed': 0, 'missing': 0" in out.stdout
    assert "problems: []" in out.stdout
    # the session's store is the same as the command's: helisweep status reads it
    status = subprocess.run([sys.executable, "-m", "pipeline.cli", "status",
                             "configs/api-quickstart.toml"], cwd=tmp_path, capture_output=True,
                            text=True, timeout=300)
    assert status.returncode == 0 and "96 done" in status.stdout, status.stderr
