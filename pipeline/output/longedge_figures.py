"""Figures of the long-edge stage: <G>(L) of concatenated edges with L*, and the spread of G.

Draws what :func:`pipeline.longedges.run.run_concatenation` returns (the merged dataset of
``concatenated.nc`` and its L* rows). For every (energy, field, disorder strength) point:

* ``fig-concatenated-E..meV-B..T-s..`` (PDF, PNG, CSV): <G>(L) on a log length axis,
  coherent and incoherent composition side by side, the tolerance band around the ideal
  value and L* with its interval marked;
* ``fig-concatenated-distribution-E..meV-B..T-s..`` (PDF, PNG, CSV): histograms of G over
  the sequences at the shortest, a middle and the longest length.

Results are model estimates.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np

from pipeline.analysis.lstar_results import concatenated_method
from pipeline.device.drawing import OKABE_ITO

__all__ = ["plot_concatenated"]

# Line colours of the composition modes, in the order of the dataset's ``mode`` axis.
_MODE_COLOURS = (OKABE_ITO[4], OKABE_ITO[3])


def plot_concatenated(ds, lstar_rows: list[dict], out_dir: Path) -> list[Path]:
    """<G>(L) on a log length axis, coherent and incoherent side by side, L* marked.

    Parameters
    ----------
    ds : xarray.Dataset
        The merged dataset of ``concatenated.nc`` (dims mode, energy, b_perp,
        disorder_strength, length, sequence).
    lstar_rows : list of LStarResult
        The L* results of ``lstar-concatenated.json`` (one per mode and point; read a file
        with :func:`pipeline.analysis.lstar.load_lstar`).
    out_dir : Path
        Directory of the figures (created if missing).

    Returns
    -------
    list of Path
        The files written: per (energy, field, strength) point a figure of <G>(L) and one of
        the distribution of G, each as PDF, PNG and CSV.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    modes = [str(m) for m in ds["mode"].values]
    for e in ds["energy"].values:
        for b in ds["b_perp"].values:
            for s in ds["disorder_strength"].values:
                written += _mean_figure(ds, lstar_rows, modes, (e, b, s), out_dir)
                written += _histograms(ds, modes, e, b, s, out_dir)
    return written


def _mean_figure(ds, lstar_rows, modes, point, out_dir: Path) -> list[Path]:
    """The <G>(L) figure and its CSV of one (energy, field, strength) point."""
    from matplotlib.figure import Figure  # heavy optional dependency, only for drawing

    e, b, s = point
    q = float(ds.attrs.get("quantised", 2.0))
    tol = float(lstar_rows[0].tolerance) if lstar_rows else 0.05
    fig = Figure(figsize=(5.2 * len(modes), 4.4), layout="constrained")
    axes = fig.subplots(1, len(modes), sharey=True, squeeze=False)[0]
    rows = []
    for ax, mode, colour in zip(axes, modes, _MODE_COLOURS, strict=False):
        sel = ds.sel(mode=mode, energy=e, b_perp=b, disorder_strength=s)
        where = {"disorder_strength": float(s), "b_perp": float(b), "energy": float(e)}
        row = next((r.to_dict() for r in lstar_rows if r.method == concatenated_method(mode)
                    and dict(r.point) == where), None)
        L, mean, err = _draw_mode(ax, sel, row, mode, colour, q, tol)
        for Li, m, er in zip(L, mean, err, strict=True):
            rows.append([mode, float(e), float(b), float(s), float(Li), float(m), float(er)])
    axes[0].set_ylabel("⟨G⟩ (e²/h)")
    fig.suptitle(f"Concatenated edges, E = {float(e):g} meV, B = {float(b):g} T, "
                 f"disorder strength {float(s):g} (model estimate)", fontsize=10)
    stem = out_dir / f"fig-concatenated-E{float(e):g}meV-B{float(b):g}T-s{float(s):g}"
    header = ["mode", "energy [meV]", "b_perp [T]", "disorder_strength [1]", "length [nm]",
              "mean_G [e^2/h]", "sem_pool_G [e^2/h]"]
    return _save(fig, stem, header, rows)


def _draw_mode(ax, sel, row, mode, colour, q, tol):
    """One panel: mean G with its 95 % band, the tolerance band and L*; returns (L, mean, err)."""
    L = sel["length"].values
    mean = sel["conductance_mean"].values
    err = (sel["conductance_sem_pool"].values if "conductance_sem_pool" in sel
           else sel["conductance_sem"].values)
    ax.axhspan(q * (1 - tol), q * (1 + tol), color="#DDDDDD", lw=0,
               label=f"tolerance ±{100 * tol:g} %")
    ax.axhline(q, color="black", ls="--", lw=1, label=f"ideal QSH: {q:g} e²/h")
    ax.errorbar(L, mean, yerr=1.96 * err, fmt="o-", color=colour, capsize=3,
                label="mean ± 1.96 × pool-bootstrap s.e.")
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
    return L, mean, err


def _histograms(ds, modes, e, b, s, out_dir: Path) -> list[Path]:
    """Distribution of G over sequences at the shortest, a middle and the longest length."""
    from matplotlib.figure import Figure  # heavy optional dependency, only for drawing

    lengths = ds["length"].values
    picks = sorted({0, len(lengths) // 2, len(lengths) - 1})
    fig = Figure(figsize=(4.2 * len(picks), 3.8), layout="constrained")
    axes = fig.subplots(1, len(picks), squeeze=False)[0]
    rows = []
    bins = np.linspace(0, 2.0, 41)
    for ax, k in zip(axes, picks, strict=True):
        for mode, colour in zip(modes, _MODE_COLOURS, strict=False):
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
    return _save(fig, stem, ["mode", "length [nm]", "G [e^2/h]"], rows)


def _save(fig, stem: Path, header: list[str], rows: list[list]) -> list[Path]:
    """Write a figure as PDF and PNG and its data as CSV next to it; returns the three paths."""
    out = []
    for ext in (".pdf", ".png"):
        fig.savefig(stem.with_suffix(ext), dpi=150)
        out.append(stem.with_suffix(ext))
    with open(stem.with_suffix(".csv"), "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    out.append(stem.with_suffix(".csv"))
    return out
