"""The longest ballistic edge length L*: how long an edge stays quantised in a disorder ensemble.

From a sweep of the device length (a geometry axis whose template parameter is a length),
one measurement is normalised per sample to

* ``t = x / quantised`` for a conductance (G) and
* ``t = quantised / x`` for a resistance (R),

so that ``t = 1`` is the ideal quantum spin Hall value. For a two-terminal strip ``G = (t_1 +
t_2) e^2/h`` with one helical channel per edge, so ``t`` is the transmission of one edge
averaged over the two edges; the forms below assume this. For other measurements ``t`` is a
normalised ratio, not a transmission probability, and the fitted lengths are effective
ones.

Two estimates of L* are given (both are model estimates of a simulated ensemble, not a
certification of a device):

(a) *direct*: the length at which the disorder-averaged ``t`` first leaves ``1 +- tolerance``,
    by linear interpolation between swept lengths, with a percentile-bootstrap interval over
    realisations (whole realisations are resampled: the same realisation index shares its
    disorder across lengths, see :mod:`pipeline.physics.disorder`). If the mean never leaves the band
    L* is only bounded below by the longest swept length; if it is already outside at the
    shortest length, L* is bounded above by that length. Both cases are flagged.
(b) *fits* of the two forms to the per-realisation values across lengths
    (:mod:`pipeline.analysis.lstar_fits`): a length sweep solves the same realisation at every
    length (longer samples extend shorter ones), so the per-length means are correlated;
    the fits are generalised least squares with the covariance of the means estimated from
    the realisations (correlations shrunk toward the identity, Schaefer & Strimmer 2005),
    with intervals from the spread over realisations (Student t, n - 1 dof):

    * incoherent backscattering (classical addition of scatterers along the edge):
      ``<t> = 1 / (1 + L / lambda)``, so ``L*_fit = lambda tol / (1 - tol)``;
    * coherent localisation: ``<ln t> = -L / xi`` (through the origin), so
      ``L*_fit = -xi ln(1 - tol)``; the variance of ln t grows as 2 L / xi (log-normal law,
      Beenakker, Rev. Mod. Phys. 69, 731 (1997)).

    Each form is tested by its generalised chi^2 (Hotelling's T^2 of the residual contrasts,
    F distribution); ``preferred`` is the form that is acceptable while the other is rejected,
    ``"indistinguishable"`` when both are acceptable (with an estimate of the realisations or
    lengths that would tell them apart), ``"neither"`` when both are rejected and
    ``"undetermined"`` when a form cannot be fitted. The correlation of t between adjacent
    lengths is reported.

The result types (:class:`LStarResult`, :class:`LStarTable`) and the ``lstar.json`` format
that stores them live in :mod:`pipeline.analysis.lstar_results` and are re-exported here.
"""

from __future__ import annotations

import itertools
import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline.analysis.lstar_fits import (
    SIGNIFICANCE,
    TEST_METHOD,
    adjacent_correlation,
    distinguishing_effort,
    gls_fit,
    model_choice,
)
from pipeline.analysis.lstar_results import (
    LENGTH_SWEEP,
    Crossing,
    FitResult,
    LStarResult,
    LStarTable,
    load_lstar,
    lstar_results,
    save_lstar,
)
from pipeline.analysis.samples import ideal_values, measurement_labels, open_samples
from pipeline.errors import LStarError, SummaryWarning, TransportError
from pipeline.sweep.store import SampleStatus
from pipeline.transport.landauer import parse_measurement

__all__ = ['LStarError', 'Crossing', 'FitResult', 'LStarResult', 'LStarTable',
           'normalised_transmission', 'crossing_length', 'fit_incoherent', 'fit_coherent',
           'longest_ballistic_length', 'lstar_results', 'save_lstar', 'load_lstar']

_POINT_DIMS = ("disorder_strength", "b_perp", "gate_voltage", "energy")

# --------------------------------------------------------------------------- building blocks
def normalised_transmission(samples, quantised: float, kind: str) -> np.ndarray:
    """Per-sample normalised transmission: x/q for conductances, q/x for resistances.

    Parameters
    ----------
    samples : array_like
        Measured values (e^2/h for G, h/e^2 for R).
    quantised : float
        The ideal quantum spin Hall value in the same unit.
    kind : str
        ``"G"`` or ``"R"``.

    Returns
    -------
    numpy.ndarray
        ``t`` (1 = ideal). A zero resistance gives inf (not finite: dropped downstream).
    """
    if kind not in ("G", "R"):
        raise LStarError(f"kind = {kind!r} must be 'G' (conductance) or 'R' (resistance)")
    q = float(quantised)
    if not (math.isfinite(q) and q != 0.0):
        raise LStarError(
            f"the quantised value {quantised!r} is not usable for normalising (must be finite and "
            f"non-zero); pick a measurement with a defined ideal value or pass quantised="
        )
    x = np.asarray(samples, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return x / q if kind == "G" else q / x


def _as_curve(lengths, values, name: str) -> tuple[np.ndarray, np.ndarray]:
    L = np.asarray(lengths, dtype=float)
    y = np.asarray(values, dtype=float)
    if L.ndim != 1 or y.shape[-1:] != L.shape:
        raise LStarError(
            f"{name} has shape {y.shape!r} but lengths has shape {L.shape!r}; give one value per "
            f"length along the last axis"
        )
    if not np.all(np.isfinite(L)) or np.any(L < 0) or len(np.unique(L)) != L.size:
        raise LStarError(f"lengths {L.tolist()!r} must be finite, non-negative and distinct (nm)")
    return L, y


def _check_tolerance(tolerance) -> float:
    if not (isinstance(tolerance, (int, float)) and 0.0 < float(tolerance) < 1.0):
        raise LStarError(f"tolerance = {tolerance!r} must be a relative deviation in (0, 1), e.g. 0.05")
    return float(tolerance)


def _crossings(L: np.ndarray, curves: np.ndarray, tol: float) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised first exit of |curve - 1| > tol; L ascending, curves (k, nL) finite.

    Returns lengths and codes (0 interpolated, 1 lower bound, 2 upper bound).
    """
    d = np.abs(curves - 1.0)
    exceed = d > tol
    anyx = exceed.any(axis=1)
    first = np.argmax(exceed, axis=1)
    code = np.where(~anyx, 1, np.where(first == 0, 2, 0))
    k = np.clip(first, 1, L.size - 1) if L.size > 1 else np.zeros_like(first)
    rows = np.arange(curves.shape[0])
    if L.size > 1:
        d0, d1 = d[rows, k - 1], d[rows, k]
        with np.errstate(invalid="ignore", divide="ignore"):
            frac = (tol - d0) / (d1 - d0)
        interp = L[k - 1] + frac * (L[k] - L[k - 1])
    else:
        interp = np.full(curves.shape[0], L[0])
    out = np.where(code == 1, L[-1], np.where(code == 2, L[0], interp))
    return out, code


_KINDS = {0: "interpolated", 1: "lower_bound", 2: "upper_bound"}


def crossing_length(lengths, mean_t, tolerance: float = 0.05) -> Crossing:
    """The length at which a mean normalised curve first leaves ``1 +- tolerance``.

    Linear interpolation of ``|mean_t - 1| = tolerance`` between the last length inside the
    band and the first one outside it; a later return into the band is ignored.

    Parameters
    ----------
    lengths : array_like
        Lengths (nm), any order; entries with a non-finite mean are skipped.
    mean_t : array_like
        Mean normalised transmission at each length.
    tolerance : float
        Relative tolerance in (0, 1).

    Returns
    -------
    Crossing
        The length and whether it is interpolated or a bound.
    """
    tol = _check_tolerance(tolerance)
    L, y = _as_curve(lengths, mean_t, "mean_t")
    if y.ndim != 1:
        raise LStarError(f"mean_t must be 1-D (one value per length), got shape {y.shape!r}")
    keep = np.isfinite(y)
    if not keep.any():
        raise LStarError(f"mean_t {y.tolist()!r} has no finite value; no length can be judged")
    order = np.argsort(L[keep])
    out, code = _crossings(L[keep][order], y[keep][order][None, :], tol)
    return Crossing(float(out[0]), _KINDS[int(code[0])])


def fit_incoherent(lengths, t, *, tolerance: float = 0.05, confidence: float = 0.95) -> FitResult:
    """Fit ``<t> = 1 / (1 + L / lambda)`` to the per-realisation t of a length sweep.

    Generalised least squares with the (shrunk) covariance of the per-length means; see
    :func:`pipeline.analysis.lstar_fits.gls_fit`.

    Parameters
    ----------
    lengths : array_like
        (K,) lengths (nm).
    t : array_like
        (n, K) normalised transmission per realisation and length (NaN where unusable); a
        row is one realisation at every length.
    tolerance : float
        For ``lstar = lambda tol / (1 - tol)``.
    confidence : float
        Level of the intervals.

    Returns
    -------
    FitResult
    """
    tol = _check_tolerance(tolerance)
    L, y = _as_curve(lengths, t, "t")
    return gls_fit("incoherent", L, np.atleast_2d(y), tolerance=tol, confidence=confidence)


def fit_coherent(lengths, lnt, *, tolerance: float = 0.05, confidence: float = 0.95) -> FitResult:
    """Fit ``<ln t> = -L / xi`` (through the origin) to the per-realisation ln t.

    Parameters
    ----------
    lengths : array_like
        (K,) lengths (nm).
    lnt : array_like
        (n, K) ln t per realisation and length (NaN where unusable, e.g. t <= 0).
    tolerance : float
        For ``lstar = -xi ln(1 - tol)``.
    confidence : float
        Level of the intervals.

    Returns
    -------
    FitResult
    """
    tol = _check_tolerance(tolerance)
    L, y = _as_curve(lengths, lnt, "lnt")
    return gls_fit("coherent", L, np.atleast_2d(y), tolerance=tol, confidence=confidence)


# --------------------------------------------------------------------------- the analysis
@dataclass(frozen=True)
class _Settings:
    """The caller's tolerance and bootstrap settings, checked."""

    tolerance: float
    resamples: int
    seed: int
    confidence: float


@dataclass(frozen=True)
class _Target:
    """What is analysed: one measurement along the swept lengths."""

    label: str
    kind: str
    quantised: float
    length_parameter: str
    lengths: np.ndarray


@dataclass(frozen=True)
class _Sweep:
    """The measurement's samples over the whole sweep, (realisation, geometry, *dims)."""

    da: xr.DataArray
    dims: list
    x: np.ndarray
    done: np.ndarray

    def coords(self, index: Mapping[str, int]) -> tuple:
        """The point's ((dim, value), ...) pairs."""
        return tuple((d, float(self.da[d].values[index[d]])) for d in self.dims)

    def at(self, index: Mapping[str, int]) -> tuple[np.ndarray, np.ndarray]:
        """Samples and their done flags at one point, (realisation, geometry)."""
        sel = (slice(None), slice(None)) + tuple(index[d] for d in self.dims)
        return self.x[sel], self.done[sel]


@dataclass(frozen=True)
class _Curves:
    """Per-length statistics of one point's samples, lengths ascending."""

    L: np.ndarray
    #: normalised transmission and which samples are usable, (realisation, length)
    t: np.ndarray
    ok: np.ndarray
    t_mean: np.ndarray
    t_sem: np.ndarray
    n: np.ndarray
    lnt_mean: np.ndarray
    lnt_sem: np.ndarray
    lnt_n: np.ndarray
    value_mean: np.ndarray
    n_nonpositive: int


def _column_stats(v: np.ndarray, ok: np.ndarray):
    n = ok.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, v, 0.0).sum(axis=0) / n
        var = (np.where(ok, v - mean, 0.0) ** 2).sum(axis=0) / (n - 1)
        sem = np.sqrt(var / n)
    mean = np.where(n > 0, mean, np.nan)
    sem = np.where(n > 1, sem, np.nan)
    return mean, sem, n


def _curves(target: _Target, x: np.ndarray, valid: np.ndarray) -> _Curves:
    """Mean t, mean ln t (samples with t > 0) and mean value per length."""
    order = np.argsort(target.lengths)
    L = np.asarray(target.lengths, dtype=float)[order]
    x = x[:, order]
    valid = valid[:, order]
    t = normalised_transmission(x, target.quantised, target.kind)
    ok = valid & np.isfinite(t)
    t_mean, t_sem, n = _column_stats(t, ok)
    pos = ok & (t > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        lnt = np.log(np.where(pos, t, 1.0))
    lnt_mean, lnt_sem, lnt_n = _column_stats(lnt, pos)
    value_mean, _, _ = _column_stats(x, ok)
    return _Curves(L, t, ok, t_mean, t_sem, n, lnt_mean, lnt_sem, lnt_n, value_mean,
                   int((ok & ~(t > 0)).sum()))


def _assumption_notes(kind: str, c: _Curves) -> list[str]:
    notes = []
    if kind == "R":
        notes.append("resistance: t = quantised / R per sample; the criterion is on the mean of t, "
                     "not on the mean resistance (see value_mean)")
    notes.append("t is read as the per-edge transmission of a two-terminal strip (two equal "
                 "parallel edges); for other measurements the fitted lengths are effective ones")
    if c.n_nonpositive:
        notes.append(f"{c.n_nonpositive} sample(s) with t <= 0 left out of <ln t>")
    return notes


def _bootstrap_crossing(c: _Curves, have: np.ndarray,
                        settings: _Settings) -> tuple[float, float, float]:
    """Percentile interval of the direct L* and the fraction of resamples giving a bound.

    Whole realisations are resampled (a realisation shares its disorder across lengths);
    NaN without resamples or with fewer than two usable realisations.
    """
    rows = np.flatnonzero(c.ok.any(axis=1))
    resamples = settings.resamples
    if not (resamples and rows.size >= 2):
        return math.nan, math.nan, math.nan
    rng = np.random.default_rng(settings.seed)
    m = rows.size
    idx = rng.integers(0, m, size=(resamples, m))
    counts = np.bincount((idx + m * np.arange(resamples)[:, None]).ravel(),
                         minlength=resamples * m).reshape(resamples, m).astype(float)
    okr = c.ok[rows][:, have].astype(float)
    tr = np.where(c.ok[rows], c.t[rows], 0.0)[:, have]
    with np.errstate(invalid="ignore", divide="ignore"):
        curves = (counts @ tr) / (counts @ okr)
    curves = np.where(np.isfinite(curves), curves, c.t_mean[have][None, :])
    vals, codes = _crossings(c.L[have], curves, settings.tolerance)
    alpha = (1 - settings.confidence) / 2
    lo, hi = (float(v) for v in np.quantile(vals, [alpha, 1 - alpha]))
    return lo, hi, float(np.mean(codes != 0))


def _analyse(target: _Target, settings: _Settings, x: np.ndarray, valid: np.ndarray,
             point: tuple) -> LStarResult:
    """L* at one sweep point from its samples (realisation, geometry)."""
    c = _curves(target, x, valid)
    notes = _assumption_notes(target.kind, c)
    have = c.n > 0
    if have.sum() == 0:
        raise LStarError(
            f"no usable sample of {target.label!r} at {dict(point)!r} (status done and finite); "
            f"run or resume the sweep first"
        )
    if (~have).any():
        notes.append(f"lengths without samples skipped: {c.L[~have].tolist()!r} nm")
    cross = crossing_length(c.L[have], c.t_mean[have], settings.tolerance)
    lo, hi, censored = _bootstrap_crossing(c, have, settings)
    if censored > 0:
        notes.append(f"{censored:.1%} of the bootstrap resamples give only a bound on L*; the "
                     f"interval is censored at the swept range")
    t_samples = np.where(c.ok, c.t, np.nan)
    pos = c.ok & (c.t > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        lnt_samples = np.where(pos, np.log(np.where(pos, c.t, 1.0)), np.nan)
    inc = gls_fit("incoherent", c.L, t_samples, tolerance=settings.tolerance,
                  confidence=settings.confidence)
    coh = gls_fit("coherent", c.L, lnt_samples, tolerance=settings.tolerance,
                  confidence=settings.confidence)
    notes += _fit_notes((inc, coh), c, have)
    verdict, reason = model_choice(inc, coh, SIGNIFICANCE)
    notes.append(f"model choice: {reason}")
    need_n = need_L = math.nan
    if verdict == "indistinguishable":
        need_n, need_L = distinguishing_effort(c.L, t_samples, lnt_samples, inc.value,
                                               coh.value, significance=SIGNIFICANCE)
        if math.isfinite(need_n):
            longer = (f", or the same lengths scaled up to {need_L:.4g} nm with these "
                      f"realisations (assuming the covariance grows linearly with L)"
                      if math.isfinite(need_L) else "")
            enough = (" (by this estimate the present realisations should already suffice: "
                      "the data agree with both forms better than the mean-field curves do)"
                      if need_n <= int(max(inc.realisations, coh.realisations)) else "")
            notes.append(
                f"to tell the forms apart (each tested against the other's mean-field curve of "
                f"the same initial slope, which differ at second order in L; fluctuations "
                f"neglected, so this is a rough estimate; power 80 %): about {need_n:.0f} "
                f"realisations at the swept lengths{longer}{enough}")
    return LStarResult(
        measurement=target.label, kind=target.kind, quantised=float(target.quantised),
        tolerance=float(settings.tolerance), point=tuple(point),
        length_parameter=target.length_parameter,
        lengths=tuple(float(v) for v in c.L), n=tuple(int(v) for v in c.n),
        t_mean=tuple(float(v) for v in c.t_mean), t_sem=tuple(float(v) for v in c.t_sem),
        lnt_mean=tuple(float(v) for v in c.lnt_mean), lnt_sem=tuple(float(v) for v in c.lnt_sem),
        lnt_n=tuple(int(v) for v in c.lnt_n), value_mean=tuple(float(v) for v in c.value_mean),
        n_nonpositive=c.n_nonpositive, lstar=cross.length, lstar_kind=cross.kind,
        lstar_ci_low=lo, lstar_ci_high=hi, confidence=float(settings.confidence),
        bootstrap_resamples=int(settings.resamples), bootstrap_seed=int(settings.seed),
        bootstrap_censored_fraction=censored, incoherent=inc, coherent=coh,
        preferred=verdict, notes=tuple(notes), method=LENGTH_SWEEP,
        adjacent_correlation=adjacent_correlation(t_samples), correlation_observable="t",
        model_choice=(f"generalised chi^2 test of each form ({TEST_METHOD}) at significance "
                      f"{SIGNIFICANCE:g}: {reason}"),
        significance=SIGNIFICANCE, distinguish_realisations=need_n,
        distinguish_max_length=need_L,
    )


def _fit_notes(fits, c: _Curves, have: np.ndarray) -> list[str]:
    """Extrapolated L*_fit, and lengths or realisations a fit left out."""
    notes = []
    n_rows = int(c.ok.any(axis=1).sum())
    for f in fits:
        if f.ok and not (c.L[have].min() <= f.lstar <= c.L[have].max()):
            notes.append(f"{f.form} L*_fit = {f.lstar:.4g} nm lies outside the swept lengths "
                         f"(extrapolated)")
        if f.n_points and f.n_points < int(have.sum()):
            notes.append(f"{f.form} fit uses {f.n_points} of {int(have.sum())} lengths (lengths "
                         f"with fewer than 2 usable values or no spread, or too few complete "
                         f"realisations, are left out)")
        if 0 < f.realisations < n_rows:
            notes.append(f"{f.form} fit uses the {f.realisations} of {n_rows} realisations "
                         f"usable at every length it fits")
    return notes


def _resolve_point(da: xr.DataArray, dims, point, point_index) -> dict[str, int]:
    point = dict(point or {})
    point_index = dict(point_index or {})
    unknown = sorted((set(point) | set(point_index)) - set(dims))
    if unknown:
        raise LStarError(f"point names {unknown!r}, which are not sweep dimensions here "
                         f"(choose from {list(dims)!r})")
    both = sorted(set(point) & set(point_index))
    if both:
        raise LStarError(f"{both!r} given both by value (point) and by index (point_index); give one")
    out = {}
    for d in dims:
        values = np.asarray(da[d].values, dtype=float)
        if d in point_index:
            i = point_index[d]
            if not (isinstance(i, (int, np.integer)) and -values.size <= i < values.size):
                raise LStarError(f"point_index[{d!r}] = {i!r} is out of range for {values.size} "
                                 f"values {values.tolist()!r}")
            out[d] = int(i) % values.size
        elif d in point:
            v = float(point[d])
            hits = np.flatnonzero(np.isclose(values, v, rtol=1e-9, atol=1e-12))
            if hits.size != 1:
                raise LStarError(f"point[{d!r}] = {point[d]!r} is not a swept value; choose one of "
                                 f"{values.tolist()!r} (or select by point_index)")
            out[d] = int(hits[0])
        elif values.size == 1:
            out[d] = 0
        else:
            raise LStarError(
                f"{d!r} has {values.size} values {values.tolist()!r}; say which one with "
                f"point={{{d!r}: value}} or point_index={{{d!r}: i}}, or pass neither point nor "
                f"point_index to get a table of all points"
            )
    return out


def _quantised_for(ds, label: str, override, config_dir) -> float:
    if override is not None:
        q = np.asarray([float(override)])
    elif "quantised" in ds.coords:
        q = np.asarray(ds["quantised"].sel(measurement=label).values, dtype=float).ravel()
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", SummaryWarning)
            q = ideal_values(ds, [label], None, config_dir)[:, 0]
    if not np.all(np.isfinite(q)) or q.size == 0:
        raise LStarError(
            f"the ideal (quantised) value of {label!r} is unknown ({q.tolist()!r}); pass "
            f"quantised=<value in the measurement's unit> (e.g. 2.0 for a strip's G in e^2/h)"
        )
    if not np.allclose(q, q[0], rtol=1e-12, atol=0):
        raise LStarError(
            f"the ideal value of {label!r} changes along the length sweep ({q.tolist()!r}); L* "
            f"needs one reference value; pass quantised= to choose it"
        )
    return float(q[0])


def longest_ballistic_length(
    store_or_samples_dataset,
    measurement: str,
    *,
    point: Mapping[str, float] | None = None,
    point_index: Mapping[str, int] | None = None,
    tolerance: float = 0.05,
    bootstrap_resamples: int = 2000,
    seed: int = 0,
    confidence: float = 0.95,
    quantised: float | None = None,
    config_dir: str | Path | None = None,
) -> LStarResult | LStarTable:
    """The longest ballistic edge length L* from a length sweep (a model estimate).

    Parameters
    ----------
    store_or_samples_dataset : str, Path or xarray.Dataset
        A sample store, or a Dataset with its layout: ``measurements`` (realisation,
        geometry, [disorder_strength, b_perp, gate_voltage, energy,] measurement), optionally
        ``status`` (only samples with status 1 are used), and a ``geometry`` coordinate whose
        attribute ``parameter`` names a swept length (e.g. ``"length"``).
    measurement : str
        The measurement label, e.g. ``"G(L,R)"``.
    point, point_index : mapping, optional
        The sweep point, by coordinate value or by index per dimension (dimensions of size
        one may be left out). With neither, every point is analysed and an
        :class:`LStarTable` is returned.
    tolerance : float
        Relative tolerance (default 0.05).
    bootstrap_resamples : int
        Resamples over realisations for the interval of the direct L* (0: none).
    seed : int
        Seed of ``np.random.default_rng`` for the bootstrap.
    confidence : float
        Level of the interval.
    quantised : float, optional
        Ideal value; default: the ``quantised`` coordinate if present, else derived from the
        store's configuration (:func:`pipeline.sweep.runmodel.quantised_values`).
    config_dir : str or Path, optional
        Directory of the original config file (only for geometry files with relative paths).

    Returns
    -------
    LStarResult or LStarTable
        One result when a point is given, a table of all points otherwise.
    """
    settings = _checked_settings(tolerance, bootstrap_resamples, seed, confidence)
    ds, where = open_samples(store_or_samples_dataset)
    target = _length_sweep(ds, where, measurement, quantised, config_dir)
    sweep = _sweep_samples(ds, measurement)
    if point is not None or point_index is not None:
        index = _resolve_point(sweep.da, sweep.dims, point, point_index)
        return _analyse(target, settings, *sweep.at(index), sweep.coords(index))
    return _table(target, settings, sweep)


def _checked_settings(tolerance, resamples, seed, confidence) -> _Settings:
    tol = _check_tolerance(tolerance)
    if not (isinstance(resamples, (int, np.integer)) and resamples >= 0):
        raise LStarError(f"bootstrap_resamples = {resamples!r} must be an integer >= 0")
    if not (isinstance(confidence, (int, float)) and 0 < confidence < 1):
        raise LStarError(f"confidence = {confidence!r} must be in (0, 1), e.g. 0.95")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise LStarError(f"seed = {seed!r} must be a non-negative integer")
    return _Settings(tol, int(resamples), int(seed), float(confidence))


def _length_sweep(ds: xr.Dataset, where: str, measurement: str, quantised,
                  config_dir) -> _Target:
    """The measurement, its kind and ideal value, and the swept lengths; refused unless the
    samples sweep a length."""
    if "measurements" not in ds.data_vars:
        raise LStarError(f"{where} has no 'measurements' variable; give a sample store or a "
                         f"Dataset with its layout")
    if "realisation" not in ds.dims or "geometry" not in ds.dims or "measurement" not in ds.dims:
        raise LStarError(f"{where} needs dimensions realisation, geometry and measurement, has "
                         f"{sorted(map(str, ds.dims))!r}")
    labels = measurement_labels(ds)
    if measurement not in labels:
        raise LStarError(f"measurement {measurement!r} is not in the samples; choose one of {labels!r}")
    try:
        kind = parse_measurement(measurement).kind
    except TransportError as exc:
        raise LStarError(f"cannot read measurement label {measurement!r}: {exc}") from exc
    parameter = str(ds["geometry"].attrs.get("parameter", ""))
    if "length" not in parameter.lower():
        raise LStarError(
            f"the geometry axis varies {parameter!r}, not a length; L* needs a sweep of the edge "
            f"length: set [sweep] geometry = {{ parameter = \"length\", values = [...] }}"
        )
    lengths = np.asarray(ds["geometry"].values, dtype=float)
    if lengths.size < 2:
        raise LStarError(f"the length sweep has {lengths.size} value(s) {lengths.tolist()!r}; "
                         f"sweep at least two lengths (better five or more)")
    q = _quantised_for(ds, measurement, quantised, config_dir)
    return _Target(measurement, kind, q, parameter, lengths)


def _sweep_samples(ds: xr.Dataset, measurement: str) -> _Sweep:
    """The measurement's values and done flags (all samples done without a status)."""
    da = ds["measurements"].sel(measurement=measurement)
    dims = [d for d in _POINT_DIMS if d in da.dims]
    extra = set(da.dims) - set(dims) - {"realisation", "geometry"}
    if extra:
        raise LStarError(f"unexpected dimensions {sorted(map(str, extra))!r} in the samples; "
                         f"expected {['realisation', 'geometry', *_POINT_DIMS]!r}")
    da = da.transpose("realisation", "geometry", *dims)
    x_all = np.asarray(da.values, dtype=float)
    if "status" in ds.data_vars:
        st = ds["status"].transpose("realisation", "geometry", *dims)
        done_all = np.asarray(st.values) == SampleStatus.DONE
    else:
        done_all = np.ones(x_all.shape, dtype=bool)
    return _Sweep(da, dims, x_all, done_all)


def _table(target: _Target, settings: _Settings, sweep: _Sweep) -> LStarTable:
    """L* at every point with a usable sample; the others are listed as skipped."""
    results, skipped = [], []
    for combo in itertools.product(*(range(sweep.da.sizes[d]) for d in sweep.dims)):
        index = dict(zip(sweep.dims, combo))
        x, done = sweep.at(index)
        if not (done & np.isfinite(x)).any():
            skipped.append((sweep.coords(index), "no usable sample (missing, failed or non-finite)"))
            continue
        results.append(_analyse(target, settings, x, done, sweep.coords(index)))
    if skipped:
        # stacklevel 3: the caller of longest_ballistic_length
        warnings.warn(f"L*: {len(skipped)} sweep point(s) have no usable sample and are skipped "
                      f"(see LStarTable.skipped)", SummaryWarning, stacklevel=3)
    return LStarTable(target.label, tuple(results), tuple(skipped))
