"""The run summary: disorder-averaged statistics of every sweep point, written to NetCDF.

:func:`summarize` reads a sample store (see :mod:`pipeline.sweep.store`) and reduces its
realisation axis to statistics at every sweep point: mean, standard deviation, standard
error, median, 16/84 % quantiles, a seeded studentized-bootstrap confidence interval of the
mean with a quality flag (degenerate and sparse-tail points are flagged, the latter with the
realisations they need), the fraction of samples more than ``tail_deviation`` off the ideal
value with a Wilson interval, the log-averaged ("typical") value and, for resistances, the
same in ohm. Only
samples whose status is *done* and whose value is finite enter; ``n_samples`` says how many
did, so a partly finished run can be summarised and the count shows what it rests on.

Optionally each sample's transmission matrix is smeared thermally over the energy axis and
the measurements are recomputed from the smeared matrices (the kernel and its grid weights
are in :mod:`pipeline.analysis.statistics`). The reductions themselves live there too; this
module applies them slab by slab and lays the result out as a Dataset.

Every number is a model estimate of a simulated device ensemble, not a measurement or a
certification of a real device.

Summary layout (``S`` = geometry, disorder_strength, b_perp, gate_voltage, energy)::

    mean, std, sem, median, q16, q84,
    ci95_low, ci95_high, typical         (S, measurement)    unit of the measurement
    n_samples                            (S, measurement)    int64
    ci_flag                              (S, measurement)    int8 (CF flag_values/flag_meanings)
    realisations_needed, tail_count      (S, measurement)    int64
    tail_fraction, tail_fraction_low,
    tail_fraction_high                   (S, measurement)    1
    mean_ohm, median_ohm, sem_ohm,
    ci95_low_ohm, ci95_high_ohm          (S, measurement)    ohm (NaN for conductances)
    transmission_mean, transmission_sem  (S, lead_to, lead_from)
    thermal_mean, thermal_sem,
    thermal_ci95_low, thermal_ci95_high  (temperature, S, measurement)   if temperatures given
    thermal_n_samples, thermal_ci_flag   (temperature, S, measurement)
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

import itertools
import json
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline import __version__
from pipeline.analysis.samples import ideal_values, measurement_labels, open_samples, require_layout
from pipeline.analysis.statistics import (
    INTERVAL_METHOD_TEXT,
    IntervalFlag,
    check_bootstrap_settings,
    resample_uniforms,
    row_statistics,
    thermal_plan,
    wilson_interval,
)
from pipeline.constants import H_OVER_E2_OHM
from pipeline.errors import AggregateError, SummaryWarning, TransportError
from pipeline.jsonsafe import json_safe
from pipeline.sweep.store import SampleStatus
from pipeline.timestamps import utc_now
from pipeline.transport.landauer import Measurement, parse_measurement

__all__ = ['AggregateError', 'SUMMARY_DIMS', 'summarize', 'save_summary']

#: dimensions of the per-measurement statistics, in order
SUMMARY_DIMS = ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy", "measurement")
_SWEEP = ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy")

#: kernel weight below which a missing sample at that energy is ignored when smearing
_NEGLIGIBLE_WEIGHT = 1e-9

#: statistics kept per measurement, and after thermal smearing (keys of row_statistics)
_FULL_KEYS = ("mean", "std", "sem", "median", "q16", "q84", "ci_low", "ci_high", "typical")
_THERMAL_KEYS = ("mean", "sem", "ci_low", "ci_high")
#: integer statistics (keys of row_statistics), and the tail counts
_INT_KEYS = ("ci_flag", "realisations_needed", "tail_count")

_NOTE = (
    "Model estimates from simulated disorder ensembles (BHZ tight-binding model, "
    "Landauer-Buttiker); not measurements and not a certification of any real device."
)
#: The summary's ``source`` attribute: the version and the function that wrote the summary.
#: (Until the scattering solve changed the numbers at roundoff, it kept the module name of the
#: time before the package was split into stages, for bitwise comparisons with then.)
_SOURCE = ("helisweep {version} (pipeline.analysis.summary.summarize): BHZ tight-binding "
           "model, Kwant scattering, Landauer-Buttiker")
_PER_UNIT = "unit per measurement: see the 'unit' coordinate"


# --------------------------------------------------------------------------- bundles
@dataclass(frozen=True)
class _Settings:
    """The caller's choices, checked: bootstrap and thermal smearing."""

    resamples: int
    seed: int
    confidence: float
    temperatures: tuple[float, ...]
    #: relative deviation from the ideal value counted by the tail fraction
    tail_deviation: float


@dataclass(frozen=True)
class _Samples:
    """What the summary reads from the store before reducing it."""

    ds: xr.Dataset
    where: str
    labels: tuple[str, ...]
    measures: tuple[Measurement, ...]
    contacts: tuple[str, ...]
    #: ideal value per (geometry, measurement)
    ideal: np.ndarray
    #: sample status, (realisation, *_SWEEP)
    status: np.ndarray
    #: realisations asked for per point, (*_SWEEP); None: every realisation of the store
    requested: np.ndarray | None = None


@dataclass(frozen=True)
class _Counts:
    """How many samples are done, failed and missing, of ``total``."""

    done: int
    failed: int
    missing: int
    total: int


@dataclass(frozen=True)
class _Reduced:
    """The statistics as arrays, filled slab by slab, before they become a Dataset."""

    #: _FULL_KEYS and "n", each (S, measurement)
    stats: dict
    #: "mean" and "sem" of the transmissions, each (S, lead_to, lead_from)
    transmission: dict
    #: _THERMAL_KEYS and "n", each (temperature, S, measurement)
    thermal: dict
    #: smearing weights per temperature (None: skipped), see thermal_plan
    plans: list
    #: (temperature, energy)
    coverage: np.ndarray


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
    tail_deviation: float = 0.05,
) -> xr.Dataset:
    """Disorder-averaged statistics of every sweep point of a run (model estimates).

    Parameters
    ----------
    store_path : str, Path or xarray.Dataset
        The run's ``samples.zarr`` (or a Dataset with the same layout, e.g. opened already or
        synthetic).
    bootstrap_resamples : int
        Resamples of the studentized bootstrap of the mean (>= 100, or 0 to skip intervals).
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
    tail_deviation : float
        Relative deviation from the ideal (quantised) value beyond which a sample counts in
        ``tail_fraction`` (default 0.05: a device off by more than 5 %).

    Returns
    -------
    xarray.Dataset
        The layout in the module docstring; statistics over the realisations of the
        samples with status *done* and a finite value only.

    Warns
    -----
    SummaryWarning
        When samples are missing or failed (the statistics then rest on fewer samples; see
        ``n_samples``), and for thermal smearing that is skipped or truncated at the grid ends.
    """
    settings = _checked_settings(bootstrap_resamples, bootstrap_seed, temperatures, confidence,
                                 tail_deviation)
    ds, where = open_samples(store_path)
    require_layout(ds, ("measurements", "status", "transmission"),
                   ("realisation",) + SUMMARY_DIMS + ("lead_to", "lead_from"))
    labels = measurement_labels(ds)
    # ideal_values and thermal_plan warn at stacklevel 3: keep them called from here so the
    # warnings point at the caller of summarize
    samples = _Samples(
        ds=ds, where=where, labels=tuple(labels), measures=_parse_labels(labels),
        contacts=tuple(str(c) for c in np.asarray(ds["lead_from"].values).tolist()),
        ideal=ideal_values(ds, labels, quantised, config_dir),
        status=np.asarray(ds["status"].transpose("realisation", *_SWEEP).values),
        requested=(np.asarray(ds["requested_realisations"].transpose(*_SWEEP).values)
                   if "requested_realisations" in ds.data_vars else None),
    )
    counts = _count_samples(samples.status, samples.requested)
    if counts.missing or counts.failed:
        _warn_incomplete(where, counts)
    energies = np.asarray(ds["energy"].values, dtype=float)
    plans, coverage = thermal_plan(energies, settings.temperatures)
    reduced = _reduce(samples, settings, plans, coverage)
    return _build_dataset(samples, settings, counts, reduced)


# --------------------------------------------------------------------------- checks, counts
def _checked_settings(resamples, seed, temperatures, confidence, tail_deviation) -> _Settings:
    """The bootstrap, thermal and tail settings, refused with the bad value when unusable."""
    check_bootstrap_settings(resamples, confidence)
    if not (isinstance(tail_deviation, (int, float)) and not isinstance(tail_deviation, bool)
            and 0.0 < float(tail_deviation) < 1.0):
        raise AggregateError(f"tail_deviation = {tail_deviation!r} must be a relative deviation "
                             f"in (0, 1), e.g. 0.05 (samples more than 5 % off the ideal value)")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise AggregateError(f"bootstrap_seed = {seed!r} must be a non-negative integer")
    temps = [float(t) for t in temperatures]
    bad_t = [t for t in temps if not (math.isfinite(t) and t >= 0)]
    if bad_t:
        raise AggregateError(f"temperatures {bad_t!r} are not usable: give finite values >= 0 in K")
    if len(set(temps)) != len(temps):
        raise AggregateError(f"temperatures {temps!r} repeat; give each temperature once")
    return _Settings(resamples, seed, confidence, tuple(temps), float(tail_deviation))


def _parse_labels(labels: Sequence[str]) -> tuple[Measurement, ...]:
    try:
        return tuple(parse_measurement(lab) for lab in labels)
    except TransportError as exc:
        raise AggregateError(f"the store's measurement labels {list(labels)!r} cannot be read: "
                             f"{exc}") from exc


def _count_samples(status: np.ndarray, requested: np.ndarray | None = None) -> _Counts:
    """Done, failed and missing samples; with ``requested`` (per point, from a run with a
    precision target) only realisations below a point's request count as expected."""
    if requested is None:
        expected = np.ones(status.shape, dtype=bool)
    else:
        expected = np.arange(status.shape[0]).reshape((-1,) + (1,) * requested.ndim) < requested
    done = int(((status == SampleStatus.DONE) & expected).sum())
    failed = int(((status == SampleStatus.FAILED) & expected).sum())
    total = int(expected.sum())
    return _Counts(done, failed, total - done - failed, total)


def _warn_incomplete(where: str, counts: _Counts) -> None:
    warnings.warn(
        f"{where}: {counts.missing} of {counts.total} samples are missing and {counts.failed} "
        f"failed; statistics use the {counts.done} done samples (n_samples gives the count per "
        f"point). Resume the run to fill the missing ones; failure reasons are in the store's "
        f"'failures' attribute",
        SummaryWarning, stacklevel=3,
    )


# --------------------------------------------------------------------------- reduction
def _allocate(shape: tuple, keys: Sequence[str], *, with_counts: bool = True) -> dict:
    """NaN arrays for ``keys`` (and a zero int64 array ``n`` for the counts)."""
    out = {k: np.full(shape, np.nan) for k in keys}
    if with_counts:
        out["n"] = np.zeros(shape, dtype=np.int64)
    return out


def _put(target: dict, index: tuple, stats: dict, shape: tuple) -> None:
    """Write per-row statistics, reshaped to ``shape``, into every array of ``target``."""
    for key, array in target.items():
        array[index] = stats[key].reshape(shape)


def _as_rows(a: np.ndarray) -> np.ndarray:
    """Realisations (axis 0) moved last, every other axis flattened into rows."""
    return np.moveaxis(a, 0, -1).reshape(-1, a.shape[0])


def _reduce(samples: _Samples, settings: _Settings, plans: list,
            coverage: np.ndarray) -> _Reduced:
    """Statistics of every sweep point, one (geometry, disorder strength) slab at a time."""
    ds = samples.ds
    shape = tuple(ds.sizes[d] for d in _SWEEP)
    n_m, n_lead = len(samples.labels), ds.sizes["lead_to"]
    table = _allocate(shape + (n_m,), _FULL_KEYS + ("tail_fraction", "tail_low", "tail_high"))
    table.update({k: np.zeros(shape + (n_m,), dtype=np.int64) for k in _INT_KEYS})
    thermal = _allocate((len(settings.temperatures),) + shape + (n_m,), _THERMAL_KEYS)
    thermal["ci_flag"] = np.full((len(settings.temperatures),) + shape + (n_m,),
                                 IntervalFlag.TOO_FEW, dtype=np.int64)
    out = _Reduced(
        stats=table,
        transmission=_allocate(shape + (n_lead, n_lead), ("mean", "sem"), with_counts=False),
        thermal=thermal,
        plans=plans, coverage=coverage,
    )
    u = resample_uniforms(settings.resamples, ds.sizes["realisation"], settings.seed)
    meas = ds["measurements"].transpose("realisation", *_SWEEP, "measurement")
    trans = ds["transmission"].transpose("realisation", *_SWEEP, "lead_to", "lead_from")
    # a slab at a time bounds the memory to one slab's samples
    for g, s in itertools.product(range(shape[0]), range(shape[1])):
        done = samples.status[:, g, s] == SampleStatus.DONE  # (R, B, V, E)
        if samples.requested is not None:  # a precision run: only the samples it asked for
            done &= np.arange(done.shape[0])[:, None, None, None] < samples.requested[g, s]
        x = np.asarray(meas[:, g, s].values, dtype=float)  # (R, B, V, E, M)
        ok = np.broadcast_to(done[..., None], x.shape)
        stats = row_statistics(_as_rows(x), _as_rows(ok), u, settings.confidence)
        stats.update(_tail_counts(x, ok, samples.ideal[g], settings))
        _put(out.stats, (g, s), stats, x.shape[1:])
        tm = np.asarray(trans[:, g, s].values, dtype=float)  # (R, B, V, E, n, n)
        tok = done[..., None, None] & np.isfinite(tm)
        # transmissions get no bootstrap interval (no uniforms)
        _put(out.transmission, (g, s),
             row_statistics(_as_rows(tm), _as_rows(tok), u[:0], settings.confidence, full=False),
             tm.shape[1:])
        if settings.temperatures:
            _reduce_thermal(out, (g, s), tm, done, samples, u, settings.confidence)
    return out


def _tail_counts(x: np.ndarray, ok: np.ndarray, ideal: np.ndarray, settings: _Settings) -> dict:
    """Samples more than ``tail_deviation`` off the ideal value, with a Wilson interval.

    ``x`` and ``ok`` are (R, ..., measurement), ``ideal`` one value per measurement; rows come
    out as in :func:`_as_rows`. NaN fractions where the ideal value is unknown or zero.
    """
    ok = ok & np.isfinite(x)
    with np.errstate(invalid="ignore", divide="ignore"):
        off = np.abs(x / ideal - 1.0) > settings.tail_deviation
    known = np.isfinite(ideal) & (ideal != 0)
    count = np.where(known, (off & ok).sum(axis=0), 0)
    n = ok.sum(axis=0)
    low, high = wilson_interval(count, n, settings.confidence)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(known & (n > 0), count / n, np.nan)
    return {"tail_count": count.reshape(-1), "tail_fraction": frac.reshape(-1),
            "tail_low": np.where(known, low, np.nan).reshape(-1),
            "tail_high": np.where(known, high, np.nan).reshape(-1)}


def _reduce_thermal(out: _Reduced, index: tuple, tm: np.ndarray, done: np.ndarray,
                    samples: _Samples, u: np.ndarray, confidence: float) -> None:
    """Thermal statistics of one slab at every temperature that is not skipped."""
    good_e = done & np.all(np.isfinite(tm), axis=(-2, -1))  # (R, B, V, E)
    t0 = np.where(good_e[..., None, None], tm, 0.0)
    for it, w in enumerate(out.plans):
        if w is None:
            continue
        vals = _smeared_measurements(w, t0, good_e, samples)
        stats = row_statistics(_as_rows(vals), _as_rows(np.isfinite(vals)), u, confidence,
                               full=False)
        _put(out.thermal, (it,) + index, stats, vals.shape[1:])


def _smeared_measurements(w: np.ndarray, t0: np.ndarray, good_e: np.ndarray,
                          samples: _Samples) -> np.ndarray:
    """Every measurement recomputed from transmissions smeared with the weights ``w``.

    ``t0`` holds the slab's matrices (R, B, V, E, n, n) with unusable ones zeroed; a sample
    whose thermal window needs such an energy (weight above _NEGLIGIBLE_WEIGHT) gets NaN.
    Returns (R, B, V, E, measurement).
    """
    smeared = np.einsum("ik,rbvkxy->rbvixy", w, t0)
    needed = (np.abs(w) > _NEGLIGIBLE_WEIGHT).astype(float)
    usable = np.einsum("rbvk,ik->rbvi", (~good_e).astype(float), needed) == 0
    vals = np.full(usable.shape + (len(samples.measures),), np.nan)
    stack = smeared[usable]
    for im, m in enumerate(samples.measures):
        col = np.full(usable.shape, np.nan)
        col[usable] = _evaluate_stack(m, stack, samples.contacts)
        vals[..., im] = col
    return vals


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


# --------------------------------------------------------------------------- the Dataset
def _build_dataset(samples: _Samples, settings: _Settings, counts: _Counts,
                   reduced: _Reduced) -> xr.Dataset:
    coords = _coordinates(samples)
    variables = _statistic_variables(samples, settings, reduced.stats)
    variables.update(_transmission_variables(reduced.transmission))
    if settings.temperatures:
        coords["temperature"] = xr.DataArray(
            np.asarray(settings.temperatures), dims=("temperature",),
            attrs={"units": "K", "long_name": "temperature of the contacts' Fermi functions"})
        variables.update(_thermal_variables(settings, reduced))
    attrs = _attributes(samples, settings, counts, reduced.plans, reduced.stats["ci_flag"])
    return xr.Dataset(variables, coords=coords,
                      attrs={k: _netcdf_attr(v) for k, v in attrs.items()})


def _coordinates(samples: _Samples) -> dict:
    """The sweep axes, the measurement labels with unit, kind and ideal value, the contacts."""
    ds, measures, ideal = samples.ds, samples.measures, samples.ideal
    coords = {d: _coord(ds, d) for d in _SWEEP}
    coords["measurement"] = xr.DataArray(_plain_strings(samples.labels), dims=("measurement",),
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
    return coords


def _interval_name(settings: _Settings) -> str:
    return f"{settings.confidence:.4g} confidence"


def _bootstrap_attrs(settings: _Settings) -> dict:
    """How the intervals were made, attached to every interval variable."""
    return {"confidence": float(settings.confidence), "method": INTERVAL_METHOD_TEXT,
            "resamples": int(settings.resamples), "seed": int(settings.seed),
            "quality": "see ci_flag"}


def _flag_attrs(long_name: str) -> dict:
    """CF flag attributes of an interval-quality variable (values of IntervalFlag)."""
    return {"long_name": long_name, "flag_values": np.array([int(f) for f in IntervalFlag],
                                                             dtype=np.int8),
            "flag_meanings": " ".join(f.name.lower() for f in IntervalFlag),
            "comment": "ok: studentized interval; degenerate: every sample equal, zero-width "
                       "interval; sparse_tail: rare large deviations (a small cluster of samples "
                       "beyond a gap), the interval cannot hold its level with this many "
                       "realisations (see realisations_needed); too_few: fewer than 2 samples; "
                       "not_computed: no bootstrap resamples; percentile_end: an end taken from "
                       "the percentile bootstrap because too many resamples were tied"}


def _statistic_variables(samples: _Samples, settings: _Settings, stats: dict) -> dict:
    """The per-measurement statistics in the measurement's unit, then the same in ohm."""
    ci_name, boot = _interval_name(settings), _bootstrap_attrs(settings)
    var = {}

    def put(name, data, long_name, **attrs):
        var[name] = (SUMMARY_DIMS, data, {"long_name": long_name, **attrs})

    put("mean", stats["mean"], "disorder-averaged mean", comment=_PER_UNIT)
    put("std", stats["std"], "standard deviation over realisations (ddof=1)", comment=_PER_UNIT)
    put("sem", stats["sem"], "standard error of the mean (std / sqrt(n_samples))",
        comment=_PER_UNIT)
    put("median", stats["median"], "median over realisations", comment=_PER_UNIT)
    put("q16", stats["q16"], "16 % quantile over realisations (linear interpolation)",
        comment=_PER_UNIT)
    put("q84", stats["q84"], "84 % quantile over realisations (linear interpolation)",
        comment=_PER_UNIT)
    put("ci95_low", stats["ci_low"], f"lower end of the {ci_name} interval of the mean",
        comment=_PER_UNIT, **boot)
    put("ci95_high", stats["ci_high"], f"upper end of the {ci_name} interval of the mean",
        comment=_PER_UNIT, **boot)
    put("n_samples", stats["n"], "number of samples used (status done, finite value)", units="1")
    var["ci_flag"] = (SUMMARY_DIMS, stats["ci_flag"].astype(np.int8),
                      _flag_attrs("quality of the interval of the mean"))
    put("realisations_needed", stats["realisations_needed"],
        "realisations a sparse-tail point needs: with that many, an ensemble misses a tail of the "
        "observed weight k/n with probability below (1 - confidence)/2; 0 where not flagged",
        units="1")
    dev = settings.tail_deviation
    tail = (f"samples deviating from the ideal value by more than {dev:g} (relative): "
            f"|x / quantised - 1| > {dev:g}")
    put("tail_count", stats["tail_count"], f"number of {tail}", units="1")
    put("tail_fraction", stats["tail_fraction"], f"fraction of {tail}; NaN without an ideal value",
        units="1", tail_deviation=dev)
    wilson = {"method": "Wilson score interval (Wilson, J. Am. Stat. Assoc. 22, 209 (1927))",
              "confidence": float(settings.confidence), "units": "1"}
    put("tail_fraction_low", stats["tail_low"], f"lower end of the {ci_name} interval of the "
        f"tail fraction", **wilson)
    put("tail_fraction_high", stats["tail_high"], f"upper end of the {ci_name} interval of the "
        f"tail fraction", **wilson)
    put("typical", stats["typical"], "typical (log-averaged) value exp(mean(ln x)); NaN unless "
        "every sample is positive", comment=_PER_UNIT)
    is_r = np.array([m.kind == "R" for m in samples.measures])
    for src, name, long_name, extra in (
        ("mean", "mean_ohm", "disorder-averaged mean resistance", {}),
        ("median", "median_ohm", "median resistance", {}),
        ("sem", "sem_ohm", "standard error of the mean resistance", {}),
        ("ci_low", "ci95_low_ohm", f"lower end of the {ci_name} interval of the mean resistance",
         boot),
        ("ci_high", "ci95_high_ohm", f"upper end of the {ci_name} interval of the mean resistance",
         boot),
    ):
        data = np.where(is_r, stats[src] * H_OVER_E2_OHM, np.nan)
        put(name, data, long_name + " (NaN for conductances)", units="ohm", **extra)
    return var


def _transmission_variables(transmission: dict) -> dict:
    tdims = _SWEEP + ("lead_to", "lead_from")
    return {
        "transmission_mean": (tdims, transmission["mean"], {
            "long_name": "disorder-averaged transmission probability from lead_from to lead_to",
            "units": "1"}),
        "transmission_sem": (tdims, transmission["sem"], {
            "long_name": "standard error of the mean transmission probability", "units": "1"}),
    }


def _thermal_variables(settings: _Settings, reduced: _Reduced) -> dict:
    ci_name, boot, th = _interval_name(settings), _bootstrap_attrs(settings), reduced.thermal
    tdim = ("temperature",) + SUMMARY_DIMS
    thermal = "after thermal smearing of each sample's transmissions over energy"
    return {
        "thermal_mean": (tdim, th["mean"], {"long_name": f"disorder-averaged mean {thermal}",
                                            "comment": _PER_UNIT}),
        "thermal_sem": (tdim, th["sem"], {"long_name": f"standard error of the mean {thermal}",
                                          "comment": _PER_UNIT}),
        "thermal_ci95_low": (tdim, th["ci_low"], {
            "long_name": f"lower end of the {ci_name} interval of the mean {thermal}",
            "comment": _PER_UNIT, **boot}),
        "thermal_ci95_high": (tdim, th["ci_high"], {
            "long_name": f"upper end of the {ci_name} interval of the mean {thermal}",
            "comment": _PER_UNIT, **boot}),
        "thermal_n_samples": (tdim, th["n"], {
            "long_name": f"number of samples used {thermal}", "units": "1"}),
        "thermal_ci_flag": (tdim, th["ci_flag"].astype(np.int8),
                            _flag_attrs(f"quality of the interval of the mean {thermal}")),
        "thermal_kernel_coverage": (("temperature", "energy"), reduced.coverage, {
            "long_name": "fraction of the thermal window -df/dE inside the energy grid "
                         "(NaN: temperature skipped)", "units": "1"}),
    }


def _attributes(samples: _Samples, settings: _Settings, counts: _Counts, plans: list,
                reduced_flags: np.ndarray) -> dict:
    """Global attributes: provenance, counts, bootstrap and thermal settings, unit convention."""
    ds, temps = samples.ds, settings.temperatures
    return {
        "Conventions": "CF-1.10",
        "title": f"helisweep summary of run {ds.attrs.get('run_name', '')!r}",
        "source": _SOURCE.format(version=__version__),
        "history": f"{utc_now()} summarised from {samples.where}",
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
        "store_sessions": json.dumps(json_safe(ds.attrs.get("sessions", [])), sort_keys=True),
        "n_realisations_requested": int(ds.sizes["realisation"]),
        "n_samples_done": counts.done,
        "n_samples_failed": counts.failed,
        "n_samples_missing": counts.missing,
        "complete": int(counts.missing == 0),
        "complete_meaning": "1 when no sample is missing (failed samples were attempted; see "
                            "n_samples_failed)",
        "bootstrap_seed": int(settings.seed),
        "bootstrap_resamples": int(settings.resamples),
        "bootstrap_method": INTERVAL_METHOD_TEXT + "; resample b of a point with n valid "
                            "samples takes indices floor(u[b, :n] n) with u from "
                            "numpy.random.default_rng(bootstrap_seed).random((n_realisations, "
                            "resamples)).T, shared by all points",
        "interval_flag_counts": {f.name.lower(): int((reduced_flags == f).sum())
                                 for f in IntervalFlag},
        "tail_deviation": float(settings.tail_deviation),
        "confidence": float(settings.confidence),
        "temperatures_K": list(temps),
        "temperatures_skipped_K": [t for t, w in zip(temps, plans) if w is None],
        "thermal_kernel": "-df/dE = 1/(4 k_B T cosh^2((E - mu)/(2 k_B T))) on the energy grid, "
                          "trapezoid weights renormalised to sum to 1; measurements recomputed "
                          "from the smeared transmission matrices",
    }


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
    return json.dumps(json_safe(value), sort_keys=True)


def _plain_strings(values) -> np.ndarray:
    return np.array([str(v) for v in np.asarray(values).tolist()], dtype=object)


def _coord(ds: xr.Dataset, name: str) -> xr.DataArray:
    values = np.asarray(ds[name].values)
    if values.dtype.kind in "OUSTU":
        values = _plain_strings(values)
    attrs = {k: _netcdf_attr(v) for k, v in ds[name].attrs.items()}
    return xr.DataArray(values, dims=(name,), attrs=attrs)


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
