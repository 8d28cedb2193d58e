"""A store written by this version stays readable, and a store of another format version is
refused with what it is and what to do (docs/store-format.md).

The committed store ``tests/data/store-format-1/samples.zarr`` was written by helisweep 0.1.0
(format 1) with ``tests/data/make_format_store.py``; ``expected.json`` beside it holds its
values as read with zarr alone at the time. Tests work on copies: the committed store is
never opened for writing.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import zarr

import pipeline.sweep.clusters as clusters
import pipeline.sweep.storeformat as storeformat
from pipeline.analysis.samples import open_samples
from pipeline.analysis.summary import SUMMARY_DIMS, summarize
from pipeline.cli.main import main
from pipeline.errors import StoreError
from pipeline.sweep.config import parse_config
from pipeline.sweep.store import SampleStore
from pipeline.sweep.storeformat import STORE_FORMAT, parse_format

DATA = Path(__file__).resolve().parent / "data" / "store-format-1"
EXPECTED = json.loads((DATA / "expected.json").read_text())


@pytest.fixture
def store_copy(tmp_path):
    """A copy of the committed format-1 store in ``tmp_path/run/samples.zarr``."""
    dest = tmp_path / "run" / "samples.zarr"
    shutil.copytree(DATA / "samples.zarr", dest)
    return dest


def _config_file(tmp_path, store: Path) -> Path:
    """The store's own config text, its run directory pointing at the store's directory."""
    text = dict(zarr.open_group(str(store), mode="r").attrs)["config_text"]
    text = text.replace('directory = "runs/{name}"', f'directory = "{store.parent}"')
    path = tmp_path / "format-store.toml"
    path.write_text(text)
    return path


def _set_attrs(store: Path, **attrs) -> None:
    group = zarr.open_group(str(store), mode="r+", use_consolidated=False)
    group.attrs.update(attrs)


def _no_cluster(monkeypatch):
    def refuse(*args, **kwargs):
        raise AssertionError("a cluster was started for a store that must be refused first")

    monkeypatch.setattr(clusters, "make_client", refuse)


def _root_metadata(store: Path) -> bytes:
    return (store / "zarr.json").read_bytes()


# --------------------------------------------------------------------------- reading
def test_the_committed_store_is_of_format_1_written_by_a_recorded_version():
    attrs = dict(zarr.open_group(str(DATA / "samples.zarr"), mode="r").attrs)
    assert attrs["format"] == EXPECTED["format"] == "helisweep-samples/1"
    assert attrs["sessions"][-1]["helisweep"] == EXPECTED["helisweep"]
    size = sum(p.stat().st_size for p in (DATA / "samples.zarr").rglob("*") if p.is_file())
    assert size < 200_000  # kept small on purpose


def test_todays_reader_reads_the_samples_of_the_format_1_store(store_copy):
    store = SampleStore.open(store_copy)
    status = np.asarray(EXPECTED["status"])
    assert store.counts()["done"] == int((status == 1).sum()) == status.size
    ds, _ = open_samples(store_copy)  # checksums verified, lazily read
    assert list(ds["measurements"].dims) == EXPECTED["dims"]
    assert ds["measurement"].values.tolist() == EXPECTED["measurement_labels"]
    assert ds["lead"].values.tolist() == EXPECTED["leads"]
    assert ds["geometry"].values.tolist() == EXPECTED["geometry"]
    assert ds["energy"].values.tolist() == EXPECTED["energy"]
    # bitwise the values the store held when written (JSON keeps every bit of a float64)
    np.testing.assert_array_equal(ds["measurements"].values, np.asarray(EXPECTED["measurements"]))
    np.testing.assert_array_equal(ds["status"].values, status)


def test_todays_summary_of_the_format_1_store(store_copy):
    summary = summarize(store_copy, bootstrap_resamples=200)
    mean = summary["mean"].transpose(*SUMMARY_DIMS).values
    # the mean over done samples, computed with NumPy from the raw arrays when the store was made
    np.testing.assert_allclose(mean, np.asarray(EXPECTED["mean_of_done"]), rtol=1e-12, atol=0)
    np.testing.assert_array_equal(summary["n_samples"].transpose(*SUMMARY_DIMS).values,
                                  np.asarray(EXPECTED["done_per_point"]))
    # the ideal values rebuilt from the stored config: a strip's two helical edges give
    # G = 2 e^2/h and two-terminal R = h/2e^2.
    # Source: Kane & Mele, Phys. Rev. Lett. 95, 226801 (2005) (one Kramers pair per edge);
    # Koenig et al., Science 318, 766 (2007) (2e^2/h measured in short HgTe wells)
    assert summary["quantised"].values.tolist() == [2.0, 0.5]


def test_status_of_the_format_1_store_through_the_command_line(store_copy, capsys):
    assert main(["status", str(store_copy)]) == 0
    out = capsys.readouterr().out
    assert "12 done, 0 failed, 0 missing of 12 samples" in out
    assert "store format" not in out  # this version's own format: no note


# --------------------------------------------------------------------------- other versions
def test_a_newer_store_is_refused_by_status_report_and_run_with_what_to_do(
        tmp_path, store_copy, capsys, monkeypatch):
    sessions = dict(zarr.open_group(str(store_copy), mode="r").attrs)["sessions"]
    _set_attrs(store_copy, format="helisweep-samples/2",
               sessions=sessions + [{"started": "2031-01-01T00:00:00+00:00", "helisweep": "9.1.0"}])
    config = _config_file(tmp_path, store_copy)
    before = _root_metadata(store_copy)
    _no_cluster(monkeypatch)
    for argv in (["status", str(store_copy)], ["status", str(config)],
                 ["report", str(config), "--quiet"], ["run", str(config), "--quiet"]):
        assert main(argv) == 2, argv
        err = capsys.readouterr().err
        assert err.startswith("helisweep: error: "), (argv, err)
        for part in ("format 'helisweep-samples/2'", "written by helisweep 9.1.0",
                     "newer than this helisweep", "reads format version(s) 1",
                     "pip install --upgrade helisweep", "--fresh", "never deleted"):
            assert part in err, (argv, part, err)
    assert _root_metadata(store_copy) == before  # refused, not touched


def test_an_older_unknown_store_names_the_version_that_wrote_it(store_copy):
    _set_attrs(store_copy, format="helisweep-samples/0")
    with pytest.raises(StoreError) as err:
        SampleStore.open(store_copy)
    msg = str(err.value)
    assert "older than any format this helisweep knows" in msg
    assert "read or resume it with helisweep 0.1.0" in msg and "--fresh" in msg
    # a store whose sessions do not record the version still says when it was made
    _set_attrs(store_copy, sessions=[{"started": "2025-01-01T00:00:00+00:00"}])
    with pytest.raises(StoreError, match=r"an earlier helisweep \(its sessions do not record "
                                         r"which version; the store was created 20"):
        SampleStore.open(store_copy)


def test_fresh_moves_a_store_of_another_version_aside_and_never_deletes_it(tmp_path, store_copy):
    _set_attrs(store_copy, format="helisweep-samples/2")
    cfg = parse_config(_config_file(tmp_path, store_copy).read_text(), base_dir=tmp_path)
    with pytest.raises(StoreError, match="newer than this helisweep"):
        SampleStore.check_resume(store_copy, cfg)
    SampleStore.check_resume(store_copy, cfg, fresh=True)  # nothing refused before the cluster
    new = SampleStore.open_for_run(store_copy, cfg, ("L", "R"), provenance={}, fresh=True)
    new.release_lock()
    (aside,) = store_copy.parent.glob("samples.zarr.replaced-*")
    assert dict(zarr.open_group(str(aside), mode="r").attrs)["format"] == "helisweep-samples/2"
    assert (aside / "measurements").is_dir()  # the old samples are all still there
    assert dict(new.group.attrs)["format"] == STORE_FORMAT
    assert new.counts()["done"] == 0


def test_an_older_readable_store_is_read_but_not_resumed(tmp_path, store_copy, capsys,
                                                         monkeypatch):
    # a later helisweep that writes format 2 and still reads format 1
    monkeypatch.setattr(storeformat, "STORE_FORMAT_VERSION", 2)
    monkeypatch.setattr(storeformat, "READABLE_VERSIONS",
                        {**storeformat.READABLE_VERSIONS, 2: "the next layout"})
    assert main(["status", str(store_copy)]) == 0
    out = capsys.readouterr().out
    assert "12 done" in out
    assert "store format 'helisweep-samples/1' (older than this helisweep's 2): readable" in out
    assert "finish the run with helisweep 0.1.0" in out
    assert summarize(store_copy, bootstrap_resamples=0)["n_samples"].values.min() == 3
    cfg = parse_config(_config_file(tmp_path, store_copy).read_text(), base_dir=tmp_path)
    with pytest.raises(StoreError) as err:
        SampleStore.check_resume(store_copy, cfg)
    msg = str(err.value)
    assert "reads it (status, report) but writes only format 2" in msg
    assert "Finish the run with helisweep 0.1.0" in msg and "--fresh" in msg
    with pytest.raises(StoreError, match="writes only format 2"):
        SampleStore.open(store_copy, mode="r+")


def test_a_zarr_group_of_something_else_is_not_taken_for_a_sample_store(tmp_path, store_copy,
                                                                        capsys):
    _set_attrs(store_copy, format="someone-elses-data/3")
    assert main(["status", str(store_copy)]) == 2
    assert "is not a helisweep sample store (format 'someone-elses-data/3'" in capsys.readouterr().err
    cfg = parse_config(_config_file(tmp_path, store_copy).read_text(), base_dir=tmp_path)
    with pytest.raises(StoreError, match="is not a helisweep sample store"):
        # --fresh moves only helisweep stores aside, never someone else's data
        SampleStore.open_for_run(store_copy, cfg, ("L", "R"), provenance={}, fresh=True)
    assert not list(store_copy.parent.glob("samples.zarr.replaced-*"))
    empty = tmp_path / "empty.zarr"
    empty.mkdir()
    assert main(["status", str(empty)]) == 2
    assert "is not a readable sample store" in capsys.readouterr().err


@pytest.mark.parametrize("text, name, version", [
    ("helisweep-samples/1", "helisweep-samples", 1),
    ("helisweep-samples/12", "helisweep-samples", 12),
    (" helisweep-samples/2 ", "helisweep-samples", 2),
    ("helisweep-samples", None, None),
    ("helisweep-samples/1.5", None, None),
    ("helisweep-samples/one", None, None),
    (None, None, None),
    (1, None, None),
])
def test_format_attribute_is_taken_apart(text, name, version):
    fmt = parse_format(text)
    assert (fmt.name, fmt.version) == (name, version)
    assert fmt.is_samples == (name == "helisweep-samples")
