"""From a sweep to what a paper needs: run (or resume), summarise, estimate L*, draw the
figures and write the supplementary-data package -- one call, used by ``helisweep report``
and the demo.

Derived files (summary, L*, figures) are rewritten from the store on every call; the store
itself is only ever extended, and packages are never overwritten (a new one gets a suffix).
"""

from __future__ import annotations

import json
import sys
import warnings
from pathlib import Path

from .config import SweepConfig

__all__ = ["build_report", "lstar_for_run"]

#: geometry parameters that are edge lengths (a length sweep gives L*)
_LENGTH_PARAMETERS = ("length", "arm_length")


def _say(msg: str, progress: bool) -> None:
    if progress:
        print(f"[report] {msg}", file=sys.stderr, flush=True)


def lstar_for_run(cfg: SweepConfig, samples, summary, *, tolerance: float = 0.05) -> dict:
    """L* for every measurement when the geometry axis sweeps an edge length (else ``{}``)."""
    from .lstar import longest_ballistic_length

    geo = cfg.sweep.geometry
    if geo is None or geo.parameter not in _LENGTH_PARAMETERS or len(geo.values) < 2:
        return {}
    quantised = {str(m): float(q) for m, q in
                 zip(summary["measurement"].values, summary["quantised"].values)}
    out = {}
    for label in cfg.measure.report:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # points without samples are listed in the table
            out[label] = longest_ballistic_length(samples, label, tolerance=tolerance,
                                                  quantised=quantised[label], config_dir=cfg.base_dir)
    return out


def build_report(
    cfg: SweepConfig,
    run_dir: str | Path | None = None,
    *,
    client=None,
    run: bool = True,
    temperatures: tuple[float, ...] = (),
    tolerance: float = 0.05,
    progress: bool = True,
) -> Path:
    """Run or resume the sweep, then write summary, L*, figures and package; returns the zip.

    Without a ``client`` a local cluster is started for the call (and closed after it).
    """
    run_dir = Path(run_dir) if run_dir is not None else cfg.run_dir
    store_path = run_dir / "samples.zarr"
    own_client = client is None and (run or cfg.concatenation is not None)
    if own_client:
        from .engine import local_client

        client = local_client(cfg.execution.workers)
    try:
        return _build(cfg, run_dir, store_path, client, run, temperatures, tolerance, progress)
    finally:
        if own_client:
            cluster = client.cluster
            client.close()
            cluster.close()


def _build(cfg, run_dir, store_path, client, run, temperatures, tolerance, progress) -> Path:
    import xarray as xr

    from .aggregate import save_summary, summarize
    from .engine import run_sweep
    from .export import make_package
    from .figures import load_run, make_figures

    if run:
        run_sweep(cfg, client=client, store_path=store_path, progress=progress)
    _say(f"summarising {store_path}", progress)
    summary = summarize(store_path, temperatures=temperatures, config_dir=cfg.base_dir)
    save_summary(summary, run_dir / "summary.nc")
    samples = xr.open_zarr(str(store_path), consolidated=False)
    lstar = lstar_for_run(cfg, samples, summary, tolerance=tolerance)
    if lstar:
        (run_dir / "lstar.json").write_text(
            json.dumps({k: v.as_dict() for k, v in lstar.items()}, indent=2, default=str) + "\n")
        for result in lstar.values():
            _say(result.text().splitlines()[0] if hasattr(result, "text") else str(result), progress)
    _say("drawing figures", progress)
    rundata = load_run(store_path, summary, config=cfg)
    figures = make_figures(rundata, run_dir / "figures", lstar=list(lstar.values()) or None)
    extra = []
    if cfg.concatenation is not None:
        from .longedges import run_concatenation

        _say("concatenated edges beyond direct reach", progress)
        long = run_concatenation(cfg, run_dir, client=client, progress=progress)
        figures = list(figures) + list(long["figures"])
        extra = [long["netcdf"], long["lstar"]]
    _say("writing the supplementary-data package", progress)
    folder, zip_path = make_package(run_dir, lstar_results=list(lstar.values()), figures=figures,
                                    summary=summary, store_path=store_path, config=cfg,
                                    extra_files=extra)
    _say(f"package: {folder} and {zip_path}", progress)
    return zip_path
