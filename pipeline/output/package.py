"""Supplementary-data package of a run: one folder and a zip of it, with checksums.

:func:`make_package` writes ``<run_dir>/package-<run name>/`` (or ``package-<name>-2``, ``-3``,
... when that exists: a package is never overwritten) and ``package-<name>[-k].zip`` beside
it, holding::

    README.md          what each file is, units, how to open the data (for readers)
    methods.md         a generated methods paragraph (model, device, disorder, statistics)
    summary.nc         the aggregated summary (NetCDF, open with xarray)
    summary.csv        the main statistics as one flat table
    config.toml        the configuration the samples were computed with, runnable inside the
                       unzipped package (see below)
    provenance.json    versions, solver, BLAS, host, seeds, sessions, sample counts
    lstar.json         L* results (only when given)
    figures/           every figure (PDF, PNG) with the CSV it plots (and side JSON)
    geometry/          the device file (only for devices read from a file)
    data/              further data files of the run (only when given)
    MANIFEST.sha256    SHA-256 of every other file, in ``sha256sum`` format

``config.toml`` is the configuration text stored with the samples, changed only where it
would not run inside the unzipped package or would not recompute every stored sample: a
geometry file path points at the packaged copy (``file = "geometry/<name>"``) and, when the
store was extended beyond the realisations its text asks for, ``realisations`` is the stored
count; each changed line keeps the original value in a comment beside it. Neither change
alters a sample: the samples depend on the geometry file's content (the identity's geometry
digest, :mod:`pipeline.sweep.identity`), not on its path, and realisation r is the same
sample whatever the total. So ``helisweep run config.toml`` inside the unzipped package
recomputes the stored samples bitwise.

The package is assembled in a hidden temporary folder and renamed into place, so an
interrupted export leaves no half-written package. Exports stay inside the run directory:
an ``out_dir`` that resolves (symlinks included) outside it is refused. :func:`verify_package`
checks a folder or zip against its manifest.
"""

from __future__ import annotations

import copy
import csv
import hashlib
import importlib.metadata as md
import json
import math
import os
import re
import shutil
import tempfile
import tomllib
import zipfile
from collections.abc import Iterable, Mapping, Sequence
from pathlib import Path, PurePosixPath
from typing import Any

import numpy as np

from pipeline import __version__
from pipeline.analysis.lstar import lstar_results as lstar_results_of
from pipeline.analysis.lstar import save_lstar
from pipeline.analysis.summary import save_summary
from pipeline.errors import ExportError
from pipeline.jsonsafe import json_safe
from pipeline.output.figures import RunData, load_run, make_figures
from pipeline.output.methods import methods_text, store_facts
from pipeline.sweep.config import AXES
from pipeline.sweep.identity import sha256_file
from pipeline.timestamps import utc_now
from pipeline.transport.environment import describe as describe_environment
from pipeline.transport.solver import MUMPS_ORDERING, SOLVER_NAME

__all__ = ['make_package', 'verify_package', 'packaged_config', 'MANIFEST_NAME', 'GEOMETRY_DIR']

#: Name of the checksum file inside a package.
MANIFEST_NAME = "MANIFEST.sha256"
_FORMAT = "helisweep-package/1"
#: folder of the packaged geometry file; the packaged config's ``device.file`` points into it
GEOMETRY_DIR = "geometry"
_SUMMARY_STATS = ("mean", "std", "sem", "median", "q16", "q84", "ci95_low", "ci95_high",
                  "typical", "n_samples")
_OHM_STATS = ("mean_ohm", "median_ohm", "sem_ohm", "ci95_low_ohm", "ci95_high_ohm")
#: Packages whose versions provenance.json records (beside helisweep and the environment).
_VERSIONED = ("xarray", "zarr", "dask", "distributed", "matplotlib", "h5netcdf", "shapely",
              "pydantic")


# --------------------------------------------------------------------------- small helpers
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


def _write_json(path: Path, data: Any) -> None:
    path.write_text(json.dumps(json_safe(data), indent=2) + "\n", encoding="utf-8")


# --------------------------------------------------------------------------- packaged config
#: a table header line: ``[name]`` or ``[[name]]`` (an array of tables), with a comment
_TOML_HEADER = re.compile(r"^\s*\[(?P<array>\[)?\s*(?P<name>[^\[\]]+?)\s*\]\]?\s*(#.*)?$")
#: a one-line value this rewriter replaces: a basic or literal string, or an integer
_TOML_VALUE = r"(?:\"(?:[^\"\\\n]|\\.)*\"|'[^'\n]*'|[+-]?[0-9][0-9_]*)"


def _toml_set(text: str, table: str, key: str, literal: str, comment: str) -> str:
    """``text`` with the value of ``key`` in ``[table]`` (or of ``table.key`` before the
    first table) replaced by ``literal``, ``comment`` appended to the line (the line's own
    comment is kept after it).

    Raises
    ------
    ExportError
        If the key is not written on exactly one line in one of those two forms.
    """
    lines = text.splitlines(keepends=True)
    in_table = re.compile(rf"^\s*{re.escape(key)}\s*=\s*(?P<value>{_TOML_VALUE})"
                          rf"\s*(?P<comment>#.*)?$")
    dotted = re.compile(rf"^\s*{re.escape(table)}\s*\.\s*{re.escape(key)}\s*=\s*"
                        rf"(?P<value>{_TOML_VALUE})\s*(?P<comment>#.*)?$")
    current: str | None = ""  # "" before the first table, None inside an array of tables
    hits = []
    for i, line in enumerate(lines):
        body = line.rstrip("\r\n")
        header = _TOML_HEADER.match(body)
        if header:
            current = None if header["array"] else header["name"]
            continue
        pattern = in_table if current == table else dotted if current == "" else None
        m = pattern.match(body) if pattern is not None else None
        if m:
            hits.append((i, body, m))
    if len(hits) != 1:
        raise ExportError(
            f"the stored configuration writes '{table}.{key}' in a form the package cannot "
            f"rewrite ({len(hits)} plain one-line occurrences found); write it as "
            f"'{key} = ...' on its own line in the [{table}] table and run the report again"
        )
    i, body, m = hits[0]
    own = m["comment"].lstrip("#").strip() if m["comment"] else ""
    own = f" (original comment: {own})" if own else ""
    ending = lines[i][len(body):]
    lines[i] = f"{body[:m.start('value')]}{literal}  # {comment}{own}{ending}"
    return "".join(lines)


def packaged_config(text: str, *, geometry_name: str | None = None,
                    realisations_in_store: int | None = None) -> tuple[str, list[dict]]:
    """The configuration text of a package: runnable inside the unzipped package, and
    recomputing every stored sample.

    Only two values change, each keeping the original in a TOML comment beside it (see the
    module docstring): ``[device] file`` points at the packaged copy
    ``geometry/<geometry_name>``, and ``[run] realisations`` becomes the number of
    realisations the store holds when the store was extended beyond the text's count (not
    with a precision target, whose first block it is). Everything else stays byte for byte.

    Parameters
    ----------
    text : str
        The configuration text stored with the samples.
    geometry_name : str, optional
        File name of the packaged geometry file (for a device read from a file).
    realisations_in_store : int, optional
        Length of the store's realisation axis.

    Returns
    -------
    text : str
        The packaged configuration.
    changes : list of dict
        ``{"key", "original", "packaged"}`` per changed value (for provenance.json).

    Raises
    ------
    ExportError
        If a value that must change is written in a form the rewriter does not handle, or the
        rewritten text does not parse to the intended values.
    """
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ExportError(f"the stored configuration text is not valid TOML ({exc}); it cannot "
                          f"be packaged") from None
    run_table = dict(data.get("run") or {})
    device = dict(data.get("device") or {})
    changes: list[dict] = []
    out = text
    expected = copy.deepcopy(data)
    original_file = device.get("file")
    if original_file is not None and geometry_name is not None:
        new = f"{GEOMETRY_DIR}/{geometry_name}"
        if new != original_file:
            out = _toml_set(out, "device", "file", json.dumps(new),
                            f"packaged copy; original path: {json.dumps(original_file)}")
            expected["device"]["file"] = new
            changes.append({"key": "device.file", "original": original_file, "packaged": new})
    asked = run_table.get("realisations")
    has_target = any(k in run_table for k in ("target_ci", "target_lstar_ci"))
    if (realisations_in_store is not None and isinstance(asked, int) and not has_target
            and "edges" not in data and realisations_in_store > asked):
        out = _toml_set(out, "run", "realisations", str(int(realisations_in_store)),
                        f"the store holds {realisations_in_store} realisations; original: {asked}")
        expected["run"]["realisations"] = int(realisations_in_store)
        changes.append({"key": "run.realisations", "original": asked,
                        "packaged": int(realisations_in_store)})
    if changes and tomllib.loads(out) != expected:
        raise ExportError(
            "the packaged configuration does not read back as intended after rewriting "
            f"{', '.join(c['key'] for c in changes)}; write each as 'key = value' on its own "
            "line of its table and run the report again"
        )
    return out, changes


# --------------------------------------------------------------------------- file writers
def _write_netcdf(summary: Any, path: Path) -> None:
    """The summary as NetCDF (strings and attributes made portable by the summary stage)."""
    save_summary(summary, path)


def _write_summary_csv(summary: Any, path: Path) -> None:
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
                point = dict(zip(AXES, index, strict=True))
                row = [float(summary[d].values[point[d]]) for d in dims]
                row += [str(label), unit, q]
                for s in stats + ohms:
                    v = float(arrays[s][index])
                    row.append("" if math.isnan(v) else repr(v))
                w.writerow(row)


def _versions() -> dict:
    out = {"helisweep": __version__, **describe_environment()}
    for pkg in _VERSIONED:
        try:
            out[pkg] = md.version(pkg)
        except md.PackageNotFoundError:
            out[pkg] = None
    return out


def _provenance(run: RunData, facts: dict, lstar_results: Sequence) -> dict:
    attrs = facts["attrs"]
    counts = facts["counts"]
    failures = list(attrs.get("failures", []))
    cfg = run.config
    return {
        "format": _FORMAT,
        "package_created": utc_now(),
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
        "summary_attrs": json_safe({k: v for k, v in run.summary.attrs.items()
                                    if k not in ("config_text", "store_sessions")}),
        "lstar_results": len(lstar_results),
        # what config.toml changed from the stored text so that it runs in the package
        "packaged_config_changes": list(facts.get("config_changes", [])),
    }


def _write_lstar(work: Path, lstar_results: Sequence) -> None:
    """``lstar.json`` in the one L* schema (:func:`pipeline.analysis.lstar.save_lstar`), and
    the text summary of each result in ``lstar.txt``."""
    save_lstar(work / "lstar.json", lstar_results)
    texts = [r.text() for r in lstar_results_of(lstar_results)]
    (work / "lstar.txt").write_text("\n\n".join(texts) + "\n", encoding="utf-8")


# --------------------------------------------------------------------------- README
_FILE_NOTES = {
    "summary.nc": "the aggregated statistics over disorder realisations (NetCDF-4)",
    "edges.nc": ("the aggregated statistics over sampled devices of the edge-network model "
                 "(NetCDF-4; the variables of a direct run's summary plus sem_pool)"),
    "edges.csv": "the main statistics of edges.nc as one flat table",
    "summary.csv": "the main statistics of summary.nc as one flat table",
    "config.toml": ("the configuration the samples were computed with; `helisweep run "
                    "config.toml` in this folder recomputes them (see below)"),
    "provenance.json": ("software versions, Kwant solver, BLAS, host, seeds, run sessions and "
                        "the number of samples done, failed and missing"),
    "lstar.json": "the longest edge length that stays within tolerance of the ideal value (L*); "
                  "read it with pipeline.analysis.lstar.load_lstar",
    "lstar.txt": "the same L* results as readable text",
    "methods.md": "a generated methods paragraph describing model, device, disorder and statistics",
    "README.md": "this file",
    MANIFEST_NAME: "SHA-256 checksums of every other file (sha256sum format)",
}


def _readme_head(run: RunData, counts: Mapping) -> list[str]:
    cfg = run.config
    if cfg.edges is not None and "network" in str(run.summary.attrs.get("model", "")):
        return [
            f"# Supplementary data: run `{cfg.run.name}` (edge-network model)",
            "",
            "**These are model estimates** of the helical-edge network model: edge sections "
            "composed from pools of disordered segments of the four-band BHZ tight-binding "
            "model (solved with Kwant), contacts as reservoirs, Landauer-Buttiker over "
            "sampled devices (see methods.md for its assumptions). They are not measurements "
            "and do not certify any device.",
            "",
            f"Sampled devices per sweep point: {cfg.edges.sequences}; samples done "
            f"{counts['done']}, failed {counts['failed']} (of {counts['total']}).",
            "",
        ]
    return [
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
    ]


def _readme_files(files: Sequence[str]) -> list[str]:
    lines = ["## Files", ""]
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
    return lines


def _readme_units(summary: Any, labels: Sequence[str]) -> list[str]:
    lines = [
        "",
        "## Units",
        "",
        "- energy: meV; gate voltage: V; perpendicular field `b_perp`: T; lengths: nm; "
        "disorder strength: dimensionless multiplier",
        "- conductances G in e^2/h, resistances R in h/e^2 (columns `*_ohm` in ohm, with "
        "h/e^2 = 25812.807... ohm)",
    ]
    for label in labels:
        lines.append(f"- `{label}`: {str(summary['unit'].sel(measurement=label).values)}")
    return lines


def _readme_usage(first_label: str) -> list[str]:
    return [
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
        f"g = ds[\"mean\"].sel(measurement={first_label!r})",
        "print(g.sel(energy=g.energy[0]).squeeze())",
        "```",
        "",
        "## Checking the files",
        "",
        "    sha256sum -c MANIFEST.sha256",
        "",
        "or, in Python, `pipeline.output.package.verify_package(<folder or zip>)`.",
        "",
        "In `summary.csv`, `[unit]` in a header means the unit named in that row's `unit` "
        "column.",
        "",
    ]


def _readme_recompute(config_text: str, changes: Sequence[Mapping]) -> list[str]:
    """How to recompute the samples from the package (they are not part of it)."""
    try:
        data = tomllib.loads(config_text)
        run_table = data.get("run", {})
        directory = str(run_table.get("directory", "runs/{name}")).format(
            name=str(run_table.get("name", "")))
    except (tomllib.TOMLDecodeError, KeyError, IndexError, ValueError):
        data, directory = {}, ""
    outside = not directory or Path(directory).is_absolute() or directory.startswith("~") \
        or ".." in PurePosixPath(directory).parts
    network = "edges" in data
    where = "runs/<name>" if outside else directory
    store = f"{where}/edge-samples.zarr" if network else (
        "recomputed/samples.zarr" if outside else f"{directory}/samples.zarr")
    command = "helisweep run config.toml" + (" --store recomputed/samples.zarr"
                                             if outside and not network else "")
    lines = [
        "## Recomputing the samples",
        "",
        "The per-realisation samples themselves (the Zarr sample store) are not part of this "
        f"package. With helisweep {__version__} installed, run in this folder",
        "",
        f"    {command}",
        "",
        f"to recompute them into `{store}`: the same configuration and root seed give the same "
        "samples bitwise, on any number of workers (`provenance.json` records the versions and "
        "the Kwant solver of the original run).",
    ]
    if outside and network:
        lines.append('The `[run] directory` of `config.toml` lies outside this folder: set '
                     '`directory = "runs/{name}"` there first.')
    elif outside:
        lines.append("The `[run] directory` of `config.toml` lies outside this folder, hence "
                     "`--store`.")
    if changes:
        lines += ["", "`config.toml` differs from the text stored with the samples only in "
                  + ", ".join(f"`{c['key']}`" for c in changes)
                  + " (the original values are in comments on those lines); no sample depends "
                  "on these changes."]
    return lines + [""]


def _readme(run: RunData, files: Sequence[str], facts: Mapping, name: str = "summary") -> str:
    labels = [str(m) for m in run.summary["measurement"].values]
    lines = (_readme_head(run, facts["counts"]) + _readme_files(files)
             + _readme_units(run.summary, labels) + _readme_usage(labels[0])
             + _readme_recompute(facts.get("config_text", ""), facts.get("config_changes", [])))
    text = "\n".join(lines)
    if name != "summary":
        text = text.replace("summary.nc", f"{name}.nc").replace("summary.csv", f"{name}.csv")
    return text


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
        lines.append(f"{sha256_file(path)}  {rel}")
    return "\n".join(lines) + "\n"


def _geometry_source(run: RunData) -> Path | None:
    """The device file of a file-based device (None for a template)."""
    if run.config.device.file is None:
        return None
    src = Path(run.config.base_dir) / run.config.device.file
    if not src.is_file():
        raise ExportError(
            f"the device file {str(src)!r} of the run does not exist, so the package could "
            f"not recompute its samples; restore it (or pass config= with the right base "
            f"directory) and write the package again")
    return src


def _packaged_config_of(run: RunData, facts: Mapping) -> tuple[str, list[dict]]:
    """config.toml of the package and what was changed in it (checked before assembling)."""
    text = str(facts["attrs"].get("config_text") or run.config.source_text)
    src = _geometry_source(run)
    return packaged_config(text, geometry_name=src.name if src is not None else None,
                           realisations_in_store=facts["realisations_in_store"])


def _write_data(work: Path, run: RunData, facts: Mapping, config_text: str,
                name: str = "summary") -> None:
    """summary.nc, summary.csv (or edges.*), config.toml and the device file of a file-based
    device (in geometry/, where the packaged config points)."""
    _write_netcdf(run.summary, work / f"{name}.nc")
    _write_summary_csv(run.summary, work / f"{name}.csv")
    (work / "config.toml").write_text(config_text, encoding="utf-8")
    src = _geometry_source(run)
    if src is not None:
        (work / GEOMETRY_DIR).mkdir()
        shutil.copyfile(src, work / GEOMETRY_DIR / src.name)


def _write_figures(work: Path, run: RunData, figures: Iterable | None,
                   lstar_results: Sequence) -> None:
    """figures/: made afresh when ``figures`` is None, else the given files (if any)."""
    if figures is None:
        make_figures(run, work / "figures", lstar=list(lstar_results) or None)
        return
    figures = list(figures)
    if figures:
        _copy_figures(figures, work / "figures")


def _copy_extra(work: Path, extra_files: Iterable) -> None:
    extra_files = [Path(f) for f in extra_files]
    if not extra_files:
        return
    (work / "data").mkdir()
    for f in extra_files:
        if not f.is_file():
            raise ExportError(f"extra file {str(f)!r} does not exist")
        shutil.copyfile(f, work / "data" / f.name)


def _write_documents(work: Path, run: RunData, facts: Mapping, lstar_results: Sequence,
                     name: str = "summary") -> None:
    """lstar.json, provenance.json, methods.md, README.md and, last, the manifest."""
    if lstar_results:
        _write_lstar(work, lstar_results)
    _write_json(work / "provenance.json", _provenance(run, dict(facts), lstar_results))
    (work / "methods.md").write_text(methods_text(run, facts), encoding="utf-8")
    files = sorted(p.relative_to(work).as_posix() for p in work.rglob("*") if p.is_file())
    (work / "README.md").write_text(
        _readme(run, files + ["README.md", MANIFEST_NAME], facts, name), encoding="utf-8")
    (work / MANIFEST_NAME).write_text(_manifest(work), encoding="utf-8")


def _assemble(base: Path, folder: Path, fill) -> None:
    """Fill a hidden temporary folder with ``fill(work)`` and rename it to ``folder``;
    an interrupted or failed export leaves nothing behind."""
    work = Path(tempfile.mkdtemp(prefix=f".{folder.name}.partial-", dir=base))
    try:
        fill(work)
        if folder.exists():
            raise ExportError(f"{str(folder)!r} appeared while the package was written; try again")
        os.rename(work, folder)
    except BaseException:
        shutil.rmtree(work, ignore_errors=True)
        raise


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
    summary_name: str = "summary",
) -> tuple[Path, Path]:
    """Write the supplementary-data package of a run (a folder and a zip of it).

    Parameters
    ----------
    run_dir : str or Path
        The run directory (holding ``samples.zarr`` unless ``store_path`` is given).
    out_dir : str or Path, optional
        Where the package goes; must resolve inside ``run_dir`` (default ``run_dir``).
    lstar_results : sequence or mapping, optional
        L* results (:class:`pipeline.analysis.lstar.LStarResult` or mappings like its
        ``to_dict()``; a mapping's values are taken), written to ``lstar.json`` and drawn on
        the length figures.
    figures : iterable of paths, optional
        Figure files to include (e.g. what :func:`pipeline.output.figures.make_figures` returned).
        ``None`` (default) makes the figures afresh; an empty sequence includes none.
    summary : xarray.Dataset, str or Path, optional
        The summary (or a NetCDF file of it); default :func:`pipeline.analysis.summary.summarize`.
    store_path : str or Path, optional
        The sample store, default ``<run_dir>/samples.zarr``.
    config : SweepConfig, optional
        The configuration; default parsed from the text stored in the store.
    extra_files : iterable of paths, optional
        Further data files of the run (e.g. the concatenated-edge results), copied into
        ``data/`` of the package.
    summary_name : str, optional
        Stem of the summary's files in the package: ``summary`` (``summary.nc``,
        ``summary.csv``; default) or ``edges`` for the edge-network model.

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
    run_dir = Path(run_dir)
    if not run_dir.is_dir():
        raise ExportError(f"run directory {str(run_dir)!r} does not exist; run the sweep first")
    base = _resolve_base(run_dir, out_dir)
    store = Path(store_path) if store_path is not None else run_dir / "samples.zarr"
    run = load_run(store, summary, config=config)
    facts = store_facts(run.store_path)
    name = str(facts["attrs"].get("run_name", run.config.run.name))
    base.mkdir(parents=True, exist_ok=True)
    folder, zpath = _package_dir(base, name)
    lstar_results = list(lstar_results.values() if isinstance(lstar_results, Mapping)
                         else lstar_results)

    config_text, config_changes = _packaged_config_of(run, facts)
    facts = {**facts, "config_text": config_text, "config_changes": config_changes}
    if summary_name not in ("summary", "edges"):
        raise ExportError(f"summary_name must be 'summary' or 'edges', got {summary_name!r}")

    def fill(work: Path) -> None:
        _write_data(work, run, facts, config_text, summary_name)
        _write_figures(work, run, figures, lstar_results)
        _copy_extra(work, extra_files)
        _write_documents(work, run, facts, lstar_results, summary_name)

    _assemble(base, folder, fill)
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
        elif sha256_file(path) != digest:
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
