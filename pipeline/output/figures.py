"""Figures of a finished (or partial) run: every figure as PDF, PNG and the CSV it plots.

:func:`load_run` gathers what the figures need -- the configuration, the sample store and the
summary made by :func:`pipeline.analysis.summary.summarize` -- into a :class:`RunData`, and
:func:`make_figures` writes, per requested measurement ``<m>`` (file stems use a
filesystem-safe slug of the label, e.g. ``"R14,23"`` -> ``R14-23``):

``fig-vs-energy-<m>``, ``fig-vs-gate-<m>``, ``fig-vs-field-<m>``, ``fig-vs-strength-<m>``
(each when that axis is swept; a run without any swept axis gets ``fig-vs-energy-<m>`` of its
single point)
    Disorder-averaged mean against the axis, one line per geometry (or per value of the next
    swept axis), with the 95 % confidence band of the mean, a lighter band of +-1 standard
    deviation of the samples and the ideal quantum-spin-Hall value as a dashed line (taken from
    the summary's ``quantised`` coordinate, i.e. from the transport code's own solver).
``fig-vs-length-<m>`` (geometry axis swept)
    Mean +- 95 % CI against the swept length, the tolerance band around the ideal value and,
    when an L* result is given, L* with its interval; a second, log-log panel shows the
    normalised transmission with the fitted incoherent and coherent forms.
``fig-distribution-<m>``
    Histograms of the samples over disorder realisations at chosen sweep points.

and once per run ``fig-device`` (outline, sites, contacts, gates) and ``fig-current``: the
site-resolved current density of one realisation injected from one contact, with a side JSON
giving the *edge fraction* (share of the current within two edge-decay lengths of the free
edges), see :func:`pipeline.sweep.probe.current_map` (which solves it; this module only
draws). The figure builders (:func:`figure_vs_axis`, :func:`figure_vs_length`,
:func:`figure_distribution`, :func:`figure_device`, :func:`figure_current`) return a
:class:`Plot` without writing it.

Each figure carries a footer saying that it shows model estimates. CSV columns are named
``quantity [unit]``; ``[1]`` marks dimensionless numbers. Figures are built on
:class:`matplotlib.figure.Figure` objects (no pyplot state), so any backend works.
"""

from __future__ import annotations

import csv
import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.analysis.lstar_results import LStarResult, lstar_results
from pipeline.analysis.statistics import IntervalFlag
from pipeline.analysis.summary import summarize
from pipeline.constants import H_OVER_E2_OHM
from pipeline.device.drawing import OKABE_ITO, plot_device
from pipeline.device.outline import polygon_pieces
from pipeline.errors import HelisweepError
from pipeline.jsonsafe import json_safe
from pipeline.sweep.config import AXES, SweepConfig, parse_stored_config
from pipeline.sweep.probe import CurrentMap, current_map
from pipeline.sweep.runmodel import device_for
from pipeline.sweep.store import SampleStatus
from pipeline.system.mesh import mesh_device

__all__ = ['RunData', 'Plot', 'load_run', 'make_figures', 'figure_vs_axis', 'figure_vs_length',
           'figure_distribution', 'figure_device', 'figure_current', 'measurement_slug',
           'MODEL_ESTIMATE_NOTE']

#: Sentence every figure footer, caption and README carries.
MODEL_ESTIMATE_NOTE = (
    "Model estimate (BHZ tight-binding model, Kwant scattering solver); "
    "not a measurement or certification of a device."
)
_SWEEP_DIMS: tuple[str, ...] = tuple(AXES)
_AXIS_LABEL = {
    "geometry": "geometry",
    "disorder_strength": "disorder strength",
    "b_perp": "B⊥",
    "gate_voltage": "gate voltage",
    "energy": "E",
}
_AXIS_STEM = {"energy": "energy", "gate_voltage": "gate", "b_perp": "field",
              "disorder_strength": "strength"}


_PRETTY_UNIT = {"e^2/h": "e²/h", "h/e^2": "h/e²"}

#: Line colours: the palette without black (kept for reference lines) and yellow.
_COLOURS = tuple(c for c in OKABE_ITO if c not in ("#000000", "#F0E442"))
_MARKERS = ("o", "s", "^", "D", "v", "P")
_REF = "#000000"
_PNG_DPI = 150
_DEFAULT_TOLERANCE = 0.05


# --------------------------------------------------------------------------- run data
@dataclass(frozen=True)
class RunData:
    """Everything the figures of one run are made from.

    Attributes
    ----------
    config : SweepConfig
        The run's configuration (parsed from the text stored with the samples).
    samples : xarray.Dataset
        The sample store opened with xarray (``measurements``, ``transmission``, ``status``).
    summary : xarray.Dataset
        The aggregated summary (:func:`pipeline.analysis.summary.summarize`).
    store_path : pathlib.Path
        Where the sample store lives.
    """

    config: SweepConfig
    samples: Any
    summary: Any
    store_path: Path

    @property
    def run_name(self) -> str:
        return str(self.samples.attrs.get("run_name", self.config.run.name))

    @property
    def config_hash(self) -> str:
        return str(self.samples.attrs.get("config_hash", ""))


def _find_store(path: Path) -> Path:
    if (path / "zarr.json").is_file():
        return path
    if (path / "samples.zarr").is_dir():
        return path / "samples.zarr"
    raise HelisweepError(
        f"{str(path)!r} is neither a sample store nor a run directory holding samples.zarr; "
        f"give the run directory or the store path"
    )


def _config_from_store(attrs: Mapping, store_path: Path) -> SweepConfig:
    text = attrs.get("config_text")
    if not text:
        raise HelisweepError(
            f"the store {str(store_path)!r} carries no configuration text; pass config= to load_run"
        )
    # A device file is resolved against the directory the config was read from, which the
    # store does not record: try the usual places (working directory, around the run).
    candidates = [Path.cwd(), store_path.parent, store_path.parent.parent,
                  store_path.parent.parent.parent]
    last: Exception | None = None
    for base in candidates:
        try:
            return parse_stored_config(text, source=f"{store_path} (stored config)", base_dir=base)
        except HelisweepError as exc:
            last = exc
            if "does not exist" not in str(exc):
                break
    raise HelisweepError(
        f"cannot rebuild the configuration stored in {str(store_path)!r}: {last}; pass the "
        f"configuration explicitly (load_run(..., config=load_config(path)))"
    )


def load_run(run_dir_or_store_path: str | Path, summary: Any = None, *,
             config: SweepConfig | None = None) -> RunData:
    """Open a run for plotting.

    Parameters
    ----------
    run_dir_or_store_path : str or Path
        The run directory (holding ``samples.zarr``) or the store itself.
    summary : xarray.Dataset, str or Path, optional
        The summary Dataset, or a NetCDF file holding it. Omitted: computed with
        :func:`pipeline.analysis.summary.summarize`.
    config : SweepConfig, optional
        The configuration; by default parsed from the text stored in the store's attributes
        (a device file is then looked up relative to the working directory and the run).

    Returns
    -------
    RunData
    """
    import xarray as xr  # heavy; only opening a run needs it

    store_path = _find_store(Path(run_dir_or_store_path))
    samples = xr.open_zarr(str(store_path), consolidated=False)
    if config is None:
        config = _config_from_store(samples.attrs, store_path)
    summary = _open_summary(summary, store_path, config)
    _check_summary(summary)
    mine, theirs = samples.attrs.get("config_hash"), summary.attrs.get("config_hash")
    if mine and theirs and str(mine) != str(theirs):
        raise HelisweepError(
            f"the summary was made from another configuration (hash {str(theirs)[:12]}) than "
            f"the store {str(store_path)!r} ({str(mine)[:12]}); summarise this store again"
        )
    return RunData(config=config, samples=samples, summary=summary, store_path=store_path)


def _open_summary(summary: Any, store_path: Path, config: SweepConfig) -> Any:
    """The summary given (a Dataset or a NetCDF file of it), else made from the store."""
    import xarray as xr  # heavy; only opening a run needs it

    if summary is None:
        return summarize(store_path, config_dir=config.base_dir,
                         tail_deviation=config.summary.tail_deviation)
    if isinstance(summary, (str, Path)):
        return xr.load_dataset(str(summary))
    return summary


def _check_summary(summary: Any) -> None:
    missing = [d for d in _SWEEP_DIMS + ("measurement",) if d not in summary.dims]
    missing += [v for v in ("mean", "std", "ci95_low", "ci95_high", "n_samples")
                if v not in summary.data_vars]
    missing += [c for c in ("unit", "quantised") if c not in summary.coords]
    if missing:
        raise HelisweepError(
            f"the summary lacks {', '.join(missing)}; make it with pipeline.analysis.summary.summarize"
        )


# --------------------------------------------------------------------------- small helpers
def measurement_slug(label: str) -> str:
    """A filesystem-safe form of a measurement label (``"R14,23"`` -> ``"R14-23"``).

    Parameters
    ----------
    label : str

    Returns
    -------
    str
        Letters, digits, ``.``, ``_`` and ``-`` only; never empty, never starting with a dot.
    """
    slug = re.sub(r"[^A-Za-z0-9_.]+", "-", label).strip("-.")
    slug = re.sub(r"\.{2,}", ".", slug)
    return slug or "measurement"


def _slugs(labels: Sequence[str]) -> dict[str, str]:
    out: dict[str, str] = {}
    used: set[str] = set()
    for label in labels:
        base = measurement_slug(label)
        slug, k = base, 2
        while slug in used:
            slug, k = f"{base}-{k}", k + 1
        used.add(slug)
        out[label] = slug
    return out


def _pretty(unit: str) -> str:
    return _PRETTY_UNIT.get(unit, unit)


def _g(x: float) -> str:
    return f"{float(x):g}"


def _col(name: str, unit: str) -> str:
    return f"{name} [{unit}]"


def _geometry_parameter(ds: Any) -> str:
    return str(ds["geometry"].attrs.get("parameter", "") or "")


def _swept(ds: Any, dim: str) -> bool:
    if dim == "geometry" and not _geometry_parameter(ds):
        return False
    return ds.sizes.get(dim, 1) > 1


def _dim_name(ds: Any, dim: str) -> str:
    if dim == "geometry":
        return _geometry_parameter(ds) or "geometry"
    return dim


def _dim_unit(dim: str) -> str:
    return AXES.get(dim, "1")


def _axis_label(ds: Any, dim: str) -> str:
    name = _geometry_parameter(ds) if dim == "geometry" else _AXIS_LABEL.get(dim, dim)
    return f"{name or 'geometry'} ({_dim_unit(dim)})" if _dim_unit(dim) != "1" else name


def _value_text(ds: Any, dim: str, value: float) -> str:
    unit = _dim_unit(dim)
    name = _geometry_parameter(ds) if dim == "geometry" else _AXIS_LABEL.get(dim, dim)
    return f"{name} = {_g(value)}" + ("" if unit == "1" else f" {unit}")


def _index_of(ds: Any, dim: str, value: Any) -> int:
    values = np.asarray(ds[dim].values, dtype=float)
    hit = np.flatnonzero(np.isclose(values, float(value), rtol=1e-9, atol=1e-9))
    if hit.size == 0:
        raise HelisweepError(
            f"{dim} = {value!r} {_dim_unit(dim)} is not on the run's sweep axis; choose one of "
            f"{', '.join(_g(v) for v in values)}"
        )
    return int(hit[0])


def _point_indices(ds: Any, point: Mapping[str, Any] | None) -> dict[str, int]:
    """Sweep-axis indices of a point given by axis values; unspecified axes take defaults
    (the middle energy, the first value of every other axis)."""
    point = dict(point or {})
    unknown = sorted(set(point) - set(_SWEEP_DIMS) - {"realisation", "contact", "lead"})
    if unknown:
        raise HelisweepError(
            f"unknown sweep axis {unknown[0]!r} in a figure point; use "
            f"{', '.join(_SWEEP_DIMS)} (values in {', '.join(AXES.values())}) and realisation"
        )
    out = {}
    for dim in _SWEEP_DIMS:
        n = ds.sizes.get(dim, 1)
        out[dim] = _index_of(ds, dim, point[dim]) if dim in point else (n // 2 if dim == "energy" else 0)
    return out


def _pick(n: int, k: int) -> list[int]:
    if n <= k:
        return list(range(n))
    return sorted(set(np.round(np.linspace(0, n - 1, k)).astype(int).tolist()))


def _finite(values: Any) -> np.ndarray:
    return np.asarray(values, dtype=float)


def _measurement_info(summary: Any, label: str) -> tuple[str, np.ndarray]:
    """Unit and ideal value of a measurement, the latter per geometry (it may vary with it)."""
    sub = summary.sel(measurement=label)
    q = sub["quantised"]
    n_geo = summary.sizes.get("geometry", 1)
    if "geometry" in q.dims:
        values = np.asarray(q.transpose("geometry").values, dtype=float)
    else:
        values = np.full(n_geo, float(q.values))
    return str(sub["unit"].values), values


# --------------------------------------------------------------------------- figure plumbing
@dataclass
class Plot:
    """A built figure with the table it plots (and optional side facts).

    Attributes
    ----------
    stem : str
        File name without suffix (``fig-...``).
    figure : matplotlib.figure.Figure
        The figure (not registered with pyplot).
    columns : list of str
        CSV header, ``quantity [unit]``.
    rows : list of list
        CSV rows: exactly what the figure plots.
    extra : dict, optional
        Facts written beside the figure as ``<stem>.json``.
    """

    stem: str
    figure: Any
    columns: list[str]
    rows: list[list[Any]]
    extra: dict | None = None


def _new_figure(run: RunData, *, figsize=(7.0, 4.8), ncols: int = 1, **kw):
    """A pyplot-free figure with ``ncols`` axes and the model-estimate footer."""
    from matplotlib.figure import Figure  # heavy; only drawing needs it

    fig = Figure(figsize=figsize, layout="constrained")
    foot = min(0.12, 0.32 / figsize[1])  # room for two footer lines
    fig.get_layout_engine().set(rect=(0.0, foot, 1.0, 1.0 - foot))
    axes = fig.subplots(1, ncols, squeeze=False, **kw)[0]
    digest = run.config_hash[:12]
    fig.text(0.005, 0.006, f"{MODEL_ESTIMATE_NOTE}  Run {run.run_name}"
             + (f", config {digest}" if digest else "") + ".",
             fontsize=6.5, color="#444444", ha="left", va="bottom", wrap=True)
    return fig, list(axes)


def _cell(v: Any) -> Any:
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return "" if math.isnan(v) else repr(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    return v


def _save(plot: Plot, out_dir: Path) -> list[Path]:
    out_dir.mkdir(parents=True, exist_ok=True)
    base = out_dir / plot.stem
    pdf, png, table = (base.with_suffix(s) for s in (".pdf", ".png", ".csv"))
    meta = {"Title": plot.stem, "Subject": MODEL_ESTIMATE_NOTE, "Creator": "helisweep"}
    plot.figure.savefig(pdf, metadata=meta)
    plot.figure.savefig(png, dpi=_PNG_DPI)
    with open(table, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(plot.columns)
        for row in plot.rows:
            w.writerow([_cell(v) for v in row])
    written = [pdf, png, table]
    if plot.extra is not None:
        side = base.with_suffix(".json")
        side.write_text(json.dumps(json_safe(plot.extra), indent=2) + "\n", encoding="utf-8")
        written.append(side)
    return written


def _quantised_line(ax: Any, q: float, unit: str):
    """Dashed line at the ideal quantum-spin-Hall value (gid ``"quantised"``)."""
    if not math.isfinite(q):
        return None
    text = f"ideal QSH: {_g(q)} {_pretty(unit)}"
    if unit == "h/e^2":
        text += f" ({q * H_OVER_E2_OHM / 1e3:.4g} kΩ)"
    line = ax.axhline(q, color=_REF, ls="--", lw=1.1, label=text, zorder=4)
    line.set_gid("quantised")
    return line


def _ohm_axis(ax: Any, unit: str) -> None:
    if unit != "h/e^2":
        return
    k = H_OVER_E2_OHM / 1e3
    sec = ax.secondary_yaxis("right", functions=(lambda r: r * k, lambda x: x / k))
    sec.set_ylabel("resistance (kΩ)")


def _level(ds: Any) -> str:
    """The confidence level of the summary's ``ci95_*`` intervals, as text (e.g. "95 %")."""
    try:
        return f"{float(ds.attrs.get('confidence', 0.95)) * 100:g} %"
    except (TypeError, ValueError):
        return "95 %"


def _interval_kind(ds: Any) -> str:
    """Short name of the interval rule of a summary (older summaries: percentile)."""
    method = str(ds.attrs.get("bootstrap_method", ""))
    return "studentized bootstrap" if "studentized" in method else "percentile bootstrap"


def _band_handles(ds: Any):
    from matplotlib.patches import Patch  # heavy; only drawing needs it

    return [Patch(facecolor="#777777", alpha=0.35,
                  label=f"{_level(ds)} CI of the mean ({_interval_kind(ds)})"),
            Patch(facecolor="#777777", alpha=0.13, label="mean ± 1 std of samples")]


def _fixed_text(ds: Any, idx: Mapping[str, int], skip: Iterable[str]) -> str:
    parts = []
    for dim in _SWEEP_DIMS:
        if dim in skip or (dim == "geometry" and not _geometry_parameter(ds)):
            continue
        parts.append(_value_text(ds, dim, float(ds[dim].values[idx[dim]])))
    return ", ".join(parts)


def _table_dims(ds: Any) -> list[str]:
    return [d for d in _SWEEP_DIMS if d != "geometry" or _geometry_parameter(ds)]


# --------------------------------------------------------------------------- 1. versus an axis
def _line_dim(ds: Any, x_dim: str, fixed: Iterable[str]) -> str | None:
    for dim in _SWEEP_DIMS:
        if dim != x_dim and dim not in fixed and _swept(ds, dim):
            return dim
    return None


_LINE_STATS = ("mean", "std", "sem", "ci95_low", "ci95_high", "n_samples")


def _stats_columns(ds: Any, unit: str) -> list[str]:
    """CSV header of a line figure: the sweep axes, the statistics and the ideal value."""
    columns = [_col(_dim_name(ds, d), _dim_unit(d)) for d in _table_dims(ds)]
    columns += [_col(s, "1" if s == "n_samples" else unit) for s in _LINE_STATS]
    return columns + [_col("quantised", unit)]


_FLAG_COLOUR = "#c0392b"


def _flags(sub: Any) -> tuple[np.ndarray, np.ndarray] | None:
    """The interval flags and realisations needed of a summary slice (None for summaries
    written before the flags existed)."""
    if "ci_flag" not in sub or "realisations_needed" not in sub:
        return None
    return (np.asarray(sub["ci_flag"].values).ravel(),
            np.asarray(sub["realisations_needed"].values).ravel())


def _mark_sparse_tails(ax: Any, x: np.ndarray, mean: np.ndarray, flags) -> None:
    """Ring the points whose samples show rare large deviations (their interval cannot hold
    its level), labelled once per axes with the most realisations any of them needs."""
    if flags is None:
        return
    hit = flags[0] == IntervalFlag.SPARSE_TAIL
    if not hit.any():
        return
    first = not any(getattr(a, "get_gid", lambda: None)() == "sparse-tail"
                    for a in ax.collections)
    need = int(np.max(flags[1][hit]))
    art = ax.scatter(np.asarray(x)[hit], np.asarray(mean)[hit], s=110, facecolors="none",
                     edgecolors=_FLAG_COLOUR, linewidths=1.6, zorder=5,
                     label=(f"rare large deviations: interval unreliable, needs ~{need} "
                            f"realisations" if first else None))
    art.set_gid("sparse-tail")


def _draw_mean_line(ax: Any, x: np.ndarray, v: Mapping[str, np.ndarray], k: int,
                    n_lines: int, name: str) -> None:
    """One mean line with its bands (+-1 std, CI); a single x value gets error bars instead,
    offset side by side so that the lines do not hide each other."""
    colour = _COLOURS[k % len(_COLOURS)]
    ax.fill_between(x, v["mean"] - v["std"], v["mean"] + v["std"], color=colour,
                    alpha=0.13, lw=0)
    ax.fill_between(x, v["ci95_low"], v["ci95_high"], color=colour, alpha=0.35, lw=0)
    xs = x
    if len(x) == 1:  # a single point: bands have no width, so show bars side by side
        xs = x + (k - (n_lines - 1) / 2) * 0.03 * max(abs(float(x[0])), 1.0)
        ax.errorbar(xs, v["mean"], yerr=[v["std"], v["std"]],
                    fmt="none", ecolor=colour, alpha=0.35, capsize=0, lw=6)
        ax.errorbar(xs, v["mean"], yerr=[v["mean"] - v["ci95_low"], v["ci95_high"] - v["mean"]],
                    fmt="none", ecolor=colour, capsize=4)
    ax.plot(xs, v["mean"], color=colour, marker=_MARKERS[k % len(_MARKERS)], ms=5,
            lw=1.6, label=name)


def _label_axis_figure(ax: Any, ds: Any, label: str, unit: str, x_dim: str, x: np.ndarray,
                       fixed: str, n_lines: int) -> None:
    """Axis limits and labels, legend and title of a figure against a sweep axis."""
    many = len(x) > 1
    if not many:  # one x value: the lines sit side by side around it (see the CSV)
        scale = max(abs(float(x[0])), 1.0)
        ax.set_xlim(float(x[0]) - 0.12 * scale, float(x[0]) + 0.12 * scale)
        ax.set_xticks([float(x[0])])
    ax.set_xlabel(_axis_label(ds, x_dim)
                  + ("  (values offset side by side for legibility)"
                     if not many and n_lines > 1 else ""))
    ax.set_ylabel(f"{label} ({_pretty(unit)})")
    _ohm_axis(ax, unit)
    handles, _ = ax.get_legend_handles_labels()
    ax.legend(handles=handles + _band_handles(ds), fontsize=8, loc="best")
    ax.set_title(f"{label} vs {_AXIS_LABEL.get(x_dim, x_dim)} (disorder average{_model_tag(ds)})"
                 + (f"\n{fixed}" if fixed else ""), fontsize=10)
    ax.grid(alpha=0.3)


def figure_vs_axis(run: RunData, label: str, x_dim: str, slug: str | None = None,
                   select: Mapping[str, Any] | None = None) -> Plot:
    """Disorder-averaged ``label`` against one sweep axis, one line per value of the next axis.

    Parameters
    ----------
    run : RunData
        From :func:`load_run`.
    label : str
        The measurement.
    x_dim : str
        The sweep axis on the x axis (``energy``, ``gate_voltage``, ``b_perp`` or
        ``disorder_strength``).
    slug : str, optional
        File-name form of the label (default :func:`measurement_slug`).
    select : mapping, optional
        Values of the axes held fixed (default: the first value of every axis, the middle
        energy); an axis named here is not used for the lines.

    Returns
    -------
    Plot
        Stem ``fig-vs-<axis>-<slug>``.
    """
    ds = run.summary
    unit, q_geo = _measurement_info(ds, label)
    idx = _point_indices(ds, select)
    line_dim = _line_dim(ds, x_dim, (select or {}).keys())
    lines = _pick(ds.sizes[line_dim], len(_COLOURS)) if line_dim else [None]
    x = _finite(ds[x_dim].values)
    fig, (ax,) = _new_figure(run)
    dims = _table_dims(ds)
    rows = []
    ideal: set[float] = set()
    for k, li in enumerate(lines):
        sel = {d: i for d, i in idx.items() if d != x_dim}
        if line_dim is not None:
            sel[line_dim] = li
        sub = ds.sel(measurement=label).isel(sel)
        v = {s: _finite(sub[s].values) for s in _LINE_STATS}
        name = (_value_text(ds, line_dim, float(ds[line_dim].values[li]))
                if line_dim else "mean over realisations")
        _draw_mean_line(ax, x, v, k, len(lines), name)
        _mark_sparse_tails(ax, x, v["mean"], _flags(sub))
        for j in range(len(x)):
            point = {d: (j if d == x_dim else sel[d]) for d in _SWEEP_DIMS}
            q = float(q_geo[point["geometry"]])
            ideal.add(q)
            rows.append([float(ds[d].values[point[d]]) for d in dims]
                        + [v[s][j] for s in _LINE_STATS] + [q])
    for q in sorted(ideal):
        _quantised_line(ax, q, unit)
    fixed = _fixed_text(ds, idx, (x_dim, line_dim) if line_dim else (x_dim,))
    _label_axis_figure(ax, ds, label, unit, x_dim, x, fixed, len(lines))
    stem = f"fig-vs-{_AXIS_STEM.get(x_dim, x_dim)}-{slug or measurement_slug(label)}"
    return Plot(stem, fig, _stats_columns(ds, unit), rows)


# --------------------------------------------------------------------------- 2. versus length
def _lstar_by_measurement(lstar: Any, labels: Sequence[str]) -> dict[str, list[LStarResult]]:
    """The L* results given to :func:`make_figures`, grouped by measurement.

    Accepts whatever :func:`pipeline.analysis.lstar_results.lstar_results` reads (results,
    tables, their ``to_dict()`` output, ``{measurement: result}``, sequences of these).
    """
    out: dict[str, list[LStarResult]] = {}
    for result in lstar_results(lstar):
        if result.measurement not in labels:
            raise HelisweepError(
                f"an L* result is for measurement {result.measurement!r}, which the run does not "
                f"report ({', '.join(labels)}); pass the L* results of this run"
            )
        out.setdefault(result.measurement, []).append(result)
    return out


def _choose_lstar(ds: Any, results: Sequence[LStarResult],
                  select: Mapping[str, Any] | None) -> LStarResult | None:
    """The L* result at the figure's sweep point (else the first one, whose point is then
    used for the figure)."""
    if not results:
        return None
    idx = _point_indices(ds, select)
    for r in results:
        if not r.point:
            continue
        try:
            if all(_index_of(ds, d, val) == idx[d] for d, val in r.point
                   if d in _SWEEP_DIMS and d != "geometry"):
                return r
        except HelisweepError:
            continue
    return results[0]


def _normalised(mean: np.ndarray, sem: np.ndarray, q: np.ndarray, unit: str):
    """Measurement relative to its ideal value, oriented to fall below 1 when edge channels
    backscatter: G/G_ideal for conductances, R_ideal/R for resistances."""
    q = np.asarray(q, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        if unit == "h/e^2":
            t = q / mean
            return t, np.abs(t) * sem / np.abs(mean)
        return mean / q, sem / np.abs(q)


def _incoherent(length: np.ndarray, lam: float) -> np.ndarray:
    return 1.0 / (1.0 + length / lam)


def _coherent(length: np.ndarray, xi: float) -> np.ndarray:
    return np.exp(-length / xi)


def _lstar_label(ls: LStarResult) -> str:
    sign = {"lower_bound": "≥", "upper_bound": "≤"}.get(ls.lstar_kind, "=")
    text = f"L* {sign} {ls.lstar:.4g} nm"
    if ls.lstar_kind != "interpolated":
        text += " (bound: outside the swept range)"
    if math.isfinite(ls.lstar_ci_low) and math.isfinite(ls.lstar_ci_high):
        text += (f", {ls.confidence * 100:g} % interval "
                 f"[{ls.lstar_ci_low:.4g}, {ls.lstar_ci_high:.4g}]")
    return text


#: summary statistics the length figure plots and tabulates
_LENGTH_STATS = ("mean", "std", "sem", "ci95_low", "ci95_high", "n_samples")


@dataclass(frozen=True)
class _LengthData:
    """What the length figure shows at its sweep point (lengths in summary order)."""

    ds: Any
    label: str
    unit: str
    #: ideal value per length
    q: np.ndarray
    tol: float
    L: np.ndarray
    #: the _LENGTH_STATS per length
    v: dict
    #: sweep-axis indices of the point
    idx: dict
    #: the swept parameter's name
    param: str
    #: interval flags and realisations needed per length (None: summary without flags)
    flags: tuple | None = None


@dataclass(frozen=True)
class _Normalised:
    """Normalised transmission t per length, and where it came from."""

    mean: np.ndarray
    sem: np.ndarray
    typical: np.ndarray
    label: str
    from_lstar: bool


def _length_data(run: RunData, label: str, select: Mapping[str, Any] | None,
                 lstar: LStarResult | None) -> tuple[_LengthData, Any]:
    """The figure's data, and the summary at its point (an L* result fixes the point)."""
    ds = run.summary
    unit, q = _measurement_info(ds, label)
    point = dict(select or {})
    if lstar is not None and lstar.point:
        point.update({k: v for k, v in lstar.point if k in _SWEEP_DIMS and k != "geometry"})
    idx = _point_indices(ds, point)
    sub = ds.sel(measurement=label).isel({d: i for d, i in idx.items() if d != "geometry"})
    data = _LengthData(
        ds=ds, label=label, unit=unit, q=q,
        tol=lstar.tolerance if lstar is not None else _DEFAULT_TOLERANCE,
        L=_finite(ds["geometry"].values), v={s: _finite(sub[s].values) for s in _LENGTH_STATS},
        idx=idx, param=_geometry_parameter(ds) or "length", flags=_flags(sub),
    )
    return data, sub


def _normalised_curves(d: _LengthData, sub: Any, lstar: LStarResult | None) -> _Normalised:
    """The L* analysis' own per-sample <t> and exp<ln t> when given (that is what its curves
    were fitted to), else t from the summary's mean and typical value."""
    is_r = d.unit == "h/e^2"
    L = d.L
    if (lstar is not None and len(lstar.lengths) == len(L)
            and np.allclose(np.sort(lstar.lengths), np.sort(L))):
        order = np.argsort(np.argsort(L))  # lstar lengths are ascending
        return _Normalised(
            mean=np.asarray(lstar.t_mean, dtype=float)[order],
            sem=np.asarray(lstar.t_sem, dtype=float)[order],
            typical=np.exp(np.asarray(lstar.lnt_mean, dtype=float)[order]),
            label="⟨t⟩, t = R_ideal/R per sample" if is_r else "⟨t⟩ = ⟨G⟩/G_ideal",
            from_lstar=True)
    t_mean, t_sem = _normalised(d.v["mean"], d.v["sem"], d.q, d.unit)
    if "typical" in sub:
        typ = _finite(sub["typical"].values)
        with np.errstate(divide="ignore", invalid="ignore"):
            t_typ = d.q / typ if is_r else typ / d.q
    else:
        t_typ = np.full(len(L), np.nan)
    return _Normalised(t_mean, t_sem, t_typ, "R_ideal/⟨R⟩" if is_r else "⟨t⟩ = ⟨G⟩/G_ideal",
                       from_lstar=False)


def _draw_length_panel(ax: Any, d: _LengthData) -> None:
    """Mean +- CI against length with the ideal value and its tolerance band."""
    q, L, v, tol = d.q, d.L, d.v, d.tol
    colour = _COLOURS[4 % len(_COLOURS)]
    if np.all(np.isfinite(q)):
        if np.allclose(q, q[0]):
            ax.axhspan(q[0] * (1 - tol), q[0] * (1 + tol), color="#999999", alpha=0.2, lw=0,
                       label=f"tolerance ±{tol * 100:g} %")
            _quantised_line(ax, float(q[0]), d.unit)
        else:  # the ideal value changes with the geometry: draw it per length
            ax.fill_between(L, q * (1 - tol), q * (1 + tol), color="#999999", alpha=0.2, lw=0,
                            label=f"tolerance ±{tol * 100:g} %")
            ln, = ax.plot(L, q, color=_REF, ls="--", lw=1.1, label="ideal QSH (per length)")
            ln.set_gid("quantised")
    ax.fill_between(L, v["ci95_low"], v["ci95_high"], color=colour, alpha=0.3, lw=0)
    ax.errorbar(L, v["mean"], yerr=[v["mean"] - v["ci95_low"], v["ci95_high"] - v["mean"]],
                color=colour, marker="o", ms=4, capsize=3, lw=1.4,
                label=f"mean ± {_level(d.ds)} CI")
    _mark_sparse_tails(ax, L, v["mean"], d.flags)


def _draw_lstar(ax: Any, lstar: LStarResult) -> dict:
    """L* (solid when interpolated, dotted when a bound) with its interval; returns the facts
    for the side file."""
    vermillion = OKABE_ITO[3]
    lo, hi = lstar.lstar_ci_low, lstar.lstar_ci_high
    if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
        ax.axvspan(lo, hi, color=vermillion, alpha=0.15, lw=0,
                   label=f"L* {lstar.confidence * 100:g} % interval")
    if math.isfinite(lstar.lstar):
        ln = ax.axvline(lstar.lstar, color=vermillion, lw=1.6,
                        ls="-" if lstar.lstar_kind == "interpolated" else ":",
                        label=_lstar_label(lstar))
        ln.set_gid("lstar")
    return {"value_nm": lstar.lstar, "kind": lstar.lstar_kind, "low_nm": lo, "high_nm": hi,
            "flags": list(lstar.flags),
            "lambda_nm": lstar.incoherent.value, "lambda_err_nm": lstar.incoherent.error,
            "lambda_ci_nm": [lstar.incoherent.value_ci_low, lstar.incoherent.value_ci_high],
            "lambda_p_value": lstar.incoherent.p_value,
            "xi_nm": lstar.coherent.value, "xi_err_nm": lstar.coherent.error,
            "xi_ci_nm": [lstar.coherent.value_ci_low, lstar.coherent.value_ci_high],
            "xi_p_value": lstar.coherent.p_value, "fit_interval_method":
            lstar.coherent.interval_method or lstar.incoherent.interval_method,
            "preferred": lstar.preferred, "model_choice": lstar.model_choice,
            "result": lstar.to_dict()}


def _finish_length_panel(ax: Any, d: _LengthData, lstar: LStarResult | None) -> None:
    """Axis labels, limits with room for the legend, title and the L* flags."""
    ax.set_xlabel(f"{d.param} (nm)")
    ax.set_ylabel(f"{d.label} ({_pretty(d.unit)})")
    # headroom above the data and the tolerance band for the legend
    ys = np.concatenate([d.v["ci95_low"], d.v["ci95_high"], d.v["mean"],
                         d.q * (1 - d.tol), d.q * (1 + d.tol)])
    ys = ys[np.isfinite(ys)]
    if ys.size:
        lo, hi = float(ys.min()), float(ys.max())
        span = (hi - lo) or max(abs(hi), 1.0)
        ax.set_ylim(lo - 0.06 * span, hi + 0.5 * span)
    _ohm_axis(ax, d.unit)
    ax.legend(fontsize=7.5, loc="upper right")
    ax.grid(alpha=0.3)
    fixed = _fixed_text(d.ds, d.idx, ("geometry",))
    ax.set_title(f"{d.label} vs {d.param}" + (f" ({_model_tag(d.ds)[2:]})" if _model_tag(d.ds) else "")
                 + (f"\n{fixed}" if fixed else ""), fontsize=10)
    if lstar is not None and lstar.flags:
        ax.text(0.0, -0.16, f"L* flags: {', '.join(lstar.flags)}", transform=ax.transAxes,
                fontsize=7, color=OKABE_ITO[3], va="top", ha="left")


def _draw_fits(axl: Any, L: np.ndarray, lstar: LStarResult | None) -> tuple[np.ndarray, np.ndarray]:
    """The fitted incoherent and coherent forms (the preferred one thicker); returns their
    values at the swept lengths (NaN without a usable fit)."""
    lam = lstar.incoherent.value if lstar is not None else math.nan
    xi = lstar.coherent.value if lstar is not None else math.nan
    positive = L[L > 0]
    dense = np.geomspace(positive.min() / 1.5, positive.max() * 1.5, 200) if positive.size else L
    fit_inc = _incoherent(L, lam) if math.isfinite(lam) and lam > 0 else np.full_like(L, np.nan)
    fit_coh = _coherent(L, xi) if math.isfinite(xi) and xi > 0 else np.full_like(L, np.nan)
    pref = (lstar.preferred or "").lower() if lstar is not None else ""
    if math.isfinite(lam) and lam > 0:
        axl.plot(dense, _incoherent(dense, lam), color=OKABE_ITO[2], ls="-",
                 lw=2.0 if pref == "incoherent" else 1.2,
                 label=f"incoherent ⟨t⟩ = 1/(1+L/λ), λ = {lam:.3g}"
                 f"{_fit_uncertainty(lstar.incoherent)}"
                 + (" (preferred)" if pref == "incoherent" else ""))
    if math.isfinite(xi) and xi > 0:
        axl.plot(dense, _coherent(dense, xi), color=OKABE_ITO[5], ls="-.",
                 lw=2.0 if pref == "coherent" else 1.2,
                 label=f"coherent exp⟨ln t⟩ = exp(−L/ξ), ξ = {xi:.3g}"
                 f"{_fit_uncertainty(lstar.coherent)}"
                 + (" (preferred)" if pref == "coherent" else ""))
    return fit_inc, fit_coh


def _fit_uncertainty(fit: Any) -> str:
    """' nm [low, high] (95 %), p = ...' for a fit with an interval and a test (newer L*
    results), ' ± error nm' otherwise."""
    lo, hi = fit.value_ci_low, fit.value_ci_high
    if math.isfinite(lo) and not math.isnan(hi):
        top = "∞" if hi == math.inf else f"{hi:.3g}"
        p = f", p = {fit.p_value:.2g}" if math.isfinite(fit.p_value) else ""
        return f" nm [{lo:.3g}, {top}] ({fit.confidence * 100:g} %){p}"
    return f" ± {fit.error:.3g} nm" if math.isfinite(fit.error) else " nm"


#: the figure title's words for each L* model-choice verdict (``"comparable"``: documents of
#: schema helisweep-lstar/1, whose reduced-chi^2 criterion ignored the correlation)
_VERDICT_WORDS = {
    "incoherent": "preferred form: incoherent", "coherent": "preferred form: coherent",
    "indistinguishable": "both forms fit (indistinguishable)",
    "neither": "neither form fits", "undetermined": "model choice undetermined",
    "comparable": "forms comparable (former criterion)",
}


def _draw_normalised_panel(axl: Any, d: _LengthData, t: _Normalised,
                           lstar: LStarResult | None) -> tuple[np.ndarray, np.ndarray]:
    """Log-log panel: normalised transmission and the fitted forms; returns the fits."""
    L = d.L
    ok = np.isfinite(t.mean) & (t.mean > 0) & (L > 0)
    axl.errorbar(L[ok], t.mean[ok], yerr=np.where(np.isfinite(t.sem[ok]), t.sem[ok], 0),
                 color=_COLOURS[4 % len(_COLOURS)], marker="o", ms=4, lw=0, elinewidth=1.2,
                 capsize=3, label=f"{t.label} (mean ± sem)")
    okt = np.isfinite(t.typical) & (t.typical > 0) & (L > 0)
    if np.any(okt):
        axl.plot(L[okt], t.typical[okt], color=OKABE_ITO[5], marker="s", ms=4, lw=0,
                 mfc="none", label="exp⟨ln t⟩ (typical)")
    fits = _draw_fits(axl, L, lstar)
    if np.any(ok) or np.any(okt):
        axl.set_xscale("log")
        axl.set_yscale("log")
    else:
        axl.text(0.5, 0.5, "no positive normalised values to show", transform=axl.transAxes,
                 ha="center", va="center", fontsize=9)
    axl.axhline(1.0, color=_REF, ls="--", lw=1.0, label="ideal (t = 1)")
    axl.set_xlabel(f"{d.param} (nm)")
    axl.set_ylabel("normalised transmission t (1)")
    pref = (lstar.preferred or "").lower() if lstar is not None else ""
    axl.set_title("normalised transmission (log-log)"
                  + (f"; {_VERDICT_WORDS.get(pref, f'model choice: {lstar.preferred}')}"
                     if pref else ""), fontsize=10)
    axl.grid(alpha=0.3, which="both")
    axl.legend(fontsize=6.5, loc="lower left")  # the fit labels are long: keep them inside
    return fits


def _length_table(d: _LengthData, t: _Normalised,
                  fits: tuple[np.ndarray, np.ndarray]) -> tuple[list[str], list[list]]:
    """CSV columns and one row per swept length of what the two panels plot."""
    ds, unit, q, tol = d.ds, d.unit, d.q, d.tol
    dims = _table_dims(ds)
    columns = [_col(_dim_name(ds, dim), _dim_unit(dim)) for dim in dims]
    columns += [_col(s, "1" if s == "n_samples" else unit) for s in _LENGTH_STATS]
    columns += [_col("quantised", unit), _col("tolerance_low", unit), _col("tolerance_high", unit),
                _col("normalised", "1"), _col("normalised_sem", "1"),
                _col("normalised_typical", "1"),
                _col("incoherent_fit", "1"), _col("coherent_fit", "1")]
    rows = []
    for j in range(len(d.L)):
        pt = {dim: float(ds[dim].values[j if dim == "geometry" else d.idx[dim]]) for dim in dims}
        rows.append([pt[dim] for dim in dims] + [d.v[s][j] for s in _LENGTH_STATS]
                    + [q[j], q[j] * (1 - tol), q[j] * (1 + tol), t.mean[j], t.sem[j],
                       t.typical[j], fits[0][j], fits[1][j]])
    return columns, rows


def figure_vs_length(run: RunData, label: str, slug: str | None = None,
                     select: Mapping[str, Any] | None = None,
                     lstar: LStarResult | None = None) -> Plot:
    """Mean against the swept length with the tolerance band and L*, and the normalised
    transmission t with the fitted forms on log-log axes.

    Parameters
    ----------
    run : RunData
        From :func:`load_run`; its geometry axis sweeps a length.
    label : str
        The measurement.
    slug : str, optional
        File-name form of the label (default :func:`measurement_slug`).
    select : mapping, optional
        Values of the other axes (default: the first value of every axis, the middle
        energy); the point of ``lstar`` overrides them.
    lstar : LStarResult, optional
        Drawn as L* with its interval; its per-sample ``t_mean`` and ``lnt_mean`` are the
        plotted t (else t comes from the summary) and its fits are drawn.

    Returns
    -------
    Plot
        Stem ``fig-vs-length-<slug>``; ``extra`` holds the L* facts and the full result.
    """
    d, sub = _length_data(run, label, select, lstar)
    t = _normalised_curves(d, sub, lstar)
    fig, (ax, axl) = _new_figure(run, figsize=(11.0, 4.8), ncols=2)
    _draw_length_panel(ax, d)
    extra: dict[str, Any] = {"measurement": label, "unit": d.unit, "tolerance": d.tol,
                             "quantised": d.q.tolist(), "note": MODEL_ESTIMATE_NOTE,
                             "normalised_from": "L* analysis" if t.from_lstar else "summary",
                             "normalised": t.label}
    if lstar is not None:
        extra["lstar"] = _draw_lstar(ax, lstar)
    _finish_length_panel(ax, d, lstar)
    fits = _draw_normalised_panel(axl, d, t, lstar)
    columns, rows = _length_table(d, t, fits)
    extra["curves"] = {"incoherent": "<t> = 1/(1+L/lambda)", "coherent": "exp<ln t> = exp(-L/xi)"}
    return Plot(f"fig-vs-length-{slug or measurement_slug(label)}", fig, columns, rows, extra)


# --------------------------------------------------------------------------- 3. distributions
def _default_distribution_points(ds: Any) -> list[dict]:
    n = ds.sizes.get("geometry", 1)
    if not _swept(ds, "geometry"):
        return [{}]
    return [{"geometry": float(ds["geometry"].values[0])},
            {"geometry": float(ds["geometry"].values[n - 1])}]


def _done_samples(samples: Any, label: str, points: Sequence[Mapping[str, Any]],
                  base: Mapping[str, Any]) -> list[tuple[dict, np.ndarray, np.ndarray]]:
    """Per point: its axis indices, the realisations done there and their values."""
    out = []
    for p in points:
        idx = _point_indices(samples, {**base, **dict(p)})
        sel = samples.isel(idx)
        vals = np.asarray(sel["measurements"].sel(measurement=label).values, dtype=float)
        status = np.asarray(sel["status"].values)
        done = (status == SampleStatus.DONE) & np.isfinite(vals)
        out.append((idx, sel["realisation"].values[done], vals[done]))
    return out


def _histogram_bins(values: np.ndarray) -> np.ndarray:
    """Common bin edges of all histograms (at most 40 bins; 10 around a single value)."""
    if values.size and np.ptp(values) > 0:
        bins = np.histogram_bin_edges(values, bins="auto")
        if len(bins) > 41:
            bins = np.linspace(values.min(), values.max(), 41)
        return bins
    centre = float(values[0]) if values.size else 0.0
    return np.linspace(centre - 0.5, centre + 0.5, 11)


def _draw_histogram(ax: Any, vals: np.ndarray, bins: np.ndarray, k: int, desc: str) -> float:
    """One point's histogram and its mean line; returns the mean (NaN without samples)."""
    colour = _COLOURS[k % len(_COLOURS)]
    mean = float(np.mean(vals)) if vals.size else math.nan
    ax.hist(vals, bins=bins, histtype="stepfilled", color=colour, alpha=0.3)
    ax.hist(vals, bins=bins, histtype="step", color=colour, lw=1.5,
            label=f"{desc} (N = {vals.size})")
    if math.isfinite(mean):
        ln = ax.axvline(mean, color=colour, lw=2.0, ls=":", label=f"mean {mean:.4g}")
        ln.set_gid("mean")
    return mean


def figure_distribution(run: RunData, label: str, slug: str | None = None,
                        points: Sequence[Mapping[str, Any]] | None = None,
                        select: Mapping[str, Any] | None = None) -> Plot:
    """Histograms of ``label`` over the disorder realisations done at chosen sweep points.

    Parameters
    ----------
    run : RunData
        From :func:`load_run`.
    label : str
        The measurement.
    slug : str, optional
        File-name form of the label (default :func:`measurement_slug`).
    points : sequence of mappings, optional
        Sweep points ``{axis: value}``; omitted axes take the values of ``select``, then the
        defaults. Default: first and last geometry (the only point when not swept).
    select : mapping, optional
        Axis values shared by all points.

    Returns
    -------
    Plot
        Stem ``fig-distribution-<slug>``; one CSV row per sample drawn.
    """
    from matplotlib.ticker import MaxNLocator  # matplotlib is heavy; only drawing needs it

    samples = run.samples
    unit, q = _measurement_info(run.summary, label)
    points = list(points) if points else _default_distribution_points(samples)
    fig, (ax,) = _new_figure(run)
    dims = _table_dims(samples)
    columns = [_col(_dim_name(samples, d), _dim_unit(d)) for d in dims]
    columns += [_col("realisation", "1"), _col("value", unit), _col("mean", unit)]
    rows = []
    values_by_point = _done_samples(samples, label, points, dict(select or {}))
    allv = np.concatenate([v for _, _, v in values_by_point]) if values_by_point else np.array([])
    bins = _histogram_bins(allv)
    varying = {d for d in _SWEEP_DIMS
               if len({idx[d] for idx, _, _ in values_by_point}) > 1}
    common = _fixed_text(samples, values_by_point[0][0], varying) if values_by_point else ""
    for k, (idx, reals, vals) in enumerate(values_by_point):
        desc = _fixed_text(samples, idx, set(_SWEEP_DIMS) - varying) or "samples"
        mean = _draw_histogram(ax, vals, bins, k, desc)
        for r, val in zip(reals, vals, strict=True):
            pt = {d: float(samples[d].values[idx[d]]) for d in dims}
            rows.append([pt[d] for d in dims] + [int(r), val, mean])
    for qv in sorted({float(q[idx["geometry"]]) for idx, _, _ in values_by_point}):
        if math.isfinite(qv):
            ln = ax.axvline(qv, color=_REF, ls="--", lw=1.1,
                            label=f"ideal QSH: {_g(qv)} {_pretty(unit)}")
            ln.set_gid("quantised")
    ax.set_xlabel(f"{label} ({_pretty(unit)})")
    ax.set_ylabel("realisations per bin (1)")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title(f"Distribution of {label} over "
                 + ("sampled devices (edge-network model)" if _model_tag(run.summary)
                    else "disorder realisations")
                 + (f"\n{common}" if common else ""), fontsize=10)
    ax.legend(fontsize=7.5, loc="best")
    ax.grid(alpha=0.3)
    return Plot(f"fig-distribution-{slug or measurement_slug(label)}", fig, columns, rows)


# --------------------------------------------------------------------------- 4. device
def _device_rows(device: Any, sites: np.ndarray, head: list) -> list[list]:
    """CSV rows of a drawn device: outline and hole vertices, contacts, gates and sites."""
    rows = []
    rings = [("outline", device.outline.exterior)] + [
        ("hole", r) for r in device.outline.interiors]
    for kind, ring in rings:
        for k, (x, y) in enumerate(np.asarray(ring.coords)[:, :2]):
            rows.append(head + [kind, device.name, k, x, y])
    for c in device.contacts:
        for k, (x, y) in enumerate(np.asarray(c.segment.coords)[:, :2]):
            rows.append(head + ["contact", c.name, k, x, y])
    for gate in device.gates:
        for poly in polygon_pieces(gate.region):
            for k, (x, y) in enumerate(np.asarray(poly.exterior.coords)[:, :2]):
                rows.append(head + ["gate", gate.name, k, x, y])
    for k, (x, y) in enumerate(sites):
        rows.append(head + ["site", "", k, x, y])
    return rows


def figure_device(run: RunData) -> Plot:
    """The device with its lattice sites: one panel, or the first and last swept geometry.

    Parameters
    ----------
    run : RunData
        From :func:`load_run`.

    Returns
    -------
    Plot
        Stem ``fig-device``; the CSV lists every vertex and site drawn.
    """
    cfg = run.config
    geo = cfg.axes["geometry"]
    panels = [0, len(geo) - 1] if cfg.sweep.geometry is not None and len(geo) > 1 else [0]
    fig, axes = _new_figure(run, figsize=(5.2 * len(panels) + 0.6, 4.8), ncols=len(panels))
    a = cfg.lattice.constant
    param = cfg.sweep.geometry.parameter if cfg.sweep.geometry else ""
    columns = ([_col(param, "nm")] if param else []) + [
        "element", "name", _col("vertex", "1"), _col("x", "nm"), _col("y", "nm")]
    rows = []
    for ax, g in zip(axes, panels, strict=True):
        device = device_for(cfg, g)
        mesh = mesh_device(device, a)
        plot_device(device, ax=ax, sites=mesh.positions, lattice_constant=a)
        title = f"{device.name}: {mesh.n_sites} sites, a = {_g(a)} nm"
        if param:
            title = f"{param} = {_g(geo[g])} nm\n" + title
        ax.set_title(title, fontsize=9)
        rows += _device_rows(device, mesh.positions, [geo[g]] if param else [])
    return Plot("fig-device", fig, columns, rows)


# --------------------------------------------------------------------------- 5. current map
@dataclass(frozen=True)
class _SiteGrid:
    """Sites of a current map on their lattice: site (i, j) sits at ((i + 1/2) a, (j + 1/2) a)."""

    tags: np.ndarray
    i0: int
    j0: int
    ni: int
    nj: int
    a: float

    def image(self, values: np.ndarray) -> np.ndarray:
        """Per-site values as an (nj, ni) image, NaN where there is no site."""
        out = np.full((self.nj, self.ni), np.nan)
        out[self.tags[:, 1] - self.j0, self.tags[:, 0] - self.i0] = values
        return out


def _site_grid(positions: np.ndarray, a: float) -> _SiteGrid:
    tags = np.round(positions / a - 0.5).astype(int)
    i0, j0 = tags.min(axis=0)
    ni, nj = tags.max(axis=0) - (i0, j0) + 1
    return _SiteGrid(tags, int(i0), int(j0), int(ni), int(nj), a)


def _current_figsize(device: Any, a: float) -> tuple[float, float]:
    """Figure size following the device's aspect ratio (tall devices get a narrower figure)."""
    minx, miny, maxx, maxy = device.outline.bounds
    aspect = (maxy - miny + 4 * a) / max(maxx - minx + 4 * a, 1e-9)
    width = 7.6 if aspect <= 1.2 else 5.6
    return width, float(np.clip((width - 1.8) * aspect + 1.9, 3.6, 9.0))


def _draw_current(fig: Any, ax: Any, cm: CurrentMap) -> None:
    """|j| as an image over the device, the edge-zone contour and direction arrows."""
    d = cm.density
    grid = _site_grid(d.positions, cm.lattice_constant)
    a, i0, j0, ni, nj = grid.a, grid.i0, grid.j0, grid.ni, grid.nj
    image = grid.image(d.magnitude)
    dist = grid.image(d.edge_distance)
    xe = (np.arange(ni + 1) + i0) * a
    ye = (np.arange(nj + 1) + j0) * a
    mesh = ax.pcolormesh(xe, ye, np.ma.masked_invalid(image), cmap="cividis", shading="flat",
                         rasterized=image.size > 40000, zorder=2)
    fig.colorbar(mesh, ax=ax, label="current density |j| (incoming-mode flux, 1)", shrink=0.85)
    xc = (np.arange(ni) + i0 + 0.5) * a
    yc = (np.arange(nj) + j0 + 0.5) * a
    if np.isfinite(dist).sum() > 3 and np.nanmax(dist) > d.edge_zone:
        cs = ax.contour(xc, yc, np.ma.masked_invalid(dist), levels=[d.edge_zone],
                        colors=[OKABE_ITO[0]], linestyles="--", linewidths=1.2, zorder=3)
        cs.set_gid("edge-zone")
    # direction arrows on a subsample of the sites carrying over 5 % of the largest |j|
    step = max(1, int(round(max(ni, nj) / 28)))
    strong = d.magnitude > 0.05 * (d.magnitude.max() if d.magnitude.size else 0.0)
    keep = (((grid.tags[:, 0] - i0) % step == 0) & ((grid.tags[:, 1] - j0) % step == 0)
            & strong)
    if np.any(keep):
        u = d.vectors[keep] / d.magnitude[keep, None]
        ax.quiver(d.positions[keep, 0], d.positions[keep, 1], u[:, 0], u[:, 1],
                  color="white", scale=30, width=0.003, alpha=0.9, zorder=4)


def _current_title(cfg: SweepConfig, cm: CurrentMap) -> str:
    d, p = cm.density, cm.point
    sub = []
    if cfg.sweep.geometry is not None:
        sub.append(f"{cfg.sweep.geometry.parameter} = {_g(p['geometry'])} nm")
    sub += [f"disorder strength {_g(p['disorder_strength'])}",
            f"V_g = {_g(p['gate_voltage'])} V"]
    frac = "n/a (no current)" if math.isnan(d.edge_fraction) else f"{d.edge_fraction:.3f}"
    if d.edge_distance.size and np.all(d.edge_distance <= d.edge_zone):
        frac += " - uninformative: every site is that close to an edge"
    # four short lines: the map is often tall and narrow, and one long line was clipped
    return (f"Local current from contact {cm.contact}, realisation {p['realisation']}\n"
            f"E = {_g(p['energy'])} meV, B = {_g(p['b_perp'])} T\n" + ", ".join(sub)
            + f"\nedge fraction {frac} (within 2ℓ = {d.edge_zone:.3g} nm of the "
            f"free edges, dashed)")


def _current_facts(cm: CurrentMap) -> dict:
    """The side JSON of the current map: edge fraction, its definition, columns, point."""
    d = cm.density
    return {
        "edge_fraction": d.edge_fraction,
        "edge_decay_length_nm": d.edge_decay_length,
        "edge_zone_nm": d.edge_zone,
        "definition": (
            "edge_fraction = sum of |j| over sites within 2 edge-decay lengths of a free edge "
            "(the outline boundary without the contact segments) / sum of |j| over all sites; "
            "edge decay length = 1/min Re(lambda) of the helical edge state "
            "(pipeline.physics.bhz.edge_decay_constants)"
        ),
        "columns": {
            "x_nm": "site x position (nm)", "y_nm": "site y position (nm)",
            "current": ("magnitude of the site current density, in units of the particle flux "
                        "of one incoming lead mode (dimensionless), summed over the incoming "
                        "modes of the injecting contact"),
            "edge_distance_nm": "distance from the nearest free edge (nm)",
            "near_edge": "true when edge_distance_nm <= 2 edge-decay lengths",
        },
        "injecting_contact": cm.contact,
        "incoming_modes": d.n_modes,
        "point": cm.point,
        "units": {"energy": "meV", "b_perp": "T", "gate_voltage": "V", "geometry": "nm",
                  "disorder_strength": "1"},
        "note": MODEL_ESTIMATE_NOTE,
    }


def figure_current(run: RunData, point: Mapping[str, Any] | None = None) -> Plot:
    """The local current density of one sample, drawn over the device.

    Parameters
    ----------
    run : RunData
        From :func:`load_run`.
    point : mapping, optional
        Realisation, contact and sweep point (see :func:`pipeline.sweep.probe.current_map`,
        which solves the sample).

    Returns
    -------
    Plot
        Stem ``fig-current``: one CSV row per site; the side JSON holds the edge fraction.
    """
    cm = current_map(run.config, point)
    d = cm.density
    fig, (ax,) = _new_figure(run, figsize=_current_figsize(cm.device, cm.lattice_constant))
    plot_device(cm.device, ax=ax)  # outline, contacts with lead arrows, gates
    _draw_current(fig, ax, cm)
    ax.set_aspect("equal")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.set_title(_current_title(run.config, cm), fontsize=8)
    near = d.edge_distance <= d.edge_zone
    rows = [[x, y, c, e, bool(n)] for (x, y), c, e, n
            in zip(d.positions, d.magnitude, d.edge_distance, near, strict=True)]
    columns = ["x_nm", "y_nm", "current", "edge_distance_nm", "near_edge"]
    return Plot("fig-current", fig, columns, rows, _current_facts(cm))


# --------------------------------------------------------------------------- entry point
def make_figures(run: RunData, out_dir: str | Path, *, lstar: Any = None,
                 distribution_points: Sequence[Mapping[str, Any]] | None = None,
                 current_point: Mapping[str, Any] | None = None,
                 select: Mapping[str, Any] | None = None) -> list[Path]:
    """Write every figure of a run (PDF, PNG and CSV each; JSON beside some).

    Parameters
    ----------
    run : RunData
        From :func:`load_run`.
    out_dir : str or Path
        Directory for the files (created if missing). Existing files of the same name are
        replaced: figures are derived data.
    lstar : LStarResult, LStarTable, mapping or sequence, optional
        L* result(s) (:func:`pipeline.analysis.lstar.longest_ballistic_length`): results or tables
        (alone or in a sequence) naming their measurements, or ``{measurement: result}``.
        Per measurement the result at the figure's sweep point is drawn (else the first one,
        and the length figure then shows that result's point).
    distribution_points : sequence of mappings, optional
        Sweep points for the histograms, each ``{axis: value}`` in the axis units; omitted axes
        take the defaults of ``select``. Default: first and last geometry at the middle energy.
    current_point : mapping, optional
        Realisation, sweep point and ``contact`` of the current map (see
        :func:`pipeline.sweep.probe.current_map`).
    select : mapping, optional
        Values of the axes held fixed in the line figures (default: the first value of every
        axis, the middle energy).

    Returns
    -------
    list of Path
        Every file written.
    """
    out_dir = Path(out_dir)
    labels = [str(m) for m in run.summary["measurement"].values]
    slugs = _slugs(labels)
    lstars = _lstar_by_measurement(lstar, labels)
    ds = run.summary
    written: list[Path] = []
    x_dims = [d for d in ("energy", "gate_voltage", "b_perp", "disorder_strength")
              if _swept(ds, d)]
    if not x_dims and not _swept(ds, "geometry"):
        x_dims = ["energy"]  # a single sweep point: still show it (with its error bars)
    for label in labels:
        for x_dim in x_dims:
            written += _save(figure_vs_axis(run, label, x_dim, slugs[label], select), out_dir)
        if _swept(ds, "geometry"):
            chosen = _choose_lstar(ds, lstars.get(label, []), select)
            written += _save(figure_vs_length(run, label, slugs[label], select, chosen), out_dir)
        written += _save(figure_distribution(run, label, slugs[label], distribution_points,
                                             select), out_dir)
    if not _model_tag(ds):
        # the edge-network model never meshes the whole device (it may be tens of um):
        # no mesh figure and no current map, which would need a direct solve
        written += _save(figure_device(run), out_dir)
        written += _save(figure_current(run, current_point), out_dir)
    return written


def _model_tag(ds: Any) -> str:
    """``", edge-network model"`` for results of the edge-network model, else ``""``."""
    return ", edge-network model" if "network" in str(ds.attrs.get("model", "")) else ""
