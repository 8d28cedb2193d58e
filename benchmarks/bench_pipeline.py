"""Per-sample cost of disorder-averaged edge transport: naive loop, best Kwant loop, pipeline.

Model: the four-band BHZ model with the 7 nm HgTe parameters (``PRESETS["hgte-7.0nm"]``) on
a square lattice, E_F = 0, Anderson disorder, B = 0, one BLAS thread. For every device size
the script times, interleaved round robin (so load drift hits all variants alike):

``naive``
    What one would write without the pipeline: per realisation a new ``kwant.Builder`` with a
    Python value function for the disorder onsite, ``attach_lead`` for every lead,
    ``.finalized()``, then ``kwant.smatrix`` with Kwant's default solver and settings and the
    whole transmission matrix.
``kwant-best``
    The best loop a user can write with Kwant's public API: the spin-up block only (at B = 0
    the spin-down transmissions are the transpose), built and finalized once with the
    disorder as a parameter of the onsite value function, lead modes precalculated
    (``fsyst.precalculate``), MUMPS with AMF ordering, sparse right-hand sides in one solve
    call (``kwant.solvers.mumps.Solver.options(ordering="amf", sparse_rhs=True, nrhs=...)``),
    no Hermiticity check, and ``in_leads``/``out_leads`` restricted to all leads but one each:
    the rest of the transmission matrix follows from current conservation.
``solve``
    The bare solve of the pipeline's method: ``ScatteringProblem.transmissions`` on the
    prebuilt spin-block system with precalculated leads, the disorder params prepared
    beforehand (nothing else is timed).
``pipeline``
    ``pipeline.sweep.tasks.solve_realisation(cfg, key)`` per realisation after a warm-up
    (system, lead modes and MUMPS analysis cached), divided by the samples per task; its
    solve's phases (assembly, lead modes, analysis, numerical factorisation, solve) are read
    from the ``ScatteringProblem`` timings of each sample.

All variants solve the same Hamiltonian with the same disorder numbers (the pipeline's
tag-keyed Anderson draw); the script checks that their transmission matrices agree.

It also measures the peak memory of each variant in a fresh subprocess (``VmHWM``, see
:func:`_peak_rss_mb`), what could cut the numerical factorisation itself (MUMPS orderings and
block low-rank compression), the throughput of whole sweeps through
``pipeline.sweep.driver.run_sweep`` on 1 and 2 Dask workers, the per-sample cost inside a
Dask worker against the same work in-process (and the effect of ``MALLOC_TRIM_THRESHOLD_``),
and profiles ``solve_realisation``.

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
import contextlib  # noqa: E402
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
TABLE_COLUMNS = ["variant", "size", "median s/sample", "ratio to naive", "ratio to kwant-best",
                 "ratio to factorisation", "peak RSS MB"]
VARIANTS = ["naive", "kwant-best", "solve", "pipeline"]
VARIANT_TITLES = {
    "naive": "naive loop (rebuild Builder + kwant.smatrix, 4-band)",
    "kwant-best": "best hand-written Kwant loop (kwant-best)",
    "solve": "bare solve: ScatteringProblem.transmissions (spin block)",
    "pipeline": "pipeline solve_realisation (spin block)",
    "baseline": "imports only (no system)",
}
#: the issue's targets (issue 15, item 3)
TARGET_VS_BEST = 0.74
STRETCH_VS_BEST = 0.62
TARGET_VS_NAIVE = 12.0
TARGET_SWEEP_RATIO = 1.9
TARGET_MEMORY_RATIO = 1.2
TARGET_WORKER_OVERHEAD = 0.05
#: transmissions a cheaper factorisation must keep (absolute; they are O(1))
FACTOR_ACCURACY = 1e-10
#: MUMPS block low-rank dropping tolerances tried (CNTL(7))
BLR_TOLERANCES = (1e-14, 1e-12, 1e-10, 1e-8, 1e-6)
#: MUMPS orderings tried on the assembled matrix (when this MUMPS build has them)
ORDERINGS = ("amf", "amd", "qamd", "pord", "scotch")
#: Dask's default for every worker process before helisweep removed it (issue 15, item 5)
DASK_MALLOC_TRIM = "65536"


# --------------------------------------------------------------------------------- settings
@dataclass(frozen=True)
class Settings:
    """Physics settings shared by all variants."""

    lattice_constant: float = 5.0  # nm
    disorder_width: float = 50.0  # Anderson U, meV
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
    def lead_width(self) -> int:
        """Sites across the widest lead."""
        return self.dims[1] if self.kind == "strip" else self.dims[3]

    @property
    def label(self) -> str:
        shape = "×".join(str(d) for d in self.dims)
        return f"{self.kind} {shape} ({self.n_sites:,} sites)"

    # the same device for the hand-written loops (rectangles of sites, leads) and the
    # pipeline (template)
    def rectangles(self) -> list[tuple[int, int, int, int]]:
        """Sites as half-open rectangles (x0, x1, y0, y1) of tags."""
        if self.kind == "strip":
            L, W = self.dims
            return [(0, L, 0, W)]
        L, W, AL, AW = self.dims
        H, xr = 2 * AL + W, AW + L
        return [(0, AW, 0, H), (AW, xr, AL, AL + W), (xr, xr + AW, 0, H)]

    def tags(self) -> np.ndarray:
        """Lattice tags of every site, shape (n, 2)."""
        return np.array([(i, j) for x0, x1, y0, y1 in self.rectangles()
                         for i in range(x0, x1) for j in range(y0, y1)], dtype=np.int64)

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

    def config_text(self, settings: Settings, *, realisations: int, directory: str,
                    energy: str | None = None, spin_blocks: str = "auto") -> str:
        """A pipeline config of this device; ``energy`` replaces the sweep's energy axis
        (TOML text, e.g. ``{ start = -8.0, stop = 8.0, num = 33 }``)."""
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
energy = {energy if energy is not None else repr(settings.energy)}

[execution]
spin_blocks = "{spin_blocks}"

[measure]
labels = ["{report}"]
"""


def _config(case: Case, settings: Settings, realisations: int, directory: str, **kwargs):
    from pipeline.sweep.config import parse_config

    return parse_config(case.config_text(settings, realisations=realisations,
                                         directory=directory, **kwargs))


def _samples_per_task(cfg) -> int:
    axes = cfg.axes
    return len(axes["b_perp"]) * len(axes["gate_voltage"]) * len(axes["energy"])


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


def complete_transmissions(sub: np.ndarray, out_leads: list[int], in_leads: list[int],
                           nprop: np.ndarray) -> np.ndarray:
    """The whole transmission matrix from its block ``T[out_leads, in_leads]``.

    Each of ``out_leads`` and ``in_leads`` may miss one lead; the missing entries follow from
    current conservation (unitarity of S): every column sums to the open modes of its lead,
    ``sum_i T[i, j] = N_j``, and so does every row, ``sum_j T[i, j] = N_i``.
    """
    n = len(nprop)
    nprop = np.asarray(nprop, dtype=float)
    T = np.full((n, n), np.nan)
    T[np.ix_(out_leads, in_leads)] = sub
    missing_out = [i for i in range(n) if i not in out_leads]
    missing_in = [j for j in range(n) if j not in in_leads]
    if len(missing_out) > 1 or len(missing_in) > 1:
        raise ValueError(f"out_leads {out_leads!r} and in_leads {in_leads!r} must each miss "
                         f"at most one of the {n} leads")
    if missing_out:  # a missing row: from the column sums
        T[missing_out[0], in_leads] = nprop[in_leads] - sub.sum(axis=0)
    if missing_in:  # a missing column: from the row sums (every row now has its in-columns)
        T[:, missing_in[0]] = nprop - T[:, in_leads].sum(axis=1)
    return T


# --------------------------------------------------------------------------------- variants
class Variant:
    """One way of computing a sample; ``sample(r)`` returns (seconds per sample, T matrix).

    T is the total (both spins) transmission matrix, T[i, j] from lead j to lead i, the
    diagonal holding the reflection.
    """

    name = "?"

    def __init__(self, case: Case, settings: Settings, workdir: str):
        self.case, self.settings, self.workdir = case, settings, workdir

    def setup(self) -> None:
        pass

    def sample(self, r: int) -> tuple[float, np.ndarray]:
        raise NotImplementedError


def _tag_mesh(case: Case, a: float) -> SimpleNamespace:
    """What the pipeline's Anderson draw needs of a mesh, for the hand-written loops: the
    draw is keyed by lattice tag, so every variant sees the same disorder numbers."""
    tags = case.tags()
    return SimpleNamespace(tags=tags, positions=(tags + 0.5) * a, lattice_constant=a)


class Naive(Variant):
    """Rebuild everything per realisation, Kwant defaults throughout."""

    name = "naive"

    def setup(self) -> None:
        from pipeline.physics.bhz import lattice_matrices
        from pipeline.physics.materials import PRESETS

        a = self.settings.lattice_constant
        self.h0, self.tx, self.ty = lattice_matrices(PRESETS["hgte-7.0nm"], a)
        self.tag_mesh = _tag_mesh(self.case, a)

    def sample(self, r: int) -> tuple[float, np.ndarray]:
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
        n = len(fsyst.leads)
        T = np.array([[smat.transmission(i, j) for j in range(n)] for i in range(n)])
        return time.perf_counter() - t0, T


class KwantBest(Variant):
    """The best loop Kwant's public API allows (see the module docstring)."""

    name = "kwant-best"

    def setup(self) -> None:
        import kwant
        import kwant.solvers.mumps as mumps

        from pipeline.physics.bhz import lattice_matrices
        from pipeline.physics.materials import PRESETS

        s = self.settings
        a = s.lattice_constant
        material = PRESETS["hgte-7.0nm"]
        if material.delta_bia != 0:
            raise RuntimeError("the spin-block loop needs S_z conservation (no BIA)")
        # basis (E up, H up, E down, H down): the spin-up block is the upper left 2x2
        h0, tx, ty = (m[:2, :2] for m in lattice_matrices(material, a))
        self.tag_mesh = _tag_mesh(self.case, a)
        lat = kwant.lattice.square(a, norbs=2)
        index = {lat(i, j): k for k, (i, j) in enumerate(self.tag_mesh.tags.tolist())}
        eye = np.eye(2)

        def onsite(site, potential):
            return h0 + potential[index[site]] * eye

        syst = kwant.Builder()
        syst[index.keys()] = onsite
        syst[kwant.builder.HoppingKind((1, 0), lat)] = tx
        syst[kwant.builder.HoppingKind((0, 1), lat)] = ty
        for (dx, dy), cell in self.case.leads():
            lead = kwant.Builder(kwant.TranslationalSymmetry((dx * a, dy * a)))
            lead[(lat(i, j) for i, j in cell)] = h0 - s.contact_doping * eye
            lead[kwant.builder.HoppingKind((1, 0), lat)] = tx
            lead[kwant.builder.HoppingKind((0, 1), lat)] = ty
            syst.attach_lead(lead)
        zero = {"potential": np.zeros(len(index))}
        self.fs = syst.finalized().precalculate(s.energy, params=zero)
        self.nprop = np.array([lead.modes(s.energy, params=zero)[0].velocities.size // 2
                               for lead in self.fs.leads])
        n = len(self.nprop)
        # inject from all leads but the one with most open modes, read out all leads but
        # another one: current conservation gives the rest (complete_transmissions)
        skip_in = n - 1 - int(np.argmax(self.nprop[::-1]))
        skip_out = (skip_in + 1) % n
        self.in_leads = [j for j in range(n) if j != skip_in]
        self.out_leads = [i for i in range(n) if i != skip_out]
        self.solver = mumps.Solver()
        self.solver.options(ordering="amf", sparse_rhs=True,
                            nrhs=max(1, int(self.nprop[self.in_leads].sum())))

    def sample(self, r: int) -> tuple[float, np.ndarray]:
        from pipeline.physics.disorder import Anderson

        s = self.settings
        t0 = time.perf_counter()
        pot = Anderson(s.disorder_width).sample(self.tag_mesh, seed=s.seed, realisation=r,
                                                stream=0).potential
        smat = self.solver.smatrix(self.fs, s.energy, params={"potential": pot},
                                   in_leads=self.in_leads, out_leads=self.out_leads,
                                   check_hermiticity=False)
        sub = np.array([[smat.transmission(i, j) for j in self.in_leads]
                        for i in self.out_leads])
        up = complete_transmissions(sub, self.out_leads, self.in_leads, self.nprop)
        T = up + up.T  # spin down: the transpose of spin up at B = 0 (time reversal)
        return time.perf_counter() - t0, T


class BareSolve(Variant):
    """``ScatteringProblem.transmissions`` on a prebuilt, precalculated spin-block system."""

    name = "solve"

    def setup(self) -> None:
        from pipeline.physics.materials import PRESETS
        from pipeline.sweep.runmodel import device_for
        from pipeline.system.mesh import build_system
        from pipeline.transport.scattering import ScatteringProblem

        s = self.settings
        cfg = _config(self.case, s, 1, self.workdir)
        self.dsys = build_system(device_for(cfg, 0), PRESETS["hgte-7.0nm"],
                                 s.lattice_constant, contact_doping=s.contact_doping,
                                 spin_block=True)
        self.fs = self.dsys.fsyst.precalculate(s.energy, params={"onsite_stack": None})
        self.problem = ScatteringProblem(self.dsys)

    def params_for(self, r: int) -> dict:
        from pipeline.physics.disorder import Anderson, realise

        s = self.settings
        pot, _ = realise([Anderson(s.disorder_width)], self.dsys.mesh, seed=s.seed,
                         realisation=r)
        blocks = self.dsys.block_params(potential=pot)
        if not (len(blocks) == 2 and blocks[0][0] is blocks[1][0]):
            raise RuntimeError("expected one solve for both spins at B = 0")
        return blocks[0][0]

    def sample(self, r: int) -> tuple[float, np.ndarray]:
        params = self.params_for(r)
        t0 = time.perf_counter()
        res = self.problem.transmissions(self.settings.energy, params, fsyst=self.fs)
        dt = time.perf_counter() - t0
        return dt, res.matrix + res.matrix.T


class Pipeline(Variant):
    """``solve_realisation`` per realisation after a warm-up, per sample."""

    name = "pipeline"

    def setup(self) -> None:
        from pipeline.sweep.tasks import solve_realisation, system_for
        from pipeline.transport.scattering import problem_for

        self.cfg = _config(self.case, self.settings, 1_000_000, self.workdir)
        self.per_task = _samples_per_task(self.cfg)
        # warm-up: builds the system, precalculates the leads, analyses the pattern
        solve_realisation(self.cfg, (0, 0, 0))
        #: the solve's own problem (the one solve_realisation uses in this thread): its
        #: timings give the phases of each sample
        self.problem = problem_for(system_for(self.cfg, 0, reduced=True))
        self.phases: list[dict] = []

    def sample(self, r: int) -> tuple[float, np.ndarray]:
        from pipeline.sweep.tasks import solve_realisation

        self.problem.reset_timings()
        t0 = time.perf_counter()
        res = solve_realisation(self.cfg, (r, 0, 0))
        dt = time.perf_counter() - t0
        self.phases.append({k: v / self.per_task for k, v in self.problem.timings.items()})
        if res.failures:
            raise RuntimeError(f"solve_realisation failed: {res.failures}")
        return dt / self.per_task, res.transmission[0, 0, 0]


def make_variant(name: str, case: Case, settings: Settings, workdir: str) -> Variant:
    classes = {"naive": Naive, "kwant-best": KwantBest, "solve": BareSolve,
               "pipeline": Pipeline}
    if name not in classes:
        raise ValueError(f"unknown variant {name!r}; known: {', '.join(classes)}")
    return classes[name](case, settings, workdir)


# ------------------------------------------------------------------------- per-sample timing
def time_variants(cases, settings, repeats, workdir, log) -> dict:
    """Median seconds per sample of every (case, variant), round robin over repeats.

    One size at a time: its variants are set up, each runs one untimed warm-up sample
    (realisation 0), then each repeat runs every variant once on realisation 1..repeats,
    starting one place later each repeat so no variant always runs right after the same one.
    Sizes are not interleaved with each other: the pipeline keeps one set of MUMPS factors
    per thread, so switching systems between samples would repeat its analysis, which a
    sweep of one geometry never does.
    """
    times, T, phases, setup = {}, {}, {}, {}
    for case in cases:
        variants = {}
        for name in VARIANTS:
            v = make_variant(name, case, settings, workdir)
            t = time.perf_counter()
            v.setup()
            v.sample(0)
            setup[(case.spec, name)] = time.perf_counter() - t
            log(f"  set-up + warm-up {name:11s} {case.label}: "
                f"{setup[(case.spec, name)]:.1f} s")
            variants[name] = v
            times[(case.spec, name)], T[(case.spec, name)] = [], []
        variants["pipeline"].phases.clear()
        for rep in range(repeats):
            shift = rep % len(VARIANTS)
            for name in VARIANTS[shift:] + VARIANTS[:shift]:
                gc.collect()
                dt, tm = variants[name].sample(rep + 1)
                times[(case.spec, name)].append(dt)
                T[(case.spec, name)].append(np.asarray(tm))
            log(f"  {case.spec}: repeat {rep + 1}/{repeats} done")
        phases[case.spec] = list(variants["pipeline"].phases)
        del variants
        gc.collect()
    return {"times": times, "T": T, "phases": phases, "setup": setup}


# ------------------------------------------------------------------------------ memory probes
def probe_main(spec: dict) -> None:
    """Subprocess entry (``--probe``): print one JSON line.

    ``kind`` "memory" (default): set up one variant, run a few samples, report the peak RSS;
    ``kind`` "in-process": solve realisations of a config in this fresh process and report
    their wall and CPU time (the worker-cost comparison).
    """
    settings = Settings(**spec["settings"])
    case = Case.parse(spec["case"])
    if spec.get("kind") == "in-process":
        from pipeline.sweep.tasks import solve_realisation

        cfg = _config(case, settings, spec["realisations"], spec["workdir"],
                      energy=spec["energy"])
        solve_realisation(cfg, (0, 0, 0))  # warm-up: system, lead modes, analysis
        gc.collect()
        c0, t0 = time.process_time(), time.perf_counter()
        for r in range(1, spec["realisations"] + 1):
            solve_realisation(cfg, (r, 0, 0))
        print(json.dumps({"wall": time.perf_counter() - t0, "cpu": time.process_time() - c0,
                          "malloc_trim_threshold": os.environ.get("MALLOC_TRIM_THRESHOLD_")}))
        return
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


def _run_probe(spec: dict, env: dict | None = None) -> dict:
    proc = subprocess.run([sys.executable, str(Path(__file__).resolve()), "--probe",
                           json.dumps(spec)], capture_output=True, text=True, cwd=REPO,
                          env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"probe {spec} failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def measure_memory(cases, settings, samples, workdir, log) -> dict:
    out = {}
    jobs = [("baseline", cases[0])] + [(n, c) for c in cases for n in VARIANTS]
    for name, case in jobs:
        res = _run_probe({"variant": name, "case": case.spec, "samples": samples,
                          "workdir": workdir, "settings": settings.__dict__})
        key = "baseline" if name == "baseline" else (case.spec, name)
        out[key] = res
        log(f"  peak RSS {name:11s} {case.label}: {res['peak_rss_mb']:.0f} MB")
    return out


# ------------------------------------------------------------ what could cut the factorisation
def _mumps_context(ordering: str, *, pattern_only: bool, blr_tolerance: float | None = None):
    """A MUMPS context set up as the pipeline's (``pattern_only``) or with Kwant's controls.

    The pipeline's analysis uses the sparsity pattern only: ICNTL(6) = 0 (no column
    permutation from the values) and ICNTL(8) = 7 (scaling computed at each factorisation);
    block low-rank is ICNTL(35) = 1 with the dropping tolerance CNTL(7) (MUMPS 5.5 users'
    guide numbering). The MUMPS instance exists after a first analysis, hence the 1x1 one.
    """
    import scipy.sparse as sp
    from kwant.linalg.mumps import MUMPSContext

    ctx = MUMPSContext()
    if pattern_only or blr_tolerance is not None:
        # (AMD for the 1x1 matrix: PORD stops the process on it)
        ctx.analyze(sp.coo_matrix(np.ones((1, 1), dtype=complex)), ordering="amd")
        inst = ctx.mumps_instance
        if pattern_only:
            inst.icntl[6], inst.icntl[8] = 0, 7
        if blr_tolerance is not None:
            inst.icntl[35], inst.cntl[7] = 1, blr_tolerance
    return ctx


def _factor_entries(ctx) -> float:
    """Entries in the factors after a factorisation (INFOG(29); negative: millions)."""
    n = int(ctx.mumps_instance.infog[29])
    return float(n if n >= 0 else -n * 1_000_000)


def factorisation_experiments(cases, settings, repeats, tolerances, workdir, log) -> dict:
    """Orderings and block low-rank compression against the pipeline's factorisation.

    Per size, on the spin-block problem the pipeline solves:

    * BLR through the problem's own option: ``ScatteringProblem(dsys, blr_tolerance=tol)``,
      whole ``transmissions`` calls, round robin with the exact problem;
    * orderings: MUMPS on the same assembled matrix (Kwant's linear system of the problem,
      ``_make_linear_sys``), analysis and numerical factorisation timed separately, set up
      as the pipeline's (pattern-only analysis) and, for AMF, with Kwant's MUMPS controls.

    Every result's transmissions are compared with the exact problem's on the same
    realisations.
    """
    import scipy.sparse as sp
    from kwant.linalg.mumps import possible_orderings
    from kwant.solvers.common import SMatrix

    from pipeline.transport.scattering import (
        DETERMINISTIC_ORDERINGS,
        MUMPS_ORDERING,
        ScatteringProblem,
    )
    from pipeline.transport.solver import SOLVER

    available = set(possible_orderings())
    out = {}
    E = settings.energy
    for case in cases:
        v = BareSolve(case, settings, workdir)
        v.setup()
        rs = list(range(1, repeats + 1))
        params = {r: v.params_for(r) for r in rs}
        exact = v.problem
        ref = {r: exact.transmissions(E, params[r], fsyst=v.fs).matrix for r in rs}

        # BLR through the problem's option
        problems = [(None, exact)] + [(tol, ScatteringProblem(v.dsys, blr_tolerance=tol))
                                      for tol in tolerances]
        for _, p in problems:
            p.transmissions(E, params[rs[0]], fsyst=v.fs)  # analysis
        blr = {tol: {"total": [], "factor": [], "dev": 0.0} for tol, _ in problems}
        for k, r in enumerate(rs):
            shift = k % len(problems)
            for tol, p in problems[shift:] + problems[:shift]:
                gc.collect()
                p.reset_timings()
                t = time.perf_counter()
                res = p.transmissions(E, params[r], fsyst=v.fs)
                blr[tol]["total"].append(time.perf_counter() - t)
                blr[tol]["factor"].append(p.timings["factorisation"])
                blr[tol]["dev"] = max(blr[tol]["dev"], float(np.abs(res.matrix - ref[r]).max()))
        for _tol, p in problems[1:]:
            p.release()
        del problems

        # orderings on the assembled matrix
        configs = [(o, True) for o in ORDERINGS if o in available] + [(MUMPS_ORDERING, False)]
        n = len(v.fs.leads)
        everything = list(range(n))
        systems = {}
        for r in rs:
            linsys, lead_info = SOLVER._make_linear_sys(v.fs, everything, E, params=params[r],
                                                        check_hermiticity=False)
            systems[r] = (linsys.lhs.tocoo(), sp.hstack(linsys.rhs).tocsc(),
                          np.concatenate(linsys.indices), lead_info)
        orders = {c: {"analysis": [], "factor": [], "entries": 0.0, "flops": 0.0,
                      "used": None, "dev": 0.0} for c in configs}
        for k, r in enumerate(rs):
            lhs, rhs, kept, lead_info = systems[r]
            shift = k % len(configs)
            for ordering, pattern_only in configs[shift:] + configs[:shift]:
                row = orders[(ordering, pattern_only)]
                gc.collect()
                ctx = _mumps_context(ordering, pattern_only=pattern_only)
                t = time.perf_counter()
                ctx.analyze(lhs, ordering=ordering)
                row["analysis"].append(time.perf_counter() - t)
                t = time.perf_counter()
                ctx.factor(lhs, ordering=ordering, reuse_analysis=True)
                row["factor"].append(time.perf_counter() - t)
                row["entries"] = _factor_entries(ctx)
                row["flops"] = float(ctx.mumps_instance.rinfog[3])
                row["used"] = int(ctx.mumps_instance.infog[7])
                smat = SMatrix(ctx.solve(rhs)[kept], lead_info, everything, everything, True)
                T = np.array([[smat.transmission(i, j) for j in everything]
                              for i in everything])
                row["dev"] = max(row["dev"], float(np.abs(T - ref[r]).max()))
                del ctx
        out[case.spec] = {
            "blr": [{"tolerance": tol, "total_s": _median(d["total"]),
                     "factor_s": _median(d["factor"]), "max_dT": d["dev"]}
                    for tol, d in blr.items()],
            "orderings": [{"ordering": o, "pattern_only": po,
                           "deterministic": o in DETERMINISTIC_ORDERINGS,
                           "analysis_s": _median(d["analysis"]),
                           "factor_s": _median(d["factor"]), "entries": d["entries"],
                           "flops": d["flops"], "used": d["used"], "max_dT": d["dev"]}
                          for (o, po), d in orders.items()],
        }
        log(f"  factorisation experiments {case.label} done")
        exact.release()
        del v, systems
        gc.collect()
    return out


# ------------------------------------------------------------------------------------ sweeps
def _worker_stats():
    import psutil

    cpu = psutil.Process().cpu_times()
    return {"cpu": cpu.user + cpu.system, "peak_rss_mb": _peak_rss_mb(),
            "malloc_trim_threshold": os.environ.get("MALLOC_TRIM_THRESHOLD_")}


@contextlib.contextmanager
def _timed_checks():
    """Time the driver's checks inside each ``run_sweep`` (the workers idle meanwhile) by
    wrapping the module-level ``validate_run`` that ``run_sweep`` calls; restored after."""
    from pipeline.sweep import driver

    original = driver.validate_run
    checks: list[float] = []

    def timed_validate_run(*args, **kwargs):  # whatever its signature
        t = time.perf_counter()
        try:
            return original(*args, **kwargs)
        finally:
            checks.append(time.perf_counter() - t)

    driver.validate_run = timed_validate_run
    try:
        yield checks
    finally:
        driver.validate_run = original


def _cached_systems() -> int:
    """(Run on a worker.) Systems the worker's task cache holds."""
    from pipeline.sweep import tasks

    return len(tasks._SYSTEM_CACHE)


def _warm_cluster(n, cfg, workdir, log):
    """A local cluster of n workers warmed by short untimed sweeps until every worker has
    solved a task (system, lead modes and MUMPS analysis cached; first-call costs of the
    driver paid); returns the client and the largest worker peak RSS (MB) before any task.

    Only sweeps warm the workers: a solve through ``client.run`` would run in another thread
    of the worker, whose solver problem (kept per thread) would hold a second set of MUMPS
    factors that no sweep ever makes.
    """
    from pipeline.sweep.clusters import local_client
    from pipeline.sweep.driver import run_sweep

    t = time.perf_counter()
    client = local_client(n)
    logging.getLogger("distributed").setLevel(logging.WARNING)
    client.wait_for_workers(n)
    # a worker's own peak before any task (Dask alone): its baseline
    idle_mb = max(s["peak_rss_mb"] for s in client.run(_worker_stats).values())
    for _ in range(4):
        warm = Path(workdir) / f"sweep-w{n}-warm-up-{time.monotonic_ns()}.zarr"
        run_sweep(cfg, client=client, store_path=warm, progress=False, max_tasks=2 * n)
        shutil.rmtree(warm, ignore_errors=True)
        if min(client.run(_cached_systems).values()) > 0:
            break
    else:
        raise RuntimeError(f"a worker of the {n}-worker cluster got no warm-up task in 4 "
                           f"short sweeps")
    log(f"  cluster of {n} worker(s) started and warmed in {time.perf_counter() - t:.1f} s")
    return client, idle_mb


def _close(client) -> None:
    cluster = client.cluster
    client.close()
    cluster.close()


def measure_sweeps(case, settings, workers, realisations, repeats, workdir, log) -> dict:
    """Wall time of whole ``run_sweep`` calls on warm local clusters, worker counts alternated.

    Every worker first solves a task of a short untimed sweep, so its system, lead modes and
    MUMPS analysis are cached (what a long sweep amortises); each timed sweep writes a fresh
    store.
    """
    import psutil

    from pipeline.sweep.checks import validate_run
    from pipeline.sweep.driver import run_sweep

    cfg = _config(case, settings, realisations, workdir)
    samples = realisations * _samples_per_task(cfg)
    t = time.perf_counter()
    validate_run(cfg)
    validate_s = time.perf_counter() - t
    clients, idle = {}, {}
    try:
        with _timed_checks() as checks:
            for n in workers:
                clients[n], idle[n] = _warm_cluster(n, cfg, workdir, log)
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
            res[n]["worker_idle_rss_mb"] = idle[n]
        return {"case": case.spec, "samples": samples, "validate_s": validate_s,
                "per_worker": res}
    finally:
        for c in clients.values():
            _close(c)


# ---------------------------------------------------------- per-sample cost inside a worker
def _session_seconds(store) -> float | None:
    """Duration of the store's last session (its start and end stamps, to the second)."""
    sessions = store.group.attrs.get("sessions") or []
    if not sessions or "finished" not in sessions[-1]:
        return None
    start = _dt.datetime.fromisoformat(sessions[-1]["started"])
    end = _dt.datetime.fromisoformat(sessions[-1]["finished"])
    return (end - start).total_seconds()


def measure_worker_cost(case, settings, energy, realisations, repeats, workdir, log) -> dict:
    """Per-sample cost of the same sweep inside a 1-worker Dask cluster and in-process.

    Four modes, round robin over ``repeats`` (starting one place later each time):

    * ``worker``: ``run_sweep`` of ``realisations`` realisations into a fresh store on a warm
      ``local_client(1)`` (the worker environment helisweep configures); the worker's own
      time is the sum of its tasks' compute intervals in Dask's task stream (what the worker
      spends on the samples, without the driver's checks, store and scheduling), next to the
      whole sweep's wall time;
    * ``in-process``: ``solve_realisation`` of the same realisations in this process;
    * ``subprocess`` / ``subprocess-trim``: the same in a fresh process without / with
      ``MALLOC_TRIM_THRESHOLD_=65536`` (Dask's default for worker processes), each after
      one untimed warm-up realisation.
    """
    import psutil
    from distributed import get_task_stream

    from pipeline.sweep.driver import run_sweep
    from pipeline.sweep.tasks import solve_realisation

    cfg = _config(case, settings, realisations, workdir, energy=energy)
    samples = realisations * _samples_per_task(cfg)
    modes = ["worker", "in-process", "subprocess", "subprocess-trim"]
    res = {m: {"wall": [], "cpu": []} for m in modes}
    res["worker"].update({"sweep": [], "whole": [], "session": []})
    base_env = {k: v for k, v in os.environ.items() if k != "MALLOC_TRIM_THRESHOLD_"}
    probe = {"kind": "in-process", "case": case.spec, "settings": settings.__dict__,
             "energy": energy, "realisations": realisations, "workdir": workdir}
    seen = {"benchmark process": os.environ.get("MALLOC_TRIM_THRESHOLD_")}
    with _timed_checks() as checks:
        client, _ = _warm_cluster(1, cfg, workdir, log)
        try:
            seen["Dask worker"] = next(iter(client.run(_worker_stats).values()))[
                "malloc_trim_threshold"]
            solve_realisation(cfg, (0, 0, 0))  # warm-up in this process
            me = psutil.Process()
            for rep in range(repeats):
                shift = rep % len(modes)
                for mode in modes[shift:] + modes[:shift]:
                    gc.collect()
                    if mode == "worker":
                        w0 = next(iter(client.run(_worker_stats).values()))["cpu"]
                        path = Path(workdir) / f"worker-cost-rep{rep}.zarr"
                        with get_task_stream(client=client) as stream:
                            t = time.perf_counter()
                            store = run_sweep(cfg, client=client, store_path=path,
                                              progress=False)
                            wall = time.perf_counter() - t
                        w1 = next(iter(client.run(_worker_stats).values()))["cpu"]
                        res[mode]["wall"].append(sum(
                            ss["stop"] - ss["start"] for task in stream.data
                            for ss in task["startstops"] if ss["action"] == "compute"))
                        res[mode]["whole"].append(wall)
                        res[mode]["sweep"].append(wall - checks[-1])
                        res[mode]["cpu"].append(w1 - w0)
                        res[mode]["session"].append(_session_seconds(store))
                        shutil.rmtree(path, ignore_errors=True)
                    elif mode == "in-process":
                        c0 = me.cpu_times()
                        t = time.perf_counter()
                        for r in range(1, realisations + 1):
                            solve_realisation(cfg, (r, 0, 0))
                        res[mode]["wall"].append(time.perf_counter() - t)
                        c1 = me.cpu_times()
                        res[mode]["cpu"].append((c1.user + c1.system) - (c0.user + c0.system))
                    else:
                        env = dict(base_env)
                        if mode == "subprocess-trim":
                            env["MALLOC_TRIM_THRESHOLD_"] = DASK_MALLOC_TRIM
                        out = _run_probe(probe, env)
                        seen[mode] = out["malloc_trim_threshold"]
                        res[mode]["wall"].append(out["wall"])
                        res[mode]["cpu"].append(out["cpu"])
                log(f"  worker cost: repeat {rep + 1}/{repeats} done ("
                    + ", ".join(f"{m} {res[m]['wall'][-1] / samples * 1e3:.1f} ms/sample"
                                for m in modes) + ")")
        finally:
            _close(client)
    return {"case": case.spec, "energy": energy, "realisations": realisations,
            "samples": samples, "per_task": _samples_per_task(cfg), "repeats": repeats,
            "modes": res, "malloc_trim_threshold": seen}


# ------------------------------------------------------------------------------------ profile
def _median(xs):
    xs = [x for x in xs if x is not None]
    return statistics.median(xs) if xs else float("nan")


def _stat_ct(stats: pstats.Stats, path_end: str, func: str) -> tuple[float, int]:
    """Cumulative time and call count of a function in a cProfile run (0 when absent)."""
    ct, nc = 0.0, 0
    for (filename, _, name), (_, ncalls, _, cum, _) in stats.stats.items():
        if name == func and filename.replace(os.sep, "/").endswith(path_end):
            ct, nc = ct + cum, nc + ncalls
    return ct, nc


def profile_pipeline(case, settings, samples, workdir, log, profile_out=None) -> dict:
    """Where the time of ``solve_realisation`` goes, item by item, and a cProfile listing."""
    from pipeline.physics.disorder import realise
    from pipeline.sweep import runmodel, tasks
    from pipeline.sweep.config import config_hash
    from pipeline.sweep.store import SampleStore
    from pipeline.transport.landauer import parse_measurement
    from pipeline.transport.scattering import PHASES

    pipe = Pipeline(case, settings, workdir)
    pipe.setup()
    cfg, problem = pipe.cfg, pipe.problem
    dsys = tasks.system_for(cfg, 0, reduced=True)
    terms = runmodel.disorder_terms(cfg)
    rs = list(range(1, samples + 1))
    items = {k: [] for k in ("solve_realisation", "realise", "block_params", "system_for",
                             "config_hash", "parse_measurement", *PHASES)}
    for r in rs:
        gc.collect()
        problem.reset_timings()
        t = time.perf_counter()
        tasks.solve_realisation(cfg, (r, 0, 0))
        items["solve_realisation"].append((time.perf_counter() - t) / pipe.per_task)
        for k in PHASES:
            items[k].append(problem.timings[k] / pipe.per_task)
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
        for label in cfg.measure.labels:
            parse_measurement(label)
        items["parse_measurement"].append(time.perf_counter() - t)
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
    store.release_lock()
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
        "transmissions": ("pipeline/transport/scattering.py", "transmissions"),
        "lead_modes": ("kwant/physics/leads.py", "modes"),
        "precalculate": ("kwant/system.py", "precalculate"),
        "hamiltonian_submatrix": ("_system.pyx", "hamiltonian_submatrix"),
    }.items():
        ct, nc = _stat_ct(stats, path_end, func)
        cp[key] = {"s_per_sample": ct / n, "calls_per_sample": nc / n}
    buf = io.StringIO()
    pstats.Stats(prof, stream=buf).strip_dirs().sort_stats("cumulative").print_stats(18)
    listing = "\n".join(line for line in buf.getvalue().splitlines()
                        if line.strip() and not line.startswith(("Ordered", "List reduced"))
                        and "function calls" not in line and "Stats" not in line)
    log("  profile: cProfile done")
    return {
        "case": case.spec, "samples": len(rs),
        "direct": {k: _median(v) for k, v in items.items()},
        "result_bytes": len(blob), "result_pickle_s": pickle_s, "cfg_bytes": cfg_bytes,
        "zarr_write_s": _median(writes), "cprofile": cp, "listing": listing,
        "n_analyses": problem.n_analyses,
    }


# ------------------------------------------------------------------------------------ report
_ORDERINGS = {0: "amd", 2: "amf", 3: "scotch", 4: "pord", 5: "metis", 6: "qamd", 7: "auto"}


def machine_description() -> dict:
    import kwant.solvers.default as default

    from pipeline.transport.environment import describe
    from pipeline.transport.scattering import MUMPS_ORDERING, SOLVER_NAME

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
        "kwant_solver": facts["kwant_solver"], "blas": facts["blas"],
        "python": facts["python"], "numpy": facts["numpy"], "scipy": facts["scipy"],
        "kwant_default_ordering": kd.ordering, "kwant_default_nrhs": kd.nrhs,
        "kwant_default_sparse_rhs": kd.sparse_rhs, "mumps_orderings": orderings,
        "pipeline_backend": SOLVER_NAME, "pipeline_ordering": MUMPS_ORDERING,
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


def _yes(ok: bool) -> str:
    return "yes" if ok else "**no**"


def _phase_medians(phases: list[dict]) -> dict:
    keys = phases[0].keys() if phases else ()
    return {k: _median([p[k] for p in phases]) for k in keys}


def render(args, cases, machine, timing, memory, factor, sweep, worker, prof) -> str:
    s = args.settings
    L = []
    L.append("# Benchmarks: per-sample cost of disorder-averaged edge transport\n")
    if args.smoke:
        L.append("> **SMOKE TEST: toy sizes, 1 repeat. These numbers only show that the "
                 "benchmark runs end to end; they are NOT results.** Run the full benchmark on "
                 "an idle machine with the command in `benchmarks/README.md` to replace this "
                 "file.\n")
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
    L.append("| kwant-best solver | `kwant.solvers.mumps.Solver` with ordering `amf`, "
             "sparse_rhs True, nrhs = all injected modes (one solve call), "
             "check_hermiticity False, in_leads/out_leads all but one each |")
    L.append(f"| pipeline solve | `ScatteringProblem` (backend `{machine['pipeline_backend']}`), "
             f"MUMPS ordering `{machine['pipeline_ordering']}`, pattern-only analysis reused, "
             f"sparse right-hand sides, one lead not injected |")
    L.append(f"| MUMPS orderings available | {machine['mumps_orderings']} |")
    L.append(f"| Python, NumPy, SciPy | {machine['python']}, {machine['numpy']}, "
             f"{machine['scipy']} |")
    L.append("")

    # ------------------------------------------------------------------ per-sample cost
    med = {k: _median(v) for k, v in timing["times"].items()}
    phases = {spec: _phase_medians(p) for spec, p in timing["phases"].items()}
    fact = {c.spec: phases[c.spec].get("factorisation", float("nan")) for c in cases}
    L.append("## Per-sample cost\n")
    L.append(f"BHZ model, `PRESETS[\"hgte-7.0nm\"]`, a = {s.lattice_constant:g} nm, "
             f"E_F = {s.energy:g} meV, B = 0, Anderson disorder U = {s.disorder_width:g} meV, "
             f"leads of the device material shifted down by {s.contact_doping:g} meV "
             f"(metallic contacts), seed {s.seed}, one core. Medians over {args.repeats} "
             f"repeat(s) (realisations 1..{args.repeats}, after one untimed warm-up sample "
             f"each); for each size its variants are interleaved round robin, all in one "
             f"process.\n")
    L.append("| " + " | ".join(TABLE_COLUMNS) + " |")
    L.append("|" + "|".join(["---", "---"] + ["---:"] * 5) + "|")
    for case in cases:
        naive, best, fc = (med[(case.spec, "naive")], med[(case.spec, "kwant-best")],
                           fact[case.spec])
        for name in VARIANTS:
            m = med[(case.spec, name)]
            rss = memory.get((case.spec, name), {}).get("peak_rss_mb") if memory else None
            L.append(f"| {VARIANT_TITLES[name]} | {case.label} | {_f(m)} | {_f(m / naive)} | "
                     f"{_f(m / best)} | {_f(m / fc)} | "
                     f"{_f(rss) if rss is not None else 'not measured'} |")
        L.append(f"| &nbsp;&nbsp;numerical factorisation alone (MUMPS factor step inside the "
                 f"pipeline's samples) | {case.label} | {_f(fc)} | {_f(fc / naive)} | "
                 f"{_f(fc / best)} | 1.000 | — |")
    L.append("")
    L.append("Ratios are medians of the same run and size: variant / naive loop, variant / "
             "best hand-written Kwant loop, and variant / the numerical factorisation alone "
             "(the MUMPS factor step of the pipeline's own samples, read from its "
             "`ScatteringProblem.timings`: the floor of this method, which factorises once "
             "per sample). Peak RSS: the peak resident set (`VmHWM`) of a fresh subprocess "
             "that sets up the variant (building its Kwant system) and runs "
             f"{args.memory_samples} sample(s)"
             + (f"; the imports alone (Kwant, the pipeline) peak at "
                f"{_f(memory['baseline']['peak_rss_mb'])} MB." if memory else "."))
    L.append("")
    L.append("Where the pipeline's per-sample time goes (medians of the same timed samples, "
             "seconds per sample; the phases are `ScatteringProblem.timings`):\n")
    L.append("| size | `solve_realisation` | assembly | lead modes | analysis | numerical "
             "factorisation | solve (sparse RHS) | outside the solve (disorder, onsite "
             "stack, measurements, caches) |")
    L.append("|---|" + "---:|" * 7)
    for case in cases:
        ph, m = phases[case.spec], med[(case.spec, "pipeline")]
        inside = sum(ph.get(k, 0.0) for k in ("assembly", "lead_modes", "analysis",
                                              "factorisation", "solve"))
        L.append(f"| {case.label} | {_f(m)} | {_f(ph.get('assembly'))} | "
                 f"{_f(ph.get('lead_modes'))} | {_f(ph.get('analysis'))} | "
                 f"{_f(ph.get('factorisation'))} ({100 * ph.get('factorisation', 0) / m:.0f} %)"
                 f" | {_f(ph.get('solve'))} | {_f(m - inside)} |")
    L.append("")
    L.append("Spread (min–max s/sample over the repeats) and set-up (system build, lead "
             "modes, first sample) per variant:")
    L.append("")
    for case in cases:
        parts = []
        for name in VARIANTS:
            xs = timing["times"][(case.spec, name)]
            parts.append(f"{name} {_f(min(xs))}–{_f(max(xs))} (set-up "
                         f"{_f(timing['setup'][(case.spec, name)])} s)")
        L.append(f"- {case.label}: " + "; ".join(parts))
    L.append("")
    worst, where = 0.0, ""
    for case in cases:
        ref = timing["T"][(case.spec, "naive")]
        for name in VARIANTS:
            dev = max(float(np.abs(a - b).max()) for a, b in zip(timing["T"][(case.spec, name)],
                                                                   ref))
            if dev >= worst:
                worst, where = dev, f"{name}, {case.spec}"
    verdict = "agree" if worst <= FACTOR_ACCURACY else "DISAGREE"
    L.append(f"Check: the whole total transmission matrix (both spins, reflections on the "
             f"diagonal) of every variant and realisation {verdict} with the naive four-band "
             f"Kwant solve to {FACTOR_ACCURACY:.0e} (largest |ΔT| = {worst:.1e}, {where}).\n")

    # ------------------------------------------------------------------ targets
    L.append("## Targets (issue 15)\n")
    if args.smoke:
        L.append("*Smoke test: the verdicts below are computed the same way as in a full run "
                 "but mean nothing at toy sizes.*\n")
    L.append("| target | measured | met |\n|---|---|---|")
    for case in cases:
        pipe, best = med[(case.spec, "pipeline")], med[(case.spec, "kwant-best")]
        r = pipe / best
        L.append(f"| pipeline per-sample cost ≤ {TARGET_VS_BEST}× the best hand-written Kwant "
                 f"loop, {case.label} | pipeline / kwant-best = {_f(pipe)} / {_f(best)} s = "
                 f"{r:.3f}× | {_yes(r <= TARGET_VS_BEST)} |")
    for case in cases:
        pipe, best = med[(case.spec, "pipeline")], med[(case.spec, "kwant-best")]
        r = pipe / best
        L.append(f"| stretch goal: ≤ {STRETCH_VS_BEST}× the best Kwant loop, {case.label} | "
                 f"{r:.3f}× | {_yes(r <= STRETCH_VS_BEST)} |")
    for case in cases:
        pipe, naive = med[(case.spec, "pipeline")], med[(case.spec, "naive")]
        L.append(f"| ≥ {TARGET_VS_NAIVE:g}× below the naive loop, {case.label} | naive / "
                 f"pipeline = {naive / pipe:.1f}× | {_yes(naive / pipe >= TARGET_VS_NAIVE)} |")
    for case in cases:
        pipe = med[(case.spec, "pipeline")]
        L.append(f"| (no target) ratio to the numerical factorisation alone, {case.label} | "
                 f"pipeline / factorisation = {_f(pipe)} / {_f(fact[case.spec])} s = "
                 f"{pipe / fact[case.spec]:.2f}× | — |")
    if sweep and {1, 2} <= set(sweep["per_worker"]):
        pw = sweep["per_worker"]
        ratio = _median(pw[1]["wall"]) / _median(pw[2]["wall"])
        after = (_median([w - c for w, c in zip(pw[1]["wall"], pw[1]["checks"])])
                 / _median([w - c for w, c in zip(pw[2]["wall"], pw[2]["checks"])]))
        L.append(f"| sweep throughput on 2 workers ≥ {TARGET_SWEEP_RATIO}× that on 1 "
                 f"({Case.parse(sweep['case']).label}, {sweep['samples']} samples) | "
                 f"{ratio:.2f}× whole sweep ({after:.2f}× after the driver's checks) | "
                 f"{_yes(ratio >= TARGET_SWEEP_RATIO)} |")
    else:
        L.append(f"| sweep throughput on 2 workers ≥ {TARGET_SWEEP_RATIO}× that on 1 | "
                 f"not measured | — |")
    if memory:
        spec = sweep["case"] if sweep else next(c for c in cases if c.kind == "strip").spec
        if (spec, "pipeline") in memory:
            pm = memory[(spec, "pipeline")]["peak_rss_mb"]
            for ref_name, what in (("kwant-best", "the best Kwant loop's process"),
                                   ("solve", "the bare ScatteringProblem solve's process")):
                fm = memory[(spec, ref_name)]["peak_rss_mb"]
                L.append(f"| peak memory per worker ≤ {TARGET_MEMORY_RATIO}× the bare solve's "
                         f"({Case.parse(spec).label}; bare solve = {what}) | pipeline process "
                         f"/ {ref_name} process = {pm:.0f} / {fm:.0f} MB = {pm / fm:.2f}× | "
                         f"{_yes(pm / fm <= TARGET_MEMORY_RATIO)} |")
                if sweep:
                    wm = max(v["worker_peak_rss_mb"] for v in sweep["per_worker"].values())
                    idle = max(v["worker_idle_rss_mb"] for v in sweep["per_worker"].values())
                    L.append(f"| (the same, for a Dask worker process) | worker / {ref_name} "
                             f"process = {wm:.0f} / {fm:.0f} MB = {wm / fm:.2f}× (an idle "
                             f"worker, before any task, peaks at {idle:.0f} MB; the imports "
                             f"alone at {memory['baseline']['peak_rss_mb']:.0f} MB) | "
                             f"{_yes(wm / fm <= TARGET_MEMORY_RATIO)} |")
    else:
        L.append(f"| peak memory per worker ≤ {TARGET_MEMORY_RATIO}× the bare solve's | "
                 f"not measured | — |")
    if worker:
        wk = _worker_ratios(worker)
        L.append(f"| per-sample cost inside a Dask worker within "
                 f"{100 * TARGET_WORKER_OVERHEAD:.0f} % of in-process "
                 f"({Case.parse(worker['case']).label}, {worker['per_task']} energies) | "
                 f"worker's task compute / in-process = {_ms(wk['worker'])} / "
                 f"{_ms(wk['in-process'])} per sample = {wk['ratio']:.3f}× "
                 f"({100 * (wk['ratio'] - 1):+.1f} %); whole sweep minus the driver's checks: "
                 f"{wk['sweep_ratio']:.3f}× | "
                 f"{_yes(wk['ratio'] <= 1 + TARGET_WORKER_OVERHEAD)} |")
    else:
        L.append("| per-sample cost inside a Dask worker within 5 % of in-process | "
                 "not measured | — |")
    L.append("| scaling curve 1e4–1e6 sites, fitted exponents, largest device in 24 GiB, "
             "preflight memory estimate within 30 % | measured by `benchmarks/bench_scaling.py`:"
             " see `docs/benchmarks-scaling.md` | see there |")
    L.append("| segment pools use the same path (concatenation benchmark) | measured by "
             "`benchmarks/bench_concat.py`: see `docs/benchmarks-concat.md` | see there |")
    L.append("")

    if factor:
        L.extend(_render_factor(cases, factor, med, fact))
    if sweep:
        L.extend(_render_sweep(args, sweep))
    if worker:
        L.extend(_render_worker(worker))
    if prof:
        L.extend(_render_profile(prof))
    return "\n".join(L) + "\n"


def _render_factor(cases, factor, med, fact) -> list[str]:
    L = ["## What could cut the numerical factorisation\n"]
    L.append(f"On the spin-block problem the pipeline solves, the same realisations for every "
             f"setting (round robin, medians). max |ΔT| is the largest deviation of any entry "
             f"of the transmission matrix from the exact pipeline solve; a setting is usable "
             f"when it stays within {FACTOR_ACCURACY:.0e}.\n")
    for case in cases:
        f = factor.get(case.spec)
        if not f:
            continue
        L.append(f"### {case.label}\n")
        L.append("Block low-rank (BLR) factorisation through the problem's option "
                 "(`ScatteringProblem(dsys, blr_tolerance=tol)`, MUMPS ICNTL(35) = 1, "
                 "CNTL(7) = tol), whole `transmissions` calls:\n")
        L.append("| BLR tolerance | s per solve | numerical factorisation s | factorisation / "
                 "exact | max \\|ΔT\\| | keeps 1e-10 |")
        L.append("|---|---:|---:|---:|---:|---|")
        ex = f["blr"][0]
        for row in f["blr"]:
            label = "off (exact, the pipeline's default)" if row["tolerance"] is None else \
                f"{row['tolerance']:.0e}"
            L.append(f"| {label} | {_f(row['total_s'])} | {_f(row['factor_s'])} | "
                     f"{_f(row['factor_s'] / ex['factor_s'])} | {row['max_dT']:.1e} | "
                     f"{_yes(row['max_dT'] <= FACTOR_ACCURACY)} |")
        L.append("")
        L.append("Orderings: MUMPS on the same assembled matrix (Kwant's linear system of this "
                 "problem), analysis and numerical factorisation timed separately:\n")
        L.append("| ordering (used) | controls | deterministic | analysis s | numerical "
                 "factorisation s | / pipeline's (amf, pattern-only) | factor entries | "
                 "flops | max \\|ΔT\\| |")
        L.append("|---|---|---|---:|---:|---:|---:|---:|---:|")
        ref = next(o for o in f["orderings"] if o["ordering"] == "amf" and o["pattern_only"])
        for o in f["orderings"]:
            used = _ORDERINGS.get(o["used"], str(o["used"]))
            L.append(f"| {o['ordering']} ({used}) | "
                     f"{'pattern-only (pipeline)' if o['pattern_only'] else 'Kwant defaults'} | "
                     f"{'yes' if o['deterministic'] else 'no'} | {_f(o['analysis_s'])} | "
                     f"{_f(o['factor_s'])} | {_f(o['factor_s'] / ref['factor_s'])} | "
                     f"{o['entries']:.3g} | {o['flops']:.3g} | {o['max_dT']:.1e} |")
        L.append("")
        # the best usable option, and what it would make of the pipeline's sample
        options = [(r["factor_s"] / ex["factor_s"], f"BLR {r['tolerance']:.0e}")
                   for r in f["blr"][1:] if r["max_dT"] <= FACTOR_ACCURACY]
        options += [(o["factor_s"] / ref["factor_s"], f"ordering {o['ordering']}")
                    for o in f["orderings"] if o["deterministic"] and o["pattern_only"]
                    and o["ordering"] != "amf" and o["max_dT"] <= FACTOR_ACCURACY]
        if options:
            gain, label = min(options)
            pipe, best = med[(case.spec, "pipeline")], med[(case.spec, "kwant-best")]
            projected = pipe - fact[case.spec] * (1 - gain)
            L.append(f"Best usable option here: {label}, factorisation × {gain:.2f}. "
                     f"Projected (not measured) pipeline sample with it: {_f(projected)} s = "
                     f"{projected / best:.3f}× the best Kwant loop (stretch goal "
                     f"{STRETCH_VS_BEST}×).\n")
    return L


def _render_sweep(args, sweep) -> list[str]:
    L = [f"## Whole sweeps through the engine ({Case.parse(sweep['case']).label})\n"]
    L.append(f"`run_sweep` of {sweep['samples']} samples (realisations × 1 energy) into a "
             f"fresh Zarr store, on warm `local_client(n)` clusters (short untimed sweeps "
             f"ran until every worker had solved a task, so its system, lead modes and MUMPS "
             f"analysis are cached), medians over {args.sweep_repeats} "
             f"repeat(s), worker counts alternated. Wall time includes the driver's per-sweep "
             f"checks and the store.\n")
    L.append("| workers | median wall s | of which driver checks s | samples/s | ratio to "
             "1 worker | samples/s after the checks | ratio to 1 worker after the checks | "
             "driver CPU s/sample | worker CPU s/sample | peak RSS per worker MB | idle "
             "worker MB |")
    L.append("|" + "---:|" * 11)
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
                 f"{_f(pw[n]['worker_peak_rss_mb'])} | {_f(pw[n]['worker_idle_rss_mb'])} |")
    L.append("")
    cores = os.cpu_count() or 1
    for n in sorted(pw):
        if n == n0:
            continue
        cpu = (_median(pw[n]["worker_cpu"]) + _median(pw[n]["driver_cpu"])) / sweep["samples"]
        bound = min(n, cores) / cpu
        L.append(f"CPU bound with {n} workers on this {cores}-core machine: {min(n, cores)} "
                 f"core(s) / (worker + driver CPU per sample, {_f(cpu)} s) = {_f(bound)} "
                 f"samples/s = {_f(bound / (sweep['samples'] / base))}× the 1-worker "
                 f"throughput: the ratio no scheduling could beat while the driver and the "
                 f"scheduler share the cores with the workers.")
    L.append("")
    L.append("Driver checks: `validate_run`, which `run_sweep` calls before submitting any "
             "task (the workers idle meanwhile); timed inside each sweep. \"After the "
             "checks\" divides by the wall time minus that.")
    L.append("")
    L.append("Driver CPU is that of the benchmark process, which also runs the Dask "
             "scheduler; on a 2-core machine it competes with the 2 workers.\n")
    return L


def _worker_ratios(worker) -> dict:
    n = worker["samples"]
    m = worker["modes"]
    per = {k: _median(v["wall"]) / n for k, v in m.items()}
    return {**per, "ratio": per["worker"] / per["in-process"],
            "sweep_ratio": _median(m["worker"]["sweep"]) / n / per["in-process"],
            "trim_ratio": per["subprocess-trim"] / per["subprocess"]}


def _render_worker(worker) -> list[str]:
    n, m = worker["samples"], worker["modes"]
    wk = _worker_ratios(worker)
    L = [f"## Per-sample cost inside a Dask worker ({Case.parse(worker['case']).label}, "
         f"{worker['per_task']} energies)\n"]
    L.append(f"The same {worker['realisations']} realisations × {worker['per_task']} energies "
             f"(`energy = {worker['energy']}`, {n} samples) computed four ways, round robin "
             f"over {worker['repeats']} repeat(s) (medians): a whole `run_sweep` on a warm "
             f"1-worker `local_client` (the worker environment helisweep configures), "
             f"`solve_realisation` in the benchmark process, and in fresh subprocesses with "
             f"and without `MALLOC_TRIM_THRESHOLD_={DASK_MALLOC_TRIM}` (Dask's default for "
             f"worker processes) after one warm-up realisation.\n")
    L.append("| mode | ms per sample | ratio to in-process | CPU ms per sample | "
             "MALLOC_TRIM_THRESHOLD_ seen |")
    L.append("|---|---:|---:|---:|---|")
    seen = worker["malloc_trim_threshold"]
    titles = {"worker": "Dask worker: its tasks' compute time (Dask task stream)",
              "in-process": "in-process (benchmark process)",
              "subprocess": "fresh subprocess, without MALLOC_TRIM_THRESHOLD_",
              "subprocess-trim": f"fresh subprocess, MALLOC_TRIM_THRESHOLD_={DASK_MALLOC_TRIM}"}
    where = {"worker": "Dask worker", "in-process": "benchmark process",
             "subprocess": "subprocess", "subprocess-trim": "subprocess-trim"}
    for mode in ("worker", "in-process", "subprocess", "subprocess-trim"):
        L.append(f"| {titles[mode]} | {_f(1e3 * wk[mode])} | "
                 f"{_f(wk[mode] / wk['in-process'])} | "
                 f"{_f(1e3 * _median(m[mode]['cpu']) / n)} | "
                 f"{seen.get(where[mode]) or 'unset'} |")
    sweep = _median(m["worker"]["sweep"]) / n
    whole = _median(m["worker"]["whole"]) / n
    sess = _median(m["worker"]["session"])
    L.append(f"| Dask worker: `run_sweep` wall minus the driver's checks (store, scheduling "
             f"and the last write included) | {_f(1e3 * sweep)} | "
             f"{_f(sweep / wk['in-process'])} | — | |")
    L.append(f"| Dask worker: whole `run_sweep` wall (with the driver's checks) | "
             f"{_f(1e3 * whole)} | {_f(whole / wk['in-process'])} | — | |")
    if sess == sess:  # not NaN
        L.append(f"| Dask worker: the store's session record (start/finish to the second) | "
                 f"{_f(1e3 * sess / n)} | {_f(sess / n / wk['in-process'])} | — | |")
    L.append("")
    L.append(f"Effect of `MALLOC_TRIM_THRESHOLD_={DASK_MALLOC_TRIM}` in a plain process "
             f"(no Dask): {wk['trim_ratio']:.3f}× the per-sample cost without it. The worker "
             f"against a fresh process without it (the same clean start as a worker): "
             f"{wk['worker'] / wk['subprocess']:.3f}×. Worker CPU "
             f"is the worker process's own (`psutil`); in-process CPU that of the benchmark "
             f"process during the loop.\n")
    spread = "; ".join(f"{mode} {_f(1e3 * min(v['wall']) / n)}–{_f(1e3 * max(v['wall']) / n)}"
                       for mode, v in m.items())
    L.append(f"Spread (min–max ms per sample): {spread}.\n")
    return L


def _render_profile(prof) -> list[str]:
    d, cp = prof["direct"], prof["cprofile"]
    rt = d["solve_realisation"]
    L = [f"## Profile of the pipeline path ({Case.parse(prof['case']).label})\n"]
    L.append(f"Direct timings (medians over {prof['samples']} realisations, no profiler); "
             f"the solve's phases are its `ScatteringProblem.timings`. Shares are of the "
             f"direct `solve_realisation` time.\n")
    L.append("| item | s/sample | share |")
    L.append("|---|---:|---:|")

    def row(label, x):
        L.append(f"| {label} | {_f(x)} | {100 * x / rt:.1f} % |")

    row("`solve_realisation` (whole task, per sample)", rt)
    row("&nbsp;&nbsp;disorder generation (`realise`)", d["realise"])
    row("&nbsp;&nbsp;onsite stack + spin split (`block_params`)", d["block_params"])
    row("&nbsp;&nbsp;system cache lookup (`system_for`)", d["system_for"])
    row("&nbsp;&nbsp;`config_hash` (one call)", d["config_hash"])
    row("&nbsp;&nbsp;`parse_measurement` (all labels)", d["parse_measurement"])
    for k, label in (("assembly", "assembly (hoppings once per field, onsite update)"),
                     ("lead_modes", "lead blocks from the precalculated lead modes"),
                     ("analysis", "MUMPS analysis (reused: 0 after the first sample)"),
                     ("factorisation", "MUMPS numerical factorisation"),
                     ("solve", "MUMPS solve, sparse right-hand sides")):
        row(f"&nbsp;&nbsp;solve: {label}", d[k])
    L.append("")
    L.append(f"- MUMPS analyses in this process's problem: {prof['n_analyses']} (one per "
             f"sparsity pattern).")
    L.append(f"- Lead modes: {cp['lead_modes']['calls_per_sample']:g} `kwant.physics.modes` "
             f"call(s), {cp['precalculate']['calls_per_sample']:g} `precalculate` call(s) and "
             f"{cp['hamiltonian_submatrix']['calls_per_sample']:g} `hamiltonian_submatrix` "
             f"call(s) per sample in the profiled tasks (0: the caches work).")
    L.append(f"- Shipped per task: the `RealisationSamples` of a realisation pickles to "
             f"{prof['result_bytes']:,} bytes in {_ms(prof['result_pickle_s'])}; the config "
             f"pickles to {prof['cfg_bytes']:,} bytes (it travels with each task).")
    L.append(f"- Zarr: `SampleStore.write_block` takes {_ms(prof['zarr_write_s'])} per task "
             f"on the driver (not on a worker's critical path, but on the same 2 cores).")
    L.append("")
    L.append("<details><summary>cProfile listing (cumulative)</summary>\n")
    L.append("```\n" + prof["listing"] + "\n```\n</details>\n")
    return L


# -------------------------------------------------------------------------------------- main
def parse_args(argv=None):
    p = argparse.ArgumentParser(
        description="Per-sample cost of the disorder-averaged transport pipeline against a "
                    "naive rebuild loop and the best hand-written Kwant loop.",
        formatter_class=argparse.ArgumentDefaultsHelpFormatter)
    p.add_argument("--smoke", action="store_true",
                   help="toy sizes, 1 repeat, short sweeps and profile: checks the script runs")
    p.add_argument("--sizes", nargs="+", type=Case.parse, default=None,
                   help=f"device sizes in lattice sites (default {' '.join(DEFAULT_SIZES)}; "
                        f"with --smoke {' '.join(SMOKE_SIZES)})")
    p.add_argument("--repeats", type=int, default=None,
                   help="timed realisations per variant and size (default 7; --smoke 1)")
    p.add_argument("--memory-samples", type=int, default=None,
                   help="samples per memory probe subprocess (default 2; --smoke 1)")
    p.add_argument("--factor-repeats", type=int, default=None,
                   help="realisations per factorisation setting (default 7; --smoke 1)")
    p.add_argument("--blr-tolerances", type=float, nargs="+", default=list(BLR_TOLERANCES),
                   help="MUMPS block low-rank tolerances tried")
    p.add_argument("--sweep-size", type=Case.parse, default=None,
                   help="size of the sweep benchmark (default: the first strip size)")
    p.add_argument("--sweep-realisations", type=int, default=None,
                   help="realisations per timed sweep (default 64; --smoke 4)")
    p.add_argument("--sweep-repeats", type=int, default=None,
                   help="timed sweeps per worker count (default 3; --smoke 1)")
    p.add_argument("--workers", type=int, nargs="+", default=[1, 2],
                   help="worker counts for the sweep benchmark")
    p.add_argument("--worker-size", type=Case.parse, default=None,
                   help="device of the worker-cost comparison (default strip:100x30; "
                        "--smoke strip:16x8)")
    p.add_argument("--worker-energies", type=int, default=None,
                   help="energies from -8 to 8 meV per realisation there (default 33; "
                        "--smoke 3, from -1 to 1 meV)")
    p.add_argument("--worker-realisations", type=int, default=None,
                   help="realisations per worker-cost run (default 32; --smoke 2)")
    p.add_argument("--worker-repeats", type=int, default=None,
                   help="round-robin repeats of the worker-cost comparison (default 3; "
                        "--smoke 1)")
    p.add_argument("--profile-size", type=Case.parse, default=None,
                   help="size of the profile (default: the first strip size)")
    p.add_argument("--profile-samples", type=int, default=None,
                   help="realisations in the profile (default 5; --smoke 2)")
    p.add_argument("--profile-out", default=None, help="also dump the cProfile stats here")
    p.add_argument("--no-memory", action="store_true", help="skip the memory probes")
    p.add_argument("--no-factor", action="store_true",
                   help="skip the factorisation experiments")
    p.add_argument("--no-sweep", action="store_true", help="skip the Dask sweep benchmark")
    p.add_argument("--no-worker", action="store_true",
                   help="skip the worker-versus-in-process comparison")
    p.add_argument("--no-profile", action="store_true", help="skip the profile")
    p.add_argument("--disorder", type=float, default=50.0, help="Anderson width U, meV")
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
                              ("factor_repeats", 7, 1), ("sweep_realisations", 64, 4),
                              ("sweep_repeats", 3, 1), ("worker_energies", 33, 3),
                              ("worker_realisations", 32, 2), ("worker_repeats", 3, 1),
                              ("profile_samples", 5, 2)):
        if getattr(args, name) is None:
            setattr(args, name, small if smoke else full)
        if getattr(args, name) < 1:
            p.error(f"--{name.replace('_', '-')} must be at least 1, got {getattr(args, name)}")
    bad = [t for t in args.blr_tolerances if not 0 < t < 1]
    if bad:
        p.error(f"--blr-tolerances must lie in (0, 1), got {bad[0]!r}")
    first_strip = next((c for c in args.sizes if c.kind == "strip"), args.sizes[0])
    args.sweep_size = args.sweep_size or first_strip
    args.profile_size = args.profile_size or first_strip
    args.worker_size = args.worker_size or Case.parse("strip:16x8" if smoke else "strip:100x30")
    # toy strips have no open lead mode at -8 meV
    e_max = 1.0 if smoke else 8.0
    args.worker_energy = (f"{{ start = {-e_max!r}, stop = {e_max!r}, "
                          f"num = {args.worker_energies} }}")
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
        memory = factor = sweep = worker = prof = None
        if not args.no_memory:
            log("memory probes (one fresh subprocess per variant and size)")
            memory = measure_memory(cases, args.settings, args.memory_samples, workdir, log)
        if not args.no_factor:
            log("factorisation experiments (orderings, block low-rank)")
            factor = factorisation_experiments(cases, args.settings, args.factor_repeats,
                                               args.blr_tolerances, workdir, log)
        if not args.no_sweep:
            log(f"sweeps on {args.workers} worker(s)")
            sweep = measure_sweeps(args.sweep_size, args.settings, args.workers,
                                   args.sweep_realisations, args.sweep_repeats, workdir, log)
        if not args.no_worker:
            log("per-sample cost inside a Dask worker against in-process")
            worker = measure_worker_cost(args.worker_size, args.settings, args.worker_energy,
                                         args.worker_realisations, args.worker_repeats,
                                         workdir, log)
        if not args.no_profile:
            log("profile of solve_realisation")
            prof = profile_pipeline(args.profile_size, args.settings, args.profile_samples,
                                    workdir, log, args.profile_out)
    machine["load_end"] = os.getloadavg()
    report = render(args, cases, machine, timing, memory, factor, sweep, worker, prof)
    report += f"\nTotal benchmark time: {time.perf_counter() - t_start:.0f} s.\n"
    print(report)
    if args.write:
        Path(args.write).parent.mkdir(parents=True, exist_ok=True)
        Path(args.write).write_text(report)
        log(f"wrote {args.write}")
    if args.json:
        raw = {"machine": machine, "command": args.command,
               "times": {f"{k[0]}|{k[1]}": v for k, v in timing["times"].items()},
               "T": {f"{k[0]}|{k[1]}": [t.tolist() for t in v] for k, v in timing["T"].items()},
               "phases": timing["phases"],
               "setup": {f"{k[0]}|{k[1]}": v for k, v in timing["setup"].items()},
               "memory": {(k if isinstance(k, str) else f"{k[0]}|{k[1]}"): v
                          for k, v in (memory or {}).items()},
               "factor": factor, "sweep": sweep, "worker": worker, "profile": prof}
        Path(args.json).write_text(json.dumps(raw, indent=1, default=str))
    return 0


if __name__ == "__main__":
    sys.exit(main())
