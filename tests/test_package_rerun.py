"""A supplementary-data package recomputes its run: unzip it, run ``helisweep run config.toml``
inside it, and the samples are bitwise those of the original store.

The device is a drawn layout (a GeoJSON file next to, not below, the config: ``../``), so the
packaged config must point at the packaged copy of the geometry to run at all.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tomllib
import zipfile

import pytest
from conftest import assert_same_samples, store_arrays

from pipeline.analysis.summary import summarize
from pipeline.device.readers import save_geojson
from pipeline.device.templates import TEMPLATES
from pipeline.errors import ExportError
from pipeline.output.package import GEOMETRY_DIR, make_package, packaged_config, verify_package
from pipeline.sweep.config import config_hash, load_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.identity import IDENTITY_COMPONENTS, run_identity

CONFIG = """\
[run]
name = "rerun"
seed = 11
realisations = {realisations}   # disorder realisations per point
directory = "runs/{{name}}"

[device]
file = "../layouts/strip.geojson"   # relative to this file

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[contacts]
doping = 25.0

[[disorder]]
kind = "anderson"
width = 30.0

[[disorder]]
kind = "magnetic"
inplane = 10.0
density = 0.01
aligned = false

[sweep]
energy = [-3.0, 1.0]

[measure]
labels = ["G(L,R)"]
"""


@pytest.fixture(scope="module")
def original(tmp_path_factory, dask_clients):
    """A run of a drawn strip: 2 realisations, then extended to 3 with the config unchanged
    apart from the count (the store keeps the first text)."""
    top = tmp_path_factory.mktemp("rerun")
    (top / "layouts").mkdir()
    save_geojson(TEMPLATES["strip"](width=40.0, length=60.0, name="strip"),
                 top / "layouts" / "strip.geojson")
    (top / "configs").mkdir()
    config = top / "configs" / "rerun.toml"
    store_path = top / "run" / "samples.zarr"
    for realisations in (2, 3):
        config.write_text(CONFIG.format(realisations=realisations))
        cfg = load_config(config)
        run_sweep(cfg, client=dask_clients[1], store_path=store_path, progress=False)
    summary = summarize(store_path, bootstrap_resamples=200, config_dir=cfg.base_dir)
    folder, zip_path = make_package(store_path.parent, summary=summary, store_path=store_path,
                                    config=cfg, figures=[])
    return cfg, store_path, folder, zip_path


def test_packaged_config_points_at_the_packaged_geometry_and_keeps_the_original(original):
    cfg, _, folder, _ = original
    text = (folder / "config.toml").read_text()
    line = next(x for x in text.splitlines() if x.startswith("file = "))
    assert line.startswith(f'file = "{GEOMETRY_DIR}/strip.geojson"  # packaged copy; ')
    assert 'original path: "../layouts/strip.geojson"' in line
    assert "(original comment: relative to this file)" in line
    # the store was extended to 3 realisations after its text (2) was stored
    line = next(x for x in text.splitlines() if x.startswith("realisations = "))
    assert line.startswith("realisations = 3  # the store holds 3 realisations; original: 2")
    data = tomllib.loads(text)
    assert data["device"]["file"] == "geometry/strip.geojson" and data["run"]["realisations"] == 3
    layout = folder.parent.parent / "layouts" / "strip.geojson"  # <top>/run/package-rerun
    assert (folder / "geometry" / "strip.geojson").read_bytes() == layout.read_bytes()
    readme = (folder / "README.md").read_text()
    assert "helisweep run config.toml\n" in readme and "runs/rerun/samples.zarr" in readme
    assert "`device.file`, `run.realisations`" in readme


def test_packaged_config_has_the_run_identity_of_the_samples(original):
    cfg, store_path, folder, _ = original
    packaged = load_config(folder / "config.toml")
    ours, theirs = run_identity(packaged), run_identity(cfg)
    # geometry (by content), material numbers, random-number scheme and store layout agree
    for name in IDENTITY_COMPONENTS:
        if name != "config":
            assert ours[name] == theirs[name], name
    # the config hash differs only by the path string of device.file: put the original back
    # and it is the original's (realisations are outside the hash)
    restored = packaged.model_copy(update={"device": packaged.device.model_copy(
        update={"file": cfg.device.file})})
    assert config_hash(restored) == config_hash(cfg)


@pytest.mark.slow
def test_unzipped_package_recomputes_the_samples_bitwise(original, tmp_path):
    _, store_path, folder, zip_path = original
    assert verify_package(zip_path) == []
    with zipfile.ZipFile(zip_path) as zf:
        zf.extractall(tmp_path)
    unzipped = tmp_path / folder.name
    env = {**os.environ, "PYTHONWARNINGS": "ignore::DeprecationWarning"}
    out = subprocess.run([sys.executable, "-m", "pipeline.cli", "run", "config.toml",
                          "--workers", "2", "--quiet"],
                         cwd=unzipped, env=env, capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stdout + out.stderr
    rerun = unzipped / "runs" / "rerun" / "samples.zarr"
    assert "6 done, 0 failed, 0 missing of 6" in out.stdout
    assert_same_samples(store_arrays(rerun), store_arrays(store_path))


def test_a_config_written_in_a_form_the_rewriter_does_not_handle_is_refused():
    text = CONFIG.format(realisations=2).replace(
        'file = "../layouts/strip.geojson"   # relative to this file',
        'file = """../layouts/strip.geojson"""')
    with pytest.raises(ExportError, match="in a form the package cannot rewrite"):
        packaged_config(text, geometry_name="strip.geojson")
    # a template device and an unextended store: the text stays byte for byte
    plain = CONFIG.format(realisations=2).replace(
        'file = "../layouts/strip.geojson"   # relative to this file',
        'template = "strip"\nparameters = { width = 40.0, length = 60.0 }')
    assert packaged_config(plain, realisations_in_store=2) == (plain, [])
