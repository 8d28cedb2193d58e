"""Precision instead of a count: realisations are added per sweep point until its interval is
narrow enough ([run] target_ci, target_lstar_ci), the same on any number of workers and
after an interrupted run is resumed."""

import inspect
import warnings

import numpy as np
import pytest
from conftest import assert_same_samples, store_arrays, tiny_config

from pipeline.analysis.lstar import longest_ballistic_length
from pipeline.analysis.statistics import resample_uniforms, row_statistics
from pipeline.analysis.summary import summarize
from pipeline.cli.main import main
from pipeline.errors import ConfigError, ConfigWarning
from pipeline.precision import loop as precision_loop
from pipeline.precision import plan_precision, run_to_precision
from pipeline.precision.plan import (
    BOOTSTRAP_RESAMPLES,
    BOOTSTRAP_SEED,
    CONFIDENCE,
    LSTAR_TOLERANCE,
)
from pipeline.sweep.config import config_hash, parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.store import REQUESTED, SampleStatus, SampleStore

# the tiny runs use first blocks far below the recommended one (asserted once, below)
pytestmark = pytest.mark.filterwarnings("ignore:.*is the first block of a precision target")

#: strength 0: every realisation is the same clean device (an interval of zero width);
#: strength 2: strong disorder, far wider than the target within 12 realisations
STRENGTHS = {"gate_voltage = 0.0": "gate_voltage = 0.0\ndisorder_strength = [0.0, 2.0]"}
TARGET = "target_ci = 0.05\nmax_realisations = 12"


def target_text(directory, run_keys: str = TARGET, realisations: int = 4, **replace) -> str:
    """The tiny sweep over strengths 0 and 2 with ``run_keys`` added to its [run] table."""
    text = tiny_config(directory, realisations, **{**STRENGTHS, **replace})
    return text.replace("[device]", f"{run_keys}\n\n[device]", 1)


@pytest.fixture(scope="module")
def target_run(tmp_path_factory, dask_clients):
    """The target run on two workers, uninterrupted (shared by the tests that read it)."""
    root = tmp_path_factory.mktemp("precision")
    cfg = parse_config(target_text(root / "run"))
    store = run_to_precision(cfg, client=dask_clients[2], progress=False)
    return cfg, store


def requested_samples(store: SampleStore) -> np.ndarray:
    """Which samples (realisation, sweep point) lie below their point's request."""
    req = store.requested()
    r = np.arange(store.shape[0]).reshape((-1,) + (1,) * req.ndim)
    return r < req[None]


def test_stops_where_precise_and_adds_blocks_where_not(target_run, tmp_path, dask_clients):
    cfg, store = target_run
    req = store.requested()
    assert req.shape == (2, 2, 1, 1, 3)  # geometry, strength, field, gate, energy
    # the clean points meet the target after the first block and stop for good; the
    # disordered ones get every further block up to max_realisations
    assert (req[:, 0] == 4).all() and (req[:, 1] == 12).all()
    assert store.shape[0] == 12
    want = requested_samples(store)
    status = store.status()
    assert (status[want] == SampleStatus.DONE).all() and (status[~want] == SampleStatus.MISSING).all()
    assert store.counts()["missing"] == 0 and store.counts()["not_requested"] == int((~want).sum())
    # the requested samples are those of a run of 12 realisations without a target, bit for bit
    plain_cfg = parse_config(tiny_config(tmp_path / "plain", 12, **STRENGTHS))
    assert config_hash(plain_cfg) == config_hash(cfg)  # the targets do not change what a sample is
    plain = run_sweep(plain_cfg, client=dask_clients[2], progress=False)
    got, ref = store_arrays(store.path), store_arrays(plain.path)
    for name in ("transmission", "measurements", "modes", "status"):
        np.testing.assert_array_equal(got[name][want], ref[name][want], err_msg=name)
    # each decision, redone by hand from the plain run's samples below the boundary: the
    # half-width of row_statistics' interval, the largest over the measurements
    x = ref["measurements"]  # (realisation, g, s, b, v, e, measurement)

    def half_width(boundary, g, s):
        rows = np.moveaxis(x[:boundary, g, s], 0, -1).reshape(-1, boundary)
        u = resample_uniforms(BOOTSTRAP_RESAMPLES, boundary, BOOTSTRAP_SEED)
        st = row_statistics(rows, np.isfinite(rows), u, CONFIDENCE)
        hw = (st["ci_high"] - st["ci_low"]) / 2
        hw = np.where(np.isnan(hw) & (st["sem"] == 0), 0.0, hw)  # all samples equal
        return hw.reshape(x.shape[3:]).max(axis=-1)

    for g in range(2):
        assert (half_width(4, g, 0) <= 0.05).all()
        assert (half_width(4, g, 1) > 0.05).all() and (half_width(8, g, 1) > 0.05).all()


def test_same_store_on_one_and_two_workers_and_after_interruptions(target_run, tmp_path,
                                                                   dask_clients, monkeypatch):
    cfg, two = target_run
    one = run_to_precision(cfg, client=dask_clients[1], store_path=tmp_path / "one.zarr",
                           progress=False)
    # stopped after three tasks (mid first round), resumed on the other number of workers
    part_path = tmp_path / "part.zarr"
    part = run_to_precision(cfg, client=dask_clients[2], store_path=part_path, progress=False,
                            max_tasks=3)
    assert part.pending_blocks() and int(part.requested().max()) == 4
    resumed = run_to_precision(cfg, client=dask_clients[1], store_path=part_path, progress=False)
    # killed at a round boundary, after the samples and before the decision
    calls = []
    real_decide = precision_loop.decide

    def failing_decide(*args, **kwargs):
        calls.append(1)
        if len(calls) == 2:
            raise RuntimeError("killed at the second boundary")
        return real_decide(*args, **kwargs)

    crash_path = tmp_path / "crash.zarr"
    monkeypatch.setattr(precision_loop, "decide", failing_decide)
    with pytest.raises(RuntimeError, match="second boundary"):
        run_to_precision(cfg, client=dask_clients[2], store_path=crash_path, progress=False)
    monkeypatch.setattr(precision_loop, "decide", real_decide)
    assert int(SampleStore.open(crash_path).requested().max()) == 8
    crashed = run_to_precision(cfg, client=dask_clients[1], store_path=crash_path, progress=False)
    want = store_arrays(two.path)
    for store in (one, resumed, crashed):
        assert_same_samples(store_arrays(store.path), want)
        np.testing.assert_array_equal(store.requested(), two.requested())
    # the resumed run computed only what the interrupted one had not: no task twice
    sessions = SampleStore.open(part_path).group.attrs["sessions"]
    total = SampleStore.open(two.path).group.attrs["sessions"][-1]["tasks"]
    assert sessions[0]["tasks"] == 3 and sessions[0]["precision"]["complete"] is False
    assert sessions[1]["tasks"] == total - 3 and sessions[1]["precision"]["complete"] is True


def test_lstar_target_adds_realisations_where_lstar_is_uncertain(tmp_path, dask_clients):
    # a 100 nm strip: the clean edges are ballistic over the swept lengths (L* beyond them,
    # every realisation alike), the disordered ones leave the band inside the range
    text = target_text(tmp_path / "run", "target_lstar_ci = 0.1\nmax_realisations = 12", **{
        "disorder_strength = [0.0, 2.0]": "disorder_strength = [0.0, 1.0]",
        "width = 40.0": "width = 100.0", "energy = [-3.0, 1.0, 5.0]": "energy = 1.0",
        "values = [60.0, 120.0]": "values = [60.0, 150.0, 300.0, 600.0]"})
    cfg = parse_config(text)
    assert plan_precision(cfg).lstar_measurements == ("G(L,R)", "R(L,R;L,R)")
    store = run_to_precision(cfg, client=dask_clients[2], progress=False)
    req = store.requested()
    # an L* point is all lengths of one (strength, field, gate, energy): they move together
    assert (req[:, 0] == 4).all() and (req[:, 1] == 12).all()
    # the disordered L* point is still above the target at 8 realisations, judged by hand
    # with the L* function of the report on the samples below that boundary
    import xarray as xr  # heavy; only this test reads the dataset itself

    ds = xr.open_zarr(str(store.path), consolidated=False).isel(realisation=slice(0, 8))
    rel = []
    for label in cfg.measure.labels:
        res = longest_ballistic_length(ds, label, point_index={"disorder_strength": 1},
                                       tolerance=LSTAR_TOLERANCE, config_dir=cfg.base_dir)
        rel.append((res.lstar_ci_high - res.lstar_ci_low) / 2 / res.lstar)
    assert max(rel) > 0.1


def test_bad_targets_are_refused_before_compute(tmp_path, capsys):
    d = tmp_path / "run"
    cases = [
        ("max_realisations = 100", "no target is set"),
        ("target_ci = 0.05\nmax_realisations = 3", "below realisations = 4"),
        ("target_ci = 0.0", "greater than 0"),
        ("target_ci = nan", "finite"),
        ("target_lstar_ci = 1.5", "less than 1"),
    ]
    for keys, message in cases:
        with pytest.raises(ConfigError, match=message):
            parse_config(target_text(d, keys))
    with pytest.raises(ConfigError, match="default max_realisations = 2000"):
        parse_config(target_text(d, "target_ci = 0.05", realisations=3000))
    with pytest.raises(ConfigError, match="interval needs at least 2"):
        parse_config(target_text(d, "target_ci = 0.05", realisations=1))
    # L* needs a length sweep
    no_length = parse_config(target_text(d, "target_lstar_ci = 0.1", **{
        'parameter = "length"': 'parameter = "width"', "width = 40.0": "length = 60.0",
        "values = [60.0, 120.0]": "values = [40.0, 50.0]"}))
    with pytest.raises(ConfigError, match="needs L\\*.*sweep of 'width'"):
        plan_precision(no_length)
    # the edge-network model samples its devices in one go: refused, also by the command
    edges = target_text(d, "target_ci = 0.05") + "\n[edges]\nsegment_length = 50.0\n"
    with pytest.raises(ConfigError, match=r"not supported with an \[edges\].*sequences"):
        plan_precision(parse_config(edges))
    path = tmp_path / "edges.toml"
    path.write_text(edges)
    assert main(["run", str(path), "--quiet"]) == 2
    assert "not supported with an [edges] network run" in capsys.readouterr().err
    assert not d.exists()  # nothing was started or written
    # a small first block is allowed but warned about; the recommended one is not
    with pytest.warns(ConfigWarning, match="realisations = 20 is the first block.*>= 50"):
        parse_config(target_text(d, "target_ci = 0.05", realisations=20))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        parse_config(target_text(d, "target_ci = 0.05", realisations=50))
    # without a target the keys change nothing: default limit, same store identity
    plain = parse_config(tiny_config(d, 4, **STRENGTHS))
    assert plan_precision(plain) is None and plain.run.realisation_limit == 4
    assert config_hash(parse_config(target_text(d, "target_ci = 0.01"))) == config_hash(plain)


def test_status_shows_each_point_against_the_target(target_run, capsys):
    _, store = target_run
    assert main(["status", str(store.path)]) == 0
    out = capsys.readouterr().out
    assert "target_ci = 0.05" in out and "6 met, 6 max reached, 0 running (of 12 points)" in out
    lines = [ln for ln in out.splitlines() if "disorder_strength = " in ln]
    assert len(lines) == 12
    assert all("4 samples, met" in ln for ln in lines if "disorder_strength = 0," in ln)
    assert all("12 samples, max reached" in ln for ln in lines if "disorder_strength = 2," in ln)
    assert "beyond the points' requested realisations" in out
    assert main(["status", str(store.path), "--points", "3"]) == 0
    out = capsys.readouterr().out
    assert "the 3 farthest from the target:" in out
    assert len([ln for ln in out.splitlines() if "disorder_strength = " in ln]) == 3


def test_run_without_target_on_a_target_store_requests_its_realisations(target_run, tmp_path,
                                                                        dask_clients):
    cfg, store = target_run
    import shutil

    path = tmp_path / "copy.zarr"
    shutil.copytree(store.path, path)
    more = parse_config(tiny_config(tmp_path / "x", 8, **STRENGTHS))
    grown = run_sweep(more, client=dask_clients[2], store_path=path, progress=False)
    req = grown.requested()
    assert (req[:, 0] == 8).all() and (req[:, 1] == 12).all()
    assert grown.counts()["missing"] == 0
    assert (grown.status()[:8] == SampleStatus.DONE).all()
    # the plain driver given a target config says that it does not apply the target
    with pytest.warns(ConfigWarning, match="does not apply: it computes the first block of 4"):
        run_sweep(cfg, client=dask_clients[2], store_path=tmp_path / "copy2.zarr",
                  progress=False, max_tasks=0)


def test_store_variable_and_judged_interval_settings():
    # the variable the summary reads, by name and dimensions
    assert REQUESTED == "requested_realisations"
    # the stopping rule judges the intervals the report states: the same bootstrap settings
    # as the defaults of the summary and of L*
    summary = inspect.signature(summarize).parameters
    lstar = inspect.signature(longest_ballistic_length).parameters
    assert summary["bootstrap_resamples"].default == BOOTSTRAP_RESAMPLES == lstar["bootstrap_resamples"].default
    assert summary["bootstrap_seed"].default == BOOTSTRAP_SEED == lstar["seed"].default
    assert summary["confidence"].default == CONFIDENCE == lstar["confidence"].default
    assert lstar["tolerance"].default == LSTAR_TOLERANCE


def test_requested_variable_reads_with_xarray(target_run):
    import xarray as xr  # heavy; only the tests that read stores need it

    _, store = target_run
    ds = xr.open_zarr(str(store.path), consolidated=False)
    da = ds[REQUESTED]
    assert da.dims == ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy")
    assert da.dtype == np.int64
    np.testing.assert_array_equal(da.values, store.requested())
    assert ds.attrs["precision"]["target_ci"] == 0.05
    assert ds.attrs["precision"]["max_realisations"] == 12


def test_batch_mode_runs_the_stopping_loop(target_run, tmp_path):
    # scheduler and one worker as the batch script starts them, then the job's driver command
    import subprocess
    import sys
    import time

    cfg, two = target_run
    config = tmp_path / "target.toml"
    config.write_text(cfg.source_text)
    sched = tmp_path / "scheduler.json"
    procs = [subprocess.Popen([sys.executable, "-m", "dask", "scheduler", "--scheduler-file",
                               str(sched), "--port", "0", "--dashboard-address", "127.0.0.1:0",
                               "--interface", "lo"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)]
    try:
        deadline = time.monotonic() + 60
        while not (sched.exists() and sched.stat().st_size) and time.monotonic() < deadline:
            assert procs[0].poll() is None, "the scheduler exited"
            time.sleep(0.1)
        procs.append(subprocess.Popen([sys.executable, "-m", "dask", "worker", "--scheduler-file",
                                       str(sched), "--nthreads", "1", "--nworkers", "1",
                                       "--interface", "lo"],
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        path = tmp_path / "batch.zarr"
        assert main(["run-in-allocation", str(config), "--scheduler-file", str(sched),
                     "--store", str(path), "--timeout", "60"]) == 0
    finally:
        for proc in procs:
            if proc.poll() is None:
                proc.kill()
            proc.wait()
    store = SampleStore.open(path)
    np.testing.assert_array_equal(store.requested(), two.requested())
    assert_same_samples(store_arrays(path), store_arrays(two.path))


def test_run_command_runs_the_stopping_loop(target_run, tmp_path, capsys):
    cfg, two = target_run
    config = tmp_path / "target.toml"
    config.write_text(cfg.source_text.replace(str(two.path.parent), str(tmp_path / "cli")))
    assert main(["run", str(config), "--workers", "1", "--quiet"]) == 0
    out = capsys.readouterr().out
    assert "0 missing of 144 (precision target: `helisweep status" in out
    path = tmp_path / "cli" / "samples.zarr"
    np.testing.assert_array_equal(SampleStore.open(path).requested(), two.requested())
    assert_same_samples(store_arrays(path), store_arrays(two.path))
    assert main(["status", str(config)]) == 0
    assert "6 met, 6 max reached, 0 running" in capsys.readouterr().out


def test_coverage_benchmark_runs(tmp_path):
    # the script behind the coverage table of docs/precision.md, at toy sizes
    import subprocess
    import sys
    from pathlib import Path

    script = Path(__file__).resolve().parents[1] / "benchmarks" / "precision_coverage.py"
    out = subprocess.run([sys.executable, str(script), "--smoke"], capture_output=True, text=True,
                         timeout=300, cwd=tmp_path)
    assert out.returncode == 0, out.stderr
    rows = [ln for ln in out.stdout.splitlines() if ln.startswith("| ") and "%" in ln]
    assert [r.split("|")[1].strip() for r in rows] == ["normal", "one-sided", "log-normal", "rare"]
