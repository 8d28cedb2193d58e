"""Execution: spread a sweep's disorder realisations over Dask workers and store the samples.

Work unit (a *task*): one disorder realisation at one geometry and one disorder strength,
solved at every (field, gate voltage, energy) point of the sweep. The disorder of a sample is
a function of (root seed, realisation index, lattice site) only (see
:mod:`pipeline.disorder`), so it is the same fixed sample across energy, gate and field --
as in a real device swept in gate voltage -- and the numbers do not depend on task order,
batching or worker count.

Each worker process keeps what is expensive to make and independent of the realisation:

* the finalized Kwant system of each geometry (built once per worker);
* lead modes per (geometry, energy, field) via Kwant's ``precalculate`` (leads are clean and
  ungated, so a gate sweep needs them only once per energy).

Workers return small arrays; the driver alone writes them to the Zarr store as tasks
finish, so Zarr writes stay off the workers' critical path and there is a single writer.
At most a bounded window of tasks is in flight, which also bounds what a killed run loses.
"""

from __future__ import annotations

import os
import sys
import time
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .config import SweepConfig, config_hash
from .errors import HelisweepError, StoreError, TransportError
from .store import STATUS_DONE, STATUS_FAILED, SampleStore, TaskResult

__all__ = [
    "check_resources",
    "device_for",
    "system_for",
    "run_task",
    "run_block",
    "run_sweep",
    "validate_run",
    "local_client",
    "quantised_values",
    "uses_spin_blocks",
]

_SYSTEM_CACHE: "OrderedDict[tuple, object]" = OrderedDict()
_PRECALC_CACHE: "OrderedDict[tuple, object]" = OrderedDict()
_MAX_SYSTEMS = 4
_MAX_PRECALC = 256


# --------------------------------------------------------------------------- devices & systems
def device_for(cfg: SweepConfig, geometry_index: int):
    """The device at one point of the geometry axis (a template or a geometry file)."""
    from .geometry import TEMPLATES
    from .geometry_io import load_device

    dev = cfg.device
    if dev.file is not None:
        layer_map = {k: tuple(v) for k, v in dev.layer_map.items()} if dev.layer_map else None
        return load_device(Path(cfg.base_dir) / dev.file, layer_map=layer_map)
    params = dict(dev.parameters)
    if cfg.sweep.geometry is not None:
        params[cfg.sweep.geometry.parameter] = cfg.axes["geometry"][geometry_index]
    return TEMPLATES[dev.template](**params, name=cfg.run.name)


def quantised_values(cfg: SweepConfig, geometry_index: int = 0) -> dict[str, float]:
    """Ideal quantum spin Hall value of every requested measurement on the run's device.

    Computed by the same Landauer-Buttiker solver from ideal helical-edge transmissions
    (:func:`pipeline.landauer.helical_ring_transmissions`), e.g. 2 e^2/h for a two-terminal
    strip and h/4e^2 for R14,23 on an H-bar. NaN where the ideal value is undefined.
    """
    from .errors import TransportError
    from .geometry import perimeter_order
    from .landauer import helical_ring_transmissions, parse_measurement

    device = device_for(cfg, geometry_index)
    T = helical_ring_transmissions(perimeter_order(device), len(device.contacts))
    out = {}
    for label in cfg.measure.report:
        try:
            out[label] = float(parse_measurement(label).evaluate(T, device.contact_names))
        except TransportError:
            out[label] = float("nan")
    return out


def _system_key(cfg: SweepConfig, geometry_index: int) -> tuple:
    return (config_hash(cfg), geometry_index)


def uses_spin_blocks(cfg: SweepConfig) -> bool:
    """True when the run's Hamiltonian conserves S_z and the reduction is not switched off.

    S_z is conserved without bulk-inversion asymmetry and without in-plane exchange (the
    field is perpendicular); then the spin-up and spin-down blocks are independent
    half-size problems (see :meth:`pipeline.mesh.DeviceSystem.block_params`).
    """
    from .disorder import conserves_sz

    return (cfg.execution.spin_blocks == "auto"
            and cfg.material.parameters().delta_bia == 0
            and conserves_sz(_disorder_terms(cfg)))


def system_for(cfg: SweepConfig, geometry_index: int, *, reduced: bool = False):
    """The finalized system of a geometry, built once per process and then reused.

    ``reduced=True`` gives the spin-block (spin-up only) system when
    :func:`uses_spin_blocks` allows it, else the full four-band system.
    """
    from .mesh import build_system

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


def _lead_params(dsys, b_perp: float) -> dict:
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
    fs = dsys.fsyst.precalculate(energy, params=_lead_params(dsys, b_perp))
    _PRECALC_CACHE[key] = fs
    while len(_PRECALC_CACHE) > _MAX_PRECALC:
        _PRECALC_CACHE.popitem(last=False)
    return fs


def _disorder_terms(cfg: SweepConfig):
    from . import disorder as dis

    out = []
    for term in cfg.disorder:
        if term.kind == "anderson":
            out.append(dis.Anderson(width=term.width))
        elif term.kind == "smooth":
            out.append(dis.SmoothPotential(term.amplitude, term.correlation_length))
        elif term.kind == "magnetic":
            out.append(dis.MagneticExchange(term.inplane, term.out_of_plane, term.density, term.aligned))
        elif term.kind == "roughness":
            out.append(dis.EdgeRoughness(term.amplitude, term.correlation_length))
    return out


def _gate_potentials(cfg: SweepConfig, device, voltage: float) -> dict[str, float]:
    """Potential energy (meV) of each driven gate: U = -lever_arm * V_gate."""
    driven = cfg.gates.driven if cfg.gates.driven is not None else list(device.gate_names)
    return {g: -cfg.gates.lever_arm * voltage for g in driven}


# --------------------------------------------------------------------------- one task
def run_task(cfg: SweepConfig, key: tuple[int, int, int]) -> TaskResult:
    """Solve one realisation at one geometry and strength for all (field, gate, energy) points."""
    from .disorder import realise
    from .landauer import parse_measurement
    from .transport import block_transmission_matrix, transmission_matrix

    t0 = time.perf_counter()
    r, g, s = key
    axes = cfg.axes
    dsys = system_for(cfg, g, reduced=True)
    names = dsys.contact_names
    n = len(names)
    measurements = [parse_measurement(m) for m in cfg.measure.report]
    nb, nv, ne = len(axes["b_perp"]), len(axes["gate_voltage"]), len(axes["energy"])
    out = TaskResult(
        transmission=np.full((nb, nv, ne, n, n), np.nan),
        modes=np.zeros((nb, nv, ne, n), dtype=np.int16),
        measurements=np.full((nb, nv, ne, len(measurements)), np.nan),
        status=np.zeros((nb, nv, ne), dtype=np.int8),
        failures=[],
    )
    potential, extra = realise(
        _disorder_terms(cfg), dsys.mesh, seed=cfg.run.seed, realisation=r,
        strength=axes["disorder_strength"][s], outline=dsys.device.outline,
        contacts=dsys.device.contacts,
    )
    for ib, b in enumerate(axes["b_perp"]):
        for iv, vg in enumerate(axes["gate_voltage"]):
            terms = dict(b_perp=b, potential=potential, onsite_extra=extra,
                         gate_potentials=_gate_potentials(cfg, dsys.device, vg))
            if dsys.spin_block:
                blocks = dsys.block_params(**terms)
            else:
                params = dsys.params(**terms)
            for ie, energy in enumerate(axes["energy"]):
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
                    out.status[ib, iv, ie] = STATUS_FAILED
                    out.failures.append(((ib, iv, ie), f"{type(exc).__name__}: {exc}"[:500]))
                    continue
                out.transmission[ib, iv, ie] = res.matrix
                out.modes[ib, iv, ie] = res.modes
                for im, m in enumerate(measurements):
                    try:
                        out.measurements[ib, iv, ie, im] = m.evaluate(res.matrix, names)
                    except TransportError:
                        pass  # an ill-posed measurement for this sample stays NaN
                out.status[ib, iv, ie] = STATUS_DONE
    out.seconds = time.perf_counter() - t0
    return out


def run_block(cfg: SweepConfig, key: tuple[int, int, int], realisations: list[int]) -> list[TaskResult]:
    """One task: :func:`run_task` for each of the given realisations of a block."""
    _, g, s = key
    return [run_task(cfg, (r, g, s)) for r in realisations]


# --------------------------------------------------------------------------- checks before compute
def validate_run(
    cfg: SweepConfig,
    n_workers: int | None = None,
    store_path: str | Path | None = None,
    worker_memory_mb: float | None = None,
) -> tuple[str, ...]:
    """Everything that can be checked before compute: geometry, memory and disk, the
    discretisation, open lead modes. Cheap checks come first, so a lattice far too fine is
    refused before anything large is built.

    Returns the contact names. Raises a :class:`HelisweepError` subclass with the fix.
    """
    from .geometry import validate_device

    names = None
    for g in range(len(cfg.axes["geometry"])):
        device = device_for(cfg, g)
        validate_device(device, cfg.lattice.constant)
        if names is not None and device.contact_names != names:
            raise HelisweepError(
                f"the geometry sweep changes the contacts ({names} -> {device.contact_names}); "
                f"a sweep must keep the same terminals"
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
    for label in cfg.measure.report:
        from .landauer import parse_measurement

        parse_measurement(label).indices(names)
    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    check_resources(cfg, n_workers or cfg.execution.workers or os.cpu_count() or 1, path,
                    worker_memory_mb)
    _check_discretisation(cfg)
    _check_open_modes(cfg, names)
    return names


#: relative error of the lattice bulk gap above which a run is refused (the preflight warns
#: from 5 %); common practice, no source
_MAX_GAP_ERROR = 0.2


def _check_discretisation(cfg: SweepConfig) -> None:
    """Refuse a lattice so coarse that the discretised bands misrepresent the model."""
    from .errors import ModelError
    from .model import continuum_bulk_gap
    from .preflight import lattice_bulk_gap

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
    from .mesh import _per_contact, strip_lead
    from .transport import open_modes

    material = cfg.material.parameters()
    a = cfg.lattice.constant
    widths = set()
    for g in range(len(cfg.axes["geometry"])):
        device = device_for(cfg, g)
        doping = _per_contact(cfg.contacts.doping, device)
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
                modes = open_modes(dsys, energy, _lead_params(dsys, b))
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
    import shutil

    from .preflight import estimate_memory_mb

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
    n_samples = cfg.run.realisations * int(np.prod([len(v) for v in cfg.axes.values()]))
    per_sample = 8 * n_leads * n_leads + 2 * n_leads + 8 * len(cfg.measure.report) + 1
    disk_mb = n_samples * per_sample / 1e6 + 1.0  # uncompressed upper bound + metadata
    probe = Path(store_path).resolve()
    while not probe.exists():
        probe = probe.parent
    free_mb = shutil.disk_usage(probe).free / 1e6
    if disk_mb > 0.9 * free_mb:
        raise HelisweepError(
            f"the store for {n_samples:,} samples needs up to {disk_mb:,.0f} MB but only "
            f"{free_mb:,.0f} MB are free at {str(probe)!r}. Free space, choose another run "
            f"directory, or reduce realisations or sweep points"
        )
    return {"memory_per_solve_mb": worst_mb, "memory_per_worker_mb": per_worker,
            "store_mb": disk_mb, "free_disk_mb": free_mb}


# --------------------------------------------------------------------------- driver
def local_client(workers: int = 0):
    """A Dask client on a LocalCluster: one single-threaded process per core.

    BLAS and OpenMP are limited to one thread per worker (two threads per process gained
    nothing here and halved throughput when processes shared the cores).
    """
    from dask.distributed import Client, LocalCluster

    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[var] = "1"
    n = workers or os.cpu_count() or 1
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           dashboard_address=":0", silence_logs=40)
    return Client(cluster)


@dataclass
class _Progress:
    total: int
    stream: object = sys.stderr
    enabled: bool = True

    def __post_init__(self):
        self.done = 0
        self.t0 = time.monotonic()
        self._last = 0.0

    def update(self, n: int = 1) -> None:
        self.done += n
        now = time.monotonic()
        if not self.enabled or (now - self._last < 0.5 and self.done < self.total):
            return
        self._last = now
        rate = self.done / max(now - self.t0, 1e-9)
        eta = (self.total - self.done) / rate if rate > 0 else float("inf")
        width = 30
        fill = int(width * self.done / max(self.total, 1))
        self.stream.write(
            f"\r[{'#' * fill}{'.' * (width - fill)}] {self.done}/{self.total} samples "
            f"{rate:.2f}/s ETA {eta:,.0f} s "
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
) -> SampleStore:
    """Run (or resume) a sweep and return its store.

    Bad input is refused before any compute (:func:`validate_run`). With ``client=None`` a
    local cluster is started for the duration of the call. Rerunning the same command
    computes only the samples still missing; a different configuration is refused unless
    ``fresh`` (the old store is then moved aside, not deleted). ``max_tasks`` stops after
    that many tasks (a partial run that a later call resumes).
    """
    from dask.distributed import as_completed

    from .environment import describe

    path = Path(store_path) if store_path else cfg.run_dir / "samples.zarr"
    hint, worker_mb = None, None
    if client is not None:
        workers = client.scheduler_info().get("workers", {})
        hint = len(workers) or None
        limits = [w.get("memory_limit") or 0 for w in workers.values()]
        if limits and min(limits) > 0:
            worker_mb = min(limits) / 1e6
    names = validate_run(cfg, hint, path, worker_mb)
    own_client = client is None
    if own_client:
        client = local_client(cfg.execution.workers)
    try:
        n_workers = len(client.scheduler_info().get("workers", {})) or 1
        estimates = check_resources(cfg, n_workers, path, worker_mb)
        facts = describe()
        store = SampleStore.open_for_run(
            path, cfg, names, fresh=fresh, n_workers=n_workers,
            provenance={"workers": n_workers, "config_hash": config_hash(cfg), **facts},
        )
        damaged = store.repair_for_resume()
        if damaged and progress:
            print(f"{len(damaged)} damaged chunk(s) found (checksum); their tasks will be "
                  f"recomputed: " + ", ".join(f"{n}{k}" for n, k, _ in damaged[:5]),
                  file=sys.stderr)
        pending = store.pending_blocks(cfg.run.realisations)
        points = int(np.prod([len(v) for k, v in cfg.axes.items()
                              if k in ("b_perp", "gate_voltage", "energy")]))
        queue = list(pending)[: max_tasks if max_tasks is not None else None]
        n_tasks = len(queue)
        counts = store.counts()
        if progress:
            print(f"estimated memory per solve {estimates['memory_per_solve_mb']:,.0f} MB "
                  f"(per worker available {estimates['memory_per_worker_mb']:,.0f} MB), store up "
                  f"to {estimates['store_mb']:,.1f} MB", file=sys.stderr)
            print(f"store {path}: {counts['done']} samples done, {len(pending)} tasks "
                  f"({sum(len(r) for _, r in pending) * points} samples) to go on "
                  f"{n_workers} worker(s)", file=sys.stderr)
            if getattr(client, "dashboard_link", None):
                print(f"Dask dashboard: {client.dashboard_link}", file=sys.stderr)
        bar = _Progress(sum(len(r) for _, r in queue) * points, enabled=progress)
        window = max_in_flight or 4 * n_workers
        cfg_future = client.scatter(cfg, broadcast=True)
        futures = {}
        ac = as_completed()

        def submit_next():
            key, reals = queue.pop(0)
            fut = client.submit(run_block, cfg_future, key, reals, retries=2, pure=False,
                                key=f"helisweep-{key[0]}-{key[1]}-{key[2]}-{time.monotonic_ns()}")
            futures[fut] = (key, reals)
            ac.add(fut)

        while queue and len(futures) < window:
            submit_next()
        failed = 0
        for fut in ac:
            key, reals = futures.pop(fut)
            results = fut.result()
            try:
                store.write_block(key, reals, results)
            except OSError as exc:  # full disk, quota, lost mount: stop cleanly, keep the rest
                raise StoreError(
                    f"writing task {key} to the store {str(path)!r} failed: {exc}. The store "
                    f"keeps every task written before (this one stays missing). Free space or "
                    f"fix the file system, then rerun the same command to resume"
                ) from exc
            failed += sum(len(r.failures) for r in results)
            bar.update(len(reals) * points)
            if queue:
                submit_next()
        store.finish_session({"tasks": n_tasks, "failed_samples": failed})
        if progress and failed:
            print(f"{failed} sample(s) failed; reasons are in the store's 'failures' attribute",
                  file=sys.stderr)
        return store
    finally:
        if own_client:
            cluster = client.cluster
            client.close()
            cluster.close()
