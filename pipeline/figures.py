"""Figures of a finished (or partial) run: every figure as PDF, PNG and the CSV it plots.

:func:`load_run` gathers what the figures need -- the configuration, the sample store and the
summary made by :func:`pipeline.aggregate.summarize` -- into a :class:`RunData`, and
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
edges), see :func:`current_map`.

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
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .config import AXES, SweepConfig, parse_config
from .errors import HelisweepError
from .geometry import OKABE_ITO

__all__ = [
    "RunData",
    "CurrentMap",
    "load_run",
    "make_figures",
    "current_map",
    "measurement_slug",
    "MODEL_ESTIMATE_NOTE",
]

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
        The aggregated summary (:func:`pipeline.aggregate.summarize`).
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
            return parse_config(text, source=f"{store_path} (stored config)", base_dir=base)
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
        :func:`pipeline.aggregate.summarize`.
    config : SweepConfig, optional
        The configuration; by default parsed from the text stored in the store's attributes
        (a device file is then looked up relative to the working directory and the run).

    Returns
    -------
    RunData
    """
    import xarray as xr

    store_path = _find_store(Path(run_dir_or_store_path))
    samples = xr.open_zarr(str(store_path), consolidated=False)
    if config is None:
        config = _config_from_store(samples.attrs, store_path)
    if summary is None:
        try:
            from .aggregate import summarize
        except ImportError as exc:  # pragma: no cover - depends on the aggregate stage
            raise HelisweepError(
                "no summary given and pipeline.aggregate is not available; pass summary="
            ) from exc
        summary = summarize(store_path, config_dir=config.base_dir)
    elif isinstance(summary, (str, Path)):
        summary = xr.load_dataset(str(summary))
    _check_summary(summary)
    mine, theirs = samples.attrs.get("config_hash"), summary.attrs.get("config_hash")
    if mine and theirs and str(mine) != str(theirs):
        raise HelisweepError(
            f"the summary was made from another configuration (hash {str(theirs)[:12]}) than "
            f"the store {str(store_path)!r} ({str(mine)[:12]}); summarise this store again"
        )
    return RunData(config=config, samples=samples, summary=summary, store_path=store_path)


def _check_summary(summary: Any) -> None:
    missing = [d for d in _SWEEP_DIMS + ("measurement",) if d not in summary.dims]
    missing += [v for v in ("mean", "std", "ci95_low", "ci95_high", "n_samples")
                if v not in summary.data_vars]
    missing += [c for c in ("unit", "quantised") if c not in summary.coords]
    if missing:
        raise HelisweepError(
            f"the summary lacks {', '.join(missing)}; make it with pipeline.aggregate.summarize"
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
    unknown = sorted(set(point) - set(_SWEEP_DIMS) - {"realisation", "lead"})
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
class _Plot:
    """A built figure with the table it plots (and optional side facts)."""

    stem: str
    figure: Any
    columns: list[str]
    rows: list[list[Any]]
    extra: dict | None = None


def _new_figure(run: RunData, *, figsize=(7.0, 4.8), ncols: int = 1, **kw):
    from matplotlib.figure import Figure

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


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _save(plot: _Plot, out_dir: Path) -> list[Path]:
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
        side.write_text(json.dumps(_jsonable(plot.extra), indent=2) + "\n", encoding="utf-8")
        written.append(side)
    return written


def _quantised_line(ax: Any, q: float, unit: str):
    """Dashed line at the ideal quantum-spin-Hall value (gid ``"quantised"``)."""
    if not math.isfinite(q):
        return None
    from .constants import H_OVER_E2_OHM

    text = f"ideal QSH: {_g(q)} {_pretty(unit)}"
    if unit == "h/e^2":
        text += f" ({q * H_OVER_E2_OHM / 1e3:.4g} kΩ)"
    line = ax.axhline(q, color=_REF, ls="--", lw=1.1, label=text, zorder=4)
    line.set_gid("quantised")
    return line


def _ohm_axis(ax: Any, unit: str) -> None:
    if unit != "h/e^2":
        return
    from .constants import H_OVER_E2_OHM

    k = H_OVER_E2_OHM / 1e3
    sec = ax.secondary_yaxis("right", functions=(lambda r: r * k, lambda x: x / k))
    sec.set_ylabel("resistance (kΩ)")


def _level(ds: Any) -> str:
    """The confidence level of the summary's ``ci95_*`` intervals, as text (e.g. "95 %")."""
    try:
        return f"{float(ds.attrs.get('confidence', 0.95)) * 100:g} %"
    except (TypeError, ValueError):
        return "95 %"


def _band_handles(ds: Any):
    from matplotlib.patches import Patch

    return [Patch(facecolor="#777777", alpha=0.35, label=f"{_level(ds)} CI of the mean"),
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


def _figure_vs_axis(run: RunData, label: str, x_dim: str, slug: str,
                    select: Mapping[str, Any] | None = None) -> _Plot:
    ds = run.summary
    unit, q_geo = _measurement_info(ds, label)
    idx = _point_indices(ds, select)
    line_dim = _line_dim(ds, x_dim, (select or {}).keys())
    lines = _pick(ds.sizes[line_dim], len(_COLOURS)) if line_dim else [None]
    x = _finite(ds[x_dim].values)
    fig, (ax,) = _new_figure(run)
    dims = _table_dims(ds)
    stats = ("mean", "std", "sem", "ci95_low", "ci95_high", "n_samples")
    columns = [_col(_dim_name(ds, d), _dim_unit(d)) for d in dims]
    columns += [_col(s, "1" if s == "n_samples" else unit) for s in stats] + [_col("quantised", unit)]
    rows = []
    many = len(x) > 1
    ideal: set[float] = set()
    for k, li in enumerate(lines):
        sel = {d: i for d, i in idx.items() if d != x_dim}
        if line_dim is not None:
            sel[line_dim] = li
        sub = ds.sel(measurement=label).isel(sel)
        v = {s: _finite(sub[s].values) for s in stats}
        colour = _COLOURS[k % len(_COLOURS)]
        name = (_value_text(ds, line_dim, float(ds[line_dim].values[li]))
                if line_dim else "mean over realisations")
        ax.fill_between(x, v["mean"] - v["std"], v["mean"] + v["std"], color=colour,
                        alpha=0.13, lw=0)
        ax.fill_between(x, v["ci95_low"], v["ci95_high"], color=colour, alpha=0.35, lw=0)
        xs = x
        if not many:  # a single point: bands have no width, so show bars side by side
            xs = x + (k - (len(lines) - 1) / 2) * 0.03 * max(abs(float(x[0])), 1.0)
            ax.errorbar(xs, v["mean"], yerr=[v["std"], v["std"]],
                        fmt="none", ecolor=colour, alpha=0.35, capsize=0, lw=6)
            ax.errorbar(xs, v["mean"], yerr=[v["mean"] - v["ci95_low"], v["ci95_high"] - v["mean"]],
                        fmt="none", ecolor=colour, capsize=4)
        ax.plot(xs, v["mean"], color=colour, marker=_MARKERS[k % len(_MARKERS)], ms=5,
                lw=1.6, label=name)
        for j in range(len(x)):
            point = {d: (j if d == x_dim else sel[d]) for d in _SWEEP_DIMS}
            q = float(q_geo[point["geometry"]])
            ideal.add(q)
            rows.append([float(ds[d].values[point[d]]) for d in dims]
                        + [v[s][j] for s in stats] + [q])
    for q in sorted(ideal):
        _quantised_line(ax, q, unit)
    if not many:  # one x value: the lines sit side by side around it (see the CSV)
        scale = max(abs(float(x[0])), 1.0)
        ax.set_xlim(float(x[0]) - 0.12 * scale, float(x[0]) + 0.12 * scale)
        ax.set_xticks([float(x[0])])
    ax.set_xlabel(_axis_label(ds, x_dim)
                  + ("  (values offset side by side for legibility)"
                     if not many and len(lines) > 1 else ""))
    ax.set_ylabel(f"{label} ({_pretty(unit)})")
    _ohm_axis(ax, unit)
    handles, _ = ax.get_legend_handles_labels()
    ax.legend(handles=handles + _band_handles(ds), fontsize=8, loc="best")
    fixed = _fixed_text(ds, idx, (x_dim, line_dim) if line_dim else (x_dim,))
    ax.set_title(f"{label} vs {_AXIS_LABEL.get(x_dim, x_dim)} (disorder average)"
                 + (f"\n{fixed}" if fixed else ""), fontsize=10)
    ax.grid(alpha=0.3)
    return _Plot(f"fig-vs-{_AXIS_STEM.get(x_dim, x_dim)}-{slug}", fig, columns, rows)


# --------------------------------------------------------------------------- 2. versus length
@dataclass(frozen=True)
class _LStar:
    """What the length figure needs from an L* result, whatever its field names.

    ``kind`` is ``"interpolated"`` or, when the direct L* is only a bound, ``"lower_bound"``
    (L* >= value) or ``"upper_bound"`` (L* <= value). ``t_mean``/``t_sem`` are the mean
    normalised transmission per length and ``lnt_mean`` the mean of its logarithm, as fitted.
    """

    measurement: str | None = None
    value: float = math.nan
    kind: str = "interpolated"
    low: float = math.nan
    high: float = math.nan
    flags: tuple[str, ...] = ()
    tolerance: float = _DEFAULT_TOLERANCE
    confidence: float = 0.95
    lam: float = math.nan
    lam_err: float = math.nan
    xi: float = math.nan
    xi_err: float = math.nan
    preferred: str | None = None
    point: dict | None = None
    lengths: tuple = ()
    t_mean: tuple = ()
    t_sem: tuple = ()
    lnt_mean: tuple = ()
    raw: dict = field(default_factory=dict)


def _flatten(d: Mapping, prefix: str = "") -> dict:
    out: dict = {}
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, Mapping) and k not in ("point", "selection"):
            out.update(_flatten(v, key + "_"))
        out[key] = v
    return out


def _as_mapping(obj: Any) -> dict:
    if isinstance(obj, Mapping):
        return dict(obj)
    if hasattr(obj, "as_dict"):
        return dict(obj.as_dict())
    if hasattr(obj, "__dict__"):
        return dict(vars(obj))
    raise HelisweepError(f"cannot read an L* result from {type(obj).__name__!r}")


def _num(d: Mapping, *names: str) -> float:
    for n in names:
        if n in d and d[n] is not None:
            try:
                return float(d[n])
            except (TypeError, ValueError):
                continue
    return math.nan


def _seq(d: Mapping, name: str) -> tuple:
    v = d.get(name)
    if not isinstance(v, (list, tuple, np.ndarray)):
        return ()
    return tuple(math.nan if x is None else float(x) for x in v)


def _lstar_view(obj: Any) -> _LStar:
    """Read an L* result (:class:`pipeline.lstar.LStarResult` or a dict like its ``as_dict()``)."""
    d = _flatten(_as_mapping(obj))
    for name in ("lstar_interval", "interval", "ci", "bootstrap_interval", "interval_nm"):
        v = d.get(name)
        if isinstance(v, (list, tuple)) and len(v) == 2:
            d.setdefault("low", v[0])
            d.setdefault("high", v[1])
    flags = d.get("flags", ())
    if isinstance(flags, str):
        flags = (flags,) if flags else ()
    elif isinstance(flags, Mapping):
        flags = tuple(k for k, v in flags.items() if v)
    point = d.get("point", d.get("selection"))
    if isinstance(point, (list, tuple)):  # ((dim, value), ...) pairs
        point = dict(point)
    tol = _num(d, "tolerance")
    return _LStar(
        measurement=d.get("measurement"),
        value=_num(d, "lstar", "l_star", "L_star", "lstar_nm", "value", "direct", "direct_value"),
        kind=str(d.get("lstar_kind") or "interpolated"),
        low=_num(d, "lstar_ci_low", "lstar_low", "low", "ci_low", "interval_low", "direct_low"),
        high=_num(d, "lstar_ci_high", "lstar_high", "high", "ci_high", "interval_high",
                  "direct_high"),
        flags=tuple(str(f) for f in flags),
        tolerance=tol if math.isfinite(tol) else _DEFAULT_TOLERANCE,
        confidence=(_num(d, "confidence") if math.isfinite(_num(d, "confidence")) else 0.95),
        lam=_num(d, "lambda_nm", "lambda_", "lam", "lambda", "fit_lambda", "incoherent_value"),
        lam_err=_num(d, "lambda_error", "lambda_err", "lam_err", "fit_lambda_err",
                     "incoherent_error"),
        xi=_num(d, "xi_nm", "xi", "fit_xi", "coherent_value"),
        xi_err=_num(d, "xi_error", "xi_err", "fit_xi_err", "coherent_error"),
        preferred=(str(d.get("preferred") or d.get("preferred_form") or "") or None),
        point=dict(point) if isinstance(point, Mapping) else None,
        lengths=_seq(d, "lengths"), t_mean=_seq(d, "t_mean"), t_sem=_seq(d, "t_sem"),
        lnt_mean=_seq(d, "lnt_mean"),
        raw=_as_mapping(obj),
    )


def _lstar_items(lstar: Any) -> list:
    """Flatten results, tables of results (``.results`` or ``rows``) and sequences of them."""
    if lstar is None:
        return []
    if isinstance(lstar, (list, tuple)):
        return [r for item in lstar for r in _lstar_items(item)]
    if hasattr(lstar, "results") and not isinstance(lstar, Mapping):
        return list(lstar.results)
    if isinstance(lstar, Mapping) and isinstance(lstar.get("rows"), list):
        return list(lstar["rows"])
    return [lstar]


def _lstar_by_measurement(lstar: Any, labels: Sequence[str]) -> dict[str, list[_LStar]]:
    if isinstance(lstar, Mapping) and lstar and all(k in labels for k in lstar):
        pairs = [(k, _lstar_view(r)) for k, v in lstar.items() for r in _lstar_items(v)]
    else:
        pairs = []
        for r in _lstar_items(lstar):
            v = _lstar_view(r)
            name = v.measurement
            if name is None and len(labels) == 1:
                name = labels[0]
            if name is None:
                raise HelisweepError(
                    "an L* result does not name its measurement; pass {label: result}"
                )
            pairs.append((name, v))
    out: dict[str, list[_LStar]] = {}
    for label, view in pairs:
        if label not in labels:
            raise HelisweepError(
                f"an L* result is for measurement {label!r}, which the run does not report "
                f"({', '.join(labels)})"
            )
        out.setdefault(label, []).append(view)
    return out


def _choose_lstar(ds: Any, views: Sequence[_LStar], select: Mapping[str, Any] | None):
    """The L* result at the figure's sweep point (else the first one, whose point is then
    used for the figure)."""
    if not views:
        return None
    idx = _point_indices(ds, select)
    for v in views:
        if not v.point:
            continue
        try:
            if all(_index_of(ds, d, val) == idx[d] for d, val in v.point.items()
                   if d in _SWEEP_DIMS and d != "geometry"):
                return v
        except HelisweepError:
            continue
    return views[0]


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


def _lstar_label(ls: _LStar) -> str:
    sign = {"lower_bound": "≥", "upper_bound": "≤"}.get(ls.kind, "=")
    text = f"L* {sign} {ls.value:.4g} nm"
    if ls.kind != "interpolated":
        text += " (bound: outside the swept range)"
    if math.isfinite(ls.low) and math.isfinite(ls.high):
        text += f", {ls.confidence * 100:g} % interval [{ls.low:.4g}, {ls.high:.4g}]"
    return text


def _figure_vs_length(run: RunData, label: str, slug: str,
                      select: Mapping[str, Any] | None = None,
                      lstar: _LStar | None = None) -> _Plot:
    ds = run.summary
    unit, q = _measurement_info(ds, label)
    point = dict(select or {})
    if lstar is not None and lstar.point:
        point.update({k: v for k, v in lstar.point.items() if k in _SWEEP_DIMS and k != "geometry"})
    idx = _point_indices(ds, point)
    sub = ds.sel(measurement=label).isel({d: i for d, i in idx.items() if d != "geometry"})
    L = _finite(ds["geometry"].values)
    stats = ("mean", "std", "sem", "ci95_low", "ci95_high", "n_samples")
    v = {s: _finite(sub[s].values) for s in stats}
    tol = lstar.tolerance if lstar is not None else _DEFAULT_TOLERANCE
    is_r = unit == "h/e^2"
    # normalised transmission t: the L* analysis' own per-sample <t> and exp<ln t> when given
    # (that is what its curves were fitted to), else from the summary
    from_lstar = (lstar is not None and len(lstar.lengths) == len(L)
                  and np.allclose(np.sort(lstar.lengths), np.sort(L)) and len(lstar.t_mean) == len(L))
    if from_lstar:
        order = np.argsort(np.argsort(L))  # lstar lengths are ascending
        t_mean = np.asarray(lstar.t_mean, dtype=float)[order]
        t_sem = (np.asarray(lstar.t_sem, dtype=float)[order] if len(lstar.t_sem) == len(L)
                 else np.full(len(L), np.nan))
        t_typ = (np.exp(np.asarray(lstar.lnt_mean, dtype=float)[order])
                 if len(lstar.lnt_mean) == len(L) else np.full(len(L), np.nan))
        mean_label = "⟨t⟩, t = R_ideal/R per sample" if is_r else "⟨t⟩ = ⟨G⟩/G_ideal"
    else:
        t_mean, t_sem = _normalised(v["mean"], v["sem"], q, unit)
        if "typical" in sub:
            typ = _finite(sub["typical"].values)
            with np.errstate(divide="ignore", invalid="ignore"):
                t_typ = q / typ if is_r else typ / q
        else:
            t_typ = np.full(len(L), np.nan)
        mean_label = "R_ideal/⟨R⟩" if is_r else "⟨t⟩ = ⟨G⟩/G_ideal"
    lam = lstar.lam if lstar is not None else math.nan
    xi = lstar.xi if lstar is not None else math.nan

    fig, (ax, axl) = _new_figure(run, figsize=(11.0, 4.8), ncols=2)
    param = _geometry_parameter(ds)
    colour = _COLOURS[4 % len(_COLOURS)]
    if np.all(np.isfinite(q)):
        if np.allclose(q, q[0]):
            ax.axhspan(q[0] * (1 - tol), q[0] * (1 + tol), color="#999999", alpha=0.2, lw=0,
                       label=f"tolerance ±{tol * 100:g} %")
            _quantised_line(ax, float(q[0]), unit)
        else:  # the ideal value changes with the geometry: draw it per length
            ax.fill_between(L, q * (1 - tol), q * (1 + tol), color="#999999", alpha=0.2, lw=0,
                            label=f"tolerance ±{tol * 100:g} %")
            ln, = ax.plot(L, q, color=_REF, ls="--", lw=1.1, label="ideal QSH (per length)")
            ln.set_gid("quantised")
    ax.fill_between(L, v["ci95_low"], v["ci95_high"], color=colour, alpha=0.3, lw=0)
    ax.errorbar(L, v["mean"], yerr=[v["mean"] - v["ci95_low"], v["ci95_high"] - v["mean"]],
                color=colour, marker="o", ms=4, capsize=3, lw=1.4,
                label=f"mean ± {_level(ds)} CI")
    extra: dict[str, Any] = {"measurement": label, "unit": unit, "tolerance": tol,
                             "quantised": q.tolist(), "note": MODEL_ESTIMATE_NOTE,
                             "normalised_from": "L* analysis" if from_lstar else "summary",
                             "normalised": mean_label}
    if lstar is not None:
        vermillion = OKABE_ITO[3]
        if math.isfinite(lstar.low) and math.isfinite(lstar.high) and lstar.high > lstar.low:
            ax.axvspan(lstar.low, lstar.high, color=vermillion, alpha=0.15, lw=0,
                       label=f"L* {lstar.confidence * 100:g} % interval")
        if math.isfinite(lstar.value):
            ln = ax.axvline(lstar.value, color=vermillion, lw=1.6,
                            ls="-" if lstar.kind == "interpolated" else ":",
                            label=_lstar_label(lstar))
            ln.set_gid("lstar")
        extra["lstar"] = {"value_nm": lstar.value, "kind": lstar.kind, "low_nm": lstar.low,
                          "high_nm": lstar.high, "flags": list(lstar.flags),
                          "lambda_nm": lstar.lam, "lambda_err_nm": lstar.lam_err,
                          "xi_nm": lstar.xi, "xi_err_nm": lstar.xi_err,
                          "preferred": lstar.preferred, "result": lstar.raw}
    ax.set_xlabel(f"{param or 'length'} (nm)")
    ax.set_ylabel(f"{label} ({_pretty(unit)})")
    # headroom above the data and the tolerance band for the legend
    ys = np.concatenate([v["ci95_low"], v["ci95_high"], v["mean"],
                         q * (1 - tol), q * (1 + tol)])
    ys = ys[np.isfinite(ys)]
    if ys.size:
        lo, hi = float(ys.min()), float(ys.max())
        span = (hi - lo) or max(abs(hi), 1.0)
        ax.set_ylim(lo - 0.06 * span, hi + 0.5 * span)
    _ohm_axis(ax, unit)
    ax.legend(fontsize=7.5, loc="upper right")
    ax.grid(alpha=0.3)
    fixed = _fixed_text(ds, idx, ("geometry",))
    flags = (f"\nL* flags: {', '.join(lstar.flags)}" if lstar is not None and lstar.flags else "")
    ax.set_title(f"{label} vs {param or 'length'}" + (f"\n{fixed}" if fixed else ""),
                 fontsize=10)
    if flags:
        ax.text(0.0, -0.16, flags.strip(), transform=ax.transAxes, fontsize=7,
                color=OKABE_ITO[3], va="top", ha="left")

    # log-log panel: normalised transmission and the fitted forms
    ok = np.isfinite(t_mean) & (t_mean > 0) & (L > 0)
    axl.errorbar(L[ok], t_mean[ok], yerr=np.where(np.isfinite(t_sem[ok]), t_sem[ok], 0),
                 color=colour, marker="o", ms=4, lw=0, elinewidth=1.2, capsize=3,
                 label=f"{mean_label} (mean ± sem)")
    okt = np.isfinite(t_typ) & (t_typ > 0) & (L > 0)
    if np.any(okt):
        axl.plot(L[okt], t_typ[okt], color=OKABE_ITO[5], marker="s", ms=4, lw=0,
                 mfc="none", label="exp⟨ln t⟩ (typical)")
    positive = L[L > 0]
    dense = np.geomspace(positive.min() / 1.5, positive.max() * 1.5, 200) if positive.size else L
    fit_inc = _incoherent(L, lam) if math.isfinite(lam) and lam > 0 else np.full_like(L, np.nan)
    fit_coh = _coherent(L, xi) if math.isfinite(xi) and xi > 0 else np.full_like(L, np.nan)
    pref = (lstar.preferred or "").lower() if lstar is not None else ""
    if math.isfinite(lam) and lam > 0:
        err = f" ± {lstar.lam_err:.3g}" if math.isfinite(lstar.lam_err) else ""
        axl.plot(dense, _incoherent(dense, lam), color=OKABE_ITO[2], ls="-",
                 lw=2.0 if pref == "incoherent" else 1.2,
                 label=f"incoherent ⟨t⟩ = 1/(1+L/λ), λ = {lam:.3g}{err} nm"
                 + (" (preferred)" if pref == "incoherent" else ""))
    if math.isfinite(xi) and xi > 0:
        err = f" ± {lstar.xi_err:.3g}" if math.isfinite(lstar.xi_err) else ""
        axl.plot(dense, _coherent(dense, xi), color=OKABE_ITO[5], ls="-.",
                 lw=2.0 if pref == "coherent" else 1.2,
                 label=f"coherent exp⟨ln t⟩ = exp(−L/ξ), ξ = {xi:.3g}{err} nm"
                 + (" (preferred)" if pref == "coherent" else ""))
    if np.any(ok) or np.any(okt):
        axl.set_xscale("log")
        axl.set_yscale("log")
    else:
        axl.text(0.5, 0.5, "no positive normalised values to show", transform=axl.transAxes,
                 ha="center", va="center", fontsize=9)
    axl.axhline(1.0, color=_REF, ls="--", lw=1.0, label="ideal (t = 1)")
    axl.set_xlabel(f"{param or 'length'} (nm)")
    axl.set_ylabel("normalised transmission t (1)")
    axl.set_title("normalised transmission (log-log)"
                  + (f"; preferred form: {lstar.preferred}" if pref else ""), fontsize=10)
    axl.grid(alpha=0.3, which="both")
    axl.legend(fontsize=7, loc="best")

    dims = _table_dims(ds)
    columns = [_col(_dim_name(ds, d), _dim_unit(d)) for d in dims]
    columns += [_col(s, "1" if s == "n_samples" else unit) for s in stats]
    columns += [_col("quantised", unit), _col("tolerance_low", unit), _col("tolerance_high", unit),
                _col("normalised", "1"), _col("normalised_sem", "1"),
                _col("normalised_typical", "1"),
                _col("incoherent_fit", "1"), _col("coherent_fit", "1")]
    rows = []
    for j in range(len(L)):
        pt = {d: float(ds[d].values[j if d == "geometry" else idx[d]]) for d in dims}
        rows.append([pt[d] for d in dims] + [v[s][j] for s in stats]
                    + [q[j], q[j] * (1 - tol), q[j] * (1 + tol), t_mean[j], t_sem[j], t_typ[j],
                       fit_inc[j], fit_coh[j]])
    extra["curves"] = {"incoherent": "<t> = 1/(1+L/lambda)", "coherent": "exp<ln t> = exp(-L/xi)"}
    return _Plot(f"fig-vs-length-{slug}", fig, columns, rows, extra)

# --------------------------------------------------------------------------- 3. distributions
def _default_distribution_points(ds: Any) -> list[dict]:
    n = ds.sizes.get("geometry", 1)
    if not _swept(ds, "geometry"):
        return [{}]
    return [{"geometry": float(ds["geometry"].values[0])},
            {"geometry": float(ds["geometry"].values[n - 1])}]


def _figure_distribution(run: RunData, label: str, slug: str,
                         points: Sequence[Mapping[str, Any]] | None,
                         select: Mapping[str, Any] | None = None) -> _Plot:
    from matplotlib.ticker import MaxNLocator

    samples = run.samples
    unit, q = _measurement_info(run.summary, label)
    base = dict(select or {})
    points = list(points) if points else _default_distribution_points(samples)
    fig, (ax,) = _new_figure(run)
    dims = _table_dims(samples)
    columns = [_col(_dim_name(samples, d), _dim_unit(d)) for d in dims]
    columns += [_col("realisation", "1"), _col("value", unit), _col("mean", unit)]
    rows = []
    values_by_point = []
    for p in points:
        idx = _point_indices(samples, {**base, **dict(p)})
        sel = samples.isel(idx)
        vals = np.asarray(sel["measurements"].sel(measurement=label).values, dtype=float)
        status = np.asarray(sel["status"].values)
        done = (status == 1) & np.isfinite(vals)
        values_by_point.append((idx, sel["realisation"].values[done], vals[done]))
    allv = np.concatenate([v for _, _, v in values_by_point]) if values_by_point else np.array([])
    if allv.size and np.ptp(allv) > 0:
        bins = np.histogram_bin_edges(allv, bins="auto")
        if len(bins) > 41:
            bins = np.linspace(allv.min(), allv.max(), 41)
    else:
        centre = float(allv[0]) if allv.size else 0.0
        bins = np.linspace(centre - 0.5, centre + 0.5, 11)
    varying = {d for d in _SWEEP_DIMS
               if len({idx[d] for idx, _, _ in values_by_point}) > 1}
    common = _fixed_text(samples, values_by_point[0][0], varying) if values_by_point else ""
    for k, (idx, reals, vals) in enumerate(values_by_point):
        colour = _COLOURS[k % len(_COLOURS)]
        desc = _fixed_text(samples, idx, set(_SWEEP_DIMS) - varying) or "samples"
        mean = float(np.mean(vals)) if vals.size else math.nan
        ax.hist(vals, bins=bins, histtype="stepfilled", color=colour, alpha=0.3)
        ax.hist(vals, bins=bins, histtype="step", color=colour, lw=1.5,
                label=f"{desc} (N = {vals.size})")
        if math.isfinite(mean):
            ln = ax.axvline(mean, color=colour, lw=2.0, ls=":", label=f"mean {mean:.4g}")
            ln.set_gid("mean")
        for r, val in zip(reals, vals):
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
    ax.set_title(f"Distribution of {label} over disorder realisations"
                 + (f"\n{common}" if common else ""), fontsize=10)
    ax.legend(fontsize=7.5, loc="best")
    ax.grid(alpha=0.3)
    return _Plot(f"fig-distribution-{slug}", fig, columns, rows)


# --------------------------------------------------------------------------- 4. device
def _polygons(geom: Any) -> list:
    if geom is None or geom.is_empty:
        return []
    return list(geom.geoms) if hasattr(geom, "geoms") else [geom]


def _figure_device(run: RunData) -> _Plot:
    from .engine import device_for
    from .geometry import plot_device
    from .mesh import mesh_device

    cfg = run.config
    geo = cfg.axes["geometry"]
    panels = [0, len(geo) - 1] if cfg.sweep.geometry is not None and len(geo) > 1 else [0]
    fig, axes = _new_figure(run, figsize=(5.2 * len(panels) + 0.6, 4.8), ncols=len(panels))
    a = cfg.lattice.constant
    param = cfg.sweep.geometry.parameter if cfg.sweep.geometry else ""
    columns = ([_col(param, "nm")] if param else []) + [
        "element", "name", _col("vertex", "1"), _col("x", "nm"), _col("y", "nm")]
    rows = []
    for ax, g in zip(axes, panels):
        device = device_for(cfg, g)
        mesh = mesh_device(device, a)
        plot_device(device, ax=ax, sites=mesh.positions, lattice_constant=a)
        head = [geo[g]] if param else []
        title = f"{device.name}: {mesh.n_sites} sites, a = {_g(a)} nm"
        if param:
            title = f"{param} = {_g(geo[g])} nm\n" + title
        ax.set_title(title, fontsize=9)
        rings = [("outline", device.outline.exterior)] + [
            ("hole", r) for r in device.outline.interiors]
        for kind, ring in rings:
            for k, (x, y) in enumerate(np.asarray(ring.coords)[:, :2]):
                rows.append(head + [kind, device.name, k, x, y])
        for c in device.contacts:
            for k, (x, y) in enumerate(np.asarray(c.segment.coords)[:, :2]):
                rows.append(head + ["contact", c.name, k, x, y])
        for gate in device.gates:
            for poly in _polygons(gate.region):
                for k, (x, y) in enumerate(np.asarray(poly.exterior.coords)[:, :2]):
                    rows.append(head + ["gate", gate.name, k, x, y])
        for k, (x, y) in enumerate(mesh.positions):
            rows.append(head + ["site", "", k, x, y])
    return _Plot("fig-device", fig, columns, rows)


# --------------------------------------------------------------------------- 5. current map
@dataclass(frozen=True)
class CurrentMap:
    """Site-resolved current density of one realisation, injected from one contact.

    Attributes
    ----------
    positions : numpy.ndarray
        Site positions (nm), shape (n, 2), in the finalized system's site order.
    vectors : numpy.ndarray
        Current density vector per site, shape (n, 2): half the sum over the site's bonds of
        the bond current times the bond's unit vector. Units: particle flux of one incoming
        lead mode (dimensionless), summed over all incoming modes of the contact.
    magnitude : numpy.ndarray
        ``|vectors|`` per site, shape (n,).
    edge_distance : numpy.ndarray
        Distance (nm) of each site from the nearest *free* edge: the outline boundary without
        the contact segments, where leads attach.
    edge_decay_length : float
        1 / min Re(lambda) of the material's helical edge state (nm), see
        :func:`pipeline.model.edge_decay_constants`.
    edge_fraction : float
        Share of the summed current magnitude on sites within two edge-decay lengths of a free
        edge (NaN when no current flows).
    n_modes : int
        Number of incoming modes of the injecting contact.
    lead : str
        Name of the injecting contact.
    point : dict
        The sweep point: realisation and the value of every sweep axis.
    lattice_constant : float
        Lattice constant (nm).
    """

    positions: np.ndarray
    vectors: np.ndarray
    magnitude: np.ndarray
    edge_distance: np.ndarray
    edge_decay_length: float
    edge_fraction: float
    n_modes: int
    lead: str
    point: dict
    lattice_constant: float

    @property
    def edge_zone(self) -> float:
        """Width (nm) of the zone counted as edge: two edge-decay lengths."""
        return 2.0 * self.edge_decay_length


def _free_edges(device: Any) -> Any:
    """The outline boundary without the contact segments (where the leads attach)."""
    free = device.outline.boundary
    eps = 1e-6 * max(1.0, max(abs(c) for c in device.outline.bounds))
    for c in device.contacts:
        free = free.difference(c.segment.buffer(eps))
    return device.outline.boundary if free.is_empty else free


def current_map(cfg: SweepConfig, point: Mapping[str, Any] | None = None, *,
                lead: int | str = 0) -> CurrentMap:
    """Local current density of one disorder realisation at one sweep point.

    The system and the disorder are rebuilt exactly as :func:`pipeline.engine.run_task` builds
    them (same :func:`pipeline.disorder.realise` call and ``DeviceSystem.params``); the
    scattering states injected from contact ``lead`` come from ``kwant.wave_function`` and the
    bond currents from ``kwant.operator.Current``, summed over the incoming modes.

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.
    point : mapping, optional
        ``realisation`` (index, default 0) and sweep-axis values in their units
        (``geometry`` nm, ``disorder_strength``, ``b_perp`` T, ``gate_voltage`` V,
        ``energy`` meV); omitted axes take the first value, energy the middle one.
    lead : int or str, optional
        Injecting contact (index or name), default the first contact.

    Returns
    -------
    CurrentMap
    """
    import kwant
    import shapely

    from .disorder import realise
    from .engine import _disorder_terms, _gate_potentials, system_for
    from .model import edge_decay_constants

    point = dict(point or {})
    axes = cfg.axes
    idx = {}
    for dim in _SWEEP_DIMS:
        values = np.asarray(axes[dim], dtype=float)
        if dim in point:
            hit = np.flatnonzero(np.isclose(values, float(point[dim]), rtol=1e-9, atol=1e-9))
            if hit.size == 0:
                raise HelisweepError(
                    f"{dim} = {point[dim]!r} {_dim_unit(dim)} is not on the run's sweep axis; "
                    f"choose one of {', '.join(_g(v) for v in values)}"
                )
            idx[dim] = int(hit[0])
        else:
            idx[dim] = len(values) // 2 if dim == "energy" else 0
    unknown = sorted(set(point) - set(_SWEEP_DIMS) - {"realisation", "lead"})
    if unknown:
        raise HelisweepError(f"unknown key {unknown[0]!r} in the current-map point; use "
                             f"realisation, {', '.join(_SWEEP_DIMS)}")
    r = int(point.get("realisation", 0))
    if not 0 <= r < cfg.run.realisations:
        raise HelisweepError(
            f"realisation {r!r} is outside the run's 0..{cfg.run.realisations - 1}"
        )
    lead = point.get("lead", lead)
    g = idx["geometry"]
    dsys = system_for(cfg, g)
    names = dsys.contact_names
    if isinstance(lead, str):
        if lead not in names:
            raise HelisweepError(f"contact {lead!r} is not on the device ({', '.join(names)})")
        lead_index = names.index(lead)
    else:
        lead_index = int(lead)
        if not 0 <= lead_index < len(names):
            raise HelisweepError(f"contact index {lead!r} is outside 0..{len(names) - 1}")
    strength = axes["disorder_strength"][idx["disorder_strength"]]
    b = axes["b_perp"][idx["b_perp"]]
    vg = axes["gate_voltage"][idx["gate_voltage"]]
    energy = axes["energy"][idx["energy"]]
    potential, extra = realise(
        _disorder_terms(cfg), dsys.mesh, seed=cfg.run.seed, realisation=r,
        strength=strength, outline=dsys.device.outline, contacts=dsys.device.contacts,
    )
    params = dsys.params(b_perp=b, potential=potential, onsite_extra=extra,
                         gate_potentials=_gate_potentials(cfg, dsys.device, vg))
    fsyst = dsys.fsyst
    psi = kwant.wave_function(fsyst, energy, params=params)(lead_index)
    op = kwant.operator.Current(fsyst).bind(params=params)
    bond = np.zeros(fsyst.graph.num_edges)
    for mode in psi:
        bond += op(mode)
    pos = np.array([s.pos for s in fsyst.sites], dtype=float)
    hops = np.array([(a_, b_) for a_, b_ in fsyst.graph], dtype=int)
    vectors = np.zeros_like(pos)
    if len(hops):
        # Kwant's bond current on hopping (a, b) flows from b to a; each bond appears in both
        # directions with opposite sign, so each end collects the same flow vector twice.
        d = pos[hops[:, 0]] - pos[hops[:, 1]]
        d /= np.linalg.norm(d, axis=1)[:, None]
        f = bond[:, None] * d
        np.add.at(vectors, hops[:, 0], f)
        np.add.at(vectors, hops[:, 1], f)
        vectors /= 4.0
    magnitude = np.linalg.norm(vectors, axis=1)
    dist = shapely.distance(_free_edges(dsys.device), shapely.points(pos))
    ell = float(1.0 / np.min(np.real(edge_decay_constants(cfg.material.parameters()))))
    total = float(magnitude.sum())
    frac = float(magnitude[dist <= 2.0 * ell].sum() / total) if total > 0 else math.nan
    full_point = {"realisation": r, **{d: float(axes[d][idx[d]]) for d in _SWEEP_DIMS}}
    return CurrentMap(pos, vectors, magnitude, np.asarray(dist, dtype=float), ell, frac,
                      int(len(psi)), names[lead_index], full_point, float(cfg.lattice.constant))


def _figure_current(run: RunData, point: Mapping[str, Any] | None) -> _Plot:
    from .engine import device_for
    from .geometry import plot_device

    cfg = run.config
    cm = current_map(cfg, point)
    p = cm.point
    a = cm.lattice_constant
    device = device_for(cfg, int(np.flatnonzero(np.isclose(cfg.axes["geometry"], p["geometry"]))[0]))
    minx, miny, maxx, maxy = device.outline.bounds
    aspect = (maxy - miny + 4 * a) / max(maxx - minx + 4 * a, 1e-9)
    width = 7.6 if aspect <= 1.2 else 5.6
    height = float(np.clip((width - 1.8) * aspect + 1.9, 3.6, 9.0))
    fig, (ax,) = _new_figure(run, figsize=(width, height))
    plot_device(device, ax=ax)  # outline, contacts with lead arrows, gates
    # site grid image (sites sit at (i + 1/2) a, (j + 1/2) a)
    tags = np.round(cm.positions / a - 0.5).astype(int)
    i0, j0 = tags.min(axis=0)
    ni, nj = tags.max(axis=0) - (i0, j0) + 1
    grid = np.full((nj, ni), np.nan)
    grid[tags[:, 1] - j0, tags[:, 0] - i0] = cm.magnitude
    dist = np.full((nj, ni), np.nan)
    dist[tags[:, 1] - j0, tags[:, 0] - i0] = cm.edge_distance
    xe = (np.arange(ni + 1) + i0) * a
    ye = (np.arange(nj + 1) + j0) * a
    mesh = ax.pcolormesh(xe, ye, np.ma.masked_invalid(grid), cmap="cividis", shading="flat",
                         rasterized=grid.size > 40000, zorder=2)
    fig.colorbar(mesh, ax=ax, label="current density |j| (incoming-mode flux, 1)", shrink=0.85)
    xc = (np.arange(ni) + i0 + 0.5) * a
    yc = (np.arange(nj) + j0 + 0.5) * a
    if np.isfinite(dist).sum() > 3 and np.nanmax(dist) > cm.edge_zone:
        cs = ax.contour(xc, yc, np.ma.masked_invalid(dist), levels=[cm.edge_zone],
                        colors=[OKABE_ITO[0]], linestyles="--", linewidths=1.2, zorder=3)
        cs.set_gid("edge-zone")
    # direction arrows on a subsample of the sites carrying over 5 % of the largest |j|
    step = max(1, int(round(max(ni, nj) / 28)))
    strong = cm.magnitude > 0.05 * (cm.magnitude.max() if cm.magnitude.size else 0.0)
    keep = ((tags[:, 0] - i0) % step == 0) & ((tags[:, 1] - j0) % step == 0) & strong
    if np.any(keep):
        u = cm.vectors[keep] / cm.magnitude[keep, None]
        ax.quiver(cm.positions[keep, 0], cm.positions[keep, 1], u[:, 0], u[:, 1],
                  color="white", scale=30, width=0.003, alpha=0.9, zorder=4)
    ax.set_aspect("equal")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    sub = []
    if cfg.sweep.geometry is not None:
        sub.append(f"{cfg.sweep.geometry.parameter} = {_g(p['geometry'])} nm")
    sub += [f"disorder strength {_g(p['disorder_strength'])}",
            f"V_g = {_g(p['gate_voltage'])} V"]
    frac = "n/a (no current)" if math.isnan(cm.edge_fraction) else f"{cm.edge_fraction:.3f}"
    if cm.edge_distance.size and np.all(cm.edge_distance <= cm.edge_zone):
        frac += " - uninformative: every site is that close to an edge"
    # four short lines: the map is often tall and narrow, and one long line was clipped
    ax.set_title(f"Local current from contact {cm.lead}, realisation {p['realisation']}\n"
                 f"E = {_g(p['energy'])} meV, B = {_g(p['b_perp'])} T\n" + ", ".join(sub)
                 + f"\nedge fraction {frac} (within 2ℓ = {cm.edge_zone:.3g} nm of the "
                 f"free edges, dashed)", fontsize=8)
    near = cm.edge_distance <= cm.edge_zone
    rows = [[x, y, c, d, bool(n)] for (x, y), c, d, n
            in zip(cm.positions, cm.magnitude, cm.edge_distance, near)]
    columns = ["x_nm", "y_nm", "current", "edge_distance_nm", "near_edge"]
    extra = {
        "edge_fraction": cm.edge_fraction,
        "edge_decay_length_nm": cm.edge_decay_length,
        "edge_zone_nm": cm.edge_zone,
        "definition": (
            "edge_fraction = sum of |j| over sites within 2 edge-decay lengths of a free edge "
            "(the outline boundary without the contact segments) / sum of |j| over all sites; "
            "edge decay length = 1/min Re(lambda) of the helical edge state "
            "(pipeline.model.edge_decay_constants)"
        ),
        "columns": {
            "x_nm": "site x position (nm)", "y_nm": "site y position (nm)",
            "current": ("magnitude of the site current density, in units of the particle flux "
                        "of one incoming lead mode (dimensionless), summed over the incoming "
                        "modes of the injecting contact"),
            "edge_distance_nm": "distance from the nearest free edge (nm)",
            "near_edge": "true when edge_distance_nm <= 2 edge-decay lengths",
        },
        "injecting_contact": cm.lead,
        "incoming_modes": cm.n_modes,
        "point": cm.point,
        "units": {"energy": "meV", "b_perp": "T", "gate_voltage": "V", "geometry": "nm",
                  "disorder_strength": "1"},
        "note": MODEL_ESTIMATE_NOTE,
    }
    return _Plot("fig-current", fig, columns, rows, extra)


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
        L* result(s) (:func:`pipeline.lstar.longest_ballistic_length`): results or tables
        (alone or in a sequence) naming their measurements, or ``{measurement: result}``.
        Per measurement the result at the figure's sweep point is drawn (else the first one,
        and the length figure then shows that result's point).
    distribution_points : sequence of mappings, optional
        Sweep points for the histograms, each ``{axis: value}`` in the axis units; omitted axes
        take the defaults of ``select``. Default: first and last geometry at the middle energy.
    current_point : mapping, optional
        Realisation, sweep point and ``lead`` of the current map (see :func:`current_map`).
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
            written += _save(_figure_vs_axis(run, label, x_dim, slugs[label], select), out_dir)
        if _swept(ds, "geometry"):
            chosen = _choose_lstar(ds, lstars.get(label, []), select)
            written += _save(_figure_vs_length(run, label, slugs[label], select, chosen), out_dir)
        written += _save(_figure_distribution(run, label, slugs[label], distribution_points,
                                              select), out_dir)
    written += _save(_figure_device(run), out_dir)
    written += _save(_figure_current(run, current_point), out_dir)
    return written
