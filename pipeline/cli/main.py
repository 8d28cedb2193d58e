"""Command-line interface: ``helisweep <command> ...`` (also ``python -m pipeline.cli``).

Commands
--------
preview    device outline + preflight checks + mesh figure (no sweep)
solve      one clean solve: transmissions, conductance matrix, chosen R_ij,kl
preflight  the preflight checks for a sweep configuration's device
run        run or resume a sweep into its Zarr store (locally or on Slurm: --cluster slurm)
slurm-script  write (and optionally submit) a batch-mode Slurm job script
status     what a run's store holds and what is left
report     summary, L*, figures and supplementary-data package of a run
demo       the demonstration scenario end to end
"""

from __future__ import annotations

import argparse
import sys
import warnings
from pathlib import Path

import numpy as np

from pipeline.cli.demo import run_demo
from pipeline.cli.slurm import (
    add_cluster_options,
    add_credentials_command,
    add_run_in_allocation_command,
    add_slurm_script_command,
    cluster_overrides,
)
from pipeline.constants import H_OVER_E2_OHM
from pipeline.device.outline import validate_device
from pipeline.device.readers import load_device
from pipeline.device.templates import TEMPLATES
from pipeline.errors import HelisweepError
from pipeline.network.plan import plan_network
from pipeline.network.run import POOLS_STORE, network_status, run_network
from pipeline.network.sections import section_table
from pipeline.output.preview import preview_device
from pipeline.output.report import build_report
from pipeline.physics.materials import get_preset
from pipeline.precision import plan_precision, precision_status, run_to_precision
from pipeline.sweep.clusters import allocation_client, open_client
from pipeline.sweep.config import load_config
from pipeline.sweep.driver import check_before_cluster, run_on_cluster
from pipeline.sweep.lock import describe_lock, read_lock
from pipeline.sweep.runmodel import device_for
from pipeline.sweep.store import SampleStore
from pipeline.system.mesh import build_system
from pipeline.transport.environment import describe, summary_line
from pipeline.transport.landauer import conductance_matrix, parse_measurement
from pipeline.transport.solver import transmission_matrix

__all__ = ['main']


def _parse_params(items: list[str]) -> dict[str, float]:
    out = {}
    for item in items or []:
        key, sep, value = item.partition("=")
        if not sep:
            raise HelisweepError(f"--param expects NAME=VALUE (nm), got {item!r}")
        try:
            out[key.strip()] = float(value)
        except ValueError:
            raise HelisweepError(f"--param {key}: {value!r} is not a number (nm)") from None
    return out


def _device_from_args(args):

    if args.device in TEMPLATES:
        return TEMPLATES[args.device](**_parse_params(args.param))
    path = Path(args.device)
    if not path.exists():
        raise HelisweepError(
            f"{args.device!r} is neither a template ({', '.join(TEMPLATES)}) nor an existing "
            f"geometry file"
        )
    return load_device(path)


def _material_from_args(args):

    return get_preset(args.material)


def _cmd_preview(args) -> int:
    device = _device_from_args(args)
    text = preview_device(device, _material_from_args(args), args.lattice, Path(args.out))
    print(text)
    print(f"figure: {args.out} (and .pdf)")
    return 0


def _cmd_solve(args) -> int:

    device = _device_from_args(args)
    validate_device(device, args.lattice)
    material = _material_from_args(args)
    dsys = build_system(device, material, args.lattice, contact_doping=args.doping,
                        with_field=args.field != 0)
    res = transmission_matrix(dsys, args.energy, dsys.params(b_perp=args.field))
    names = dsys.contact_names
    np.set_printoptions(precision=5, suppress=True, linewidth=120)
    print(f"{device.name}: {dsys.n_sites} sites, E = {args.energy} meV, B = {args.field} T, "
          f"contacts {', '.join(names)} (clean model estimate)")
    print("open modes per lead:", dict(zip(names, res.modes.tolist())))
    print("transmission T[to, from]:")
    print(res.matrix)
    print("conductance matrix G (e^2/h):")
    print(conductance_matrix(res.matrix))

    for label in args.measure or []:
        m = parse_measurement(label)
        value = float(m.evaluate(res.matrix, names))
        extra = f" = {value * H_OVER_E2_OHM:.1f} ohm" if m.kind == "R" else ""
        print(f"{label} = {value:.6f} {m.unit}{extra}")
    return 0


def _cmd_preflight(args) -> int:

    cfg = load_config(args.config)
    if cfg.edges is not None:
        return _preflight_network(cfg)
    out_dir = Path(args.out) if args.out else cfg.run_dir
    print(summary_line(describe()))
    for g, value in enumerate(cfg.axes["geometry"]):
        device = device_for(cfg, g)
        suffix = f"-{value:g}nm" if cfg.sweep.geometry else ""
        out = out_dir / f"device{suffix}.png"
        print(preview_device(device, cfg.material.parameters(), cfg.lattice.constant, out,
                             with_field=cfg.needs_field))
        print(f"figure: {out}")
    return 0


def _cmd_run(args) -> int:

    cfg = load_config(args.config)
    plan = plan_precision(cfg)  # a target this run cannot have is refused before anything starts
    if cfg.edges is not None:
        return _run_network(cfg, args)
    if plan is not None:
        # bad input, a store of another run or one in use: refused before any cluster starts
        check_before_cluster(cfg, cluster_overrides(args), args.workers,
                             args.store or cfg.run_dir / "samples.zarr", fresh=args.fresh)
        with open_client(cfg, cluster_overrides(args), workers=args.workers,
                         store_path=args.store) as session:
            store = run_to_precision(cfg, client=session.client, store_path=args.store,
                                     fresh=args.fresh, progress=not args.quiet,
                                     retry_failed=args.retry_failed,
                                     max_in_flight=session.max_in_flight)
    else:
        store = run_on_cluster(cfg, cluster_overrides(args), workers=args.workers,
                               store_path=args.store, fresh=args.fresh, progress=not args.quiet,
                               retry_failed=args.retry_failed)
    c = store.counts()
    print(f"{store.path}: {c['done']} done, {c['failed']} failed, {c['missing']} missing of {c['total']}"
          + (f" (precision target: `helisweep status {args.config}` shows each point)"
             if plan is not None else ""))
    return 0


def _cmd_run_in_allocation(args, plain) -> int:
    """``helisweep run-in-allocation``: with a precision target the stopping loop runs on the
    job's cluster; otherwise ``plain`` (the batch-mode command of :mod:`pipeline.cli.slurm`)."""
    cfg = load_config(args.config)
    plan = plan_precision(cfg)
    if plan is None or cfg.edges is not None:
        return plain(args)
    with allocation_client(args.scheduler_file, expected_workers=args.expected_workers,
                           timeout=args.timeout, credentials=args.credentials) as session:
        store = run_to_precision(cfg, client=session.client, store_path=args.store,
                                 fresh=args.fresh, progress=args.progress,
                                 max_in_flight=session.max_in_flight)
    c = store.counts()
    print(f"helisweep: {store.path}: {c['done']} done, {c['failed']} failed, "
          f"{c['missing']} missing of the requested samples (precision target)",
          file=sys.stderr, flush=True)
    return 0


def _run_network(cfg, args) -> int:
    """``helisweep run`` of an ``[edges]`` config: pools and sampled devices (edges.nc)."""
    if args.store:
        raise HelisweepError(
            f"--store {args.store!r} names a direct run's sample store; an [edges] run keeps its "
            f"pools in <run>/{POOLS_STORE} (drop --store, or set [run] directory)")
    plan_network(cfg)  # the guard rails refuse before any cluster starts
    with open_client(cfg, cluster_overrides(args), workers=args.workers) as session:
        res = run_network(cfg, client=session.client, fresh=args.fresh, progress=not args.quiet)
    print(f"{res['netcdf']}: edge-network model, {cfg.edges.sequences} sampled devices per "
          f"sweep point (model estimates); `helisweep report` draws the figures and the package")
    return 0


def _preflight_network(cfg) -> int:
    """``helisweep preflight`` of an ``[edges]`` config: the guard rails and the sections."""
    plan = plan_network(cfg)
    keys = plan.pool_keys(cfg)
    print(f"edge-network model: pool strip {plan.pool_width:g} nm wide, segments of "
          f"{plan.segment_length:g} nm with {plan.buffer:g} nm clean buffers "
          f"({plan.disordered_length:g} nm of disorder each); edge decay length "
          f"{plan.edge_decay_length:.1f} nm")
    print(f"guard rails passed: narrowest width {plan.min_width:.0f} nm, closest contacts "
          f"{plan.min_contact_distance:.0f} nm; {len(keys)} pool(s) x {cfg.edges.segments} "
          f"segments to solve")
    for (e, b), l_ev in sorted(plan.evanescent_lengths.items()):
        print(f"  edge energy {e:g} meV, B = {b:g} T: evanescent decay length {l_ev:.1f} nm")
    for g, (dev, secs) in enumerate(zip(plan.devices, plan.sections, strict=True)):
        head = f"{cfg.sweep.geometry.parameter} = {cfg.axes['geometry'][g]:g} nm: " \
            if cfg.sweep.geometry else ""
        print(f"{head}device {dev.name!r}, {len(secs)} edge sections")
        print(section_table(dev, list(secs)))
    return 0


def _cmd_status(args) -> int:

    target = Path(args.target)
    config_dir = None
    if target.suffix == ".toml":
        cfg = load_config(target)
        if cfg.edges is not None:
            print(network_status(cfg))
            return 0
        target = cfg.run_dir / "samples.zarr"
        config_dir = cfg.base_dir
    store = SampleStore.open(target)
    print(store.report(max_failures=args.failures))
    held = read_lock(target)  # reading never takes or waits for the lock
    if held is not None:
        print(f"being computed by {describe_lock(held)}")
    text = precision_status(store, config_dir=config_dir, max_points=args.points)
    if text:
        print(text)
    return 0


def _cmd_report(args) -> int:
    cfg = load_config(args.config)
    options = dict(run_dir=args.run_dir, temperatures=tuple(args.temperature or ()),
                   tolerance=args.tolerance, progress=not args.quiet)
    if not args.run:
        if args.workers is not None:
            raise HelisweepError(f"--workers {args.workers!r} sizes the computation of "
                                 f"missing samples, which happens only with --run")
        build_report(cfg, client=None, run=False, **options)
        return 0
    with open_client(cfg, cluster_overrides(args), workers=args.workers) as session:
        build_report(cfg, client=session.client, run=True, **options)
    return 0


def _cmd_demo(args) -> int:

    run_demo(Path(args.out), workers=args.workers)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="helisweep", description=__doc__.split("\n")[0])
    sub = p.add_subparsers(dest="command", required=True)

    q = sub.add_parser("preview", help="draw a device, mesh it and run the preflight checks")
    q.add_argument("device", help="geometry file (.geojson, .wkt, .gds) or template (strip, hbar, hallbar)")
    q.add_argument("--param", action="append", metavar="NAME=NM", help="template parameter in nm (repeatable)")
    q.add_argument("--material", default="hgte-7.0nm", help="material preset (default hgte-7.0nm)")
    q.add_argument("--lattice", type=float, default=5.0, help="lattice constant in nm (default 5)")
    q.add_argument("--out", default="device-preview.png", help="figure file (PNG; a PDF is written beside it)")
    q.set_defaults(func=_cmd_preview)

    q = sub.add_parser("solve", help="one clean scattering solve: transmissions, G matrix, R_ij,kl")
    q.add_argument("device", help="geometry file or template")
    q.add_argument("--param", action="append", metavar="NAME=NM", help="template parameter in nm (repeatable)")
    q.add_argument("--material", default="hgte-7.0nm")
    q.add_argument("--lattice", type=float, default=5.0, help="lattice constant in nm")
    q.add_argument("--energy", type=float, default=0.0, help="Fermi energy in meV")
    q.add_argument("--field", type=float, default=0.0, help="perpendicular field in T")
    q.add_argument("--doping", type=float, default=0.0, help="contact doping in meV (metallic contacts)")
    q.add_argument("--measure", action="append", metavar="LABEL", help="e.g. R14,23 or G14 (repeatable)")
    q.set_defaults(func=_cmd_solve)

    q = sub.add_parser("preflight", help="preflight checks for a sweep configuration")
    q.add_argument("config", help="sweep configuration (TOML, see configs/)")
    q.add_argument("--out", help="directory for the figures (default: the run directory)")
    q.set_defaults(func=_cmd_preflight)

    q = sub.add_parser("run", help="run or resume a sweep")
    q.add_argument("config", help="sweep configuration (TOML, see configs/); rerunning resumes")
    q.add_argument("--workers", type=int, help="local worker processes (default: execution.workers or one per core)")
    q.add_argument("--store", help="store path (default: <run directory>/samples.zarr)")
    q.add_argument("--fresh", action="store_true", help="start anew if the store holds another config (the old store is moved aside)")
    q.add_argument("--retry-failed", action="store_true",
                   help="compute failed samples again (their failure records stay in the store's history)")
    q.add_argument("--quiet", action="store_true", help="no progress output")
    add_cluster_options(q)
    q.set_defaults(func=_cmd_run)

    add_slurm_script_command(sub)
    add_credentials_command(sub)
    q = add_run_in_allocation_command(sub)
    plain = q.get_default("func")
    q.set_defaults(func=lambda args, plain=plain: _cmd_run_in_allocation(args, plain))

    q = sub.add_parser("status", help="what a run's store holds and what is left")
    q.add_argument("target", help="a config file (.toml) or a store directory")
    q.add_argument("--failures", type=int, default=10, help="failed samples to list (default 10)")
    q.add_argument("--points", type=int, default=12,
                   help="with a precision target: points to list, farthest from it first (default 12)")
    q.set_defaults(func=_cmd_status)

    q = sub.add_parser(
        "report", help="summary (NetCDF), L*, figures and the supplementary-data package",
        description="Summarise what the run's store holds: write summary.nc, lstar.json (length "
                    "sweeps), figures/ and package-<run>/ + .zip into the run directory. "
                    "Computes nothing unless --run is given. Results are model estimates.")
    q.add_argument("config", help="sweep configuration (TOML)")
    q.add_argument("--run-dir", help="run directory (default: run.directory of the config)")
    q.add_argument("--run", action="store_true",
                   help="first compute what is missing (samples, segment pools) on the cluster "
                        "of the config's [cluster] table; without it nothing is computed, so "
                        "report is safe on a login node")
    q.add_argument("--no-run", dest="run", action="store_false", help=argparse.SUPPRESS)
    q.add_argument("--workers", type=int, help="with --run: local worker processes")
    q.add_argument("--temperature", type=float, action="append", metavar="K",
                   help="also smear G(E) thermally at this temperature in K (repeatable)")
    q.add_argument("--tolerance", type=float, default=0.05,
                   help="relative deviation from the quantised value that ends L* (default 0.05)")
    q.add_argument("--quiet", action="store_true")
    add_cluster_options(q)
    q.set_defaults(func=_cmd_report)

    q = sub.add_parser("demo", help="run the demonstration scenario")
    q.add_argument("--out", default="demo-output")
    q.add_argument("--workers", type=int, default=0)
    q.set_defaults(func=_cmd_demo)
    return p


def _one_line_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Print a warning as ``helisweep: warning: ...`` on one line (no file, no line number)."""
    print(f"helisweep: warning: {' '.join(str(message).split())}", file=sys.stderr, flush=True)


def run_command(parser: argparse.ArgumentParser, argv: list[str] | None = None) -> int:
    """Parse and run a subcommand; an error the user can act on becomes a message and exit 2,
    and every warning one line on standard error."""
    args = parser.parse_args(argv)
    with warnings.catch_warnings():
        warnings.showwarning = _one_line_warning
        try:
            return args.func(args)
        except HelisweepError as exc:
            print(f"helisweep: error: {exc}", file=sys.stderr)
            return 2


def main(argv: list[str] | None = None) -> int:
    return run_command(build_parser(), argv)

