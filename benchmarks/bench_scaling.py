"""Scaling of the pipeline's per-sample cost and peak memory with the number of sites.

For strips and H-bars from about 1e4 to 1e6 lattice sites (and a four-band strip series at
the smaller sizes, the solve used when S_z is not conserved) each size runs in a fresh
subprocess: it builds the system through the pipeline (``solve_realisation``'s warm-up:
Kwant system, lead modes, MUMPS analysis and a first sample), then times a few more
samples. The peak memory is the subprocess's ``VmHWM`` (see ``bench_pipeline._peak_rss_mb``),
read after the build and at the end. The parent watches each subprocess's resident set and
stops a size that passes ``--memory-limit-gib`` (default 20 GiB) or runs longer than
``--size-timeout`` seconds, and skips a size whose extrapolated peak would not fit.

The report gives log-log least-squares exponents of the per-sample cost and of the peak
memory above the import baseline, the largest device whose extrapolated peak fits in
24 GiB, and the preflight estimate (``pipeline.system.preflight.estimate_memory_mb``)
against every measured peak.

Run from the repository root on an idle machine::

    .venv/bin/python benchmarks/bench_scaling.py --write     # -> docs/benchmarks-scaling.md
    .venv/bin/python benchmarks/bench_scaling.py --smoke     # toy sizes (a check)
"""

from __future__ import annotations

# One BLAS/OpenMP thread, set before NumPy is imported (bench_pipeline does the same).
import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import shlex  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))

from bench_pipeline import (  # noqa: E402
    REPO,
    Case,
    Settings,
    _config,
    _f,
    _median,
    _peak_rss_mb,
    _samples_per_task,
    machine_description,
)

DEFAULT_DOC = REPO / "docs" / "benchmarks-scaling.md"
#: target numbers of sites of the default run, per series
DEFAULT_SITES = {"strip": [1e4, 3e4, 1e5, 3e5, 1e6], "hbar": [1e4, 3e4, 1e5, 3e5, 1e6],
                 "strip4": [1e4, 3e4, 1e5, 3e5]}
SMOKE_SITES = {"strip": [300, 1000], "hbar": [300, 1000], "strip4": [300]}
SERIES_TITLES = {"strip": "strip, spin block (S_z conserved: the pipeline's default path)",
                 "hbar": "H-bar, spin block",
                 "strip4": "strip, four-band (spin blocks off: the path with in-plane "
                           "exchange or BIA)"}
#: memory the extrapolation asks about
TARGET_GIB = 24.0
#: preflight estimate within this fraction of the measured peak
ESTIMATE_TOLERANCE = 0.30
#: strip aspect ratio L / W (as the 200x80-site strip of bench_pipeline)
STRIP_ASPECT = 2.5
#: the H-bar of bench_pipeline (bridge L x W, bars AL beyond it, AW wide) scaled uniformly
HBAR_SHAPE = (120, 40, 40, 40)


def case_for(series: str, n_sites: float) -> Case:
    """A strip (L = 2.5 W) or an H-bar of the shape of ``HBAR_SHAPE`` with about n sites."""
    if series in ("strip", "strip4"):
        w = max(2, round(math.sqrt(n_sites / STRIP_ASPECT)))
        return Case.parse(f"strip:{max(2, round(n_sites / w))}x{w}")
    ref = Case.parse("hbar:" + "x".join(map(str, HBAR_SHAPE)))
    s = math.sqrt(n_sites / ref.n_sites)
    return Case.parse("hbar:" + "x".join(str(max(2, round(d * s))) for d in HBAR_SHAPE))


# ------------------------------------------------------------------------------ subprocess
def probe_main(spec: dict) -> None:
    """Subprocess entry: build, warm up, time samples; print JSON lines as it goes."""
    from pipeline.sweep.tasks import solve_realisation, system_for
    from pipeline.transport.scattering import problem_for

    settings = Settings(**spec["settings"])
    case = Case.parse(spec["case"])
    if spec.get("baseline"):
        import pipeline.sweep.driver  # noqa: F401

        print(json.dumps({"peak_rss_mb": _peak_rss_mb()}), flush=True)
        return
    cfg = _config(case, settings, 1000, spec["workdir"],
                  spin_blocks="off" if spec["four_band"] else "auto")
    t0 = time.perf_counter()
    dsys = system_for(cfg, 0, reduced=True)
    build_s = time.perf_counter() - t0
    out = {"build_s": build_s, "build_peak_mb": _peak_rss_mb(),
           "norbs": 2 if dsys.spin_block else 4, "n_sites": dsys.n_sites}
    print(json.dumps({"stage": "built", **out}), flush=True)
    t = time.perf_counter()
    solve_realisation(cfg, (0, 0, 0))  # lead modes, MUMPS analysis, a first sample
    out["first_sample_s"] = time.perf_counter() - t
    problem = problem_for(dsys)
    per_task = _samples_per_task(cfg)
    times, phases = [], []
    for r in range(1, spec["samples"] + 1):
        problem.reset_timings()
        t = time.perf_counter()
        solve_realisation(cfg, (r, 0, 0))
        times.append((time.perf_counter() - t) / per_task)
        phases.append({k: v / per_task for k, v in problem.timings.items()})
        print(json.dumps({"stage": f"sample {r}", "s": times[-1]}), flush=True)
    out.update({"times": times, "phases": phases, "peak_rss_mb": _peak_rss_mb(),
                "n_analyses": problem.n_analyses})
    print(json.dumps(out), flush=True)


def _rss_mb(pid: int) -> float:
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return 0.0


def _available_mb() -> float:
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return float("inf")


def run_probe(spec: dict, limit_mb: float, timeout_s: float, log) -> dict:
    """Run one size in a fresh subprocess, stopping it past ``limit_mb`` or ``timeout_s``."""
    proc = subprocess.Popen([sys.executable, str(Path(__file__).resolve()), "--probe",
                             json.dumps(spec)], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, cwd=REPO)
    t0 = time.perf_counter()
    seen_mb, stopped = 0.0, None
    while proc.poll() is None:
        seen_mb = max(seen_mb, _rss_mb(proc.pid))
        if seen_mb > limit_mb:
            stopped = f"stopped at {seen_mb / 1024:.1f} GiB resident (limit {limit_mb / 1024:.0f} GiB)"
        elif time.perf_counter() - t0 > timeout_s:
            stopped = f"stopped after {timeout_s:.0f} s (--size-timeout)"
        if stopped:
            proc.kill()
            break
        time.sleep(0.2)
    stdout, stderr = proc.communicate()
    lines = [json.loads(x) for x in stdout.splitlines() if x.startswith("{")]
    wall = time.perf_counter() - t0
    if stopped or proc.returncode != 0:
        last = lines[-1]["stage"] if lines and "stage" in lines[-1] else "start"
        why = stopped or f"failed (exit {proc.returncode}): {stderr.strip().splitlines()[-1:]}"
        log(f"  {spec['case']}: {why}, after stage {last!r}")
        return {"stopped": why, "last_stage": last, "wall_s": wall, "rss_seen_mb": seen_mb}
    res = lines[-1]
    res.update({"wall_s": wall, "rss_seen_mb": seen_mb})
    return res


def _estimate_mib(estimate_memory_mb, row: dict) -> float:
    """The preflight estimate of a size, converted from its MB (10^6 bytes) to MiB, the
    unit of ``VmHWM`` and of every peak here."""
    return estimate_memory_mb(row["n_sites"], row["lead_width"], norbs=row["norbs"]) * 1e6 / 2**20


# ------------------------------------------------------------------------------------ fits
def power_fit(n, y) -> dict | None:
    """Least squares of log y = log c + b log n; exponent b with its standard error."""
    n, y = np.asarray(n, float), np.asarray(y, float)
    ok = (n > 0) & (y > 0)
    n, y = n[ok], y[ok]
    if len(n) < 2:
        return None
    X = np.column_stack([np.ones(len(n)), np.log(n)])
    coef, *_ = np.linalg.lstsq(X, np.log(y), rcond=None)
    resid = np.log(y) - X @ coef
    dof = len(n) - 2
    se = float("nan")
    if dof > 0:
        s2 = float(resid @ resid) / dof
        se = float(np.sqrt(s2 * np.linalg.inv(X.T @ X)[1, 1]))
    return {"log_c": float(coef[0]), "b": float(coef[1]), "b_se": se, "points": len(n)}


def predict(fit: dict, n: float) -> float:
    return math.exp(fit["log_c"] + fit["b"] * math.log(n))


def invert(fit: dict, y: float) -> float:
    return math.exp((math.log(y) - fit["log_c"]) / fit["b"])


# ---------------------------------------------------------------------------------- main run
def run(args, log) -> dict:
    from pipeline.system.preflight import estimate_memory_mb

    settings = Settings()
    limit_mb = args.memory_limit_gib * 1024
    t_start = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="helisweep-scaling-") as workdir:
        first = case_for("strip", min(min(v) for v in args.sites.values()))
        base = run_probe({"baseline": True, "case": first.spec, "settings": settings.__dict__,
                          "workdir": workdir}, limit_mb, 600, log)
        baseline = base["peak_rss_mb"]
        log(f"imports-only baseline: {baseline:.0f} MiB")
        results = {}
        # sizes ascending, the series interleaved at each size step
        steps = max(len(v) for v in args.sites.values())
        for k in range(steps):
            for series, sites in args.sites.items():
                if k >= len(sites):
                    continue
                case = case_for(series, sites[k])
                rows = results.setdefault(series, [])
                done = [r for r in rows if "stopped" not in r and "skipped" not in r]
                row = {"case": case.spec, "label": case.label, "n_sites": case.n_sites,
                       "lead_width": case.lead_width,
                       "norbs": 4 if series == "strip4" else 2}
                row["estimate_mb"] = _estimate_mib(estimate_memory_mb, row)
                # skip what the sizes measured so far say will not fit or not finish
                if len(done) >= 2:
                    mem_fit = power_fit([r["n_sites"] for r in done],
                                        [r["peak_rss_mb"] - baseline for r in done])
                    t_fit = power_fit([r["n_sites"] for r in done],
                                      [r["wall_s"] for r in done])
                    need_mb = baseline + predict(mem_fit, case.n_sites)
                    need_s = predict(t_fit, case.n_sites)
                    room_mb = min(limit_mb, 0.85 * _available_mb())
                    left_s = args.budget_minutes * 60 - (time.perf_counter() - t_start)
                    why = None
                    if need_mb > room_mb:
                        why = (f"skipped: extrapolated peak {need_mb / 1024:.1f} GiB exceeds "
                               f"{room_mb / 1024:.1f} GiB (limit, or 85 % of the memory "
                               f"available now)")
                    elif need_s > left_s:
                        why = (f"skipped: extrapolated run time {need_s / 60:.1f} min exceeds "
                               f"the {max(left_s, 0) / 60:.1f} min left of the "
                               f"{args.budget_minutes:g}-minute budget")
                    if why:
                        log(f"  {case.label}: {why}")
                        rows.append({**row, "skipped": why})
                        continue
                log(f"  {SERIES_TITLES[series].split(',')[0]} {case.label} ...")
                res = run_probe({"case": case.spec, "settings": settings.__dict__,
                                 "workdir": workdir, "samples": args.samples,
                                 "four_band": series == "strip4"},
                                limit_mb, args.size_timeout, log)
                row.update(res)
                if "stopped" not in res:
                    row["per_sample_s"] = _median(res["times"])
                    row["factor_s"] = _median([p["factorisation"] for p in res["phases"]])
                    log(f"    {row['per_sample_s']:.3g} s/sample, peak "
                        f"{res['peak_rss_mb']:.0f} MiB, run {res['wall_s']:.0f} s")
                rows.append(row)
    return {"baseline_mb": baseline, "series": results, "samples": args.samples,
            "estimate_unit": "MiB",
            "smoke": args.smoke, "total_s": time.perf_counter() - t_start}


def render(args, machine, data) -> str:
    base = data["baseline_mb"]
    L = ["# Benchmark: scaling of the per-sample cost and peak memory with device size\n"]
    if data.get("smoke", args.smoke):
        L.append("> **SMOKE TEST: toy sizes. These numbers only show that the script runs; "
                 "they are NOT results.**\n")
    L.append(f"Command: `{data.get('command', args.command)}`  ")
    L.append(f"Date: {machine['date']}; git {machine['git']}\n")
    if data.get("rendered"):
        r = data["rendered"]
        L.append(f"The measurements are those of the command above. This report was rendered "
                 f"again from its raw numbers by `{r['command']}` ({r['date']}, git "
                 f"{r['git']}): only the preflight estimate column was recomputed, with "
                 f"`estimate_memory_mb` as of that commit.\n")
    ls, le = machine["load_start"], machine["load_end"]
    L.append(f"Machine: {machine['nproc']} CPU(s), {machine['cpu']}, {machine['ram_gib']:.1f} "
             f"GiB RAM; Kwant {machine['kwant']} (solver `{machine['kwant_solver']}`), "
             f"{machine['blas']}; Python {machine['python']}, NumPy {machine['numpy']}, SciPy "
             f"{machine['scipy']}; {machine['threads']}. Load average (1, 5, 15 min) at start "
             f"{ls[0]:.2f}, {ls[1]:.2f}, {ls[2]:.2f}; at end {le[0]:.2f}, {le[1]:.2f}, "
             f"{le[2]:.2f}.\n")
    L.append("Model: BHZ, `PRESETS[\"hgte-7.0nm\"]`, a = 5 nm, E_F = 0, B = 0, Anderson "
             "disorder U = 50 meV, leads doped by 25 meV, seed 7 (the settings of "
             "`bench_pipeline.py`). Strips are L = 2.5 W sites; H-bars have the shape of "
             "`hbar:120x40x40x40` scaled uniformly. Each size runs in a fresh subprocess "
             "through the pipeline: `system_for` (the Kwant system), then "
             f"`solve_realisation` once untimed (lead modes, MUMPS analysis, first sample), "
             f"then {data.get('samples', args.samples)} timed sample(s) (median shown). Peak memory: the "
             f"subprocess's `VmHWM` (after the build, and at the end); the imports alone "
             f"peak at {base:.0f} MiB. The preflight estimate is "
             f"`estimate_memory_mb(n_sites, lead_width_sites, norbs)` with the orbitals per "
             f"site of the solve, converted from its MB (10^6 bytes) to MiB (2^20 bytes, the "
             f"unit of `VmHWM` and of every memory figure here).\n")
    fits = {}
    for series, rows in data["series"].items():
        L.append(f"## {SERIES_TITLES[series]}\n")
        L.append("| size | sites | unknowns | build s | first sample s (with analysis) | "
                 "s/sample | factorisation share | peak after build MiB | peak MiB | "
                 "preflight estimate MiB | estimate / peak | within 30 % |")
        L.append("|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|---:|---|")
        for r in rows:
            if "skipped" in r or "stopped" in r:
                why = r.get("skipped") or f"{r['stopped']} (after stage {r['last_stage']!r}, " \
                    f"{r['wall_s']:.0f} s, {r['rss_seen_mb']:.0f} MiB resident seen)"
                L.append(f"| {r['label']} | {r['n_sites']:,} | {r['norbs'] * r['n_sites']:,} | "
                         f"{why} ||||||||| ")
                continue
            ratio = r["estimate_mb"] / r["peak_rss_mb"]
            L.append(f"| {r['label']} | {r['n_sites']:,} | {r['norbs'] * r['n_sites']:,} | "
                     f"{_f(r['build_s'])} | {_f(r['first_sample_s'])} | "
                     f"{_f(r['per_sample_s'])} | {100 * r['factor_s'] / r['per_sample_s']:.0f} % "
                     f"| {r['build_peak_mb']:,.0f} | {r['peak_rss_mb']:,.0f} | "
                     f"{r['estimate_mb']:,.0f} | {ratio:.2f} | "
                     f"{'yes' if abs(ratio - 1) <= ESTIMATE_TOLERANCE else '**no**'} |")
        done = [r for r in rows if "per_sample_s" in r]
        n = [r["n_sites"] for r in done]
        tf = power_fit(n, [r["per_sample_s"] for r in done])
        mf = power_fit(n, [r["peak_rss_mb"] - base for r in done])
        ff = power_fit(n, [r["factor_s"] for r in done])
        fits[series] = (tf, mf)
        L.append("")
        if tf and mf:
            L.append(f"Log-log least squares over the {tf['points']} sizes that ran "
                     f"({n[0]:,}–{n[-1]:,} sites): per-sample cost ∝ N^{tf['b']:.2f} "
                     f"(± {tf['b_se']:.2f}), numerical factorisation ∝ N^{ff['b']:.2f} "
                     f"(± {ff['b_se']:.2f}), peak memory above the import baseline ∝ "
                     f"N^{mf['b']:.2f} (± {mf['b_se']:.2f}); ± is the standard error of the "
                     f"slope.")
            slopes = [f"{n[i]:,}→{n[i + 1]:,}: time "
                      f"{math.log(done[i + 1]['per_sample_s'] / done[i]['per_sample_s']) / math.log(n[i + 1] / n[i]):.2f}, "
                      f"memory "
                      f"{math.log((done[i + 1]['peak_rss_mb'] - base) / (done[i]['peak_rss_mb'] - base)) / math.log(n[i + 1] / n[i]):.2f}"
                      for i in range(len(done) - 1)]
            L.append(f"Local exponents between neighbouring sizes: {'; '.join(slopes)}.")
            n24 = invert(mf, TARGET_GIB * 1024 - base)
            L.append(f"Largest device whose peak fits in {TARGET_GIB:g} GiB, **extrapolated "
                     f"from the memory fit** (not run): about {n24:,.0f} sites "
                     f"({n24 / n[-1]:.1f}× the largest size measured), at an extrapolated "
                     f"{predict(tf, n24):,.0f} s per sample.\n")
        else:
            L.append("Too few sizes ran for a fit.\n")
    L.append("## Preflight memory estimate\n")
    rows = [r for rs in data["series"].values() for r in rs if "peak_rss_mb" in r]
    if rows:
        worst = max(rows, key=lambda r: abs(r["estimate_mb"] / r["peak_rss_mb"] - 1))
        ok = all(abs(r["estimate_mb"] / r["peak_rss_mb"] - 1) <= ESTIMATE_TOLERANCE
                 for r in rows)
        L.append(f"`estimate_memory_mb` against every measured peak: "
                 f"{'within' if ok else '**not** within'} {100 * ESTIMATE_TOLERANCE:.0f} % at "
                 f"every size (worst: {worst['label']}, {'4' if worst['norbs'] == 4 else '2'} "
                 f"orbitals, estimate {worst['estimate_mb']:,.0f} MiB against "
                 f"{worst['peak_rss_mb']:,.0f} MiB measured).\n")
        before = [r["estimate_measured_mib"] / r["peak_rss_mb"] for r in rows
                  if "estimate_measured_mib" in r]
        if data.get("rendered") and before:
            L.append(f"The estimate of the commit the run was measured with "
                     f"({machine['git']}) gave {min(before):.2f}–{max(before):.2f} of the "
                     f"measured peaks. Where `estimate_memory_mb` was fitted to these very "
                     f"measurements (its docstring names the run), the agreement above is that "
                     f"of a fit at these sizes, not an independent check; beyond them it is an "
                     f"extrapolation.\n")
    L.append(f"Total run time: {data['total_s']:.0f} s.\n")
    return "\n".join(L) + "\n"


def rerender(args) -> dict:
    """The raw numbers of an earlier run (``--json``) with the preflight estimate recomputed."""
    import datetime as _dt
    import subprocess as _sp

    from pipeline.system.preflight import estimate_memory_mb

    data = json.loads(Path(args.render_from).read_text())
    # runs before the unit was recorded stored the estimate in MB (10^6 bytes)
    to_mib = 1.0 if data.get("estimate_unit") == "MiB" else 1e6 / 2**20
    for rows in data["series"].values():
        for r in rows:
            r.setdefault("estimate_measured_mib", r["estimate_mb"] * to_mib)
            r["estimate_mb"] = _estimate_mib(estimate_memory_mb, r)
    data["estimate_unit"] = "MiB"
    git = _sp.run(["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True,
                  text=True).stdout.strip() or "unknown"
    data["rendered"] = {"command": args.command, "git": git,
                        "date": _dt.datetime.now().astimezone().isoformat(timespec="seconds")}
    return data


def parse_args(argv=None):
    p = argparse.ArgumentParser(description="Per-sample cost and peak memory against the number "
                                            "of sites (fresh subprocess per size).")
    p.add_argument("--smoke", action="store_true", help="toy sizes: checks the script runs")
    p.add_argument("--series", nargs="+", choices=sorted(DEFAULT_SITES), default=None,
                   help="which series to run (default all)")
    p.add_argument("--max-sites", type=float, default=None,
                   help="leave out sizes above this many sites")
    p.add_argument("--samples", type=int, default=None,
                   help="timed samples per size after the warm-up (default 2; --smoke 1)")
    p.add_argument("--memory-limit-gib", type=float, default=20.0,
                   help="stop a size whose resident set passes this")
    p.add_argument("--size-timeout", type=float, default=1500.0,
                   help="stop a size running longer than this many seconds")
    p.add_argument("--budget-minutes", type=float, default=40.0,
                   help="skip a size whose extrapolated run time exceeds what is left")
    p.add_argument("--write", nargs="?", const=str(DEFAULT_DOC), default=None, metavar="PATH",
                   help="write the Markdown report there (replacing the file)")
    p.add_argument("--json", default=None, metavar="PATH", help="also write the raw numbers")
    p.add_argument("--render-from", default=None, metavar="JSON",
                   help="render the report from the raw numbers of an earlier run (--json), "
                        "recomputing only the preflight estimate; runs nothing")
    p.add_argument("--probe", default=None, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    if args.render_from and not Path(args.render_from).is_file():
        p.error(f"--render-from {args.render_from!r} is not a file; give the --json output "
                "of an earlier run")
    if args.samples is None:
        args.samples = 1 if args.smoke else 2
    if args.samples < 1:
        p.error(f"--samples must be at least 1, got {args.samples}")
    if args.memory_limit_gib <= 0 or args.size_timeout <= 0 or args.budget_minutes <= 0:
        p.error("--memory-limit-gib, --size-timeout and --budget-minutes must be positive")
    sites = SMOKE_SITES if args.smoke else DEFAULT_SITES
    args.sites = {k: [n for n in v if args.max_sites is None or n <= args.max_sites]
                  for k, v in sites.items() if args.series is None or k in args.series}
    args.sites = {k: v for k, v in args.sites.items() if v}
    if not args.sites:
        p.error(f"no size left: --max-sites {args.max_sites!r} is below every size")
    shown = argv if argv is not None else sys.argv[1:]
    args.command = " ".join(shlex.quote(a) for a in
                            [".venv/bin/python", "benchmarks/bench_scaling.py", *shown])
    return args


def main(argv=None) -> int:
    args = parse_args(argv)
    if args.probe:
        probe_main(json.loads(args.probe))
        return 0

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    if args.render_from:
        data = rerender(args)
        machine = data.pop("machine")
    else:
        machine = machine_description()
        data = run(args, log)
        data["command"] = args.command
        machine["load_end"] = os.getloadavg()
    report = render(args, machine, data)
    print(report)
    if args.write:
        Path(args.write).write_text(report)
        log(f"wrote {args.write}")
    if args.json:
        Path(args.json).write_text(json.dumps({"machine": machine, **data}, indent=1,
                                              default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
