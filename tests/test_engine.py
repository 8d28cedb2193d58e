"""Engine and store: reproducible on any worker count, resumable, never overwriting."""

import numpy as np
import pytest
import xarray as xr
from conftest import assert_same_samples, store_arrays

from pipeline.errors import StoreError, TransportError
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.store import SampleStatus, SampleStore
from pipeline.sweep.tasks import solve_realisation


def test_same_numbers_on_one_and_two_workers_and_after_resume(tmp_path, tiny_config_text, dask_clients):
    cfg = parse_config(tiny_config_text())
    one = run_sweep(cfg, client=dask_clients[1], store_path=tmp_path / "one.zarr", progress=False)
    two = run_sweep(cfg, client=dask_clients[2], store_path=tmp_path / "two.zarr", progress=False)
    a, b = store_arrays(one.path), store_arrays(two.path)
    assert_same_samples(a, b)
    assert np.all(a["status"] == SampleStatus.DONE)
    assert np.all(np.isfinite(a["transmission"]))
    # partial run, then resume: only the missing tasks are computed, result identical
    part = run_sweep(cfg, client=dask_clients[2], store_path=tmp_path / "part.zarr",
                     progress=False, max_tasks=1)
    per_task = part.block * 3  # a block of realisations x 3 energies
    n_tasks = -(-3 // part.block) * 2  # blocks x geometries
    assert part.counts()["done"] == per_task and len(part.pending_blocks()) == n_tasks - 1
    resumed = run_sweep(cfg, client=dask_clients[1], store_path=tmp_path / "part.zarr", progress=False)
    assert_same_samples(store_arrays(resumed.path), a)
    sessions = resumed.group.attrs["sessions"]
    assert [s["tasks"] for s in sessions] == [1, n_tasks - 1]


def test_same_numbers_whatever_the_batching(tmp_path, tiny_config_text, dask_clients):
    # one realisation per task versus blocks of several: the samples do not depend on batching
    single = parse_config(tiny_config_text(realisations=4) + "\n[execution]\nbatch = 1\n")
    blocked = parse_config(tiny_config_text(realisations=4) + "\n[execution]\nbatch = 12\n")
    a = run_sweep(single, client=dask_clients[2], store_path=tmp_path / "a.zarr", progress=False)
    b = run_sweep(blocked, client=dask_clients[2], store_path=tmp_path / "b.zarr", progress=False)
    assert a.block == 1 and b.block == 4
    assert_same_samples(store_arrays(a.path), store_arrays(b.path))
    assert b.group.attrs["sessions"][-1]["tasks"] == 2  # one block per geometry


def test_disorder_is_fixed_per_realisation_across_energies(tiny_config_text):
    # the same realisation solved in two tasks with different energy lists agrees at the
    # shared energy: the sample does not depend on what else the task contains
    cfg_a = parse_config(tiny_config_text())
    cfg_b = parse_config(tiny_config_text(**{"energy = [-3.0, 1.0, 5.0]": "energy = [1.0]"}))
    ra = solve_realisation(cfg_a, (1, 0, 0))
    rb = solve_realisation(cfg_b, (1, 0, 0))
    np.testing.assert_array_equal(ra.transmission[0, 0, 1], rb.transmission[0, 0, 0])
    # and different realisations differ
    rc = solve_realisation(cfg_a, (2, 0, 0))
    assert not np.allclose(ra.transmission, rc.transmission)


def test_store_is_readable_by_xarray_with_units_and_provenance(tmp_path, tiny_config_text, dask_clients):
    cfg = parse_config(tiny_config_text(realisations=1))
    store = run_sweep(cfg, client=dask_clients[2], store_path=tmp_path / "s.zarr", progress=False)
    ds = xr.open_zarr(str(store.path), consolidated=False)
    assert ds.transmission.dims[-2:] == ("lead_to", "lead_from")
    assert ds.energy.attrs["units"] == "meV" and ds.geometry.attrs["units"] == "nm"
    assert list(ds.measurement.values) == ["G(L,R)", "R(L,R;L,R)"]
    assert ds.attrs["config_text"] == cfg.source_text
    session = ds.attrs["sessions"][0]
    assert session["kwant_solver"] in ("mumps", "scipy") and "numpy" in session
    # G(L,R) is 1 / R(L,R;L,R) sample by sample
    g = ds.measurements.sel(measurement="G(L,R)").values
    r = ds.measurements.sel(measurement="R(L,R;L,R)").values
    np.testing.assert_allclose(g * r, 1.0, rtol=1e-10)
    # checksummed chunks: every data array carries a crc32c codec
    for name in ("transmission", "status", "measurements", "modes"):
        codecs = [type(c).__name__ for c in store.group[name].metadata.codecs]
        assert "Crc32cCodec" in codecs, (name, codecs)


def test_changed_config_is_refused_unless_fresh(tmp_path, tiny_config_text, dask_clients):
    path = tmp_path / "s.zarr"
    cfg = parse_config(tiny_config_text(realisations=1))
    run_sweep(cfg, client=dask_clients[1], store_path=path, progress=False)
    before = store_arrays(path)
    other = parse_config(tiny_config_text(realisations=1, **{"width = 30.0": "width = 31.0"}))
    with pytest.raises(StoreError, match="holds samples of a different run: the configuration"):
        run_sweep(other, client=dask_clients[1], store_path=path, progress=False)
    assert_same_samples(store_arrays(path), before)  # untouched
    run_sweep(other, client=dask_clients[1], store_path=path, progress=False, fresh=True)
    aside = [p for p in tmp_path.iterdir() if p.name.startswith("s.zarr.replaced-")]
    assert len(aside) == 1
    assert_same_samples(store_arrays(aside[0]), before)  # the old samples are kept, not deleted


def test_more_realisations_extend_the_store(tmp_path, tiny_config_text, dask_clients):
    path = tmp_path / "s.zarr"
    small = run_sweep(parse_config(tiny_config_text(realisations=2)), client=dask_clients[2],
                      store_path=path, progress=False)
    first = store_arrays(small.path)
    big = run_sweep(parse_config(tiny_config_text(realisations=3)), client=dask_clients[2],
                    store_path=path, progress=False)
    grown = store_arrays(big.path)
    assert grown["status"].shape[0] == 3 and np.all(grown["status"] == SampleStatus.DONE)
    np.testing.assert_array_equal(grown["transmission"][:2], first["transmission"])
    assert big.group.attrs["sessions"][-1]["tasks"] == 2  # only the new realisation


def test_closed_lead_is_refused_before_compute(tmp_path, tiny_config_text, dask_clients):
    # undoped leads 40 nm wide have a finite-size gap around the edge Dirac point (7.46 meV)
    cfg = parse_config(tiny_config_text(**{"doping = 25.0": "doping = 0.0",
                                           "energy = [-3.0, 1.0, 5.0]": "energy = [7.46]"}))
    with pytest.raises(TransportError, match="no open mode"):
        run_sweep(cfg, client=dask_clients[1], store_path=tmp_path / "x.zarr", progress=False)
    assert not (tmp_path / "x.zarr").exists()


def test_status_of_missing_store(tmp_path):
    with pytest.raises(StoreError, match="run the sweep first"):
        SampleStore.open(tmp_path / "nothing.zarr")
