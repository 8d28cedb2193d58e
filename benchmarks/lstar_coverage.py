"""Measured coverage of the L* length fits on synthetic correlated length sweeps.

Run from the repository root::

    .venv/bin/python benchmarks/lstar_coverage.py            # full run (2000 sweeps per cell)
    .venv/bin/python benchmarks/lstar_coverage.py --smoke    # a fast check (its numbers are rough)

Every synthetic sweep is a *growing sample*: realisation r is a chain of segments of length
``l``; the sample of length L_k consists of its first ``k m`` segments, so a longer sample
extends a shorter one with the same disorder, as in a length sweep. The answer is known
exactly:

* ``coherent-gauss``: ln t_r(L_k) = sum of the first k m iid per-segment increments with mean
  -l/xi and variance 2 l/xi (Gaussian), so <ln t> = -L/xi exactly and ln t is normal with
  var 2 L/xi (the log-normal law, Beenakker, Rev. Mod. Phys. 69, 731 (1997));
* ``coherent-gamma``: the same with -increment ~ Gamma(shape l/(2 xi), scale 2) (same mean
  and variance; t <= 1 always, like a transmission);
* ``incoherent``: t_r(L_k) = 1/(1 + L_k/lambda) + the sum of the first k m iid N(0, s^2)
  per-segment increments, s^2 = 0.04 l/lambda, so <t> = 1/(1 + L/lambda) exactly.

For each cell (model, realisations n, lengths K) the script draws ``--sweeps`` sweeps and
reports, for the form that generated the data:

* the coverage of the new interval (GLS with the shrunk covariance, sandwich standard error,
  Student t with n - 1 dof; :func:`pipeline.analysis.lstar_fits.gls_fit`) of lambda or xi at
  95 %; L*_fit is proportional to it, so its interval covers exactly when this one does;
* the coverage of the former method (per-length means treated as independent,
  ``curve_fit`` error, value +- 1.96 error; :func:`~pipeline.analysis.lstar_fits.independent_fit`);
* how often each test rejects the true form at 5 % (should be about 5 %), and how often the
  new verdict names the true form, "indistinguishable", the other form or "neither".

The output is Markdown; docs/statistics-lengths.md holds the recorded full run.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import math  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.analysis.lstar_fits import (  # noqa: E402
    SIGNIFICANCE,
    gls_fit,
    independent_fit,
    model_choice,
)

MODELS = ("coherent-gauss", "coherent-gamma", "incoherent")
#: the decay length of every synthetic model (nm)
DECAY = 1000.0
#: segment length (nm) and segments per length step
SEGMENT = 25.0
#: longest swept length (nm): L_max / decay = 1
LONGEST = 1000.0


def lengths_for(k: int) -> np.ndarray:
    """K equally spaced lengths up to :data:`LONGEST` (whole numbers of segments)."""
    steps = int(round(LONGEST / SEGMENT / k))
    return SEGMENT * steps * np.arange(1, k + 1)


def synthetic_sweeps(model: str, n: int, k: int, sweeps: int, rng) -> tuple[np.ndarray, np.ndarray]:
    """``sweeps`` growing-sample length sweeps of n realisations at K lengths.

    Parameters
    ----------
    model : str
        One of :data:`MODELS`.
    n, k, sweeps : int
        Realisations, lengths, sweeps.
    rng : numpy.random.Generator

    Returns
    -------
    lengths : numpy.ndarray
        (K,) nm.
    t : numpy.ndarray
        (sweeps, n, K) normalised transmission.
    """
    L = lengths_for(k)
    per = int(round(L[0] / SEGMENT))
    segs = per * k
    rate = SEGMENT / DECAY
    if model == "coherent-gauss":
        inc = rng.normal(-rate, math.sqrt(2 * rate), size=(sweeps, n, segs))
    elif model == "coherent-gamma":
        inc = -rng.gamma(rate / 2, 2.0, size=(sweeps, n, segs))
    elif model == "incoherent":
        inc = rng.normal(0.0, math.sqrt(0.04 * rate), size=(sweeps, n, segs))
    else:
        raise ValueError(f"model {model!r} is not one of {MODELS!r}")
    walk = np.cumsum(inc, axis=-1)[..., per - 1::per]
    if model == "incoherent":
        return L, 1.0 / (1.0 + L / DECAY) + walk
    return L, np.exp(walk)


def _lnt(t: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(t > 0, np.log(np.where(t > 0, t, 1.0)), np.nan)


def _mean_sem(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    ok = np.isfinite(x)
    m = np.nanmean(x, axis=0)
    return m, np.nanstd(x, axis=0, ddof=1) / np.sqrt(ok.sum(axis=0))


def run_cell(model: str, n: int, k: int, sweeps: int, seed: int) -> dict:
    """Coverage, rejection rates and verdicts of one cell.

    Returns
    -------
    dict
        ``new_cover``, ``old_cover`` (fractions of sweeps whose interval contains the true
        length), ``new_reject``, ``old_reject`` (the true form rejected at 5 %), ``verdicts``
        (counts), ``width_ratio`` (median new 95 % width / old +-1.96 error width, bounded
        intervals), ``unbounded`` (fraction of new intervals with an end at 0 or inf),
        ``failed`` (fits without an interval).
    """
    rng = np.random.default_rng(seed)
    L, t = synthetic_sweeps(model, n, k, sweeps, rng)
    true_form = "incoherent" if model == "incoherent" else "coherent"
    new_cover = old_cover = new_reject = old_reject = failed = unbounded = 0
    verdicts: dict[str, int] = {}
    ratios = []
    for s in range(sweeps):
        ts, ls = t[s], _lnt(t[s])
        inc = gls_fit("incoherent", L, ts)
        coh = gls_fit("coherent", L, ls)
        fit = inc if true_form == "incoherent" else coh
        data = ts if true_form == "incoherent" else ls
        old = independent_fit(true_form, L, *_mean_sem(data))
        verdict, _ = model_choice(inc, coh, SIGNIFICANCE)
        verdicts[verdict] = verdicts.get(verdict, 0) + 1
        if math.isnan(fit.value_ci_low):
            failed += 1
        elif not (fit.value_ci_low > 0 and math.isfinite(fit.value_ci_high)):
            unbounded += 1
        new_cover += fit.value_ci_low <= DECAY <= fit.value_ci_high
        new_reject += fit.p_value < SIGNIFICANCE
        old_cover += abs(old.value - DECAY) <= 1.96 * old.error
        old_reject += old.p_value < SIGNIFICANCE
        if math.isfinite(fit.value_ci_high) and old.error > 0:
            ratios.append((fit.value_ci_high - fit.value_ci_low) / (2 * 1.96 * old.error))
    return {"new_cover": new_cover / sweeps, "old_cover": old_cover / sweeps,
            "new_reject": new_reject / sweeps, "old_reject": old_reject / sweeps,
            "verdicts": verdicts, "failed": failed, "unbounded": unbounded / sweeps,
            "width_ratio": float(np.median(ratios)) if ratios else math.nan}


def _binomial_se(p: float, m: int) -> float:
    return math.sqrt(max(p * (1 - p), 1e-12) / m)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--smoke", action="store_true", help="200 sweeps per cell, a fast check")
    parser.add_argument("--sweeps", type=int, default=None, help="sweeps per cell (default 2000)")
    parser.add_argument("--seed", type=int, default=20261203)
    args = parser.parse_args(argv)
    sweeps = args.sweeps or (200 if args.smoke else 2000)
    if sweeps < 10:
        parser.error(f"--sweeps = {sweeps} is too few to measure a coverage; give at least 10 (better 1000)")
    start = time.perf_counter()
    print("# L* fit coverage on synthetic growing-sample length sweeps\n")
    print(f"command: `.venv/bin/python benchmarks/lstar_coverage.py"
          f"{' --smoke' if args.smoke else ''}{f' --sweeps {args.sweeps}' if args.sweeps else ''}"
          f"{f' --seed {args.seed}' if args.seed != 20261203 else ''}`; {sweeps} sweeps per cell, "
          f"seed {args.seed}; true decay length {DECAY:g} nm, lengths up to {LONGEST:g} nm, "
          f"segment {SEGMENT:g} nm; nominal level 95 %, tests at {SIGNIFICANCE:g}.\n")
    print("| model | n | K | new coverage | old coverage | new width / old width | "
          "unbounded | true form rejected (new test) | true form rejected (old chi^2) | "
          "verdicts | failed fits |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for i, model in enumerate(MODELS):
        for j, n in enumerate((16, 32)):
            for m, k in enumerate((5, 8)):
                r = run_cell(model, n, k, sweeps, args.seed + 100 * i + 10 * j + m)
                v = ", ".join(f"{key} {val / sweeps:.1%}" for key, val in sorted(r["verdicts"].items()))
                print(f"| {model} | {n} | {k} | {r['new_cover']:.3f} +- "
                      f"{_binomial_se(r['new_cover'], sweeps):.3f} | {r['old_cover']:.3f} +- "
                      f"{_binomial_se(r['old_cover'], sweeps):.3f} | {r['width_ratio']:.2f} | "
                      f"{r['unbounded']:.3f} | "
                      f"{r['new_reject']:.3f} | {r['old_reject']:.3f} | {v} | {r['failed']} |",
                      flush=True)
    print(f"\n(+- is the binomial standard error of the measured coverage; wall time "
          f"{time.perf_counter() - start:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
