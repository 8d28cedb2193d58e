"""The driver: spread a sweep's blocks over Dask workers and store their samples.

A *task* is one block of realisations at one geometry and disorder strength, every
realisation solved at every (field, gate voltage, energy) point (:mod:`pipeline.sweep.tasks`).
The driver refuses bad input before any compute (:mod:`pipeline.sweep.checks`), opens or
resumes the store, keeps a bounded window of tasks in flight and writes each block as it
finishes: workers return small arrays and the driver is the store's single writer, so Zarr
writes stay off the workers' critical path and a killed run loses at most the blocks in
flight. The numbers do not depend on task order, batching or worker count.

A run with a precision target (:mod:`pipeline.precision`, above this layer) drives an open
:class:`SweepSession` itself: it asks for realisations per sweep point
(:meth:`SweepSession.compute` with ``requested``), judges the samples and asks for more.
"""

from __future__ import annotations

import math
import sys
import time
import warnings
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import ConfigWarning, StoreError
from pipeline.sweep.checks import check_resources, validate_run
from pipeline.sweep.clusters import allocation_client, open_client, resolve_cluster_settings, watchdog_for
from pipeline.sweep.config import SweepConfig, config_hash, load_config
from pipeline.sweep.store import SampleStore
from pipeline.sweep.tasks import run_block
from pipeline.transport.environment import describe

__all__ = ['run_sweep', 'run_on_cluster', 'run_in_allocation', 'open_sweep', 'SweepSession',
           'check_before_cluster']


#: a non-interactive progress line at least every this many seconds ...
LOG_INTERVAL_S = 60.0
#: ... or every this fraction of the work, whichever comes first
LOG_STEP = 0.05


@dataclass
class _Progress:
    """Progress of a sweep on standard error: a bar redrawn in place on a terminal, plain
    lines (done/total, rate, ETA) every 5 % or every minute otherwise (a batch log)."""

    total: int
    stream: object = None
    enabled: bool = True

    def __post_init__(self):
        if self.stream is None:
            self.stream = sys.stderr
        self.done = 0
        self.t0 = time.monotonic()
        self._last = 0.0
        self._last_fraction = 0.0
        isatty = getattr(self.stream, "isatty", None)
        self.interactive = bool(isatty and isatty())

    def _numbers(self, now: float) -> tuple[float, str]:
        rate = self.done / max(now - self.t0, 1e-9)
        eta = (self.total - self.done) / rate if rate > 0 else float("inf")
        return rate, (f"{eta:,.0f} s" if math.isfinite(eta) else "unknown")

    def update(self, n: int = 1) -> None:
        self.done += n
        if not self.enabled:
            return
        now = time.monotonic()
        if self.interactive:
            self._bar(now)
        else:
            self._line(now)

    def _line(self, now: float) -> None:
        fraction = self.done / max(self.total, 1)
        finished = self.done >= self.total
        if not (finished or fraction - self._last_fraction >= LOG_STEP
                or now - self._last >= LOG_INTERVAL_S):
            return
        self._last, self._last_fraction = now, fraction
        rate, eta = self._numbers(now)
        self.stream.write(f"helisweep: progress {self.done}/{self.total} samples "
                          f"({fraction:.0%}), {rate:.2f} samples/s, ETA {eta}\n")
        self.stream.flush()

    def _bar(self, now: float) -> None:
        if now - self._last < 0.5 and self.done < self.total:
            return
        self._last = now
        rate, eta = self._numbers(now)
        width = 30
        fill = int(width * self.done / max(self.total, 1))
        self.stream.write(
            f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.total} samples "
            f"{rate:.2f}/s ETA {eta} "
        )
        if self.done >= self.total:
            self.stream.write("\n")
        self.stream.flush()


def run_sweep(
    cfg: SweepConfig,
    *,
    client=None,
    store_path: str | Path | None = None,
    fresh: bool = False,
    progress: bool = True,
    max_in_flight: int | None = None,
    max_tasks: int | None = None,
    retry_failed: bool = False,
) -> SampleStore:
    """Run (or resume) a sweep and return its store.

    Bad input is refused before any compute and before any cluster starts
    (:func:`pipeline.sweep.checks.validate_run`). With ``client=None`` a client is obtained
    for the duration of the call through the config's ``[cluster]`` table
    (:func:`pipeline.sweep.clusters.open_client`). Rerunning the same command computes only
    the samples still missing; a different configuration is refused unless ``fresh`` (the
    old store is then moved aside, not deleted). ``max_tasks`` stops after that many tasks
    (a partial run that a later call resumes). ``retry_failed`` computes failed samples again
    (their failure records stay in the store's history, see
    :meth:`pipeline.sweep.store.SampleStore.retry_failed`).
    """
    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    if cfg.run.has_target:
        warnings.warn(
            f"run {cfg.run.name!r} sets a precision target ([run] target_ci or target_lstar_ci), "
            f"which this plain run does not apply: it computes the first block of "
            f"{cfg.run.realisations} realisations at every point. Use `helisweep run` "
            f"(pipeline.precision.run_to_precision) for the stopping loop",
            ConfigWarning, stacklevel=2)
    n_workers, worker_mb = _worker_facts(client)
    names = validate_run(cfg, n_workers, path, worker_mb, fresh=fresh)
    if client is None:
        with open_client(cfg, store_path=path) as session:
            return _drive(cfg, session.client, path, names, fresh=fresh, progress=progress,
                          max_in_flight=max_in_flight or session.max_in_flight,
                          max_tasks=max_tasks, retry_failed=retry_failed)
    return _drive(cfg, client, path, names, fresh=fresh, progress=progress,
                  max_in_flight=max_in_flight, max_tasks=max_tasks, retry_failed=retry_failed)


def _worker_facts(client) -> tuple[int | None, float | None]:
    """Number of workers and their smallest memory limit (MB), as far as a client knows."""
    if client is None:
        return None, None
    workers = client.scheduler_info().get("workers", {})
    limits = [w.get("memory_limit") or 0 for w in workers.values()]
    return len(workers) or None, (min(limits) / 1e6 if limits and min(limits) > 0 else None)


def _open_store(cfg, client, path, names, *, fresh, progress,
                retry_failed: bool = False) -> tuple[SampleStore, int]:
    """Check resources on the actual workers, open (or create) the store, repair damage."""
    n_workers = len(client.scheduler_info().get("workers", {})) or 1
    estimates = check_resources(cfg, n_workers, path, _worker_facts(client)[1])
    store = SampleStore.open_for_run(
        path, cfg, names, fresh=fresh, n_workers=n_workers,
        provenance={"workers": n_workers, "config_hash": config_hash(cfg), **describe()},
    )
    try:
        damaged = store.repair_for_resume()
        retried = store.retry_failed() if retry_failed else 0
    except BaseException:
        store.release_lock()
        raise
    if progress and retry_failed:
        print(f"{retried} failed sample(s) will be computed again (their failure records stay "
              f"in the store's history)", file=sys.stderr)
    if progress:
        if damaged:
            print(f"{len(damaged)} damaged chunk(s) found (checksum); their tasks will be "
                  f"recomputed: " + ", ".join(f"{n}{k}" for n, k, _ in damaged[:5]),
                  file=sys.stderr)
        print(f"estimated memory per solve {estimates['memory_per_solve_mb']:,.0f} MB "
              f"(per worker available {estimates['memory_per_worker_mb']:,.0f} MB), store up "
              f"to {estimates['store_mb']:,.1f} MB", file=sys.stderr)
    return store, n_workers


def _points_per_realisation(cfg: SweepConfig) -> int:
    """Samples one realisation contributes at one geometry and strength."""
    return int(np.prod([len(cfg.axes[k]) for k in ("b_perp", "gate_voltage", "energy")]))


@dataclass
class SweepSession:
    """An open run: the store, the client that computes its samples, and the session's
    task counts (from :func:`open_sweep`)."""

    #: the run's configuration
    cfg: SweepConfig
    #: Dask client of the workers
    client: Any
    #: the run's sample store (the driver is its single writer)
    store: SampleStore
    #: workers seen when the store was opened
    n_workers: int
    #: progress output on standard error
    progress: bool = True
    #: tasks in flight at most (default four per worker)
    max_in_flight: int | None = None
    #: tasks run in this session
    tasks: int = 0
    #: samples that failed in this session
    failed: int = 0
    _dashboard_shown: bool = field(default=False, repr=False)

    def pending(self, requested: np.ndarray | None = None) -> list:
        """Tasks still to do: the run's realisations, or with ``requested`` (a precision
        target) the realisations requested per point (see :meth:`compute`)."""
        if requested is None:
            return self.store.pending_blocks(self.cfg.run.realisations)
        return self.store.pending_blocks(requested=requested)

    def compute(self, requested: np.ndarray | None = None, *, max_tasks: int | None = None) -> int:
        """Compute the samples still missing and write each block as it finishes.

        Parameters
        ----------
        requested : numpy.ndarray of int, optional
            Realisations per sweep point (geometry, disorder_strength, b_perp, gate_voltage,
            energy): realisation ``r`` is computed at a point only when ``r`` is below its
            request (the store grows as needed). Default: ``[run] realisations`` everywhere.
        max_tasks : int, optional
            Stop after submitting that many tasks (a partial run, resumed by a later call).

        Returns
        -------
        int
            Tasks run.
        """
        cfg, client, store = self.cfg, self.client, self.store
        if requested is not None:
            requested = np.asarray(requested, dtype=np.int64)
            store.ensure_realisations(int(requested.max()))
        pending = self.pending(requested)
        queue = list(pending)[: max_tasks if max_tasks is not None else None]
        if requested is None:
            points = _points_per_realisation(cfg)
            samples = [len(reals) * points for _, reals in queue]
            if self.progress:
                print(f"store {store.path}: {store.counts()['done']} samples done, {len(pending)} "
                      f"tasks ({sum(len(r) for _, r in pending) * points} samples) to go on "
                      f"{self.n_workers} worker(s)", file=sys.stderr)
        else:
            samples = [int(sum((r < requested[g, s_]).sum() for r in reals))
                       for (_, g, s_), reals in queue]
            if self.progress and queue:
                print(f"store {store.path}: {len(pending)} tasks ({sum(samples)} samples) to go "
                      f"on {self.n_workers} worker(s)", file=sys.stderr)
        if self.progress and not self._dashboard_shown and getattr(client, "dashboard_link", None):
            print(f"Dask dashboard: {client.dashboard_link}", file=sys.stderr)
            self._dashboard_shown = True
        if not queue:
            return 0
        bar = _Progress(sum(samples), enabled=self.progress)
        window = self.max_in_flight or 4 * self.n_workers
        # the config (a few kB) travels with each task: a scatter would need a worker present,
        # and with adaptive scaling from zero jobs no worker exists before tasks are queued
        futures = {}
        work = list(zip(queue, samples))

        def submit_next():
            (key, reals), count = work.pop(0)
            args = (cfg, key, reals)
            if requested is not None:
                args += (requested[key[1], key[2]],)
            fut = client.submit(run_block, *args, retries=2, pure=False,
                                key=f"helisweep-{key[0]}-{key[1]}-{key[2]}-{time.monotonic_ns()}")
            futures[fut] = (key, reals, count)

        while work and len(futures) < window:
            submit_next()
        for fut in _finished(futures, watchdog_for(client)):
            key, reals, count = futures.pop(fut)
            results = fut.result()
            _write(store, key, reals, results)
            self.tasks += 1
            self.failed += sum(len(r.failures) for r in results)
            bar.update(count)
            if work:
                submit_next()
        return len(queue)

    def finish(self, **summary) -> SampleStore:
        """Record the session's end (tasks, failed samples and ``summary``) in the store and
        release its lock."""
        self.store.finish_session({"tasks": self.tasks, "failed_samples": self.failed, **summary})
        if self.progress and self.failed:
            print(f"{self.failed} sample(s) failed; reasons are in the store's 'failures' "
                  f"attribute", file=sys.stderr)
        return self.store


def open_sweep(cfg: SweepConfig, client, store_path: str | Path | None = None, *,
               fresh: bool = False, progress: bool = True,
               max_in_flight: int | None = None, retry_failed: bool = False) -> SweepSession:
    """Check the run on the client's workers and open (or create) its store.

    Bad input is refused before any compute (:func:`pipeline.sweep.checks.validate_run`
    and the resources of the actual workers); damaged chunks are marked for recomputation.

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.
    client : dask.distributed.Client
        Where the samples are computed.
    store_path : str or Path, optional
        Default ``<run directory>/samples.zarr``.
    fresh : bool
        Move a store of a different configuration aside instead of refusing it.
    progress : bool
        Progress output on standard error.
    max_in_flight : int, optional
        Tasks in flight at most.

    Returns
    -------
    SweepSession
    """
    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    n_workers, worker_mb = _worker_facts(client)
    names = validate_run(cfg, n_workers, path, worker_mb, fresh=fresh)
    store, n_workers = _open_store(cfg, client, path, names, fresh=fresh, progress=progress,
                                   retry_failed=retry_failed)
    return SweepSession(cfg, client, store, n_workers, progress=progress,
                        max_in_flight=max_in_flight)


def _drive(cfg, client, path, names, *, fresh, progress, max_in_flight, max_tasks,
           retry_failed: bool = False) -> SampleStore:
    """Submit the pending blocks, write each as it finishes, keep a bounded window in flight."""
    store, n_workers = _open_store(cfg, client, path, names, fresh=fresh, progress=progress,
                                   retry_failed=retry_failed)
    try:
        session = SweepSession(cfg, client, store, n_workers, progress=progress,
                               max_in_flight=max_in_flight)
        requested = store.requested()
        if requested is not None and (requested < cfg.run.realisations).any():
            # a run without a target on a store of one: every point now requests them
            requested = np.maximum(requested, cfg.run.realisations)
            store.write_requested(requested, dict(store.group.attrs.get("precision", {})))
        session.compute(max_tasks=max_tasks)
        return session.finish()
    finally:
        store.release_lock()  # also when the session ends in an error


def _finished(futures: dict, watchdog) -> Iterator:
    """The futures of ``futures`` as they finish (the caller pops each and may add more).

    While no task finishes, ``watchdog.check()`` (a
    :class:`pipeline.sweep.clusters.WorkerWatchdog`) runs every ``watchdog.poll_seconds`` and
    stops the run when the cluster has had no worker for too long.
    """
    from dask.distributed import wait  # heavy: only where a cluster is used

    poll = watchdog.poll_seconds if watchdog is not None else None
    while futures:
        try:
            done, _ = wait(list(futures), timeout=poll, return_when="FIRST_COMPLETED")
        except TimeoutError:
            watchdog.check()
            continue
        for fut in [f for f in futures if f in done]:  # submission order
            yield fut


def _write(store: SampleStore, key, reals, results) -> None:
    """Write one finished block; a failing file system stops the run, keeping the rest."""
    try:
        store.write_block(key, reals, results)
    except OSError as exc:  # full disk, quota, lost mount
        raise StoreError(
            f"writing task {key} to the store {str(store.path)!r} failed: {exc}. The store "
            f"keeps every task written before (this one stays missing). Free space or "
            f"fix the file system, then rerun the same command to resume"
        ) from exc


def check_before_cluster(cfg: SweepConfig, overrides: Mapping[str, Any] | None,
                         workers: int | None, store_path, *, fresh: bool = False) -> None:
    """Refuse bad input, another run's store or a store in use before a cluster starts.

    On this machine (kind "local") every check of :func:`pipeline.sweep.checks.validate_run`
    runs; for Slurm only the cheap ones and the store (the memory checks need the workers,
    the driver runs them on the actual workers).
    """
    kind = resolve_cluster_settings(cfg.cluster, overrides).kind
    validate_run(cfg, workers, store_path, None, fresh=fresh, cheap_only=kind != "local")


def run_on_cluster(cfg: SweepConfig, overrides: Mapping[str, Any] | None = None, *,
                   workers: int | None = None, **run_kwargs) -> SampleStore:
    """Run (or resume) a sweep on a client from :func:`pipeline.sweep.clusters.open_client`
    (the config's ``[cluster]`` resolved with ``overrides``), closing it after.

    ``**run_kwargs`` go to :func:`run_sweep` (``store_path``, ``fresh``, ``progress``,
    ``max_tasks``, ...). A store holding other samples is refused before the cluster starts.
    """
    path = run_kwargs.get("store_path") or cfg.run_dir / "samples.zarr"
    check_before_cluster(cfg, overrides, workers, path, fresh=bool(run_kwargs.get("fresh")))
    with open_client(cfg, overrides, workers=workers,
                     store_path=run_kwargs.get("store_path")) as session:
        if session.max_in_flight is not None:
            run_kwargs.setdefault("max_in_flight", session.max_in_flight)
        return run_sweep(cfg, client=session.client, **run_kwargs)


def run_in_allocation(config_path: str | Path, *, scheduler_file: str | Path,
                      store_path: str | Path | None = None, expected_workers: int = 1,
                      timeout: float = 600.0, fresh: bool = False,
                      progress: bool = False,
                      credentials: str | Path | None = None,
                      retry_failed: bool = False) -> SampleStore:
    """Run (or resume) a sweep on the Dask cluster of a batch job, then shut it down (see
    :func:`pipeline.sweep.clusters.allocation_client`)."""
    cfg = load_config(config_path)
    with allocation_client(scheduler_file, expected_workers=expected_workers,
                           timeout=timeout, credentials=credentials) as session:
        store = run_sweep(cfg, client=session.client, store_path=store_path, fresh=fresh,
                          progress=progress, max_in_flight=session.max_in_flight,
                          retry_failed=retry_failed)
        c = store.counts()
        print(f"helisweep: {store.path}: {c['done']} done, {c['failed']} failed, "
              f"{c['missing']} missing of {c['total']} samples", file=sys.stderr, flush=True)
        return store
