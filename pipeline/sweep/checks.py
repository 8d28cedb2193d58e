"""Everything about a run that can be checked before compute, refused with the reason.

Cheap checks come first (geometry, contacts, gates, measurement labels), then resources
(memory per worker from the device area, disk for the store), then the discretisation (the
lattice bulk gap against the continuum one) and open lead modes at every energy; so a lattice
far too fine is refused before anything large is built.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np

from pipeline.device.outline import validate_device
from pipeline.errors import HelisweepError, ModelError, TransportError
from pipeline.physics.bhz import continuum_bulk_gap
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.runmodel import device_for
from pipeline.sweep.store import SampleStore
from pipeline.sweep.tasks import lead_params, system_for
from pipeline.system.mesh import per_contact, strip_lead
from pipeline.system.preflight import estimate_memory_mb, lattice_bulk_gap
from pipeline.transport.landauer import parse_measurement
from pipeline.transport.solver import open_modes

__all__ = ['check_resources', 'validate_run']


# --------------------------------------------------------------------------- checks before compute
def validate_run(
    cfg: SweepConfig,
    n_workers: int | None = None,
    store_path: str | Path | None = None,
    worker_memory_mb: float | None = None,
    *,
    fresh: bool = False,
    cheap_only: bool = False,
) -> tuple[str, ...]:
    """Everything that can be checked before compute: geometry, memory and disk, the
    discretisation, open lead modes, and last the store (:meth:`pipeline.sweep.store.
    SampleStore.check_resume`: another run's store or one in use; skipped with ``fresh``).
    Cheap checks come first, so a lattice far too fine is refused before anything large is
    built. ``cheap_only=True`` checks geometry, labels and the store only: before a Slurm
    cluster starts, when the workers' memory is not known yet (the driver runs the full checks
    on the actual workers).

    Returns the contact names. Raises a :class:`HelisweepError` subclass with the fix.
    """

    names = None
    for g in range(len(cfg.axes["geometry"])):
        device = device_for(cfg, g)
        validate_device(device, cfg.lattice.constant)
        if names is not None and device.contact_names != names:
            raise HelisweepError(
                f"the geometry sweep changes the contacts ({names} -> {device.contact_names}); "
                f"a sweep must keep the same contacts"
            )
        names = device.contact_names
        for gate in cfg.gates.driven or []:
            if gate not in device.gate_names:
                raise HelisweepError(
                    f"'gates.driven' names gate {gate!r}, which device {device.name!r} does not "
                    f"have (gates: {', '.join(device.gate_names) or 'none'})"
                )
    if len(names) < 2:
        raise HelisweepError(f"transport needs at least two contacts; the device has {len(names)}")
    for label in cfg.measure.labels:

        parse_measurement(label).indices(names)
    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    if cheap_only:
        SampleStore.check_resume(path, cfg, fresh=fresh)
        return names
    check_resources(cfg, n_workers or cfg.execution.workers or os.cpu_count() or 1, path,
                    worker_memory_mb)
    _check_discretisation(cfg)
    _check_open_modes(cfg, names)
    # last: a bad input is named as such even when a store of another run is in the way
    SampleStore.check_resume(path, cfg, fresh=fresh)
    return names


#: relative error of the lattice bulk gap above which a run is refused (the preflight warns
#: from 5 %); common practice, no source
_MAX_GAP_ERROR = 0.2


def _check_discretisation(cfg: SweepConfig) -> None:
    """Refuse a lattice so coarse that the discretised bands misrepresent the model."""

    material = cfg.material.parameters()
    a = cfg.lattice.constant
    gap_c = continuum_bulk_gap(material)[0]
    gap_l = lattice_bulk_gap(material, a)[0]
    if gap_c > 0 and abs(gap_l - gap_c) > _MAX_GAP_ERROR * gap_c:
        raise ModelError(
            f"lattice too coarse for the model: at a = {a:g} nm the lattice bulk gap is "
            f"{gap_l:.3g} meV against {gap_c:.3g} meV in the continuum model "
            f"({100 * abs(gap_l - gap_c) / gap_c:.0f} % off, limit {100 * _MAX_GAP_ERROR:.0f} %). "
            f"Use a smaller lattice constant (`helisweep preview` reports the discretisation error)"
        )


def _check_open_modes(cfg: SweepConfig, names: tuple[str, ...]) -> None:
    """Refuse energies where a lead has no open mode (no current could enter there)."""

    material = cfg.material.parameters()
    a = cfg.lattice.constant
    widths = set()
    for g in range(len(cfg.axes["geometry"])):
        device = device_for(cfg, g)
        doping = per_contact(cfg.contacts.doping, device)
        widths |= {(int(round(c.width / a)), d, c.name) for c, d in zip(device.contacts, doping)}
    # Zero field: one clean strip per distinct (width, doping); the BHZ lattice model is
    # symmetric under 90-degree rotations, so the lead direction does not change the count.
    leads = {}
    for w, d, name in sorted(widths):
        if (w, d) not in leads:
            # without BIA the leads' spin blocks have the same bands: count on one of them
            leads[(w, d)] = strip_lead(material, a, w, doping=d,
                                       spin_block=material.delta_bia == 0)
        for energy in cfg.axes["energy"]:
            n = leads[(w, d)].modes(energy, params={})[0].velocities.size // 2
            if n == 0:
                raise TransportError(
                    f"at E = {energy!r} meV the lead of contact {name!r} ({w * a:g} nm wide, "
                    f"doping {d:g} meV) has no open mode, so no current can enter there. Give the "
                    f"contacts a doping (contacts.doping, tens of meV: metallic contacts) or choose "
                    f"energies inside a band of the leads"
                )
    if cfg.needs_field:  # in a field, check the actual leads of the first geometry
        dsys = system_for(cfg, 0)
        for b in cfg.axes["b_perp"]:
            for energy in cfg.axes["energy"]:
                modes = open_modes(dsys, energy, lead_params(dsys, b))
                if np.any(modes == 0):
                    closed = [names[i] for i in np.flatnonzero(modes == 0)]
                    raise TransportError(
                        f"at E = {energy!r} meV and B = {b!r} T lead(s) {closed} have no open "
                        f"mode; give the contacts a doping (contacts.doping) or change the energy"
                    )


def check_resources(
    cfg: SweepConfig, n_workers: int, store_path: Path, worker_memory_mb: float | None = None
) -> dict[str, float]:
    """Estimate memory per worker (largest geometry) and the store's disk size; refuse what
    will not fit, with the numbers. Returns the estimates (MB).

    ``worker_memory_mb`` is the smallest memory limit the workers report (remote workers on
    a cluster); without it this machine's memory is shared among ``n_workers``.
    """

    a = cfg.lattice.constant
    largest, worst_mb = 0, 0.0
    n_leads = 0
    for g in range(len(cfg.axes["geometry"])):
        device = device_for(cfg, g)
        # from the area, not the mesh: a lattice far too fine must be refused before the
        # mesh itself exhausts the memory
        n_sites = int(device.outline.area / a**2)
        width = max(int(round(c.width / a)) for c in device.contacts)
        mb = estimate_memory_mb(n_sites, width)
        n_leads = len(device.contacts)
        if mb > worst_mb:
            largest, worst_mb = n_sites, mb
    total_mb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 1e6
    per_worker = worker_memory_mb or total_mb / max(n_workers, 1)
    if worst_mb > 0.9 * per_worker:
        where = ("as their memory limit" if worker_memory_mb
                 else f"of the {total_mb:,.0f} MB of this machine")
        raise HelisweepError(
            f"the largest geometry ({largest} sites at a = {a:g} nm) needs an estimated "
            f"{worst_mb:,.0f} MB per solve, but each of the {n_workers} worker(s) has about "
            f"{per_worker:,.0f} MB {where}. Use fewer workers per node (more memory each), a "
            f"coarser lattice (check `helisweep preflight`), or a smaller device"
        )
    # with a precision target the store may grow to the realisation limit at every point
    n_real = cfg.run.realisation_limit if cfg.run.has_target else cfg.run.realisations
    n_samples = n_real * int(np.prod([len(v) for v in cfg.axes.values()]))
    per_sample = 8 * n_leads * n_leads + 2 * n_leads + 8 * len(cfg.measure.labels) + 1
    disk_mb = n_samples * per_sample / 1e6 + 1.0  # uncompressed upper bound + metadata
    probe = Path(store_path).resolve()
    while not probe.exists():
        probe = probe.parent
    free_mb = shutil.disk_usage(probe).free / 1e6
    if disk_mb > 0.9 * free_mb:
        raise HelisweepError(
            f"the store for {n_samples:,} samples needs up to {disk_mb:,.0f} MB but only "
            f"{free_mb:,.0f} MB are free at {str(probe)!r}. Free space, choose another run "
            f"directory, or reduce realisations (max_realisations with a precision target) or "
            f"sweep points"
        )
    return {"memory_per_solve_mb": worst_mb, "memory_per_worker_mb": per_worker,
            "store_mb": disk_mb, "free_disk_mb": free_mb}
