"""Fits of the two decay forms to a length sweep whose lengths share their realisations.

A length sweep solves the *same* realisation at every length, and a longer sample extends a
shorter one with the same disorder on the overlapping sites, so the per-length means are
strongly correlated. The fits here use that correlation:

* **data**: the per-realisation values (t, or ln t) at the lengths used; only realisations
  with a usable value at *every* length used enter (complete cases, so the sample covariance
  is positive semi-definite and the fits and the test see one set of realisations). Lengths
  with fewer than two usable values or no spread are left out first; when too few complete
  realisations remain, the length with the fewest usable values is dropped, and so on.
* **point estimate**: generalised least squares (Aitken, Proc. R. Soc. Edinb. 55, 42 (1935))
  of the per-length means with the covariance estimated from the realisations: the sample
  covariance with its correlations shrunk toward the identity (target D of Schaefer &
  Strimmer, Stat. Appl. Genet. Mol. Biol. 4, art. 32 (2005), applied to the standardised
  data, with their analytic intensity; the sample variances are kept). The fitted parameter
  is the rate (1/lambda, 1/xi): the coherent form is linear in it, the incoherent one is
  solved by Gauss-Newton. The weights are *cross-fitted*: realisation r enters through
  ``z_r = rate + a_(-r)^T (y_r - f(rate))``, ``a = (J^T W J)^-1 J^T W``, with W the inverse
  shrunk covariance of the other n - 1 realisations (with n > 64: of the realisations outside
  r's fold, 64 folds), and the rate solves mean_r z_r = rate
  (sample splitting as in Chernozhukov et al., Econom. J. 21, C1 (2018)). With weights from
  the same realisations, GLS is biased when the values are skewed (a realisation with a
  large excursion also raises the variance it is weighted with): measured 17-36 % too small
  a rate in the gamma model of ``benchmarks/lstar_coverage.py``; cross-fitted, within 4 %.
* **interval**: the rate is the mean of the influence values z_r; its interval is Johnson's
  skewness-corrected t interval with n - 1 degrees of freedom (n complete realisations;
  Johnson, J. Am. Stat. Assoc. 73, 536 (1978)), mapped to lambda or xi by 1/rate (an
  unbounded upper end when the rate interval reaches zero). Its coverage is measured by
  ``benchmarks/lstar_coverage.py`` (docs/statistics-lengths.md).
* **goodness of fit**: the generalised chi^2 of each form with the *unshrunk* sample
  covariance, written as Hotelling's T^2 of the K - 1 residual contrasts orthogonal to the
  fitted direction, T^2 = n (C r)^T (C S C^T)^-1 (C r); for Gaussian data and a model linear
  in its parameter (n - K + 1) T^2 / ((K - 1)(n - 1)) follows F(K - 1, n - K + 1) exactly
  (Hotelling, Ann. Math. Stat. 2, 360 (1931); Anderson, An Introduction to Multivariate
  Statistical Analysis, 3rd ed., Wiley (2003), sec. 5.2-5.3, from memory), and to first order
  for the incoherent form. With n <= K an evenly spread subset of n - 1 lengths is tested.

:func:`model_choice` turns the two p-values into the ``preferred`` verdict and
:func:`distinguishing_effort` estimates what a sweep would need to tell the forms apart.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats
from scipy.optimize import curve_fit

from pipeline.analysis.lstar_results import FitResult
from pipeline.errors import LStarError

__all__ = ['SIGNIFICANCE', 'POWER', 'FIT_METHOD', 'INTERVAL_METHOD', 'TEST_METHOD',
           'shrunk_covariance', 'gls_rate', 'gls_fit', 'hotelling_test', 'model_choice',
           'distinguishing_effort', 'independent_fit', 'adjacent_correlation']

#: significance level at which a form is rejected (common practice, no source)
SIGNIFICANCE = 0.05
#: power at which the two forms should be told apart (common practice, no source)
POWER = 0.8

FIT_METHOD = ("cross-fitted GLS of the per-length means: each realisation weighted with the "
              "covariance of the others (complete realisations; correlations shrunk to the "
              "identity, Schaefer-Strimmer 2005 target D)")
INTERVAL_METHOD = ("Johnson (1978) skewness-corrected t interval (n-1 dof) of the mean of the "
                   "per-realisation influence values")
TEST_METHOD = "Hotelling T^2 of the residual contrasts, F(K-1, n-K+1)"

#: realisations a fit needs: cross-fitting estimates a covariance from n - 1 >= 3 of them
_MIN_REALISATIONS = 4
#: up to this many realisations the weights are leave-one-out, beyond it from as many folds
#: (bounds the memory and time of a fit at O(n K^2) per fold; a choice, no source)
_FOLDS = 64


# --------------------------------------------------------------------------- covariance
def _shrunk_batch(x: np.ndarray, sd_fallback: np.ndarray | None = None):
    """:func:`shrunk_covariance` of every (m, K) slice of x (B, m, K); returns (B, K, K), (B,).

    A column without spread in a slice takes ``sd_fallback`` as its standard deviation (and
    no correlation); without a fallback such a column is an error.
    """
    _, m, k = x.shape
    xc = x - x.mean(axis=1, keepdims=True)
    sd = np.sqrt((xc**2).sum(axis=1) / (m - 1))
    flat = sd <= 0
    if flat.any():
        if sd_fallback is None:
            cols = np.flatnonzero(flat.any(axis=0)).tolist()
            raise LStarError(f"variables {cols!r} have no spread; leave them out before "
                             f"estimating a covariance")
        sd = np.where(flat, np.broadcast_to(sd_fallback, sd.shape), sd)
    z = xc / sd[:, None, :]
    # w_kij = z_ki z_kj; sum_k (w_kij - wbar_ij)^2 = sum_k z_ki^2 z_kj^2 - m wbar_ij^2, two
    # matrix products instead of an (m, K, K) array per slice
    wbar = np.einsum("bmi,bmj->bij", z, z) / m
    z2 = z**2
    spread = np.maximum(np.einsum("bmi,bmj->bij", z2, z2) - m * wbar**2, 0.0)
    r = m / (m - 1) * wbar
    var_r = m / (m - 1) ** 3 * spread
    off = ~np.eye(k, dtype=bool)
    num = np.where(off, var_r, 0.0).sum(axis=(1, 2))
    den = np.where(off, r**2, 0.0).sum(axis=(1, 2))
    with np.errstate(invalid="ignore", divide="ignore"):
        lam = np.where(den > 0, np.clip(num / den, 0.0, 1.0), 1.0)
    rs = (1 - lam)[:, None, None] * r
    rs[:, np.arange(k), np.arange(k)] = 1.0
    return rs * sd[:, :, None] * sd[:, None, :], lam


def shrunk_covariance(samples) -> tuple[np.ndarray, float]:
    """Sample covariance with its correlations shrunk toward the identity.

    The correlation matrix R of the standardised data is replaced by
    ``lambda* I + (1 - lambda*) R`` and scaled back with the sample standard deviations, with
    the analytic intensity of Schaefer & Strimmer (2005), target D applied to standardised
    data: ``lambda* = sum_{i != j} Var(r_ij) / sum_{i != j} r_ij^2`` (clipped to [0, 1]),
    ``Var(r_ij) = n / (n - 1)^3 sum_k (w_kij - mean_k w_kij)^2``, ``w_kij = z_ki z_kj``,
    ``r_ij = n / (n - 1) mean_k w_kij`` (formulas from memory of the paper's sec. 2 and
    appendix).

    Parameters
    ----------
    samples : array_like
        (n, K): n realisations, K variables, all finite, n >= 3, every column with spread.

    Returns
    -------
    cov : numpy.ndarray
        (K, K) shrunk covariance (divisor n - 1).
    intensity : float
        lambda* in [0, 1].

    Examples
    --------
    >>> import numpy as np
    >>> x = np.random.default_rng(0).normal(size=(20, 3))
    >>> cov, lam = shrunk_covariance(x)
    >>> bool(np.allclose(np.diag(cov), x.var(axis=0, ddof=1)))
    True
    """
    x = np.asarray(samples, dtype=float)
    if x.ndim != 2 or x.shape[0] < 3 or not np.all(np.isfinite(x)):
        raise LStarError(f"samples of shape {x.shape!r} must be (n >= 3 realisations, K variables) "
                         f"and finite; drop incomplete realisations first")
    cov, lam = _shrunk_batch(x[None])
    return cov[0], float(lam[0])


def adjacent_correlation(samples) -> tuple[float, ...]:
    """Pearson correlation between consecutive columns, over rows usable in both.

    Parameters
    ----------
    samples : array_like
        (n, K) with NaN where a value is missing.

    Returns
    -------
    tuple of float
        K - 1 values; NaN for a pair with fewer than 3 common rows or no spread.
    """
    x = np.asarray(samples, dtype=float)
    out = []
    for j in range(x.shape[1] - 1):
        a, b = x[:, j], x[:, j + 1]
        ok = np.isfinite(a) & np.isfinite(b)
        if ok.sum() < 3:
            out.append(math.nan)
            continue
        da, db = a[ok] - a[ok].mean(), b[ok] - b[ok].mean()
        den = math.sqrt(float((da**2).sum() * (db**2).sum()))
        out.append(float((da * db).sum() / den) if den > 0 else math.nan)
    return tuple(out)


# --------------------------------------------------------------------------- the forms
def _model(form: str, L: np.ndarray, rate: float) -> tuple[np.ndarray, np.ndarray]:
    """Model mean and its derivative in the rate (1/lambda or 1/xi)."""
    if form == "coherent":
        return -L * rate, -L
    d = 1.0 + rate * L
    return 1.0 / d, -L / d**2


def gls_rate(form: str, L, ybar, W) -> float:
    """The rate (1/lambda or 1/xi) minimising ``(ybar - f)^T W (ybar - f)``.

    For the coherent form ``f = -L rate`` this is the closed form
    ``rate = -(L^T W ybar) / (L^T W L)``; the incoherent ``f = 1/(1 + rate L)`` is solved by
    Gauss-Newton with step halving.

    Parameters
    ----------
    form : str
        ``"incoherent"`` or ``"coherent"``.
    L, ybar : array_like
        (K,) lengths (nm) and means.
    W : array_like
        (K, K) weight matrix (inverse covariance of the means).

    Returns
    -------
    float
        The rate (1/nm); NaN if Gauss-Newton does not converge.
    """
    L, ybar, W = (np.asarray(v, dtype=float) for v in (L, ybar, W))
    if form == "coherent":
        return float(-(L @ W @ ybar) / (L @ W @ L))
    inside = (ybar > 0) & (L > 0)
    z = np.where(inside, 1.0 / np.where(inside, ybar, 1.0) - 1.0, 0.0)
    rate = float((L[inside] * z[inside]).sum() / (L[inside] ** 2).sum()) if inside.any() else 0.0
    floor = -1.0 / L.max() if L.max() > 0 else -np.inf
    rate = max(rate, 0.5 * floor)

    def q(u):
        r = ybar - _model(form, L, u)[0]
        return float(r @ W @ r)

    current = q(rate)
    for _ in range(200):
        f, J = _model(form, L, rate)
        step = float((J @ W @ (ybar - f)) / (J @ W @ J))
        for _ in range(60):
            new = rate + step
            if new > floor * (1 - 1e-9) and q(new) <= current:
                break
            step *= 0.5
        else:
            return rate  # no decrease along the Gauss-Newton direction: a minimum
        rate, current = new, q(new)
        if abs(step) * L.max() < 1e-13:
            return rate
    return math.nan


def _evenly(k: int, m: int) -> np.ndarray:
    """m of k indices, evenly spread, first and last included."""
    return np.unique(np.round(np.linspace(0, k - 1, m)).astype(int))


def hotelling_test(resid_samples_mean, jac, cov, n: int) -> tuple[float, int, float, str]:
    """Hotelling's T^2 of the residual contrasts orthogonal to the fitted direction.

    Parameters
    ----------
    resid_samples_mean : array_like
        (K,) mean residual per length (mean of the samples minus the fitted form).
    jac : array_like
        (K,) derivative of the form in its parameter at the fit.
    cov : array_like
        (K, K) sample covariance of the per-realisation values (divisor n - 1, unshrunk).
    n : int
        Realisations.

    Returns
    -------
    t2 : float
        T^2 = n (C r)^T (C S C^T)^-1 (C r), C an orthonormal basis of the complement of jac.
    dof : int
        K' - 1, K' the lengths tested (K, or n - 1 evenly spread ones when n <= K).
    p_value : float
        Upper tail of F(dof, n - dof) at (n - dof) T^2 / (dof (n - 1)); NaN if undefined.
    note : str
        Which lengths were tested when a subset was needed.
    """
    r = np.asarray(resid_samples_mean, dtype=float)
    J = np.asarray(jac, dtype=float)
    S = np.asarray(cov, dtype=float)
    k = r.size
    note = ""
    if n <= k:
        keep = _evenly(k, max(n - 1, 2))
        note = f"{keep.size} of {k} lengths tested (the test needs more realisations than lengths)"
        r, J, S = r[keep], J[keep], S[np.ix_(keep, keep)]
    dof = r.size - 1
    if dof < 1 or n - dof < 1:
        return math.nan, max(dof, 0), math.nan, note
    q, _ = np.linalg.qr(np.column_stack([J, np.eye(r.size)[:, :dof]]), mode="complete")
    C = q[:, 1:].T
    cr = C @ r
    try:
        t2 = float(n * cr @ np.linalg.solve(C @ S @ C.T, cr))
    except np.linalg.LinAlgError:
        return math.nan, dof, math.nan, note
    F = (n - dof) * t2 / (dof * (n - 1))
    return t2, dof, float(stats.f.sf(F, dof, n - dof)), note


# --------------------------------------------------------------------------- selection
@dataclass(frozen=True)
class _Selected:
    """The lengths and complete realisations a fit uses."""

    L: np.ndarray
    x: np.ndarray
    dropped: tuple
    realisations_total: int


def _select(L: np.ndarray, samples: np.ndarray) -> _Selected:
    """Lengths with >= 2 usable values and spread, then complete realisations (dropping the
    length with the fewest usable values while fewer than 3 remain)."""
    x = np.asarray(samples, dtype=float)
    fin = np.isfinite(x)
    cols = np.flatnonzero(fin.sum(axis=0) >= 2)
    spread = [j for j in cols if np.nanstd(x[:, j]) > 0]
    cols = np.asarray(spread, dtype=int)
    dropped = [float(v) for v in np.delete(L, cols)]
    rows_any = fin.any(axis=1)
    while cols.size >= 2:
        complete = fin[:, cols].all(axis=1)
        if complete.sum() >= _MIN_REALISATIONS:
            return _Selected(L[cols], x[np.ix_(complete, cols)], tuple(sorted(dropped)),
                             int(rows_any.sum()))
        worst = int(np.argmin(fin[:, cols].sum(axis=0)))
        dropped.append(float(L[cols[worst]]))
        cols = np.delete(cols, worst)
    return _Selected(L[cols], x[:0][:, cols], tuple(sorted(dropped)), int(rows_any.sum()))


# --------------------------------------------------------------------------- the fit
def _rate_to_length(lo: float, hi: float) -> tuple[float, float]:
    """Interval of 1/rate from an interval of the rate (upper end inf when lo <= 0, lower end
    0 when hi is inf; NaN when the rate interval is undefined or below zero)."""
    if math.isnan(lo) or math.isnan(hi) or hi <= 0:
        return math.nan, math.nan
    return (1.0 / hi if hi < math.inf else 0.0), (1.0 / lo if lo > 0 else math.inf)


def _cross_fitted(form: str, L: np.ndarray, x: np.ndarray, rate: float):
    """Cross-fitted GLS: realisation r enters with weights from the other realisations
    (leave-one-out up to :data:`_FOLDS` realisations, else from the other folds).

    Returns the rate (mean of the influence values), the influence values z_r (their mean is
    the rate) and whether the iteration converged.
    """
    n = x.shape[0]
    sd = x.std(axis=0, ddof=1)
    if n <= _FOLDS:  # leave one out, all at once
        loo = np.array([np.delete(np.arange(n), r) for r in range(n)])
        W = np.linalg.inv(_shrunk_batch(x[loo], sd_fallback=sd)[0])
    else:  # _FOLDS folds (row r in fold r mod _FOLDS), one at a time to bound the memory
        fold = np.arange(n) % _FOLDS
        Wf = np.stack([np.linalg.inv(_shrunk_batch(x[fold != f][None], sd_fallback=sd)[0][0])
                       for f in range(_FOLDS)])
        W = Wf[fold]
    z = np.full(n, np.nan)
    for _ in range(50):
        f, J = _model(form, L, rate)
        WJ = W @ J
        info = WJ @ J
        if not np.all(np.isfinite(info) & (info > 0)):
            return rate, z, False
        A = WJ / info[:, None]
        z = rate + np.einsum("rk,rk->r", A, x - f)
        new = float(z.mean())
        done = abs(new - rate) * L.max() < 1e-12
        rate = new
        if done or form == "coherent":
            return rate, z, True
    return rate, z, False


def _johnson_interval(z: np.ndarray, confidence: float) -> tuple[float, float, float]:
    """Interval of the mean of z by Johnson's skewness-corrected t, and the standard error.

    The statistic ``t1 = (d + mu3/(6 s^2 n) + mu3 d^2/(3 s^4)) / (s/sqrt(n))``, d = mean - mu
    (Johnson, J. Am. Stat. Assoc. 73, 536 (1978), from memory), is set to the Student t
    quantile with n - 1 dof at both ends and solved for mu on the branch that tends to the
    plain t interval as mu3 -> 0; no real solution gives an unbounded end.
    """
    n = z.size
    m = float(z.mean())
    s = float(z.std(ddof=1))
    se = s / math.sqrt(n)
    if not se > 0:
        return m, m, 0.0
    mu3 = float(((z - m) ** 3).mean())
    shift, g = mu3 / (6 * s**2 * n), mu3 / (3 * s**4)
    tq = float(stats.t.ppf(0.5 + confidence / 2, n - 1))
    ends = []
    for c in (tq, -tq):
        cc = shift - c * se
        if abs(g * cc) < 1e-12:
            d = -cc
        else:
            disc = 1.0 - 4.0 * g * cc
            if disc < 0:
                ends.append(-math.inf if c > 0 else math.inf)
                continue
            d = (-1.0 + math.sqrt(disc)) / (2.0 * g)
        ends.append(m - d)
    return min(ends), max(ends), se


def gls_fit(form: str, lengths, samples, *, tolerance: float = 0.05,
            confidence: float = 0.95) -> FitResult:
    """Fit one decay form to the per-realisation values of a length sweep.

    Parameters
    ----------
    form : str
        ``"incoherent"`` (samples are t; ``<t> = 1/(1 + L/lambda)``) or ``"coherent"``
        (samples are ln t; ``<ln t> = -L/xi``).
    lengths : array_like
        (K,) lengths (nm), ascending.
    samples : array_like
        (n, K) per-realisation values, NaN where unusable; the same row is the same
        realisation at every length.
    tolerance : float
        For L*_fit: ``lambda tol/(1 - tol)`` or ``-xi ln(1 - tol)``.
    confidence : float
        Level of the intervals.

    Returns
    -------
    FitResult
        With the cross-fitted GLS value, the interval (``value_ci_low``/``value_ci_high``,
        the same for ``lstar``), the generalised chi^2 and its p-value (see the module
        docstring).

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(1)
    >>> L = np.array([100.0, 200.0, 300.0, 400.0])
    >>> lnt = np.cumsum(rng.normal(-0.1, 0.45, size=(32, 4)), axis=1)  # xi = 1000 nm
    >>> fit = gls_fit("coherent", L, lnt)
    >>> bool(fit.value_ci_low < 1000.0 < fit.value_ci_high)
    True
    """
    if form not in ("incoherent", "coherent"):
        raise LStarError(f"form = {form!r} must be 'incoherent' or 'coherent'")
    param = "lambda" if form == "incoherent" else "xi"
    to_lstar = tolerance / (1 - tolerance) if form == "incoherent" else -math.log(1 - tolerance)
    L = np.asarray(lengths, dtype=float)
    sel = _select(L, np.asarray(samples, dtype=float))
    n, k = sel.x.shape

    def failed(msg, **extra):
        return FitResult(form, param, math.nan, math.nan, math.nan, max(k - 1, 0), k, math.nan,
                         math.nan, tolerance, False, msg, confidence=confidence,
                         interval_method=INTERVAL_METHOD, fit_method=FIT_METHOD,
                         realisations=n, test=TEST_METHOD, **extra)

    if k < 2 or n < _MIN_REALISATIONS:
        return failed(f"{k} usable length(s) with {n} complete realisation(s); need at least 2 "
                      f"lengths with spread and {_MIN_REALISATIONS} realisations usable at all of "
                      f"them")
    ybar = sel.x.mean(axis=0)
    S = np.cov(sel.x, rowvar=False, ddof=1)
    shrunk, lam = shrunk_covariance(sel.x)
    try:
        start = gls_rate(form, sel.L, ybar, np.linalg.inv(shrunk))
        rate, z, converged = (_cross_fitted(form, sel.L, sel.x, start) if math.isfinite(start)
                              else (math.nan, None, False))
    except np.linalg.LinAlgError:
        return failed("a shrunk covariance of the means is singular", shrinkage=lam)
    if not (converged and math.isfinite(rate)):
        return failed("Gauss-Newton did not converge", shrinkage=lam)
    low, high, se = _johnson_interval(z, confidence)
    lo, hi = _rate_to_length(low, high)
    f, J = _model(form, sel.L, rate)
    t2, dof, p, _ = hotelling_test(ybar - f, J, S, n)
    common = dict(value_ci_low=lo, value_ci_high=hi, lstar_ci_low=lo * to_lstar,
                  lstar_ci_high=hi * to_lstar, confidence=confidence,
                  interval_method=INTERVAL_METHOD, fit_method=FIT_METHOD, realisations=n,
                  shrinkage=lam, chi2=t2, p_value=p, test=TEST_METHOD)
    chi2_red = t2 / dof if dof > 0 and math.isfinite(t2) else math.nan
    if not rate > 0:
        bound = f"; {param} >= {lo:.4g} nm at {confidence:.0%} confidence" if lo > 0 else ""
        return FitResult(form, param, math.nan, math.nan, chi2_red, dof, k, math.nan, math.nan,
                         tolerance, False,
                         f"no decay resolved (fitted 1/{param} = {rate:.3g} /nm <= 0){bound}",
                         **common)
    value, err = 1.0 / rate, se / rate**2
    return FitResult(form, param, value, err, chi2_red, dof, k, value * to_lstar,
                     err * to_lstar, tolerance, bool(math.isfinite(err)), "", **common)


# --------------------------------------------------------------------------- model choice
def model_choice(incoherent: FitResult, coherent: FitResult,
                 significance: float = SIGNIFICANCE) -> tuple[str, str]:
    """The verdict from the two forms' goodness-of-fit tests.

    Parameters
    ----------
    incoherent, coherent : FitResult
        The two fits (their ``p_value``).
    significance : float
        A form with p < significance is rejected.

    Returns
    -------
    verdict : str
        ``"incoherent"`` or ``"coherent"`` (that form acceptable, the other rejected),
        ``"indistinguishable"`` (both acceptable), ``"neither"`` (both rejected) or
        ``"undetermined"`` (a form could not be fitted or tested).
    reason : str
        One sentence with the p-values.
    """
    def usable(fit):
        return fit.ok and math.isfinite(fit.p_value)

    def says(fit):
        word = "acceptable" if fit.p_value >= significance else "rejected"
        return f"{fit.form} {word} (p = {fit.p_value:.3g})"

    good = [f for f in (incoherent, coherent) if usable(f)]
    if len(good) < 2:
        tested = "; ".join(says(f) for f in good) or "neither form could be fitted and tested"
        return "undetermined", (f"model choice undetermined: {tested}; the other form has no "
                                f"usable fit or test")
    acc = [f.p_value >= significance for f in good]
    text = f"{says(incoherent)}, {says(coherent)} at significance {significance:g}"
    if all(acc):
        return "indistinguishable", f"both forms describe the data: {text}"
    if not any(acc):
        return "neither", f"neither form describes the data: {text}"
    return (incoherent.form if acc[0] else coherent.form), text


def _noncentrality(form: str, L: np.ndarray, W: np.ndarray, decay: float, scale: float) -> float:
    """d^T P d of the other form's mean-field curve against ``form`` at lengths scale*L."""
    x = scale * L / decay
    if form == "incoherent":  # t: exp(-x) against 1/(1 + x)
        d = np.exp(-x) - 1.0 / (1.0 + x)
        J = -scale * L / (1.0 + x) ** 2
    else:  # ln t: -ln(1 + x) against -x
        d = x - np.log1p(x)
        J = -scale * L
    Ws = W / scale
    WJ = Ws @ J
    return float(d @ Ws @ d - (d @ WJ) ** 2 / (J @ WJ))


def distinguishing_effort(lengths, t_samples, lnt_samples, lam: float, xi: float, *,
                          significance: float = SIGNIFICANCE,
                          power: float = POWER) -> tuple[float, float]:
    """Realisations, or a longest length, at which both forms' tests would reject the other.

    Approximation: each form is tested against the other form's *mean-field* curve of the
    same initial slope (fluctuations neglected, <ln t> ~ ln <t>): on t, ``exp(-L/lambda)``
    against ``1/(1 + L/lambda)``; on ln t, ``-ln(1 + L/xi)`` against ``-L/xi``. The two
    agree to first order in L and differ at second order (``L^2/(2 lambda^2)``). The part of
    the difference d that the fitted parameter cannot absorb gives the noncentrality
    ``Delta = d^T P d``, ``P = W - W J (J^T W J)^-1 J^T W``, W the inverse shrunk covariance
    of the means, J the form's derivative in its rate. A one-degree-of-freedom test at
    ``significance`` reaches ``power`` when Delta = (z_{1-significance/2} + z_power)^2
    (normal approximation); both tests must reach it, since which form is true is unknown.
    Delta grows linearly with the realisations; for longer lengths (the swept lengths scaled
    by a common factor) the covariance of the means is assumed to grow linearly with L (as
    for the log-normal law, var ln t = 2L/xi, Beenakker, Rev. Mod. Phys. 69, 731 (1997), and
    for independent scatterers adding along the edge).

    Parameters
    ----------
    lengths : array_like
        (K,) lengths (nm).
    t_samples, lnt_samples : array_like
        (n, K) t and ln t per realisation (NaN where unusable).
    lam, xi : float
        The fitted lambda and xi (nm).
    significance, power : float
        Of the hypothetical tests.

    Returns
    -------
    realisations : float
        Realisations needed at the swept lengths (NaN if not computable).
    longest_length : float
        Longest length (nm) of the swept lengths scaled by the smallest common factor that
        would do with the present realisations (NaN if not computable or if no factor up to
        1000 would).
    """
    L = np.asarray(lengths, dtype=float)
    target = float((stats.norm.ppf(1 - significance / 2) + stats.norm.ppf(power)) ** 2)
    parts = []
    for form, samples, decay in (("incoherent", t_samples, lam), ("coherent", lnt_samples, xi)):
        sel = _select(L, np.asarray(samples, dtype=float))
        n, k = sel.x.shape
        if k < 2 or n < _MIN_REALISATIONS or not (math.isfinite(decay) and decay > 0):
            return math.nan, math.nan
        shrunk, _ = shrunk_covariance(sel.x)
        parts.append((form, sel.L, np.linalg.inv(shrunk / n), decay, n))

    def weakest(scale):
        return min(_noncentrality(f, Ls, W, dec, scale) for f, Ls, W, dec, _ in parts)

    now = weakest(1.0)
    if not now > 0:
        return math.nan, math.nan
    n_needed = float(math.ceil(max(p[4] for p in parts) * target / now))
    longest = max(float(p[1].max()) for p in parts)
    if now >= target:
        return n_needed, longest
    # not monotone in the scale (on t the two curves meet again at long lengths): the first
    # grid point that reaches the target, refined by bisection from the one before
    grid = np.geomspace(1.0, 1000.0, 241)
    reach = [weakest(g) >= target for g in grid]
    if not any(reach):
        return n_needed, math.nan
    i = reach.index(True)
    lo, hi = float(grid[i - 1]), float(grid[i])
    for _ in range(60):
        mid = math.sqrt(lo * hi)
        lo, hi = (mid, hi) if weakest(mid) < target else (lo, mid)
    return n_needed, longest * hi


# --------------------------------------------------------------------------- former method
def independent_fit(form: str, lengths, mean, sem, *, tolerance: float = 0.05) -> FitResult:
    """The former fit: per-length means treated as independent (kept for comparison only).

    Weighted least squares with ``sigma = sem`` (``scipy.optimize.curve_fit``,
    ``absolute_sigma=True``); ignores the correlation between lengths, so on a length sweep
    its errors, chi^2 and verdicts are wrong (measured in docs/statistics-lengths.md).

    Parameters
    ----------
    form : str
        ``"incoherent"`` (mean of t) or ``"coherent"`` (mean of ln t).
    lengths, mean, sem : array_like
        Lengths (nm), per-length mean and standard error.
    tolerance : float
        For L*_fit.

    Returns
    -------
    FitResult
        ``error`` is sqrt of the curve_fit covariance; no interval fields.
    """
    L = np.asarray(lengths, dtype=float)
    y, s = np.asarray(mean, dtype=float), np.asarray(sem, dtype=float)
    use = np.isfinite(y) & np.isfinite(s) & (s > 0)
    param = "lambda" if form == "incoherent" else "xi"
    to_lstar = tolerance / (1 - tolerance) if form == "incoherent" else -math.log(1 - tolerance)
    n = int(use.sum())
    if n < 2:
        return FitResult(form, param, math.nan, math.nan, math.nan, 0, n, math.nan, math.nan,
                         tolerance, False, "fewer than 2 usable lengths")
    if form == "incoherent":
        def model(x, lam):
            return 1.0 / (1.0 + x / lam)
        inside = use & (y > 0) & (y < 1) & (L > 0)
        p0 = float(np.median(L[inside] * y[inside] / (1 - y[inside]))) if inside.any() else 100 * L.max()
    else:
        def model(x, xi):
            return -x / xi
        w = 1.0 / s[use] ** 2
        slope = -np.sum(w * L[use] * y[use]) / np.sum(w * L[use] ** 2)
        p0 = 1.0 / slope if slope > 0 else 100 * L.max()
    try:
        popt, pcov = curve_fit(model, L[use], y[use], p0=[max(p0, 1e-6)], sigma=s[use],
                               absolute_sigma=True, maxfev=20000)
    except (RuntimeError, ValueError) as exc:
        return FitResult(form, param, math.nan, math.nan, math.nan, n - 1, n, math.nan,
                         math.nan, tolerance, False, f"curve_fit did not converge ({exc})")
    value = float(popt[0])
    err = float(np.sqrt(pcov[0, 0])) if np.isfinite(pcov[0, 0]) and pcov[0, 0] >= 0 else math.nan
    chi2 = float(np.sum(((y[use] - model(L[use], value)) / s[use]) ** 2))
    return FitResult(form, param, value, err, chi2 / (n - 1), n - 1, n, value * to_lstar,
                     abs(err * to_lstar), tolerance, bool(value > 0 and math.isfinite(err)), "",
                     chi2=chi2, p_value=float(stats.chi2.sf(chi2, n - 1)),
                     fit_method="independent weighted least squares (former method)",
                     test="chi^2 with independent lengths (former method)")
