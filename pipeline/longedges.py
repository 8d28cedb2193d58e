"""Edges beyond direct reach: segment pools on the workers, concatenated edges, L*, figure.

Orchestrates :mod:`pipeline.concat` for a config with a ``[concatenation]`` table. For every
(energy, field, disorder strength) point a pool of independent disordered segments (strips of
the device's width and ``segment_length``) is solved in chunks on the Dask workers and stored
in the run's sample store (group ``segments`` of ``<run>/samples.zarr``); pools already there
are reused, so a rerun resumes. Random
sequences of pool segments are then composed into edges of every requested length, coherently
and/or incoherently, and summarised: ``<run>/concatenated.nc`` (conductance per sequence and
mean with the pool-bootstrap error), ``<run>/lstar-concatenated.json`` and a figure of
<G>(L) on a log length axis, coherent and incoherent side by side with L* marked. Results
are model estimates.
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np

from .config import SweepConfig
from .errors import StoreError

__all__ = ["run_concatenation", "plot_concatenated"]

_FORMAT = "helisweep-segments/1"


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
    if progress:
        print(f"[concatenation] {msg}", file=sys.stderr, flush=True)


def _pool(cfg, client, group, name, *, energy, b_perp, strength, chunk, progress):
    from . import concat
    from .engine import _disorder_terms

    cc = cfg.concatenation
    if name in group:
        return concat.load_segments(group, name=name)
    kwargs = dict(
        energy=energy, seed=cfg.run.seed, b_perp=b_perp, strength=strength,
        contact_doping=float(cfg.contacts.doping) if not isinstance(cfg.contacts.doping, dict) else 0.0,
        buffer=None if cc.buffer == "auto" else float(cc.buffer),
    )
    args = (cfg.material.parameters(), cfg.lattice.constant, cfg.device.parameters["width"],
            cc.segment_length, _disorder_terms(cfg))
    starts = list(range(0, cc.segments, chunk))
    if client is None:
        parts = [concat.segment_smatrices(*args, n_segments=min(chunk, cc.segments - k0),
                                          first_realisation=k0, **kwargs) for k0 in starts]
    else:
        futures = [client.submit(concat.segment_smatrices, *args,
                                 n_segments=min(chunk, cc.segments - k0), first_realisation=k0,
                                 pure=False, retries=2, **kwargs) for k0 in starts]
        parts = client.gather(futures)
    pool = concat.merge_segments(parts)
    concat.save_segments(pool, group, name=name)
    _say(f"pool {name}: {pool.n_segments} segments stored", progress)
    return pool


def run_concatenation(cfg: SweepConfig, run_dir: str | Path, *, client=None,
                      progress: bool = True, chunk: int = 8, fresh: bool = False) -> dict:
    """Pools, concatenated edges, L* and figure for a config's ``[concatenation]`` table.

    Returns ``{"netcdf": path, "lstar": path, "figures": [paths], "results": {...}}``.
    """
    import shutil

    import xarray as xr
    import zarr

    from . import concat
    from .aggregate import save_summary
    from .lstar import longest_ballistic_length

    cc = cfg.concatenation
    if cc is None:
        raise ValueError("the config has no [concatenation] table")
    run_dir = Path(run_dir)
    run_dir.mkdir(parents=True, exist_ok=True)
    # the pools live in the run's sample store, in a sub-group that xarray's reader of the
    # samples ignores
    root_path = run_dir / "samples.zarr"
    path = root_path / "segments"
    digest = _segments_hash(cfg)
    if path.exists():
        old = zarr.open_group(str(path), mode="r").attrs.get("segments_hash")
        if old != digest:
            if not fresh:
                raise StoreError(
                    f"{str(path)!r} holds segment pools of a different model (hash "
                    f"{str(old)[:12]} vs {digest[:12]}); choose another run directory or pass "
                    f"--fresh to move it aside"
                )
            from datetime import datetime, timezone

            stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S")
            shutil.move(str(path), str(root_path / f"segments-replaced-{stamp}"))
    root = zarr.open_group(str(root_path), mode="a")
    group = root.require_group("segments")
    group.attrs.update(format=_FORMAT, segments_hash=digest, config_text=cfg.source_text)
    axes = cfg.axes
    counts = [int(round(L / cc.segment_length)) for L in cc.lengths]
    datasets, lstar_rows = [], []
    for ie, energy in enumerate(axes["energy"]):
        for ib, b in enumerate(axes["b_perp"]):
            for js, strength in enumerate(axes["disorder_strength"]):
                name = f"pool-e{ie}-b{ib}-s{js}"
                pool = _pool(cfg, client, group, name, energy=energy, b_perp=b,
                             strength=strength, chunk=chunk, progress=progress)
                for mode in cc.modes:
                    ds = concat.concatenated_conductance(
                        pool, counts, cc.sequences, cfg.run.seed, mode,
                        pool_resamples=cc.pool_resamples)
                    res = longest_ballistic_length(
                        concat.lstar_dataset(ds), "G(L,R)", point={},
                        quantised=float(ds.attrs["quantised"]), seed=cfg.run.seed)
                    row = {"mode": mode, "energy": energy, "b_perp": b,
                           "disorder_strength": strength, **res.as_dict(),
                           "caveat": ("sequences share the pool's segments: the L* interval "
                                      "resamples sequences and is optimistic; the mean's error "
                                      "in concatenated.nc (conductance_sem_pool) resamples "
                                      "the pool")}
                    lstar_rows.append(row)
                    keep = [v for v in ("conductance", "conductance_mean", "conductance_sem",
                                        "conductance_sem_pool", "composition_error") if v in ds]
                    ds = ds[keep].expand_dims(mode=[mode], energy=[energy], b_perp=[b],
                                              disorder_strength=[strength])
                    datasets.append(ds)
    merged = xr.combine_by_coords(datasets, combine_attrs="drop_conflicts")
    merged.attrs.update(note="model estimate from simulated disorder ensembles, not a device "
                             "certification", segment_length_nm=cc.segment_length,
                        segments_per_pool=cc.segments, sequences=cc.sequences,
                        config_hash=digest)
    for name, unit in (("energy", "meV"), ("b_perp", "T"), ("length", "nm")):
        if name in merged.coords:
            merged[name].attrs["units"] = unit
    nc = save_summary(merged, run_dir / "concatenated.nc")
    lstar_path = run_dir / "lstar-concatenated.json"
    lstar_path.write_text(json.dumps(lstar_rows, indent=2, default=str) + "\n")
    figures = plot_concatenated(merged, lstar_rows, run_dir / "figures")
    _say(f"wrote {nc.name}, {lstar_path.name} and {len(figures)} figure files", progress)
    return {"netcdf": nc, "lstar": lstar_path, "figures": figures, "results": lstar_rows}


def plot_concatenated(ds, lstar_rows: list[dict], out_dir: Path) -> list[Path]:
    """<G>(L) on a log length axis, coherent and incoherent side by side, L* marked.

    One figure (PDF, PNG, CSV) per (energy, field, strength) point.
    """
    import csv

    from matplotlib.figure import Figure

    from .geometry import OKABE_ITO

    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    modes = [str(m) for m in ds["mode"].values]
    q = float(ds.attrs.get("quantised", 2.0))
    tol = float(lstar_rows[0].get("tolerance", 0.05)) if lstar_rows else 0.05
    for e in ds["energy"].values:
        for b in ds["b_perp"].values:
            for s in ds["disorder_strength"].values:
                fig = Figure(figsize=(5.2 * len(modes), 4.4), layout="constrained")
                axes = fig.subplots(1, len(modes), sharey=True, squeeze=False)[0]
                rows = []
                for ax, mode, colour in zip(axes, modes, (OKABE_ITO[4], OKABE_ITO[3])):
                    sel = ds.sel(mode=mode, energy=e, b_perp=b, disorder_strength=s)
                    L = sel["length"].values
                    mean = sel["conductance_mean"].values
                    err = (sel["conductance_sem_pool"].values if "conductance_sem_pool" in sel
                           else sel["conductance_sem"].values)
                    ax.axhspan(q * (1 - tol), q * (1 + tol), color="#DDDDDD", lw=0,
                               label=f"tolerance ±{100 * tol:g} %")
                    ax.axhline(q, color="black", ls="--", lw=1, label=f"ideal QSH: {q:g} e²/h")
                    ax.errorbar(L, mean, yerr=1.96 * err, fmt="o-", color=colour, capsize=3,
                                label="mean ± 1.96 × pool-bootstrap s.e.")
                    row = next((r for r in lstar_rows if r["mode"] == mode and r["energy"] == e
                                and r["b_perp"] == b and r["disorder_strength"] == s), None)
                    if row and row.get("lstar") is not None and np.isfinite(row["lstar"]):
                        lo, hi = row.get("lstar_ci_low"), row.get("lstar_ci_high")
                        if lo is not None and hi is not None and np.isfinite(lo) and np.isfinite(hi):
                            ax.axvspan(lo, hi, color=OKABE_ITO[0], alpha=0.2, lw=0)
                        ax.axvline(row["lstar"], color=OKABE_ITO[0], lw=2,
                                   label=f"L* = {row['lstar'] / 1000:.3g} µm ({row.get('lstar_kind', '')})")
                    ax.set_xscale("log")
                    ax.set_xlabel("edge length L (nm)")
                    ax.set_title(f"{mode} composition")
                    ax.grid(True, which="both", alpha=0.3)
                    ax.legend(fontsize=8, loc="lower left")
                    for Li, m, er in zip(L, mean, err):
                        rows.append([mode, float(e), float(b), float(s), float(Li), float(m), float(er)])
                axes[0].set_ylabel("⟨G⟩ (e²/h)")
                fig.suptitle(f"Concatenated edges, E = {float(e):g} meV, B = {float(b):g} T, "
                             f"disorder strength {float(s):g} (model estimate)", fontsize=10)
                stem = out_dir / f"fig-concatenated-E{float(e):g}meV-B{float(b):g}T-s{float(s):g}"
                for ext in (".pdf", ".png"):
                    fig.savefig(stem.with_suffix(ext), dpi=150)
                    written.append(stem.with_suffix(ext))
                with open(stem.with_suffix(".csv"), "w", newline="") as fh:
                    w = csv.writer(fh)
                    w.writerow(["mode", "energy [meV]", "b_perp [T]", "disorder_strength [1]",
                                "length [nm]", "mean_G [e^2/h]", "sem_pool_G [e^2/h]"])
                    w.writerows(rows)
                written.append(stem.with_suffix(".csv"))
                written += _histograms(ds, modes, e, b, s, out_dir)
    return written


def _histograms(ds, modes, e, b, s, out_dir: Path) -> list[Path]:
    """Distribution of G over sequences at the shortest, a middle and the longest length."""
    import csv

    from matplotlib.figure import Figure

    from .geometry import OKABE_ITO

    lengths = ds["length"].values
    picks = sorted({0, len(lengths) // 2, len(lengths) - 1})
    fig = Figure(figsize=(4.2 * len(picks), 3.8), layout="constrained")
    axes = fig.subplots(1, len(picks), squeeze=False)[0]
    rows = []
    bins = np.linspace(0, 2.0, 41)
    for ax, k in zip(axes, picks):
        for mode, colour in zip(modes, (OKABE_ITO[4], OKABE_ITO[3])):
            g = ds["conductance"].sel(mode=mode, energy=e, b_perp=b, disorder_strength=s).isel(length=k)
            g = np.asarray(g.values, dtype=float).ravel()
            ax.hist(g, bins=bins, alpha=0.55, color=colour, label=f"{mode} (mean {np.mean(g):.3g})")
            rows += [[mode, float(lengths[k]), float(x)] for x in g]
        ax.set_title(f"L = {lengths[k] / 1000:g} µm")
        ax.set_xlabel("G (e²/h)")
        ax.legend(fontsize=8)
    axes[0].set_ylabel("sequences")
    fig.suptitle(f"Distribution of G over concatenated edges, E = {float(e):g} meV, "
                 f"B = {float(b):g} T (model estimate)", fontsize=10)
    stem = out_dir / f"fig-concatenated-distribution-E{float(e):g}meV-B{float(b):g}T-s{float(s):g}"
    out = []
    for ext in (".pdf", ".png"):
        fig.savefig(stem.with_suffix(ext), dpi=150)
        out.append(stem.with_suffix(ext))
    with open(stem.with_suffix(".csv"), "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["mode", "length [nm]", "G [e^2/h]"])
        w.writerows(rows)
    out.append(stem.with_suffix(".csv"))
    return out
