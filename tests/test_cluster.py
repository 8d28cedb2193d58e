"""Cluster settings, SLURMCluster job scripts and batch-mode scripts -- no Slurm needed.

Most tests assert on generated text: the ``#SBATCH`` directives of dask-jobqueue's job
script, and the batch-mode script with awkward paths and names (checked with ``bash -n``, by
letting bash evaluate the quoted values, and by parsing them back with ``shlex.split``,
which follows the same rules as sbatch's reading of ``#SBATCH`` lines). Two tests run the
batch script's logic for real without Slurm, with a stand-in ``srun``.
"""

import argparse
import dataclasses
import json
import os
import shlex
import shutil
import subprocess
import sys
import warnings
from pathlib import Path

import pytest
from conftest import assert_same_samples, store_arrays

import pipeline.sweep.clusters as cl
from pipeline.cli.main import main
from pipeline.cli.slurm import add_cluster_options, cluster_overrides
from pipeline.errors import ConfigError, HelisweepError
from pipeline.sweep.clusters import (
    DEFAULTS,
    ClusterError,
    SharedPathWarning,
    make_client,
    render_batch_script,
    resolve_cluster_settings,
    slurm_cluster,
    submit_batch_script,
)
from pipeline.sweep.config import ClusterSection, parse_config
from pipeline.sweep.driver import run_in_allocation, run_on_cluster, run_sweep

#: a directory/file name with a space, both quotes, $, ;, a backquote and a glob
AWKWARD = "a b'c\"d$HOME;e`id`*"
SITE_TOML = """
[cluster]
partition = "site-part"
account = "site-acct"
walltime = "04:00:00"
memory = "16GB"
cores = 8
interface = "ib0"
extra_directives = ["--qos=site"]
"""


@pytest.fixture(autouse=True)
def _no_site_file(tmp_path, monkeypatch):
    """Keep the developer's own site file and $HELISWEEP_SITE_CONFIG out of the tests."""
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    monkeypatch.delenv(cl.SITE_CONFIG_ENV, raising=False)


def _slurm(**overrides):
    return resolve_cluster_settings(None, {"kind": "slurm", **overrides})


def _sbatch_options(text):
    """{option: value} of the #SBATCH lines, parsed as sbatch does (shell quoting rules)."""
    out = {}
    for line in text.splitlines():
        if line.startswith("#SBATCH "):
            words = shlex.split(line[len("#SBATCH "):])
            if words[0].startswith("--"):  # ours: one --option=value word per line
                assert len(words) == 1, f"one option per line, got {words!r} from {line!r}"
                key, _, value = words[0].partition("=")
            else:  # dask-jobqueue's own short options: "-t 00:10:00"
                assert len(words) == 2, words
                key, value = words
            out[key] = value
    return out


def _write_config(directory: Path, text: str, name="tiny run.toml") -> Path:
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / name
    path.write_text(text)
    return path


def _quiet_render(*args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)  # tmp_path is under /tmp
        return render_batch_script(*args, **kwargs)


# =========================================================================== job scripts
def test_slurmcluster_job_script_has_directives_resources_and_thread_limits(tmp_path):
    # the TLS credential paths go unquoted on the worker command line (dask-jobqueue), so a
    # shared directory that a shell would split or expand is refused before anything starts
    awkward = _slurm(shared_directory=str(tmp_path / AWKWARD), interface="lo")
    with pytest.raises(ConfigError, match="cannot go unquoted on the workers' command line"):
        slurm_cluster(awkward, job_name="helisweep-tiny")
    shared = tmp_path / "shared, plain"[:6]
    s = _slurm(partition="debug", account="proj-7", walltime="02:30:00", memory="8GB", cores=4,
               extra_directives=["--qos=long", "--constraint=avx2"], interface="lo",
               shared_directory=str(shared))
    cluster = slurm_cluster(s, job_name="helisweep-tiny")
    try:
        text = cluster.job_script()
    finally:
        cluster.close()
    lines = text.splitlines()
    sbatch = [line for line in lines if line.startswith("#SBATCH")]
    for want in ("#SBATCH -J helisweep-tiny", "#SBATCH --partition=debug",
                 "#SBATCH --account=proj-7", "#SBATCH -t 02:30:00", "#SBATCH --cpus-per-task=4",
                 "#SBATCH --mem=8G", "#SBATCH -n 1", "#SBATCH --qos=long",
                 "#SBATCH --constraint=avx2"):
        assert want in sbatch, (want, sbatch)
    # log paths are quoted and point into the shared directory (created)
    opts = _sbatch_options(text)
    assert opts["--output"] == str(shared / "logs" / "helisweep-tiny-%j.out")
    assert opts["--error"] == str(shared / "logs" / "helisweep-tiny-%j.err")
    assert (shared / "logs").is_dir()
    # one single-threaded worker process per core, on the requested interface
    worker = [line for line in lines if "distributed.cli.dask_worker" in line]
    assert len(worker) == 1
    argv = shlex.split(worker[0])
    assert argv[0] == sys.executable
    arg = {k: v for k, v in zip(argv, argv[1:])}
    assert arg["--nthreads"] == "1" and arg["--nworkers"] == "4"
    assert arg["--interface"] == "lo"
    # TLS: the workers get the run's credentials, owner-only, under the shared directory
    assert arg["--protocol"] == "tls://"
    for flag in ("--tls-ca-file", "--tls-cert", "--tls-key"):
        path = Path(arg[flag])
        assert path.parent == shared / "credentials"
    key = Path(arg["--tls-key"])
    assert oct(key.stat().st_mode & 0o777) == "0o600"
    assert oct((shared / "credentials").stat().st_mode & 0o777) == "0o700"
    from dask.utils import parse_bytes

    assert parse_bytes(arg["--memory-limit"]) == pytest.approx(2e9, rel=0.01)
    # workers retire 10 minutes before the 2.5 h walltime (adaptive scaling replaces them)
    assert arg["--lifetime"] == "8400s"
    # BLAS/OpenMP limited before the worker starts
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        assert lines.index(f"export {var}=1") < lines.index(worker[0])
    subprocess.run(["bash", "-n"], input=text, text=True, check=True)


def test_job_script_ignores_dask_jobqueue_config_for_queue_account_and_logs(tmp_path):
    import dask

    s = _slurm(partition="mine", shared_directory=str(tmp_path / "sh"), interface="lo")
    with dask.config.set({"jobqueue.slurm.queue": "theirs", "jobqueue.slurm.account": "acct",
                          "jobqueue.slurm.log-directory": str(tmp_path / "dask-logs")}):
        cluster = slurm_cluster(s)
        try:
            text = cluster.job_script()
        finally:
            cluster.close()
    assert "theirs" not in text and "acct" not in text and "dask-logs" not in text
    assert _sbatch_options(text)["--partition"] == "mine"


def test_short_walltime_has_no_worker_lifetime(tmp_path):
    opts = cl.slurm_cluster_options(_slurm(walltime="00:05:00", shared_directory=str(tmp_path)))
    assert opts["worker_extra_args"] == []
    assert opts["processes"] == opts["cores"] == 1


def test_worker_job_name_must_be_simple(tmp_path):
    with pytest.raises(ConfigError, match="job name 'a b'"):
        cl.slurm_cluster_options(_slurm(shared_directory=str(tmp_path)), job_name="a b")


# =========================================================================== batch script
def test_batch_script_quotes_awkward_paths_and_names(tmp_path, tiny_config_text, monkeypatch):
    d = tmp_path / AWKWARD
    cfg_path = _write_config(d, tiny_config_text())
    store = d / "st ore$1;.zarr"
    shared = d / "shared dir"
    job_name = "it's \"my\" $job; rm -rf ~ #1"
    monkeypatch.chdir(d)
    s = _slurm(partition="p$1;x", account="a'b", interface="lo", cores=2, jobs=3,
               memory="4GB", walltime="1-00:00:00", shared_directory=str(shared),
               extra_directives=["--qos=long", "--comment='two words'"])
    text = _quiet_render(cfg_path, s, store_path=store, job_name=job_name)

    subprocess.run(["bash", "-n"], input=text, text=True, check=True)
    opts = _sbatch_options(text)
    assert opts["--job-name"] == job_name
    assert opts["--partition"] == "p$1;x" and opts["--account"] == "a'b"
    assert opts["--output"] == str(shared / "logs" / "helisweep-batch-%j.out")
    assert opts["--ntasks"] == "6" and opts["--cpus-per-task"] == "1"
    assert opts["--mem-per-cpu"] == "1908M"  # 4 GB per job of 2 cores = 2e9 bytes per worker
    assert opts["--time"] == "1-00:00:00" and opts["--qos"] == "long"
    assert opts["--comment"] == "two words"

    # let bash evaluate the values block: every value comes back exactly
    lines = text.splitlines()
    block = "\n".join(lines[lines.index("# ---- values (each quoted for the shell) ----"):
                            lines.index("# ---- end of values ----")])
    probe = block + '\nprintf "%s\\0" "$WORKDIR" "$CONFIG" "$SHARED" "$PYTHON" "${DRIVER_ARGS[@]}" "${INTERFACE_ARGS[@]}"'
    out = subprocess.run(["bash", "-euc", probe], capture_output=True, text=True, check=True,
                         env={"PATH": os.environ["PATH"], "HOME": "/nonexistent"})
    assert out.stdout.split("\0")[:-1] == [
        str(d), str(cfg_path), str(shared), sys.executable, "--store", str(store),
        "--interface", "lo"]
    # and shlex reads the same values from the assignment lines
    assign = dict(shlex.split(line)[0].split("=", 1) for line in block.splitlines()
                  if "=" in line and not line.startswith(("#", "INTERFACE_ARGS", "DRIVER_ARGS")))
    assert assign["CONFIG"] == str(cfg_path) and assign["WORKDIR"] == str(d)
    # the body uses only quoted expansions of the values
    assert "cd \"$WORKDIR\"" in text and "rm -rf \"$SCHEDULER_FILE\" \"$CREDENTIALS\"" in text


def test_batch_script_defaults_and_requeue(tmp_path, tiny_config_text, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    s = _slurm(shared_directory=str(tmp_path / "sh"), requeue=True)
    text = _quiet_render(cfg_path, s, store_path=None, job_name=None)
    opts = _sbatch_options(text)
    assert opts["--job-name"] == "helisweep-tiny" and opts["--ntasks"] == "1"
    assert "--requeue" in opts and opts["--open-mode"] == "append"
    assert "--partition" not in opts and "--account" not in opts
    assert "DRIVER_ARGS=()" in text and "INTERFACE_ARGS=()" in text
    subprocess.run(["bash", "-n"], input=text, text=True, check=True)


@pytest.mark.parametrize("name", ["two\nlines", "", "nul\0"])
def test_batch_job_name_on_one_line(tmp_path, tiny_config_text, name):
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    with pytest.raises(ConfigError, match="job name"):
        _quiet_render(cfg_path, _slurm(shared_directory=str(tmp_path)), store_path=None,
                      job_name=name)


def test_store_on_node_local_directory_warns(tmp_path, tiny_config_text, monkeypatch):
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    monkeypatch.chdir(tmp_path)
    s = _slurm(shared_directory="/nonexistent-shared/helisweep")
    with pytest.warns(SharedPathWarning, match="the store '/tmp/x.zarr'"):
        render_batch_script(cfg_path, s, store_path="/tmp/x.zarr", job_name="j")
    for store in ("/tmp", "/dev/shm/a", "/var/tmp/b.zarr"):  # node-local directories
        with pytest.warns(SharedPathWarning, match=f"the store '{store}'"):
            render_batch_script(cfg_path, s, store_path=store, job_name="j")
    for store in ("/nonexistent-shared/x.zarr", "/tmpfoo/a", "/home/u/runs"):  # shared
        with warnings.catch_warnings():
            warnings.simplefilter("error", SharedPathWarning)
            render_batch_script(cfg_path, s, store_path=store, job_name="j")


def test_template_placeholders_must_match(tmp_path, tiny_config_text):
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    bad = tmp_path / "site.sbatch.template"
    bad.write_text(cl.batch_template_path().read_text() + "\n# @SOMETHING_NEW@\n")
    with pytest.raises(ClusterError, match="SOMETHING_NEW"):
        _quiet_render(cfg_path, _slurm(shared_directory=str(tmp_path)), store_path=None,
                      template=bad)
    with pytest.raises(ClusterError, match="cannot read"):
        _quiet_render(cfg_path, _slurm(shared_directory=str(tmp_path)), store_path=None,
                      template=tmp_path / "missing.template")


# =========================================================================== settings
def _config_with_cluster(tiny_config_text, table: str):
    return parse_config(tiny_config_text() + "\n[cluster]\n" + table)


def test_precedence_overrides_config_site_defaults(tmp_path, tiny_config_text):
    site = tmp_path / "site.toml"
    site.write_text(SITE_TOML)
    cfg = _config_with_cluster(tiny_config_text, f"""
kind = "slurm"
partition = "cfg-part"
walltime = "02:00:00"
site_defaults = "{site}"
""")
    s = resolve_cluster_settings(cfg.cluster, {"walltime": "00:30:00", "cores": None})
    assert s.walltime == "00:30:00" and s.source_of("walltime") == "command line"
    assert s.partition == "cfg-part" and s.source_of("partition") == "config [cluster]"
    assert s.kind == "slurm"
    assert (s.account, s.cores, s.memory, s.interface) == ("site-acct", 8, "16GB", "ib0")
    assert s.extra_directives == ("--qos=site",)
    assert str(site) in s.source_of("account") and s.site_file == str(site)
    assert s.adaptive_maximum == DEFAULTS["adaptive_maximum"]
    assert s.source_of("adaptive_maximum") == "default"
    assert s.python == sys.executable
    assert "walltime = '00:30:00'  (command line)" in s.describe()


def test_site_file_lookup_order(tmp_path, tiny_config_text, monkeypatch):
    home_site = tmp_path / "home" / ".config" / "helisweep" / "site.toml"
    home_site.parent.mkdir(parents=True)
    home_site.write_text('[cluster]\npartition = "from-home"\n')
    assert resolve_cluster_settings(None, {}).partition == "from-home"
    env_site = tmp_path / "env.toml"
    env_site.write_text('[cluster]\npartition = "from-env"\n')
    monkeypatch.setenv(cl.SITE_CONFIG_ENV, str(env_site))
    assert resolve_cluster_settings(None, {}).partition == "from-env"
    cfg_site = tmp_path / "cfg.toml"
    cfg_site.write_text('[cluster]\npartition = "from-config-named-file"\n')
    cfg = _config_with_cluster(tiny_config_text, f'site_defaults = "{cfg_site}"\n')
    assert resolve_cluster_settings(cfg.cluster, {}).partition == "from-config-named-file"
    cli_site = tmp_path / "cli.toml"
    cli_site.write_text('[cluster]\npartition = "from-cli-named-file"\n')
    s = resolve_cluster_settings(cfg.cluster, {"site_defaults": str(cli_site)})
    assert s.partition == "from-cli-named-file"


def test_config_keys_count_only_when_written(tmp_path, tiny_config_text, monkeypatch):
    site = tmp_path / "site.toml"
    site.write_text(SITE_TOML + 'kind = "slurm"\n')
    monkeypatch.setenv(cl.SITE_CONFIG_ENV, str(site))
    # no [cluster] table: the config's built-in defaults do not hide the site file
    s = resolve_cluster_settings(parse_config(tiny_config_text()).cluster, {})
    assert s.kind == "slurm" and s.extra_directives == ("--qos=site",)
    # written explicitly, even an empty list or the default kind wins over the site file
    cfg = _config_with_cluster(tiny_config_text, 'kind = "local"\nextra_directives = []\n')
    s = resolve_cluster_settings(cfg.cluster, {})
    assert s.kind == "local" and s.extra_directives == ()


class _BoundsLogCluster:
    """Stands in for a SLURMCluster: notes the bounds ``make_client`` gives ``adapt``."""

    def __init__(self):
        self.bounds = None
        self.closed = False

    def adapt(self, *, minimum_jobs, maximum_jobs):
        self.bounds = (minimum_jobs, maximum_jobs)

    def job_script(self):
        return "#!/bin/bash\n"

    def close(self):
        self.closed = True


class _IdleClient:
    """Stands in for a Dask client of that stand-in cluster (nothing to connect to)."""

    def __init__(self, cluster):
        self.cluster = cluster

    def close(self):
        pass


def _adapt_bounds(settings, n_workers_hint, monkeypatch):
    """(minimum_jobs, maximum_jobs) with which make_client scales a Slurm cluster of these
    settings (whatever their kind)."""
    cluster = _BoundsLogCluster()
    monkeypatch.setattr(cl, "slurm_cluster", lambda settings, job_name: cluster)
    monkeypatch.setattr("dask.distributed.Client", _IdleClient)
    monkeypatch.setattr(cl, "probe_submission", lambda script, settings, timeout: None)
    _, close = make_client(dataclasses.replace(settings, kind="slurm"),
                           n_workers_hint=n_workers_hint)
    close()
    assert cluster.closed
    return cluster.bounds


def test_highest_layer_with_a_scaling_key_chooses_fixed_or_adaptive(tmp_path, tiny_config_text,
                                                                   monkeypatch):
    site = tmp_path / "site.toml"
    site.write_text("[cluster]\njobs = 4\nadaptive_maximum = 20\n")
    cfg = _config_with_cluster(tiny_config_text,
                               f'adaptive_maximum = 6\nsite_defaults = "{site}"\n')
    s = resolve_cluster_settings(cfg.cluster, {})
    assert s.jobs is None and s.adaptive_maximum == 6 and s.adaptive_minimum == 1
    assert _adapt_bounds(s, 0, monkeypatch) == (1, 6)
    assert _adapt_bounds(s, 3, monkeypatch) == (1, 3)  # never more jobs than tasks
    s = resolve_cluster_settings(cfg.cluster, {"jobs": 3})
    assert s.jobs == 3 and _adapt_bounds(s, 0, monkeypatch) == (3, 3)
    s = resolve_cluster_settings(None, {"site_defaults": str(site)})
    assert s.jobs == 4 and s.max_workers == 4
    s = resolve_cluster_settings(None, {"site_defaults": str(site), "cores": 4})
    assert _adapt_bounds(s, 9, monkeypatch) == (3, 3)  # 9 tasks fill 3 jobs of 4 cores


def test_memory_defaults_to_two_gigabytes_per_core():
    s = _slurm(cores=3)
    assert s.memory == "6GB" and "per core" in s.source_of("memory")
    assert s.worker_memory_bytes == 2 * 10**9


def test_every_config_key_has_a_setting():
    assert set(ClusterSection.model_fields) - {"site_defaults"} <= set(DEFAULTS)


@pytest.mark.parametrize("overrides, match", [
    ({"walltime": "2h"}, r"'walltime' = '2h' from command line \(command line --walltime\) "
                         r"is not a walltime; give \"HH:MM:SS\""),
    ({"walltime": "00:61:00"}, "'00:61:00'.*HH:MM:SS"),
    ({"walltime": "00:00:00"}, "is zero"),
    ({"memory": "4 gigs"}, "'4 gigs'.*memory size"),
    ({"memory": "512MB", "cores": 4}, "at least 256MiB per core"),
    ({"cores": 0}, "'cores' = 0 .*outside 1..1024"),
    ({"cores": 2.5}, "'cores' = 2.5 .*whole number"),
    ({"jobs": True}, "'jobs' = True .*whole number"),
    ({"extra_directives": ["qos=long"]}, "'qos=long' is not a long sbatch option"),
    ({"extra_directives": ["--qos=long\n#SBATCH --mem=1TB"]}, "newline"),
    ({"extra_directives": "--qos=long"}, "list of strings"),
    ({"extra_directives": ["--comment=two words"]}, "not one option.*--comment='two words'"),
    ({"extra_directives": ["--comment=a#b"]}, "not one option"),
    ({"extra_directives": ["--comment='a"]}, "unbalanced quotes"),
    ({"partition": "my part"}, "'my part' .*one word"),
    ({"partition": "-x"}, "does not start with '-'"),
    ({"account": "a\nb"}, "newline"),
    ({"interface": "eth0; reboot"}, "not a network interface"),
    ({"shared_directory": "a\nb"}, "newline"),
    ({"kind": "pbs"}, "'pbs'.*\"local\" or \"slurm\""),
    ({"adaptive_minimum": 5, "adaptive_maximum": 2}, "above 'adaptive_maximum'"),
    ({"worker_timeout": -1}, "positive number of seconds"),
    ({"partiton": "x"}, "unknown cluster setting 'partiton'. Did you mean 'partition'"),
])
def test_bad_values_are_refused_with_the_value_and_the_fix(overrides, match):
    with pytest.raises(ConfigError, match=match) as info:
        _slurm(**overrides)
    assert isinstance(info.value, HelisweepError)


def test_bad_site_files_are_refused(tmp_path, tiny_config_text, monkeypatch):
    site = tmp_path / "site.toml"
    monkeypatch.setenv(cl.SITE_CONFIG_ENV, str(site))
    with pytest.raises(ConfigError, match="does not exist"):
        resolve_cluster_settings(None, {})
    site.write_text("[cluster]\nwalltme = '01:00:00'\n")
    with pytest.raises(ConfigError, match=r"site.toml.*'walltme'. Did you mean 'walltime'"):
        resolve_cluster_settings(None, {})
    site.write_text("partition = 'x'\n")
    with pytest.raises(ConfigError, match=r"outside a table; put them under \[cluster\]"):
        resolve_cluster_settings(None, {})
    site.write_text("[cluster\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        resolve_cluster_settings(None, {})
    site.write_text("[cluster]\nwalltime = '90 minutes'\n")
    with pytest.raises(ConfigError, match=r"'90 minutes' from site file .*site.toml"):
        resolve_cluster_settings(None, {})
    site.write_text("[cluster]\nsite_defaults = 'other.toml'\n")
    with pytest.raises(ConfigError, match="unknown cluster setting 'site_defaults'"):
        resolve_cluster_settings(None, {})


def test_settings_are_frozen():
    s = _slurm()
    with pytest.raises(AttributeError):
        s.cores = 4


# =========================================================================== command line
def test_run_options_become_overrides():
    p = argparse.ArgumentParser()
    add_cluster_options(p)
    args = p.parse_args(["--cluster", "slurm", "--cores", "2", "--walltime", "00:10:00",
                         "--directive=--qos=x", "--directive=--constraint=y"])
    assert cluster_overrides(args) == {"kind": "slurm", "cores": 2, "walltime": "00:10:00",
                                       "extra_directives": ["--qos=x", "--constraint=y"]}
    assert cluster_overrides(p.parse_args([])) == {}


def test_slurm_script_command_writes_a_valid_script(tmp_path, tiny_config_text, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    out = tmp_path / "job.sbatch"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        rc = main(["slurm-script", str(cfg_path), "--partition", "debug", "--cores", "2",
                      "--jobs", "3", "--walltime", "00:20:00", "--out", str(out),
                      "--shared-directory", str(tmp_path / "shared")])
    assert rc == 0
    text = out.read_text()
    opts = _sbatch_options(text)
    assert (opts["--ntasks"], opts["--partition"], opts["--time"]) == ("6", "debug", "00:20:00")
    assert (tmp_path / "shared" / "logs").is_dir()  # sbatch does not create the log directory
    subprocess.run(["bash", "-n", str(out)], check=True)
    rc = main(["slurm-script", str(cfg_path), "--walltime", "20 minutes"])
    assert rc == 2
    assert "'20 minutes'" in capsys.readouterr().err


def _fake_sbatch(tmp_path, monkeypatch, body: str) -> Path:
    bindir = tmp_path / "bin"
    bindir.mkdir(exist_ok=True)
    fake = bindir / "sbatch"
    fake.write_text("#!/bin/sh\n" + body)
    fake.chmod(0o755)
    monkeypatch.setenv("PATH", f"{bindir}{os.pathsep}{os.environ['PATH']}")
    return bindir


def test_submit_batch_script_parses_the_job_id(tmp_path, monkeypatch):
    log = tmp_path / "args"
    _fake_sbatch(tmp_path, monkeypatch, f'echo "$@" > {shlex.quote(str(log))}\necho "4242;local"\n')
    directory = tmp_path / AWKWARD
    assert submit_batch_script("#!/bin/bash\necho hi\n", directory) == "4242"
    flag, path = log.read_text().strip().split(" ", 1)
    assert flag == "--parsable" and Path(path).parent == directory
    assert Path(path).read_text() == "#!/bin/bash\necho hi\n"


def test_submit_batch_script_reports_sbatch_errors(tmp_path, monkeypatch):
    _fake_sbatch(tmp_path, monkeypatch,
                 'echo "sbatch: error: invalid partition specified: nope" >&2\nexit 1\n')
    with pytest.raises(ClusterError, match="invalid partition specified: nope"):
        submit_batch_script("#!/bin/bash\n", tmp_path / "d")
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    with pytest.raises(ClusterError, match="'sbatch' was not found"):
        submit_batch_script("#!/bin/bash\n", tmp_path / "d")


def test_slurm_script_submit_prints_the_job_id(tmp_path, tiny_config_text, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    _fake_sbatch(tmp_path, monkeypatch, 'echo 77\n')
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        assert main(["slurm-script", str(cfg_path), "--submit",
                        "--shared-directory", str(tmp_path / "sh")]) == 0
    assert "submitted batch job 77" in capsys.readouterr().out
    assert len(list((tmp_path / "sh").glob("helisweep-*.sbatch"))) == 1


def test_workers_option_is_refused_for_slurm(tiny_config_text):
    cfg = parse_config(tiny_config_text())
    with pytest.raises(ConfigError, match="--jobs and --cores"):
        run_on_cluster(cfg, {"kind": "slurm"}, workers=2)


# =========================================================================== running (no Slurm)
@pytest.fixture
def tiny_reference(tmp_path, tiny_config_text, dask_clients):
    """The tiny sweep (one realisation) run on the shared local cluster: the reference."""
    cfg = parse_config(tiny_config_text(realisations=1))
    run_sweep(cfg, client=dask_clients[2], store_path=tmp_path / "ref.zarr", progress=False)
    return store_arrays(tmp_path / "ref.zarr")


def test_local_kind_runs_through_make_client(tmp_path, tiny_config_text, tiny_reference):
    cfg = parse_config(tiny_config_text(realisations=1))
    store = run_on_cluster(cfg, {"kind": "local"}, workers=1, store_path=tmp_path / "l.zarr",
                           progress=False)
    assert_same_samples(store_arrays(store.path), tiny_reference)
    client, close = make_client(_slurm(kind="local"), n_workers_hint=1)
    assert len(client.scheduler_info()["workers"]) == 1
    close()
    close()  # harmless


def test_run_in_allocation_without_workers_fails_clearly_and_shuts_down(tmp_path, tiny_config_text):
    # a real scheduler process, as in the batch script, but no worker ever joins
    cfg_path = _write_config(tmp_path, tiny_config_text(realisations=1), name="tiny.toml")
    sched = tmp_path / "scheduler.json"
    proc = subprocess.Popen([sys.executable, "-m", "dask", "scheduler", "--scheduler-file",
                             str(sched), "--port", "0", "--dashboard-address", "127.0.0.1:0",
                             "--interface", "lo"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        for _ in range(600):
            if sched.exists() and sched.stat().st_size:
                break
            assert proc.poll() is None, "the scheduler exited"
            subprocess.run(["sleep", "0.1"])
        with pytest.raises(ClusterError, match="no Dask worker joined the scheduler"):
            run_in_allocation(cfg_path, scheduler_file=sched, store_path=tmp_path / "b.zarr",
                              timeout=1)
        assert proc.wait(timeout=60) is not None  # client.shutdown() ended the scheduler
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert not (tmp_path / "b.zarr").exists()


def test_batch_script_runs_without_slurm_using_a_stand_in_srun(tmp_path, tiny_config_text,
                                                             tiny_reference, monkeypatch):
    # The whole script -- stale scheduler file removed, scheduler, wait for its file, worker
    # through "srun", driver, shutdown -- with bash, srun replaced by a script that drops its
    # options and runs the command once (SLURM_NTASKS unset: one worker).
    d = tmp_path / AWKWARD
    cfg_path = _write_config(d, tiny_config_text(realisations=1))
    store = d / "st ore$1;.zarr"
    bindir = tmp_path / "bin"
    bindir.mkdir()
    (bindir / "srun").write_text('#!/bin/bash\nwhile [[ "$1" == --* ]]; do shift; done\nexec "$@"\n')
    (bindir / "srun").chmod(0o755)
    monkeypatch.chdir(d)
    shared = d / "shared"
    s = _slurm(interface="lo", shared_directory=str(shared), memory="1GB", worker_timeout=120)
    script = d / "job.sbatch"
    script.write_text(_quiet_render(cfg_path, s, store_path=store, job_name="j"))
    (shared / "logs").mkdir(parents=True)
    stale = shared / "scheduler-manual.json"
    stale.write_text('{"address": "tcp://127.0.0.1:9"}')  # a dead scheduler
    env = {k: v for k, v in os.environ.items() if not k.startswith("SLURM_")}
    env["PATH"] = f"{bindir}{os.pathsep}{env['PATH']}"
    out = subprocess.run(["bash", str(script)], env=env, capture_output=True, text=True,
                         timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    assert "6 done, 0 failed, 0 missing of 6 samples" in out.stdout + out.stderr
    assert_same_samples(store_arrays(store), tiny_reference)
    assert not stale.exists()  # removed at the end as well


def test_a_refused_worker_job_stops_before_any_run_with_sbatchs_message(tmp_path, monkeypatch):
    settings = resolve_cluster_settings(None, {"kind": "slurm",
                                               "shared_directory": str(tmp_path / "shared")})
    _fake_sbatch(tmp_path, monkeypatch,
                 'echo "sbatch: error: invalid account or account/partition combination" >&2\n'
                 'exit 1\n')
    with pytest.raises(ClusterError) as err:
        cl.probe_submission("#!/bin/bash\n", settings)
    msg = str(err.value)
    assert "invalid account or account/partition combination" in msg
    assert "--cluster local" in msg and "site defaults file" in msg
    assert not list((tmp_path / "shared").glob("helisweep-probe-*"))  # the script is removed


def test_a_hanging_sbatch_is_cut_short_with_what_it_said(tmp_path, monkeypatch):
    settings = resolve_cluster_settings(None, {"kind": "slurm",
                                               "shared_directory": str(tmp_path / "shared")})
    _fake_sbatch(tmp_path, monkeypatch,
                 'echo "sbatch: error: s_p_parse_file: cannot stat file /x/slurm.conf" >&2\n'
                 'exec sleep 30\n')
    with pytest.raises(ClusterError, match="within 1 s .* cannot stat file /x/slurm.conf"):
        cl.probe_submission("#!/bin/bash\n", settings, timeout=1.0)


@pytest.mark.skipif(shutil.which("sbatch") is None, reason="needs Slurm's sbatch (CI installs it)")
def test_run_on_slurm_without_a_usable_configuration_fails_fast(tmp_path, tiny_config_text,
                                                                 monkeypatch, capsys):
    # a configuration file that does not exist: sbatch says so (and would retry for 60 s;
    # never call Slurm commands without SLURM_CONF set, they then look on the network)
    monkeypatch.setenv("SLURM_CONF", str(tmp_path / "no-such" / "slurm.conf"))
    monkeypatch.setattr(cl, "PROBE_TIMEOUT_S", 5.0)
    cfg_path = _write_config(tmp_path, tiny_config_text(), name="tiny.toml")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        rc = main(["run", str(cfg_path), "--cluster", "slurm", "--interface", "lo",
                   "--shared-directory", str(tmp_path / "shared"), "--quiet"])
    err = capsys.readouterr().err
    assert rc != 0
    assert "helisweep: error:" in err and "no-such/slurm.conf" in err and "--cluster local" in err
    assert not (tmp_path / "run" / "samples.zarr").exists()


# ---------------------------------------------------------------- dashboard (issue 14, item 7)
def _listening_hosts(pid: int) -> set[str]:
    """Hosts of the TCP sockets a process and its children listen on."""
    import psutil  # the test's own dependency for socket listings

    procs = [psutil.Process(pid)] + psutil.Process(pid).children(recursive=True)
    hosts = set()
    for p in procs:
        for c in p.net_connections(kind="tcp"):
            if c.status == psutil.CONN_LISTEN:
                hosts.add(c.laddr.ip)
    return hosts


def test_local_cluster_listens_on_loopback_only():
    client, close = make_client(_slurm(kind="local"), n_workers_hint=1)
    try:
        hosts = _listening_hosts(os.getpid())
        assert hosts and hosts <= {"127.0.0.1", "::1"}, hosts  # dashboard included
    finally:
        close()


def test_dashboard_stays_on_the_node_unless_asked(tmp_path, tiny_config_text, monkeypatch):
    monkeypatch.chdir(tmp_path)
    cfg_path = _write_config(tmp_path, tiny_config_text(realisations=1), name="d.toml")
    s = _slurm()
    assert s.dashboard_address == "127.0.0.1:0" and not cl.dashboard_is_exposed(s.dashboard_address)
    opts = cl.slurm_cluster_options(s)
    assert opts["scheduler_options"]["dashboard_address"] == "127.0.0.1:0"
    assert "--dashboard-address 127.0.0.1:0 &" in _quiet_render(cfg_path, s)
    asked = _slurm(dashboard_address="0.0.0.0:8787")
    assert cl.dashboard_is_exposed(asked.dashboard_address)
    assert cl.slurm_cluster_options(asked)["scheduler_options"]["dashboard_address"] == "0.0.0.0:8787"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        with pytest.warns(cl.ConfigWarning, match=r"'0.0.0.0:8787' \(command line\).*no login"):
            text = render_batch_script(cfg_path, asked)
    assert "--dashboard-address 0.0.0.0:8787 &" in text
    with pytest.raises(ConfigError, match=r"'dashboard_address' = 'everywhere'.*host:port"):
        _slurm(dashboard_address="everywhere")
    # from the config too, and from the command line's --dashboard-address
    cfg = parse_config(tiny_config_text(realisations=1) + '\n[cluster]\ndashboard_address = ":8788"\n')
    assert resolve_cluster_settings(cfg.cluster, {"site_defaults": None}).dashboard_address == ":8788"
    p = argparse.ArgumentParser()
    add_cluster_options(p)
    assert cluster_overrides(p.parse_args(["--dashboard-address", "10.0.0.1:1"]))["dashboard_address"] == "10.0.0.1:1"


# ------------------------------------------------------- no worker for too long (issue 14, item 8)
class _FakeClock:
    def __init__(self):
        self.t = 0.0

    def __call__(self):
        return self.t


class _Workers:
    """Stands in for a client: only the scheduler's worker table is read."""

    def __init__(self):
        self.n = 0

    def scheduler_info(self):
        return {"workers": {f"w{i}": {} for i in range(self.n)}}


def test_watchdog_counts_time_without_any_worker():
    clock, client = _FakeClock(), _Workers()
    dog = cl.WorkerWatchdog(client, 60, lambda s: f"none for {s:.0f} s", clock=clock)
    clock.t = 59
    dog.check()                      # not yet
    client.n = 1
    clock.t = 100
    dog.check()                      # a worker came: the clock restarts
    client.n = 0
    clock.t = 130
    dog.check()                      # workers gone since this check
    clock.t = 189
    dog.check()
    clock.t = 190
    with pytest.raises(ClusterError, match="none for 60 s"):
        dog.check()
    assert dog.poll_seconds == 10.0 and cl.WorkerWatchdog(client, 1, str).poll_seconds == 0.5


def test_a_run_whose_workers_never_come_stops_with_an_error(tmp_path, tiny_config_text):
    # a real scheduler that accepted the run but never gets a worker (as Slurm jobs that wait
    # in the queue for ever with adaptive_minimum = 0)
    from dask.distributed import Client, LocalCluster

    cfg = parse_config(tiny_config_text(realisations=2))
    cluster = LocalCluster(n_workers=0, processes=True, dashboard_address="127.0.0.1:0",
                           silence_logs=40)
    client = Client(cluster)
    try:
        cl._WATCHDOGS[client] = cl.WorkerWatchdog(client, 2.0, lambda s: f"no worker for {s:.1f} s")
        with pytest.raises(ClusterError, match="no worker for"):
            run_sweep(cfg, client=client, store_path=tmp_path / "w.zarr", progress=False)
    finally:
        client.close()
        cluster.close()
    # nothing computed, nothing lost: the store holds no sample and its lock is released
    from pipeline.sweep.store import SampleStore

    store = SampleStore.open(tmp_path / "w.zarr")
    assert store.counts()["done"] == 0
    assert not (tmp_path / "w.zarr.lock").exists()


def test_batch_script_with_retry_failed_recomputes_failed_samples(tmp_path, tiny_config_text,
                                                                   tiny_reference, monkeypatch):
    # a store with failed samples (an injected solver failure at one energy, in-process), then
    # the batch script rendered with --retry-failed, run for real with a stand-in srun
    from dask.distributed import Client

    import pipeline.sweep.tasks as tasks
    from pipeline.sweep.store import SampleStatus, SampleStore

    d = tmp_path / "retry"
    cfg_path = _write_config(d, tiny_config_text(realisations=1), name="tiny.toml")
    store = d / "s.zarr"
    original = tasks.transmission_matrix

    def flaky(dsys, energy, params, **kw):
        if energy == 1.0:
            raise RuntimeError("injected solver failure")
        return original(dsys, energy, params, **kw)

    monkeypatch.setattr(tasks, "transmission_matrix", flaky)
    with Client(processes=False, n_workers=1, threads_per_worker=1,
                dashboard_address="127.0.0.1:0") as client:
        run_sweep(parse_config(cfg_path.read_text()), client=client, store_path=store,
                  progress=False)
    monkeypatch.setattr(tasks, "transmission_matrix", original)
    assert (SampleStore.open(store).status() == SampleStatus.FAILED).sum() == 2
    bindir = tmp_path / "bin"
    bindir.mkdir()
    (bindir / "srun").write_text('#!/bin/bash\nwhile [[ "$1" == --* ]]; do shift; done\nexec "$@"\n')
    (bindir / "srun").chmod(0o755)
    monkeypatch.chdir(d)
    shared = d / "shared"
    s = _slurm(interface="lo", shared_directory=str(shared), memory="1GB", worker_timeout=120)
    text = _quiet_render(cfg_path, s, store_path=store, job_name="j", retry_failed=True)
    assert "--retry-failed" in text and "--retry-failed" not in _quiet_render(cfg_path, s)
    (d / "job.sbatch").write_text(text)
    (shared / "logs").mkdir(parents=True)
    env = {k: v for k, v in os.environ.items() if not k.startswith("SLURM_")}
    env["PATH"] = f"{bindir}{os.pathsep}{env['PATH']}"
    out = subprocess.run(["bash", str(d / "job.sbatch")], env=env, capture_output=True,
                         text=True, timeout=300)
    assert out.returncode == 0, out.stderr[-3000:]
    assert "6 done, 0 failed, 0 missing of 6 samples" in out.stdout + out.stderr
    assert_same_samples(store_arrays(store), tiny_reference)
    # the failures stay in the history, marked retried
    history = SampleStore.open(store).group.attrs["failures"]
    assert len(history) == 2 and all("retried" in f for f in history)
    # the slurm-script command passes the flag through
    p = argparse.ArgumentParser()
    sub = p.add_subparsers()
    from pipeline.cli.slurm import add_run_in_allocation_command, add_slurm_script_command

    add_slurm_script_command(sub)
    add_run_in_allocation_command(sub)
    assert p.parse_args(["slurm-script", "c.toml", "--retry-failed"]).retry_failed
    assert p.parse_args(["run-in-allocation", "c.toml", "--scheduler-file", "f",
                         "--retry-failed"]).retry_failed


# ------------------------------------------------- worker environment (issue 15, item 5)
def test_local_workers_start_without_dasks_fixed_malloc_trim_threshold():
    client, close = make_client(_slurm(kind="local"), n_workers_hint=1)
    try:
        env = client.run(lambda: {k: os.environ.get(k) for k in
                                  ("MALLOC_TRIM_THRESHOLD_", "OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")})
        (worker_env,) = env.values()
        assert worker_env == {"MALLOC_TRIM_THRESHOLD_": None, "OPENBLAS_NUM_THREADS": "1",
                              "OMP_NUM_THREADS": "1"}
    finally:
        close()


def test_job_scripts_give_workers_the_same_environment(tmp_path, tiny_config_text, monkeypatch):
    # both kinds of job script export the configuration variable that the workers' nannies
    # read; bash evaluates the lines and Dask, in a fresh process, reads the value
    monkeypatch.chdir(tmp_path)
    cfg_path = _write_config(tmp_path, tiny_config_text(realisations=1), name="e.toml")
    lines = cl.worker_environment_exports()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", SharedPathWarning)
        with slurm_cluster(_slurm(shared_directory=str(tmp_path / "sh"))) as cluster:
            job = cluster.job_script()
    batch = _quiet_render(cfg_path, _slurm(shared_directory=str(tmp_path / "sh")))
    for line in lines:
        assert line in job and line in batch
    probe = ("import dask, distributed, json; "
             "print(json.dumps(dask.config.get('distributed.nanny.pre-spawn-environ')))")
    env = {k: v for k, v in os.environ.items() if not k.startswith("DASK_")}
    out = subprocess.run(["bash", "-c", "\n".join(lines) + f'\n"{sys.executable}" -c "{probe}"'],
                         capture_output=True, text=True, timeout=120, check=True, env=env)
    assert json.loads(out.stdout) == dict(cl.WORKER_PRE_SPAWN_ENVIRON)
    assert json.loads(out.stdout)["MALLOC_TRIM_THRESHOLD_"] is None  # None: not set at all
