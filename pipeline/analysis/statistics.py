"""Statistics over disorder realisations: moments, quantiles, bootstrap intervals, thermal smearing.

The interval of a mean is a studentized bootstrap with small-sample widened tails
(:data:`INTERVAL_METHOD_TEXT`); points whose samples show rare large deviations are flagged
(:func:`sparse_tail`) with the number of realisations they need; tail fractions get a Wilson
interval (:func:`wilson_interval`). The measured coverage is in ``docs/statistics.md``
(``benchmarks/interval_coverage.py`` reproduces it).

The reductions here work on plain arrays whose last axis (or whose rows) are realisations;
:mod:`pipeline.analysis.summary` applies them to a whole sample store.

Thermal smearing follows Landauer-Buttiker at finite temperature (e.g. Datta, *Electronic
Transport in Mesoscopic Systems*, 1995, ch. 2)::

    T_ij(mu, T) = integral dE  (-df/dE)(E - mu)  T_ij(E),
    -df/dE = 1 / (4 k_B T cosh^2((E - mu) / (2 k_B T)))

evaluated on the swept energy grid with trapezoid weights renormalised to sum to one.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Sequence
from enum import IntEnum

import numpy as np
from scipy.special import expit, ndtr, ndtri
from scipy.stats import t as student_t

from pipeline.constants import K_B_MEV_PER_K
from pipeline.errors import AggregateError, SummaryWarning

__all__ = ['IntervalFlag', 'INTERVAL_METHODS', 'INTERVAL_METHOD_TEXT', 'GAP_FACTOR',
           'bootstrap_mean_ci', 'sample_statistics', 'thermal_weights', 'smear_transmission',
           'resample_uniforms', 'row_statistics', 'check_bootstrap_settings', 'thermal_plan',
           'expanded_levels', 'sparse_tail', 'wilson_interval']

#: largest number of elements of one bootstrap work array (bounds memory to ~50 MB)
_BOOT_BUDGET = 6_000_000

#: largest fraction of the thermal window allowed outside the energy grid before warning
_MAX_TRUNCATION = 0.01

#: relative spread below which samples count as equal (numerical noise of a solve is ~1e-12)
_TIE = 1e-9

#: relative size below which a gap between samples is not a deviation (a part per million:
#: below the resolution of any transport measurement; common practice, no source)
_RESOLUTION = 1e-6

#: a gap wider than this many standard deviations of the majority marks a sparse tail; chosen
#: so that about 1 % of log-normal ensembles (sigma = 1) and none of the one-sided ones of
#: docs/statistics.md are flagged, while rare deviations are found as well as with 8 (measured
#: with benchmarks/interval_coverage.py; the choice itself is common practice, no source)
GAP_FACTOR = 20.0

#: interval rules of :func:`bootstrap_mean_ci`
INTERVAL_METHODS = ("studentized", "percentile")

#: how the summary's intervals of the mean are made (for attributes and methods text)
INTERVAL_METHOD_TEXT = (
    "studentized bootstrap of the mean over realisations: T* = (mean* - mean) / se* on each "
    "resample, interval [mean - q_hi se, mean - q_lo se] with se = s / sqrt(n); the tail "
    "levels q_lo, q_hi are widened for small n to Phi(-sqrt(n/(n-1)) t_(n-1, 1-alpha/2)) "
    "(Hesterberg's small-sample expansion); where more than that tail of the resamples has "
    "zero spread (tied samples), that end is the percentile-bootstrap end (flag "
    "percentile_end); all samples equal: zero-width interval (flag degenerate); coverage "
    "measured in docs/statistics.md"
)


class IntervalFlag(IntEnum):
    """Quality of a point's interval of the mean (the summary's ``ci_flag``)."""

    OK = 0  #: studentized interval
    DEGENERATE = 1  #: every sample equal: zero-width interval at the common value
    SPARSE_TAIL = 2  #: rare large deviations (a small cluster beyond a gap): needs more samples
    TOO_FEW = 3  #: fewer than two samples: no interval
    NOT_COMPUTED = 4  #: no bootstrap resamples asked for
    PERCENTILE_END = 5  #: an end from the percentile rule (tied resamples), see the method


# --------------------------------------------------------------------------- statistics
def resample_uniforms(resamples: int, n_max: int, seed: int) -> np.ndarray:
    """Uniform numbers that define every bootstrap resample (one row per resample).

    Resample ``b`` of a point with ``n`` valid samples takes sample indices
    ``floor(u[b, :n] * n)`` (of its valid samples, in realisation order); the same numbers
    serve every point, so a point's interval does not depend on which other points are
    summarised or in what chunks. Column ``j`` is drawn before column ``j + 1`` (the numbers
    are drawn realisation by realisation), so the first ``n`` columns do not depend on
    ``n_max``: a point's interval stays the same when the run grows.

    Parameters
    ----------
    resamples : int
        Number of bootstrap resamples (rows).
    n_max : int
        Largest number of samples of a point (columns), e.g. the realisations of a run.
    seed : int
        Seed of ``np.random.default_rng``.

    Returns
    -------
    numpy.ndarray
        Shape ``(resamples, n_max)``, uniform in [0, 1).
    """
    rng = np.random.default_rng(seed)
    return rng.random((n_max, resamples)).T


def _compact(x: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Valid samples moved to the front of each row (order kept), and their counts."""
    order = np.argsort(~valid, axis=-1, kind="stable")
    xc = np.take_along_axis(np.where(valid, x, 0.0), order, axis=-1)
    return xc, valid.sum(axis=-1)


def _resample_counts(u: np.ndarray, m: int) -> np.ndarray:
    """``C[b, j]``: how often resample ``b`` of ``m`` samples takes sample ``j`` (float)."""
    resamples = u.shape[0]
    idx = np.minimum((u[:, :m] * m).astype(np.intp), m - 1)
    return np.bincount((idx + m * np.arange(resamples)[:, None]).ravel(),
                       minlength=resamples * m).reshape(resamples, m).astype(float)


def expanded_levels(n, confidence: float) -> tuple[np.ndarray, np.ndarray]:
    """Tail levels of the studentized bootstrap, widened for small samples.

    The nominal tail ``alpha / 2`` becomes ``Phi(-sqrt(n / (n - 1)) t_{n-1, 1 - alpha/2})``
    (the small-sample expansion of Hesterberg, The American Statistician 69, 371 (2015),
    there for the percentile interval); it tends to ``alpha / 2`` as ``n`` grows.

    Parameters
    ----------
    n : int or array_like of int
        Sample counts (>= 2).
    confidence : float
        Nominal level in (0, 1).

    Returns
    -------
    low, high : numpy.ndarray
        The lower and upper tail levels (``high = 1 - low``).
    """
    n = np.asarray(n, dtype=float)
    alpha = 1.0 - confidence
    low = ndtr(-np.sqrt(n / (n - 1.0)) * student_t.ppf(1.0 - alpha / 2.0, n - 1.0))
    return low, 1.0 - low


def _order_statistic(a: np.ndarray, level: float) -> np.ndarray:
    """Per row the ``ceil(level B)``-th smallest of ``B`` values (no interpolation, inf-safe)."""
    k = int(np.clip(math.ceil(level * a.shape[1]) - 1, 0, a.shape[1] - 1))
    return np.partition(a, k, axis=1)[:, k]


def _interval_group(y: np.ndarray, se: np.ndarray, counts: np.ndarray, scale: np.ndarray,
                    confidence: float, method: str) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Interval offsets from the mean for rows of ``m`` centred samples ``y`` (rows, m).

    Returns ``(low, high, fallback)``: offsets of the interval ends from the sample mean, and
    whether an end fell back to the percentile rule (too many tied resamples).
    """
    m = y.shape[1]
    means = (y @ counts.T) / m  # (rows, resamples), centred: the sample mean is 0
    lo_level, hi_level = ((1.0 - confidence) / 2.0, (1.0 + confidence) / 2.0)
    p_lo, p_hi = _order_statistic(means, lo_level), _order_statistic(means, hi_level)
    if method == "percentile":
        return p_lo, p_hi, np.zeros(y.shape[0], dtype=bool)
    second = ((y * y) @ counts.T) / m
    sd = np.sqrt(np.maximum(second - means**2, 0.0) * m / (m - 1.0))
    tied = sd <= _TIE * scale[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        t = means / (sd / math.sqrt(m))
    shifted = np.abs(means) > _TIE * scale[:, None]
    t = np.where(tied, np.where(shifted, np.where(means > 0, np.inf, -np.inf), 0.0), t)
    e_lo, e_hi = expanded_levels(m, confidence)
    q_lo, q_hi = _order_statistic(t, float(e_lo)), _order_statistic(t, float(e_hi))
    low, high = -q_hi * se, -q_lo * se
    bad_low, bad_high = ~np.isfinite(low), ~np.isfinite(high)
    low = np.where(bad_low, p_lo, low)
    high = np.where(bad_high, p_hi, high)
    return low, high, bad_low | bad_high


def _interval_rows(x: np.ndarray, valid: np.ndarray, u: np.ndarray, confidence: float,
                   method: str = "studentized") -> dict[str, np.ndarray]:
    """Bootstrap interval of the mean of each row of ``x`` (2-D), with its flag.

    Rows with the same number ``m`` of valid samples share the resample counts
    ``C[b, j] = #{k < m : floor(u[b, k] m) = j}``, so their resampled moments are matrix
    products ``x[:, :m] @ C.T / m``.
    """
    n_rows = x.shape[0]
    low = np.full(n_rows, np.nan)
    high = np.full(n_rows, np.nan)
    flag = np.where(valid.sum(axis=1) < 2, IntervalFlag.TOO_FEW, IntervalFlag.OK).astype(np.int8)
    resamples = u.shape[0]
    if resamples == 0 or n_rows == 0:
        flag[:] = np.where(flag == IntervalFlag.OK, IntervalFlag.NOT_COMPUTED, flag)
        return {"ci_low": low, "ci_high": high, "ci_flag": flag}
    xc, n = _compact(x, valid)
    chunk = max(1, _BOOT_BUDGET // resamples)
    for m in np.unique(n[n >= 2]):
        m = int(m)
        counts = _resample_counts(u, m)
        rows = np.flatnonzero(n == m)
        for start in range(0, rows.size, chunk):
            sel = rows[start:start + chunk]
            xs = xc[sel, :m]
            mean = xs.mean(axis=1)
            y = xs - mean[:, None]
            scale = np.max(np.abs(xs), axis=1)
            sd = np.sqrt((y * y).sum(axis=1) / (m - 1.0))
            degenerate = sd <= _TIE * scale
            lo_off, hi_off, fallback = _interval_group(y, sd / math.sqrt(m), counts, scale,
                                                       confidence, method)
            low[sel] = np.where(degenerate, mean, mean + lo_off)
            high[sel] = np.where(degenerate, mean, mean + hi_off)
            flag[sel] = np.where(degenerate, IntervalFlag.DEGENERATE,
                                 np.where(fallback, IntervalFlag.PERCENTILE_END, IntervalFlag.OK))
    return {"ci_low": low, "ci_high": high, "ci_flag": flag}


def sparse_tail(sorted_rows: np.ndarray, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Detect rare large deviations: a small cluster of samples beyond a gap.

    For each row of ``m`` sorted samples, the widest gap between neighbours that leaves at
    most a quarter of the samples on its smaller side (the *minority*, ``k`` samples) is
    compared with the spread of the other side (the *majority*, standard deviation ddof=1):
    the point is flagged when the gap exceeds ``GAP_FACTOR`` times that spread and a part per
    million of the samples' magnitude (deviations below that are numerical), unless the
    ensemble is already large enough that an ensemble of its size misses a tail of weight
    ``k / m`` with probability below ``(1 - confidence) / 2``.

    Parameters
    ----------
    sorted_rows : numpy.ndarray, shape (rows, m)
        Samples of each row in ascending order (all valid; ``m >= 2``).
    confidence : float
        Level of the intervals the check guards.

    Returns
    -------
    flagged : numpy.ndarray of bool
        Rows with a sparse tail.
    needed : numpy.ndarray of int
        Realisations such a row needs, ``ceil(ln(alpha/2) / ln(1 - k/m))``: with that many an
        ensemble misses a tail of weight ``k/m`` with probability at most ``alpha/2``; 0 where
        not flagged.
    """
    s = np.asarray(sorted_rows, dtype=float)
    rows, m = s.shape
    flagged = np.zeros(rows, dtype=bool)
    needed = np.zeros(rows, dtype=np.int64)
    if m < 4 or rows == 0:
        return flagged, needed
    y = s - s.mean(axis=1, keepdims=True)
    gaps = np.diff(y, axis=1)  # split i: lower side s[:i+1], upper side s[i+1:]
    k_low = np.arange(1, m)
    minority = np.minimum(k_low, m - k_low)
    allowed = minority <= m / 4.0
    split = np.argmax(np.where(allowed[None, :], gaps, -np.inf), axis=1)
    gap = gaps[np.arange(rows), split]
    k_lo = split + 1
    low_is_minority = k_lo <= m - k_lo
    c1 = np.concatenate([np.zeros((rows, 1)), np.cumsum(y, axis=1)], axis=1)
    c2 = np.concatenate([np.zeros((rows, 1)), np.cumsum(y * y, axis=1)], axis=1)
    r = np.arange(rows)
    lo_sum, lo_sq = c1[r, k_lo], c2[r, k_lo]
    hi_sum, hi_sq = c1[:, -1] - lo_sum, c2[:, -1] - lo_sq
    maj_n = np.where(low_is_minority, m - k_lo, k_lo).astype(float)
    maj_sum = np.where(low_is_minority, hi_sum, lo_sum)
    maj_sq = np.where(low_is_minority, hi_sq, lo_sq)
    with np.errstate(invalid="ignore", divide="ignore"):
        maj_sd = np.sqrt(np.maximum(maj_sq - maj_sum**2 / maj_n, 0.0) / np.maximum(maj_n - 1, 1))
    k = np.where(low_is_minority, k_lo, m - k_lo)
    resolution = _RESOLUTION * np.max(np.abs(s), axis=1)
    p = k / m
    with np.errstate(divide="ignore"):
        need = np.ceil(np.log((1.0 - confidence) / 2.0) / np.log1p(-p)).astype(np.int64)
    flagged = (gap > GAP_FACTOR * maj_sd) & (gap > resolution) & (need > m)
    return flagged, np.where(flagged, need, 0)


def wilson_interval(k, n, confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Wilson score interval of a binomial proportion ``k / n``.

    ``(p + z^2/(2n) -+ z sqrt(p(1-p)/n + z^2/(4 n^2))) / (1 + z^2/n)`` with ``z`` the normal
    quantile at ``(1 + confidence) / 2`` (Wilson, J. Am. Stat. Assoc. 22, 209 (1927)); it
    stays inside [0, 1] and keeps its level far better than ``p +- z sqrt(p(1-p)/n)`` when
    ``k`` is near 0 or ``n``.

    Parameters
    ----------
    k, n : array_like of int
        Successes and trials (NaN where ``n`` is 0).
    confidence : float
        Level in (0, 1).

    Returns
    -------
    low, high : numpy.ndarray
    """
    k = np.asarray(k, dtype=float)
    n = np.asarray(n, dtype=float)
    z = float(ndtri(0.5 + confidence / 2.0))
    with np.errstate(invalid="ignore", divide="ignore"):
        p = k / n
        denom = 1.0 + z * z / n
        centre = (p + z * z / (2.0 * n)) / denom
        half = z * np.sqrt(p * (1.0 - p) / n + z * z / (4.0 * n * n)) / denom
    ok = n > 0
    return np.where(ok, centre - half, np.nan), np.where(ok, centre + half, np.nan)


def bootstrap_mean_ci(
    samples: np.ndarray,
    valid: np.ndarray | None = None,
    *,
    resamples: int = 2000,
    seed: int = 0,
    confidence: float = 0.95,
    method: str = "percentile",
) -> tuple[np.ndarray, np.ndarray]:
    """Bootstrap confidence interval of the mean along the last axis.

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
    method : str
        ``"percentile"`` (the plain percentile interval) or ``"studentized"`` (the interval
        the summary reports: see :func:`row_statistics`).

    Returns
    -------
    low, high : numpy.ndarray
        Interval ends, shape ``samples.shape[:-1]``; NaN where fewer than two samples.
    """
    x = np.asarray(samples, dtype=float)
    if x.ndim == 0:
        raise AggregateError(f"samples must have at least one axis, got the scalar {x!r}; "
                             f"pass the samples along the last axis")
    check_bootstrap_settings(resamples, confidence)
    if method not in INTERVAL_METHODS:
        raise AggregateError(f"method = {method!r} is not one of {INTERVAL_METHODS!r}")
    ok = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    lead = x.shape[:-1]
    u = resample_uniforms(resamples, x.shape[-1], seed)
    out = _interval_rows(x.reshape(-1, x.shape[-1]), ok.reshape(-1, x.shape[-1]), u,
                         confidence, method)
    return out["ci_low"].reshape(lead), out["ci_high"].reshape(lead)


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


def row_statistics(x: np.ndarray, valid: np.ndarray, u: np.ndarray, confidence: float,
                   full: bool = True) -> dict[str, np.ndarray]:
    """Statistics of each row of a 2-D sample array over its valid, finite entries.

    Parameters
    ----------
    x : numpy.ndarray, shape (rows, samples)
        Samples of each row.
    valid : numpy.ndarray of bool, same shape
        Which samples to use (non-finite ones are never used).
    u : numpy.ndarray
        Bootstrap uniforms from :func:`resample_uniforms` (zero rows: no intervals).
    confidence : float
        Level of the interval of the mean.
    full : bool
        With ``False`` only ``n``, ``mean``, ``sem``, ``ci_low``, ``ci_high`` and ``ci_flag``.

    Returns
    -------
    dict of numpy.ndarray
        One value per row; the keys of :func:`sample_statistics`.
    """
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
    out = {"n": n, "mean": mean, "sem": sem, **_interval_rows(x, valid, u, confidence)}
    s = np.sort(np.where(valid, x, np.nan), axis=1)  # NaN sort last
    needed = np.zeros(n.shape, dtype=np.int64)
    for m in np.unique(n[n >= 4]):
        rows = np.flatnonzero(n == m)
        flagged, need = sparse_tail(s[rows, :int(m)], confidence)
        needed[rows] = need
        fl = out["ci_flag"][rows]
        out["ci_flag"][rows] = np.where(
            flagged & ((fl == IntervalFlag.OK) | (fl == IntervalFlag.PERCENTILE_END)),
            IntervalFlag.SPARSE_TAIL, fl)
    out["realisations_needed"] = needed
    if not full:
        return out
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
        (studentized bootstrap of the mean, see :data:`INTERVAL_METHOD_TEXT`), ``ci_flag``
        (:class:`IntervalFlag`), ``realisations_needed`` (for sparse tails, see
        :func:`sparse_tail`; 0 elsewhere) and ``typical`` (exp of the mean of ln x; NaN
        unless every sample is positive), each of shape ``samples.shape[:-1]``.
    """
    x = np.asarray(samples, dtype=float)
    check_bootstrap_settings(resamples, confidence)
    ok = np.isfinite(x) if valid is None else (np.asarray(valid, dtype=bool) & np.isfinite(x))
    lead, r = x.shape[:-1], x.shape[-1]
    u = resample_uniforms(resamples, r, seed)
    stats = row_statistics(x.reshape(-1, r), ok.reshape(-1, r), u, confidence)
    return {k: v.reshape(lead) for k, v in stats.items()}


def check_bootstrap_settings(resamples, confidence) -> None:
    """Refuse unusable bootstrap settings with an :class:`AggregateError` naming the value.

    Parameters
    ----------
    resamples : int
        0 (no intervals) or at least 100.
    confidence : float
        Level in (0, 1).
    """
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


def thermal_plan(energies: np.ndarray, temperatures: Sequence[float]):
    """Smearing weights per temperature and the coverage of each thermal window.

    A temperature whose window the grid does not resolve (a single energy, or a step above
    k_B T / 2) is skipped with a :class:`SummaryWarning`; a window with more than 1 % of its
    weight outside the grid is kept but warned about (its smeared values are biased).

    Parameters
    ----------
    energies : numpy.ndarray
        The energy grid (meV).
    temperatures : sequence of float
        Temperatures (K).

    Returns
    -------
    plans : list
        Per temperature the weights of :func:`thermal_weights`, or None when skipped.
    coverage : numpy.ndarray, shape (temperature, energy)
        Fraction of each window inside the grid (NaN for skipped temperatures).
    """
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
                SummaryWarning, stacklevel=3,
            )
            plans.append(None)
            continue
        if step > kt / 2:
            warnings.warn(
                f"thermal smearing at {temp:g} K skipped (values NaN): energy step {step:.3g} meV "
                f"vs k_B T = {kt:.3g} meV at {temp:g} K; the grid must resolve the thermal window "
                f"(step <= k_B T / 2 = {kt / 2:.3g} meV): refine the energy sweep or raise the "
                f"temperature",
                SummaryWarning, stacklevel=3,
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
                SummaryWarning, stacklevel=3,
            )
        plans.append(w)
    return plans, coverage
