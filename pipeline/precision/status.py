"""``helisweep status`` of a run with a precision target: how far each point is from it."""

from __future__ import annotations

import numpy as np

from pipeline.precision.judge import LSTAR_DIMS, lstar_relative_half_widths, point_half_widths
from pipeline.precision.plan import PrecisionPlan
from pipeline.sweep.config import AXES
from pipeline.sweep.store import SampleStatus, SampleStore

__all__ = ['precision_status', 'point_states']

#: states of a point, in the order they are counted
STATES = ("met", "max reached", "running")


def point_states(widths: np.ndarray, target: float, pending: np.ndarray,
                 requested: np.ndarray, max_realisations: int) -> np.ndarray:
    """State of each point: "running" while requested samples are missing or the point is
    above the target below ``max_realisations``; "met" at or below the target; else
    "max reached".

    Parameters
    ----------
    widths : numpy.ndarray
        Judged half-widths (NaN: unknown, counts as above the target).
    target : float
        The target.
    pending : numpy.ndarray of bool
        Requested samples still missing, per point.
    requested : numpy.ndarray of int
        Realisations requested per point.
    max_realisations : int
        The limit.

    Returns
    -------
    numpy.ndarray of str
    """
    met = widths <= target
    out = np.where(met, "met", np.where(requested >= max_realisations, "max reached", "running"))
    return np.where(pending, "running", out).astype(object)


def _where(store: SampleStore, dims: tuple[str, ...], idx: tuple) -> str:
    parts = []
    for d, i in zip(dims, idx):
        values = np.asarray(store.group[d][...], dtype=float)
        if values.size > 1:
            unit = store.group[d].attrs.get("units", "")
            parts.append(f"{d} = {values[i]:g}{'' if unit in ('', '1') else ' ' + unit}")
    return ", ".join(parts) or "the only point"


def _table(store, dims, states, ratio, describe, max_points: int) -> list[str]:
    counts = ", ".join(f"{int((states == s).sum())} {s}" for s in STATES)
    lines = [f"  {counts} (of {states.size} points)"]
    order = sorted(np.ndindex(states.shape),
                   key=lambda i: (states[i] != "running", -np.nan_to_num(ratio[i], nan=np.inf)))
    shown = order if len(order) <= max_points else order[:max_points]
    if len(shown) < len(order):
        lines.append(f"  the {len(shown)} farthest from the target:")
    for i in shown:
        lines.append(f"    {_where(store, dims, i)}: {describe(i)}, {states[i]}")
    return lines


def precision_status(store: SampleStore, *, config_dir=None, max_points: int = 12) -> str:
    """Per point (or the points farthest from it) the half-width against the target, the
    samples used and whether the point has stopped.

    Parameters
    ----------
    store : SampleStore
        A run's store.
    config_dir : str or Path, optional
        Directory of the config (geometry files with relative paths; L* only).
    max_points : int
        List every point up to this many, else the farthest this many.

    Returns
    -------
    str
        Empty when the store has no precision target.
    """
    settings = store.group.attrs.get("precision")
    requested = store.requested()
    if not settings or requested is None:
        return ""
    plan = PrecisionPlan.from_dict(dict(settings))
    st = store.status()
    r = np.arange(st.shape[0]).reshape((-1,) + (1,) * requested.ndim)
    pending = ((st == SampleStatus.MISSING) & (r < requested[None])).any(axis=0)
    lines = [f"precision target: rounds of {plan.step} realisations from {plan.first_block} up "
             f"to {plan.max_realisations} per point (now {int(requested.min())} to "
             f"{int(requested.max())} requested)"]
    if plan.target_ci is not None:
        w = point_half_widths(store, requested, plan)
        judged = np.where(w.needed > 0, np.inf, w.half_width)  # a sparse tail is not met
        states = point_states(judged, plan.target_ci, pending, requested,
                              plan.max_realisations)
        labels = [str(m) for m in np.asarray(store.group["measurement"][...]).tolist()]
        lines.append(f"target_ci = {plan.target_ci:g}: half-width of the {plan.confidence:.0%} "
                     f"interval of the mean (bootstrap of the summary), largest over the "
                     f"measurements, each in its own unit")

        def describe(i):
            if not np.isfinite(w.half_width[i]):
                return f"half-width unknown (fewer than 2 valid samples), {w.samples[i]} samples"
            tail = (f" (sparse tail: the interval asks for {w.needed[i]} realisations)"
                    if w.needed[i] else "")
            return (f"half-width {w.half_width[i]:.4g} ({labels[w.worst[i]]}) = "
                    f"{w.half_width[i] / plan.target_ci:.2f} x target{tail}, {w.samples[i]} samples")

        lines += _table(store, tuple(AXES), states, w.half_width / plan.target_ci, describe,
                        max_points)
    if plan.target_lstar_ci is not None:
        rel, kinds = lstar_relative_half_widths(store, requested, plan, config_dir=config_dir)
        states = point_states(rel, plan.target_lstar_ci, pending.any(axis=0),
                              requested.min(axis=0), plan.max_realisations)
        used = requested.min(axis=0)
        lines.append(f"target_lstar_ci = {plan.target_lstar_ci:g}: relative half-width of the "
                     f"{plan.confidence:.0%} L* interval, largest over "
                     f"{', '.join(plan.lstar_measurements)}")

        def describe_l(i):
            if not np.isfinite(rel[i]):
                return f"L* interval unknown, {used[i]} realisations"
            bound = ("" if kinds[i] == "interpolated" else
                     f" (L* is only an {kinds[i].replace('_', ' ')} of the swept lengths)")
            return (f"relative half-width {rel[i]:.4g}{bound} = "
                    f"{rel[i] / plan.target_lstar_ci:.2f} x target, {used[i]} realisations")

        lines += _table(store, LSTAR_DIMS, states, rel / plan.target_lstar_ci, describe_l,
                        max_points)
    return "\n".join(lines)
