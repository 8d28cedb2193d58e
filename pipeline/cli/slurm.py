"""The command line's cluster options and its batch-mode commands (``slurm-script`` and the
job script's ``run-in-allocation``); the settings themselves resolve in
:mod:`pipeline.sweep.clusters`."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError
from pipeline.network.plan import plan_network
from pipeline.network.run import run_network
from pipeline.sweep.clusters import (
    HOME_SITE_FILE,
    SETTING_NAMES,
    SITE_CONFIG_ENV,
    allocation_client,
    render_batch_script,
    resolve_cluster_settings,
    submit_batch_script,
    write_credentials,
)
from pipeline.sweep.config import load_config
from pipeline.sweep.driver import run_in_allocation

__all__ = ['add_slurm_script_command', 'add_cluster_options', 'cluster_overrides']


# =========================================================================== command line
def _add_resource_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("Slurm resources (override the config's [cluster] and the site file)")
    g.add_argument("--partition", help="Slurm partition")
    g.add_argument("--account", help="Slurm account")
    g.add_argument("--walltime", help='walltime per job, "HH:MM:SS" or "D-HH:MM:SS"')
    g.add_argument("--memory", help='memory per job, e.g. "8GB"')
    g.add_argument("--cores", type=int, help="cores (= single-threaded workers) per job")
    g.add_argument("--jobs", type=int, help="number of jobs (default: adaptive)")
    g.add_argument("--interface", help='network interface of scheduler and workers, e.g. "ib0"')
    g.add_argument("--shared-directory", dest="shared_directory",
                   help="directory visible to all nodes (logs, scheduler file, job scripts)")
    g.add_argument("--directive", dest="extra_directives", action="append", metavar="--OPT=VAL",
                   help="extra #SBATCH directive (repeatable; replaces the configured list)")
    g.add_argument("--worker-timeout", dest="worker_timeout", type=float, metavar="SECONDS",
                   help="seconds a run may go without any worker (at the start or when "
                        "jobs end) before it stops with an error")
    g.add_argument("--dashboard-address", dest="dashboard_address", metavar="HOST:PORT",
                   help='where the Dask dashboard listens (default "127.0.0.1:0": this node '
                        'only; reach it with ssh -L)')
    g.add_argument("--site-defaults", dest="site_defaults", metavar="TOML",
                   help=f"site defaults file (default ${SITE_CONFIG_ENV} or {HOME_SITE_FILE})")


def add_cluster_options(parser: argparse.ArgumentParser) -> None:
    """Add ``--cluster`` and the Slurm resource options to a ``run`` sub-parser."""
    parser.add_argument("--cluster", dest="kind", choices=("local", "slurm"),
                        help="where to run (default: cluster.kind of the config or site file)")
    _add_resource_options(parser)


def cluster_overrides(args: argparse.Namespace) -> dict[str, Any]:
    """Setting overrides from parsed arguments (absent options are left out)."""
    names = list(SETTING_NAMES) + ["site_defaults"]
    return {k: getattr(args, k) for k in names if getattr(args, k, None) is not None}


def add_slurm_script_command(subparsers) -> argparse.ArgumentParser:
    """Add the ``slurm-script`` subcommand to an ``argparse`` sub-parsers object.

    ``slurm-script CONFIG [--submit] [--out FILE] [--store PATH] [--job-name NAME]
    [--requeue] [--partition ...] [--account ...] [--walltime ...] [--memory ...]
    [--cores N] [--jobs N] [--interface IF] ...``: render the batch-mode job script, print it
    or write it to FILE, and optionally submit it.
    """
    p = subparsers.add_parser(
        "slurm-script",
        help="write (and optionally submit) a batch job that runs scheduler, workers and sweep "
             "in one Slurm allocation",
        description="Batch mode: the job runs a Dask scheduler, cores x jobs single-threaded "
                    "workers and the sweep in one allocation. Submit the same script again to "
                    "resume after a time limit or a cancellation.",
    )
    p.add_argument("config", help="sweep configuration (.toml)")
    p.add_argument("--submit", action="store_true", help="submit with sbatch and print the job id")
    p.add_argument("--out", help="write the script to this file (default: print it)")
    p.add_argument("--store", help="store path (default: <run directory>/samples.zarr)")
    p.add_argument("--job-name", dest="job_name", help="Slurm job name (default helisweep-<run name>)")
    p.add_argument("--requeue", action="store_true", default=None,
                   help="#SBATCH --requeue: a preempted job is requeued and resumes")
    p.add_argument("--retry-failed", dest="retry_failed", action="store_true",
                   help="each run of the script computes the store's failed samples again "
                        "(their failure records stay in the store's history)")
    _add_resource_options(p)
    p.set_defaults(func=_cmd_slurm_script)
    return p


def _cmd_slurm_script(args) -> int:

    cfg = load_config(args.config)
    settings = resolve_cluster_settings(cfg.cluster, {**cluster_overrides(args), "kind": "slurm"})
    text = render_batch_script(args.config, settings, store_path=args.store, job_name=args.job_name,
                               retry_failed=args.retry_failed)
    # sbatch does not create the directory of the job's log file
    (Path(settings.shared_directory) / "logs").mkdir(parents=True, exist_ok=True)
    if args.out:
        Path(args.out).write_text(text)
        print(f"wrote {args.out}", file=sys.stderr)
    elif not args.submit:
        sys.stdout.write(text)
    if args.submit:
        job_id = submit_batch_script(text, settings.shared_directory)
        log = Path(settings.shared_directory) / "logs" / f"helisweep-batch-{job_id}.out"
        print(f"submitted batch job {job_id}; follow it with `squeue -j {job_id}` and "
              f"{str(log)!r}; `helisweep status {args.config}` shows what is left")
    return 0


def _cmd_run_in_allocation(args) -> int:
    cfg = load_config(args.config)
    if cfg.edges is not None:  # the edge-network model: pools on the job's workers
        if args.retry_failed:
            raise ConfigError(
                f"--retry-failed recomputes failed samples of a direct sweep, but "
                f"{args.config!r} has an [edges] table (the edge-network model keeps no failed "
                f"samples to retry); drop --retry-failed"
            )
        plan_network(cfg)
        with allocation_client(args.scheduler_file, expected_workers=args.expected_workers,
                               timeout=args.timeout, credentials=args.credentials) as session:
            res = run_network(cfg, client=session.client, fresh=args.fresh,
                              progress=args.progress)
        print(f"helisweep: {res['netcdf']} written (edge-network model)", file=sys.stderr,
              flush=True)
        return 0
    run_in_allocation(args.config, scheduler_file=args.scheduler_file, store_path=args.store,
                      expected_workers=args.expected_workers, timeout=args.timeout,
                      fresh=args.fresh, progress=args.progress, credentials=args.credentials,
                      retry_failed=args.retry_failed)
    return 0


def add_credentials_command(subparsers) -> argparse.ArgumentParser:
    """``helisweep credentials DIR``: write a batch job's TLS credentials (job script use)."""
    q = subparsers.add_parser("credentials",
                              help="write TLS credentials for one batch job (used by the job script)")
    q.add_argument("directory", help="new directory for ca.pem, cert.pem, key.pem (owner-only)")
    q.set_defaults(func=_cmd_credentials)
    return q


def _cmd_credentials(args) -> int:
    print(write_credentials(args.directory))
    return 0


def add_run_in_allocation_command(subparsers) -> argparse.ArgumentParser:
    """``helisweep run-in-allocation``: the batch job's driver (called by the job script)."""
    q = subparsers.add_parser("run-in-allocation",
                              help="run a sweep on the Dask cluster of a batch job (used by the job script)")
    q.add_argument("config")
    q.add_argument("--scheduler-file", dest="scheduler_file", required=True)
    q.add_argument("--store")
    q.add_argument("--expected-workers", dest="expected_workers", type=int, default=1)
    q.add_argument("--timeout", type=float, default=600.0, help="seconds to wait for a worker")
    q.add_argument("--fresh", action="store_true")
    q.add_argument("--retry-failed", dest="retry_failed", action="store_true",
                   help="compute the store's failed samples again")
    q.add_argument("--credentials", help="the job's TLS credentials directory (written by "
                   "`helisweep credentials`)")
    q.add_argument("--progress", action="store_true", help="progress output (in a job log: a plain line every 5 %% of the work or every minute)")
    q.set_defaults(func=_cmd_run_in_allocation)
    return q
