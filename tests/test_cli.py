"""The command line: warnings as one line, and `report` that computes nothing unless asked."""

from __future__ import annotations

import pytest

import pipeline.sweep.clusters as clusters
from pipeline.cli.main import main
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.store import SampleStore


def test_warning_reaches_the_command_line_as_one_plain_line(tmp_path, tiny_config_text, capsys):
    config = tmp_path / "old-key.toml"
    config.write_text(tiny_config_text(**{"labels = [": "report = ["}))
    assert main(["status", str(config)]) == 2  # no store yet: an error, after the warning
    err = capsys.readouterr().err
    warning = [line for line in err.splitlines() if line.startswith("helisweep: warning:")]
    assert len(warning) == 1 and "'[measure] report' is deprecated" in warning[0]
    assert ".py" not in err  # no Python file and line number


def test_report_without_run_computes_nothing(tmp_path, tiny_config_text, capsys, monkeypatch):
    def no_cluster(*args, **kwargs):
        raise AssertionError("report without --run started a cluster")

    monkeypatch.setattr(clusters, "make_client", no_cluster)
    config = tmp_path / "tiny.toml"
    config.write_text(tiny_config_text())
    assert main(["report", str(config), "--quiet"]) == 2
    assert "run the sweep first" in capsys.readouterr().err
    assert not (tmp_path / "run" / "samples.zarr").exists()


@pytest.mark.slow
def test_report_of_a_slurm_config_reads_the_store_and_starts_no_cluster(
        tmp_path, tiny_config_text, dask_clients, monkeypatch):
    text = tiny_config_text(realisations=2)
    store = run_sweep(parse_config(text), client=dask_clients[2],
                      store_path=tmp_path / "run" / "samples.zarr", progress=False)
    before = store.counts()

    def no_cluster(*args, **kwargs):
        raise AssertionError("report without --run started a cluster")

    monkeypatch.setattr(clusters, "make_client", no_cluster)
    config = tmp_path / "slurm.toml"  # the [cluster] table does not change the samples
    config.write_text(text + '\n[cluster]\nkind = "slurm"\npartition = "compute"\n')
    assert main(["report", str(config), "--quiet"]) == 0
    assert SampleStore.open(store.path).counts() == before
    assert (tmp_path / "run" / "summary.nc").is_file()
    assert list((tmp_path / "run").glob("package-*.zip"))


def test_report_refuses_workers_without_run(tmp_path, tiny_config_text, capsys):
    config = tmp_path / "tiny.toml"
    config.write_text(tiny_config_text())
    assert main(["report", str(config), "--workers", "2"]) == 2
    assert "only with --run" in capsys.readouterr().err


@pytest.mark.slow
def test_report_without_run_does_not_compute_segment_pools(tmp_path, tiny_config_text,
                                                          dask_clients, capsys):
    text = tiny_config_text(realisations=2)
    store = tmp_path / "run" / "samples.zarr"
    run_sweep(parse_config(text), client=dask_clients[2], store_path=store, progress=False)
    config = tmp_path / "long.toml"  # the [concatenation] table does not change the samples
    config.write_text(text + "\n[concatenation]\nsegment_length = 60.0\nsegments = 4\n"
                             "lengths = [60.0, 120.0]\nsequences = 10\n")
    assert main(["report", str(config), "--quiet"]) == 2
    assert "--run" in capsys.readouterr().err
    assert not (store / "segments").exists()


def test_installed_command_runs(capsys):
    """The ``helisweep`` console script the README uses resolves to the command's function."""
    import subprocess
    import sys
    from importlib.metadata import entry_points
    from pathlib import Path

    (ep,) = entry_points(group="console_scripts", name="helisweep")
    assert ep.load() is main
    script = Path(sys.executable).with_name("helisweep")
    if script.exists():  # installed into the interpreter's environment (the README's route)
        out = subprocess.run([str(script), "--help"], capture_output=True, text=True, timeout=120)
        assert out.returncode == 0, out.stderr
        assert "report" in out.stdout
