"""Measured coverage of the summary's interval of the mean on synthetic ensembles.

Run from the repository root::

    .venv/bin/python benchmarks/interval_coverage.py            # full table (a few minutes)
    .venv/bin/python benchmarks/interval_coverage.py --smoke    # toy sizes, for the tests

For every shape and ensemble size ``n`` the script draws ``--ensembles`` independent
ensembles of ``n`` samples from a distribution whose mean is known exactly, computes each
ensemble's 95 % interval with the summary's own code (:func:`row_statistics`: the studentized
bootstrap with widened tails) and with the plain percentile bootstrap, and counts how often
the interval holds the true mean. It also counts how often the sparse-tail check flags an
ensemble. The shapes (invented; they mimic what disorder ensembles look like):

* ``normal``: N(2, 0.1) (a sanity check: both rules should be near 95 %);
* ``one-sided``: 2 - Exp(scale 0.05), a conductance bounded above by its quantised value;
* ``log-normal``: exp(N(-5, 1)), t deep in the localised regime;
* ``rare``: 2 - Exp(0.01) with probability 0.9, else 1.2 + N(0, 0.05): rare large deviations.

The Monte-Carlo standard error of a coverage near 95 % is sqrt(0.95 * 0.05 / ensembles)
(0.22 % at 10000 ensembles). Everything is seeded: the same command prints the same table.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from pipeline.analysis.statistics import (  # noqa: E402
    IntervalFlag,
    bootstrap_mean_ci,
    resample_uniforms,
    row_statistics,
)

SHAPES = ("normal", "one-sided", "log-normal", "rare")


def draw(shape: str, rng: np.random.Generator, size: tuple[int, int]) -> tuple[np.ndarray, float]:
    """Samples of a synthetic shape and its exact mean."""
    if shape == "normal":
        return rng.normal(2.0, 0.1, size), 2.0
    if shape == "one-sided":
        return 2.0 - rng.exponential(0.05, size), 1.95
    if shape == "log-normal":
        # mean of a log-normal: exp(mu + sigma^2 / 2)
        return np.exp(rng.normal(-5.0, 1.0, size)), float(np.exp(-5.0 + 0.5))
    if shape == "rare":
        rare = rng.random(size) < 0.1
        x = np.where(rare, 1.2 + rng.normal(0.0, 0.05, size), 2.0 - rng.exponential(0.01, size))
        return x, 0.9 * (2.0 - 0.01) + 0.1 * 1.2
    raise ValueError(f"unknown shape {shape!r}; choose from {SHAPES!r}")


def coverage_cell(shape: str, n: int, ensembles: int, resamples: int, seed: int) -> dict:
    """Coverage of both interval rules and the flag rates for one shape and size."""
    rng = np.random.default_rng([seed, SHAPES.index(shape), n])
    x, mu = draw(shape, rng, (ensembles, n))
    valid = np.ones_like(x, dtype=bool)
    u = resample_uniforms(resamples, n, seed)
    st = row_statistics(x, valid, u, 0.95, full=False)
    hit = (st["ci_low"] <= mu) & (mu <= st["ci_high"])
    p_low, p_high = bootstrap_mean_ci(x, resamples=resamples, seed=seed, method="percentile")
    flagged = st["ci_flag"] == IntervalFlag.SPARSE_TAIL
    need = st["realisations_needed"][flagged]
    return {
        "shape": shape, "n": n,
        "percentile": float(np.mean((p_low <= mu) & (mu <= p_high))),
        "studentized": float(np.mean(hit)),
        "flagged": float(np.mean(flagged)),
        "unflagged_coverage": float(np.mean(hit[~flagged])) if (~flagged).any() else float("nan"),
        "needed_median": int(np.median(need)) if need.size else 0,
        "width_ratio": float(np.median((st["ci_high"] - st["ci_low"]) / (p_high - p_low))),
    }


def table(rows: list[dict]) -> str:
    """The coverage table in Markdown."""
    out = ["| shape | n | percentile | studentized (summary) | flagged sparse tail | "
           "studentized, unflagged | median realisations needed (flagged) | "
           "width / percentile width |",
           "|---|---|---|---|---|---|---|---|"]
    for r in rows:
        out.append(f"| {r['shape']} | {r['n']} | {r['percentile']:.1%} | {r['studentized']:.1%} | "
                   f"{r['flagged']:.1%} | {r['unflagged_coverage']:.1%} | {r['needed_median']} | "
                   f"{r['width_ratio']:.2f} |")
    return "\n".join(out)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--ensembles", type=int, default=10000, help="ensembles per cell (10000)")
    ap.add_argument("--resamples", type=int, default=2000, help="bootstrap resamples (2000)")
    ap.add_argument("--sizes", type=int, nargs="+", default=[8, 16, 32, 64],
                    help="ensemble sizes n (8 16 32 64)")
    ap.add_argument("--seed", type=int, default=2026, help="seed of everything (2026)")
    ap.add_argument("--smoke", action="store_true",
                    help="200 ensembles, 400 resamples, n = 16 (numbers mean little)")
    args = ap.parse_args(argv)
    if args.smoke:
        args.ensembles, args.resamples, args.sizes = 200, 400, [16]
    t0 = time.monotonic()
    rows = [coverage_cell(shape, n, args.ensembles, args.resamples, args.seed)
            for shape in SHAPES for n in args.sizes]
    print(f"Coverage of the 95 % interval of the mean: {args.ensembles} ensembles per cell, "
          f"{args.resamples} resamples, seed {args.seed}; Monte-Carlo standard error "
          f"{np.sqrt(0.95 * 0.05 / args.ensembles):.1%} at 95 %.\n")
    print(table(rows))
    print(f"\n({time.monotonic() - t0:.0f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
