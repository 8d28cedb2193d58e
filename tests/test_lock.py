"""One driver per store: concurrent runs, a SIGKILLed holder, a lock from another host."""

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
from conftest import tiny_config

from pipeline.errors import StoreError
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.lock import STALE_S, StoreLock, lock_path, read_lock
from pipeline.sweep.store import SampleStatus, SampleStore

ROOT = Path(__file__).resolve().parents[1]

HOLDER = """
import sys, time
sys.path.insert(0, {root!r})
from pipeline.sweep.lock import StoreLock
StoreLock.acquire({store!r}, heartbeat_s=0.2)
print("held", flush=True)
time.sleep(600)
"""


def _wait_for(predicate, timeout=60.0):
    t0 = time.monotonic()
    while not predicate():
        if time.monotonic() - t0 > timeout:
            raise AssertionError("timed out")
        time.sleep(0.05)


def _holder(store):
    proc = subprocess.Popen([sys.executable, "-c", HOLDER.format(root=str(ROOT), store=str(store))],
                            stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "held"
    return proc


def test_a_second_driver_is_refused_and_a_killed_holder_is_taken_over(tmp_path):
    cfg = parse_config(tiny_config(tmp_path / "run", 2))
    store = tmp_path / "run" / "samples.zarr"
    proc = _holder(store)
    try:
        with pytest.raises(StoreError) as err:
            run_sweep(cfg, client=None, store_path=store, progress=False)
        msg = str(err.value)
        assert f"process {proc.pid}" in msg and "in use by another helisweep run" in msg
        assert "since" in msg and "heartbeat" in msg
        assert not store.exists()  # refused before anything was written
        # the heartbeat moves while the holder lives
        first = read_lock(store)["heartbeat_unix"]
        _wait_for(lambda: read_lock(store)["heartbeat_unix"] > first, timeout=10)
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    said = []
    lock = StoreLock.acquire(store, say=said.append)
    assert len(said) == 1 and "no longer exists" in said[0] and str(proc.pid) in said[0]
    assert read_lock(store)["pid"] == os.getpid()
    lock.release()
    assert not lock_path(store).exists()


def _foreign_lock(store, age_s):
    now = time.time() - age_s
    lock_path(store).parent.mkdir(parents=True, exist_ok=True)
    lock_path(store).write_text(json.dumps({
        "host": "node-elsewhere-17", "pid": 12345, "user": "ana", "started": "earlier",
        "heartbeat": "earlier", "heartbeat_unix": now, "store": str(store)}))


def test_a_lock_from_another_host_is_respected_until_its_heartbeat_is_stale(tmp_path):
    store = tmp_path / "samples.zarr"
    _foreign_lock(store, age_s=10.0)
    with pytest.raises(StoreError, match="on host 'node-elsewhere-17'"):
        StoreLock.acquire(store)
    _foreign_lock(store, age_s=STALE_S + 60)
    said = []
    lock = StoreLock.acquire(store, say=said.append)
    assert "node-elsewhere-17" in said[0] and "s old" in said[0]
    lock.release()


def test_status_and_reading_are_never_blocked_by_the_lock(tmp_path):
    cfg = parse_config(tiny_config(tmp_path / "run", 2))
    store_path = tmp_path / "run" / "samples.zarr"
    SampleStore.open_for_run(store_path, cfg, ("L", "R"), provenance={}).release_lock()
    _foreign_lock(store_path, age_s=1.0)
    assert "samples" in SampleStore.open(store_path).report()
    res = subprocess.run([sys.executable, "-m", "pipeline.cli", "status", str(store_path)],
                         capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "being computed by process 12345 of ana on host 'node-elsewhere-17'" in res.stdout


def test_two_concurrent_runs_compute_each_sample_once(tmp_path):
    cfg_path = tmp_path / "tiny.toml"
    cfg_path.write_text(tiny_config(tmp_path / "run", 32))
    store = tmp_path / "run" / "samples.zarr"
    first = subprocess.Popen([sys.executable, "-m", "pipeline.cli", "run", str(cfg_path),
                              "--workers", "1", "--quiet"], cwd=ROOT,
                             stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(lambda: lock_path(store).exists() or first.poll() is not None, timeout=120)
        assert first.poll() is None, first.communicate()
        second = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", str(cfg_path),
                                 "--workers", "1", "--quiet"], cwd=ROOT, capture_output=True,
                                text=True, timeout=300)
        # refused before its cluster starts (the lock is checked first), while the first
        # run is still computing
        assert first.poll() is None
        assert second.returncode != 0
        assert "helisweep: error:" in second.stderr and "in use by" in second.stderr
    finally:
        out, err = first.communicate(timeout=600)
    assert first.returncode == 0, err
    assert not lock_path(store).exists()
    st = SampleStore.open(store)
    assert (st.status() == SampleStatus.DONE).all()
    sessions = st.group.attrs["sessions"]
    # every sample computed by one session; a later session (if the second run came after the
    # first had finished) found nothing left to do
    assert sessions[0]["tasks"] > 0
    assert all(s.get("tasks", 0) == 0 for s in sessions[1:])
