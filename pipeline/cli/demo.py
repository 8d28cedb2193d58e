"""The demonstration scenario: invented wafer "QW-Tarn-7" and two of its devices.

``helisweep demo`` (``make demo``) runs it end to end: previews the shipped example devices,
runs the two demo sweeps (``configs/demo.toml``: edge-length sweep of a strip with dilute
magnetic impurities; ``configs/demo-hbar-gate.toml``: gate sweep of the non-local R14,23 of
an H-bar), aggregates them, estimates the longest ballistic edge length, draws the figures and
writes the supplementary-data packages. Everything lands under one output directory; running
it again resumes and recomputes nothing that is already stored. All numbers are model
estimates for invented devices.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

from pipeline.device.readers import load_device
from pipeline.output.preview import preview_device
from pipeline.output.report import build_report
from pipeline.physics.materials import get_preset
from pipeline.sweep.clusters import open_client
from pipeline.sweep.config import load_config

__all__ = ['run_demo', 'DEMO_CONFIGS']

_ROOT = Path(__file__).resolve().parents[2]
DEMO_CONFIGS = ("configs/demo.toml", "configs/demo-hbar-gate.toml")


def _say(msg: str) -> None:
    print(f"[demo] {msg}", file=sys.stderr, flush=True)


def run_demo(out: Path, *, workers: int = 0) -> list[Path]:
    """Run the whole demonstration into ``out``; returns the package zip files."""
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.monotonic()
    _say(f"previewing the QW-Tarn-7 example devices into {out / 'devices'}")
    for path in sorted((_ROOT / "geometries").glob("tarn-*")):
        device = load_device(path)
        text = preview_device(device, get_preset("hgte-7.0nm"), 5.0,
                              out / "devices" / f"{device.name}.png", check_half=False)
        (out / "devices" / f"{device.name}.txt").write_text(text + "\n")
    zips = []
    configs = [load_config(_ROOT / rel) for rel in DEMO_CONFIGS]
    with open_client(configs[0], workers=workers) as session:
        for rel, cfg in zip(DEMO_CONFIGS, configs):
            run_dir = out / cfg.run.name
            _say(f"sweep {rel} -> {run_dir}")
            zips.append(build_report(cfg, run_dir, client=session.client, run=True, progress=True))
    _say(f"done in {time.monotonic() - t0:.0f} s; packages: " + ", ".join(str(z) for z in zips))
    return zips
