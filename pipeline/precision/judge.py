"""How far each sweep point is from its precision target, from the stored samples.

The intervals are the ones the report states: the interval of the mean of
:func:`pipeline.analysis.statistics.row_statistics` (with the uniforms of
:func:`pipeline.analysis.statistics.resample_uniforms`, as the summary draws them) and the L*
interval of :func:`pipeline.analysis.lstar.longest_ballistic_length`. Only the done samples
below a point's limit count (failed and missing ones are not valid), so a judgement made at a
round boundary depends on nothing but the samples below that boundary.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import xarray as xr

from pipeline.analysis.lstar import longest_ballistic_length
from pipeline.analysis.statistics import resample_uniforms, row_statistics
from pipeline.precision.plan import PrecisionPlan
from pipeline.sweep.config import AXES
from pipeline.sweep.store import SampleStatus, SampleStore

__all__ = ['PointWidths', 'RowWidths', 'row_half_widths', 'point_half_widths',
           'lstar_relative_half_widths']

#: the dimensions of an L* point: every sweep dimension but the length (geometry)
LSTAR_DIMS = tuple(AXES)[1:]


@dataclass(frozen=True)
class PointWidths:
    """Half-widths of the interval of the mean at each sweep point (geometry,
    disorder_strength, b_perp, gate_voltage, energy); NaN where not judged or with fewer
    than two valid samples."""

    #: the largest half-width over the measurements, each in its own unit
    half_width: np.ndarray
    #: index of the measurement with that half-width (-1 where NaN)
    worst: np.ndarray
    #: done samples used
    samples: np.ndarray
    #: realisations the interval asks for when it sees a sparse tail (rare large deviations,
    #: the summary's ``realisations_needed``), the largest over the measurements; 0 where none
    needed: np.ndarray


@dataclass(frozen=True)
class RowWidths:
    """The judged interval of each row of samples (see :func:`row_half_widths`)."""

    #: (ci_high - ci_low) / 2; 0 where every valid sample is equal; NaN without an interval
    half_width: np.ndarray
    #: realisations the interval asks for (sparse tail) beyond the row's samples, else 0
    needed: np.ndarray
    #: the statistics of :func:`pipeline.analysis.statistics.row_statistics`
    stats: dict


def row_half_widths(x: np.ndarray, valid: np.ndarray, plan: PrecisionPlan) -> RowWidths:
    """Half-width of the interval of the mean of each row, as the summary computes it.

    Parameters
    ----------
    x : numpy.ndarray, shape (rows, samples)
        Samples in realisation order (column j is realisation j).
    valid : numpy.ndarray of bool, same shape
        Which samples count (done and below the point's limit).
    plan : PrecisionPlan
        Bootstrap settings.

    Returns
    -------
    RowWidths
    """
    u = resample_uniforms(plan.bootstrap_resamples, x.shape[1], plan.bootstrap_seed)
    stats = row_statistics(x, valid, u, plan.confidence)
    hw = (stats["ci_high"] - stats["ci_low"]) / 2.0
    # samples all equal (e.g. no disorder): nothing to narrow, whatever the interval method
    # makes of a zero spread
    hw = np.where(np.isnan(hw) & (stats["n"] >= 2) & (stats["sem"] == 0), 0.0, hw)
    needed = np.zeros(hw.shape, dtype=np.int64)
    if "realisations_needed" in stats:  # the summary's check for rare large deviations
        needed = np.where(stats["realisations_needed"] > stats["n"],
                          stats["realisations_needed"], 0).astype(np.int64)
    return RowWidths(hw, needed, stats)


def point_half_widths(store: SampleStore, limits: np.ndarray, plan: PrecisionPlan,
                      points: np.ndarray | None = None) -> PointWidths:
    """Half-width of the interval of the mean per point, from its samples below ``limits``.

    Parameters
    ----------
    store : SampleStore
        The run's store.
    limits : numpy.ndarray of int
        Per point (the sweep grid), the realisations to use: those with index below it.
    plan : PrecisionPlan
        Bootstrap settings (resamples, seed, confidence).
    points : numpy.ndarray of bool, optional
        Judge only these points (default all).

    Returns
    -------
    PointWidths
    """
    limits = np.asarray(limits, dtype=np.int64)
    points = np.ones(limits.shape, dtype=bool) if points is None else np.asarray(points, bool)
    half = np.full(limits.shape, np.nan)
    worst = np.full(limits.shape, -1, dtype=np.int64)
    used = np.zeros(limits.shape, dtype=np.int64)
    needed = np.zeros(limits.shape, dtype=np.int64)
    meas_arr, status_arr = store.group["measurements"], store.group["status"]
    for g, s in np.ndindex(limits.shape[:2]):
        sel = points[g, s]
        if not sel.any():
            continue
        n_max = int(limits[g, s][sel].max())
        x = np.asarray(meas_arr[:n_max, g, s], dtype=float)  # (R, B, V, E, M)
        st = np.asarray(status_arr[:n_max, g, s])  # (R, B, V, E)
        r = np.arange(n_max).reshape(-1, 1, 1, 1)
        ok = (st == SampleStatus.DONE) & (r < limits[g, s][None])
        n_m = x.shape[-1]
        # rows of the judged points only: (point, measurement) x realisation
        rows_x = np.moveaxis(x, 0, -1)[sel].reshape(-1, n_max)
        rows_ok = np.moveaxis(np.broadcast_to(ok[..., None], x.shape), 0, -1)[sel]
        rw = row_half_widths(rows_x, rows_ok.reshape(-1, n_max), plan)
        hw = rw.half_width.reshape(-1, n_m)
        finite = np.isfinite(hw).all(axis=-1)
        # the largest over measurements; a measurement without an interval leaves it unknown
        safe = np.where(np.isfinite(hw), hw, -np.inf)
        half[g, s][sel] = np.where(finite, safe.max(axis=-1), np.nan)
        worst[g, s][sel] = np.where(finite, safe.argmax(axis=-1), -1)
        used[g, s][sel] = ok.sum(axis=0)[sel]
        needed[g, s][sel] = rw.needed.reshape(-1, n_m).max(axis=-1)
    return PointWidths(half, worst, used, needed)


def lstar_relative_half_widths(store: SampleStore, limits: np.ndarray, plan: PrecisionPlan,
                               units: np.ndarray | None = None, config_dir=None,
                               ) -> tuple[np.ndarray, np.ndarray]:
    """Relative half-width of the L* interval, ``(lstar_ci_high - lstar_ci_low) / 2 / lstar``,
    per L* point (disorder_strength, b_perp, gate_voltage, energy), the largest over the
    plan's measurements.

    Parameters
    ----------
    store : SampleStore
        The run's store (a length sweep).
    limits : numpy.ndarray of int
        Per sweep point, the realisations to use (index below it).
    plan : PrecisionPlan
        The measurements and the L* settings (tolerance, bootstrap).
    units : numpy.ndarray of bool, optional
        Judge only these L* points (default all).
    config_dir : str or Path, optional
        Directory of the config (for geometry files given by relative paths).

    Returns
    -------
    relative : numpy.ndarray
        Shape (disorder_strength, b_perp, gate_voltage, energy); NaN where not judged or
        without an interval (fewer than two usable realisations, or L* not positive).
    lstar_kind : numpy.ndarray of str
        The kind of the direct L* of the worst measurement ("" where NaN).
    """
    limits = np.asarray(limits, dtype=np.int64)
    shape = limits.shape[1:]
    units = np.ones(shape, dtype=bool) if units is None else np.asarray(units, bool)
    relative = np.full(shape, np.nan)
    kinds = np.full(shape, "", dtype=object)
    if not units.any():
        return relative, kinds
    n_max = int(limits[:, units].max())
    ds = xr.open_zarr(str(store.path), consolidated=False)
    ds = ds.drop_vars([v for v in ds.data_vars if v not in ("measurements", "status")])
    ds = ds.isel(realisation=slice(0, n_max))
    status = np.asarray(ds["status"].transpose("realisation", *AXES).values)
    r = np.arange(n_max).reshape((-1,) + (1,) * limits.ndim)
    status = np.where(r < limits[None], status, SampleStatus.MISSING).astype(status.dtype)
    ds = ds.assign(status=(("realisation",) + tuple(AXES), status))
    index_of = {d: {float(v): i for i, v in enumerate(np.asarray(ds[d].values, dtype=float))}
                for d in LSTAR_DIMS}
    worst = np.full(shape, -np.inf)
    unknown = np.zeros(shape, dtype=bool)
    seen = np.zeros(shape, dtype=bool)
    for label in plan.lstar_measurements:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # points without samples are listed as skipped
            table = longest_ballistic_length(
                ds, label, tolerance=plan.lstar_tolerance,
                bootstrap_resamples=plan.bootstrap_resamples, seed=plan.bootstrap_seed,
                confidence=plan.confidence, config_dir=config_dir)
        found = np.zeros(shape, dtype=bool)
        for res in table.results:
            coords = dict(res.point)
            idx = tuple(index_of[d][float(coords[d])] if d in coords else 0 for d in LSTAR_DIMS)
            found[idx] = True
            with np.errstate(invalid="ignore", divide="ignore"):
                rel = (res.lstar_ci_high - res.lstar_ci_low) / 2.0 / res.lstar
            if not (np.isfinite(rel) and res.lstar > 0):
                unknown[idx] = True
                continue
            if rel > worst[idx]:
                worst[idx] = rel
                kinds[idx] = res.lstar_kind
        unknown |= ~found
        seen |= found
    relative = np.where(units & ~unknown & seen, worst, np.nan)
    kinds = np.where(np.isfinite(relative), kinds, "")
    return relative, kinds

