"""A sweep killed with SIGKILL mid-run resumes to exactly the uninterrupted result."""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
import xarray as xr
import zarr

from pipeline.config import parse_config
from pipeline.engine import run_sweep


def _status_done(path) -> int:
    try:
        return int((zarr.open_group(str(path), mode="r")["status"][...] == 1).sum())
    except Exception:  # store not created yet
        return 0


@pytest.mark.slow
def test_sigkill_then_resume_equals_uninterrupted(tmp_path, tiny_config_text, dask_clients):
    text = tiny_config_text(realisations=24, directory=str(tmp_path / "run"))
    config = tmp_path / "tiny.toml"
    config.write_text(text)
    store = tmp_path / "run" / "samples.zarr"
    cmd = [sys.executable, "-m", "pipeline.cli", "run", str(config), "--workers", "1", "--quiet"]
    proc = subprocess.Popen(cmd, start_new_session=True, stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL)
    try:
        deadline = time.monotonic() + 120
        while _status_done(store) < 6 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert proc.poll() is None, "the run finished before it could be killed; make it longer"
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # the driver and its worker processes
        proc.wait()
    done_at_kill = _status_done(store)
    assert 0 < done_at_kill < 24 * 2 * 3
    # rerun the same command: it resumes and computes only what is missing
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    ref = run_sweep(parse_config(text), client=dask_clients[2], store_path=tmp_path / "ref.zarr",
                    progress=False)
    a = xr.open_zarr(str(store), consolidated=False)
    b = xr.open_zarr(str(ref.path), consolidated=False)
    for name in ("transmission", "modes", "measurements", "status"):
        np.testing.assert_array_equal(a[name].values, b[name].values, err_msg=name)
    sessions = a.attrs["sessions"]
    assert len(sessions) == 2 and "finished" not in sessions[0] and "finished" in sessions[1]
    assert sessions[1]["tasks"] < 24 * 2  # the resumed run did not redo finished tasks
