"""From a run to what a paper needs: summarise, estimate L*, draw the figures and write the
supplementary-data package -- one call, used by ``helisweep report`` and the demo; it
computes missing samples only when asked (``run=True``).

Derived files (summary, L*, figures) are rewritten from the store on every call; the store
itself is only ever extended, and packages are never overwritten (a new one gets a suffix).
"""

from __future__ import annotations

import sys
import warnings
from pathlib import Path

from pipeline.analysis.lstar import longest_ballistic_length, save_lstar
from pipeline.analysis.summary import save_summary, summarize
from pipeline.errors import ConfigError
from pipeline.longedges.run import run_concatenation
from pipeline.network.plan import plan_network
from pipeline.network.run import SAMPLES_STORE, run_network
from pipeline.output.figures import load_run, make_figures
from pipeline.output.longedge_figures import plot_concatenated
from pipeline.output.package import make_package
from pipeline.precision import plan_precision, run_to_precision
from pipeline.sweep.clusters import open_client
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.driver import run_sweep

__all__ = ['build_report', 'lstar_for_run']

#: geometry parameters that are edge lengths (a length sweep gives L*)
_LENGTH_PARAMETERS = ("length", "arm_length")


def _say(msg: str, progress: bool) -> None:
    if progress:
        print(f"[report] {msg}", file=sys.stderr, flush=True)


def lstar_for_run(cfg: SweepConfig, samples, summary, *, tolerance: float = 0.05) -> dict:
    """L* for every measurement when the geometry axis sweeps an edge length (else ``{}``).

    Parameters
    ----------
    cfg : SweepConfig
        The run's configuration.
    samples : xarray.Dataset
        The sample store, opened.
    summary : xarray.Dataset
        Its summary (the ideal values are taken from its ``quantised`` coordinate).
    tolerance : float
        Relative tolerance of L*.

    Returns
    -------
    dict
        ``{measurement: LStarTable}`` (one result per sweep point); write it with
        :func:`pipeline.analysis.lstar.save_lstar`.
    """
    geo = cfg.sweep.geometry
    if geo is None or geo.parameter not in _LENGTH_PARAMETERS or len(geo.values) < 2:
        return {}
    quantised = {str(m): float(q) for m, q in
                 zip(summary["measurement"].values, summary["quantised"].values)}
    out = {}
    for label in cfg.measure.labels:
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
    run: bool = False,
    temperatures: tuple[float, ...] = (),
    tolerance: float = 0.05,
    progress: bool = True,
) -> Path:
    """Summary, L*, figures and package of a run; returns the package's zip file.

    With ``run=False`` (the default) only what is stored is read: nothing is computed, so
    this is safe on a login node, and a missing store or segment pool is refused with the
    command that computes it. With ``run=True`` the missing samples (and segment pools of a
    ``[concatenation]`` table) are computed first on ``client``, or, without one, on a
    client obtained through the config's ``[cluster]`` table
    (:func:`pipeline.sweep.clusters.open_client`).

    A config with an ``[edges]`` table is reported with the edge-network model
    (:func:`pipeline.network.run.run_network`): ``edges.nc`` instead of ``summary.nc``, the
    figures and package of its sampled devices; ``run=True`` then computes missing segment
    pools (the device itself is never solved whole).
    """
    run_dir = Path(run_dir) if run_dir is not None else cfg.run_dir
    if run and client is None:
        plan_precision(cfg)  # a target this run cannot have is refused before a cluster starts
        if cfg.edges is not None:
            plan_network(cfg)  # the guard rails refuse before any cluster starts
        with open_client(cfg, store_path=run_dir / "samples.zarr") as session:
            return build_report(cfg, run_dir, client=session.client, run=True,
                                temperatures=temperatures, tolerance=tolerance,
                                progress=progress)
    if cfg.edges is not None:
        return _network_report(cfg, run_dir, client, run, temperatures, tolerance, progress)
    if (run_dir / SAMPLES_STORE).exists():
        raise ConfigError(
            f"the run directory {str(run_dir)!r} holds an edge-network run ({SAMPLES_STORE}); "
            "a direct report writes lstar.json and figures there too and would replace its "
            "results. Give the direct run its own [run] directory"
        )
    store_path = run_dir / "samples.zarr"
    if run and plan_precision(cfg) is not None:  # a precision target: the stopping loop
        run_to_precision(cfg, client=client, store_path=store_path, progress=progress)
    elif run:
        run_sweep(cfg, client=client, store_path=store_path, progress=progress)
    _say(f"summarising {store_path}", progress)
    summary = summarize(store_path, temperatures=temperatures, config_dir=cfg.base_dir,
                        tail_deviation=cfg.summary.tail_deviation)
    save_summary(summary, run_dir / "summary.nc")
    lstar = _lstar(cfg, run_dir, store_path, summary, tolerance, progress)
    _say("drawing figures", progress)
    rundata = load_run(store_path, summary, config=cfg)
    figures = list(make_figures(rundata, run_dir / "figures", lstar=lstar or None))
    extra = []
    if cfg.concatenation is not None:
        _say("concatenated edges beyond direct reach", progress)
        long = run_concatenation(cfg, run_dir, client=client, progress=progress, compute=run)
        figures += plot_concatenated(long["dataset"], long["results"], run_dir / "figures")
        extra = [long["netcdf"], long["lstar"]]
    _say("writing the supplementary-data package", progress)
    folder, zip_path = make_package(run_dir, lstar_results=lstar, figures=figures,
                                    summary=summary, store_path=store_path, config=cfg,
                                    extra_files=extra)
    _say(f"package: {folder} and {zip_path}", progress)
    return zip_path


def _network_report(cfg, run_dir: Path, client, run: bool, temperatures, tolerance: float,
                    progress: bool) -> Path:
    """The report of an ``[edges]`` run: edges.nc, L*, figures and package of the model."""
    _say("edge-network model", progress)
    res = run_network(cfg, run_dir, client=client, progress=progress, compute=run,
                      tolerance=tolerance, temperatures=temperatures)
    _say("drawing figures", progress)
    rundata = load_run(res["store"], res["summary"], config=cfg)
    figures = list(make_figures(rundata, run_dir / "figures", lstar=res["lstar_tables"] or None))
    _say("writing the supplementary-data package", progress)
    folder, zip_path = make_package(run_dir, lstar_results=res["lstar_tables"], figures=figures,
                                    summary=res["summary"], store_path=res["store"], config=cfg,
                                    summary_name="edges")
    _say(f"package: {folder} and {zip_path}", progress)
    return zip_path


def _lstar(cfg, run_dir: Path, store_path: Path, summary, tolerance: float, progress: bool) -> list:
    """L* tables of a length sweep, written to ``lstar.json`` (empty list otherwise)."""
    import xarray as xr  # heavy: datasets are read only here and in the stages it calls

    samples = xr.open_zarr(str(store_path), consolidated=False)
    tables = list(lstar_for_run(cfg, samples, summary, tolerance=tolerance).values())
    if tables:
        save_lstar(run_dir / "lstar.json", tables)
        for table in tables:
            _say(table.text().splitlines()[0] if table.results else
                 f"L* of {table.measurement}: no sweep point with samples", progress)
    return tables
