"""The stopping loop: add blocks of realisations only where the interval is still too wide.

Round k computes, at every point still running, the realisations below the boundary ``B_k``
(:mod:`pipeline.precision.plan`); at the boundary each running point is judged from its done
samples below ``B_k`` (:mod:`pipeline.precision.judge`). A point above its target gets the
next block (up to ``max_realisations``); the others stop for good. The realisations
requested per point are recorded in the store (``requested_realisations``) after each
decision.

Every call replays the decisions from the first boundary: each is a function of samples
that are fixed (a sample depends on the seed and its indices only), so a resumed run makes
the same decisions and computes the same samples whatever the number of workers and wherever
an earlier run was killed; replayed rounds find their samples stored and compute nothing.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from pipeline.errors import ConfigError
from pipeline.precision.judge import lstar_relative_half_widths, point_half_widths
from pipeline.precision.plan import PrecisionPlan, plan_precision
from pipeline.sweep.checks import validate_run
from pipeline.sweep.clusters import open_client
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.driver import SweepSession, open_sweep
from pipeline.sweep.store import SampleStore

__all__ = ['run_to_precision', 'decide']


def run_to_precision(cfg: SweepConfig, *, client=None, store_path: str | Path | None = None,
                     fresh: bool = False, progress: bool = True, retry_failed: bool = False,
                     max_in_flight: int | None = None,
                     max_tasks: int | None = None) -> SampleStore:
    """Run (or resume) a sweep with a precision target and return its store.

    Parameters
    ----------
    cfg : SweepConfig
        A configuration with ``[run] target_ci`` and/or ``target_lstar_ci``.
    client : dask.distributed.Client, optional
        Default: one obtained through the config's ``[cluster]`` table for the call.
    store_path : str or Path, optional
        Default ``<run directory>/samples.zarr``.
    fresh : bool
        Move a store of a different configuration aside instead of refusing it.
    progress : bool
        Progress output on standard error.
    max_in_flight : int, optional
        Tasks in flight at most.
    max_tasks : int, optional
        Stop after that many tasks (a partial run that a later call resumes).

    Returns
    -------
    SampleStore

    Raises
    ------
    ConfigError
        No target, or a target this run cannot have (before any compute).
    """
    plan = plan_precision(cfg)
    if plan is None:
        raise ConfigError("the config sets no precision target ([run] target_ci or "
                          "target_lstar_ci); run it with pipeline.sweep.driver.run_sweep")
    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    if client is None:
        validate_run(cfg, None, path, None, fresh=fresh)  # before any cluster starts
        with open_client(cfg, store_path=path) as session:
            return run_to_precision(cfg, client=session.client, store_path=path, fresh=fresh,
                                    retry_failed=retry_failed,
                                    progress=progress,
                                    max_in_flight=max_in_flight or session.max_in_flight,
                                    max_tasks=max_tasks)
    session = open_sweep(cfg, client, path, fresh=fresh, progress=progress,
                         retry_failed=retry_failed,
                         max_in_flight=max_in_flight)
    try:
        requested, boundary, complete = _rounds(cfg, plan, session, max_tasks)
        return session.finish(precision={"last_boundary": boundary, "complete": complete,
                                         "largest_request": int(requested.max())})
    finally:
        session.store.release_lock()  # also when a round ends in an error


def _rounds(cfg: SweepConfig, plan: PrecisionPlan, session: SweepSession,
            max_tasks: int | None) -> tuple[np.ndarray, int, bool]:
    """Replay and extend the rounds; returns the request, the last boundary reached and
    whether every decision could be made (False after ``max_tasks``)."""
    store = session.store
    stored = store.requested()
    settings = plan.to_dict()
    requested = np.full(store.shape[1:], plan.first_block, dtype=np.int64)
    lstar_met = np.zeros(requested.shape[1:], dtype=bool)
    budget = max_tasks
    boundary = plan.first_block
    for boundary in plan.boundaries:
        if stored is None or (requested > stored).any():
            store.write_requested(requested, settings)
            stored = requested.copy()
        ran = session.compute(requested, max_tasks=budget)
        if budget is not None:
            budget -= ran
        if session.pending(requested):
            return requested, boundary, False  # interrupted by max_tasks: resumed later
        more = decide(store, plan, requested, boundary, lstar_met, config_dir=cfg.base_dir)
        following = plan.next_boundary(boundary)
        running = int((requested == boundary).sum())
        if session.progress:
            tail = (f"next block up to {following}" if following and more.any() else
                    "max_realisations reached" if more.any() else "all points meet the target")
            print(f"[precision] {boundary} realisations: {int(more.sum())} of {running} running "
                  f"point(s) above the target; {tail}", file=sys.stderr, flush=True)
        if following is None or not more.any():
            break
        requested = np.where(more, following, requested)
    if stored is None or not np.array_equal(requested, stored):
        store.write_requested(requested, settings)
    return requested, boundary, True


def decide(store: SampleStore, plan: PrecisionPlan, requested: np.ndarray, boundary: int,
           lstar_met: np.ndarray, *, config_dir=None) -> np.ndarray:
    """Which points get the next block at ``boundary``.

    The running points are those whose request is the boundary; a running point continues
    when its half-width is above ``target_ci`` (or unknown: fewer than two valid samples),
    or when the L* of its (strength, field, gate, energy) point is above
    ``target_lstar_ci`` (or unknown) and has never met it before. A point whose interval
    sees a sparse tail (rare large deviations; the summary's ``realisations_needed`` above
    its samples) is not narrow enough whatever its width.

    Parameters
    ----------
    store : SampleStore
        The run's store, with every requested sample below the boundary computed.
    plan : PrecisionPlan
        The targets.
    requested : numpy.ndarray of int
        Realisations requested per point so far.
    boundary : int
        The round boundary.
    lstar_met : numpy.ndarray of bool
        L* points (disorder_strength, b_perp, gate_voltage, energy) that met the L* target at
        an earlier boundary; updated in place.
    config_dir : str or Path, optional
        Directory of the config (geometry files with relative paths).

    Returns
    -------
    numpy.ndarray of bool
        Per sweep point: gets the next block.
    """
    running = requested == boundary
    more = np.zeros(requested.shape, dtype=bool)
    if plan.target_ci is not None:
        widths = point_half_widths(store, requested, plan, points=running)
        met = (widths.half_width <= plan.target_ci) & (widths.needed == 0)
        more |= running & ~met
    if plan.target_lstar_ci is not None:
        units = running.any(axis=0) & ~lstar_met
        rel, _ = lstar_relative_half_widths(store, requested, plan, units=units,
                                            config_dir=config_dir)
        met = units & (rel <= plan.target_lstar_ci)
        lstar_met |= met
        more |= running & (units & ~met)[None]
    return more
