"""What a worker runs: one block of realisations, each solved at every (field, gate, energy)
point.

A *block* (one Dask task) is a few realisations at one geometry and disorder strength. Each
worker process keeps what is expensive to make and independent of the realisation: the
finalized Kwant system of each geometry (built once per worker) and the lead modes per
(geometry, energy, field) via Kwant's ``precalculate`` (the leads are clean and ungated, so a
gate sweep needs them once per energy); the solver keeps each system's assembled scattering
problem and its MUMPS analysis (:mod:`pipeline.transport.scattering`). A sample's disorder
depends only on the root seed, the realisation index and the lattice site
(:mod:`pipeline.physics.disorder`), so it is the same fixed sample across energy, gate and
field, whatever the batching or worker count.
"""

from __future__ import annotations

import time
from collections import OrderedDict

import numpy as np

from pipeline.errors import TransportError
from pipeline.physics.disorder import realise
from pipeline.sweep.config import SweepConfig, config_hash
from pipeline.sweep.runmodel import device_for, disorder_terms, gate_potentials, uses_spin_blocks
from pipeline.sweep.store import RealisationSamples, SampleStatus
from pipeline.system.mesh import build_system
from pipeline.transport.environment import limit_blas_threads
from pipeline.transport.landauer import parse_measurement
from pipeline.transport.solver import block_transmission_matrix, transmission_matrix

__all__ = ['system_for', 'solve_realisation', 'run_block']

_SYSTEM_CACHE: "OrderedDict[tuple, object]" = OrderedDict()
_PRECALC_CACHE: "OrderedDict[tuple, object]" = OrderedDict()
_MAX_SYSTEMS = 4
_MAX_PRECALC = 256


def _system_key(cfg: SweepConfig, geometry_index: int) -> tuple:
    return (config_hash(cfg), geometry_index)


def system_for(cfg: SweepConfig, geometry_index: int, *, reduced: bool = False):
    """The finalized system of a geometry, built once per process and then reused.

    ``reduced=True`` gives the spin-block (spin-up only) system when
    :func:`uses_spin_blocks` allows it, else the full four-band system.
    """

    if not _SYSTEM_CACHE:
        # this process's first system: one BLAS thread per worker process (one worker per
        # core), applied through threadpoolctl whatever BLAS the install brought
        limit_blas_threads(1)
    reduced = reduced and uses_spin_blocks(cfg)
    key = _system_key(cfg, geometry_index) + (reduced,)
    if key in _SYSTEM_CACHE:
        _SYSTEM_CACHE.move_to_end(key)
        return _SYSTEM_CACHE[key]
    device = device_for(cfg, geometry_index)
    dsys = build_system(
        device,
        cfg.material.parameters(),
        cfg.lattice.constant,
        contact_doping=cfg.contacts.doping,
        with_field=cfg.needs_field,
        spin_block=reduced,
    )
    _SYSTEM_CACHE[key] = dsys
    while len(_SYSTEM_CACHE) > _MAX_SYSTEMS:
        _SYSTEM_CACHE.popitem(last=False)
    return dsys


def lead_params(dsys, b_perp: float) -> dict:
    """Params the leads need (no onsite stack): field and lead Peierls phases."""
    if not dsys.with_field:
        return {"onsite_stack": None}
    out = {"b_perp": float(b_perp), "onsite_stack": None}
    out.update(dsys.peierls_phases(b_perp))
    return out


def _precalculated(cfg: SweepConfig, geometry_index: int, dsys, energy: float, b_perp: float):
    if not cfg.execution.precalculate_leads:
        return dsys.fsyst
    key = _system_key(cfg, geometry_index) + (dsys.spin_block, float(energy), float(b_perp))
    if key in _PRECALC_CACHE:
        _PRECALC_CACHE.move_to_end(key)
        return _PRECALC_CACHE[key]
    fs = dsys.fsyst.precalculate(energy, params=lead_params(dsys, b_perp))
    _PRECALC_CACHE[key] = fs
    while len(_PRECALC_CACHE) > _MAX_PRECALC:
        _PRECALC_CACHE.popitem(last=False)
    return fs


# --------------------------------------------------------------------------- one realisation
def solve_realisation(cfg: SweepConfig, key: tuple[int, int, int],
                      points: np.ndarray | None = None) -> RealisationSamples:
    """Solve one realisation at one geometry and strength for all (field, gate, energy) points.

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.
    key : tuple of int
        (realisation, geometry index, disorder strength index).
    points : numpy.ndarray of bool, optional
        Shape (field, gate, energy): solve only these points (a run with a precision target
        requests realisations per point); the others stay missing (NaN, status 0). Default:
        every point. A solved point gets the same numbers either way.
    """

    t0 = time.perf_counter()
    r, g, s = key
    axes = cfg.axes
    dsys = system_for(cfg, g, reduced=True)
    names = dsys.contact_names
    n = len(names)
    measurements = [parse_measurement(m) for m in cfg.measure.labels]
    nb, nv, ne = len(axes["b_perp"]), len(axes["gate_voltage"]), len(axes["energy"])
    out = RealisationSamples(
        transmission=np.full((nb, nv, ne, n, n), np.nan),
        modes=np.zeros((nb, nv, ne, n), dtype=np.int16),
        measurements=np.full((nb, nv, ne, len(measurements)), np.nan),
        status=np.zeros((nb, nv, ne), dtype=np.int8),
        failures=[],
    )
    potential, extra = realise(
        disorder_terms(cfg), dsys.mesh, seed=cfg.run.seed, realisation=r,
        strength=axes["disorder_strength"][s], outline=dsys.device.outline,
        contacts=dsys.device.contacts,
    )
    if points is None:
        points = np.ones((nb, nv, ne), dtype=bool)
    for ib, b in enumerate(axes["b_perp"]):
        for iv, vg in enumerate(axes["gate_voltage"]):
            if not points[ib, iv].any():
                continue
            terms = dict(b_perp=b, potential=potential, onsite_extra=extra,
                         gate_potentials=gate_potentials(cfg, dsys.device, vg))
            if dsys.spin_block:
                blocks = dsys.block_params(**terms)
            else:
                params = dsys.params(**terms)
            for ie, energy in enumerate(axes["energy"]):
                if not points[ib, iv, ie]:
                    continue
                try:
                    if dsys.spin_block:
                        res = block_transmission_matrix(
                            dsys, energy, blocks,
                            fsyst_for=lambda field, e=energy: _precalculated(cfg, g, dsys, e, field),
                        )
                    else:
                        fs = _precalculated(cfg, g, dsys, energy, b)
                        res = transmission_matrix(dsys, energy, params, fsyst=fs)
                except Exception as exc:  # recorded per sample; the sweep goes on
                    out.status[ib, iv, ie] = SampleStatus.FAILED
                    out.failures.append(((ib, iv, ie), f"{type(exc).__name__}: {exc}"[:500]))
                    continue
                out.transmission[ib, iv, ie] = res.matrix
                out.modes[ib, iv, ie] = res.modes
                for im, m in enumerate(measurements):
                    try:
                        out.measurements[ib, iv, ie, im] = m.evaluate(res.matrix, names)
                    except TransportError:
                        pass  # an ill-posed measurement for this sample stays NaN
                out.status[ib, iv, ie] = SampleStatus.DONE
    out.seconds = time.perf_counter() - t0
    return out


def run_block(cfg: SweepConfig, key: tuple[int, int, int], realisations: list[int],
              requested: np.ndarray | None = None) -> list[RealisationSamples]:
    """One task: :func:`solve_realisation` for each given realisation of a block.

    ``requested`` (field, gate, energy), in a run with a precision target: realisations
    requested per point at this geometry and strength; realisation ``r`` is solved only
    where ``r < requested``. Default: every point.
    """
    _, g, s = key
    if requested is None:
        return [solve_realisation(cfg, (r, g, s)) for r in realisations]
    requested = np.asarray(requested)
    return [solve_realisation(cfg, (r, g, s), points=r < requested) for r in realisations]
