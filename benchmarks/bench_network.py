"""Devices at their real size with the edge-network model: wall time on the local cluster.

Run from the repository root on an idle machine::

    .venv/bin/python benchmarks/bench_network.py --write     # writes docs/benchmarks-network.md

Two invented example configs are run end to end with ``run_network`` (pools on a local Dask
cluster of ``--workers`` processes, then the sampled devices, the summary with its
pool-bootstrap errors, and L*), each in a fresh run directory:

* ``configs/edge-network-hallbar.toml``: a six-terminal Hall bar of 30 um x 10 um with 1 um
  probes, 1000 sampled devices of R14,23 and R14,14 at 5 energies;
* ``configs/edge-network-hbar-lstar.toml``: an H-bar whose bridge is swept from 1 to 50 um,
  L* of R14,23.

Wall times are of this run on this machine (noisy; the report gives the phases and the
machine). Every number is a model estimate for simulated disorder, not device data.
``--smoke`` shrinks the pools and samples (for the test of this script; its numbers mean
nothing).
"""

from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import platform  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from pipeline.network import run as network_run  # noqa: E402
from pipeline.network.plan import plan_network  # noqa: E402
from pipeline.sweep.clusters import local_client  # noqa: E402
from pipeline.sweep.config import parse_config  # noqa: E402
from pipeline.transport.environment import describe  # noqa: E402

CONFIGS = ("configs/edge-network-hallbar.toml", "configs/edge-network-hbar-lstar.toml")


def _timed_run(cfg, run_dir, client) -> dict:
    """run_network with its phases timed (pool solves, sampling + statistics)."""
    times = {}
    t0 = time.perf_counter()
    plan = plan_network(cfg)
    times["guard rails"] = time.perf_counter() - t0
    solve = network_run._solve_pools

    def timed_solve(*args, **kwargs):
        t = time.perf_counter()
        out = solve(*args, **kwargs)
        times["pools"] = time.perf_counter() - t
        return out

    network_run._solve_pools = timed_solve
    try:
        t1 = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = network_run.run_network(cfg, run_dir, client=client, progress=False)
        total = time.perf_counter() - t1
    finally:
        network_run._solve_pools = solve
    times["devices, statistics, L*"] = total - times["pools"]
    times["total"] = time.perf_counter() - t0
    return {"times": times, "result": res, "plan": plan}


def _sites(cfg) -> int:
    dev = plan_network(cfg).devices[-1]
    return int(round(dev.outline.area / cfg.lattice.constant ** 2))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--write", nargs="?", const=str(ROOT / "docs" / "benchmarks-network.md"))
    ap.add_argument("--smoke", action="store_true")
    args = ap.parse_args(argv)
    lines = ["# Edge-network model at real device sizes (recorded benchmark)", "",
             "Command: `.venv/bin/python benchmarks/bench_network.py --write`"
             + (" (smoke: toy pools, numbers meaningless)" if args.smoke else ""), ""]
    env = describe()
    lines += ["| machine | |", "|---|---|", f"| nproc | {os.cpu_count()} |",
              f"| CPU | {platform.processor() or platform.machine()} |",
              f"| workers | {args.workers} (one thread each) |",
              f"| Kwant | {env['kwant']} ({env['kwant_solver']}) |",
              f"| BLAS under MUMPS | {env['system_blas']} |", ""]
    client = local_client(args.workers)
    try:
        with tempfile.TemporaryDirectory() as tmp:
            for path in CONFIGS:
                text = (ROOT / path).read_text()
                if args.smoke:
                    text = (text.replace("segments = 200", "segments = 4")
                            .replace("segments = 128", "segments = 4")
                            .replace("sequences = 1000", "sequences = 16")
                            .replace("pool_resamples = 50", "pool_resamples = 2"))
                cfg = parse_config(text, source=path, base_dir=(ROOT / path).parent)
                out = _timed_run(cfg, Path(tmp) / cfg.run.name, client)
                ec, t, summary = cfg.edges, out["times"], out["result"]["summary"]
                lines += [f"## `{path}`", "",
                          f"Device {cfg.device.template} {dict(cfg.device.parameters)} nm "
                          f"(largest: {_sites(cfg):,} lattice sites if solved whole); "
                          f"{len(out['plan'].pool_keys(cfg))} pools x {ec.segments} segments of "
                          f"{ec.segment_length:g} nm; {ec.sequences} sampled devices at each of "
                          f"{summary.sizes['energy']} energies x {summary.sizes['geometry']} "
                          f"geometries; {ec.pool_resamples} pool resamples.", "",
                          "| phase | wall time (s) |", "|---|---|"]
                lines += [f"| {k} | {v:.1f} |" for k, v in t.items()]
                lines += ["", "| point | quantity | mean | ideal | sem (devices) | sem_pool |",
                          "|---|---|---|---|---|---|"]
                for g in summary["geometry"].values:
                    for e in summary["energy"].values:
                        for m in summary["measurement"].values:
                            s = summary.sel(geometry=g, energy=e, measurement=m).squeeze()
                            where = (f"{cfg.sweep.geometry.parameter} = {g:g} nm, "
                                     if cfg.sweep.geometry else "") + f"E = {e:g} meV"
                            lines.append(f"| {where} | {m} | {float(s['mean']):.4f} | "
                                         f"{float(s['quantised']):.4g} | {float(s['sem']):.4f} "
                                         f"| {float(s['sem_pool']):.4f} |")
                for table in out["result"]["lstar_tables"]:
                    lines += ["", "```", table.text(), "```"]
                lines.append("")
                print(f"[bench] {path}: {t['total']:.1f} s", file=sys.stderr, flush=True)
    finally:
        cluster = client.cluster
        client.close()
        cluster.close()
    text = "\n".join(lines) + "\n"
    print(text)
    if args.write:
        Path(args.write).write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
