"""A sweep killed with SIGKILL mid-run resumes to exactly the uninterrupted result."""

import os
import signal
import subprocess
import sys
import time

import pytest
from conftest import assert_same_samples, done_samples, store_arrays

from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.store import SampleStore


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
        while done_samples(store) < 6 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.05)
        assert proc.poll() is None, "the run finished before it could be killed; make it longer"
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # the driver and its worker processes
        proc.wait()
    done_at_kill = done_samples(store)
    assert 0 < done_at_kill < 24 * 2 * 3  # realisations x lengths x energies
    # the tasks (blocks of realisations at one length) that the kill left unfinished
    missing_at_kill = SampleStore.open(store).pending_blocks()
    assert missing_at_kill
    # rerun the same command: it resumes and computes only what is missing
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    ref = run_sweep(parse_config(text), client=dask_clients[2], store_path=tmp_path / "ref.zarr",
                    progress=False)
    assert_same_samples(store_arrays(store), store_arrays(ref.path))
    sessions = SampleStore.open(store).group.attrs["sessions"]
    assert len(sessions) == 2 and "finished" not in sessions[0] and "finished" in sessions[1]
    # the resumed run computed exactly the unfinished tasks: none that was finished is redone
    assert sessions[1]["tasks"] == len(missing_at_kill)
