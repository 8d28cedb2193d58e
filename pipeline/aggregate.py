"""Aggregation: disorder-averaged statistics of a run's samples, written to NetCDF.

:func:`summarize` reads a sample store (see :mod:`pipeline.store`) and reduces its
realisation axis to statistics at every sweep point: mean, standard deviation, standard
error, median, 16/84 % quantiles, a seeded percentile-bootstrap confidence interval of the
mean, the log-averaged ("typical") value and, for resistances, the same in ohm. Only
samples whose status is *done* and whose value is finite enter; ``n_samples`` says how many
did, so a partly finished run can be summarised and the count shows what it rests on.

Optionally each sample's transmission matrix is smeared thermally over the energy axis and
the measurements are recomputed from the smeared matrices (Landauer-Buttiker at finite
temperature, e.g. Datta, *Electronic Transport in Mesoscopic Systems*, 1995, ch. 2)::

    T_ij(mu, T) = integral dE  (-df/dE)(E - mu)  T_ij(E),
    -df/dE = 1 / (4 k_B T cosh^2((E - mu) / (2 k_B T)))

evaluated on the swept energy grid with trapezoid weights renormalised to sum to one.

Every number is a model estimate of a simulated device ensemble, not a measurement or a
certification of a real device.

Summary layout (``S`` = geometry, disorder_strength, b_perp, gate_voltage, energy)::

    mean, std, sem, median, q16, q84,
    ci95_low, ci95_high, typical         (S, measurement)    unit of the measurement
    n_samples                            (S, measurement)    int64
    mean_ohm, median_ohm, sem_ohm,
    ci95_low_ohm, ci95_high_ohm          (S, measurement)    ohm (NaN for conductances)
    transmission_mean, transmission_sem  (S, lead_to, lead_from)
    thermal_mean, thermal_sem,
    thermal_ci95_low, thermal_ci95_high  (temperature, S, measurement)   if temperatures given
    thermal_n_samples                    (temperature, S, measurement)
    thermal_kernel_coverage              (temperature, energy)

Coordinates on ``measurement``: ``unit`` ("h/e^2" or "e^2/h"), ``kind`` ("R"/"G") and
``quantised`` (the ideal value; 2-D over (geometry, measurement) only if it changes along
the geometry axis). Since "h/e^2" is not a UDUNITS unit, the statistics carry no ``units``
attribute; their unit is the ``unit`` coordinate (global attribute ``units_convention``).
Note that ``mean``, ``std`` and ``median`` clash with Dataset methods: use ``ds["mean"]``.

Examples
--------
>>> ds = summarize("runs/tarn-demo/samples.zarr", temperatures=[1.0])  # doctest: +SKIP
>>> save_summary(ds, "runs/tarn-demo/summary.nc")                      # doctest: +SKIP
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path

import numpy as np
import xarray as xr
from scipy.special import expit

from . import __version__
from .constants import H_OVER_E2_OHM, K_B_MEV_PER_K
from .errors import HelisweepError, TransportError
from .landauer import Measurement, parse_measurement

__all__ = [
    "AggregateError",
    "SUMMARY_DIMS",
    "summarize",
    "save_summary",
    "sample_statistics",
    "bootstrap_mean_ci",
    "thermal_weights",
    "smear_transmission",
]

#: dimensions of the per-measurement statistics, in order
SUMMARY_DIMS = ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy", "measurement")
_SWEEP = ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy")
_STATUS_DONE = 1
_STATUS_FAILED = 2
#: largest number of elements of one bootstrap work array (bounds memory to ~50 MB)
_BOOT_BUDGET = 6_000_000
#: kernel weight below which a missing sample at that energy is ignored when smearing
_NEGLIGIBLE_WEIGHT = 1e-9
#: largest fraction of the thermal window allowed outside the energy grid before warning
_MAX_TRUNCATION = 0.01
_NOTE = (
    "Model estimates from simulated disorder ensembles (BHZ tight-binding model, "
    "Landauer-Buttiker); not measurements and not a certification of any real device."
)


class AggregateError(HelisweepError):
    """A store cannot be summarised as asked (the message names the value and the fix)."""


# --------------------------------------------------------------------------- opening
def _open_samples(source) -> tuple[xr.Dataset, str]:
    """The samples as an xarray Dataset, and a description of where they came from."""
    if isinstance(source, xr.Dataset):
        return source, "<in-memory dataset>"
    path = Path(source)
    if not path.exists():
        raise AggregateError(
            f"no sample store at {str(path)!r}; run the sweep first (helisweep run CONFIG) or "
            f"give the path of an existing samples.zarr"
        )
    try:
        ds = xr.open_zarr(str(path), consolidated=False)
    except Exception as exc:  # not a Zarr group
        raise AggregateError(
            f"{str(path)!r} cannot be read as a sample store ({type(exc).__name__}: {exc}); "
            f"give the path of a samples.zarr written by helisweep"
        ) from exc
    from .store import SampleStore

    damaged = SampleStore.open(path).verify()
    if damaged:
        where = ", ".join(f"{n} task {k}" for n, k, _ in damaged[:5])
        raise AggregateError(
            f"the store {str(path)!r} has {len(damaged)} damaged chunk(s) (checksum mismatch: "
            f"{where}{', ...' if len(damaged) > 5 else ''}); they are not averaged. Rerun "
            f"`helisweep run` with the same config to recompute them, then aggregate again"
        )
    return ds, str(path)


def _require(ds: xr.Dataset, variables: Sequence[str], dims: Sequence[str]) -> None:
    for name in variables:
        if name not in ds.variables:
            raise AggregateError(
                f"the samples have no variable {name!r} (variables: "
                f"{sorted(map(str, ds.data_vars))!r}); give a store written by helisweep"
            )
    for name in dims:
        if name not in ds.dims:
            raise AggregateError(
                f"the samples have no dimension {name!r} (dims: {sorted(map(str, ds.dims))!r}); "
                f"give a store written by helisweep"
            )


def _labels(ds: xr.Dataset) -> list[str]:
    return [str(v) for v in np.asarray(ds["measurement"].values).tolist()]


def _ideal_values(
    ds: xr.Dataset,
    labels: Sequence[str],
    override: Mapping[str, float] | None,
    config_dir: str | Path | None,
) -> np.ndarray:
    """Ideal quantum spin Hall value of each label at each geometry, shape (geometry, label).

    ``override`` wins; otherwise the values come from the store's configuration text through
    :func:`pipeline.engine.quantised_values`. Unavailable values are NaN (with a warning).
    """
    n_geo = ds.sizes.get("geometry", 1)
    out = np.full((n_geo, len(labels)), np.nan)
    override = dict(override or {})
    unknown = sorted(set(override) - set(labels))
    if unknown:
        raise AggregateError(
            f"quantised values given for {unknown!r}, which the store does not measure "
            f"(measurements: {list(labels)!r}); use the measurement labels exactly"
        )
    need = [i for i, lab in enumerate(labels) if lab not in override]
    for i, lab in enumerate(labels):
        if lab in override:
            out[:, i] = float(override[lab])
    text = ds.attrs.get("config_text", "")
    if not need:
        return out
    if not text:
        warnings.warn(
            "the samples carry no configuration text, so the ideal (quantised) values of "
            f"{[labels[i] for i in need]!r} are unknown (NaN); pass quantised={{label: value}}",
            UserWarning, stacklevel=3,
        )
        return out
    from .config import parse_config
    from .engine import quantised_values

    try:
        cfg = parse_config(text, source="<store config_text>", base_dir=config_dir or ".")
        per_geo = [quantised_values(cfg, g) for g in range(n_geo)]
    except HelisweepError as exc:
        warnings.warn(
            f"cannot rebuild the device from the store's configuration ({exc}); the quantised "
            f"values are NaN. If the device is a geometry file, pass config_dir= (the directory "
            f"of the original config file) or quantised={{label: value}}",
            UserWarning, stacklevel=3,
        )
        return out
    for g, values in enumerate(per_geo):
        for i in need:
            out[g, i] = values.get(labels[i], np.nan)
    return out


# --------------------------------------------------------------------------- statistics
def _uniforms(resamples: int, n_max: int, seed: int) -> np.ndarray:
    """Uniform numbers that define every bootstrap resample (one row per resample).

    Resample ``b`` of a point with ``n`` valid samples takes sample indices
    ``floor(u[b, :n] * n)`` (of its valid samples, in realisation order); the same numbers
    serve every point, so a point's interval does not depend on which other points are
    summarised or in what chunks.
    """
    rng = np.random.default_rng(seed)
    return rng.random((resamples, n_max))


def _compact(x: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Valid samples moved to the front of each row (order kept), and their counts."""
    order = np.argsort(~valid, axis=-1, kind="stable")
    xc = np.take_along_axis(np.where(valid, x, 0.0), order, axis=-1)
    return xc, valid.sum(axis=-1)


def _bootstrap_rows(x: np.ndarray, valid: np.ndarray, u: np.ndarray,
                    confidence: float) -> tuple[np.ndarray, np.ndarray]:
    """Percentile bootstrap interval of the mean of each row of ``x`` (2-D).

    Rows with the same number ``m`` of valid samples share the resample counts
    ``C[b, j] = #{k < m : floor(u[b, k] m) = j}``, so their resampled means are one matrix
    product ``x[:, :m] @ C.T / m``.
    """
    n_rows = x.shape[0]
    low = np.full(n_rows, np.nan)
    high = np.full(n_rows, np.nan)
    resamples = u.shape[0]
    if resamples == 0 or n_rows == 0:
        return low, high
    xc, n = _compact(x, valid)
    alpha = (1.0 - confidence) / 2.0
    chunk = max(1, _BOOT_BUDGET // resamples)
    for m in np.unique(n[n >= 2]):
        m = int(m)
        idx = np.minimum((u[:, :m] * m).astype(np.intp), m - 1)
        counts = np.bincount((idx + m * np.arange(resamples)[:, None]).ravel(),
                             minlength=resamples * m).reshape(resamples, m).astype(float)
        rows = np.flatnonzero(n == m)
        for start in range(0, rows.size, chunk):
            sel = rows[start:start + chunk]
            means = (xc[sel, :m] @ counts.T) / m  # (rows, resamples)
            q = np.quantile(means, [alpha, 1.0 - alpha], axis=1)
            low[sel], high[sel] = q[0], q[1]
    return low, high


def bootstrap_mean_ci(
    samples: np.ndarray,
    valid: np.ndarray | None = None,
    *,
    resamples: int = 2000,
    seed: int = 0,
    confidence: float = 0.95,
) -> tuple[np.ndarray, np.ndarray]:
    """Percentile-bootstrap confidence interval of the mean along the last axis.

    Vectorised over all leading axes; each row is resampled with replacement from its own
    valid entries only.

    Parameters
    ----------
    samples : array_like
        Samples along the last axis.
    valid : array_like of bool, optional
        Which samples to use (default: the finite ones; non-finite ones are never used).
    resamples : int
        Number of bootstrap resamples (0 gives NaN intervals).
    seed : int
        Seed of ``np.random.default_rng``; equal seeds give equal intervals.
    confidence : float
        Confidence level in (0, 1).

    Returns
    -------
    low, high : numpy.ndarray
        Interval ends, shape ``samples.shape[:-1]``; NaN where fewer than two samples.
    """
    x = np.asarray(samples, dtype=float)
    if x.ndim == 0:
        raise AggregateError(f"samples must have at least one axis, got the scalar {x!r}; "
                             f"pass the samples along the last axis")
    _check_bootstrap(resamples, confidence)
    ok = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    lead = x.shape[:-1]
    u = _uniforms(resamples, x.shape[-1], seed)
    low, high = _bootstrap_rows(x.reshape(-1, x.shape[-1]), ok.reshape(-1, x.shape[-1]), u,
                                confidence)
    return low.reshape(lead), high.reshape(lead)


def _sorted_quantiles(s: np.ndarray, n: np.ndarray, probs: Sequence[float]) -> list[np.ndarray]:
    """Quantiles (NumPy's default 'linear' rule) of rows sorted with their valid part first."""
    out = []
    rows = np.arange(s.shape[0])
    for p in probs:
        h = (n - 1) * p
        lo = np.clip(np.floor(h).astype(np.intp), 0, max(s.shape[1] - 1, 0))
        hi = np.clip(lo + 1, 0, max(s.shape[1] - 1, 0))
        frac = h - np.floor(h)
        a = s[rows, lo]
        b = s[rows, np.where(n - 1 > lo, hi, lo)]
        q = a + frac * (b - a)
        out.append(np.where(n > 0, q, np.nan))
    return out


def _row_stats(x: np.ndarray, valid: np.ndarray, u: np.ndarray, confidence: float,
               full: bool = True) -> dict[str, np.ndarray]:
    """Statistics of each row of a 2-D sample array over its valid entries."""
    valid = valid & np.isfinite(x)
    n = valid.sum(axis=1)
    xv = np.where(valid, x, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = xv.sum(axis=1) / n
        dev = np.where(valid, x - mean[:, None], 0.0)
        std = np.sqrt((dev**2).sum(axis=1) / (n - 1))
        std = np.where(n >= 2, std, np.nan)
        sem = std / np.sqrt(n)
    mean = np.where(n > 0, mean, np.nan)
    low, high = _bootstrap_rows(x, valid, u, confidence)
    out = {"n": n, "mean": mean, "sem": sem, "ci_low": low, "ci_high": high}
    if not full:
        return out
    s = np.sort(np.where(valid, x, np.nan), axis=1)  # NaN sort last
    median, q16, q84 = _sorted_quantiles(s, n, (0.5, 0.16, 0.84))
    positive = np.all(~valid | (x > 0), axis=1) & (n > 0)
    with np.errstate(invalid="ignore", divide="ignore"):
        logs = np.where(valid & (x > 0), np.log(np.where(x > 0, x, 1.0)), 0.0)
        typical = np.exp(logs.sum(axis=1) / n)
    out.update(std=std, median=median, q16=q16, q84=q84,
               typical=np.where(positive, typical, np.nan))
    return out


def sample_statistics(
    samples: np.ndarray,
    valid: np.ndarray | None = None,
    *,
    resamples: int = 2000,
    seed: int = 0,
    confidence: float = 0.95,
) -> dict[str, np.ndarray]:
    """Statistics along the last axis over the valid, finite samples.

    Parameters
    ----------
    samples : array_like
        Samples along the last axis (e.g. realisations).
    valid : array_like of bool, optional
        Which samples to use (default: all finite ones).
    resamples, seed, confidence
        Bootstrap settings (see :func:`bootstrap_mean_ci`).

    Returns
    -------
    dict
        ``n`` (count), ``mean``, ``std`` (ddof=1), ``sem`` (std/sqrt(n)), ``median``,
        ``q16``, ``q84`` (NumPy's default linear quantile rule), ``ci_low``/``ci_high``
        (percentile bootstrap of the mean) and ``typical`` (exp of the mean of ln x; NaN
        unless every sample is positive), each of shape ``samples.shape[:-1]``.
    """
    x = np.asarray(samples, dtype=float)
    _check_bootstrap(resamples, confidence)
    ok = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    lead, r = x.shape[:-1], x.shape[-1]
    u = _uniforms(resamples, r, seed)
    stats = _row_stats(x.reshape(-1, r), ok.reshape(-1, r), u, confidence)
    return {k: v.reshape(lead) for k, v in stats.items()}


def _check_bootstrap(resamples, confidence) -> None:
    if not (isinstance(resamples, (int, np.integer)) and not isinstance(resamples, bool)
            and (resamples == 0 or resamples >= 100)):
        raise AggregateError(
            f"bootstrap_resamples = {resamples!r} is not usable: give an integer >= 100 "
            f"(2000 or more for stable 95 % intervals), or 0 to skip the intervals"
        )
    if not (isinstance(confidence, (int, float)) and 0.0 < float(confidence) < 1.0):
        raise AggregateError(
            f"confidence = {confidence!r} must be a fraction between 0 and 1, e.g. 0.95"
        )


# --------------------------------------------------------------------------- thermal smearing
def _trapezoid_weights(e_sorted: np.ndarray) -> np.ndarray:
    w = np.zeros_like(e_sorted)
    if e_sorted.size < 2:
        return np.ones_like(e_sorted)
    d = np.diff(e_sorted)
    w[:-1] += d / 2.0
    w[1:] += d / 2.0
    return w


def thermal_weights(energies: Sequence[float], temperature: float) -> tuple[np.ndarray, np.ndarray]:
    """Weights of the thermal window -df/dE on an energy grid, and its coverage.

    Parameters
    ----------
    energies : sequence of float
        The energy grid in meV (any order, no repeats); the chemical potentials are the same
        points.
    temperature : float
        Temperature in K (0 gives the identity: no smearing).

    Returns
    -------
    weights : numpy.ndarray, shape (n, n)
        ``weights[i, k]``: weight of the value at ``energies[k]`` in the smeared value at
        chemical potential ``energies[i]``: ``-df/dE(E_k - mu_i)`` times the trapezoid weight
        of ``E_k``, each row renormalised to sum to 1.
    coverage : numpy.ndarray, shape (n,)
        Fraction of the continuous window inside the grid,
        ``f(E_min - mu) - f(E_max - mu)`` (exact); 1 - coverage is what the renormalisation
        redistributes.
    """
    e = np.asarray(energies, dtype=float)
    if e.ndim != 1 or e.size == 0 or not np.all(np.isfinite(e)):
        raise AggregateError(f"energies must be a non-empty 1-D list of finite meV values, got {e!r}")
    if len(np.unique(e)) != e.size:
        raise AggregateError(f"energies repeat: {e!r}; give each energy once")
    if not (math.isfinite(temperature) and temperature >= 0):
        raise AggregateError(f"temperature {temperature!r} K must be finite and >= 0")
    n = e.size
    kt = K_B_MEV_PER_K * temperature
    if temperature == 0 or n == 1:
        return np.eye(n), _coverage(e, e, kt)
    order = np.argsort(e)
    es = e[order]
    x = np.abs(es[None, :] - es[:, None]) / kt  # |E - mu| / kT
    # -df/dE = 1/(4 kT cosh^2(x/2)) = exp(-x) / (kT (1 + exp(-x))^2), stable for large x
    kernel = np.exp(-x) / (kt * (1.0 + np.exp(-x)) ** 2)
    raw = kernel * _trapezoid_weights(es)[None, :]
    ws = raw / raw.sum(axis=1, keepdims=True)
    weights = np.empty_like(ws)
    weights[np.ix_(order, order)] = ws
    return weights, _coverage(e, e, kt)


def _coverage(mu: np.ndarray, e: np.ndarray, kt: float) -> np.ndarray:
    if kt == 0:
        return np.ones_like(mu)
    return expit((mu - e.min()) / kt) - expit((mu - e.max()) / kt)


def smear_transmission(
    transmission: np.ndarray, energies: Sequence[float], temperature: float, *, axis: int = -3
) -> np.ndarray:
    """Thermally smeared transmissions on the same energy grid.

    Parameters
    ----------
    transmission : array_like
        Transmissions with the energy axis at ``axis`` (default -3: ``(..., energy, to,
        from)``); any array with an energy axis works (e.g. a 1-D curve with ``axis=-1``).
    energies : sequence of float
        The energy grid (meV) of that axis.
    temperature : float
        Temperature in K.

    Returns
    -------
    numpy.ndarray
        ``sum_k weights[i, k] T[..., k, ...]`` (see :func:`thermal_weights`); NaN inputs
        propagate.
    """
    t = np.asarray(transmission, dtype=float)
    w, _ = thermal_weights(energies, temperature)
    moved = np.moveaxis(t, axis, -1)
    if moved.shape[-1] != w.shape[0]:
        raise AggregateError(
            f"the energy axis ({axis!r}) has {moved.shape[-1]} points but {w.shape[0]} energies "
            f"were given; pass the energies of that axis"
        )
    return np.moveaxis(moved @ w.T, -1, axis)


def _thermal_plan(energies: np.ndarray, temperatures: Sequence[float]):
    """Weights per temperature (None = skipped, with a warning) and the coverage table."""
    plans, coverage = [], np.full((len(temperatures), energies.size), np.nan)
    step = float(np.diff(np.sort(energies)).max()) if energies.size >= 2 else float("nan")
    for it, temp in enumerate(temperatures):
        kt = K_B_MEV_PER_K * temp
        if temp == 0:
            plans.append(np.eye(energies.size))
            coverage[it] = 1.0
            continue
        if energies.size < 2:
            warnings.warn(
                f"thermal smearing at {temp:g} K skipped (values NaN): the energy axis has "
                f"{energies.size} point(s), k_B T = {kt:.3g} meV; sweep the energy over several "
                f"k_B T with a step <= k_B T / 2",
                UserWarning, stacklevel=3,
            )
            plans.append(None)
            continue
        if step > kt / 2:
            warnings.warn(
                f"thermal smearing at {temp:g} K skipped (values NaN): energy step {step:.3g} meV "
                f"vs k_B T = {kt:.3g} meV at {temp:g} K; the grid must resolve the thermal window "
                f"(step <= k_B T / 2 = {kt / 2:.3g} meV): refine the energy sweep or raise the "
                f"temperature",
                UserWarning, stacklevel=3,
            )
            plans.append(None)
            continue
        w, cov = thermal_weights(energies, temp)
        coverage[it] = cov
        short = np.flatnonzero(cov < 1.0 - _MAX_TRUNCATION)
        if short.size:
            warnings.warn(
                f"at {temp:g} K more than {_MAX_TRUNCATION:.0%} of the thermal window lies outside "
                f"the energy grid [{energies.min():g}, {energies.max():g}] meV at {short.size} of "
                f"{energies.size} energies (E = {np.round(energies[short], 6).tolist()!r} meV); "
                f"their smeared values use only the part inside (renormalised) and are biased "
                f"(see thermal_kernel_coverage). Extend the energy sweep by about "
                f"{5 * kt:.3g} meV (5 k_B T) on each side",
                UserWarning, stacklevel=3,
            )
        plans.append(w)
    return plans, coverage


def _evaluate_stack(m: Measurement, stack: np.ndarray, contacts: tuple[str, ...]) -> np.ndarray:
    """A measurement for a stack of transmission matrices; NaN where it is ill-posed."""
    if stack.shape[0] == 0:
        return np.empty(0)
    try:
        return np.asarray(m.evaluate(stack, contacts), dtype=float)
    except TransportError:  # some matrix singular: fall back to one at a time
        out = np.full(stack.shape[0], np.nan)
        for i in range(stack.shape[0]):
            try:
                out[i] = float(m.evaluate(stack[i], contacts))
            except TransportError:
                pass
        return out


# --------------------------------------------------------------------------- attributes
def _netcdf_attr(value):
    """An attribute value NetCDF can store: numbers, strings and numeric arrays (size > 1).

    Booleans become 0/1, None an empty string, and lists, tuples, dicts and other values JSON
    text (a list of numbers too, so that it reads back exactly).
    """
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if value is None:
        return ""
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    if isinstance(value, np.ndarray) and value.dtype.kind in "iuf" and value.size > 1:
        return value
    # lists (even of numbers) become JSON text: a one-element array would read back as a scalar
    return json.dumps(_jsonable(value), sort_keys=True)


def _jsonable(value):
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (str, int)) or value is None:
        return value
    return str(value)


def _plain_strings(values) -> np.ndarray:
    return np.array([str(v) for v in np.asarray(values).tolist()], dtype=object)


def _coord(ds: xr.Dataset, name: str) -> xr.DataArray:
    values = np.asarray(ds[name].values)
    if values.dtype.kind in "OUSTU":
        values = _plain_strings(values)
    attrs = {k: _netcdf_attr(v) for k, v in ds[name].attrs.items()}
    return xr.DataArray(values, dims=(name,), attrs=attrs)


# --------------------------------------------------------------------------- the summary
def summarize(
    store_path,
    *,
    bootstrap_resamples: int = 2000,
    bootstrap_seed: int = 0,
    temperatures: Sequence[float] = (),
    confidence: float = 0.95,
    quantised: Mapping[str, float] | None = None,
    config_dir: str | Path | None = None,
) -> xr.Dataset:
    """Disorder-averaged statistics of every sweep point of a run (model estimates).

    Parameters
    ----------
    store_path : str, Path or xarray.Dataset
        The run's ``samples.zarr`` (or a Dataset with the same layout, e.g. opened already or
        synthetic).
    bootstrap_resamples : int
        Resamples of the percentile bootstrap of the mean (>= 100, or 0 to skip intervals).
    bootstrap_seed : int
        Seed of ``np.random.default_rng`` for the bootstrap; equal seeds, equal intervals.
    temperatures : sequence of float
        Temperatures (K) at which to smear each sample's transmissions over the energy axis
        and recompute the measurements. A temperature whose thermal window the energy grid
        does not resolve (step > k_B T / 2, or a single energy) is skipped with a
        ``UserWarning`` and its values are NaN.
    confidence : float
        Level of the bootstrap intervals (the variables keep the names ``ci95_*``; the level
        is in their ``confidence`` attribute).
    quantised : mapping, optional
        Ideal values per measurement label, overriding those derived from the store's config.
    config_dir : str or Path, optional
        Directory of the original config file, needed only when the device is a geometry file
        given by a relative path.

    Returns
    -------
    xarray.Dataset
        The layout in the module docstring; statistics over the realisations of the
        samples with status *done* and a finite value only.

    Warns
    -----
    UserWarning
        When samples are missing or failed (the statistics then rest on fewer samples; see
        ``n_samples``), and for thermal smearing that is skipped or truncated at the grid ends.
    """
    _check_bootstrap(bootstrap_resamples, confidence)
    if not (isinstance(bootstrap_seed, (int, np.integer)) and bootstrap_seed >= 0):
        raise AggregateError(f"bootstrap_seed = {bootstrap_seed!r} must be a non-negative integer")
    temps = [float(t) for t in temperatures]
    bad_t = [t for t in temps if not (math.isfinite(t) and t >= 0)]
    if bad_t:
        raise AggregateError(f"temperatures {bad_t!r} are not usable: give finite values >= 0 in K")
    if len(set(temps)) != len(temps):
        raise AggregateError(f"temperatures {temps!r} repeat; give each temperature once")

    ds, where = _open_samples(store_path)
    _require(ds, ("measurements", "status", "transmission"), ("realisation",) + SUMMARY_DIMS
             + ("lead_to", "lead_from"))
    labels = _labels(ds)
    try:
        measures = [parse_measurement(lab) for lab in labels]
    except TransportError as exc:
        raise AggregateError(f"the store's measurement labels {labels!r} cannot be read: {exc}") from exc
    contacts = tuple(str(c) for c in np.asarray(ds["lead_from"].values).tolist())
    ideal = _ideal_values(ds, labels, quantised, config_dir)

    status_all = np.asarray(ds["status"].transpose("realisation", *_SWEEP).values)
    n_done = int((status_all == _STATUS_DONE).sum())
    n_failed = int((status_all == _STATUS_FAILED).sum())
    n_missing = int(status_all.size - n_done - n_failed)
    if n_missing or n_failed:
        warnings.warn(
            f"{where}: {n_missing} of {status_all.size} samples are missing and {n_failed} failed; "
            f"statistics use the {n_done} done samples (n_samples gives the count per point). "
            f"Resume the run to fill the missing ones; failure reasons are in the store's "
            f"'failures' attribute",
            UserWarning, stacklevel=2,
        )

    shape = tuple(ds.sizes[d] for d in _SWEEP)
    n_geo, n_str = shape[0], shape[1]
    n_r = ds.sizes["realisation"]
    n_m = len(labels)
    n_lead = ds.sizes["lead_to"]
    energies = np.asarray(ds["energy"].values, dtype=float)
    plans, coverage = _thermal_plan(energies, temps)
    u = _uniforms(bootstrap_resamples, n_r, bootstrap_seed)

    full_keys = ("mean", "std", "sem", "median", "q16", "q84", "ci_low", "ci_high", "typical")
    res = {k: np.full(shape + (n_m,), np.nan) for k in full_keys}
    res["n"] = np.zeros(shape + (n_m,), dtype=np.int64)
    t_mean = np.full(shape + (n_lead, n_lead), np.nan)
    t_sem = np.full(shape + (n_lead, n_lead), np.nan)
    th_keys = ("mean", "sem", "ci_low", "ci_high")
    th = {k: np.full((len(temps),) + shape + (n_m,), np.nan) for k in th_keys}
    th["n"] = np.zeros((len(temps),) + shape + (n_m,), dtype=np.int64)

    meas_da = ds["measurements"].transpose("realisation", *_SWEEP, "measurement")
    tr_da = ds["transmission"].transpose("realisation", *_SWEEP, "lead_to", "lead_from")
    for g in range(n_geo):
        for s in range(n_str):
            done = status_all[:, g, s] == _STATUS_DONE  # (R, B, V, E)
            x = np.asarray(meas_da[:, g, s].values, dtype=float)  # (R, B, V, E, M)
            slab = x.shape[1:]
            xr_ = np.moveaxis(x, 0, -1).reshape(-1, n_r)
            ok = np.moveaxis(np.broadcast_to(done[..., None], x.shape), 0, -1).reshape(-1, n_r)
            stats = _row_stats(xr_, ok, u, confidence)
            for k in full_keys + ("n",):
                res[k][g, s] = stats[k].reshape(slab)
            tm = np.asarray(tr_da[:, g, s].values, dtype=float)  # (R, B, V, E, n, n)
            tok = done[..., None, None] & np.isfinite(tm)
            tstats = _row_stats(np.moveaxis(tm, 0, -1).reshape(-1, n_r),
                                np.moveaxis(tok, 0, -1).reshape(-1, n_r), u[:0], confidence,
                                full=False)
            t_mean[g, s] = tstats["mean"].reshape(tm.shape[1:])
            t_sem[g, s] = tstats["sem"].reshape(tm.shape[1:])
            if not temps:
                continue
            good_e = done & np.all(np.isfinite(tm), axis=(-2, -1))  # (R, B, V, E)
            t0 = np.where(good_e[..., None, None], tm, 0.0)
            for it, w in enumerate(plans):
                if w is None:
                    continue
                smeared = np.einsum("ik,rbvkxy->rbvixy", w, t0)
                needed = (np.abs(w) > _NEGLIGIBLE_WEIGHT).astype(float)
                usable = np.einsum("rbvk,ik->rbvi", (~good_e).astype(float), needed) == 0
                vals = np.full(x.shape, np.nan)
                stack = smeared[usable]
                for im, m in enumerate(measures):
                    col = np.full(usable.shape, np.nan)
                    col[usable] = _evaluate_stack(m, stack, contacts)
                    vals[..., im] = col
                vstats = _row_stats(np.moveaxis(vals, 0, -1).reshape(-1, n_r),
                                    np.moveaxis(np.isfinite(vals), 0, -1).reshape(-1, n_r),
                                    u, confidence, full=False)
                for k in th_keys + ("n",):
                    th[k][it, g, s] = vstats[k].reshape(slab)

    return _build_dataset(ds, where, labels, measures, ideal, res, t_mean, t_sem, temps, th,
                          coverage, plans, n_done, n_failed, n_missing, bootstrap_resamples,
                          bootstrap_seed, confidence)


def _build_dataset(ds, where, labels, measures, ideal, res, t_mean, t_sem, temps, th, coverage,
                   plans, n_done, n_failed, n_missing, resamples, seed, confidence) -> xr.Dataset:
    dims = SUMMARY_DIMS
    coords = {d: _coord(ds, d) for d in _SWEEP}
    coords["measurement"] = xr.DataArray(_plain_strings(labels), dims=("measurement",),
                                         attrs={"long_name": "transport measurement label"})
    coords["unit"] = xr.DataArray(_plain_strings([m.unit for m in measures]), dims=("measurement",),
                                  attrs={"long_name": "unit of the measurement's values "
                                                      "(h/e^2: resistance, e^2/h: conductance)"})
    coords["kind"] = xr.DataArray(_plain_strings([m.kind for m in measures]), dims=("measurement",),
                                  attrs={"long_name": "measurement kind",
                                         "comment": "R: resistance (h/e^2), G: two-terminal "
                                                    "conductance (e^2/h)"})
    q_attrs = {"long_name": "ideal quantum spin Hall value of the measurement (model), in its unit"}
    same = np.allclose(ideal, ideal[:1], rtol=1e-12, atol=0.0, equal_nan=True)
    if same:
        coords["quantised"] = xr.DataArray(ideal[0], dims=("measurement",), attrs=q_attrs)
    else:
        coords["quantised"] = xr.DataArray(ideal, dims=("geometry", "measurement"), attrs=q_attrs)
    for d in ("lead_to", "lead_from"):
        coords[d] = xr.DataArray(_plain_strings(ds[d].values), dims=(d,),
                                 attrs={"long_name": {"lead_to": "contact receiving",
                                                      "lead_from": "contact emitting"}[d]})
    per_unit = "unit per measurement: see the 'unit' coordinate"
    ci_name = f"{confidence:.4g} confidence"
    boot = {"confidence": float(confidence), "method": "percentile bootstrap of the mean over "
            "realisations", "resamples": int(resamples), "seed": int(seed)}
    var = {}

    def put(name, data, long_name, **attrs):
        var[name] = (dims, data, {"long_name": long_name, **attrs})

    put("mean", res["mean"], "disorder-averaged mean", comment=per_unit)
    put("std", res["std"], "standard deviation over realisations (ddof=1)", comment=per_unit)
    put("sem", res["sem"], "standard error of the mean (std / sqrt(n_samples))", comment=per_unit)
    put("median", res["median"], "median over realisations", comment=per_unit)
    put("q16", res["q16"], "16 % quantile over realisations (linear interpolation)", comment=per_unit)
    put("q84", res["q84"], "84 % quantile over realisations (linear interpolation)", comment=per_unit)
    put("ci95_low", res["ci_low"], f"lower end of the {ci_name} interval of the mean",
        comment=per_unit, **boot)
    put("ci95_high", res["ci_high"], f"upper end of the {ci_name} interval of the mean",
        comment=per_unit, **boot)
    put("n_samples", res["n"], "number of samples used (status done, finite value)", units="1")
    put("typical", res["typical"], "typical (log-averaged) value exp(mean(ln x)); NaN unless "
        "every sample is positive", comment=per_unit)
    is_r = np.array([m.kind == "R" for m in measures])
    for src, name, long_name, extra in (
        ("mean", "mean_ohm", "disorder-averaged mean resistance", {}),
        ("median", "median_ohm", "median resistance", {}),
        ("sem", "sem_ohm", "standard error of the mean resistance", {}),
        ("ci_low", "ci95_low_ohm", f"lower end of the {ci_name} interval of the mean resistance",
         boot),
        ("ci_high", "ci95_high_ohm", f"upper end of the {ci_name} interval of the mean resistance",
         boot),
    ):
        data = np.where(is_r, res[src] * H_OVER_E2_OHM, np.nan)
        put(name, data, long_name + " (NaN for conductances)", units="ohm", **extra)
    tdims = _SWEEP + ("lead_to", "lead_from")
    var["transmission_mean"] = (tdims, t_mean, {
        "long_name": "disorder-averaged transmission probability from lead_from to lead_to",
        "units": "1"})
    var["transmission_sem"] = (tdims, t_sem, {
        "long_name": "standard error of the mean transmission probability", "units": "1"})
    if temps:
        coords["temperature"] = xr.DataArray(np.asarray(temps), dims=("temperature",),
                                             attrs={"units": "K", "long_name": "temperature of the "
                                                    "contacts' Fermi functions"})
        tdim = ("temperature",) + dims
        thermal = "after thermal smearing of each sample's transmissions over energy"
        var["thermal_mean"] = (tdim, th["mean"], {"long_name": f"disorder-averaged mean {thermal}",
                                                  "comment": per_unit})
        var["thermal_sem"] = (tdim, th["sem"], {"long_name": f"standard error of the mean {thermal}",
                                                "comment": per_unit})
        var["thermal_ci95_low"] = (tdim, th["ci_low"], {
            "long_name": f"lower end of the {ci_name} interval of the mean {thermal}",
            "comment": per_unit, **boot})
        var["thermal_ci95_high"] = (tdim, th["ci_high"], {
            "long_name": f"upper end of the {ci_name} interval of the mean {thermal}",
            "comment": per_unit, **boot})
        var["thermal_n_samples"] = (tdim, th["n"], {
            "long_name": f"number of samples used {thermal}", "units": "1"})
        var["thermal_kernel_coverage"] = (("temperature", "energy"), coverage, {
            "long_name": "fraction of the thermal window -df/dE inside the energy grid "
                         "(NaN: temperature skipped)", "units": "1"})
    n_requested = int(ds.sizes["realisation"])
    attrs = {
        "Conventions": "CF-1.10",
        "title": f"helisweep summary of run {ds.attrs.get('run_name', '')!r}",
        "source": f"helisweep {__version__} (pipeline.aggregate.summarize): BHZ tight-binding "
                  f"model, Kwant scattering, Landauer-Buttiker",
        "history": f"{_dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')} "
                   f"summarised from {where}",
        "note": _NOTE,
        "units_convention": "Statistics of the measurements (mean, std, sem, median, q16, q84, "
                            "ci95_*, typical, thermal_*) are in the unit of each measurement, "
                            "given by the coordinate 'unit' (h/e^2 for R, e^2/h for G); *_ohm "
                            "variables are in ohm (h/e^2 = %.9f ohm); counts are plain numbers."
                            % H_OVER_E2_OHM,
        "run_name": str(ds.attrs.get("run_name", "")),
        "config_hash": str(ds.attrs.get("config_hash", "")),
        "root_seed": int(ds.attrs.get("root_seed", -1)),
        "config_text": str(ds.attrs.get("config_text", "")),
        "store_sessions": json.dumps(_jsonable(ds.attrs.get("sessions", [])), sort_keys=True),
        "n_realisations_requested": n_requested,
        "n_samples_done": n_done,
        "n_samples_failed": n_failed,
        "n_samples_missing": n_missing,
        "complete": int(n_missing == 0),
        "complete_meaning": "1 when no sample is missing (failed samples were attempted; see "
                            "n_samples_failed)",
        "bootstrap_seed": int(seed),
        "bootstrap_resamples": int(resamples),
        "bootstrap_method": "percentile interval of the mean; resample b of a point with n valid "
                            "samples takes indices floor(u[b, :n] n) with u from "
                            "numpy.random.default_rng(bootstrap_seed).random((resamples, "
                            "n_realisations)), shared by all points",
        "confidence": float(confidence),
        "temperatures_K": list(temps),
        "temperatures_skipped_K": [t for t, w in zip(temps, plans) if w is None],
        "thermal_kernel": "-df/dE = 1/(4 k_B T cosh^2((E - mu)/(2 k_B T))) on the energy grid, "
                          "trapezoid weights renormalised to sum to 1; measurements recomputed "
                          "from the smeared transmission matrices",
    }
    out = xr.Dataset(var, coords=coords, attrs={k: _netcdf_attr(v) for k, v in attrs.items()})
    return out


def save_summary(ds: xr.Dataset, path: str | Path) -> Path:
    """Write a summary to NetCDF-4 (h5netcdf engine), making strings and attributes portable.

    String coordinates become variable-length strings; attributes that NetCDF cannot hold
    (nested dicts, lists of dicts or strings, booleans, None) are converted (JSON text, int).

    Parameters
    ----------
    ds : xarray.Dataset
        A dataset from :func:`summarize` (or any dataset).
    path : str or Path
        Output file (``.nc``); its directory is created if needed.

    Returns
    -------
    Path
        The written file.
    """
    try:
        import h5py  # noqa: F401  (h5netcdf's HDF5 backend; optional in h5netcdf >= 1.7)
    except ImportError as exc:
        raise AggregateError(
            f"writing {str(path)!r} needs the HDF5 library binding h5py, which is not installed; "
            f"install it with: pip install 'h5netcdf[h5py]'"
        ) from exc
    path = Path(path)
    if path.exists() and path.is_dir():
        raise AggregateError(f"{str(path)!r} is a directory; give a file name such as summary.nc")
    path.parent.mkdir(parents=True, exist_ok=True)
    out = ds.copy()
    for name in list(out.variables):
        v = out[name].variable
        data = v.values
        if data.dtype.kind in "OUSTU":
            data = _plain_strings(data.ravel()).reshape(data.shape)
        new = xr.Variable(v.dims, data, {k: _netcdf_attr(a) for k, a in v.attrs.items()})
        if name in out.coords:
            out = out.assign_coords({name: new})
        else:
            out[name] = new
    out.attrs = {k: _netcdf_attr(a) for k, a in ds.attrs.items()}
    out.to_netcdf(path, engine="h5netcdf")
    return path
