"""The Python interface: a run from a notebook in a few calls (``import pipeline as hs``).

Every function takes what a user has at hand -- a :class:`~pipeline.sweep.config.SweepConfig`,
the path of a config file (``.toml``), a run directory or a sample store -- and calls the same
stage functions as the ``helisweep`` command, so a notebook and the command write and read the
same stores::

    load_config      a config file, validated                      (helisweep preflight)
    run              compute the missing samples                   (helisweep run)
    status           what a store holds and what is left           (helisweep status)
    open_samples     the samples as an xarray Dataset (checksums verified)
    summarize        the statistics of every sweep point (xarray)  (summary.nc)
    lstar            the longest ballistic edge length L*          (lstar.json)
    figures          every figure of the run (PDF, PNG, CSV)       (figures/)
    package          the supplementary-data package and its zip    (package-<run>/)
    report           summary, L*, figures and package in one call  (helisweep report)

and, unchanged from their stages, :func:`~pipeline.sweep.clusters.local_client` and
:func:`~pipeline.sweep.clusters.open_client` (Dask clients), :func:`save_summary`,
:func:`verify_package` and :class:`~pipeline.errors.HelisweepError`. The package root
(``pipeline``) exports these names lazily, so ``import pipeline`` stays light.

This module sits above every stage (it is imported by no module of the package); it only
resolves what the user gave into a config and a store and hands them on.

Examples
--------
>>> import pipeline as hs                                             # doctest: +SKIP
>>> cfg = hs.load_config("configs/api-quickstart.toml")              # doctest: +SKIP
>>> hs.run(cfg, workers=2)                                           # doctest: +SKIP
>>> summary = hs.summarize(cfg)                                      # doctest: +SKIP
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from pipeline.analysis.lstar import longest_ballistic_length
from pipeline.analysis.samples import open_samples as _open_samples
from pipeline.analysis.summary import save_summary
from pipeline.analysis.summary import summarize as _summarize
from pipeline.errors import ConfigError, HelisweepError, StoreError
from pipeline.network.plan import plan_network
from pipeline.network.run import SAMPLES_STORE as NETWORK_STORE
from pipeline.network.run import network_status, run_network
from pipeline.output.figures import load_run, make_figures
from pipeline.output.package import make_package, verify_package
from pipeline.output.report import build_report
from pipeline.precision import plan_precision, precision_status, run_to_precision
from pipeline.sweep.clusters import local_client, open_client
from pipeline.sweep.config import SweepConfig, load_config
from pipeline.sweep.driver import check_before_cluster, run_on_cluster, run_sweep
from pipeline.sweep.lock import describe_lock, read_lock
from pipeline.sweep.store import SampleStore

__all__ = ['load_config', 'local_client', 'open_client', 'run', 'status', 'open_samples',
           'summarize', 'save_summary', 'lstar', 'figures', 'package', 'verify_package',
           'report', 'HelisweepError']

#: the name of a direct run's store in its run directory
_STORE = "samples.zarr"


# --------------------------------------------------------------------------- resolving
def _as_config(config: SweepConfig | str | Path) -> SweepConfig:
    """A validated config from a config object or the path of a config file."""
    if isinstance(config, SweepConfig):
        return config
    if isinstance(config, (str, Path)):
        return load_config(config)
    raise ConfigError(f"config = {config!r} is neither a SweepConfig nor the path of a config "
                      f"file; pass load_config('<file>.toml') or the path itself")


def _resolve(source) -> tuple[Path, SweepConfig | None]:
    """The store a source means, and its config when the source names one.

    A config (object or ``.toml`` file) means the store in its run directory: ``samples.zarr``,
    or the sampled devices of the edge-network model for a config with an ``[edges]`` table.
    """
    if isinstance(source, SweepConfig) or (isinstance(source, (str, Path))
                                           and Path(source).suffix == ".toml"):
        cfg = _as_config(source)
        return cfg.run_dir / (NETWORK_STORE if cfg.edges is not None else _STORE), cfg
    if not isinstance(source, (str, Path)):
        raise StoreError(f"{source!r} is neither a config, a run directory nor a sample store; "
                         f"pass one of these (a SweepConfig or a path)")
    path = Path(source)
    if (path / "zarr.json").is_file():
        return path, None
    for name in (_STORE, NETWORK_STORE):
        if (path / name / "zarr.json").is_file():
            return path / name, None
    raise StoreError(
        f"{str(path)!r} is neither a config file (.toml), a run directory holding {_STORE} nor "
        f"a sample store; run the sweep first (run(config)) or give one of these")


def _config_dir(cfg: SweepConfig | None) -> str | None:
    return str(cfg.base_dir) if cfg is not None else None


# --------------------------------------------------------------------------- computing
def run(config: SweepConfig | str | Path, *, client=None, workers: int | None = None,
        store_path: str | Path | None = None, fresh: bool = False, retry_failed: bool = False,
        progress: bool = True) -> SampleStore:
    """Compute the missing samples of a run (what ``helisweep run`` does) and return its store.

    Rerunning resumes: nothing already stored is computed again, and a store of another run is
    refused before anything starts. A precision target (``[run] target_ci``) runs the stopping
    loop; an ``[edges]`` table runs the edge-network model.

    Parameters
    ----------
    config : SweepConfig, str or Path
        The config, or the path of its file.
    client : distributed.Client, optional
        Compute on this client. Without one, a client is opened through the config's
        ``[cluster]`` table for the duration of the call (a local cluster by default, with
        ``workers`` processes) and closed after.
    workers : int, optional
        Worker processes of the local cluster opened here (default ``[execution] workers``,
        0: one per core); refused together with ``client``.
    store_path : str or Path, optional
        Default ``<run directory>/samples.zarr``.
    fresh : bool
        A store of another run (or another store format) is moved aside (never deleted)
        instead of refused.
    retry_failed : bool
        Compute failed samples again (their failure records stay in the store's history).
    progress : bool
        Progress on standard error.

    Returns
    -------
    SampleStore
        The run's store (for an ``[edges]`` config, the store of its sampled devices).

    Raises
    ------
    HelisweepError
        Bad input, a store of another run or one in use, before any compute.

    Examples
    --------
    >>> store = run("configs/api-quickstart.toml", workers=2)          # doctest: +SKIP
    >>> store.counts()["done"]                                          # doctest: +SKIP
    """
    cfg = _as_config(config)
    if client is not None and workers is not None:
        raise ConfigError(f"workers = {workers!r} sizes the local cluster that run() opens when "
                          f"no client is given; with client= its workers compute. Pass one of the two")
    if cfg.edges is not None:
        return _run_network(cfg, client, workers, store_path, fresh, progress)
    plan = plan_precision(cfg)  # a target this run cannot have is refused before anything starts
    options = dict(store_path=store_path, fresh=fresh, progress=progress, retry_failed=retry_failed)
    if plan is None and client is None:
        return run_on_cluster(cfg, workers=workers, **options)
    if plan is None:
        return run_sweep(cfg, client=client, **options)
    if client is not None:
        return run_to_precision(cfg, client=client, **options)
    check_before_cluster(cfg, None, workers, store_path or cfg.run_dir / _STORE, fresh=fresh)
    with open_client(cfg, workers=workers, store_path=store_path) as session:
        return run_to_precision(cfg, client=session.client, max_in_flight=session.max_in_flight,
                                **options)


def _run_network(cfg: SweepConfig, client, workers, store_path, fresh: bool,
                 progress: bool) -> SampleStore:
    """:func:`run` of an ``[edges]`` config: pools and sampled devices."""
    if store_path is not None:
        raise ConfigError(f"store_path = {str(store_path)!r} names a direct run's sample store; "
                          f"an [edges] run keeps its results in its [run] directory (drop "
                          f"store_path)")
    plan_network(cfg)  # the guard rails refuse before any cluster starts
    if client is None:
        with open_client(cfg, workers=workers) as session:
            res = run_network(cfg, client=session.client, fresh=fresh, progress=progress)
    else:
        res = run_network(cfg, client=client, fresh=fresh, progress=progress)
    return SampleStore.open(res["store"])


def status(source) -> str:
    """What a run's store holds and what is left (the text of ``helisweep status``).

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store.

    Returns
    -------
    str
        Samples done, failed and missing overall and per axis value; failures by reason;
        who is computing it now; with a precision target, each point against it.
    """
    path, cfg = _resolve(source)
    if cfg is not None and cfg.edges is not None:
        return network_status(cfg)
    store = SampleStore.open(path)
    lines = [store.report()]
    held = read_lock(path)  # reading never takes or waits for the lock
    if held is not None:
        lines.append(f"being computed by {describe_lock(held)}")
    text = precision_status(store, config_dir=_config_dir(cfg))
    return "\n".join(lines + ([text] if text else []))


# --------------------------------------------------------------------------- reading
def open_samples(source):
    """The samples of a run as an xarray Dataset, read lazily after the chunk checksums are
    verified (a damaged chunk is refused, never averaged).

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store.

    Returns
    -------
    xarray.Dataset
        ``transmission``, ``modes``, ``measurements`` and ``status`` over (realisation,
        geometry, disorder_strength, b_perp, gate_voltage, energy, ...); only samples with
        ``status == 1`` are computed (see :class:`~pipeline.sweep.store.SampleStatus`).
    """
    path, _ = _resolve(source)
    return _open_samples(path)[0]


def summarize(source, *, temperatures: Sequence[float] = (), bootstrap_resamples: int = 2000,
              bootstrap_seed: int = 0, confidence: float = 0.95,
              quantised: Mapping[str, float] | None = None):
    """The statistics of every sweep point of a run, as an xarray Dataset (model estimates).

    :func:`pipeline.analysis.summary.summarize` of the run's store, with the config's
    ``[summary]`` settings and its directory (for a geometry file given by a relative path).
    Write it with :func:`save_summary`.

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store.
    temperatures : sequence of float
        Also smear each sample thermally at these temperatures (K).
    bootstrap_resamples, bootstrap_seed, confidence
        The studentized bootstrap of the interval of the mean.
    quantised : mapping, optional
        Ideal values per measurement, overriding those derived from the config.

    Returns
    -------
    xarray.Dataset
        ``mean``, ``sem``, ``ci95_low``, ``ci95_high``, ``n_samples``, ... over (geometry,
        disorder_strength, b_perp, gate_voltage, energy, measurement); ``unit`` and
        ``quantised`` coordinates on ``measurement``. Use ``ds["mean"]`` (``ds.mean`` is the
        Dataset method).
    """
    path, cfg = _resolve(source)
    tail = cfg.summary.tail_deviation if cfg is not None else 0.05
    return _summarize(path, temperatures=tuple(temperatures),
                      bootstrap_resamples=bootstrap_resamples, bootstrap_seed=bootstrap_seed,
                      confidence=confidence, quantised=quantised, config_dir=_config_dir(cfg),
                      tail_deviation=tail)


def lstar(source, measurement: str, *, point: Mapping[str, float] | None = None,
          tolerance: float = 0.05, bootstrap_resamples: int = 2000, seed: int = 0,
          confidence: float = 0.95, quantised: float | None = None):
    """The longest ballistic edge length L* of a length sweep (a model estimate, nm).

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store; the geometry axis must
        sweep an edge length.
    measurement : str
        A measurement label of the run, e.g. ``"G(L,R)"``.
    point : mapping, optional
        The sweep point (``{"energy": 0.0}``; axes of one value may be left out). Without
        one, every point is analysed.
    tolerance : float
        Relative deviation from the ideal value that ends L* (default 0.05).
    bootstrap_resamples, seed, confidence
        The bootstrap over realisations of the interval of L*.
    quantised : float, optional
        Ideal value; default derived from the config.

    Returns
    -------
    LStarResult or LStarTable
        One result at ``point``, else a table of every point (``.text()`` reads either).
    """
    path, cfg = _resolve(source)
    return longest_ballistic_length(path, measurement, point=point, tolerance=tolerance,
                                    bootstrap_resamples=bootstrap_resamples, seed=seed,
                                    confidence=confidence, quantised=quantised,
                                    config_dir=_config_dir(cfg))


# --------------------------------------------------------------------------- writing
def figures(source, out_dir: str | Path | None = None, *, summary: Any = None,
            lstar_results: Any = None) -> list[Path]:
    """Write every figure of a run (PDF, PNG and the CSV of what each plots).

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store.
    out_dir : str or Path, optional
        Default ``<run directory>/figures``; figures of the same name are replaced (they
        are derived from the store).
    summary : xarray.Dataset, str or Path, optional
        The summary (or its NetCDF file); default computed with :func:`summarize`.
    lstar_results : optional
        L* results or tables (:func:`lstar`) to draw on the length figures.

    Returns
    -------
    list of Path
        Every file written.
    """
    path, cfg = _resolve(source)
    if summary is None and cfg is not None:
        summary = summarize(cfg)
    data = load_run(path, summary, config=cfg)
    return make_figures(data, Path(out_dir) if out_dir is not None else path.parent / "figures",
                        lstar=lstar_results)


def package(source, *, summary: Any = None, lstar_results: Any = (),
            figure_files: Sequence[str | Path] | None = None,
            out_dir: str | Path | None = None) -> tuple[Path, Path]:
    """Write the supplementary-data package of a run: a folder and its zip, never overwriting
    an earlier one (:func:`pipeline.output.package.make_package`).

    Parameters
    ----------
    source : SweepConfig, str or Path
        A config (or its file), a run directory or a sample store.
    summary : xarray.Dataset, str or Path, optional
        Default computed with :func:`summarize`.
    lstar_results : optional
        L* results or tables to include (``lstar.json``).
    figure_files : sequence of paths, optional
        Figure files to include; default: made afresh.
    out_dir : str or Path, optional
        Inside the run directory (default: the run directory itself).

    Returns
    -------
    folder, zip_path : Path
    """
    path, cfg = _resolve(source)
    if summary is None and cfg is not None:
        summary = summarize(cfg)
    return make_package(path.parent, out_dir=out_dir, lstar_results=lstar_results,
                        figures=figure_files, summary=summary, store_path=path, config=cfg,
                        summary_name="edges" if path.name == NETWORK_STORE else "summary")


def report(config: SweepConfig | str | Path, *, client=None, run: bool = False,
           temperatures: Sequence[float] = (), tolerance: float = 0.05,
           progress: bool = True) -> Path:
    """Summary, L*, figures and package of a run in one call (``helisweep report``).

    Parameters
    ----------
    config : SweepConfig, str or Path
        The config, or the path of its file.
    client : distributed.Client, optional
        With ``run=True``: compute the missing samples on it (default: a client through the
        config's ``[cluster]`` table).
    run : bool
        First compute what is missing; without it nothing is computed.
    temperatures : sequence of float
        Also smear thermally at these temperatures (K).
    tolerance : float
        Relative tolerance of L*.
    progress : bool
        Progress on standard error.

    Returns
    -------
    Path
        The package's zip file.
    """
    cfg = _as_config(config)
    return build_report(cfg, client=client, run=run, temperatures=tuple(temperatures),
                        tolerance=tolerance, progress=progress)
