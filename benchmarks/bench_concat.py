"""CPU time of <G> at a 20 um edge by segment concatenation versus direct solves at 2 um.

Run from the repository root::

    .venv/bin/python benchmarks/bench_concat.py            # print the Markdown table
    .venv/bin/python benchmarks/bench_concat.py --write    # also write docs/benchmarks-concat.md
    .venv/bin/python benchmarks/bench_concat.py --smoke    # tiny pool (a check, not a result)

The model is the 7 nm HgTe well (BHZ, a = 5 nm) in a 220 nm wide strip at E = 1 meV (in the
bulk gap) with dilute in-plane magnetic impurities (8 meV, 0.004 nm^-2): the helical edges
backscatter. Concatenation solves a pool of 1 um segments (clean buffers chosen
automatically for exp(-2 b / l_ev) <= 1e-6) and composes random sequences of 20 of them;
the direct ensemble solves 2 um strips (the same disorder pattern, 2 segments long). CPU
times are ``time.process_time`` of this process (BLAS and OpenMP pinned to one thread).

Segments and direct strips are solved by the pipeline's scattering solve
(``pipeline.transport.scattering.ScatteringProblem.smatrix``, through
``pipeline.longedges.modes.StripScatterer``); the report also times one segment's solve that
way against Kwant's own ``smatrix`` on the same system and checks that the two S-matrices
agree.
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import datetime as _dt  # noqa: E402
import gc  # noqa: E402
import platform  # noqa: E402
import shlex  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from pipeline.errors import ConcatenationWarning  # noqa: E402
from pipeline.longedges.compose import concatenated_conductance  # noqa: E402
from pipeline.longedges.direct import direct_conductance  # noqa: E402
from pipeline.longedges.modes import StripScatterer  # noqa: E402
from pipeline.longedges.pools import segment_smatrices  # noqa: E402
from pipeline.physics.disorder import MagneticExchange, realise  # noqa: E402
from pipeline.physics.materials import PRESETS  # noqa: E402
from pipeline.transport.solver import MUMPS_ORDERING, SOLVER, SOLVER_NAME  # noqa: E402

WIDTH = 220.0  # nm
SEGMENT = 1000.0  # nm
ENERGY = 1.0  # meV
TARGET = 20  # segments: 20 um
DIRECT = 2  # segments: 2 um
TERMS = [MagneticExchange(inplane=8.0, density=0.004, aligned=False)]


def _cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def _git() -> str:
    try:
        rev = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT,
                             capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"],
                               cwd=ROOT, capture_output=True, text=True).stdout.strip()
    except OSError:
        return "unknown"
    return (rev + (" + uncommitted changes" if dirty else "")) if rev else "unknown"


def solve_path(repeats: int, rows: int, columns: int) -> dict:
    """One segment's solve through the pool's path against Kwant's ``smatrix``.

    The same strip system (precalculated leads) and params: ``StripScatterer.problem.smatrix``
    (the pipeline's assembled solve, analysis reused) and ``SOLVER.smatrix`` (Kwant's own
    linear system with the project's MUMPS settings), interleaved, wall time per solve.
    """
    material = PRESETS["hgte-7.0nm"]
    strip = StripScatterer(material, 5.0, rows, columns, ENERGY, 0.0)
    times = {"pipeline": [], "kwant": []}
    worst = 0.0
    for r in range(repeats + 1):  # realisation 0: untimed warm-up (MUMPS analysis)
        pot, extra = realise(TERMS, strip.dsys.mesh, seed=11, realisation=r,
                             outline=strip.device.outline, contacts=strip.device.contacts)
        params = strip.dsys.params(potential=pot, onsite_extra=extra)
        out = {}
        for name in (("pipeline", "kwant") if r % 2 == 0 else ("kwant", "pipeline")):
            gc.collect()
            t = time.perf_counter()
            if name == "pipeline":
                out[name] = strip.problem.smatrix(ENERGY, params, fsyst=strip.fsyst).data
            else:
                out[name] = SOLVER.smatrix(strip.fsyst, ENERGY, params=params).data
            if r:
                times[name].append(time.perf_counter() - t)
        worst = max(worst, float(np.abs(out["pipeline"] - out["kwant"]).max()))
    return {name: statistics.median(v) for name, v in times.items()} | {
        "max_dS": worst, "repeats": repeats, "sites": rows * columns}


def _timed(fn, *args, **kwargs):
    c0, w0 = time.process_time(), time.perf_counter()
    out = fn(*args, **kwargs)
    return out, time.process_time() - c0, time.perf_counter() - w0


def run(pool_size: int, realisations: int, sequences: int, *, solve_repeats: int,
        command: str, smoke: bool = False) -> str:
    import kwant

    load_start = os.getloadavg()
    date = _dt.datetime.now().astimezone().isoformat(timespec="seconds")
    material = PRESETS["hgte-7.0nm"]
    path = solve_path(solve_repeats, round(WIDTH / 5.0), round(SEGMENT / 5.0))
    pool, cpu_pool, wall_pool = _timed(
        segment_smatrices, material, 5.0, WIDTH, SEGMENT, TERMS, energy=ENERGY,
        n_segments=pool_size, seed=11)
    coh, cpu_coh, _ = _timed(concatenated_conductance, pool, [DIRECT, TARGET], sequences,
                             seed=5, mode="coherent", pool_resamples=100)
    inc, cpu_inc, _ = _timed(concatenated_conductance, pool, [DIRECT, TARGET], sequences,
                             seed=5, mode="incoherent", pool_resamples=100)
    direct, cpu_dir, wall_dir = _timed(direct_conductance, pool, DIRECT, realisations,
                                       seed=999)
    g_dir = direct["conductance"].values[0]
    per_segment = cpu_pool / pool_size
    per_direct = cpu_dir / realisations
    cpu_concat = cpu_pool + cpu_coh
    ratio = cpu_concat / cpu_dir
    # a direct 20 um ensemble giving the same standard error of <G> as the concatenation,
    # if the cost of a strip solve grows linearly with its length (as measured between the
    # 1 um segments and the 2 um strips)
    spread = float(coh["conductance"].isel(length=1).std(ddof=1))
    n_equal = (spread / float(coh["conductance_sem_pool"][1])) ** 2
    direct20 = per_direct * TARGET / DIRECT * n_equal
    load_end = os.getloadavg()

    def gstr(ds, i, key="conductance_sem_pool"):
        return (f"{float(ds['conductance_mean'][i]):.3f} +- {float(ds[key][i]):.3f}")

    lines = [
        "# Benchmark: edge concatenation versus direct solves",
        "",
    ]
    if smoke:
        lines += ["> **SMOKE TEST: a tiny pool. These numbers only show that the script runs; "
                  "they are NOT results.**", ""]
    lines += [
        f"Machine: {os.cpu_count()} CPU(s) (`nproc`), {_cpu_model()}; Python "
        f"{platform.python_version()}, Kwant {kwant.__version__} with the {SOLVER_NAME} solver "
        f"(ordering {MUMPS_ORDERING}); OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}. "
        f"Load average (1, 5, 15 min) at start {load_start[0]:.2f}, {load_start[1]:.2f}, "
        f"{load_start[2]:.2f}; at end {load_end[0]:.2f}, {load_end[1]:.2f}, {load_end[2]:.2f}.",
        "",
        f"Command: `{command}`  ",
        f"Date: {date}; git {_git()}",
        "",
        f"Model: HgTe 7 nm (BHZ, a = 5 nm), strip {WIDTH:g} nm wide, E = {ENERGY:g} meV, "
        f"in-plane magnetic impurities 8 meV at 0.004 nm^-2. Segments {SEGMENT:g} nm with "
        f"{pool.buffer:g} nm clean buffers (l_ev = {pool.evanescent_length:.1f} nm, "
        f"exp(-2b/l_ev) = {pool.evanescent_bound:.1e}).",
        "",
        "| what | samples | CPU time (s) | wall time (s) |",
        "|---|---|---|---|",
        f"| segment pool, {SEGMENT / 1000:g} um segments | {pool_size} | {cpu_pool:.1f} | "
        f"{wall_pool:.1f} |",
        f"| coherent composition, 2 and 20 um, 100 pool resamples | {sequences} sequences | "
        f"{cpu_coh:.1f} | |",
        f"| incoherent composition, 2 and 20 um, 100 pool resamples | {sequences} sequences | "
        f"{cpu_inc:.1f} | |",
        f"| direct solves at {DIRECT * SEGMENT / 1000:g} um | {realisations} | {cpu_dir:.1f} | "
        f"{wall_dir:.1f} |",
        "",
        "| quantity | value |",
        "|---|---|",
        f"| CPU per segment solve (1 um) | {per_segment:.2f} s |",
        f"| CPU per direct solve (2 um) | {per_direct:.2f} s |",
        f"| **CPU(<G> at 20 um by concatenation) / CPU(<G> at 2 um direct)** | "
        f"**{ratio:.2f}** ({cpu_concat:.0f} s / {cpu_dir:.0f} s) |",
        f"| estimated CPU of a direct 20 um ensemble with the same error of <G> "
        f"({n_equal:.0f} solves of 20 um, cost linear in L) | "
        f"{direct20:.0f} s ({direct20 / cpu_concat:.0f} x the concatenation) |",
        f"| <G> at 2 um, direct ({realisations}) | {g_dir.mean():.3f} +- "
        f"{g_dir.std(ddof=1) / np.sqrt(g_dir.size):.3f} e^2/h |",
        f"| <G> at 2 um, concatenated coherent / incoherent | {gstr(coh, 0)} / {gstr(inc, 0)} "
        f"e^2/h |",
        f"| <G> at 20 um, concatenated coherent / incoherent | {gstr(coh, 1)} / {gstr(inc, 1)} "
        f"e^2/h |",
        f"| largest composition error (coherent ‖S†S−1‖ / incoherent) | "
        f"{coh.attrs['max_composition_error']:.1e} / {inc.attrs['max_composition_error']:.1e} |",
        "",
        f"Segment solves (pool and direct strips) go through the pipeline's scattering solve, "
        f"`ScatteringProblem.smatrix` (assembled once per strip, MUMPS analysis reused, sparse "
        f"right-hand sides). One {SEGMENT:g} nm segment ({path['sites']:,} sites, four bands: "
        f"the impurities mix the spins), median wall time per solve over {path['repeats']} "
        f"realisations, interleaved: {path['pipeline']:.3f} s through that path against "
        f"{path['kwant']:.3f} s with Kwant's own `smatrix` (same system, precalculated leads, "
        f"the project's MUMPS settings), {path['pipeline'] / path['kwant']:.2f}x; the two "
        f"S-matrices agree to {path['max_dS']:.1e} (largest |ΔS|).",
        "",
        "Errors are standard errors of the mean from resampling the segment pool (sequences share "
        "segments); the direct error is the plain standard error. The ratio compares equal "
        "numbers of disorder solves (pool size = direct realisations); sequences drawn from the "
        "pool cost only the composition. When S_z is conserved (no in-plane exchange, no BIA) "
        "segments could also be solved per spin block (two half-size solves, or one at zero "
        "field; not measured here, and not applicable: the magnetic impurities mix the spins).",
        "",
    ]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--pool", type=int, default=40, help="segments in the pool")
    parser.add_argument("--realisations", type=int, default=40, help="direct 2 um solves")
    parser.add_argument("--sequences", type=int, default=2000, help="sequences per length")
    parser.add_argument("--solve-repeats", type=int, default=None,
                        help="realisations of the solve-path comparison (default 7; "
                             "--smoke 1)")
    parser.add_argument("--smoke", action="store_true",
                        help="a tiny pool (4 segments, 4 direct solves, 50 sequences): "
                             "checks the script runs")
    parser.add_argument("--write", nargs="?", const=str(ROOT / "docs" / "benchmarks-concat.md"),
                        default=None, metavar="PATH",
                        help="write the report there (default docs/benchmarks-concat.md)")
    args = parser.parse_args(argv)
    if args.smoke:
        args.pool, args.realisations, args.sequences = 4, 4, 50
    if args.solve_repeats is None:
        args.solve_repeats = 1 if args.smoke else 7
    for name in ("pool", "realisations", "sequences", "solve_repeats"):
        if getattr(args, name) < (2 if name != "solve_repeats" else 1):
            parser.error(f"--{name.replace('_', '-')} is too small: {getattr(args, name)}")
    shown = argv if argv is not None else sys.argv[1:]
    command = " ".join(shlex.quote(a) for a in
                       ["OPENBLAS_NUM_THREADS=1", ".venv/bin/python",
                        "benchmarks/bench_concat.py", *shown])
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConcatenationWarning)  # the setup must be clean
        text = run(args.pool, args.realisations, args.sequences,
                   solve_repeats=args.solve_repeats, command=command, smoke=args.smoke)
    print(text)
    if args.write:
        Path(args.write).write_text(text)
        print(f"written to {args.write}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
