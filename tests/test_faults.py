"""Faults: failed solves, dead workers, full disks, damaged chunks, repeated kills."""

import errno
import os
import random
import signal
import subprocess
import sys
import threading
import time

import numpy as np
import pytest
from conftest import assert_same_samples, done_samples, store_arrays, tiny_config

import pipeline.sweep.tasks as tasks
from pipeline.analysis.summary import AggregateError, summarize
from pipeline.errors import StoreError
from pipeline.sweep import clusters, driver
from pipeline.sweep.config import parse_config
from pipeline.sweep.store import SampleStatus, SampleStore


@pytest.fixture(scope="module")
def reference(tmp_path_factory, dask_clients):
    """The uninterrupted run every faulty run must end up equal to."""
    d = tmp_path_factory.mktemp("ref")
    text = tiny_config(d, realisations=6)
    store = driver.run_sweep(parse_config(text), client=dask_clients[2], store_path=d / "ref.zarr",
                             progress=False)
    return text, store_arrays(store.path)


def test_failed_solve_is_recorded_and_the_sweep_goes_on(tmp_path, reference, monkeypatch):
    from dask.distributed import Client

    text, _ = reference
    cfg = parse_config(text)
    original = tasks.transmission_matrix

    def flaky(dsys, energy, params, **kw):
        if energy == 1.0:
            raise RuntimeError("injected solver failure")
        return original(dsys, energy, params, **kw)

    # the solver as the sweep's tasks call it (in-process workers see the patch)
    monkeypatch.setattr(tasks, "transmission_matrix", flaky)
    with Client(processes=False, n_workers=1, threads_per_worker=1, dashboard_address=":0") as client:
        store = driver.run_sweep(cfg, client=client, store_path=tmp_path / "s.zarr", progress=False)
    st = store.status()
    assert np.all(st[..., 1] == SampleStatus.FAILED) and np.all(st[..., [0, 2]] == SampleStatus.DONE)
    failures = store.group.attrs["failures"]
    assert len(failures) == st[..., 1].size
    assert all("injected solver failure" in f["reason"] for f in failures)
    report = store.report()
    assert f"failed samples: {len(failures)} in 1 group(s) by reason" in report
    assert f"{len(failures)} x " in report and "--retry-failed" in report
    # a plain resume leaves failed samples alone; --retry-failed computes them again
    monkeypatch.setattr(tasks, "transmission_matrix", original)
    with Client(processes=False, n_workers=1, threads_per_worker=1, dashboard_address=":0") as client:
        again = driver.run_sweep(cfg, client=client, store_path=tmp_path / "s.zarr",
                                 progress=False)
        assert np.all(again.status()[..., 1] == SampleStatus.FAILED)
        retried = driver.run_sweep(cfg, client=client, store_path=tmp_path / "s.zarr",
                                   progress=False, retry_failed=True)
    assert np.all(retried.status() == SampleStatus.DONE)
    _, ref = reference
    assert_same_samples(store_arrays(retried.path), ref)  # the same numbers as a clean run
    history = retried.group.attrs["failures"]
    assert len(history) == len(failures) and all("retried" in f for f in history)
    assert f"{len(failures)} earlier failure(s) were retried" in retried.report()


def test_full_disk_stops_cleanly_and_resume_completes(tmp_path, reference, dask_clients, monkeypatch):
    text, ref = reference
    cfg = parse_config(text)
    path = tmp_path / "s.zarr"
    calls = {"n": 0}
    original = SampleStore.write_block

    def failing(self, key, realisations, results):
        calls["n"] += 1
        if calls["n"] == 4:
            raise OSError(errno.ENOSPC, "No space left on device")
        return original(self, key, realisations, results)

    monkeypatch.setattr(SampleStore, "write_block", failing)
    with pytest.raises(StoreError, match="No space left on device") as err:
        driver.run_sweep(cfg, client=dask_clients[2], store_path=path, progress=False)
    assert str(path) in str(err.value)
    monkeypatch.setattr(SampleStore, "write_block", original)
    store = SampleStore.open(path)  # still readable
    per_task = store.block * 3  # realisations per task x energies
    assert store.counts()["done"] == 3 * per_task  # the three tasks written before
    driver.run_sweep(cfg, client=dask_clients[2], store_path=path, progress=False)
    assert_same_samples(store_arrays(path), ref)


def test_damaged_chunk_is_detected_never_averaged_and_recomputed(tmp_path, reference, dask_clients):
    text, ref = reference
    cfg = parse_config(text)
    path = tmp_path / "s.zarr"
    store = driver.run_sweep(cfg, client=dask_clients[2], store_path=path, progress=False)
    b = store.block
    r0 = (4 // b) * b  # the block holding realisation 4
    chunk = path / "transmission" / "c" / str(4 // b) / "1" / "0" / "0" / "0" / "0" / "0" / "0"
    assert chunk.is_file()
    data = bytearray(chunk.read_bytes())
    data[len(data) // 2] ^= 0xFF  # one flipped byte
    chunk.write_bytes(bytes(data))
    assert SampleStore.open(path).verify()[0][:2] == ("transmission", (r0, 1, 0))
    with pytest.raises(AggregateError, match=rf"damaged chunk.*transmission task \({r0}, 1, 0\)"):
        summarize(path)
    store = driver.run_sweep(cfg, client=dask_clients[2], store_path=path, progress=False)
    assert store.group.attrs["repairs"][0]["task"] == [r0, 1, 0]
    assert store.group.attrs["sessions"][-1]["tasks"] == 1  # only the damaged task redone
    assert_same_samples(store_arrays(path), ref)


@pytest.mark.slow
def test_worker_killed_mid_run_store_ends_complete_and_identical(tmp_path, reference):
    text, ref = reference
    cfg = parse_config(text)
    client = clusters.local_client(2)
    try:
        pids = list(client.run(os.getpid).values())
        path = tmp_path / "s.zarr"
        outcome = {}

        def run():
            try:
                outcome["store"] = driver.run_sweep(cfg, client=client, store_path=path,
                                                    progress=False, max_in_flight=2)
            except Exception as exc:  # reported below
                outcome["error"] = exc

        thread = threading.Thread(target=run)
        thread.start()
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if done_samples(path) >= 3:
                break
            time.sleep(0.02)
        os.kill(pids[0], signal.SIGKILL)  # the nanny restarts it; Dask reschedules its tasks
        thread.join(timeout=180)
        assert "error" not in outcome, outcome.get("error")
        assert_same_samples(store_arrays(path), ref)
    finally:
        cluster = client.cluster
        client.close()
        cluster.close()


@pytest.mark.slow
def test_repeated_sigkill_at_random_points_then_resume(tmp_path, reference):
    text, ref = reference
    config = tmp_path / "tiny.toml"
    config.write_text(text)
    path = tmp_path / "s.zarr"
    cmd = [sys.executable, "-m", "pipeline.cli", "run", str(config), "--workers", "1", "--quiet",
           "--store", str(path)]
    rng = random.Random(2026)
    total = 6 * 2 * 3
    kills = 0
    for _ in range(3):
        proc = subprocess.Popen(cmd, start_new_session=True, stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        try:
            before = done_samples(path)
            target = min(total - 1, before + rng.randint(1, 3) * 3)
            deadline = time.monotonic() + 60
            while done_samples(path) < target and proc.poll() is None and time.monotonic() < deadline:
                time.sleep(0.01)
            time.sleep(rng.uniform(0, 0.3))  # kill at a random moment, maybe mid-write
        finally:
            if proc.poll() is None:
                kills += 1
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
    assert kills >= 2, "the runs finished before they could be killed"
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert_same_samples(store_arrays(path), ref)
    assert not SampleStore.open(path).verify()
