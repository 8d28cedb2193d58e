"""Sweeps through a real Slurm: dask-jobqueue, batch mode, and a cancelled job resubmitted.

Needs a Slurm whose ``sinfo`` answers (``.ci/run`` starts a single-node one on loopback with
``scripts/slurm_local.sh``); skipped with the reason otherwise. Every run is compared with a
local run of the same configuration array by array, exactly: the numbers do not depend on
where or in which order tasks ran.
"""

import os
import re
import shutil
import subprocess
import time
import warnings

import numpy as np
import pytest
from conftest import assert_same_samples, done_samples, store_arrays

from pipeline.sweep.clusters import (
    SharedPathWarning,
    render_batch_script,
    resolve_cluster_settings,
    submit_batch_script,
)
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_on_cluster, run_sweep
from pipeline.sweep.store import SampleStatus, SampleStore

#: longer devices, so that with 24 realisations a cancellation lands mid-run (several seconds
#: of work on 2 workers after the first task is stored). Not longer: at 800 nm repeated solves
#: of the same sample already differ in the last digits (~1e-13), and the comparison is exact.
_LONG = {"values = [60.0, 120.0]": "values = [400.0, 600.0]"}
_LONG_REALISATIONS = 24


def _slurm_unavailable() -> str | None:
    """Why the Slurm tests cannot run here, or None when sinfo shows a usable node."""
    if shutil.which("sinfo") is None:
        return "no Slurm here: sinfo not found (.ci/run starts one with scripts/slurm_local.sh)"
    # Without a configuration file sinfo would look for one through DNS (configless Slurm).
    conf = os.environ.get("SLURM_CONF") or "/etc/slurm/slurm.conf"
    if not os.path.isfile(conf):
        return (f"no Slurm configuration ({conf} missing); start one with "
                f"`eval \"$(scripts/slurm_local.sh start)\"`")
    try:
        out = subprocess.run(["sinfo", "-h", "-o", "%T"], capture_output=True, text=True,
                             timeout=20)
    except (OSError, subprocess.SubprocessError) as exc:
        return f"sinfo did not answer: {exc}"
    if out.returncode != 0:
        return f"sinfo failed: {out.stderr.strip()[:200]}"
    states = out.stdout.split()
    if not any(s.rstrip("*~#") in ("idle", "mixed", "allocated") for s in states):
        return f"no usable Slurm node (states {states})"
    return None


_REASON = _slurm_unavailable()
pytestmark = [
    pytest.mark.slurm,
    pytest.mark.skipif(_REASON is not None, reason=_REASON or ""),
    # tmp_path is under /tmp: fine on one node, warned about on a real cluster
    pytest.mark.filterwarnings("ignore::pipeline.sweep.clusters.SharedPathWarning"),
]


def _overrides(tmp_path, **more):
    return {"kind": "slurm", "interface": "lo", "cores": 1, "memory": "1GB",
            "walltime": "00:10:00", "shared_directory": str(tmp_path / "shared"),
            "worker_timeout": 120, **more}


def _assert_same(path, reference):
    """The store at ``path`` is complete and bitwise equal to the local reference."""
    got = store_arrays(path)
    assert_same_samples(got, reference)
    assert np.all(got["status"] == SampleStatus.DONE)


def _local_reference(cfg, client, path):
    run_sweep(cfg, client=client, store_path=path, progress=False)
    return store_arrays(path)


@pytest.fixture
def jobs():
    """Job ids submitted by a test; any still queued are cancelled afterwards."""
    ids: list[str] = []
    yield ids
    if ids:
        subprocess.run(["scancel", *ids], capture_output=True, timeout=30)


def _in_queue(job_id: str) -> bool:
    out = subprocess.run(["squeue", "-h", "-j", job_id, "-o", "%T"], capture_output=True,
                         text=True, timeout=30)
    return bool(out.stdout.strip())


def _job_field(job_id: str, name: str) -> str:
    out = subprocess.run(["scontrol", "show", "job", job_id], capture_output=True, text=True,
                         timeout=30).stdout
    m = re.search(rf"\b{name}=(\S+)", out)
    return m.group(1) if m else "?"


def _wait_until_gone(job_id: str, shared, limit: float = 300) -> str:
    deadline = time.monotonic() + limit
    while _in_queue(job_id):
        if time.monotonic() > deadline:
            subprocess.run(["scancel", job_id], timeout=30)
            pytest.fail(f"job {job_id} still queued after {limit:g} s; log:\n"
                        f"{_log(shared, job_id)[-4000:]}")
        time.sleep(0.5)
    return _job_field(job_id, "JobState")


def _log(shared, job_id) -> str:
    path = shared / "logs" / f"helisweep-batch-{job_id}.out"
    return path.read_text() if path.exists() else f"(no log at {path})"


def _render(cfg_path, tmp_path, store, **more):
    settings = resolve_cluster_settings(None, _overrides(tmp_path, **more))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        return render_batch_script(cfg_path, settings, store_path=store,
                                   job_name="helisweep test batch"), settings


# =========================================================================== dask-jobqueue
def test_slurmcluster_with_two_one_core_jobs_equals_local(tmp_path, tiny_config_text, dask_clients):
    cfg = parse_config(tiny_config_text(realisations=3))
    reference = _local_reference(cfg, dask_clients[2], tmp_path / "local.zarr")
    store = run_on_cluster(cfg, _overrides(tmp_path, jobs=2), store_path=tmp_path / "slurm.zarr",
                           progress=False)
    _assert_same(store.path, reference)
    # both worker jobs ran (each writes its own log) and were cancelled at the end
    logs = sorted((tmp_path / "shared" / "logs").glob("helisweep-tiny-*.err"))
    assert len(logs) == 2, logs
    job_ids = [p.stem.rsplit("-", 1)[1] for p in logs]
    deadline = time.monotonic() + 60
    while any(_in_queue(j) for j in job_ids) and time.monotonic() < deadline:
        time.sleep(0.5)
    assert not any(_in_queue(j) for j in job_ids)


def test_adaptive_scaling_from_zero_jobs_equals_local(tmp_path, tiny_config_text, dask_clients):
    # adaptive_minimum = 0: no job (and no worker) exists until tasks are queued
    cfg = parse_config(tiny_config_text(realisations=2))
    reference = _local_reference(cfg, dask_clients[2], tmp_path / "local.zarr")
    store = run_on_cluster(cfg, _overrides(tmp_path, adaptive_minimum=0, adaptive_maximum=2),
                           store_path=tmp_path / "slurm.zarr", progress=False)
    _assert_same(store.path, reference)


def test_jobs_that_never_start_stop_the_run_with_slurms_reason(tmp_path, tiny_config_text):
    # Slurm accepts the worker jobs (sbatch --test-only passes) but holds them for an hour:
    # without a watchdog the driver would wait for ever
    from pipeline.sweep.clusters import ClusterError

    cfg = parse_config(tiny_config_text(realisations=2))
    t0 = time.monotonic()
    with pytest.raises(ClusterError, match=r"no Dask worker for \d+ s while tasks wait.*"
                                           r"worker_timeout = 15 s.*BeginTime.*--cluster local"):
        run_on_cluster(cfg, _overrides(tmp_path, adaptive_minimum=0, adaptive_maximum=1,
                                       worker_timeout=15,
                                       extra_directives=["--begin=now+3600"]),
                       store_path=tmp_path / "held.zarr", progress=False)
    assert time.monotonic() - t0 < 120
    # the held jobs were cancelled with the cluster; the store holds nothing and is unlocked
    out = subprocess.run(["squeue", "-h", "--me", "-n", "helisweep-tiny", "-o", "%i"],
                         capture_output=True, text=True, timeout=30)
    assert not out.stdout.strip(), out.stdout
    assert done_samples(tmp_path / "held.zarr") == 0
    assert not (tmp_path / "held.zarr.lock").exists()


# =========================================================================== batch mode
def test_batch_script_through_sbatch_equals_local(tmp_path, tiny_config_text, dask_clients, jobs):
    cfg_path = tmp_path / "tiny.toml"
    cfg_path.write_text(tiny_config_text(realisations=3))
    reference = _local_reference(parse_config(cfg_path.read_text()), dask_clients[2],
                                 tmp_path / "local.zarr")
    store = tmp_path / "batch store.zarr"
    text, settings = _render(cfg_path, tmp_path, store, jobs=2)
    job_id = submit_batch_script(text, settings.shared_directory)
    jobs.append(job_id)
    shared = tmp_path / "shared"
    state = _wait_until_gone(job_id, shared)
    assert state == "COMPLETED", _log(shared, job_id)[-4000:]
    name = subprocess.run(["squeue", "-h", "-j", job_id, "--states=all", "-o", "%j"],
                          capture_output=True, text=True, timeout=30).stdout.strip()
    assert name == "helisweep test batch"  # sbatch read the quoted name whole
    log = _log(shared, job_id)
    assert "worker(s) connected; running the sweep" in log
    # TLS with the job's own credentials, which are gone with the job; its log is owner-only
    assert re.search(r"Scheduler at:\s+tls://127\.0\.0\.1:", log), log[-3000:]
    assert not list(shared.glob("credentials-*")) and not list(shared.glob("scheduler-*"))
    log_path = shared / "logs" / f"helisweep-batch-{job_id}.out"
    assert oct(log_path.stat().st_mode & 0o777) == "0o600"
    _assert_same(store, reference)


def test_cancelled_batch_job_resubmitted_equals_uninterrupted(tmp_path, tiny_config_text,
                                                              dask_clients, jobs):
    cfg_path = tmp_path / "long.toml"
    cfg_path.write_text(tiny_config_text(realisations=_LONG_REALISATIONS, **_LONG))
    store = tmp_path / "store.zarr"
    shared = tmp_path / "shared"
    text, settings = _render(cfg_path, tmp_path, store, jobs=2)
    total = _LONG_REALISATIONS * 2 * 3

    first = submit_batch_script(text, settings.shared_directory)
    jobs.append(first)
    deadline = time.monotonic() + 300
    while done_samples(store) == 0:
        if not _in_queue(first) or time.monotonic() > deadline:
            pytest.fail(f"job {first} ended or stalled before any sample was done:\n"
                        f"{_log(shared, first)[-4000:]}")
        time.sleep(0.05)
    subprocess.run(["scancel", first], check=True, timeout=30)
    assert _wait_until_gone(first, shared) == "CANCELLED"
    partial = done_samples(store)
    assert 0 < partial < total, f"cancelled too late: {partial} of {total} samples done"
    # the tasks (blocks of realisations at one length) that the cancelled job left unfinished
    missing_at_cancel = SampleStore.open(store).pending_blocks()

    second = submit_batch_script(text, settings.shared_directory)  # the same script again
    jobs.append(second)
    assert _wait_until_gone(second, shared) == "COMPLETED", _log(shared, second)[-4000:]
    assert "helisweep:" in _log(shared, second)

    reference = _local_reference(parse_config(cfg_path.read_text()), dask_clients[2],
                                 tmp_path / "local.zarr")
    _assert_same(store, reference)
    sessions = SampleStore.open(store).group.attrs["sessions"]
    assert len(sessions) == 2 and "finished" not in sessions[0] and "finished" in sessions[1]
    # the resubmitted job computed exactly what was missing: no finished task is redone
    assert sessions[1]["tasks"] == len(missing_at_cancel)


def test_a_client_without_the_runs_credentials_is_refused(tmp_path):
    from dask.distributed import Client
    from distributed.security import Security

    from pipeline.sweep.clusters import make_client, resolve_cluster_settings

    settings = resolve_cluster_settings(None, _overrides(tmp_path, jobs=1))
    client, close = make_client(settings, n_workers_hint=1)
    try:
        address = client.scheduler.address
        assert address.startswith("tls://127.0.0.1:")
        # strangers: plain TCP, TLS without a certificate, TLS with credentials of their own
        for kwargs in ({"address": address.replace("tls://", "tcp://")},
                       {"address": address},
                       {"address": address, "security": Security.temporary()}):
            with pytest.raises(Exception):  # noqa: B017 - refused in whichever way the comm fails
                stranger = Client(timeout="5s", **kwargs)
                stranger.close()
        # the run's own client still gets its work done on a worker job
        assert client.submit(sum, [1, 2, 3], pure=False).result(timeout=180) == 6
        info = client.scheduler_info()
        assert info["workers"] and all(a.startswith("tls://") for a in info["workers"])
        assert "127.0.0.1" in client.dashboard_link  # the dashboard stays on this node
    finally:
        close()


#: the time-limit test's run is sized from a calibration sweep of this many realisations on
#: the local workers: about _EXPIRY_SECONDS of work for two workers, more than a job with Slurm's
#: shortest time limit (1 minute, of which the start-up takes a good part) can do, and few
#: enough for a handful of resubmissions. A fixed count stopped working when the solve became
#: faster (1000 realisations then fitted in one job).
_CALIBRATION_REALISATIONS = 200
_EXPIRY_SECONDS = 150.0


def _expiry_realisations(tiny_config_text, client, directory) -> int:
    cfg = parse_config(tiny_config_text(realisations=_CALIBRATION_REALISATIONS,
                                        directory=directory, **_LONG))
    t0 = time.monotonic()
    run_sweep(cfg, client=client, store_path=directory / "calibration.zarr", progress=False)
    per_realisation = (time.monotonic() - t0) / _CALIBRATION_REALISATIONS
    return int(min(20000, max(500, _EXPIRY_SECONDS / per_realisation)))


def test_a_job_killed_at_its_time_limit_is_completed_by_resubmission(tmp_path, tiny_config_text,
                                                                    dask_clients, jobs):
    realisations = _expiry_realisations(tiny_config_text, dask_clients[2], tmp_path / "cal")
    cfg_path = tmp_path / "expiry.toml"
    cfg_path.write_text(tiny_config_text(realisations=realisations, **_LONG))
    store = tmp_path / "store.zarr"
    shared = tmp_path / "shared"
    text, settings = _render(cfg_path, tmp_path, store, jobs=2, walltime="00:01:00")
    total = realisations * 2 * 3
    states, done_after = [], []
    for _ in range(8):  # resubmit the same script until the run is complete, as a user would
        job = submit_batch_script(text, settings.shared_directory)
        jobs.append(job)
        states.append(_wait_until_gone(job, shared, limit=400))
        done_after.append(done_samples(store))
        if states[-1] == "COMPLETED":
            break
        assert states[-1] == "TIMEOUT", _log(shared, job)[-4000:]
    assert states[0] == "TIMEOUT" and states[-1] == "COMPLETED", (realisations, states)
    assert 0 < done_after[0] < total, f"the first job did not stop mid-sweep: {done_after}"
    reference = _local_reference(parse_config(cfg_path.read_text()), dask_clients[2],
                                 tmp_path / "local.zarr")
    _assert_same(store, reference)
    sessions = SampleStore.open(store).group.attrs["sessions"]
    assert len(sessions) == len(states) and "finished" in sessions[-1]
    assert "finished" not in sessions[0]  # killed by Slurm at its time limit
