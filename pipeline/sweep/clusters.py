"""Where a sweep runs: a local Dask cluster or Slurm (dask-jobqueue and batch mode).

Two ways onto a Slurm cluster:

* **Driver on the login node** (``helisweep run CONFIG --cluster slurm``): the Dask scheduler
  runs in the ``helisweep`` process, dask-jobqueue's ``SLURMCluster`` submits worker jobs of
  ``cores`` single-threaded worker processes each, and the process writes the store as
  tasks finish (:func:`run_on_cluster`).
* **Batch mode** (``helisweep slurm-script CONFIG --submit``), for clusters whose login nodes
  must not host a scheduler: one job script starts the scheduler, the workers (``srun``) and
  the sweep driver inside a single allocation; they meet through a scheduler file
  (:func:`render_batch_script`, :func:`submit_batch_script`, :func:`run_in_allocation`).

Either way the store is written task by task with the status last, so a job killed at its
walltime or cancelled leaves complete tasks or missing ones; running (or resubmitting) the
same command computes only what is missing. ``helisweep status CONFIG`` shows what is left.

Settings come from four places, resolved in one function, :func:`resolve_cluster_settings`:
command-line overrides, then the config's ``[cluster]`` table, then the site defaults file
(a ``[cluster]`` table in TOML), then the packaged defaults :data:`DEFAULTS`. Every value is
checked by one table of validators, whatever its origin.

Every user string that reaches a job script (paths, job names, partitions, accounts, the
interface) is quoted with :func:`shlex.quote`; ``sbatch`` reads ``#SBATCH`` lines with the same
quoting rules as the shell. Extra directives are passed verbatim after checking that each is
one ``--option`` on one line.
"""

from __future__ import annotations

import difflib
import math
import os
import re
import shlex
import subprocess
import sys
import tempfile
import time
import tomllib
import warnings
import weakref
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, fields
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping

from pipeline.errors import ClusterError, ConfigError, ConfigWarning, SharedPathWarning
from pipeline.sweep.config import load_config
from pipeline.sweep.store import block_size

__all__ = ['local_client', 'WORKER_PRE_SPAWN_ENVIRON', 'worker_environment_exports', 'ClientSession', 'WorkerWatchdog', 'watchdog_for', 'dashboard_is_exposed', 'open_client', 'allocation_client', 'HOME_SITE_FILE', 'SETTING_NAMES', 'ClusterError', 'ClusterSettings', 'DEFAULTS', 'SITE_CONFIG_ENV', 'SharedPathWarning', 'batch_template_path', 'make_client', 'render_batch_script', 'resolve_cluster_settings', 'site_defaults_path', 'slurm_cluster', 'slurm_cluster_options', 'submit_batch_script']


# --------------------------------------------------------------------------- driver
def local_client(workers: int = 0, *, dashboard_address: str = "127.0.0.1:0"):
    """A Dask client on a LocalCluster: one single-threaded process per core.

    BLAS and OpenMP are limited to one thread per worker (two threads per process gained
    nothing here and halved throughput when processes shared the cores). Scheduler, workers
    and (by default) the dashboard listen on the loopback interface only.
    """
    from dask.distributed import Client, LocalCluster  # heavy: only where a cluster is used

    for var in _THREAD_VARS:
        os.environ[var] = "1"
    n = workers or os.cpu_count() or 1
    import dask  # heavy: only where a cluster is used

    # the nannies read their pre-spawn environment when they are made (restarts reuse it)
    with dask.config.set({"distributed.nanny.pre-spawn-environ": dict(WORKER_PRE_SPAWN_ENVIRON)}):
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                               dashboard_address=dashboard_address, silence_logs=40)
    return Client(cluster)


#: environment variable naming the site defaults file
SITE_CONFIG_ENV = "HELISWEEP_SITE_CONFIG"

#: where the site defaults file is looked for when neither the config nor the environment names one
HOME_SITE_FILE = "~/.config/helisweep/site.toml"

#: BLAS/OpenMP thread limits for single-threaded workers (one worker process per core)
_THREAD_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")

#: What a worker's nanny puts into the environment before it starts the worker process
#: (Dask's ``distributed.nanny.pre-spawn-environ``; a value None removes the variable). Dask's
#: default also sets ``MALLOC_TRIM_THRESHOLD_=65536``. Setting it at all turns off glibc's
#: adaptive malloc thresholds: every array above 128 kB is then mapped fresh from the kernel
#: and handed back when freed, and a sample inside a worker cost about a quarter more than
#: the same sample in-process (benchmarks/bench_pipeline.py, docs/benchmarks.md). Every worker
#: helisweep starts -- local, Slurm worker jobs, batch mode -- gets this environment.
WORKER_PRE_SPAWN_ENVIRON: Mapping[str, int | None] = MappingProxyType(
    {"MALLOC_TRIM_THRESHOLD_": None, **{v: 1 for v in _THREAD_VARS}})


def worker_environment_exports() -> list[str]:
    """Shell lines that give the workers of a job script helisweep's worker environment: the
    thread limits in the job, and the nannies' pre-spawn environment through Dask's
    configuration variable (which replaces Dask's default)."""
    env = "{" + ", ".join(f"'{k}': {v}" for k, v in WORKER_PRE_SPAWN_ENVIRON.items()) + "}"
    return [f"export {var}=1" for var in _THREAD_VARS] + [
        f'export DASK_DISTRIBUTED__NANNY__PRE_SPAWN_ENVIRON="{env}"']


#: directories that are local to each node: a store or scheduler file there is not shared
_NODE_LOCAL = ("/tmp", "/var/tmp", "/dev/shm")

#: memory per core when no layer sets ``memory`` (per job = this times ``cores``)
_MEMORY_PER_CORE_GB = 2

#: tasks kept in flight per worker (as in the engine's default window)
_TASKS_PER_WORKER = 4


# =========================================================================== settings
@dataclass(frozen=True, slots=True)
class ClusterSettings:
    """Resolved cluster settings (see :func:`resolve_cluster_settings`); immutable."""

    #: "local" (a LocalCluster on this machine) or "slurm"
    kind: str
    #: Slurm partition (``--partition``), None: the cluster's default partition
    partition: str | None
    #: Slurm account (``--account``), None: the user's default account
    account: str | None
    #: walltime per job, "HH:MM:SS" or "D-HH:MM:SS"
    walltime: str
    #: memory per job, e.g. "8GB" (split evenly between the job's worker processes)
    memory: str
    #: cores per job = single-threaded worker processes per job
    cores: int
    #: fixed number of jobs; None: adaptive between the two bounds below
    jobs: int | None
    #: adaptive scaling: fewest jobs kept (0: start jobs only when tasks are queued)
    adaptive_minimum: int
    #: adaptive scaling: most jobs at once
    adaptive_maximum: int
    #: extra ``#SBATCH`` directives, each one ``--option[=value]``
    extra_directives: tuple[str, ...]
    #: network interface of scheduler and workers ("ib0", "lo"); None: Dask's choice
    interface: str | None
    #: absolute directory visible to every node: logs, scheduler file, job scripts
    shared_directory: str
    #: Python executable on the compute nodes (same environment as here)
    python: str
    #: seconds to wait for the first worker before giving up with an error
    worker_timeout: float
    #: batch mode: ``#SBATCH --requeue`` (a preempted job is requeued and resumes)
    requeue: bool
    #: where the Dask dashboard listens, "host:port" (default loopback: this node only;
    #: reach it with ``ssh -L``)
    dashboard_address: str
    #: the site defaults file that was read (None: none)
    site_file: str | None = None
    #: where each setting came from: ((name, origin), ...)
    sources: tuple[tuple[str, str], ...] = field(default=(), compare=False)

    @property
    def walltime_seconds(self) -> int:
        """The walltime in seconds."""
        return _walltime_seconds(self.walltime)

    @property
    def memory_bytes(self) -> int:
        """Memory per job in bytes."""
        from dask.utils import parse_bytes  # heavy: only where a cluster is used

        return int(parse_bytes(self.memory))

    @property
    def worker_memory_bytes(self) -> int:
        """Memory per worker process in bytes."""
        return self.memory_bytes // self.cores

    @property
    def max_workers(self) -> int:
        """The most worker processes these settings can bring up at once."""
        return self.cores * (self.jobs if self.jobs is not None else self.adaptive_maximum)

    def source_of(self, name: str) -> str:
        """Where setting ``name`` came from ("command line", "config [cluster]", ...)."""
        return dict(self.sources).get(name, "default")

    def describe(self) -> str:
        """One line per setting with its value and origin."""
        lines = []
        for f in fields(self):
            if f.name in ("sources", "site_file"):
                continue
            lines.append(f"{f.name} = {getattr(self, f.name)!r}  ({self.source_of(f.name)})")
        return "\n".join(lines)


def _walltime_seconds(text: str) -> int:
    m = re.fullmatch(r"(?:(\d+)-)?(\d{1,3}):([0-5]\d):([0-5]\d)", text)
    if m is None:
        raise ConfigError('is not a walltime; give "HH:MM:SS" or "D-HH:MM:SS", e.g. "02:00:00"')
    days, h, mi, s = (int(x) if x else 0 for x in m.groups())
    return ((days * 24 + h) * 60 + mi) * 60 + s


def _check_text(value: Any) -> str:
    if not isinstance(value, str):
        raise ConfigError(f"must be a string, not {type(value).__name__}")
    if any(c in value for c in "\n\r\0"):
        raise ConfigError("contains a newline or NUL; give it on one line")
    return value


def _v_kind(v):
    if v not in ("local", "slurm"):
        raise ConfigError('must be "local" or "slurm"')
    return v


def _v_slurm_name(v):
    """Partition or account: one word (a partition may be a comma list)."""
    if v is None:
        return None
    v = _check_text(v).strip()
    if not v:
        raise ConfigError("is empty; omit it to use the cluster's default")
    if re.search(r"\s", v) or v.startswith("-"):
        raise ConfigError("must be one word without spaces that does not start with '-' "
                   "(as `sinfo -s` or `sacctmgr show assoc` list them)")
    return v


def _v_walltime(v):
    v = _check_text(v).strip()
    if _walltime_seconds(v) == 0:
        raise ConfigError('is zero; give a positive walltime, e.g. "01:00:00"')
    return v


_MEMORY_RE = re.compile(r"(\d+(?:\.\d+)?)\s*(KB|MB|GB|TB|KiB|MiB|GiB|TiB)")


def _v_memory(v):
    if v is None:  # no layer set it: derived from cores in resolve_cluster_settings
        return None
    v = _check_text(v).strip()
    if _MEMORY_RE.fullmatch(v) is None:
        raise ConfigError('is not a memory size; give a number and a unit, e.g. "4GB" or "3500MiB"')
    return v.replace(" ", "")


def _v_int(lo: int, hi: int, optional: bool = False) -> Callable:
    def check(v):
        if v is None and optional:
            return None
        if isinstance(v, bool) or not isinstance(v, int):
            raise ConfigError(f"must be a whole number from {lo} to {hi}")
        if not lo <= v <= hi:
            raise ConfigError(f"is outside {lo}..{hi}")
        return v
    return check


def _v_directives(v):
    if isinstance(v, str) or not isinstance(v, (list, tuple)):
        raise ConfigError('must be a list of strings, e.g. ["--qos=long", "--constraint=avx2"]')
    out = []
    for item in v:
        try:
            item = _check_text(item).strip()
        except ConfigError as exc:
            raise ConfigError(f"item {item!r} {exc}") from None
        if not item.startswith("--") or len(item) < 3:
            raise ConfigError(f"item {item!r} is not a long sbatch option; write each directive as "
                       f"'--option' or '--option=value' (without '#SBATCH')")
        # sbatch reads a #SBATCH line with shell quoting and stops at a blank or a '#'
        try:
            words = shlex.split(item, comments=True)
        except ValueError as exc:
            raise ConfigError(f"item {item!r} has unbalanced quotes ({exc})") from None
        if len(words) != 1 or words != shlex.split(item):
            raise ConfigError(f"item {item!r} is not one option: sbatch would stop at the first blank "
                       f"or '#'; quote such a value, e.g. --comment='two words'")
        out.append(item)
    return tuple(out)


def _v_interface(v):
    if v is None:
        return None
    v = _check_text(v).strip()
    if not re.fullmatch(r"[A-Za-z0-9_.:@\-]+", v):
        raise ConfigError('is not a network interface name; give one as `ip link` lists it, '
                   'e.g. "ib0", "eth0" or "lo"')
    return v


def _v_path(v):
    v = _check_text(v).strip()
    if not v:
        raise ConfigError("is empty; give a directory")
    return os.path.abspath(os.path.expanduser(v))


def _v_python(v):
    v = _check_text(v).strip()
    if not v:
        raise ConfigError("is empty; give the Python executable on the compute nodes")
    return v


def _v_timeout(v):
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v <= 0:
        raise ConfigError("must be a positive number of seconds, e.g. 600")
    return float(v)


def _v_dashboard(v):
    v = _check_text(v).strip()
    host, sep, port = v.rpartition(":")
    if not sep or not port.isdigit() or int(port) > 65535 or not re.fullmatch(r"[A-Za-z0-9_.\-\[\]:]*", host):
        raise ConfigError('is not "host:port"; e.g. "127.0.0.1:0" (this node only, any free '
                          'port, the default) or "0.0.0.0:8787" (every interface)')
    return v


def dashboard_is_exposed(address: str) -> bool:
    """Whether a dashboard address listens beyond this node (anything but loopback)."""
    host = address.rpartition(":")[0].strip("[]")
    return host not in ("127.0.0.1", "localhost", "::1") and not host.startswith("127.")


def _v_bool(v):
    if not isinstance(v, bool):
        raise ConfigError("must be true or false")
    return v


@dataclass(frozen=True, slots=True)
class _Setting:
    #: packaged default
    default: Any
    #: check and normalise a value from any layer (raises ConfigError with what is wrong; the caller adds where it came from)
    check: Callable[[Any], Any]
    #: how to write it on the command line (for fixes in messages)
    flag: str | None = None


#: every setting: packaged default, validator and command-line flag; the single table that
#: resolve_cluster_settings walks. Defaults are conservative: one core per job, 2 GB per core.
_SETTINGS: dict[str, _Setting] = {
    "kind": _Setting("local", _v_kind, "--cluster"),
    "partition": _Setting(None, _v_slurm_name, "--partition"),
    "account": _Setting(None, _v_slurm_name, "--account"),
    "walltime": _Setting("01:00:00", _v_walltime, "--walltime"),
    "memory": _Setting(None, _v_memory, "--memory"),
    "cores": _Setting(1, _v_int(1, 1024), "--cores"),
    "jobs": _Setting(None, _v_int(1, 10000, optional=True), "--jobs"),
    "adaptive_minimum": _Setting(1, _v_int(0, 10000)),
    "adaptive_maximum": _Setting(10, _v_int(1, 10000)),
    "extra_directives": _Setting((), _v_directives, "--directive"),
    "interface": _Setting(None, _v_interface, "--interface"),
    "shared_directory": _Setting("helisweep-slurm", _v_path, "--shared-directory"),
    "python": _Setting(sys.executable, _v_python),
    "worker_timeout": _Setting(600.0, _v_timeout, "--worker-timeout"),
    "requeue": _Setting(False, _v_bool, "--requeue"),
    "dashboard_address": _Setting("127.0.0.1:0", _v_dashboard, "--dashboard-address"),
}

#: the packaged defaults (memory None: 2 GB per core)
#: names of the cluster settings (config keys, command-line options, site-file keys)
SETTING_NAMES: tuple[str, ...] = tuple(_SETTINGS)
DEFAULTS: Mapping[str, Any] = MappingProxyType({k: s.default for k, s in _SETTINGS.items()})

#: the keys that choose between a fixed number of jobs and adaptive scaling
_SCALING = ("jobs", "adaptive_minimum", "adaptive_maximum")


def site_defaults_path(cfg_cluster=None, overrides: Mapping[str, Any] | None = None) -> tuple[Path, bool]:
    """The site defaults file and whether it was named explicitly.

    Looked up in this order: ``overrides["site_defaults"]``, the config's
    ``cluster.site_defaults``, the environment variable ``HELISWEEP_SITE_CONFIG``, then
    ``~/.config/helisweep/site.toml``. An explicitly named file must exist; the home default
    may be absent.

    Returns
    -------
    (path, explicit) : tuple[pathlib.Path, bool]
    """
    for value in ((overrides or {}).get("site_defaults"),
                  getattr(cfg_cluster, "site_defaults", None),
                  os.environ.get(SITE_CONFIG_ENV) or None):
        if value:
            return Path(os.path.expanduser(str(value))), True
    return Path(os.path.expanduser(HOME_SITE_FILE)), False


def _read_site_file(path: Path, explicit: bool) -> dict[str, Any]:
    if not path.is_file():
        if explicit:
            raise ConfigError(
                f"site defaults file {str(path)!r} does not exist; create it (a TOML file with a "
                f"[cluster] table), fix cluster.site_defaults or ${SITE_CONFIG_ENV}, or unset them"
            )
        return {}
    try:
        data = tomllib.loads(path.read_text())
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(f"site defaults file {str(path)!r} is not valid TOML: {exc}") from None
    stray = [k for k, v in data.items() if not isinstance(v, dict)]
    if stray:
        raise ConfigError(
            f"site defaults file {str(path)!r}: key(s) {stray!r} are outside a table; put "
            f"them under [cluster]"
        )
    table = data.get("cluster", {})
    _refuse_unknown(table, f"site defaults file {str(path)!r} [cluster]")
    return dict(table)


def _refuse_unknown(mapping: Mapping[str, Any], where: str) -> None:
    for key in mapping:
        if key not in _SETTINGS:
            near = difflib.get_close_matches(key, list(_SETTINGS), n=1, cutoff=0.5)
            hint = f" Did you mean {near[0]!r}?" if near else ""
            raise ConfigError(
                f"{where}: unknown cluster setting {key!r}.{hint} Settings: {', '.join(_SETTINGS)}"
            )


def resolve_cluster_settings(cfg_cluster=None, overrides: Mapping[str, Any] | None = None) -> ClusterSettings:
    """Resolve cluster settings from all their sources, in one place.

    Precedence, highest first: command-line ``overrides``, the config's ``[cluster]`` table
    (only keys written there count), the site defaults file (:func:`site_defaults_path`),
    then :data:`DEFAULTS`. Whichever layer is the highest to set any of ``jobs``,
    ``adaptive_minimum`` or ``adaptive_maximum`` chooses the scaling mode: ``jobs`` from a
    lower layer does not turn an adaptive request into a fixed one. Unset ``memory`` is
    2 GB per core.

    Parameters
    ----------
    cfg_cluster : pipeline.sweep.config.ClusterSection or None
        The config's ``[cluster]`` table.
    overrides : mapping, optional
        Setting name -> value from the command line; None values are ignored. The key
        ``site_defaults`` names a site file.

    Returns
    -------
    ClusterSettings

    Raises
    ------
    ConfigError
        A value (from any layer) is invalid, or a site file is missing or malformed; the
        message names the setting, its origin and the fix.

    Examples
    --------
    >>> s = resolve_cluster_settings(None, {"kind": "slurm", "cores": 4, "site_defaults": None})
    >>> (s.kind, s.cores, s.memory)  # doctest: +SKIP
    ('slurm', 4, '8GB')
    """
    overrides = {k: v for k, v in (overrides or {}).items() if v is not None}
    site_path, explicit = site_defaults_path(cfg_cluster, overrides)
    overrides.pop("site_defaults", None)
    _refuse_unknown(overrides, "command line")
    from_config = {}
    if cfg_cluster is not None:
        set_keys = set(getattr(cfg_cluster, "model_fields_set", set())) - {"site_defaults"}
        from_config = {k: getattr(cfg_cluster, k) for k in set_keys}
        _refuse_unknown(from_config, "config [cluster]")
    site = _read_site_file(site_path, explicit)
    layers = [("command line", overrides), ("config [cluster]", from_config),
              (f"site file {str(site_path)!r}", site), ("default", dict(DEFAULTS))]
    scaling_owner = next((name for name, layer in layers if any(k in layer for k in _SCALING)),
                         "default")

    values, sources = {}, []
    for key, spec in _SETTINGS.items():
        for origin, layer in layers:
            if key in layer and not (key == "jobs" and origin != scaling_owner):
                raw = layer[key]
                break
        else:  # "jobs" owned by a layer that sets only adaptive bounds: adaptive scaling
            origin, raw = scaling_owner, None
        try:
            values[key] = spec.check(raw)
        except ConfigError as exc:
            flag = f" (command line {spec.flag})" if spec.flag and origin == "command line" else ""
            raise ConfigError(f"cluster setting {key!r} = {raw!r} from {origin}{flag} {exc}") from None
        sources.append((key, origin))

    if values["memory"] is None:
        values["memory"] = f"{_MEMORY_PER_CORE_GB * values['cores']}GB"
        sources = [(k, f"default ({_MEMORY_PER_CORE_GB}GB per core)" if k == "memory" else o)
                   for k, o in sources]
    settings = ClusterSettings(**values, site_file=str(site_path) if site else None,
                               sources=tuple(sources))
    _check_together(settings)
    return settings


def _check_together(s: ClusterSettings) -> None:
    """Checks that involve more than one setting."""
    if s.adaptive_minimum > s.adaptive_maximum:
        raise ConfigError(
            f"cluster setting 'adaptive_minimum' = {s.adaptive_minimum!r} "
            f"({s.source_of('adaptive_minimum')}) is above 'adaptive_maximum' = "
            f"{s.adaptive_maximum!r} ({s.source_of('adaptive_maximum')}); lower the minimum or "
            f"raise the maximum"
        )
    per_worker = s.worker_memory_bytes
    if per_worker < 256 * 2**20:
        raise ConfigError(
            f"cluster setting 'memory' = {s.memory!r} ({s.source_of('memory')}) leaves "
            f"{per_worker / 2**20:.0f} MiB for each of the {s.cores} worker(s) of a job; give "
            f"memory per job (not per core), at least 256MiB per core, e.g. {f'{s.cores}GB'!r}"
        )


# =========================================================================== shared paths
def _node_local(path: str | Path) -> bool:
    p = os.path.abspath(os.path.expanduser(str(path)))
    return any(p == d or p.startswith(d + os.sep) for d in _NODE_LOCAL)


def _warn_if_node_local(path: str | Path, what: str) -> None:
    if _node_local(path):
        warnings.warn(
            f"{what} {str(path)!r} is on a node-local directory while kind = \"slurm\": jobs on "
            f"other nodes, and a resubmitted job, will not see it. Put it on a shared file "
            f"system (home, project or scratch directory)",
            SharedPathWarning, stacklevel=3,
        )


# =========================================================================== dask-jobqueue
def _warn_if_exposed(settings: ClusterSettings) -> None:
    if dashboard_is_exposed(settings.dashboard_address):
        warnings.warn(
            f"the Dask dashboard will listen on {settings.dashboard_address!r} "
            f"({settings.source_of('dashboard_address')}), reachable from other machines: it "
            f"has no login and shows the run's tasks, logs and profiles to anyone who finds the "
            f"port. Leave dashboard_address at its default ('127.0.0.1:0') and use `ssh -L` "
            f"unless the network is yours alone", ConfigWarning, stacklevel=3)


def _lifetime_args(walltime_seconds: int) -> list[str]:
    """Retire workers gracefully before Slurm kills them; adaptive scaling replaces them."""
    if walltime_seconds < 600:
        return []
    margin = max(60, min(600, walltime_seconds // 10))
    stagger = min(120, margin // 2)
    return ["--lifetime", f"{walltime_seconds - margin}s", "--lifetime-stagger", f"{stagger}s"]


def slurm_cluster_options(settings: ClusterSettings, *, job_name: str = "helisweep-worker") -> dict:
    """Keyword arguments of ``SLURMCluster`` for these settings (no cluster is started).

    One single-threaded worker process per core; BLAS/OpenMP limited to one thread in the
    job script's prologue. Partition, account and log paths are written as quoted
    ``--option=value`` directives (dask-jobqueue writes its own unquoted), and its own
    ``-p``/``-A``/``-e``/``-o`` lines, which its configuration files could add, are skipped,
    so that only :func:`resolve_cluster_settings` decides.

    Parameters
    ----------
    settings : ClusterSettings
    job_name : str
        Slurm job name of the worker jobs (letters, digits, ``_.-``).

    Returns
    -------
    dict
    """
    from dask.utils import parse_bytes  # heavy: only where a cluster is used
    from dask_jobqueue.slurm import slurm_format_bytes_ceil  # heavy: only on Slurm
    from distributed.security import Security  # heavy: only where a cluster is used

    if not re.fullmatch(r"[A-Za-z0-9_.\-]{1,128}", job_name):
        raise ConfigError(
            f"worker job name {job_name!r} must be 1-128 letters, digits, '_', '.' or '-'; "
            f"choose a simpler run name"
        )
    logs = Path(settings.shared_directory) / "logs"
    directives = [
        f"--output={shlex.quote(str(logs / (job_name + '-%j.out')))}",
        f"--error={shlex.quote(str(logs / (job_name + '-%j.err')))}",
    ]
    if settings.partition:
        directives.append(f"--partition={shlex.quote(settings.partition)}")
    if settings.account:
        directives.append(f"--account={shlex.quote(settings.account)}")
    directives += list(settings.extra_directives)
    # the dashboard stays on this node unless asked (reach it with `ssh -L`); it shows task
    # details and has no login
    scheduler_options = {"dashboard_address": settings.dashboard_address}
    return dict(
        cores=settings.cores,
        processes=settings.cores,
        memory=settings.memory,
        job_cpu=settings.cores,
        job_mem=slurm_format_bytes_ceil(parse_bytes(settings.memory)),
        walltime=settings.walltime,
        job_name=job_name,
        interface=settings.interface,
        python=shlex.quote(settings.python),
        shebang="#!/usr/bin/env bash",
        job_extra_directives=directives,
        job_directives_skip=["#SBATCH -p ", "#SBATCH -A ", "#SBATCH -e ", "#SBATCH -o "],
        job_script_prologue=worker_environment_exports(),
        worker_extra_args=_lifetime_args(settings.walltime_seconds),
        death_timeout=60,
        log_directory=None,
        shared_temp_directory=str(credentials_directory(settings)),
        scheduler_options=scheduler_options,
        # TLS with credentials made for this run: scheduler, workers and driver prove
        # themselves to each other, so no other account can connect a client and run code as
        # the run's owner. dask-jobqueue writes the workers' key and certificate into the
        # shared directory, owner-only (mode 0600), and removes them with the cluster.
        security=Security.temporary(),
        protocol="tls://",
    )


#: characters a path may have to go unquoted on a worker's command line (dask-jobqueue writes
#: the TLS credential paths there as they are)
_PLAIN_PATH = re.compile(r"[A-Za-z0-9_./@%+=:,-]+")


def credentials_directory(settings: ClusterSettings) -> Path:
    """Where the run's TLS credentials for the workers go: ``<shared_directory>/credentials``.

    Raises
    ------
    ConfigError
        When the path has characters (blanks, quotes, ``$``, ``~`` ...) that dask-jobqueue
        would put unquoted on the worker command line or expand.
    """
    path = Path(settings.shared_directory) / "credentials"
    if not _PLAIN_PATH.fullmatch(str(path)):
        raise ConfigError(
            f"shared_directory = {settings.shared_directory!r} ({settings.source_of('shared_directory')}) "
            f"has characters that cannot go unquoted on the workers' command line, where the "
            f"TLS credentials of the run are passed by path; choose a path of letters, digits "
            f"and _ . / @ % + = : , -"
        )
    return path


def slurm_cluster(settings: ClusterSettings, *, job_name: str = "helisweep-worker"):
    """A ``SLURMCluster`` for these settings, not yet scaled (no job is submitted).

    Creates the shared directory and its ``logs/``. Close it (``cluster.close()``) when done;
    that also cancels its jobs.

    Examples
    --------
    >>> s = resolve_cluster_settings(None, {"kind": "slurm", "interface": "lo"})  # doctest: +SKIP
    >>> with slurm_cluster(s) as cluster:                                          # doctest: +SKIP
    ...     print(cluster.job_script())
    """
    from dask_jobqueue import SLURMCluster  # heavy: only on Slurm

    options = slurm_cluster_options(settings, job_name=job_name)
    (Path(settings.shared_directory) / "logs").mkdir(parents=True, exist_ok=True)
    credentials = credentials_directory(settings)
    credentials.mkdir(parents=True, exist_ok=True)
    credentials.chmod(0o700)  # owner-only: the workers' private key is written here
    return SLURMCluster(**options)


def _scale_bounds(settings: ClusterSettings, n_workers_hint: int) -> tuple[int, int]:
    """(fewest, most) jobs: fixed or adaptive, capped by the workers the run can use."""
    cap = math.ceil(n_workers_hint / settings.cores) if n_workers_hint > 0 else None
    if settings.jobs is not None:
        n = min(settings.jobs, cap) if cap else settings.jobs
        return n, n
    most = min(settings.adaptive_maximum, cap) if cap else settings.adaptive_maximum
    return min(settings.adaptive_minimum, most), most


def make_client(settings: ClusterSettings, *, n_workers_hint: int = 0,
                job_name: str = "helisweep-worker"):
    """A Dask client on a local or a Slurm cluster, and a function that closes both.

    Parameters
    ----------
    settings : ClusterSettings
    n_workers_hint : int
        Local: the number of worker processes (0: one per core, as
        :func:`pipeline.sweep.clusters.local_client`). Slurm: the most workers the run can use
        (e.g. its number of tasks; 0: no cap); the number of jobs is capped at
        ``ceil(hint / cores)``.
    job_name : str
        Slurm job name of the worker jobs.

    Returns
    -------
    (client, close) : tuple[distributed.Client, callable]
        ``close()`` closes the client and the cluster (cancelling Slurm jobs); calling it
        twice is harmless.

    Notes
    -----
    Slurm jobs are managed by ``cluster.adapt``: with a fixed ``jobs`` as
    ``adapt(minimum_jobs=jobs, maximum_jobs=jobs)``, so that a job that reached its walltime
    (its workers retire shortly before, see ``--lifetime``) is replaced by a new one.
    """
    _warn_if_exposed(settings)
    if settings.kind == "local":
        client = local_client(n_workers_hint, dashboard_address=settings.dashboard_address)
        return client, _closer(client, client.cluster)
    from dask.distributed import Client  # heavy: only where a cluster is used

    cluster = slurm_cluster(settings, job_name=job_name)
    try:
        # fail fast where Slurm is not usable
        probe_submission(cluster.job_script(), settings, timeout=PROBE_TIMEOUT_S)
        fewest, most = _scale_bounds(settings, n_workers_hint)
        cluster.adapt(minimum_jobs=fewest, maximum_jobs=most)
        client = Client(cluster)
    except BaseException:
        cluster.close()
        raise
    return client, _closer(client, cluster)


#: longest wait for ``sbatch --test-only`` (sbatch itself retries an unreadable configuration
#: for 60 s before giving up)
PROBE_TIMEOUT_S = 30.0


def probe_submission(job_script: str, settings: ClusterSettings, *,
                     timeout: float = PROBE_TIMEOUT_S) -> None:
    """Ask Slurm whether it would accept a worker job (``sbatch --test-only``), before any run.

    dask-jobqueue submits worker jobs in the background and only logs a refused submission,
    so without this check a run where Slurm is not usable (no configuration, controller down,
    a partition or account that does not exist) would wait for workers that never come.

    Parameters
    ----------
    job_script : str
        The worker job script (``SLURMCluster.job_script()``).
    settings : ClusterSettings
        For the shared directory (the script is written there, owner-only, and removed).
    timeout : float
        Seconds to wait for sbatch's answer.

    Raises
    ------
    ClusterError
        With sbatch's own message and the fixes.
    """
    directory = Path(settings.shared_directory)
    directory.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix="helisweep-probe-", suffix=".sbatch", dir=directory)
    fix = ("Run where Slurm works (a login node of the cluster, with its configuration: "
           "`sinfo` must answer), fix the partition/account in the config or the site defaults "
           f"file ({site_defaults_path(None)[0]}), or run locally with --cluster local")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(job_script)
        try:
            out = subprocess.run(["sbatch", "--test-only", name], capture_output=True,
                                 text=True, timeout=timeout)
        except FileNotFoundError:
            raise ClusterError(f"'sbatch' was not found on PATH, so no worker job can be "
                               f"submitted. {fix}") from None
        except subprocess.TimeoutExpired as exc:
            said = _text(exc.stderr) or _text(exc.output)
            raise ClusterError(
                f"Slurm did not accept a test submission within {timeout:g} s (sbatch "
                f"--test-only); sbatch said: {said.strip()[-600:] or '(nothing)'}. {fix}"
            ) from None
        if out.returncode != 0:
            raise ClusterError(
                f"Slurm refused the worker job (sbatch --test-only, exit {out.returncode}): "
                f"{(out.stderr or out.stdout).strip()[-600:]}. {fix}")
    finally:
        Path(name).unlink(missing_ok=True)


def _text(value) -> str:
    if value is None:
        return ""
    return value.decode(errors="replace") if isinstance(value, bytes) else str(value)


def _closer(client, cluster) -> Callable[[], None]:
    done = []

    def close() -> None:
        if done:
            return
        done.append(True)
        try:
            client.close()
        finally:
            cluster.close()
    return close


def _job_states(cluster) -> str:
    """Best-effort Slurm state of a cluster's jobs, for error messages."""
    ids = [j.job_id for j in getattr(cluster, "workers", {}).values() if getattr(j, "job_id", None)]
    if not ids:
        return "no job was submitted (check that sbatch works here)"
    try:
        out = subprocess.run(["squeue", "-h", "-j", ",".join(ids), "-o", "%i %T %r"],
                             capture_output=True, text=True, timeout=30)
        states = out.stdout.strip().replace("\n", "; ")
    except (OSError, subprocess.SubprocessError):
        states = ""
    return f"job(s) {', '.join(ids)}: " + (states or "no longer in the queue")


def _wait_for_workers(client, settings: ClusterSettings, n: int = 1) -> None:
    try:
        client.wait_for_workers(n, timeout=settings.worker_timeout)
    except TimeoutError:
        logs = Path(settings.shared_directory) / "logs"
        raise ClusterError(
            f"no Dask worker connected within worker_timeout = {settings.worker_timeout:g} s "
            f"({_job_states(client.cluster)}). Check the queue (squeue --me), the job logs in "
            f"{str(logs)!r}, the partition/account, and that interface = "
            f"{settings.interface!r} reaches this host; raise worker_timeout (--worker-timeout) "
            f"if jobs just wait in the queue"
        ) from None


class WorkerWatchdog:
    """Stops a run whose cluster has had no Dask worker for ``timeout`` seconds while tasks
    wait: jobs that Slurm accepted but never starts (or that fail at start) would otherwise
    keep the driver waiting with no end.

    The driver calls :meth:`check` whenever no task has finished for :attr:`poll_seconds`.
    The clock starts when the watchdog is made (the cluster's start) and restarts whenever a
    check finds a worker, so a job that ends at its walltime and is replaced in time does not
    stop the run.

    Parameters
    ----------
    client : distributed.Client
    timeout : float
        Seconds without any worker before :meth:`check` raises.
    explain : callable
        ``explain(seconds_without_workers) -> str``: the error message (what Slurm says about
        the jobs, and the fixes).
    clock : callable
        Monotonic seconds (tests pass a fake clock).
    """

    def __init__(self, client, timeout: float, explain: Callable[[float], str], *,
                 clock: Callable[[], float] = time.monotonic):
        self.client, self.timeout, self.explain, self.clock = client, float(timeout), explain, clock
        self._since: float | None = clock()

    @property
    def poll_seconds(self) -> float:
        """How long the driver waits for a task to finish before calling :meth:`check`."""
        return min(10.0, max(0.5, self.timeout / 5))

    def check(self) -> None:
        """Raise :class:`ClusterError` once no worker has been connected for ``timeout`` s."""
        now = self.clock()
        if _n_workers(self.client) > 0:
            self._since = None
            return
        if self._since is None:
            self._since = now
        elif now - self._since >= self.timeout:
            raise ClusterError(self.explain(now - self._since))


def _n_workers(client) -> int:
    return len(client.scheduler_info().get("workers", {}))


#: the watchdog of each client that :func:`open_client` or :func:`allocation_client` made
_WATCHDOGS: "weakref.WeakKeyDictionary[Any, WorkerWatchdog]" = weakref.WeakKeyDictionary()


def watchdog_for(client) -> WorkerWatchdog | None:
    """The :class:`WorkerWatchdog` of a client from :func:`open_client` or
    :func:`allocation_client` (None for a local cluster or a client made elsewhere)."""
    try:
        return _WATCHDOGS.get(client)
    except TypeError:  # an object that cannot be weakly referenced: no watchdog
        return None


def _slurm_watchdog(client, settings: ClusterSettings) -> WorkerWatchdog:
    logs = Path(settings.shared_directory) / "logs"

    def explain(seconds: float) -> str:
        return (
            f"no Dask worker for {seconds:.0f} s while tasks wait (worker_timeout = "
            f"{settings.worker_timeout:g} s, {settings.source_of('worker_timeout')}; "
            f"{_job_states(client.cluster)}). Samples already computed are kept in the store; "
            f"the same command resumes. Check why the jobs do not start (squeue --me shows the "
            f"reason) and their logs in {str(logs)!r}; fix the partition/account in the config "
            f"or the site defaults file, run from a login node that can submit jobs, raise "
            f"worker_timeout (--worker-timeout) if the queue is only slow, or pass "
            f"--cluster local"
        )
    return WorkerWatchdog(client, settings.worker_timeout, explain)


def _n_tasks(cfg) -> int:
    """Upper bound of the number of tasks (blocks of realisations) of a fresh run."""

    axes = cfg.axes
    blocks = -(-cfg.run.realisations // block_size(cfg, 1))
    return blocks * len(axes["geometry"]) * len(axes["disorder_strength"])


@dataclass(frozen=True)
class ClientSession:
    """A Dask client obtained through :func:`open_client`, with what the driver needs of it."""

    #: the ``distributed.Client``
    client: Any
    #: tasks to keep in flight (Slurm: enough for every worker the cluster may grow to;
    #: None: the driver's default for the workers present)
    max_in_flight: int | None = None


@contextmanager
def open_client(cfg, overrides: Mapping[str, Any] | None = None, *, workers: int | None = None,
                store_path: str | Path | None = None) -> Iterator[ClientSession]:
    """The one way to obtain a Dask client for a run: through the config's ``[cluster]``.

    Settings resolve as command line > config > site file > defaults
    (:func:`resolve_cluster_settings`). Local kind: a LocalCluster of ``workers`` processes
    (default ``execution.workers``, 0: one per core). Slurm kind: a ``SLURMCluster`` scaled
    to the fixed number of jobs or adaptively, capped by the run's number of tasks; waits up
    to ``worker_timeout`` for the first worker (with ``adaptive_minimum = 0`` jobs start only
    once tasks are queued, so there is no wait). Leaving the ``with`` block closes the client
    and the cluster, which cancels the Slurm jobs.

    Parameters
    ----------
    cfg : pipeline.sweep.config.SweepConfig
    overrides : mapping, optional
        Command-line settings (see :func:`resolve_cluster_settings`).
    workers : int, optional
        Local worker processes; refused with kind = "slurm" (use ``jobs`` and ``cores``).
    store_path : str or Path, optional
        The run's store (Slurm: warned about when it is node-local).

    Yields
    ------
    ClientSession

    Examples
    --------
    >>> with open_client(cfg) as session:                      # doctest: +SKIP
    ...     run_sweep(cfg, client=session.client, max_in_flight=session.max_in_flight)
    """
    settings = resolve_cluster_settings(cfg.cluster, overrides)
    if settings.kind == "local":
        hint = workers if workers is not None else cfg.execution.workers
    else:
        if workers is not None:
            raise ConfigError(
                f"--workers {workers!r} sets local worker processes, but the cluster kind is "
                f"'slurm' ({settings.source_of('kind')}); size a Slurm run with --jobs and "
                f"--cores, or pass --cluster local"
            )
        hint = _n_tasks(cfg)
        _warn_if_node_local(store_path or cfg.run_dir / "samples.zarr", "the store")
        _warn_if_node_local(settings.shared_directory, "shared_directory")
    client, close = make_client(settings, n_workers_hint=hint, job_name=_job_name(cfg))
    try:
        in_flight = None
        if settings.kind == "slurm":
            fewest, most = _scale_bounds(settings, hint)
            if fewest > 0:
                _wait_for_workers(client, settings, 1)
            in_flight = _TASKS_PER_WORKER * most * settings.cores
            _WATCHDOGS[client] = _slurm_watchdog(client, settings)
        yield ClientSession(client, in_flight)
    finally:
        close()


def _job_name(cfg) -> str:
    return f"helisweep-{cfg.run.name}"


# =========================================================================== batch mode
_PLACEHOLDER = re.compile(r"@([A-Z][A-Z0-9_]*)@")


def batch_template_path() -> Path:
    """The packaged batch-mode job script template (``slurm/sweep.sbatch.template``)."""
    return Path(__file__).resolve().parents[2] / "slurm" / "sweep.sbatch.template"


def _fill_template(template: str, values: Mapping[str, str], source: str) -> str:
    """Replace every ``@NAME@``; a missing or an unused value is an error (a broken template)."""
    wanted = set(_PLACEHOLDER.findall(template))
    missing = wanted - set(values)
    unused = set(values) - wanted
    if missing or unused:
        raise ClusterError(
            f"job script template {source!r} does not match this version of helisweep "
            f"(placeholders without a value: {sorted(missing)}, values without a placeholder: "
            f"{sorted(unused)}); use the template shipped with the package"
        )
    return _PLACEHOLDER.sub(lambda m: values[m.group(1)], template)


def _directive_lines(settings: ClusterSettings) -> str:
    lines = []
    if settings.partition:
        lines.append(f"#SBATCH --partition={shlex.quote(settings.partition)}")
    if settings.account:
        lines.append(f"#SBATCH --account={shlex.quote(settings.account)}")
    if settings.requeue:
        lines += ["#SBATCH --requeue", "#SBATCH --open-mode=append"]
    lines += [f"#SBATCH {d}" for d in settings.extra_directives]
    return "\n".join(lines) if lines else "# (no partition, account or extra directives)"


def _bash_array(words: list[str]) -> str:
    return " ".join(shlex.quote(w) for w in words)


def render_batch_script(cfg_path: str | Path, settings: ClusterSettings, *,
                        store_path: str | Path | None = None, job_name: str | None = None,
                        template: str | Path | None = None, retry_failed: bool = False) -> str:
    """The batch-mode job script for a sweep, with every value quoted for the shell.

    Inside one allocation of ``cores x jobs`` single-core tasks (``jobs`` unset: one job's
    worth), the script deletes a stale scheduler file, starts a Dask scheduler, waits for
    its scheduler file, starts one single-threaded worker per task with ``srun``, and runs
    ``python -m pipeline.cli run-in-allocation``, which runs the sweep and shuts the
    scheduler and workers down. Submitting the same script again resumes the run.

    Parameters
    ----------
    cfg_path : path
        The sweep configuration (validated here).
    settings : ClusterSettings
    store_path : path, optional
        Store location (default: the config's run directory, relative to the current
        working directory, which the job changes into).
    job_name : str, optional
        Slurm job name (default ``helisweep-<run name>``); any text on one line.
    template : path, optional
        A site-specific template with the same placeholders (default
        :func:`batch_template_path`).
    retry_failed : bool
        Every run of the script computes the store's failed samples again (``helisweep run
        --retry-failed``); their failure records stay in the store's history.

    Returns
    -------
    str
        The job script.

    Raises
    ------
    ConfigError
        Invalid config or job name.
    """

    cfg_path = Path(cfg_path)
    cfg = load_config(cfg_path)
    job_name = _job_name(cfg) if job_name is None else job_name
    try:
        _check_text(job_name)
        if not job_name.strip():
            raise ConfigError("is empty")
    except ConfigError as exc:
        raise ConfigError(f"job name {job_name!r} {exc}; give a short name on one line") from None
    workdir = os.getcwd()
    store = Path(store_path) if store_path is not None else cfg.run_dir / "samples.zarr"
    store_abs = os.path.join(workdir, os.fspath(store))
    _warn_if_node_local(store_abs, "the store")
    _warn_if_node_local(settings.shared_directory, "shared_directory")
    _warn_if_exposed(settings)
    n_workers = settings.cores * (settings.jobs or 1)
    mem_per_cpu_mib = math.ceil(settings.worker_memory_bytes / 2**20)
    shared = settings.shared_directory
    template_path = Path(template) if template is not None else batch_template_path()
    try:
        text = template_path.read_text()
    except OSError as exc:
        raise ClusterError(
            f"cannot read the job script template {str(template_path)!r} ({exc}); it ships in "
            f"the source tree as slurm/sweep.sbatch.template: run from a checkout or pass "
            f"template="
        ) from None
    values = {
        "JOB_NAME": shlex.quote(job_name),
        "NTASKS": str(n_workers),
        "MEM_PER_CPU": f"{mem_per_cpu_mib}M",
        "WALLTIME": settings.walltime,
        "LOG_FILE": shlex.quote(os.path.join(shared, "logs", "helisweep-batch-%j.out")),
        "DIRECTIVES": _directive_lines(settings),
        "WORKDIR": shlex.quote(workdir),
        "CONFIG": shlex.quote(os.path.abspath(cfg_path)),
        "SHARED": shlex.quote(shared),
        "PYTHON": shlex.quote(settings.python),
        "WORKER_MEMORY": str(settings.worker_memory_bytes),
        "INTERFACE_ARGS": _bash_array(["--interface", settings.interface] if settings.interface else []),
        "DRIVER_ARGS": _bash_array((["--store", store_abs] if store_path is not None else [])
                                   + (["--retry-failed"] if retry_failed else [])),
        "WORKER_TIMEOUT": f"{settings.worker_timeout:g}",
        "DASHBOARD": shlex.quote(settings.dashboard_address),
        "WORKER_ENVIRONMENT": "\n".join(worker_environment_exports()),
    }
    return _fill_template(text, values, str(template_path))


def submit_batch_script(text: str, directory: str | Path) -> str:
    """Write a job script into ``directory`` and submit it with ``sbatch --parsable``.

    Parameters
    ----------
    text : str
        The job script (e.g. from :func:`render_batch_script`).
    directory : path
        Where the script file is kept (created if needed; use the shared directory).

    Returns
    -------
    str
        The Slurm job id.

    Raises
    ------
    ClusterError
        ``sbatch`` is missing or refused the job (its message is included).
    """
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    (directory / "logs").mkdir(exist_ok=True)
    fd, name = tempfile.mkstemp(prefix="helisweep-", suffix=".sbatch", dir=directory)
    with os.fdopen(fd, "w") as fh:
        fh.write(text)
    os.chmod(name, 0o644)
    try:
        # the job inherits the submitter's umask (sbatch passes it on as SLURM_UMASK): its
        # log file and everything it writes are then owner-only
        out = subprocess.run(["sbatch", "--parsable", name], capture_output=True, text=True,
                             timeout=120, umask=0o077)
    except FileNotFoundError:
        raise ClusterError(
            f"'sbatch' was not found on PATH; submit from a Slurm login node (or load the Slurm "
            f"module), or submit the written script {name!r} by hand"
        ) from None
    except subprocess.TimeoutExpired:
        raise ClusterError(f"'sbatch {name}' did not answer within 120 s; is slurmctld up "
                           f"(scontrol ping)?") from None
    if out.returncode != 0:
        raise ClusterError(
            f"sbatch refused {name!r} (exit {out.returncode}): {out.stderr.strip() or out.stdout.strip()}"
            f"; fix the partition/account/resources (see `sinfo -s`) and submit again"
        )
    job_id = out.stdout.strip().splitlines()[-1].split(";")[0] if out.stdout.strip() else ""
    if not job_id.isdigit():
        raise ClusterError(f"could not read a job id from sbatch's answer {out.stdout!r}")
    return job_id


#: file names of a batch job's TLS credentials (see write_credentials)
CREDENTIAL_FILES = ("ca.pem", "cert.pem", "key.pem")


def write_credentials(directory: str | Path) -> Path:
    """Write TLS credentials made for one batch job: a self-signed certificate that is its own
    authority, and its key (Dask's temporary credentials), owner-only.

    The job's scheduler, workers and driver all present this certificate and accept only
    peers that present it, so no other account can connect to the job's scheduler.

    Parameters
    ----------
    directory : str or Path
        Created with mode 0700 (it must not exist yet: each job makes its own).

    Returns
    -------
    Path
        The directory, holding ``ca.pem``, ``cert.pem`` and ``key.pem`` (mode 0600).
    """
    from distributed.security import Security  # heavy: only where a cluster is used

    directory = Path(directory)
    directory.mkdir(mode=0o700, parents=False, exist_ok=False)
    directory.chmod(0o700)
    sec = Security.temporary()
    for name, text in zip(CREDENTIAL_FILES, (sec.tls_ca_file, sec.tls_worker_cert,
                                              sec.tls_worker_key)):
        fd = os.open(directory / name, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
    return directory


def credentials_security(directory: str | Path):
    """The ``distributed.security.Security`` of a client holding a job's credentials."""
    from distributed.security import Security  # heavy: only where a cluster is used

    ca, cert, key = (str(Path(directory) / n) for n in CREDENTIAL_FILES)
    return Security(tls_ca_file=ca, tls_client_cert=cert, tls_client_key=key,
                    require_encryption=True)


@contextmanager
def allocation_client(scheduler_file: str | Path, *, expected_workers: int = 1,
                      timeout: float = 600.0,
                      credentials: str | Path | None = None) -> Iterator[ClientSession]:
    """A client on the Dask cluster a batch job started (scheduler file mode).

    Connects with ``Client(scheduler_file=...)`` and waits up to ``timeout`` seconds for the
    first worker; leaving the ``with`` block calls ``client.shutdown()``, which ends the
    scheduler and the workers (and so the job).

    Parameters
    ----------
    scheduler_file : path
        Written by ``dask scheduler --scheduler-file``.
    expected_workers : int
        Workers the job starts (sizes the window of tasks in flight).
    timeout : float
        Seconds to wait for the first worker.
    credentials : str or Path, optional
        The job's TLS credentials (:func:`write_credentials`); the scheduler accepts no client
        without them.

    Yields
    ------
    ClientSession
    """
    from dask.distributed import Client  # heavy: only when a cluster is used

    security = credentials_security(credentials) if credentials is not None else None
    client = Client(scheduler_file=str(scheduler_file), timeout="120s", security=security)
    try:
        try:
            client.wait_for_workers(1, timeout=timeout)
        except TimeoutError:
            raise ClusterError(
                f"no Dask worker joined the scheduler of {str(scheduler_file)!r} within "
                f"{timeout:g} s; see the worker messages in this job's log"
            ) from None
        n = _n_workers(client)
        print(f"helisweep: {n} of {expected_workers} worker(s) connected; running the sweep",
              file=sys.stderr, flush=True)

        def explain(seconds: float) -> str:
            return (f"every Dask worker of this job has been gone for {seconds:.0f} s (--timeout "
                    f"{timeout:g}) while tasks wait; see the worker messages in this job's log. "
                    f"Samples already computed are kept; submitting the job script again resumes")
        _WATCHDOGS[client] = WorkerWatchdog(client, timeout, explain)
        yield ClientSession(client, _TASKS_PER_WORKER * max(expected_workers, n, 1))
    finally:
        client.shutdown()
