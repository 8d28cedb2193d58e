"""Concatenated edges wired through the config, the run directory, L* and the figures."""

import warnings

import pytest
import xarray as xr

from pipeline.analysis.lstar import load_lstar
from pipeline.analysis.lstar_results import concatenated_method
from pipeline.errors import ConfigError, StoreError
from pipeline.longedges import pools
from pipeline.longedges.run import run_concatenation
from pipeline.output.longedge_figures import plot_concatenated
from pipeline.sweep.config import parse_config

CONFIG = """
[run]
name = "long"
seed = 5
realisations = 2
directory = "{directory}"

[device]
template = "strip"
parameters = {{ width = 100.0, length = 400.0 }}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[[disorder]]
kind = "magnetic"
inplane = 15.0
density = 0.004
aligned = false

[sweep]
energy = 1.0

[measure]
labels = ["G(L,R)"]

[concatenation]
segment_length = 400.0
segments = 6
lengths = [400.0, 800.0, 2000.0, 4000.0]
sequences = 30
pool_resamples = 20
"""


def test_long_edges_end_to_end_and_resume(tmp_path, monkeypatch):
    cfg = parse_config(CONFIG.format(directory=tmp_path))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a 100 nm strip is narrow: the guard warns
        out = run_concatenation(cfg, tmp_path, progress=False, chunk=4)
    with xr.open_dataset(out["netcdf"]) as f:
        ds = f.load()
    assert set(ds["mode"].values) == {"coherent", "incoherent"}
    assert list(ds["length"].values) == [400.0, 800.0, 2000.0, 4000.0]
    assert ds["conductance"].sizes["sequence"] == 30
    mean = ds["conductance_mean"].sel(mode="coherent").squeeze().values
    # Source: the ideal helical edge conducts 2 e^2/h (Koenig et al., Science 318, 766 (2007));
    # spin-flip disorder can only lower it, more so for longer edges
    assert (mean <= 2.0 + 1e-9).all() and mean[-1] < mean[0]
    methods = {r.method for r in load_lstar(out["lstar"])}
    assert methods == {concatenated_method("coherent"), concatenated_method("incoherent")}
    figures = plot_concatenated(out["dataset"], out["results"], tmp_path / "figures")
    assert {f.suffix for f in figures} == {".pdf", ".png", ".csv"}
    assert all(f.exists() and f.stat().st_size > 1000 for f in figures if f.suffix != ".csv")
    # a rerun reuses the stored pools: no segment is solved again
    monkeypatch.setattr(pools, "segment_smatrices",
                        lambda *a, **k: (_ for _ in ()).throw(AssertionError("recomputed")))
    again = run_concatenation(cfg, tmp_path, progress=False)
    with xr.open_dataset(again["netcdf"]) as f:
        xr.testing.assert_identical(f.load(), ds)
    # a different model refuses to reuse the pools
    other = parse_config(CONFIG.format(directory=tmp_path).replace("inplane = 15.0", "inplane = 14.0"))
    with pytest.raises(StoreError, match="different model"):
        run_concatenation(other, tmp_path, progress=False)


@pytest.mark.parametrize("change, message", [
    (('template = "strip"\nparameters = { width = 100.0, length = 400.0 }',
      'template = "hbar"\nparameters = { length = 300.0, width = 150.0, arm_length = 100.0, arm_width = 150.0 }'),
     "two-terminal strip"),
    (("lengths = [400.0, 800.0, 2000.0, 4000.0]", "lengths = [400.0, 900.0]"), "not a multiple"),
    (("segment_length = 400.0", "segment_length = 402.0"), "multiple of the lattice constant"),
    (("segments = 6", "segments = 1"), "concatenation.segments"),
])
def test_bad_concatenation_tables(tmp_path, change, message):
    text = CONFIG.format(directory=tmp_path).replace(*change)
    with pytest.raises(ConfigError, match=message):
        parse_config(text)
