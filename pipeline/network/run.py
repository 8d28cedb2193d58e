"""The edge-network stage for a config's ``[edges]`` table: pools, sampled devices, edges.nc.

1. :func:`pipeline.network.plan.plan_network` checks the run (guard rails) before compute.
2. One pool of disordered segments per (edge energy, field, disorder strength) is solved in
   chunks on the Dask workers and kept in ``<run>/edge-pools.zarr`` (a rerun reuses them).
3. For every sweep point, ``sequences`` devices are sampled: each part of each edge section
   is composed from drawn pool segments (:mod:`pipeline.network.solve`; coherently or
   incoherently, as configured), the network of the sections' probabilities and the contacts
   gives the transmission matrix (dephased at metallic contacts), and the Landauer-Buttiker
   solver every requested measurement. Device ``s`` draws the same segments at every sweep point
   (and nested ones along a length axis), as realisation ``s`` of a direct run carries the
   same disorder everywhere.
4. The sampled devices form a dataset with the sample store's layout (``realisation`` = sampled
   device), so the run's statistics (:func:`pipeline.analysis.summary.summarize`) give
   ``<run>/edges.nc`` with the variables of ``summary.nc``; devices share pool segments, so
   ``sem_pool`` adds the standard error of the mean from resampling the pools. A swept
   length gives L* (``<run>/lstar.json``, method "edge network, <composition>").

Results are model estimates, not device data.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
import sys
import warnings
from pathlib import Path

import numpy as np

from pipeline.analysis.lstar import longest_ballistic_length, save_lstar
from pipeline.analysis.lstar_results import network_method
from pipeline.analysis.summary import save_summary, summarize
from pipeline.errors import ConfigError, StoreError, TransportError
from pipeline.longedges import pools, storage
from pipeline.network.plan import NetworkPlan, plan_network, pool_name
from pipeline.network.solve import (
    ABSORBING,
    compose_runs,
    composed_section_parts,
    contact_node,
    draw_edge_samples,
    edge_blocks,
    edge_leak,
    network_transmissions,
)
from pipeline.sweep.config import SweepConfig, config_hash
from pipeline.sweep.identity import run_identity
from pipeline.sweep.lock import StoreLock
from pipeline.sweep.runmodel import disorder_terms
from pipeline.sweep.store import SampleStatus, SampleStore, SegmentPoolStore
from pipeline.timestamps import utc_now
from pipeline.transport.environment import describe
from pipeline.transport.landauer import parse_measurement

__all__ = ["run_network", "network_samples", "contact_nodes", "network_status", "POOLS_STORE", "SAMPLES_STORE",
           "MODEL"]

#: Name of the run's store of edge-network pools (beside ``samples.zarr``).
POOLS_STORE = "edge-pools.zarr"

#: Name of the run's store of sampled devices (derived from the pools, rebuilt by a report).
SAMPLES_STORE = "edge-samples.zarr"

#: Geometry parameters that are edge lengths (a sweep of one gives L*).
_LENGTH_PARAMETERS = ("length", "arm_length")

#: Model description written into edges.nc and the methods text.
MODEL = "helical-edge network (edge sections composed from segment pools, Landauer-Buttiker)"


def _say(msg: str, progress: bool) -> None:
    if progress:
        print(f"[edges] {msg}", file=sys.stderr, flush=True)


def pools_hash(cfg: SweepConfig, plan: NetworkPlan) -> str:
    """What determines the pools (not the devices sampled from them): the material numbers
    actually used and the random-number scheme's version included (as in a sample store's
    identity, :func:`pipeline.sweep.identity.run_identity`)."""
    ec = cfg.edges
    ident = run_identity(cfg)
    data = {
        "material_numbers": ident["material"],
        "random_scheme": ident["random_scheme"],
        "material": cfg.material.model_dump(mode="json"),
        "lattice": cfg.lattice.constant,
        "width": plan.pool_width,
        "disorder": [t.model_dump(mode="json") for t in cfg.disorder],
        "seed": cfg.run.seed,
        "segment_length": ec.segment_length,
        "buffer": plan.buffer,
        "segments": ec.segments,
    }
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()


def _solve_pools(cfg, plan, store, keys, client, chunk, progress, compute) -> dict:
    """Every pool the run needs: stored ones loaded, missing ones solved and stored.

    The chunks of all missing pools are submitted at once (no idle workers between pools);
    each pool is stored as soon as its chunks are in."""
    ec = cfg.edges
    out, todo = {}, []
    for key in keys:
        name = pool_name(key)
        if name in store:
            out[key] = storage.load_segments(store.group, name=name)
        else:
            todo.append(key)
    if todo and not compute:
        raise StoreError(
            f"{len(todo)} edge pool(s) are not in {str(store.path)!r} yet (first: "
            f"{pool_name(todo[0])}); compute them with `helisweep run CONFIG` or "
            "`helisweep report CONFIG --run`"
        )
    if not todo:
        return out
    if chunk is None:  # few tasks per pool (each builds the strip once), enough for the workers
        workers = len(client.scheduler_info().get("workers", {})) if client is not None else 1
        chunk = max(8, math.ceil(ec.segments / (2 * max(1, workers))))
    args = (cfg.material.parameters(), cfg.lattice.constant, plan.pool_width,
            ec.segment_length, disorder_terms(cfg))
    starts = list(range(0, ec.segments, chunk))
    # the plan has warned about a buffer above the tolerance: the workers need not
    tol = min(0.999, max(ec.evanescent_tolerance, 1.001 * plan.evanescent_bound))
    jobs = {}
    for key in todo:
        e, b, s, axis = key
        kw = dict(energy=e, seed=cfg.run.seed, b_perp=b, strength=s, buffer=plan.buffer,
                  evanescent_tolerance=tol, quarter_turns=axis)
        calls = [(k0, min(chunk, ec.segments - k0)) for k0 in starts]
        if client is None:
            jobs[key] = [(pools.segment_smatrices, args, dict(n_segments=n, first_realisation=k0,
                                                              **kw)) for k0, n in calls]
        else:
            jobs[key] = [client.submit(pools.segment_smatrices, *args, n_segments=n,
                                       first_realisation=k0, pure=False, retries=2, **kw)
                         for k0, n in calls]
    for key in todo:
        if client is None:
            parts = [f(*a, **k) for f, a, k in jobs[key]]
        else:
            parts = client.gather(jobs[key])
        pool = pools.merge_segments(parts)
        storage.save_segments(pool, store.group, name=pool_name(key))
        out[key] = pool
        _say(f"pool {pool_name(key)}: {pool.n_segments} segments stored", progress)
    return out


def _contact_nodes(plan: NetworkPlan, pool_at) -> list:
    """The contacts as network nodes at one (energy, field): absorbing or solved sections."""
    nodes, cache = [], {}
    for d in plan.contact_doping:
        if d == 0.0:
            nodes.append(ABSORBING)
            continue
        if d not in cache:
            left, _ = pools.contact_sections(pool_at, d)
            cache[d] = contact_node(left, pool_at)
        nodes.append(cache[d])
    return nodes


def _point_transmissions(cfg, plan, pool_blocks, nodes_at, idx, maps=None) -> np.ndarray:
    """Transmissions (device, geometry, strength, field, gate, energy, to, from)."""
    axes = cfg.axes
    coherent = cfg.edges.composition == "coherent"
    n_dev = cfg.edges.sequences
    n_c = len(plan.contact_names)
    shape = (n_dev,) + tuple(len(v) for v in axes.values()) + (n_c, n_c)
    out = np.empty(shape)
    n_geo = len(axes["geometry"])
    cache: dict = {}

    def parts_of(key, s, p):
        """Composed part p of section s from pool `key`, one entry per geometry."""
        ck = (key, s, p)
        if ck not in cache:
            counts = [plan.parts[g][s][p].n_segments for g in range(n_geo)]
            uniq = sorted(set(counts))
            blocks = pool_blocks[key]
            res = composed_section_parts(blocks, idx[(s, p)][:, :max(uniq)], uniq,
                                         None if maps is None else maps[key])
            cache[ck] = [res[uniq.index(c)] for c in counts]
        return cache[ck]

    for js, strength in enumerate(axes["disorder_strength"]):
        for ib, b in enumerate(axes["b_perp"]):
            for iv in range(len(axes["gate_voltage"])):
                for ie, e in enumerate(axes["energy"]):
                    nodes = nodes_at[(float(e), float(b))]
                    for g in range(n_geo):
                        secs = plan.sections[g]
                        blocks = []
                        for s in range(len(secs)):
                            pieces = []
                            for p, part in enumerate(plan.parts[g][s]):
                                key = (plan.edge_energy(e, iv, part.gates), float(b),
                                       float(strength), part.axis)
                                pieces.append(parts_of(key, s, p)[g])
                            blocks.append(compose_runs(pieces))
                        # sections enter the network as probabilities: a wave a metallic
                        # contact sends on into the next section is dephased there
                        sec = tuple(np.stack([x[k][:, 0, 0] for x in blocks], axis=-1)
                                    for k in range(4))
                        if coherent:
                            sec = tuple(np.abs(x) ** 2 for x in sec)
                        out[:, g, js, ib, iv, ie] = network_transmissions(
                            tuple(np.real(x) for x in sec),
                            [x.start_contact for x in secs], [x.end_contact for x in secs],
                            nodes)
    return out


def _measure(cfg, plan, T: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Measurements (..., label) and status (...) of transmissions (..., to, from)."""
    labels = list(cfg.measure.labels)
    vals = np.full(T.shape[:-2] + (len(labels),), np.nan)
    status = np.full(T.shape[:-2], int(SampleStatus.DONE), dtype=np.int8)
    for k, label in enumerate(labels):
        m = parse_measurement(label)
        try:
            vals[..., k] = m.evaluate(T, plan.contact_names)
        except TransportError:  # a singular device somewhere: evaluate one by one
            flat = T.reshape((-1,) + T.shape[-2:])
            v = np.full(flat.shape[0], np.nan)
            for i in range(flat.shape[0]):
                try:
                    v[i] = m.evaluate(flat[i], plan.contact_names)
                except TransportError:
                    pass
            vals[..., k] = v.reshape(T.shape[:-2])
    bad = ~np.all(np.isfinite(vals), axis=-1)
    status[bad] = int(SampleStatus.FAILED)
    return vals, status


def contact_nodes(cfg: SweepConfig, plan: NetworkPlan, pool_sets: dict) -> dict:
    """The contacts as network nodes at every (energy, field): ``{(E, B): [ContactNode]}``."""
    some = next(iter(pool_sets.values()))
    out = {}
    for e in cfg.axes["energy"]:
        for b in cfg.axes["b_perp"]:
            key = (float(e), float(b), float(cfg.axes["disorder_strength"][0]), 0)
            out[(float(e), float(b))] = _contact_nodes(plan, pool_sets.get(key, some))
    return out


def network_samples(cfg: SweepConfig, plan: NetworkPlan, pool_sets: dict, *, maps=None,
                    nodes_at: dict | None = None):
    """Sampled devices of every sweep point as a dataset with the sample store's layout.

    Parameters
    ----------
    cfg : SweepConfig
    plan : NetworkPlan
    pool_sets : dict
        ``{(edge energy, field, strength): SegmentSet}`` for every key of the plan.
    maps : dict, optional
        ``{key: segment map}``: a bootstrap resampling of each pool (see
        :func:`pipeline.network.solve.composed_section_parts`).
    nodes_at : dict, optional
        The contact nodes (:func:`contact_nodes`), computed here when not given.

    Returns
    -------
    xarray.Dataset
        ``transmission``, ``measurements``, ``status`` with dims ``realisation`` (sampled
        device) and the sweep axes; attributes as a store's (``config_text`` ...).
    """
    import xarray as xr  # heavy optional dependency, only needed for the result

    coherent = cfg.edges.composition == "coherent"
    pool_blocks = {}
    for key, pool in pool_sets.items():
        bl = edge_blocks(pool)
        pool_blocks[key] = bl if coherent else tuple(np.abs(x) ** 2 for x in bl)
    n_geo = len(cfg.axes["geometry"])
    idx = {}
    some = next(iter(pool_sets.values()))
    for s in range(len(plan.sections[0])):
        for p in range(len(plan.parts[0][s])):
            n_max = max(plan.parts[g][s][p].n_segments for g in range(n_geo))
            idx[(s, p)] = draw_edge_samples(cfg.run.seed, s, p, cfg.edges.sequences, n_max,
                                            2 * some.n_segments)
    if nodes_at is None:
        nodes_at = contact_nodes(cfg, plan, pool_sets)
    T = _point_transmissions(cfg, plan, pool_blocks, nodes_at, idx, maps)
    vals, status = _measure(cfg, plan, T)
    axes = cfg.axes
    dims = ("realisation",) + tuple(axes)
    names = np.array(plan.contact_names, dtype=object)
    coords = {"realisation": np.arange(cfg.edges.sequences)}
    coords.update({k: np.asarray(v, dtype=float) for k, v in axes.items()})
    coords.update({"lead_to": names, "lead_from": names,
                   "measurement": np.array(cfg.measure.labels, dtype=object)})
    units = [parse_measurement(m).unit for m in cfg.measure.labels]
    modes = np.full(T.shape[:-1], 2, dtype=np.int16)
    ds = xr.Dataset(
        {"transmission": (dims + ("lead_to", "lead_from"), T,
                          {"units": "1", "long_name": "transmission probability from lead_from "
                                                      "to lead_to (diagonal: reflection)"}),
         "modes": (dims + ("lead",), modes,
                   {"units": "1", "long_name": "edge modes arriving at each contact"}),
         "measurements": (dims + ("measurement",), vals,
                          {"long_name": "requested transport measurements",
                           "units_by_measurement": units}),
         "status": (dims, status, {"long_name": "sample status",
                                   "flag_values": [int(x) for x in SampleStatus],
                                   "flag_meanings": " ".join(x.name.lower()
                                                             for x in SampleStatus)})},
        coords={**coords, "lead": names},
    )
    ds["geometry"].attrs.update(parameter=cfg.sweep.geometry.parameter if cfg.sweep.geometry else "",
                                units="nm")
    ds.attrs.update(config_text=cfg.source_text, run_name=cfg.run.name, root_seed=cfg.run.seed,
                    model=MODEL)
    return ds


def _pool_sem(cfg, plan, pool_sets, resamples: int, nodes_at: dict):
    """Standard error of every point's mean measurement from resampling the pools."""
    rng = np.random.default_rng(np.random.SeedSequence([int(cfg.run.seed), 0xED6E]))
    means = []
    for _ in range(resamples):
        maps = {k: rng.integers(0, p.n_segments, size=p.n_segments) for k, p in pool_sets.items()}
        ds = network_samples(cfg, plan, pool_sets, maps=maps, nodes_at=nodes_at)
        good = ds["status"] == int(SampleStatus.DONE)
        means.append(ds["measurements"].where(good).mean("realisation"))
    import xarray as xr  # heavy optional dependency, only needed for the result

    return xr.concat(means, dim="resample").std("resample", ddof=1)


def run_network(cfg: SweepConfig, run_dir: str | Path | None = None, *, client=None,
                progress: bool = True, chunk: int | None = None, fresh: bool = False,
                compute: bool = True, tolerance: float = 0.05,
                temperatures: tuple[float, ...] = (), width_guard: bool = True) -> dict:
    """Pools, sampled devices, ``edges.nc`` and L* of a config's ``[edges]`` table.

    Parameters
    ----------
    cfg : SweepConfig
        A config with an ``[edges]`` table.
    run_dir : str or Path, optional
        The run directory (default: the config's).
    client : dask.distributed.Client, optional
        Solves the pools' chunks on the workers; None solves them here.
    progress : bool, optional
        Print progress to stderr.
    chunk : int, optional
        Segments per worker task; default: enough for two tasks per worker and pool (at
        least 8), since every task builds the pool strip once.
    fresh : bool, optional
        Move pools of a different model aside (inside the pool store) instead of refusing.
    compute : bool, optional
        Solve missing pools (default); False refuses a missing pool.
    tolerance : float, optional
        Relative tolerance of L*.
    temperatures : tuple of float, optional
        Temperatures (K) of thermal smearing in the summary (see
        :func:`pipeline.analysis.summary.summarize`).
    width_guard : bool, optional
        False skips the arm-width guard rail (studies of the model's limits only; see
        :func:`pipeline.network.plan.plan_network`).

    Returns
    -------
    dict
        ``{"netcdf": path, "store": path, "lstar": path or None, "summary": Dataset,
        "lstar_tables": [LStarTable], "plan": NetworkPlan}``: ``store`` is the derived store
        of sampled devices (``edge-samples.zarr``, the sample store's layout).
    """
    if cfg.edges is None:
        raise ConfigError("the config has no [edges] table; add one (see docs/edge-network.md)")
    run_dir = Path(run_dir) if run_dir is not None else cfg.run_dir
    if (run_dir / "samples.zarr").exists():
        raise ConfigError(
            f"the run directory {str(run_dir)!r} holds a direct run's sample store "
            "(samples.zarr); the edge-network model writes lstar.json and figures there too "
            "and would replace the direct run's. Give the [edges] run its own directory, e.g. "
            "[run] directory = \"runs/{name}-edges\""
        )
    plan = plan_network(cfg, width_guard=width_guard)  # every guard rail before compute
    keys = plan.pool_keys(cfg)
    if compute:
        run_dir.mkdir(parents=True, exist_ok=True)
    # one driver per pool store (the derived store and edges.nc are written under the same lock)
    lock = StoreLock.acquire(run_dir / POOLS_STORE) if compute else None
    try:
        return _run_locked(cfg, run_dir, plan, keys, client=client, progress=progress,
                           chunk=chunk, fresh=fresh, compute=compute, tolerance=tolerance,
                           temperatures=temperatures)
    finally:
        if lock is not None:
            lock.release()


def _run_locked(cfg, run_dir, plan, keys, *, client, progress, chunk, fresh, compute,
                tolerance, temperatures) -> dict:
    digest = pools_hash(cfg, plan)
    store = SegmentPoolStore.open(run_dir / POOLS_STORE, digest, fresh=fresh,
                                  config_text=cfg.source_text, create=compute, group="pools")
    _say(f"{len(keys)} pool(s) of {cfg.edges.segments} segments; {cfg.edges.sequences} sampled "
         f"devices per sweep point", progress)
    pool_sets = _solve_pools(cfg, plan, store, keys, client, chunk, progress, compute)
    nodes_at = contact_nodes(cfg, plan, pool_sets)
    samples = network_samples(cfg, plan, pool_sets, nodes_at=nodes_at)
    facts = {
        "model": MODEL, "composition": cfg.edges.composition,
        "pool_width_nm": plan.pool_width, "segment_length_nm": plan.segment_length,
        "buffer_nm": plan.buffer, "disordered_length_nm": plan.disordered_length,
        "segments_per_pool": cfg.edges.segments, "sampled_devices": cfg.edges.sequences,
        "evanescent_tolerance": cfg.edges.evanescent_tolerance,
        "edge_decay_length_nm": plan.edge_decay_length,
        "narrowest_width_nm": plan.min_width,
        "closest_contacts_nm": plan.min_contact_distance,
        "max_inter_edge_leak": max(edge_leak(p) for p in pool_sets.values()),
        "pools": len(pool_sets), "sections": json.dumps(_section_record(plan)),
    }
    failed = int((samples["status"] == int(SampleStatus.FAILED)).sum())
    edge_store = SampleStore.write_derived(run_dir / SAMPLES_STORE, samples, attrs={
        **facts, "config_hash": _samples_hash(cfg, digest), "config_text": cfg.source_text,
        "run_name": cfg.run.name, "root_seed": cfg.run.seed,
        "sessions": [{"started": utc_now(), "model": "edge network", **describe()}],
        "failures": ([f"{failed} sampled device(s) at some sweep point have a singular "
                      "conductance matrix (a contact cut off by fully reflecting edges)"]
                     if failed else [])})
    summary = summarize(edge_store.path, config_dir=cfg.base_dir, temperatures=temperatures,
                        tail_deviation=cfg.summary.tail_deviation)
    if cfg.edges.pool_resamples:
        sem = _pool_sem(cfg, plan, pool_sets, cfg.edges.pool_resamples, nodes_at)
        summary["sem_pool"] = sem.transpose(*summary["mean"].dims)
        summary["sem_pool"].attrs.update(
            long_name="standard error of the mean from resampling the segment pools",
            method=f"bootstrap over pool segments ({cfg.edges.pool_resamples} resamples)")
    summary.attrs.update(facts)
    summary.attrs["note"] = ("model estimate from simulated disorder ensembles (edge-network "
                             "model), not a device certification")
    nc = save_summary(summary, run_dir / "edges.nc")
    tables = _lstar(cfg, edge_store.path, summary, tolerance)
    lstar_path = save_lstar(run_dir / "lstar.json", tables) if tables else None
    _say(f"wrote {nc.name}" + (f" and {lstar_path.name}" if lstar_path else ""), progress)
    return {"netcdf": nc, "store": edge_store.path, "lstar": lstar_path, "summary": summary,
            "lstar_tables": tables, "plan": plan}


def network_status(cfg: SweepConfig, run_dir: str | Path | None = None) -> str:
    """What an ``[edges]`` run has stored: pools done and missing, and its result files.

    Reads only (the guard rails run; no pool is computed)."""
    run_dir = Path(run_dir) if run_dir is not None else cfg.run_dir
    plan = plan_network(cfg)
    keys = plan.pool_keys(cfg)
    path = run_dir / POOLS_STORE
    try:
        store = SegmentPoolStore.open(path, pools_hash(cfg, plan), create=False, group="pools")
        have = [k for k in keys if pool_name(k) in store]
    except StoreError as exc:
        if path.exists():
            return f"{path}: {exc}"
        have = []
    missing = [pool_name(k) for k in keys if k not in have]
    lines = [f"{path}: {len(have)} of {len(keys)} pools stored ({cfg.edges.segments} segments "
             f"each); {len(missing)} missing" + (f": {', '.join(missing[:6])}"
                                                  + (", ..." if len(missing) > 6 else "")
                                                  if missing else "")]
    for name in ("edges.nc", "lstar.json", SAMPLES_STORE):
        p = run_dir / name
        lines.append(f"  {name}: {'present' if p.exists() else 'not written yet'}")
    if missing:
        lines.append("  compute the missing pools with `helisweep run CONFIG`")
    return "\n".join(lines)


def _samples_hash(cfg: SweepConfig, pools_digest: str) -> str:
    """Identity of the sampled devices: the pools, the device and sweep, the sampling."""
    data = {"pools": pools_digest, "config": config_hash(cfg),
            "edges": cfg.edges.model_dump(mode="json")}
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()


def _section_record(plan: NetworkPlan) -> list:
    """Per geometry and section: contacts, length, corners and the modelled parts."""
    names = plan.contact_names
    out = []
    for g, secs in enumerate(plan.sections):
        out.append([{"from": names[s.start_contact], "to": names[s.end_contact],
                     "length_nm": round(s.length, 6), "corners": s.corners,
                     "parts": [{"gates": list(p.gates), "axis": "xy"[p.axis],
                                "length_nm": round(p.length, 6),
                                "segments": p.n_segments} for p in plan.parts[g][s.index]]}
                    for s in secs])
    return out


def _lstar(cfg, samples, summary, tolerance) -> list:
    """L* tables of a swept edge length (empty otherwise); ``samples`` is the store path."""
    geo = cfg.sweep.geometry
    if geo is None or geo.parameter not in _LENGTH_PARAMETERS or len(geo.values) < 2:
        return []
    quantised = {str(m): float(q) for m, q in
                 zip(summary["measurement"].values, summary["quantised"].values)}
    tables = []
    for label in cfg.measure.labels:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table = longest_ballistic_length(samples, label, tolerance=tolerance,
                                             quantised=quantised[label], config_dir=cfg.base_dir)
        method = network_method(cfg.edges.composition)
        tables.append(dataclasses.replace(
            table, results=tuple(dataclasses.replace(r, method=method) for r in table.results)))
    return tables
