"""One sample of a run solved in full, for inspection (the current map of the figures).

The sweep itself keeps only transmission matrices. :func:`current_map` rebuilds one sample --
device, disorder realisation, gate potentials and system, exactly as
:func:`pipeline.sweep.tasks.solve_realisation` builds them -- and solves it for the local
current density injected from one contact (:func:`pipeline.transport.current.current_density`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.device.outline import Device
from pipeline.errors import HelisweepError
from pipeline.physics.disorder import realise
from pipeline.sweep.config import AXES, SweepConfig
from pipeline.sweep.runmodel import disorder_terms, gate_potentials
from pipeline.sweep.tasks import system_for
from pipeline.transport.current import CurrentDensity, current_density

__all__ = ['CurrentMap', 'current_map', 'axis_indices']

#: Keys of a point that are not sweep axes. ``lead`` is the older spelling of ``contact``.
_POINT_KEYS = ("realisation", "contact", "lead")


@dataclass(frozen=True)
class CurrentMap:
    """The local current density of one sample, with where it was taken.

    Attributes
    ----------
    density : CurrentDensity
        Site positions, current vectors and magnitudes, distances from the free edges and the
        edge fraction (see :class:`pipeline.transport.current.CurrentDensity`).
    contact : str
        Name of the injecting contact.
    point : dict
        The sample: ``realisation`` and the value of every sweep axis (in the axis units).
    device : Device
        The device the sample was solved on.
    lattice_constant : float
        Lattice constant (nm).
    """

    density: CurrentDensity
    contact: str
    point: dict
    device: Device
    lattice_constant: float


def axis_indices(cfg: SweepConfig, point: Mapping[str, Any] | None) -> dict[str, int]:
    """Index on every sweep axis of a point given by axis values.

    Parameters
    ----------
    cfg : SweepConfig
    point : mapping, optional
        Axis values in the axis units; omitted axes take the first value, energy the middle.
        ``realisation`` and ``contact`` (or ``lead``) may be present and are ignored here.

    Returns
    -------
    dict of str to int

    Raises
    ------
    HelisweepError
        If a value is not on its axis or a key is neither an axis nor a point key.
    """
    point = dict(point or {})
    out = {}
    for dim, values in cfg.axes.items():
        values = np.asarray(values, dtype=float)
        if dim not in point:
            out[dim] = len(values) // 2 if dim == "energy" else 0
            continue
        hit = np.flatnonzero(np.isclose(values, float(point[dim]), rtol=1e-9, atol=1e-9))
        if hit.size == 0:
            raise HelisweepError(
                f"{dim} = {point[dim]!r} {AXES[dim]} is not on the run's sweep axis; "
                f"choose one of {', '.join(f'{float(v):g}' for v in values)}"
            )
        out[dim] = int(hit[0])
    unknown = sorted(set(point) - set(AXES) - set(_POINT_KEYS))
    if unknown:
        raise HelisweepError(f"unknown key {unknown[0]!r} in the current-map point; use "
                             f"realisation, contact, {', '.join(AXES)}")
    return out


def _realisation(cfg: SweepConfig, point: Mapping[str, Any]) -> int:
    r = int(point.get("realisation", 0))
    if not 0 <= r < cfg.run.realisations:
        raise HelisweepError(
            f"realisation {r!r} is outside the run's 0..{cfg.run.realisations - 1}"
        )
    return r


def _contact_index(names: Sequence[str], contact: int | str) -> int:
    if isinstance(contact, str):
        if contact not in names:
            raise HelisweepError(f"contact {contact!r} is not on the device ({', '.join(names)})")
        return names.index(contact)
    index = int(contact)
    if not 0 <= index < len(names):
        raise HelisweepError(f"contact index {contact!r} is outside 0..{len(names) - 1}")
    return index


def _sample_params(cfg: SweepConfig, dsys: Any, values: Mapping[str, float],
                   realisation: int) -> dict:
    """Kwant params of one sample, built as the sweep builds them."""
    potential, extra = realise(
        disorder_terms(cfg), dsys.mesh, seed=cfg.run.seed, realisation=realisation,
        strength=values["disorder_strength"], outline=dsys.device.outline,
        contacts=dsys.device.contacts,
    )
    return dsys.params(b_perp=values["b_perp"], potential=potential, onsite_extra=extra,
                       gate_potentials=gate_potentials(cfg, dsys.device, values["gate_voltage"]))


def current_map(cfg: SweepConfig, point: Mapping[str, Any] | None = None, *,
                contact: int | str = 0) -> CurrentMap:
    """Local current density of one disorder realisation at one sweep point.

    The system and the disorder are rebuilt exactly as
    :func:`pipeline.sweep.tasks.solve_realisation` builds them (same
    :func:`pipeline.physics.disorder.realise` call and ``DeviceSystem.params``), on the full
    four-band system.

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.
    point : mapping, optional
        ``realisation`` (index, default 0), ``contact`` (overrides the argument) and
        sweep-axis values in their units (``geometry`` nm, ``disorder_strength``, ``b_perp``
        T, ``gate_voltage`` V, ``energy`` meV); omitted axes take the first value, energy the
        middle one.
    contact : int or str, optional
        Injecting contact (index or name), default the first contact.

    Returns
    -------
    CurrentMap

    Raises
    ------
    HelisweepError
        If the point is not a sample of the run or the contact is not on the device.
    """
    point = dict(point or {})
    idx = axis_indices(cfg, point)
    r = _realisation(cfg, point)
    contact = point.get("contact", point.get("lead", contact))
    dsys = system_for(cfg, idx["geometry"])
    names = list(dsys.contact_names)
    index = _contact_index(names, contact)
    values = {dim: cfg.axes[dim][i] for dim, i in idx.items()}
    params = _sample_params(cfg, dsys, values, r)
    density = current_density(dsys, values["energy"], params, index)
    full_point = {"realisation": r, **{d: float(v) for d, v in values.items()}}
    return CurrentMap(density, names[index], full_point, dsys.device,
                      float(cfg.lattice.constant))
