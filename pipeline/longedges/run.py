"""Edges beyond direct reach for a config: segment pools on the workers, edges, L*.

Runs the long-edge stage for a config with a ``[concatenation]`` table. For every (energy,
field, disorder strength) point a pool of independent disordered segments (strips of the
device's width and ``segment_length``, :mod:`pipeline.longedges.pools`) is solved in chunks
on the Dask workers and stored in the run's sample store (group ``segments`` of
``<run>/samples.zarr``, opened through :class:`pipeline.sweep.store.SegmentPoolStore`);
pools already there are reused, so a rerun resumes. Random sequences of pool segments are
then composed into edges of every requested length, coherently and/or incoherently
(:mod:`pipeline.longedges.compose`), and summarised: ``<run>/concatenated.nc`` (conductance
per sequence and mean with the pool-bootstrap error) and ``<run>/lstar-concatenated.json``.
The figures are drawn by :mod:`pipeline.output.longedge_figures` from what
:func:`run_concatenation` returns. Results are model estimates.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import sys
from pathlib import Path

from pipeline.analysis.lstar import longest_ballistic_length, save_lstar
from pipeline.analysis.lstar_results import concatenated_method
from pipeline.analysis.summary import save_summary
from pipeline.errors import ConfigError, StoreError
from pipeline.longedges import pools, storage
from pipeline.longedges.compose import concatenated_conductance, lstar_dataset
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.runmodel import disorder_terms
from pipeline.sweep.store import SegmentPoolStore

__all__ = ['run_concatenation']

# The sequences of a point share its pool's segments, so their spread understates the
# uncertainty: every concatenated L* carries this note.
_CONCATENATED_CAVEAT = ("sequences share the pool's segments: the L* interval resamples "
                        "sequences and is optimistic; the mean's error in concatenated.nc "
                        "(conductance_sem_pool) resamples the pool")

# Data variables of a concatenated point kept in concatenated.nc.
_KEEP = ("conductance", "conductance_mean", "conductance_sem", "conductance_sem_pool",
         "composition_error")


def _segments_hash(cfg: SweepConfig) -> str:
    """What determines the segment pools (not the lengths or sequences drawn from them)."""
    cc = cfg.concatenation
    data = {
        "material": cfg.material.model_dump(mode="json"),
        "lattice": cfg.lattice.constant,
        "width": cfg.device.parameters.get("width"),
        "disorder": [t.model_dump(mode="json") for t in cfg.disorder],
        "seed": cfg.run.seed,
        "doping": cfg.contacts.doping,
        "segment_length": cc.segment_length,
        "buffer": cc.buffer,
        "segments": cc.segments,
    }
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()


def _say(msg: str, progress: bool) -> None:
    """One progress line on stderr (when ``progress``)."""
    if progress:
        print(f"[concatenation] {msg}", file=sys.stderr, flush=True)


def _pool(cfg, client, store: SegmentPoolStore, name, *, energy, b_perp, strength, chunk,
          progress, compute) -> pools.SegmentSet:
    """The pool of one (energy, field, strength) point: stored, or solved in chunks and stored."""
    cc = cfg.concatenation
    if name in store:
        return storage.load_segments(store.group, name=name)
    if not compute:
        raise StoreError(
            f"the segment pool {name!r} (E = {energy!r} meV, B = {b_perp!r} T, strength "
            f"{strength!r}) is not in {str(store.path)!r} yet; compute the pools with "
            f"`helisweep report CONFIG --run`"
        )
    kwargs = dict(
        energy=energy, seed=cfg.run.seed, b_perp=b_perp, strength=strength,
        contact_doping=float(cfg.contacts.doping) if not isinstance(cfg.contacts.doping, dict) else 0.0,
        buffer=None if cc.buffer == "auto" else float(cc.buffer),
    )
    args = (cfg.material.parameters(), cfg.lattice.constant, cfg.device.parameters["width"],
            cc.segment_length, disorder_terms(cfg))
    starts = list(range(0, cc.segments, chunk))
    if client is None:
        parts = [pools.segment_smatrices(*args, n_segments=min(chunk, cc.segments - k0),
                                         first_realisation=k0, **kwargs) for k0 in starts]
    else:
        futures = [client.submit(pools.segment_smatrices, *args,
                                 n_segments=min(chunk, cc.segments - k0), first_realisation=k0,
                                 pure=False, retries=2, **kwargs) for k0 in starts]
        parts = client.gather(futures)
    pool = pools.merge_segments(parts)
    storage.save_segments(pool, store.group, name=name)
    _say(f"pool {name}: {pool.n_segments} segments stored", progress)
    return pool


def run_concatenation(cfg: SweepConfig, run_dir: str | Path, *, client=None,
                      progress: bool = True, chunk: int = 8, fresh: bool = False,
                      compute: bool = True) -> dict:
    """Pools, concatenated edges and L* for a config's ``[concatenation]`` table.

    Parameters
    ----------
    cfg : SweepConfig
        A config with a ``[concatenation]`` table.
    run_dir : str or Path
        The run directory; pools go to its sample store, results next to it.
    client : dask.distributed.Client, optional
        Solves the pools' chunks on the workers; None solves them here.
    progress : bool, optional
        Print progress to stderr.
    chunk : int, optional
        Segments per worker task.
    fresh : bool, optional
        Move pools of a different model aside instead of refusing them.
    compute : bool, optional
        Solve the pools that are missing (default); False uses stored pools only and refuses
        a missing one with a :class:`~pipeline.errors.StoreError`.

    Returns
    -------
    dict
        ``{"netcdf": path, "lstar": path, "results": [LStarResult], "dataset":
        xarray.Dataset}``: the summary file, the L* file (read it with
        :func:`pipeline.analysis.lstar.load_lstar`), its results (one per mode and point,
        ``method`` "concatenated, <mode>") and the merged dataset of ``concatenated.nc``
        (what :func:`pipeline.output.longedge_figures.plot_concatenated` draws).
    """
    import xarray as xr  # heavy optional dependency, only needed for the results

    cc = cfg.concatenation
    if cc is None:
        raise ConfigError("the config has no [concatenation] table; add one (see "
                          "docs/concatenation.md) to compute edges beyond direct reach")
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    digest = _segments_hash(cfg)
    store = SegmentPoolStore.open(run_dir / "samples.zarr", digest, fresh=fresh,
                                  config_text=cfg.source_text, create=compute)
    axes = cfg.axes
    counts = [int(round(L / cc.segment_length)) for L in cc.lengths]
    datasets, lstars = [], []
    for ie, energy in enumerate(axes["energy"]):
        for ib, b in enumerate(axes["b_perp"]):
            for js, strength in enumerate(axes["disorder_strength"]):
                name = f"pool-e{ie}-b{ib}-s{js}"
                pool = _pool(cfg, client, store, name, energy=energy, b_perp=b,
                             strength=strength, chunk=chunk, progress=progress,
                             compute=compute)
                for mode in cc.modes:
                    ds = concatenated_conductance(
                        pool, counts, cc.sequences, cfg.run.seed, mode,
                        pool_resamples=cc.pool_resamples)
                    res = longest_ballistic_length(
                        lstar_dataset(ds), "G(L,R)", point={},
                        quantised=float(ds.attrs["quantised"]), seed=cfg.run.seed)
                    # the samples know only the lengths: record the point and the method
                    lstars.append(dataclasses.replace(
                        res, method=concatenated_method(mode),
                        point=(("disorder_strength", float(strength)), ("b_perp", float(b)),
                               ("energy", float(energy))),
                        notes=res.notes + (_CONCATENATED_CAVEAT,)))
                    datasets.append(ds[[v for v in _KEEP if v in ds]].expand_dims(
                        mode=[mode], energy=[energy], b_perp=[b], disorder_strength=[strength]))
    merged = _merge(xr.combine_by_coords(datasets, combine_attrs="drop_conflicts"), cc, digest)
    nc = save_summary(merged, run_dir / "concatenated.nc")
    lstar_path = save_lstar(run_dir / "lstar-concatenated.json", lstars)
    _say(f"wrote {nc.name} and {lstar_path.name}", progress)
    return {"netcdf": nc, "lstar": lstar_path, "results": lstars, "dataset": merged}


def _merge(merged, cc, digest: str):
    """The merged dataset of all points with the run's attributes and the axes' units."""
    merged.attrs.update(note="model estimate from simulated disorder ensembles, not a device "
                             "certification", segment_length_nm=cc.segment_length,
                        segments_per_pool=cc.segments, sequences=cc.sequences,
                        config_hash=digest)
    for name, unit in (("energy", "meV"), ("b_perp", "T"), ("length", "nm")):
        if name in merged.coords:
            merged[name].attrs["units"] = unit
    return merged

