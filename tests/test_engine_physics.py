"""Physics through the whole engine: config -> Dask -> store -> numbers."""

import numpy as np
import pytest
import xarray as xr

from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep

HBAR_TEMPLATE = """
[run]
name = "hbar-physics"
seed = 7
realisations = {realisations}
directory = "{directory}"

[device]
{device}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

{extra}

[measure]
labels = ["R14,23", "R14,14"]
"""


def _measure(store, label):
    ds = xr.open_zarr(str(store.path), consolidated=False)
    return ds.measurements.sel(measurement=label)


@pytest.mark.slow
def test_weak_disorder_keeps_roth_value_strong_disorder_destroys_it(tmp_path, dask_clients):
    text = HBAR_TEMPLATE.format(
        realisations=6, directory=str(tmp_path),
        device='template = "hbar"\nparameters = { length = 200.0, width = 200.0, arm_length = 100.0, arm_width = 200.0 }',
        extra='[[disorder]]\nkind = "anderson"\nwidth = 500.0\n\n'
              '[sweep]\nenergy = -3.0\ndisorder_strength = [0.04, 1.0]',
    )
    store = run_sweep(parse_config(text), client=dask_clients[2], store_path=tmp_path / "s.zarr",
                      progress=False)
    r = _measure(store, "R14,23").squeeze().values  # (realisation, strength)
    weak, strong = r[:, 0], r[:, 1]
    # Source: Roth et al., Science 325, 294 (2009): R14,23 = h/4e^2 for helical edges; a
    # non-magnetic 20 meV Anderson disorder cannot backscatter them (time-reversal symmetry)
    sem = weak.std(ddof=1) / np.sqrt(len(weak))
    assert abs(weak.mean() - 0.25) <= max(2 * sem, 1e-3)
    # 500 meV of disorder (far beyond the 20 meV gap) localises the states: no plateau in any
    # sample; the resistance is log-normally spread over decades, so compare medians
    assert np.all(np.abs(strong - 0.25) > 0.05)
    assert np.median(strong) > 1.0


@pytest.mark.slow
def test_gate_sweep_plateau_only_while_gated_region_is_in_the_gap(tmp_path, dask_clients):
    # tarn-hbar-A has a top gate "TG" over the bridge; U = -lever_arm * V on gated sites, so
    # the gated region's local Fermi level is E + 10 meV/V * V; the bulk gap is (-10, 10) meV.
    geo = (tmp_path / "dev.geojson")
    from pathlib import Path

    src = Path(__file__).resolve().parents[1] / "geometries" / "tarn-hbar-A.geojson"
    geo.write_text(src.read_text())
    text = HBAR_TEMPLATE.format(
        realisations=1, directory=str(tmp_path),
        device=f'file = "{geo}"',
        extra='[gates]\nlever_arm = 10.0\n\n[sweep]\nenergy = -3.0\ngate_voltage = [-4.0, 0.0, 0.5, 4.0]',
    )
    store = run_sweep(parse_config(text, base_dir=tmp_path), client=dask_clients[2],
                      store_path=tmp_path / "s.zarr", progress=False)
    r = _measure(store, "R14,23").squeeze().values  # (gate_voltage,)
    in_gap = r[1:3]   # local Fermi level -3 and +2 meV: inside the gap
    outside = r[[0, 3]]  # -43 and +37 meV: in the bulk bands
    # Source: Roth et al., Science 325, 294 (2009): h/4e^2 on the plateau
    np.testing.assert_allclose(in_gap, 0.25, rtol=5e-3)
    assert np.all(np.abs(outside - 0.25) > 0.02)
