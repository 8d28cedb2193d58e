"""A store knows exactly what it holds: resumes that would mix devices or schemes are refused."""

import dataclasses
import shutil

import pytest
import zarr

import pipeline.sweep.identity as identity_module
from pipeline.device.readers import save_geojson
from pipeline.device.templates import TEMPLATES
from pipeline.errors import StoreError
from pipeline.physics.materials import PRESETS
from pipeline.sweep.config import load_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.identity import run_identity
from pipeline.sweep.store import SampleStore

LAYOUT_CONFIG = """
[run]
name = "layout"
seed = 3
realisations = {realisations}
directory = "{directory}"

[device]
file = "strip.geojson"

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[contacts]
doping = 25.0

[[disorder]]
kind = "anderson"
width = 30.0

[sweep]
energy = [0.0]

[measure]
labels = ["G(L,R)"]
"""


def _text(tmp_path, realisations):
    return LAYOUT_CONFIG.format(realisations=realisations, directory=tmp_path / "run")


def _layout_run(tmp_path, width=40.0, realisations=2):
    """A config of a drawn layout (a GeoJSON strip) and its store, created without compute."""
    save_geojson(TEMPLATES["strip"](width=width, length=60.0, name="layout"),
                 tmp_path / "strip.geojson")
    path = tmp_path / "layout.toml"
    path.write_text(_text(tmp_path, realisations))
    cfg = load_config(path)
    store_path = cfg.run_dir / "samples.zarr"
    SampleStore.open_for_run(store_path, cfg, ("L", "R"), provenance={"test": True}).release_lock()
    return path, store_path


def _attrs(store_path):
    return dict(zarr.open_group(str(store_path), mode="r").attrs)


def test_an_edited_layout_is_refused_before_compute_and_the_store_is_untouched(tmp_path):
    cfg_path, store_path = _layout_run(tmp_path)
    before = _attrs(store_path)
    assert before["identity"]["geometry"] == run_identity(load_config(cfg_path))["geometry"]
    # the bridge made narrower, and more realisations asked for (the case of the issue)
    save_geojson(TEMPLATES["strip"](width=35.0, length=60.0, name="layout"),
                 tmp_path / "strip.geojson")
    cfg_path.write_text(_text(tmp_path, 4))
    cfg = load_config(cfg_path)
    with pytest.raises(StoreError) as err:
        run_sweep(cfg, client=None, progress=False)  # refused before any cluster starts
    msg = str(err.value)
    assert "the geometry file 'strip.geojson' was edited" in msg and "--fresh" in msg
    assert "never deleted" in msg
    assert _attrs(store_path) == before
    # --fresh moves the old store aside, it does not delete it
    SampleStore.open_for_run(store_path, cfg, ("L", "R"), provenance={}, fresh=True).release_lock()
    aside = list(store_path.parent.glob("samples.zarr.replaced-*"))
    assert len(aside) == 1 and _attrs(aside[0])["identity"] == before["identity"]


def test_more_realisations_of_the_same_layout_still_resume(tmp_path):
    cfg_path, store_path = _layout_run(tmp_path)
    cfg_path.write_text(_text(tmp_path, 5))
    cfg = load_config(cfg_path)
    SampleStore.check_resume(store_path, cfg)
    store = SampleStore.open_for_run(store_path, cfg, ("L", "R"), provenance={})
    store.release_lock()
    assert store.shape[0] == 5


def test_changed_material_numbers_are_named(tmp_path, monkeypatch):
    cfg_path, store_path = _layout_run(tmp_path)
    preset = PRESETS["hgte-7.0nm"]
    monkeypatch.setitem(PRESETS, "hgte-7.0nm", dataclasses.replace(preset, M=preset.M * 1.01))
    with pytest.raises(StoreError, match="the material numbers used .* changed \\[material:"):
        SampleStore.check_resume(store_path, load_config(cfg_path))


def test_a_new_random_number_scheme_is_refused(tmp_path, monkeypatch):
    cfg_path, store_path = _layout_run(tmp_path)
    monkeypatch.setattr(identity_module, "RANDOM_SCHEME_VERSION", 99)
    with pytest.raises(StoreError, match="random-number scheme version of this helisweep "
                                         "changed \\(1 -> 99\\)"):
        SampleStore.check_resume(store_path, load_config(cfg_path))


def test_a_store_from_before_identities_records_its_identity_on_resume(tmp_path):
    cfg_path, store_path = _layout_run(tmp_path)
    group = zarr.open_group(str(store_path), mode="r+")
    del group.attrs["identity"]
    cfg = load_config(cfg_path)
    SampleStore.open_for_run(store_path, cfg, ("L", "R"), provenance={}).release_lock()
    attrs = _attrs(store_path)
    assert attrs["identity"] == run_identity(cfg)
    assert "not checked" in attrs["identity_recorded_late"]


def test_identity_components_are_independent_of_extension_keys(tmp_path):
    cfg_path, _ = _layout_run(tmp_path)
    a = run_identity(load_config(cfg_path))
    cfg_path.write_text(_text(tmp_path, 50).replace(
        "\n\n[device]", "\ntarget_ci = 0.05\nmax_realisations = 200\n\n[device]"))
    b = run_identity(load_config(cfg_path))
    assert a == b
    shutil.copy(tmp_path / "strip.geojson", tmp_path / "copy.geojson")
    cfg_path.write_text(_text(tmp_path, 2).replace("strip.geojson",
                                                                     "copy.geojson"))
    c = run_identity(load_config(cfg_path))
    # the same content under another name: the geometry digest is the same, the config
    # (which names the file) is not
    assert c["geometry"] == a["geometry"] and c["config"] != a["config"]


def _open_quietly(path):
    import warnings

    import xarray as xr

    with warnings.catch_warnings():
        warnings.simplefilter("error")  # any warning fails the test
        return xr.open_zarr(str(path))


def test_partial_and_finished_stores_open_in_xarray_without_warnings(tmp_path, dask_clients):
    from conftest import tiny_config

    from pipeline.sweep.config import parse_config

    cfg = parse_config(tiny_config(tmp_path / "run", 4))
    path = tmp_path / "run" / "samples.zarr"
    run_sweep(cfg, client=dask_clients[1], store_path=path, progress=False, max_tasks=1)
    partial = _open_quietly(path)
    assert int((partial["status"].values == 1).sum()) > 0
    assert int((partial["status"].values == 0).sum()) > 0
    run_sweep(cfg, client=dask_clients[1], store_path=path, progress=False)
    finished = _open_quietly(path)
    assert int((finished["status"].values == 1).sum()) == finished["status"].size
    # a grown store: the consolidated metadata follows the new realisation axis
    more = parse_config(tiny_config(tmp_path / "run", 6))
    SampleStore.open_for_run(path, more, ("L", "R"), provenance={}).release_lock()
    assert _open_quietly(path).sizes["realisation"] == 6
