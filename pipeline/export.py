"""Supplementary-data package of a run: one folder and a zip of it, with checksums.

:func:`make_package` writes ``<run_dir>/package-<run name>/`` (or ``package-<name>-2``, ``-3``,
... when that exists: a package is never overwritten) and ``package-<name>[-k].zip`` beside
it, holding::

    README.md          what each file is, units, how to open the data (for readers)
    methods.md         a generated methods paragraph (model, device, disorder, statistics)
    summary.nc         the aggregated summary (NetCDF, open with xarray)
    summary.csv        the main statistics as one flat table
    config.toml        the exact configuration text the samples were computed with
    provenance.json    versions, solver, BLAS, host, seeds, sessions, sample counts
    lstar.json         L* results (only when given)
    figures/           every figure (PDF, PNG) with the CSV it plots (and side JSON)
    geometry/          the device file (only for devices read from a file)
    MANIFEST.sha256    SHA-256 of every other file, in ``sha256sum`` format

The package is assembled in a hidden temporary folder and renamed into place, so an
interrupted export leaves no half-written package. Exports stay inside the run directory:
an ``out_dir`` that resolves (symlinks included) outside it is refused. :func:`verify_package`
checks a folder or zip against its manifest.
"""

from __future__ import annotations

import csv
import datetime as _dt
import hashlib
import json
import math
import os
import shutil
import tempfile
import zipfile
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np

from .errors import HelisweepError

__all__ = ["ExportError", "make_package", "verify_package", "methods_text", "MANIFEST_NAME"]

#: Name of the checksum file inside a package.
MANIFEST_NAME = "MANIFEST.sha256"
_FORMAT = "helisweep-package/1"
_SUMMARY_STATS = ("mean", "std", "sem", "median", "q16", "q84", "ci95_low", "ci95_high",
                  "typical", "n_samples")
_OHM_STATS = ("mean_ohm", "median_ohm", "sem_ohm", "ci95_low_ohm", "ci95_high_ohm")
_TEMPLATE_NAMES = {"strip": "two-terminal strip", "hbar": "four-terminal H-bar",
                   "hallbar": "six-terminal Hall bar"}


class ExportError(HelisweepError):
    """A package cannot be written or read as asked (the message says why and what to do)."""


# --------------------------------------------------------------------------- small helpers
def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _g(x: float) -> str:
    return f"{float(x):g}"


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _jsonable(obj: Any) -> Any:
    from .figures import _jsonable as conv

    return conv(obj)


def _inside(path: Path, root: Path) -> bool:
    try:
        path.relative_to(root)
    except ValueError:
        return False
    return True


def _safe_relative(name: str) -> bool:
    """True for a relative POSIX path without ``..``, drive letters or backslashes."""
    if not name or name.startswith("/") or "\\" in name or ":" in name.split("/")[0]:
        return False
    parts = PurePosixPath(name).parts
    return all(p not in ("..", ".", "") for p in parts)


def _package_dir(base: Path, name: str) -> tuple[Path, Path]:
    stem = f"package-{name}"
    k = 1
    while True:
        folder = base / (stem if k == 1 else f"{stem}-{k}")
        zpath = folder.with_name(folder.name + ".zip")
        if not folder.exists() and not zpath.exists() and not folder.is_symlink():
            return folder, zpath
        k += 1


# --------------------------------------------------------------------------- file writers
def _write_netcdf(summary: Any, path: Path) -> None:
    """The summary as NetCDF: ``pipeline.aggregate.save_summary`` when available, else
    xarray with attributes that NetCDF cannot hold written as JSON strings."""
    try:
        from .aggregate import save_summary
    except ImportError:
        save_summary = None
    if save_summary is not None:
        save_summary(summary, path)
        return
    ds = summary.copy()

    def clean(attrs: Mapping) -> dict:
        out = {}
        for k, v in attrs.items():
            if isinstance(v, (str, int, float, np.integer, np.floating)) and not isinstance(v, bool):
                out[k] = v
            else:
                out[k] = json.dumps(_jsonable(v))
        return out

    ds.attrs = clean(ds.attrs)
    for name in list(ds.variables):
        ds[name].attrs = clean(ds[name].attrs)
    ds.to_netcdf(path, engine="h5netcdf")


def _write_summary_csv(summary: Any, path: Path) -> None:
    from .config import AXES

    geo_param = str(summary["geometry"].attrs.get("parameter", "") or "")
    dims = [d for d in AXES if d != "geometry" or geo_param]
    stats = [s for s in _SUMMARY_STATS if s in summary.data_vars]
    ohms = [s for s in _OHM_STATS if s in summary.data_vars]
    head = [f"{geo_param if d == 'geometry' else d} [{AXES[d]}]" for d in dims]
    head += ["measurement", "unit", "quantised [unit]"]
    head += [f"{s} [{'1' if s == 'n_samples' else 'unit'}]" for s in stats]
    head += [f"{s} [ohm]" for s in ohms]
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(head)
        for label in summary["measurement"].values:
            sub = summary.sel(measurement=label)
            unit = str(sub["unit"].values)
            q = float(sub["quantised"].values)
            arrays = {s: sub[s].transpose(*AXES).values for s in stats + ohms}
            for index in np.ndindex(*(summary.sizes[d] for d in AXES)):
                point = dict(zip(AXES, index))
                row = [float(summary[d].values[point[d]]) for d in dims]
                row += [str(label), unit, q]
                for s in stats + ohms:
                    v = float(arrays[s][index])
                    row.append("" if math.isnan(v) else repr(v))
                w.writerow(row)


def _store_facts(store_path: Path) -> dict:
    from .store import SampleStore

    store = SampleStore.open(store_path)
    attrs = dict(store.group.attrs)
    return {"attrs": attrs, "counts": store.counts(),
            "realisations_in_store": int(store.shape[0])}


def _versions() -> dict:
    import importlib.metadata as md

    from . import __version__
    from .environment import describe

    out = {"helisweep": __version__, **describe()}
    for pkg in ("xarray", "zarr", "dask", "distributed", "matplotlib", "h5netcdf", "shapely",
                "pydantic"):
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    return out


def _provenance(run: Any, facts: dict, lstar_results: Sequence) -> dict:
    from .transport import MUMPS_ORDERING, SOLVER_NAME

    attrs = facts["attrs"]
    counts = facts["counts"]
    failures = list(attrs.get("failures", []))
    cfg = run.config
    return {
        "format": _FORMAT,
        "package_created": _now(),
        "note": "All values are model estimates of an idealised device, not measurements "
                "and not a certification of any device.",
        "run": {
            "name": attrs.get("run_name", cfg.run.name),
            "config_hash": attrs.get("config_hash"),
            "root_seed": attrs.get("root_seed", cfg.run.seed),
            "store_format": attrs.get("format"),
            "store_created": attrs.get("created"),
        },
        "realisations": {
            "requested": cfg.run.realisations,
            "in_store": facts["realisations_in_store"],
        },
        "samples": {"done": counts["done"], "failed": counts["failed"],
                    "missing": counts["missing"], "total": counts["total"]},
        "failures": {"count": len(failures), "first": failures[:20]},
        "sessions": list(attrs.get("sessions", [])),
        "environment_at_export": {**_versions(), "kwant_solver_used_for_export": SOLVER_NAME,
                                  "mumps_ordering": MUMPS_ORDERING},
        "summary_attrs": _jsonable({k: v for k, v in run.summary.attrs.items()
                                    if k not in ("config_text", "store_sessions")}),
        "lstar_results": len(lstar_results),
    }


# --------------------------------------------------------------------------- methods text
def _axis_text(values: Sequence[float], unit: str) -> str:
    u = "" if unit == "1" else f" {unit}"
    vals = [float(v) for v in values]
    if len(vals) == 1:
        return f"fixed at {_g(vals[0])}{u}"
    if len(vals) <= 6:
        return f"{', '.join(_g(v) for v in vals[:-1])} and {_g(vals[-1])}{u}"
    steps = np.diff(vals)
    text = f"{len(vals)} values from {_g(vals[0])} to {_g(vals[-1])}{u}"
    if np.allclose(steps, steps[0], rtol=1e-6, atol=1e-12):
        text += f" in steps of {_g(steps[0])}{u}"
    return text


def _bootstrap_text(attrs: Mapping) -> str:
    """What the confidence intervals of the summary are (from its attributes)."""
    try:
        level = float(attrs.get("confidence", 0.95))
    except (TypeError, ValueError):
        level = 0.95
    resamples = attrs.get("bootstrap_resamples")
    seed = attrs.get("bootstrap_seed")
    if resamples is not None and int(resamples) == 0:
        return "not computed (no bootstrap resamples); the standard error of the mean is given"
    text = f"{level * 100:g} % percentile-bootstrap confidence intervals of the mean over realisations"
    details = []
    if resamples is not None:
        details.append(f"{int(resamples)} resamples")
    if seed is not None:
        details.append(f"seed {seed}")
    return text + (f" ({', '.join(details)})" if details else "")


def _thermal_text(attrs: Mapping) -> str:
    temps = attrs.get("temperatures_K", [])
    if isinstance(temps, str):
        try:
            temps = json.loads(temps)
        except ValueError:
            temps = []
    temps = [float(t) for t in np.atleast_1d(temps)] if len(np.atleast_1d(temps)) else []
    if not temps:
        return ""
    return (" Finite-temperature values were obtained by smearing each sample's transmission "
            "matrix over the energy grid with the derivative of the Fermi function, -df/dE, at "
            f"T = {', '.join(_g(t) for t in temps)} K, and recomputing the measurements from "
            "the smeared matrices.")


def _doping_text(doping: Any) -> str:
    if isinstance(doping, Mapping):
        parts = ", ".join(f"{k}: {_g(v)} meV" for k, v in doping.items())
        return (f"Each contact is a semi-infinite lead of the contact's width made of the well "
                f"material with its bands shifted down by a per-contact doping ({parts}; "
                f"unlisted contacts 0 meV)")
    if float(doping) == 0:
        return ("Each contact is a semi-infinite lead of the contact's width made of the "
                "quantum-well material itself (undoped leads)")
    return (f"Each contact is a semi-infinite lead of the contact's width made of the well "
            f"material with its bands shifted down by {_g(doping)} meV, so that the leads are "
            f"metallic (a model of ohmic contacts)")


def methods_text(run: Any, facts: Mapping | None = None) -> str:
    """A methods paragraph describing how a run's numbers were computed.

    Parameters
    ----------
    run : pipeline.figures.RunData
        The run (configuration, samples, summary).
    facts : mapping, optional
        Store facts (attributes and sample counts); read from the store when omitted.

    Returns
    -------
    str
        Markdown text: a heading, one paragraph to paste, and a short list of the inputs.
    """
    from .disorder import describe
    from .engine import _disorder_terms, device_for
    from .landauer import parse_measurement

    cfg = run.config
    facts = dict(facts) if facts is not None else _store_facts(run.store_path)
    counts = facts["counts"]
    sessions = list(facts["attrs"].get("sessions", []))
    last = sessions[-1] if sessions else {}
    p = cfg.material.parameters()
    a = cfg.lattice.constant
    axes = cfg.axes
    summary = run.summary

    material = (
        f"Transport was computed in the four-band Bernevig-Hughes-Zhang (BHZ) model of a "
        f"quantum spin Hall insulator ({p.name}) with A = {_g(p.A)} meV nm, "
        f"B = {_g(p.B)} meV nm^2, C = {_g(p.C)} meV, D = {_g(p.D)} meV nm^2 and "
        f"M = {_g(p.M)} meV (source: {p.source})"
    )
    extras = []
    if p.delta_bia:
        extras.append(f"a bulk-inversion-asymmetry coupling Delta = {_g(p.delta_bia)} meV "
                      f"between opposite spins")
    if p.g_E or p.g_H:
        field_note = ("" if cfg.needs_field
                      else "; they play no role here since the field is zero throughout")
        extras.append(f"effective g-factors g_E = {_g(p.g_E)} and g_H = {_g(p.g_H)} for the "
                      f"Zeeman energy in a perpendicular field{field_note}")
    if extras:
        material += ", with " + " and ".join(extras)
    material += (f". The model is discretised by finite differences on a square lattice with "
                 f"lattice constant a = {_g(a)} nm; a perpendicular magnetic field enters "
                 f"through Peierls phases and the Zeeman term.")

    dev = cfg.device
    if dev.file is not None:
        device = device_for(cfg, 0)
        dev_text = (f"The device outline was read from the geometry file {Path(dev.file).name} "
                    f"(contacts {', '.join(device.contact_names)}"
                    + (f"; gates {', '.join(device.gate_names)}" if device.gate_names else "")
                    + ").")
    else:
        params = dict(dev.parameters)
        geo = cfg.sweep.geometry
        fixed = ", ".join(f"{k} = {_g(v)} nm" for k, v in params.items())
        dev_text = (f"The device is a {_TEMPLATE_NAMES.get(dev.template, dev.template)} "
                    f"(template '{dev.template}') with {fixed or 'default parameters'}")
        if geo is not None:
            dev_text += f"; its {geo.parameter} was swept over {_axis_text(geo.values, 'nm')}"
        dev_text += "."
    contacts = _doping_text(cfg.contacts.doping) + "."
    gates = ""
    if any(v != 0 for v in axes["gate_voltage"]) or cfg.gates.lever_arm:
        driven = cfg.gates.driven
        gates = (f" A gate voltage V_g shifts the potential energy of the sites under "
                 f"{'the gates ' + ', '.join(driven) if driven else 'all gates'} by "
                 f"U = -alpha V_g with lever arm alpha = {_g(cfg.gates.lever_arm)} meV/V.")

    terms = _disorder_terms(cfg)
    disorder = describe(terms)
    disorder += (" All disorder terms are scaled by a dimensionless strength multiplier. "
                 f"Disorder realisation r is generated from the root seed {cfg.run.seed} by a "
                 "counter-based hash of (seed, r, lattice site), so a realisation is the same "
                 "sample at every energy, gate voltage and field.")

    clauses = []
    for dim, what, unit in (("energy", "the Fermi energy", "meV"),
                            ("gate_voltage", "the gate voltage", "V"),
                            ("b_perp", "the perpendicular field", "T"),
                            ("disorder_strength", "the disorder strength multiplier", "1")):
        values = axes[dim]
        verb = "was" if len(values) == 1 else "took the values"
        clauses.append(f"{what} {verb} {_axis_text(values, unit)}")
    sweep = "In the sweep, " + "; ".join(clauses[:-1]) + "; and " + clauses[-1] + "."
    n_req = cfg.run.realisations
    stats = (f"At each sweep point {n_req} disorder realisations were requested "
             f"({counts['done']} samples computed, {counts['failed']} failed and "
             f"{counts['missing']} missing, counted over all sweep points).")

    labels = [str(m) for m in summary["measurement"].values]
    meas = []
    for label in labels:
        m = parse_measurement(label)
        if m.kind == "G":
            meas.append(f"{label}, the two-terminal conductance between contacts "
                        f"{m.terminals[0]} and {m.terminals[1]} with all other contacts "
                        f"floating (e^2/h)")
        else:
            src, drn, vp, vm = m.terminals
            meas.append(f"{label}, the four-terminal resistance with current from {src} to "
                        f"{drn} and voltage between {vp} and {vm} (h/e^2)")
    ideal = []
    for label in labels:
        q = float(summary["quantised"].sel(measurement=label).values)
        unit = str(summary["unit"].sel(measurement=label).values)
        if math.isfinite(q):
            ideal.append(f"{label} = {_g(q)} {unit}")
    kwant_version = last.get("kwant", "unknown")
    solver = last.get("kwant_solver", "unknown")
    solver_name = {"mumps": "the MUMPS sparse direct solver", "scipy": "SciPy's sparse solver"}
    blas = last.get("system_blas", "unknown")
    transport = (
        f"For each sample the full transmission matrix between all contacts was obtained from "
        f"the scattering matrix computed with Kwant {kwant_version} "
        f"({solver_name.get(solver, solver)}; BLAS: {blas}). The reported quantities "
        f"({'; '.join(meas)}) follow from the multi-terminal Landauer-Buttiker formulas, with "
        f"voltage probes drawing no net current."
    )
    if ideal:
        transport += (" Ideal quantum spin Hall values for comparison come from the same "
                      f"solver applied to ideal helical-edge transmissions ({'; '.join(ideal)}).")
    errors = (f"Plotted values are means over realisations; error bars are "
              f"{_bootstrap_text(summary.attrs)}; lighter bands show +-1 standard deviation of "
              f"the samples, and the standard error of the mean (std/sqrt(N)) is given in the "
              f"data files.")
    errors += _thermal_text(summary.attrs)
    closing = ("All numbers are model estimates for an idealised device; they are not "
               "measurements and do not certify any device.")
    paragraph = " ".join([material, dev_text, contacts + gates, disorder, sweep, stats,
                          transport, errors, closing])
    facts_list = [
        f"- run: {cfg.run.name} (config hash {facts['attrs'].get('config_hash', '')[:16]})",
        f"- material preset: {cfg.material.preset or 'explicit parameters'}",
        f"- lattice constant: {_g(a)} nm",
        f"- realisations requested: {n_req}",
        f"- root seed: {cfg.run.seed}",
        f"- Kwant {kwant_version}, solver {solver}",
    ]
    return ("# Methods (generated)\n\n" + paragraph + "\n\n## Inputs at a glance\n\n"
            + "\n".join(facts_list) + "\n")


# --------------------------------------------------------------------------- README
_FILE_NOTES = {
    "summary.nc": "the aggregated statistics over disorder realisations (NetCDF-4)",
    "summary.csv": "the main statistics of summary.nc as one flat table",
    "config.toml": "the exact configuration text the samples were computed with",
    "provenance.json": ("software versions, Kwant solver, BLAS, host, seeds, run sessions and "
                        "the number of samples done, failed and missing"),
    "lstar.json": "the longest edge length that stays within tolerance of the ideal value (L*)",
    "methods.md": "a generated methods paragraph describing model, device, disorder and statistics",
    "README.md": "this file",
    MANIFEST_NAME: "SHA-256 checksums of every other file (sha256sum format)",
}


def _readme(run: Any, files: Sequence[str], facts: Mapping) -> str:
    cfg = run.config
    summary = run.summary
    labels = [str(m) for m in summary["measurement"].values]
    units = {str(m): str(summary["unit"].sel(measurement=m).values) for m in labels}
    counts = facts["counts"]
    lines = [
        f"# Supplementary data: run `{cfg.run.name}`",
        "",
        "**These are model estimates** (four-band BHZ tight-binding model solved with Kwant, "
        "averaged over simulated disorder realisations). They are not measurements and do not "
        "certify any device.",
        "",
        f"Realisations requested per sweep point: {cfg.run.realisations}; samples done "
        f"{counts['done']}, failed {counts['failed']}, missing {counts['missing']} "
        f"(of {counts['total']}).",
        "",
        "## Files",
        "",
    ]
    figs = sorted(f for f in files if f.startswith("figures/"))
    for f in sorted(files):
        if f.startswith("figures/"):
            continue
        if f.startswith("geometry/"):
            lines.append(f"- `{f}`: the device geometry file")
            continue
        lines.append(f"- `{f}`: {_FILE_NOTES.get(f, 'data file')}")
    if figs:
        lines.append(f"- `figures/`: {len(figs)} files. Each figure `fig-*` comes as vector PDF, "
                     "PNG and the CSV of exactly what it plots (column headers `quantity "
                     "[unit]`, `[1]` = dimensionless); `fig-current.json` and "
                     "`fig-vs-length-*.json` hold facts beside the figure (edge fraction, L*).")
    lines += [
        "",
        "## Units",
        "",
        "- energy: meV; gate voltage: V; perpendicular field `b_perp`: T; lengths: nm; "
        "disorder strength: dimensionless multiplier",
        "- conductances G in e^2/h, resistances R in h/e^2 (columns `*_ohm` in ohm, with "
        "h/e^2 = 25812.807... ohm)",
    ]
    for label in labels:
        lines.append(f"- `{label}`: {units[label]}")
    lines += [
        "",
        "## The summary",
        "",
        "Dimensions: geometry (swept template parameter, nm), disorder_strength, b_perp, "
        "gate_voltage, energy, measurement. Variables: mean, std (spread of the samples), "
        "sem (standard error of the mean), median, q16/q84 (16th/84th percentiles), "
        "ci95_low/ci95_high (95 % confidence interval of the mean), n_samples (realisations "
        "that entered), and the resistances in ohm. The coordinate `quantised` holds the ideal "
        "quantum spin Hall value of each measurement, `unit` its unit.",
        "",
        "```python",
        "import xarray as xr",
        "ds = xr.open_dataset(\"summary.nc\")",
        f"g = ds[\"mean\"].sel(measurement={labels[0]!r})",
        "print(g.sel(energy=g.energy[0]).squeeze())",
        "```",
        "",
        "## Checking the files",
        "",
        "    sha256sum -c MANIFEST.sha256",
        "",
        "or, in Python, `pipeline.export.verify_package(<folder or zip>)`.",
        "",
        "In `summary.csv`, `[unit]` in a header means the unit named in that row's `unit` "
        "column. The per-realisation samples themselves (the Zarr sample store) are not part "
        "of this package; `config.toml` and `provenance.json` say how to recompute them.",
        "",
    ]
    return "\n".join(lines)


# --------------------------------------------------------------------------- package
def _resolve_base(run_dir: Path, out_dir: str | Path | None) -> Path:
    root = run_dir.resolve(strict=True)
    if out_dir is None:
        return root
    base = Path(out_dir)
    resolved = base.resolve(strict=False)
    if not _inside(resolved, root):
        raise ExportError(
            f"out_dir {str(out_dir)!r} resolves to {str(resolved)!r}, outside the run directory "
            f"{str(root)!r}; packages are written inside the run directory. Choose a folder "
            f"inside it (or leave out_dir out) and copy the zip from there"
        )
    return resolved


def _copy_figures(figures: Iterable, dest: Path) -> None:
    dest.mkdir(parents=True, exist_ok=True)
    seen: set[str] = set()
    for f in figures:
        src = Path(f)
        if not src.is_file():
            raise ExportError(f"figure file {str(src)!r} does not exist or is not a file")
        if src.name in seen:
            raise ExportError(f"two figure files are named {src.name!r}; rename one")
        seen.add(src.name)
        shutil.copyfile(src, dest / src.name)


def _zip(folder: Path, zpath: Path) -> None:
    tmp = zpath.with_name(f".{zpath.name}.partial")
    top = folder.name
    with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        for path in sorted(p for p in folder.rglob("*") if p.is_file()):
            rel = path.relative_to(folder).as_posix()
            zf.write(path, arcname=f"{top}/{rel}")
    if zpath.exists():
        tmp.unlink()
        raise ExportError(f"{str(zpath)!r} appeared while the package was written; try again")
    os.replace(tmp, zpath)


def _manifest(folder: Path) -> str:
    lines = []
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        rel = path.relative_to(folder).as_posix()
        if rel == MANIFEST_NAME:
            continue
        lines.append(f"{_sha256(path)}  {rel}")
    return "\n".join(lines) + "\n"


def make_package(
    run_dir: str | Path,
    *,
    out_dir: str | Path | None = None,
    lstar_results: Sequence[Any] = (),
    figures: Iterable[str | Path] | None = None,
    summary: Any = None,
    store_path: str | Path | None = None,
    config: Any = None,
    extra_files: Iterable[str | Path] = (),
) -> tuple[Path, Path]:
    """Write the supplementary-data package of a run (a folder and a zip of it).

    Parameters
    ----------
    run_dir : str or Path
        The run directory (holding ``samples.zarr`` unless ``store_path`` is given).
    out_dir : str or Path, optional
        Where the package goes; must resolve inside ``run_dir`` (default ``run_dir``).
    lstar_results : sequence, optional
        L* results (:class:`pipeline.lstar.LStarResult` or mappings like its ``as_dict()``),
        written to ``lstar.json`` and drawn on the length figures.
    figures : iterable of paths, optional
        Figure files to include (e.g. what :func:`pipeline.figures.make_figures` returned).
        ``None`` (default) makes the figures afresh; an empty sequence includes none.
    summary : xarray.Dataset, str or Path, optional
        The summary (or a NetCDF file of it); default :func:`pipeline.aggregate.summarize`.
    store_path : str or Path, optional
        The sample store, default ``<run_dir>/samples.zarr``.
    config : SweepConfig, optional
        The configuration; default parsed from the text stored in the store.
    extra_files : iterable of paths, optional
        Further data files of the run (e.g. the concatenated-edge results), copied into
        ``data/`` of the package.

    Returns
    -------
    folder : Path
        ``<out_dir>/package-<run name>`` (``-2``, ``-3``, ... appended when taken: an existing
        package is never overwritten).
    zip_path : Path
        The zip of the folder, beside it, with entries under ``package-<run name>[-k]/``.

    Raises
    ------
    ExportError
        If ``out_dir`` is outside the run directory or an input is missing.
    """
    from .figures import _as_mapping, load_run, make_figures

    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise ExportError(f"run directory {str(run_dir)!r} does not exist; run the sweep first")
    base = _resolve_base(run_dir, out_dir)
    store = Path(store_path) if store_path is not None else run_dir / "samples.zarr"
    run = load_run(store, summary, config=config)
    facts = _store_facts(run.store_path)
    name = str(facts["attrs"].get("run_name", run.config.run.name))
    base.mkdir(parents=True, exist_ok=True)
    folder, zpath = _package_dir(base, name)
    lstar_results = list(lstar_results.values() if isinstance(lstar_results, Mapping)
                         else lstar_results)

    work = Path(tempfile.mkdtemp(prefix=f".{folder.name}.partial-", dir=base))
    try:
        _write_netcdf(run.summary, work / "summary.nc")
        _write_summary_csv(run.summary, work / "summary.csv")
        (work / "config.toml").write_text(
            str(facts["attrs"].get("config_text") or run.config.source_text), encoding="utf-8")
        if run.config.device.file is not None:
            src = Path(run.config.base_dir) / run.config.device.file
            if src.is_file():
                (work / "geometry").mkdir()
                shutil.copyfile(src, work / "geometry" / src.name)
        if figures is None:
            make_figures(run, work / "figures", lstar=lstar_results or None)
        else:
            figures = list(figures)
            if figures:
                _copy_figures(figures, work / "figures")
        extra_files = [Path(f) for f in extra_files]
        if extra_files:
            (work / "data").mkdir()
            for f in extra_files:
                if not f.is_file():
                    raise ExportError(f"extra file {str(f)!r} does not exist")
                shutil.copyfile(f, work / "data" / f.name)
        if lstar_results:
            entries = []
            for r in lstar_results:
                entry = _jsonable(_as_mapping(r))
                if hasattr(r, "text"):
                    entry = {"result": entry, "text": r.text()}
                entries.append(entry)
            (work / "lstar.json").write_text(json.dumps(entries, indent=2) + "\n",
                                             encoding="utf-8")
        (work / "provenance.json").write_text(
            json.dumps(_jsonable(_provenance(run, facts, lstar_results)), indent=2) + "\n",
            encoding="utf-8")
        (work / "methods.md").write_text(methods_text(run, facts), encoding="utf-8")
        files = sorted(p.relative_to(work).as_posix() for p in work.rglob("*") if p.is_file())
        (work / "README.md").write_text(_readme(run, files + ["README.md", MANIFEST_NAME], facts),
                                        encoding="utf-8")
        (work / MANIFEST_NAME).write_text(_manifest(work), encoding="utf-8")
        if folder.exists():
            raise ExportError(f"{str(folder)!r} appeared while the package was written; try again")
        os.rename(work, folder)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise
    _zip(folder, zpath)
    return folder, zpath


# --------------------------------------------------------------------------- verification
def _parse_manifest(text: str) -> tuple[dict[str, str], list[str]]:
    entries: dict[str, str] = {}
    problems: list[str] = []
    for n, line in enumerate(text.splitlines(), 1):
        if not line.strip():
            continue
        digest, sep, name = line.partition("  ")
        if not sep or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            problems.append(f"{MANIFEST_NAME} line {n} is not '<sha256>  <path>': {line!r}")
            continue
        if not _safe_relative(name):
            problems.append(f"{MANIFEST_NAME} line {n} names an unsafe path {name!r}")
            continue
        entries[name] = digest
    return entries, problems


def _verify_folder(folder: Path) -> list[str]:
    manifest = folder / MANIFEST_NAME
    if not manifest.is_file():
        return [f"no {MANIFEST_NAME} in {str(folder)!r}"]
    entries, problems = _parse_manifest(manifest.read_text(encoding="utf-8"))
    for name, digest in entries.items():
        path = folder / name
        if path.is_symlink():
            problems.append(f"{name}: is a symbolic link")
        elif not path.is_file():
            problems.append(f"{name}: listed in the manifest but missing")
        elif _sha256(path) != digest:
            problems.append(f"{name}: SHA-256 does not match the manifest (file changed)")
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if (path.is_file() or path.is_symlink()) and rel != MANIFEST_NAME and rel not in entries:
            problems.append(f"{rel}: present but not listed in the manifest")
    return problems


def _verify_zip(zpath: Path) -> list[str]:
    problems: list[str] = []
    try:
        zf = zipfile.ZipFile(zpath)
    except zipfile.BadZipFile as exc:
        return [f"{str(zpath)!r} is not a readable zip ({exc})"]
    with zf:
        names = [i.filename for i in zf.infolist() if not i.is_dir()]
        tops = set()
        for n in names:
            if not _safe_relative(n):
                problems.append(f"zip entry {n!r} is not a safe relative path")
            tops.add(n.split("/", 1)[0])
        if len(tops) != 1:
            problems.append(f"zip entries are not under one top folder ({sorted(tops)})")
            return problems
        top = tops.pop()
        mname = f"{top}/{MANIFEST_NAME}"
        if mname not in names:
            return problems + [f"no {MANIFEST_NAME} under {top}/ in the zip"]
        entries, bad = _parse_manifest(zf.read(mname).decode("utf-8"))
        problems += bad
        inside = {n[len(top) + 1:] for n in names if n.startswith(top + "/")}
        for name, digest in entries.items():
            if name not in inside:
                problems.append(f"{name}: listed in the manifest but missing from the zip")
                continue
            h = hashlib.sha256()
            with zf.open(f"{top}/{name}") as fh:
                for block in iter(lambda: fh.read(1 << 20), b""):
                    h.update(block)
            if h.hexdigest() != digest:
                problems.append(f"{name}: SHA-256 does not match the manifest (file changed)")
        for name in sorted(inside - set(entries) - {MANIFEST_NAME}):
            problems.append(f"{name}: present in the zip but not listed in the manifest")
    return problems


def verify_package(folder_or_zip: str | Path) -> list[str]:
    """Check a package folder or zip against its manifest.

    Parameters
    ----------
    folder_or_zip : str or Path
        A package folder or its zip.

    Returns
    -------
    list of str
        The problems found (missing, changed or unlisted files; unsafe paths); empty when
        every file matches its checksum.
    """
    path = Path(folder_or_zip)
    if path.is_dir():
        return _verify_folder(path)
    if path.is_file():
        return _verify_zip(path)
    return [f"{str(path)!r} is neither a package folder nor a zip"]
