"""Validate the edge-network model against direct solves of the same devices.

For each validation config in this folder (an H-bar and a six-terminal Hall bar of 1-2 um,
dilute magnetic impurities, with and without smooth puddles, two energies) the direct
ensemble is computed (or resumed) with the ordinary sweep, the same config plus the
``[edges]`` table below is computed with the edge-network model, and every measured mean is
compared: z = (network - direct) / sqrt(sem_direct^2 + sem_network^2 + sem_pool^2).

A second part sketches where the model breaks: an H-bar whose bridge is narrower than the
guard rail (4 edge decay lengths), with time-reversal-symmetric disorder only. The network
model (its width guard switched off for this study) predicts the ideal values there; the
direct solves show the two edges of the bridge coupling.

Usage (from the repository root; about 25 minutes on 2 cores with empty run directories)::

    .venv/bin/python benchmarks/edge_network/validate.py --out benchmarks/edge_network/validation.json

Every number is a model estimate for simulated disorder, not device data.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
import warnings
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))

from pipeline.analysis.summary import summarize  # noqa: E402
from pipeline.network.run import run_network  # noqa: E402
from pipeline.sweep.clusters import open_client  # noqa: E402
from pipeline.sweep.config import parse_config  # noqa: E402
from pipeline.sweep.driver import run_sweep  # noqa: E402

CONFIGS = ("hbar-magnetic", "hbar-puddles", "hallbar-magnetic", "hallbar-puddles")

#: The network model's settings for the validation: 250 nm of disorder per segment, so every
#: section of the validation devices (1, 1.5 or 2 um) is a whole number of segments.
EDGES = """
[edges]
segment_length = 550.0
buffer = 150.0
segments = 256
sequences = 2000
pool_resamples = 100
evanescent_tolerance = 1e-4
"""

#: The breakdown sketch: bridge widths (nm) below and at the guard rail (214 nm).
BRIDGE_WIDTHS = (300.0, 200.0, 150.0, 100.0, 70.0, 50.0)

BREAKDOWN = """
[run]
name = "val-narrow-{w:g}"
seed = 20261207
realisations = 16
directory = "runs/{{name}}"

[device]
template = "hbar"
parameters = {{ length = 800.0, width = {w}, arm_length = 600.0, arm_width = 300.0 }}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[[disorder]]
kind = "anderson"
width = 60.0

[sweep]
energy = 2.0

[measure]
labels = ["R14,23", "R14,14"]
"""


def _direct(cfg, client):
    """Summary of the direct ensemble (computed or resumed on the client)."""
    run_sweep(cfg, client=client, progress=False)
    return summarize(cfg.run_dir / "samples.zarr")


def _network(cfg, client, *, width_guard=True):
    """Summary of the edge-network model of the same device."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_network(cfg, cfg.run_dir.with_name(cfg.run_dir.name + "-network"),
                          client=client, progress=False, width_guard=width_guard)
    return res["summary"]


def _compare(name, direct, network) -> list[dict]:
    rows = []
    for e in direct["energy"].values:
        for label in direct["measurement"].values:
            d = direct.sel(energy=e, measurement=label).squeeze()
            n = network.sel(energy=e, measurement=label).squeeze()
            err_d = float(d["sem"])
            err_n = math.hypot(float(n["sem"]), float(n["sem_pool"]))
            z = (float(n["mean"]) - float(d["mean"])) / math.hypot(err_d, err_n)
            rows.append({"config": name, "energy_meV": float(e), "measurement": str(label),
                         "quantised": float(d["quantised"]),
                         "direct_mean": float(d["mean"]), "direct_sem": err_d,
                         "direct_n": int(d["n_samples"]),
                         "network_mean": float(n["mean"]), "network_err": err_n,
                         "network_n": int(n["n_samples"]), "z": z})
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", default=str(HERE / "validation.json"))
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--skip-breakdown", action="store_true")
    ap.add_argument("--skip-comparison", action="store_true")
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    rows, sketch = [], []
    first = parse_config((HERE / f"{CONFIGS[0]}.toml").read_text(), base_dir=HERE)
    with open_client(first, workers=args.workers) as session:
        for name in () if args.skip_comparison else CONFIGS:
            text = (HERE / f"{name}.toml").read_text()
            direct_cfg = parse_config(text, source=name, base_dir=HERE)
            network_cfg = parse_config(text + EDGES, source=name, base_dir=HERE)
            rows += _compare(name, _direct(direct_cfg, session.client),
                             _network(network_cfg, session.client))
            print(f"[validate] {name} done ({time.perf_counter() - t0:.0f} s)", file=sys.stderr)
        if not args.skip_breakdown:
            for w in BRIDGE_WIDTHS:
                text = BREAKDOWN.format(w=w)
                direct_cfg = parse_config(text, source=f"narrow-{w:g}", base_dir=HERE)
                network_cfg = parse_config(text + EDGES, source=f"narrow-{w:g}", base_dir=HERE)
                for row in _compare(f"narrow-{w:g}", _direct(direct_cfg, session.client),
                                    _network(network_cfg, session.client, width_guard=False)):
                    sketch.append({"bridge_width_nm": w, **row})
                print(f"[validate] bridge {w:g} nm done ({time.perf_counter() - t0:.0f} s)",
                      file=sys.stderr)
    out = {"note": "model estimates for simulated disorder, not device data",
           "z_definition": "(network - direct) / sqrt(sem_direct^2 + sem_network^2 + sem_pool^2)",
           "edges_table": EDGES.strip(), "comparison": rows, "breakdown": sketch,
           "seconds": round(time.perf_counter() - t0, 1)}
    Path(args.out).write_text(json.dumps(out, indent=2) + "\n")
    print("| device | E (meV) | quantity | ideal | direct | network | z |")
    print("|---|---|---|---|---|---|---|")
    for r in rows:
        print(f"| {r['config']} | {r['energy_meV']:g} | {r['measurement']} | {r['quantised']:.4g} "
              f"| {r['direct_mean']:.3f} ± {r['direct_sem']:.3f} "
              f"| {r['network_mean']:.3f} ± {r['network_err']:.3f} | {r['z']:+.2f} |")
    if sketch:
        print("\n| bridge width (nm) | quantity | ideal | direct - ideal | network - ideal "
              "| (direct - network) / error |")
        print("|---|---|---|---|---|---|")
        for r in sketch:
            err = math.hypot(r["direct_sem"], r["network_err"])
            diff = r["direct_mean"] - r["network_mean"]
            z = f"{diff / err:+.1f}" if err > 1e-9 else "(no spread)"
            print(f"| {r['bridge_width_nm']:g} | {r['measurement']} | {r['quantised']:.4g} "
                  f"| {r['direct_mean'] - r['quantised']:+.2e} ± {r['direct_sem']:.1e} "
                  f"| {r['network_mean'] - r['quantised']:+.2e} ± {r['network_err']:.1e} | {z} |")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
