"""Supplementary-data package: complete, checksummed, relative, inside the run, never overwritten."""

import json
import shutil
import zipfile

import pytest
import xarray as xr
from conftest import TINY_CONFIG  # noqa: E402
from test_figures import summary_from_store  # noqa: E402  (tests/ is on sys.path)

from pipeline.analysis.lstar import load_lstar, longest_ballistic_length
from pipeline.errors import ExportError
from pipeline.output.figures import load_run
from pipeline.output.methods import methods_text
from pipeline.output.package import make_package, verify_package
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep

# the shared tiny configuration (tests/conftest.py): Anderson disorder only, two energies
CONFIG = (TINY_CONFIG.replace('name = "tiny"', 'name = "pkg"').replace("seed = 42", "seed = 1234")
          .replace("{realisations}", "2")
          .replace('[[disorder]]\nkind = "magnetic"\ninplane = 10.0\ndensity = 0.01\naligned = false\n\n', "")
          .replace("energy = [-3.0, 1.0, 5.0]", "energy = [-3.0, 1.0]")
          .replace("values = [60.0, 120.0]", "values = [60.0, 90.0]"))

@pytest.fixture(scope="module")
def run_dir(tmp_path_factory, dask_clients):
    tmp = tmp_path_factory.mktemp("pkgrun")
    text = CONFIG.format(directory=str(tmp / "run"))
    cfg = parse_config(text)
    store = run_sweep(cfg, client=dask_clients[2], store_path=tmp / "run" / "samples.zarr",
                      progress=False)
    summary = summary_from_store(store.path, cfg)
    return tmp / "run", summary, text


@pytest.fixture(scope="module")
def package(run_dir):
    path, summary, _ = run_dir
    results = [longest_ballistic_length(path / "samples.zarr", "G(L,R)",
                                        point={"energy": 1.0}, bootstrap_resamples=200)]
    return make_package(path, summary=summary, lstar_results=results)


def test_package_is_complete(package, run_dir):
    folder, zpath = package
    path, summary, text = run_dir
    assert folder == path.resolve() / "package-pkg" and zpath == folder.with_name("package-pkg.zip")
    files = {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}
    for name in ("README.md", "methods.md", "summary.nc", "summary.csv", "config.toml",
                 "provenance.json", "lstar.json", "MANIFEST.sha256"):
        assert name in files, name
    for stem in ("fig-vs-energy-G-L-R", "fig-vs-length-G-L-R", "fig-distribution-R-L-R-L-R",
                 "fig-device", "fig-current"):
        for ext in (".pdf", ".png", ".csv"):
            assert f"figures/{stem}{ext}" in files
    assert (folder / "config.toml").read_text() == text
    with xr.open_dataset(folder / "summary.nc") as ds:
        xr.testing.assert_allclose(ds["mean"], summary["mean"])
        assert list(ds["quantised"].values) == list(summary["quantised"].values)
    prov = json.loads((folder / "provenance.json").read_text())
    assert prov["run"]["root_seed"] == 1234
    assert prov["run"]["config_hash"] == summary.attrs["config_hash"]
    assert prov["samples"] == {"done": 8, "failed": 0, "missing": 0, "total": 8}
    assert prov["realisations"]["requested"] == 2
    assert prov["sessions"] and prov["sessions"][0]["kwant"]
    assert prov["environment_at_export"]["kwant_solver"] in ("mumps", "scipy")
    (entry,) = load_lstar(folder / "lstar.json")  # the one L* schema of the project
    assert entry.measurement == "G(L,R)" and entry.lstar > 0
    assert (folder / "lstar.txt").read_text().startswith("L* of G(L,R)")
    readme = (folder / "README.md").read_text()
    assert "model estimates" in readme and "xr.open_dataset" in readme
    for name in files:
        if not name.startswith("figures/"):
            assert name in readme, name


def test_manifest_verifies_and_then_catches_tampering(package, tmp_path):
    folder, zpath = package
    assert verify_package(folder) == []
    assert verify_package(zpath) == []
    manifest = (folder / "MANIFEST.sha256").read_text().splitlines()
    listed = {line.split("  ", 1)[1] for line in manifest}
    assert "MANIFEST.sha256" not in listed and "summary.nc" in listed
    assert all(len(line.split("  ", 1)[0]) == 64 for line in manifest)
    # tamper with a copy: one changed byte, one added file, one removed file
    copy = tmp_path / folder.name
    shutil.copytree(folder, copy)
    with open(copy / "summary.csv", "a") as fh:
        fh.write("1\n")
    problems = verify_package(copy)
    assert len(problems) == 1 and "summary.csv" in problems[0]
    (copy / "extra.txt").write_text("x")
    (copy / "figures" / "fig-device.png").unlink()
    problems = verify_package(copy)
    assert any("extra.txt" in p for p in problems)
    assert any("fig-device.png" in p and "missing" in p for p in problems)
    # and a zip whose entry was changed after the manifest was made
    bad = tmp_path / "bad.zip"
    with zipfile.ZipFile(zpath) as src, zipfile.ZipFile(bad, "w") as dst:
        for info in src.infolist():
            data = src.read(info)
            if info.filename.endswith("/methods.md"):
                data = data.replace(b"Kwant", b"Kvant")
            dst.writestr(info, data)
    problems = verify_package(bad)
    assert len(problems) == 1 and "methods.md" in problems[0]


def test_zip_entries_are_relative_under_one_folder(package, tmp_path):
    folder, zpath = package
    with zipfile.ZipFile(zpath) as zf:
        names = zf.namelist()
    assert names
    for n in names:
        assert not n.startswith("/") and ".." not in n.split("/") and "\\" not in n
        assert n.split("/", 1)[0] == folder.name
    on_disk = {f"{folder.name}/{p.relative_to(folder).as_posix()}"
               for p in folder.rglob("*") if p.is_file()}
    assert set(names) == on_disk
    evil = tmp_path / "evil.zip"
    with zipfile.ZipFile(evil, "w") as zf:
        zf.writestr("package-x/MANIFEST.sha256", "")
        zf.writestr("package-x/../escape.txt", "x")
    assert any("not a safe relative path" in p for p in verify_package(evil))


def test_out_dir_outside_the_run_is_refused(run_dir, tmp_path):
    path, summary, _ = run_dir
    with pytest.raises(ExportError, match="outside the run directory"):
        make_package(path, out_dir=tmp_path / "elsewhere", summary=summary, figures=[])
    with pytest.raises(ExportError, match="outside the run directory"):
        make_package(path, out_dir=path / ".." / "sneaky", summary=summary, figures=[])
    link = path / "link-out"
    link.symlink_to(tmp_path, target_is_directory=True)
    try:
        with pytest.raises(ExportError, match="outside the run directory"):
            make_package(path, out_dir=link / "pkg", summary=summary, figures=[])
    finally:
        link.unlink()
    assert not (tmp_path / "elsewhere").exists() and not list(tmp_path.glob("**/package-*"))
    # inside the run directory is fine
    folder, zpath = make_package(path, out_dir=path / "exports", summary=summary, figures=[])
    assert folder.parent == (path / "exports").resolve() and zpath.is_file()
    assert verify_package(zpath) == []


def summary_attrs(run_dir):
    return dict(run_dir[1].attrs)


def test_methods_paragraph_names_the_configured_values(package, run_dir):
    folder, _ = package
    text = (folder / "methods.md").read_text()
    for fragment in ("A = 364.5 meV nm", "B = -686 meV nm^2", "C = 0 meV", "D = -512 meV nm^2",
                     "M = -10 meV", "Koenig et al.", "lattice constant a = 5 nm",
                     "width = 40 nm", "length was swept over 60 and 90 nm",
                     "shifted down by 25 meV", "width U = 30 meV", "root seed 1234",
                     "2 disorder realisations", "Landauer-Buttiker", "Kwant 1.5.0",
                     "bootstrap", "model estimates"):
        assert fragment in text, fragment
    if "bootstrap_resamples" in summary_attrs(run_dir):
        assert f"{summary_attrs(run_dir)['bootstrap_resamples']} resamples" in text
    # generated from the configuration, not fixed text: another value shows up
    path, summary, _ = run_dir
    run = load_run(path, summary)
    cfg = run.config.model_copy(update={"lattice": run.config.lattice.model_copy(
        update={"constant": 2.5})})
    other = methods_text(type(run)(cfg, run.samples, run.summary, run.store_path))
    assert "lattice constant a = 2.5 nm" in other


def test_an_existing_package_is_never_overwritten(package, run_dir):
    folder, zpath = package
    path, summary, _ = run_dir
    before = (folder / "MANIFEST.sha256").read_bytes()
    zip_before = zpath.read_bytes()
    again, zagain = make_package(path, summary=summary, figures=[])
    assert again.name == "package-pkg-2" and zagain.name == "package-pkg-2.zip"
    assert (folder / "MANIFEST.sha256").read_bytes() == before
    assert zpath.read_bytes() == zip_before
    assert verify_package(folder) == [] and verify_package(zagain) == []
    third, _ = make_package(path, summary=summary, figures=[])
    assert third.name == "package-pkg-3"
    assert not list(path.glob(".package-*"))  # no partial folders left behind
