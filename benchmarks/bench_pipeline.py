"""Per-sample cost of disorder-averaged edge transport: naive loop, bare solver floor, pipeline.

Model: the four-band BHZ model with the 7 nm HgTe parameters (``PRESETS["hgte-7.0nm"]``) on
a square lattice, E_F = 0, Anderson disorder, B = 0, one BLAS thread. For every device size
the script times, interleaved round robin (so load drift hits all variants alike):

``naive``
    What one would write without the pipeline: per realisation a new ``kwant.Builder`` with a
    Python value function for the disorder onsite, ``attach_lead`` for every lead,
    ``.finalized()``, then ``kwant.smatrix`` with Kwant's default solver and settings and
    ``transmission(1, 0)`` (the whole transmission matrix for a multi-terminal device).
``floor-4band`` / ``floor-spinblock``
    The bare solver floor: ``pipeline.transport.SOLVER.smatrix`` on a prebuilt system whose
    lead modes were precalculated, with the same disorder and nothing else; for the full
    four-band system and for the spin-block system (at B = 0 one half-size solve gives both
    spins).
``pipeline``
    ``pipeline.sweep.tasks.solve_realisation(cfg, key)`` per realisation after a warm-up (system and lead
    modes cached), divided by the samples per task.

All variants solve the same Hamiltonian with the same disorder numbers (the pipeline's
tag-keyed Anderson draw); the script checks that their transmissions agree.

It also measures the peak memory of each variant in a fresh subprocess (``VmHWM``, see
:func:`_peak_rss_mb`), the throughput of whole sweeps through ``pipeline.sweep.driver.run_sweep``
on 1 and 2 Dask workers, and profiles ``solve_realisation`` (a breakdown by item, a cProfile listing and
"what if" solver settings that show what would lower the floor itself).

Run from the repository root on an idle machine::

    .venv/bin/python benchmarks/bench_pipeline.py --write        # full run -> docs/benchmarks.md
    .venv/bin/python benchmarks/bench_pipeline.py --smoke        # toy sizes, 1 repeat (a check)

See ``benchmarks/README.md`` for every option.
"""

from __future__ import annotations

# One BLAS/OpenMP thread in this process and in the Dask workers it starts: set before NumPy
# (and so OpenBLAS) is imported anywhere.
import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import argparse  # noqa: E402
import cProfile  # noqa: E402
import datetime as _dt  # noqa: E402
import gc  # noqa: E402
import io  # noqa: E402
import json  # noqa: E402
import logging  # noqa: E402
import pickle  # noqa: E402
import pstats  # noqa: E402
import resource  # noqa: E402
import shlex  # noqa: E402
import shutil  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from pathlib import Path  # noqa: E402
from types import SimpleNamespace  # noqa: E402

import numpy as np  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
DEFAULT_DOC = REPO / "docs" / "benchmarks.md"
DEFAULT_SIZES = ["strip:200x80", "strip:100x160", "hbar:120x40x40x40"]
SMOKE_SIZES = ["strip:16x8", "strip:8x16", "hbar:8x6x4x8"]
TABLE_COLUMNS = ["variant", "size", "median s/sample", "ratio to naive", "ratio to floor",
                 "peak RSS MB"]
VARIANTS = ["naive", "floor-4band", "floor-spinblock", "pipeline"]
VARIANT_TITLES = {
    "naive": "naive loop (rebuild Builder + kwant.smatrix, 4-band)",
    "floor-4band": "bare solver floor, 4-band",
    "floor-spinblock": "bare solver floor, spin block",
    "pipeline": "pipeline solve_realisation (spin block)",
    "baseline": "imports only (no system)",
}


# --------------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class Settings:
    """Physics settings shared by all variants."""

    lattice_constant: float = 5.0  # nm
    disorder_width: float = 20.0  # Anderson U, meV
    contact_doping: float = 25.0  # meV, downward band shift in the leads
    energy: float = 0.0  # Fermi energy, meV
    seed: int = 7


@dataclass(frozen=True)
class Case:
    """A device size: ``strip:LxW`` or ``hbar:LxWxALxAW``, all in lattice sites.

    A strip is L sites along the transport direction (x, leads on the left and right ends)
    and W sites across. An H-bar has a bridge L long and W wide between two bars AW wide that
    reach AL beyond the bridge above and below; its four leads (AW wide) leave the bar ends.
    """

    spec: str
    kind: str
    dims: tuple[int, ...]

    @classmethod
    def parse(cls, spec: str) -> "Case":
        kind, _, rest = spec.partition(":")
        try:
            dims = tuple(int(x) for x in rest.lower().split("x"))
        except ValueError:
            dims = ()
        want = {"strip": 2, "hbar": 4}.get(kind)
        if want is None or len(dims) != want or min(dims, default=0) < 1:
            raise argparse.ArgumentTypeError(
                f"bad size {spec!r}: use strip:LxW (e.g. strip:200x80, L along the transport "
                f"direction) or hbar:LxWxALxAW (e.g. hbar:120x40x40x40), in lattice sites"
            )
        return cls(spec, kind, dims)

    @property
    def n_sites(self) -> int:
        if self.kind == "strip":
            return self.dims[0] * self.dims[1]
        L, W, AL, AW = self.dims
        return 2 * AW * (2 * AL + W) + L * W

    @property
    def label(self) -> str:
        shape = "×".join(str(d) for d in self.dims)
        return f"{self.kind} {shape} ({self.n_sites:,} sites)"

    # the same device for the naive loop (rectangles of sites, leads) and the pipeline (template)
    def rectangles(self) -> list[tuple[int, int, int, int]]:
        """Sites as half-open rectangles (x0, x1, y0, y1) of tags."""
        if self.kind == "strip":
            L, W = self.dims
            return [(0, L, 0, W)]
        L, W, AL, AW = self.dims
        H, xr = 2 * AL + W, AW + L
        return [(0, AW, 0, H), (AW, xr, AL, AL + W), (xr, xr + AW, 0, H)]

    def leads(self) -> list[tuple[tuple[int, int], list[tuple[int, int]]]]:
        """(direction, tags of one lead cell) per lead, in the pipeline's contact order."""
        if self.kind == "strip":
            L, W = self.dims
            cell = [(0, j) for j in range(W)]
            return [((-1, 0), cell), ((1, 0), cell)]  # contacts L, R
        L, W, AL, AW = self.dims
        xr = AW + L
        left = [(i, 0) for i in range(AW)]
        right = [(i, 0) for i in range(xr, xr + AW)]
        return [((0, 1), left), ((0, -1), left), ((0, -1), right), ((0, 1), right)]  # 1,2,3,4

    def config_text(self, settings: Settings, *, realisations: int, directory: str) -> str:
        a = settings.lattice_constant
        if self.kind == "strip":
            L, W = self.dims
            template, params = "strip", {"length": L * a, "width": W * a}
            report = "G(L,R)"
        else:
            L, W, AL, AW = self.dims
            template = "hbar"
            params = {"length": L * a, "width": W * a, "arm_length": AL * a,
                      "arm_width": AW * a}
            report = "R14,23"
        table = ", ".join(f"{k} = {v!r}" for k, v in params.items())
        return f"""
[run]
name = "bench"
seed = {settings.seed}
realisations = {realisations}
directory = {json.dumps(directory)}

[device]
template = "{template}"
parameters = {{ {table} }}

[lattice]
constant = {a!r}

[material]
preset = "hgte-7.0nm"

[contacts]
doping = {settings.contact_doping!r}

[[disorder]]
kind = "anderson"
width = {settings.disorder_width!r}

[sweep]
energy = {settings.energy!r}

[measure]
labels = ["{report}"]
"""


def _config(case: Case, settings: Settings, realisations: int, directory: str):
    from pipeline.sweep.config import parse_config

    return parse_config(case.config_text(settings, realisations=realisations,
                                         directory=directory))


def _rss_now_mb() -> float:
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def _peak_rss_mb() -> float:
    """Peak RSS of this process's address space (MB).

    ``VmHWM`` from /proc, not ``ru_maxrss``: Linux folds the high-water mark of the address
    space a process had before ``execve`` into its ``ru_maxrss``, and a subprocess starts as a
    (v)fork of its parent, so a probe's ``ru_maxrss`` reports at least the *parent's* RSS
    (measured: a 400 MB parent gives every child ``ru_maxrss`` >= 400 MB). ``VmHWM`` belongs
    to the address space, which ``execve`` replaces.
    """
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux


# --------------------------------------------------------------------------------- variants
class Variant:
    """One way of computing a sample; ``sample(r)`` returns (seconds per sample, T[1, 0])."""

    name = "?"

    def __init__(self, case: Case, settings: Settings, workdir: str):
        self.case, self.settings, self.workdir = case, settings, workdir

    def setup(self) -> None:
        pass

    def sample(self, r: int) -> tuple[float, float]:
        raise NotImplementedError


class Naive(Variant):
    """Rebuild everything per realisation, Kwant defaults throughout."""

    name = "naive"

    def setup(self) -> None:
        from pipeline.physics.bhz import lattice_matrices
        from pipeline.physics.materials import PRESETS

        a = self.settings.lattice_constant
        self.h0, self.tx, self.ty = lattice_matrices(PRESETS["hgte-7.0nm"], a)
        tags = [(i, j) for x0, x1, y0, y1 in self.case.rectangles()
                for i in range(x0, x1) for j in range(y0, y1)]
        tags = np.array(tags, dtype=np.int64)
        # The pipeline's Anderson draw, keyed by lattice tag, so every variant sees the same
        # disorder numbers (the check at the end compares the transmissions).
        self.tag_mesh = SimpleNamespace(tags=tags, positions=(tags + 0.5) * a,
                                        lattice_constant=a)

    def sample(self, r: int) -> tuple[float, float]:
        import kwant

        from pipeline.physics.disorder import Anderson

        s = self.settings
        a, h0, tx, ty = s.lattice_constant, self.h0, self.tx, self.ty
        eye = np.eye(4)
        t0 = time.perf_counter()
        pot = Anderson(s.disorder_width).sample(self.tag_mesh, seed=s.seed, realisation=r,
                                                stream=0).potential
        disorder = dict(zip(map(tuple, self.tag_mesh.tags.tolist()), pot.tolist()))

        def onsite(site, disorder):
            return h0 + disorder[site.tag] * eye

        lat = kwant.lattice.square(a, norbs=4)
        syst = kwant.Builder()
        for x0, x1, y0, y1 in self.case.rectangles():
            syst[(lat(i, j) for i in range(x0, x1) for j in range(y0, y1))] = onsite
        syst[kwant.builder.HoppingKind((1, 0), lat)] = tx
        syst[kwant.builder.HoppingKind((0, 1), lat)] = ty
        for (dx, dy), cell in self.case.leads():
            lead = kwant.Builder(kwant.TranslationalSymmetry((dx * a, dy * a)))
            lead[(lat(i, j) for i, j in cell)] = h0 - s.contact_doping * eye
            lead[kwant.builder.HoppingKind((1, 0), lat)] = tx
            lead[kwant.builder.HoppingKind((0, 1), lat)] = ty
            syst.attach_lead(lead)
        fsyst = syst.finalized()
        smat = kwant.smatrix(fsyst, s.energy, params=dict(disorder=disorder))
        if len(fsyst.leads) == 2:
            t10 = smat.transmission(1, 0)
        else:  # a multi-terminal measurement needs the whole matrix
            n = len(fsyst.leads)
            T = np.array([[smat.transmission(i, j) for j in range(n)] for i in range(n)])
            t10 = T[1, 0]
        return time.perf_counter() - t0, float(t10)


class Floor(Variant):
    """``SOLVER.smatrix`` on a prebuilt, precalculated system; nothing else is timed."""

    def __init__(self, case, settings, workdir, *, spin_block: bool):
        super().__init__(case, settings, workdir)
        self.spin_block = spin_block
        self.name = "floor-spinblock" if spin_block else "floor-4band"

    def setup(self) -> None:
        from pipeline.physics.materials import PRESETS
        from pipeline.sweep.runmodel import device_for
        from pipeline.system.mesh import build_system

        s = self.settings
        cfg = _config(self.case, s, 1, self.workdir)
        self.dsys = build_system(device_for(cfg, 0), PRESETS["hgte-7.0nm"],
                                 s.lattice_constant, contact_doping=s.contact_doping,
                                 spin_block=self.spin_block)
        self.fs = self.dsys.fsyst.precalculate(s.energy, params={"onsite_stack": None})

    def params_for(self, r: int) -> dict:
        from pipeline.physics.disorder import Anderson, realise

        s = self.settings
        pot, _ = realise([Anderson(s.disorder_width)], self.dsys.mesh, seed=s.seed,
                         realisation=r)
        if self.spin_block:
            blocks = self.dsys.block_params(potential=pot)
            assert len(blocks) == 2 and blocks[0][0] is blocks[1][0], "one solve at B = 0"
            return blocks[0][0]
        return self.dsys.params(potential=pot)

    def total_t10(self, smat) -> float:
        if self.spin_block:  # spin down is the transpose of spin up at B = 0
            return float(smat.transmission(1, 0) + smat.transmission(0, 1))
        return float(smat.transmission(1, 0))

    def sample(self, r: int) -> tuple[float, float]:
        from pipeline.transport.solver import SOLVER

        params = self.params_for(r)
        t0 = time.perf_counter()
        smat = SOLVER.smatrix(self.fs, self.settings.energy, params=params)
        dt = time.perf_counter() - t0
        return dt, self.total_t10(smat)


class Pipeline(Variant):
    """``solve_realisation`` per realisation after a warm-up, per sample."""

    name = "pipeline"

    def setup(self) -> None:
        from pipeline.sweep.tasks import solve_realisation

        self.cfg = _config(self.case, self.settings, 1_000_000, self.workdir)
        axes = self.cfg.axes
        self.per_task = len(axes["b_perp"]) * len(axes["gate_voltage"]) * len(axes["energy"])
        solve_realisation(self.cfg, (0, 0, 0))  # warm-up: builds the system, precalculates the leads

    def sample(self, r: int) -> tuple[float, float]:
        from pipeline.sweep.tasks import solve_realisation

        t0 = time.perf_counter()
        res = solve_realisation(self.cfg, (r, 0, 0))
        dt = time.perf_counter() - t0
        if res.failures:
            raise RuntimeError(f"solve_realisation failed: {res.failures}")
        return dt / self.per_task, float(res.transmission[0, 0, 0, 1, 0])


def make_variant(name: str, case: Case, settings: Settings, workdir: str) -> Variant:
    if name == "naive":
        return Naive(case, settings, workdir)
    if name in ("floor-4band", "floor-spinblock"):
        return Floor(case, settings, workdir, spin_block=name == "floor-spinblock")
    if name == "pipeline":
        return Pipeline(case, settings, workdir)
    raise ValueError(name)


# ------------------------------------------------------------------------- per-sample timing
def time_variants(cases, settings, repeats, workdir, log) -> dict:
    """Median seconds per sample of every (case, variant), round robin over repeats.

    Each variant does its set-up and one untimed warm-up sample (realisation 0) first; the
    timed repeats use realisations 1..repeats, the same for every variant. The start of the
    round rotates each repeat so no variant always runs right after the same one.
    """
    variants = {}
    for case in cases:
        for name in VARIANTS:
            v = make_variant(name, case, settings, workdir)
            t = time.perf_counter()
            v.setup()
            v.sample(0)
            log(f"  set-up + warm-up {name:16s} {case.label}: {time.perf_counter() - t:.1f} s")
            variants[(case.spec, name)] = v
    order = list(variants)
    times = {k: [] for k in order}
    t10 = {k: [] for k in order}
    for rep in range(repeats):
        shift = rep % len(order)
        for k in order[shift:] + order[:shift]:
            gc.collect()
            dt, t = variants[k].sample(rep + 1)
            times[k].append(dt)
            t10[k].append(t)
        log(f"  repeat {rep + 1}/{repeats} done")
    return {"times": times, "t10": t10}


# ------------------------------------------------------------------------------ memory probes
def probe_main(spec: dict) -> None:
    """Subprocess entry: set up one variant, run a few samples, print the peak RSS (JSON)."""
    settings = Settings(**spec["settings"])
    case = Case.parse(spec["case"])
    if spec["variant"] == "baseline":
        import kwant  # noqa: F401

        import pipeline.sweep.driver  # noqa: F401
        import pipeline.system.mesh  # noqa: F401
        import pipeline.transport.solver  # noqa: F401

        print(json.dumps({"peak_rss_mb": _peak_rss_mb(), "setup_rss_mb": _rss_now_mb()}))
        return
    v = make_variant(spec["variant"], case, settings, spec["workdir"])
    v.setup()
    setup_rss = _rss_now_mb()
    for r in range(spec["samples"]):
        v.sample(r + 1)
    print(json.dumps({"peak_rss_mb": _peak_rss_mb(), "setup_rss_mb": setup_rss}))


def measure_memory(cases, settings, samples, workdir, log) -> dict:
    out = {}
    jobs = [("baseline", cases[0])] + [(n, c) for c in cases for n in VARIANTS]
    for name, case in jobs:
        spec = {"variant": name, "case": case.spec, "samples": samples, "workdir": workdir,
                "settings": settings.__dict__}
        proc = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--probe",
                               json.dumps(spec)], capture_output=True, text=True, cwd=REPO)
        if proc.returncode != 0:
            raise RuntimeError(f"memory probe {name} {case.spec} failed:\n{proc.stderr}")
        res = json.loads(proc.stdout.strip().splitlines()[-1])
        key = "baseline" if name == "baseline" else (case.spec, name)
        out[key] = res
        log(f"  peak RSS {name:16s} {case.label}: {res['peak_rss_mb']:.0f} MB")
    return out


# ------------------------------------------------------------------------------------ sweeps
def _worker_stats():
    import psutil

    cpu = psutil.Process().cpu_times()
    return {"cpu": cpu.user + cpu.system, "peak_rss_mb": _peak_rss_mb()}


def measure_sweeps(case, settings, workers, realisations, repeats, workdir, log) -> dict:
    """Wall time of whole ``run_sweep`` calls on warm local clusters, round robin over sizes.

    Every worker first solves one task through ``client.run`` so its system and lead modes are
    cached (what a long sweep amortises); each timed sweep writes a fresh store.
    """
    import psutil

    from pipeline.sweep import driver
    from pipeline.sweep.checks import validate_run
    from pipeline.sweep.clusters import local_client
    from pipeline.sweep.driver import run_sweep
    from pipeline.sweep.tasks import solve_realisation

    cfg = _config(case, settings, realisations, workdir)
    axes = cfg.axes
    per_task = len(axes["b_perp"]) * len(axes["gate_voltage"]) * len(axes["energy"])
    samples = realisations * per_task
    t = time.perf_counter()
    validate_run(cfg)
    validate_s = time.perf_counter() - t
    # Time the driver's checks inside each run_sweep (workers idle meanwhile) by wrapping the
    # module-level function run_sweep calls; restored in the finally clause.
    checks = []

    def timed_validate_run(*args, **kwargs):  # whatever its signature
        t = time.perf_counter()
        try:
            return validate_run(*args, **kwargs)
        finally:
            checks.append(time.perf_counter() - t)

    driver.validate_run = timed_validate_run
    clients = {}
    try:
        for n in workers:
            t = time.perf_counter()
            clients[n] = local_client(n)
            logging.getLogger("distributed").setLevel(logging.WARNING)
            clients[n].wait_for_workers(n)
            clients[n].run(solve_realisation, cfg, (0, 0, 0))
            # one short untimed sweep: first-call costs of the driver, store and scheduler
            warm = Path(workdir) / f"sweep-w{n}-warm-up.zarr"
            run_sweep(cfg, client=clients[n], store_path=warm, progress=False, max_tasks=n)
            shutil.rmtree(warm, ignore_errors=True)
            log(f"  cluster of {n} worker(s) started and warmed in {time.perf_counter() - t:.1f} s")
        me = psutil.Process()
        res = {n: {"wall": [], "checks": [], "driver_cpu": [], "worker_cpu": []}
               for n in workers}
        for rep in range(repeats):
            order = list(workers) if rep % 2 == 0 else list(reversed(workers))
            for n in order:
                c = clients[n]
                w0 = c.run(_worker_stats)
                d0 = me.cpu_times()
                path = Path(workdir) / f"sweep-w{n}-rep{rep}.zarr"
                t = time.perf_counter()
                run_sweep(cfg, client=c, store_path=path, progress=False)
                wall = time.perf_counter() - t
                d1 = me.cpu_times()
                w1 = c.run(_worker_stats)
                shutil.rmtree(path, ignore_errors=True)
                res[n]["wall"].append(wall)
                res[n]["checks"].append(checks[-1])
                res[n]["driver_cpu"].append((d1.user + d1.system) - (d0.user + d0.system))
                res[n]["worker_cpu"].append(sum(w1[k]["cpu"] - w0[k]["cpu"] for k in w1))
                log(f"  sweep {rep + 1}/{repeats} on {n} worker(s): {samples} samples in "
                    f"{wall:.2f} s")
        for n in workers:
            stats = clients[n].run(_worker_stats)
            res[n]["worker_peak_rss_mb"] = max(s["peak_rss_mb"] for s in stats.values())
        return {"case": case.spec, "samples": samples, "validate_s": validate_s,
                "per_worker": res}
    finally:
        driver.validate_run = validate_run
        for c in clients.values():
            cluster = c.cluster
            c.close()
            cluster.close()


# ------------------------------------------------------------------------------------ profile
def _reuse_analysis_solver(**options):
    """Prototype (for the "what if" rows only): a MUMPS solver that keeps the analysis
    (ordering and symbolic factorisation) of the last matrix and reuses it when the sparsity
    pattern is identical -- which it is for every realisation of one geometry."""
    import kwant.solvers.mumps as mumps
    from kwant.linalg.mumps import MUMPSContext

    class ReuseAnalysisSolver(mumps.Solver):
        def __init__(self):
            super().__init__()
            self._ctx, self._pattern = None, None

        def _factorized(self, a):
            a = a.tocoo()
            p = self._pattern
            if (p is not None and p[0] == a.shape and np.array_equal(p[1], a.row)
                    and np.array_equal(p[2], a.col)):
                self._ctx.factor(a, ordering=self.ordering, reuse_analysis=True)
            else:
                self._ctx = MUMPSContext()
                self._ctx.factor(a, ordering=self.ordering)
                self._pattern = (a.shape, a.row.copy(), a.col.copy())
            return self._ctx

    solver = ReuseAnalysisSolver()
    solver.options(**options)
    return solver


def _whatif_solvers():
    """(label, solver, inject from all leads but the last?) for the "what if" experiment."""
    import kwant.solvers.mumps as mumps

    from pipeline.transport.solver import MUMPS_ORDERING, SOLVER

    def plain(**opts):
        s = mumps.Solver()
        s.options(**opts)
        return s

    big = 1 << 20  # nrhs: all right-hand sides in one MUMPS solve call
    base = dict(ordering=MUMPS_ORDERING)
    return [
        (f"pipeline solver as is (ordering {SOLVER.ordering!r} requested, "
         f"{'sparse' if SOLVER.sparse_rhs else 'dense'} RHS, nrhs {SOLVER.nrhs})", SOLVER,
         False),
        ("sparse right-hand sides, one solve call (sparse_rhs=True, nrhs=all)",
         plain(**base, sparse_rhs=True, nrhs=big), False),
        ("ordering 'amf'", plain(ordering="amf"), False),
        ("reuse the MUMPS analysis across realisations (prototype)",
         _reuse_analysis_solver(**base), False),
        ("inject from all leads but one (last column from the sum rule)", SOLVER, True),
        ("all four combined", _reuse_analysis_solver(ordering="amf", sparse_rhs=True, nrhs=big),
         True),
    ]


def _transmissions(solver, fs, energy, params, skip_last: bool) -> np.ndarray:
    """Transmission matrix of one spin block (T[i, j]: j -> i, diagonal: reflection)."""
    n = len(fs.leads)
    if not skip_last:
        smat = solver.smatrix(fs, energy, params=params)
        return np.array([[smat.transmission(i, j) for j in range(n)] for i in range(n)])
    smat = solver.smatrix(fs, energy, params=params, in_leads=list(range(n - 1)))
    T = np.empty((n, n))
    for i in range(n):
        for j in range(n - 1):
            T[i, j] = smat.transmission(i, j)
    modes = np.array([smat.num_propagating(i) for i in range(n)])
    T[:, n - 1] = modes - T[:, : n - 1].sum(axis=1)  # unitarity: each row sums to N_i
    return T


def _median(xs):
    return statistics.median(xs) if xs else float("nan")


def _stat_ct(stats: pstats.Stats, path_end: str, func: str) -> tuple[float, int]:
    """Cumulative time and call count of a function in a cProfile run (0 when absent)."""
    ct, nc = 0.0, 0
    for (filename, _, name), (_, ncalls, _, cum, _) in stats.stats.items():
        if name == func and filename.replace(os.sep, "/").endswith(path_end):
            ct, nc = ct + cum, nc + ncalls
    return ct, nc


def profile_pipeline(case, settings, samples, workdir, log, profile_out=None) -> dict:
    """What stands between ``solve_realisation`` and the floor, and what would lower the floor."""
    import scipy.sparse as sp
    from kwant.linalg.mumps import MUMPSContext

    from pipeline.physics.disorder import realise
    from pipeline.sweep import runmodel, tasks
    from pipeline.sweep.config import config_hash
    from pipeline.sweep.store import SampleStore
    from pipeline.transport.solver import SOLVER

    s = settings
    pipe = Pipeline(case, s, workdir)
    pipe.setup()
    cfg = pipe.cfg
    floor = Floor(case, s, workdir, spin_block=True)
    floor.setup()
    dsys = tasks.system_for(cfg, 0, reduced=True)
    terms = runmodel.disorder_terms(cfg)
    rs = list(range(1, samples + 1))
    n_leads = len(dsys.fsyst.leads)

    # ---- direct (unprofiled) timings, round robin over the realisations
    fs = floor.fs
    sites = fs.sites
    value_fn = fs.onsites[0][0]
    tag_index = {tuple(t): k for k, t in enumerate(floor.dsys.mesh.tags.tolist())}
    perm = np.array([tag_index[tuple(site.tag)] for site in sites])
    norbs = 2
    zeros = np.zeros((floor.dsys.n_sites, norbs, norbs), dtype=complex)
    h_const = fs.hamiltonian_submatrix(sparse=True, params={"onsite_stack": zeros}).tocsr()
    rows = (norbs * np.arange(len(sites))[:, None, None]
            + np.arange(norbs)[None, :, None]).repeat(norbs, axis=2).ravel()
    cols = (norbs * np.arange(len(sites))[:, None, None]
            + np.arange(norbs)[None, None, :]).repeat(norbs, axis=1).ravel()

    def vector_assembly(stack):
        diag = sp.csr_matrix((stack[perm].ravel(), (rows, cols)), shape=h_const.shape)
        return h_const + diag

    items = {k: [] for k in (
        "solve_realisation", "floor", "realise", "block_params", "system_for", "config_hash",
        "precalc_lookup", "make_linear_sys", "hamiltonian_submatrix", "value_functions",
        "vector_assembly", "mumps_analysis", "mumps_factor", "mumps_solve")}
    mismatch = 0.0
    ordering_used = None
    for r in rs:
        gc.collect()
        t = time.perf_counter()
        tasks.solve_realisation(cfg, (r, 0, 0))
        items["solve_realisation"].append((time.perf_counter() - t) / pipe.per_task)
        params = floor.params_for(r)
        t = time.perf_counter()
        SOLVER.smatrix(fs, s.energy, params=params)
        items["floor"].append(time.perf_counter() - t)
        t = time.perf_counter()
        pot, extra = realise(terms, dsys.mesh, seed=cfg.run.seed, realisation=r,
                             strength=1.0, outline=dsys.device.outline,
                             contacts=dsys.device.contacts)
        items["realise"].append(time.perf_counter() - t)
        t = time.perf_counter()
        dsys.block_params(potential=pot, onsite_extra=extra,
                          gate_potentials=runmodel.gate_potentials(cfg, dsys.device, 0.0))
        items["block_params"].append(time.perf_counter() - t)
        t = time.perf_counter()
        tasks.system_for(cfg, 0, reduced=True)
        items["system_for"].append(time.perf_counter() - t)
        t = time.perf_counter()
        config_hash(cfg)
        items["config_hash"].append(time.perf_counter() - t)
        t = time.perf_counter()
        tasks._precalculated(cfg, 0, dsys, s.energy, 0.0)
        items["precalc_lookup"].append(time.perf_counter() - t)
        t = time.perf_counter()
        linsys, _ = SOLVER._make_linear_sys(fs, list(range(n_leads)), s.energy,
                                             params=params)
        items["make_linear_sys"].append(time.perf_counter() - t)
        t = time.perf_counter()
        h_ref = fs.hamiltonian_submatrix(sparse=True, params=params)
        items["hamiltonian_submatrix"].append(time.perf_counter() - t)
        stack = params["onsite_stack"]
        t = time.perf_counter()
        for site in sites:
            value_fn(site, stack)
        items["value_functions"].append(time.perf_counter() - t)
        t = time.perf_counter()
        h_vec = vector_assembly(stack)
        items["vector_assembly"].append(time.perf_counter() - t)
        mismatch = max(mismatch, abs(h_vec - h_ref).max())
        ctx = MUMPSContext()
        t = time.perf_counter()
        ctx.analyze(linsys.lhs, ordering=SOLVER.ordering)
        items["mumps_analysis"].append(time.perf_counter() - t)
        ordering_used = int(ctx.mumps_instance.infog[7])
        t = time.perf_counter()
        ctx.factor(linsys.lhs, reuse_analysis=True)
        items["mumps_factor"].append(time.perf_counter() - t)
        b = sp.hstack([m for m in linsys.rhs if m.shape[1]]).tocsc()
        t = time.perf_counter()
        for j in range(0, b.shape[1], SOLVER.nrhs):  # as kwant.solvers.mumps does
            ctx.solve(b[:, j:j + SOLVER.nrhs].toarray())
        items["mumps_solve"].append(time.perf_counter() - t)
    log("  profile: direct timings done")

    # ---- objects shipped between driver and workers, and the driver's Zarr write
    res = tasks.solve_realisation(cfg, (1, 0, 0))
    t = time.perf_counter()
    blob = pickle.dumps(res)
    pickle_s = time.perf_counter() - t
    cfg_bytes = len(pickle.dumps(cfg))
    store_path = Path(workdir) / "profile-store.zarr"
    store = SampleStore.open_for_run(store_path, cfg, dsys.contact_names, provenance={},
                                     fresh=True)
    writes = []
    for r in rs:
        t = time.perf_counter()
        store.write_block((r, 0, 0), [r], [res])
        writes.append(time.perf_counter() - t)
    shutil.rmtree(store_path, ignore_errors=True)

    # ---- cProfile of solve_realisation
    prof = cProfile.Profile()
    prof.enable()
    for r in rs:
        tasks.solve_realisation(cfg, (r, 0, 0))
    prof.disable()
    if profile_out:
        prof.dump_stats(profile_out)
    stats = pstats.Stats(prof)
    n = len(rs) * pipe.per_task
    cp = {}
    for key, (path_end, func) in {
        "solve_realisation": ("pipeline/sweep/tasks.py", "solve_realisation"),
        "smatrix": ("kwant/solvers/common.py", "smatrix"),
        "make_linear_sys": ("kwant/solvers/common.py", "_make_linear_sys"),
        "hamiltonian_submatrix": ("_system.pyx", "hamiltonian_submatrix"),
        "value_functions": ("pipeline/system/mesh.py", "onsite"),
        "mumps_analysis": ("kwant/linalg/mumps.py", "analyze"),
        "mumps_factor_total": ("kwant/linalg/mumps.py", "factor"),
        "mumps_solve": ("kwant/solvers/mumps.py", "_solve_linear_sys"),
        "realise": ("pipeline/physics/disorder.py", "realise"),
        "block_params": ("pipeline/system/mesh.py", "block_params"),
        "system_for": ("pipeline/sweep/tasks.py", "system_for"),
        "config_hash": ("pipeline/sweep/config.py", "config_hash"),
        "lead_modes": ("kwant/physics/leads.py", "modes"),
        "precalculate": ("kwant/system.py", "precalculate"),
        "parse_measurement": ("pipeline/transport/landauer.py", "parse_measurement"),
        "transmission": ("kwant/solvers/common.py", "transmission"),
    }.items():
        ct, nc = _stat_ct(stats, path_end, func)
        cp[key] = {"s_per_sample": ct / n, "calls_per_sample": nc / n}
    cp["mumps_factor"] = {"s_per_sample": cp["mumps_factor_total"]["s_per_sample"]
                          - cp["mumps_analysis"]["s_per_sample"], "calls_per_sample": 0}
    buf = io.StringIO()
    pstats.Stats(prof, stream=buf).strip_dirs().sort_stats("cumulative").print_stats(18)
    listing = "\n".join(line for line in buf.getvalue().splitlines()
                        if line.strip() and not line.startswith(("Ordered", "List reduced"))
                        and "function calls" not in line and "Stats" not in line)
    log("  profile: cProfile done")

    # ---- what if: solver settings on the same spin-block problem, round robin
    whatifs = _whatif_solvers()
    ref = {}
    for _label, solver, skip in whatifs:  # warm-up (and the reuse prototype's first analysis)
        _transmissions(solver, fs, s.energy, floor.params_for(0), skip)
    wi_times = {label: [] for label, _, _ in whatifs}
    wi_dev = {label: 0.0 for label, _, _ in whatifs}
    for k, r in enumerate(rs):
        params = floor.params_for(r)
        shift = k % len(whatifs)
        for label, solver, skip in whatifs[shift:] + whatifs[:shift]:
            gc.collect()
            t = time.perf_counter()
            T = _transmissions(solver, fs, s.energy, params, skip)
            wi_times[label].append(time.perf_counter() - t)
            if r not in ref:
                ref[r] = _transmissions(SOLVER, fs, s.energy, params, False)
            wi_dev[label] = max(wi_dev[label], float(np.abs(T - ref[r]).max()))
    log("  profile: solver what-ifs done")
    return {
        "case": case.spec, "samples": len(rs),
        "direct": {k: _median(v) for k, v in items.items()},
        "assembly_mismatch": float(mismatch), "ordering_used": ordering_used,
        "ordering_requested": SOLVER.ordering, "nrhs": SOLVER.nrhs,
        "result_bytes": len(blob), "result_pickle_s": pickle_s, "cfg_bytes": cfg_bytes,
        "zarr_write_s": _median(writes), "cprofile": cp, "listing": listing,
        "whatif": [{"label": label, "median_s": _median(wi_times[label]),
                    "max_dT": wi_dev[label]} for label, _, _ in whatifs],
    }


# ------------------------------------------------------------------------------------ report
_ORDERINGS = {0: "amd", 2: "amf", 3: "scotch", 4: "pord", 5: "metis", 6: "qamd", 7: "auto"}


def machine_description() -> dict:
    import kwant.solvers.default as default

    from pipeline.transport.environment import describe

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    facts = describe()
    kd = default.smatrix.__self__
    try:
        from kwant.linalg.mumps import possible_orderings

        orderings = ", ".join(possible_orderings())
    except ImportError:
        orderings = "n/a (no MUMPS)"
    try:
        git = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=REPO,
                             capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"],
                               cwd=REPO, capture_output=True, text=True).stdout.strip()
        git = (git + (" + uncommitted changes" if dirty else "")) if git else "unknown"
    except OSError:
        git = "unknown"
    return {
        "nproc": os.cpu_count(), "cpu": cpu, "ram_gib": ram,
        "load_start": os.getloadavg(), "kwant": facts["kwant"],
        "kwant_solver": facts["kwant_solver"], "blas": facts["system_blas"],
        "python": facts["python"], "numpy": facts["numpy"], "scipy": facts["scipy"],
        "kwant_default_ordering": kd.ordering, "kwant_default_nrhs": kd.nrhs,
        "kwant_default_sparse_rhs": kd.sparse_rhs, "mumps_orderings": orderings,
        "host": facts["host"], "git": git,
        "date": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
        "threads": ", ".join(f"{v}={os.environ.get(v)}" for v in
                             ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")),
    }


def _f(x, digits=3):
    if x is None or (isinstance(x, float) and not np.isfinite(x)):
        return "n/a"
    if abs(x) >= 100:
        return f"{x:,.0f}"
    if abs(x) >= 10:
        return f"{x:.1f}"
    return f"{x:.{digits}g}" if abs(x) < 0.01 else f"{x:.{digits}f}"


def _ms(x):
    return "n/a" if x is None else f"{1e3 * x:.1f} ms"


def render(args, cases, machine, timing, memory, sweep, prof) -> str:
    s = args.settings
    L = []
    L.append("# Benchmarks: per-sample cost of disorder-averaged edge transport\n")
    if args.smoke:
        L.append("> **SMOKE TEST on a loaded machine: toy sizes, 1 repeat. These numbers only "
                 "show that the benchmark runs end to end; they are NOT results.** Run the "
                 "full benchmark on an idle machine with the command in "
                 "`benchmarks/README.md` to replace this file.\n")
    L.append(f"Command: `{args.command}`  ")
    L.append(f"Date: {machine['date']}; git {machine['git']}\n")
    L.append("## Machine\n")
    L.append("| | |\n|---|---|")
    L.append(f"| nproc | {machine['nproc']} |")
    L.append(f"| CPU | {machine['cpu']} |")
    L.append(f"| RAM | {machine['ram_gib']:.1f} GiB |")
    ls, le = machine["load_start"], machine.get("load_end", (float("nan"),) * 3)
    L.append(f"| load average (1, 5, 15 min) at start / end | "
             f"{ls[0]:.2f}, {ls[1]:.2f}, {ls[2]:.2f} / {le[0]:.2f}, {le[1]:.2f}, {le[2]:.2f} |")
    L.append(f"| Kwant | {machine['kwant']}, solver `{machine['kwant_solver']}` "
             f"(`pipeline.transport.environment.describe()`) |")
    L.append(f"| BLAS under MUMPS | {machine['blas']} |")
    L.append(f"| threads | {machine['threads']} in the benchmark process and every worker |")
    L.append(f"| Kwant default solver (naive loop) | MUMPS, ordering "
             f"`{machine['kwant_default_ordering']}`, nrhs {machine['kwant_default_nrhs']}, "
             f"sparse_rhs {machine['kwant_default_sparse_rhs']} |")
    L.append(f"| MUMPS orderings available | {machine['mumps_orderings']} |")
    if prof:
        used = _ORDERINGS.get(prof["ordering_used"], str(prof["ordering_used"]))
        L.append(f"| pipeline solver (`SOLVER`) | MUMPS, ordering `{prof['ordering_requested']}`"
                 f" requested, MUMPS used `{used}` (INFOG(7) = {prof['ordering_used']}), "
                 f"nrhs {prof['nrhs']} |")
    L.append(f"| Python, NumPy, SciPy | {machine['python']}, {machine['numpy']}, "
             f"{machine['scipy']} |")
    L.append("")

    L.append("## Per-sample cost\n")
    L.append(f"BHZ model, `PRESETS[\"hgte-7.0nm\"]`, a = {s.lattice_constant:g} nm, "
             f"E_F = {s.energy:g} meV, B = 0, Anderson disorder U = {s.disorder_width:g} meV, "
             f"leads of the device material shifted down by {s.contact_doping:g} meV "
             f"(metallic contacts), seed {s.seed}, one core. Medians over {args.repeats} "
             f"repeat(s) (realisations 1..{args.repeats}, after one untimed warm-up sample "
             f"each), all variants and sizes interleaved round robin in one process.\n")
    L.append("| " + " | ".join(TABLE_COLUMNS) + " |")
    L.append("|" + "|".join(["---"] + ["---"] + ["---:"] * 4) + "|")
    med = {k: _median(v) for k, v in timing["times"].items()}
    for case in cases:
        naive = med[(case.spec, "naive")]
        fl = med[(case.spec, "floor-spinblock")]
        for name in VARIANTS:
            m = med[(case.spec, name)]
            rss = memory.get((case.spec, name), {}).get("peak_rss_mb") if memory else None
            L.append(f"| {VARIANT_TITLES[name]} | {case.label} | {_f(m)} | {_f(m / naive)} | "
                     f"{_f(m / fl)} | {_f(rss) if rss is not None else 'not measured'} |")
    L.append("")
    L.append("Ratios are medians of the same run and size: variant / naive loop, and variant / "
             "bare solver floor of the spin-block problem (the problem the pipeline solves). "
             "Peak RSS: the peak resident set (`VmHWM`) of a fresh subprocess that sets up the "
             "variant (for the floors and the pipeline this includes building the Kwant system) "
             "and runs "
             f"{args.memory_samples} sample(s)"
             + (f"; the imports alone (Kwant, the pipeline) peak at "
                f"{_f(memory['baseline']['peak_rss_mb'])} MB." if memory else "."))
    L.append("")
    L.append("Spread (min–max s/sample over the repeats):")
    L.append("")
    for case in cases:
        parts = []
        for name in VARIANTS:
            xs = timing["times"][(case.spec, name)]
            parts.append(f"{name} {_f(min(xs))}–{_f(max(xs))}")
        L.append(f"- {case.label}: " + "; ".join(parts))
    L.append("")
    worst, where = 0.0, ""
    for case in cases:
        ref = timing["t10"][(case.spec, "floor-4band")]
        for name in VARIANTS:
            dev = max(abs(a - b) for a, b in zip(timing["t10"][(case.spec, name)], ref))
            if dev >= worst:
                worst, where = dev, f"{name}, {case.spec}"
    verdict = "agree" if worst < 1e-6 else "DISAGREE"
    L.append(f"Check: the total transmission T(lead 0 → lead 1) of every variant and "
             f"realisation {verdict} with the four-band floor (largest |ΔT| = {worst:.1e}, "
             f"{where}).\n")

    # targets
    target = next((c for c in cases if c.kind == "strip"), cases[0])
    L.append(f"## Targets ({target.label}, two terminals, B = 0)\n")
    if args.smoke:
        L.append("*Smoke test: the verdicts below are computed the same way as in a full run "
                 "but mean nothing at toy sizes on a loaded machine.*\n")
    L.append("| target | measured | met |\n|---|---|---|")
    naive, pipe = med[(target.spec, "naive")], med[(target.spec, "pipeline")]
    fl = med[(target.spec, "floor-spinblock")]
    speedup = naive / pipe
    L.append(f"| per-sample cost ≥ 6× below the naive loop | naive / pipeline = "
             f"{speedup:.2f}× | {'yes' if speedup >= 6 else 'no'} |")
    over = pipe / fl - 1
    L.append(f"| within 15 % of the bare floor (spin block) | pipeline / floor = "
             f"{pipe / fl:.3f} ({100 * over:+.1f} %) | {'yes' if over <= 0.15 else 'no'} |")
    if sweep and {1, 2} <= set(sweep["per_worker"]):
        pw = sweep["per_worker"]
        ratio = _median(pw[1]["wall"]) / _median(pw[2]["wall"])
        after = (_median([w - c for w, c in zip(pw[1]["wall"], pw[1]["checks"])])
                 / _median([w - c for w, c in zip(pw[2]["wall"], pw[2]["checks"])]))
        L.append(f"| sweep throughput on 2 workers ≥ 1.8× that on 1 "
                 f"({Case.parse(sweep['case']).label}, {sweep['samples']} samples) | "
                 f"{ratio:.2f}× whole sweep ({after:.2f}× after the driver's checks) | "
                 f"{'yes' if ratio >= 1.8 else 'no'} |")
    else:
        L.append("| sweep throughput on 2 workers ≥ 1.8× that on 1 | not measured | — |")
    if memory:
        fm = memory[(target.spec, "floor-spinblock")]["peak_rss_mb"]
        pm = memory[(target.spec, "pipeline")]["peak_rss_mb"]
        L.append(f"| peak memory per worker ≤ 1.5× the bare solve's | pipeline process / floor "
                 f"process = {pm:.0f} / {fm:.0f} MB = {pm / fm:.2f}× | "
                 f"{'yes' if pm / fm <= 1.5 else 'no'} |")
        if sweep and sweep["case"] == target.spec:
            wm = max(v["worker_peak_rss_mb"] for v in sweep["per_worker"].values())
            L.append(f"| (the same, for a Dask worker process) | worker / floor process = "
                     f"{wm:.0f} / {fm:.0f} MB = {wm / fm:.2f}× | "
                     f"{'yes' if wm / fm <= 1.5 else 'no'} |")
    else:
        L.append("| peak memory per worker ≤ 1.5× the bare solve's | not measured | — |")
    L.append("")

    if sweep:
        L.append(f"## Whole sweeps through the engine ({Case.parse(sweep['case']).label})\n")
        L.append(f"`run_sweep` of {sweep['samples']} samples (realisations × 1 energy) into a "
                 f"fresh Zarr store, on warm `local_client(n)` clusters (every worker solved "
                 f"one task first, so its system and lead modes are cached, and one short "
                 f"untimed sweep ran on each cluster), medians over "
                 f"{args.sweep_repeats} repeat(s), worker counts alternated. Wall time includes "
                 f"the driver's per-sweep checks and the store.\n")
        L.append("| workers | median wall s | of which driver checks s | samples/s | ratio to "
                 "1 worker | samples/s after the checks | ratio to 1 worker after the checks | "
                 "driver CPU s/sample | worker CPU s/sample | peak RSS per worker MB |")
        L.append("|" + "---:|" * 10)
        pw = sweep["per_worker"]
        n0 = min(pw)
        base = _median(pw[n0]["wall"])
        base_c = _median([w - c for w, c in zip(pw[n0]["wall"], pw[n0]["checks"])])
        for n in sorted(pw):
            w = _median(pw[n]["wall"])
            wc = _median([a - c for a, c in zip(pw[n]["wall"], pw[n]["checks"])])
            L.append(f"| {n} | {_f(w)} | {_f(_median(pw[n]['checks']))} | "
                     f"{_f(sweep['samples'] / w)} | {_f(base / w)} | "
                     f"{_f(sweep['samples'] / wc)} | {_f(base_c / wc)} | "
                     f"{_f(_median(pw[n]['driver_cpu']) / sweep['samples'])} | "
                     f"{_f(_median(pw[n]['worker_cpu']) / sweep['samples'])} | "
                     f"{_f(pw[n]['worker_peak_rss_mb'])} |")
        L.append("")
        L.append("Driver checks: `validate_run`, which `run_sweep` calls before submitting any "
                 "task (the workers idle meanwhile); timed inside each sweep. \"After the "
                 "checks\" divides by the wall time minus that.")
        L.append("")
        L.append("Driver CPU is that of the benchmark process, which also runs the Dask "
                 "scheduler; on a 2-core machine it competes with the 2 workers.\n")

    if prof:
        d, cp = prof["direct"], prof["cprofile"]
        rt = d["solve_realisation"]
        L.append(f"## Profile of the pipeline path ({Case.parse(prof['case']).label})\n")
        L.append(f"Direct timings (medians over {prof['samples']} realisations, no profiler) "
                 f"and cProfile of the same `solve_realisation` calls (cProfile inflates Python-heavy "
                 f"items). Shares are of the direct `solve_realisation` time.\n")
        L.append("| item | direct s/sample | share | cProfile s/sample |")
        L.append("|---|---:|---:|---:|")

        def row(label, direct, cpkey=None, extra=""):
            share = f"{100 * direct / rt:.1f} %" if direct is not None else "—"
            c = _f(cp[cpkey]["s_per_sample"]) if cpkey else "—"
            L.append(f"| {label}{extra} | {_f(direct) if direct is not None else '—'} | "
                     f"{share} | {c} |")

        row("`solve_realisation` (whole task, per sample)", rt, "solve_realisation")
        row("bare floor: `SOLVER.smatrix` on the precalculated spin-block system", d["floor"],
            "smatrix")
        row("`solve_realisation` − floor", rt - d["floor"])
        row("&nbsp;&nbsp;disorder generation (`realise`)", d["realise"], "realise")
        row("&nbsp;&nbsp;onsite stack + spin split (`block_params`)", d["block_params"],
            "block_params")
        row("&nbsp;&nbsp;system cache lookup (`system_for`)", d["system_for"], "system_for")
        n_hash = cp["config_hash"]["calls_per_sample"]
        row(f"&nbsp;&nbsp;`config_hash` ({n_hash:g} calls per sample: `system_for` and "
            f"`_precalculated`)", d["config_hash"] * n_hash, "config_hash")
        row("&nbsp;&nbsp;lead-mode cache lookup (`_precalculated`)", d["precalc_lookup"])
        row("inside the floor: linear system assembly (`_make_linear_sys`)",
            d["make_linear_sys"], "make_linear_sys")
        row("&nbsp;&nbsp;Hamiltonian (`hamiltonian_submatrix`, one Python call per site and "
            "bond)", d["hamiltonian_submatrix"], "hamiltonian_submatrix")
        row("&nbsp;&nbsp;&nbsp;&nbsp;of which the onsite value function `mesh.onsite`",
            d["value_functions"], "value_functions")
        row("&nbsp;&nbsp;the same Hamiltonian assembled vectorised (prototype: constant part + "
            "block diagonal)", d["vector_assembly"],
            extra=f" (max diff {prof['assembly_mismatch']:.0e})")
        row("inside the floor: MUMPS analysis (ordering, symbolic)", d["mumps_analysis"],
            "mumps_analysis")
        row("inside the floor: MUMPS numerical factorisation", d["mumps_factor"],
            "mumps_factor")
        row(f"inside the floor: MUMPS solve (dense RHS, chunks of {prof['nrhs']})",
            d["mumps_solve"], "mumps_solve")
        L.append("")
        lm = cp["lead_modes"]["calls_per_sample"]
        pc = cp["precalculate"]["calls_per_sample"]
        L.append(f"- Lead modes: {lm:g} `kwant.physics.modes` call(s) and {pc:g} `precalculate`"
                 f" call(s) per sample in the profiled tasks (0 and 0: the cache works).")
        L.append(f"- Shipped per task: the `RealisationSamples` of a realisation pickles to {prof['result_bytes']:,} "
                 f"bytes in {_ms(prof['result_pickle_s'])}; the config "
                 f"({prof['cfg_bytes']:,} bytes pickled) is scattered once per sweep.")
        L.append(f"- Zarr: `SampleStore.write_block` takes {_ms(prof['zarr_write_s'])} per task "
                 f"on the driver (not on a worker's critical path, but on the same 2 cores).")
        L.append(f"- `parse_measurement` per task: "
                 f"{_ms(cp['parse_measurement']['s_per_sample'])} (cProfile).")
        L.append("")
        L.append("What would lower the floor itself: the spin-block problem solved with other "
                 "solver settings (round robin, medians; max |ΔT| against the pipeline solver "
                 "on the same realisations, solved once more: on the first row a non-zero "
                 "|ΔT| means the pipeline solver is not bitwise reproducible from run to run):\n")
        L.append("| solver setting | median s/sample | ratio to pipeline solver | max |ΔT| |")
        L.append("|---|---:|---:|---:|")
        base = prof["whatif"][0]["median_s"]
        for w in prof["whatif"]:
            L.append(f"| {w['label']} | {_f(w['median_s'])} | {_f(w['median_s'] / base)} | "
                     f"{w['max_dT']:.1e} |")
        L.append("")
        L.append("<details><summary>cProfile listing (cumulative)</summary>\n")
        L.append("```\n" + prof["listing"] + "\n```\n</details>\n")
    return "\n".join(L) + "\n"


# -------------------------------------------------------------------------------------- main
def parse_args(argv=None):
    p = argparse.ArgumentParser(
        description="Per-sample cost of the disorder-averaged transport pipeline against a "
                    "naive rebuild loop and the bare solver floor.",
        formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    p.add_argument("--smoke", action="store_true",
                   help="toy sizes, 1 repeat, short sweep and profile: checks the script runs")
    p.add_argument("--sizes", nargs="+", type=Case.parse, default=None,
                   help=f"device sizes in lattice sites (default {' '.join(DEFAULT_SIZES)}; "
                        f"with --smoke {' '.join(SMOKE_SIZES)})")
    p.add_argument("--repeats", type=int, default=None,
                   help="timed realisations per variant and size (default 7; --smoke 1)")
    p.add_argument("--memory-samples", type=int, default=None,
                   help="samples per memory probe subprocess (default 2; --smoke 1)")
    p.add_argument("--sweep-size", type=Case.parse, default=None,
                   help="size of the sweep benchmark (default: the first strip size)")
    p.add_argument("--sweep-realisations", type=int, default=None,
                   help="realisations per timed sweep (default 64; --smoke 4)")
    p.add_argument("--sweep-repeats", type=int, default=None,
                   help="timed sweeps per worker count (default 3; --smoke 1)")
    p.add_argument("--workers", type=int, nargs="+", default=[1, 2],
                   help="worker counts for the sweep benchmark")
    p.add_argument("--profile-size", type=Case.parse, default=None,
                   help="size of the profile (default: the first strip size)")
    p.add_argument("--profile-samples", type=int, default=None,
                   help="realisations in the profile (default 5; --smoke 2)")
    p.add_argument("--profile-out", default=None, help="also dump the cProfile stats here")
    p.add_argument("--no-memory", action="store_true", help="skip the memory probes")
    p.add_argument("--no-sweep", action="store_true", help="skip the Dask sweep benchmark")
    p.add_argument("--no-profile", action="store_true", help="skip the profile")
    p.add_argument("--disorder", type=float, default=20.0, help="Anderson width U, meV")
    p.add_argument("--doping", type=float, default=25.0,
                   help="contact doping (downward band shift in the leads), meV")
    p.add_argument("--energy", type=float, default=0.0, help="Fermi energy, meV")
    p.add_argument("--seed", type=int, default=7, help="root seed of the disorder")
    p.add_argument("--write", nargs="?", const=str(DEFAULT_DOC), default=None, metavar="PATH",
                   help=f"write the Markdown report (replacing the file; default PATH "
                        f"{DEFAULT_DOC.relative_to(REPO)})")
    p.add_argument("--json", default=None, metavar="PATH", help="also write raw timings as JSON")
    p.add_argument("--probe", default=None, help=argparse.SUPPRESS)
    args = p.parse_args(argv)
    smoke = args.smoke
    if args.sizes is None:
        args.sizes = [Case.parse(s) for s in (SMOKE_SIZES if smoke else DEFAULT_SIZES)]
    for name, full, small in (("repeats", 7, 1), ("memory_samples", 2, 1),
                              ("sweep_realisations", 64, 4), ("sweep_repeats", 3, 1),
                              ("profile_samples", 5, 2)):
        if getattr(args, name) is None:
            setattr(args, name, small if smoke else full)
        if getattr(args, name) < 1:
            p.error(f"--{name.replace('_', '-')} must be at least 1")
    first_strip = next((c for c in args.sizes if c.kind == "strip"), args.sizes[0])
    args.sweep_size = args.sweep_size or first_strip
    args.profile_size = args.profile_size or first_strip
    args.settings = Settings(disorder_width=args.disorder, contact_doping=args.doping,
                             energy=args.energy, seed=args.seed)
    shown = [a for a in (argv if argv is not None else sys.argv[1:])]
    args.command = " ".join(shlex.quote(a) for a in
                            [".venv/bin/python", "benchmarks/bench_pipeline.py", *shown])
    return args


def main(argv=None) -> int:
    args = parse_args(argv)
    if args.probe:
        probe_main(json.loads(args.probe))
        return 0

    def log(msg):
        print(msg, file=sys.stderr, flush=True)

    machine = machine_description()
    cases = args.sizes
    t_start = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="helisweep-bench-") as workdir:
        log(f"timing {len(VARIANTS)} variants × {len(cases)} size(s) × {args.repeats} repeat(s)")
        timing = time_variants(cases, args.settings, args.repeats, workdir, log)
        memory = None
        if not args.no_memory:
            log("memory probes (one fresh subprocess per variant and size)")
            memory = measure_memory(cases, args.settings, args.memory_samples, workdir, log)
        sweep = None
        if not args.no_sweep:
            log(f"sweeps on {args.workers} worker(s)")
            sweep = measure_sweeps(args.sweep_size, args.settings, args.workers,
                                   args.sweep_realisations, args.sweep_repeats, workdir, log)
        prof = None
        if not args.no_profile:
            log("profile of solve_realisation")
            prof = profile_pipeline(args.profile_size, args.settings, args.profile_samples,
                                    workdir, log, args.profile_out)
    machine["load_end"] = os.getloadavg()
    report = render(args, cases, machine, timing, memory, sweep, prof)
    report += f"\nTotal benchmark time: {time.perf_counter() - t_start:.0f} s.\n"
    print(report)
    if args.write:
        Path(args.write).parent.mkdir(parents=True, exist_ok=True)
        Path(args.write).write_text(report)
        log(f"wrote {args.write}")
    if args.json:
        raw = {"machine": machine, "command": args.command,
               "times": {f"{k[0]}|{k[1]}": v for k, v in timing["times"].items()},
               "t10": {f"{k[0]}|{k[1]}": v for k, v in timing["t10"].items()},
               "memory": {(k if isinstance(k, str) else f"{k[0]}|{k[1]}"): v
                          for k, v in (memory or {}).items()},
               "sweep": sweep, "profile": prof}
        Path(args.json).write_text(json.dumps(raw, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
