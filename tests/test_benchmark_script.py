"""The benchmark scripts run end to end at toy sizes and print their tables.

No timing is asserted here: performance numbers live in the benchmarks' recorded output
(docs/benchmarks*.md), never in a test.
"""

import importlib.util
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parent.parent / "benchmarks"
SCRIPT = BENCH / "bench_pipeline.py"
SCALING = BENCH / "bench_scaling.py"
CONCAT = BENCH / "bench_concat.py"

COLUMNS = ("| variant | size | median s/sample | ratio to naive | ratio to kwant-best | "
           "ratio to factorisation | peak RSS MB |")
ENV = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")


def _run(args, tmp_path, timeout=900):
    proc = subprocess.run([sys.executable, *map(str, args)], capture_output=True, text=True,
                          env=ENV, cwd=tmp_path, timeout=timeout)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc.stdout


@pytest.mark.slow
@pytest.mark.timeout(900)
def test_smoke_run_prints_the_tables_and_writes_the_report(tmp_path):
    out_md = tmp_path / "bench.md"
    out_json = tmp_path / "bench.json"
    text = _run([SCRIPT, "--smoke", "--sizes", "strip:12x6", "hbar:8x6x4x8",
                 "--write", out_md, "--json", out_json], tmp_path)
    assert COLUMNS in text
    # one row per variant and size
    for variant in ("naive loop", "best hand-written Kwant loop", "bare solve",
                    "pipeline solve_realisation", "&nbsp;&nbsp;numerical factorisation alone"):
        for size in ("strip 12×6", "hbar 8×6×4×8"):
            assert any(line.startswith(f"| {variant}") and size in line
                       for line in text.splitlines()), (variant, size)
    # the machine, the command, the smoke label and the other sections are there
    for needle in ("| nproc |", "| CPU |", "| RAM |", "| Kwant |", "| BLAS under MUMPS |",
                   "| load average (1, 5, 15 min) at start / end |", "Command: `", "; git ",
                   "SMOKE TEST", "## Targets (issue 15)", "## What could cut the numerical "
                   "factorisation", "| BLR tolerance |", "| ordering (used) |",
                   "## Whole sweeps", "| workers | median wall s |",
                   "## Per-sample cost inside a Dask worker", "MALLOC_TRIM_THRESHOLD_=65536",
                   "## Profile of the pipeline path"):
        assert needle in text, needle
    # every target of the issue has a row with a verdict
    for target in ("≤ 0.74× the best hand-written Kwant loop", "stretch goal: ≤ 0.62×",
                   "≥ 12× below the naive loop", "ratio to the numerical factorisation alone",
                   "sweep throughput on 2 workers ≥ 1.9×", "peak memory per worker ≤ 1.2×",
                   "inside a Dask worker within 5 %", "scaling curve", "segment pools"):
        assert any(line.startswith("| ") and target in line for line in text.splitlines()), \
            target
    # every variant solved the same problem (whole transmission matrices)
    assert "agree with the naive four-band Kwant solve" in text
    # the Dask worker runs without Dask's malloc setting, the trim subprocess with it
    raw = json.loads(out_json.read_text())
    seen = raw["worker"]["malloc_trim_threshold"]
    assert seen["Dask worker"] is None and seen["subprocess"] is None
    assert seen["subprocess-trim"] == "65536"
    # --write wrote the same report
    assert out_md.read_text().strip() == text.strip()


def _load_script(path: Path, monkeypatch):
    """A benchmark script as a module (loaded from its file: the scripts are no package);
    the thread variables it sets on import are restored after the test."""
    for var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        monkeypatch.setenv(var, os.environ.get(var, "1"))
    spec = importlib.util.spec_from_file_location(path.stem, path)
    module = importlib.util.module_from_spec(spec)
    monkeypatch.setitem(sys.modules, path.stem, module)  # dataclasses look their module up
    spec.loader.exec_module(module)
    return module


def test_completed_transmissions_match_a_full_solve(monkeypatch):
    """The sum rules the kwant-best loop uses give Kwant's own whole matrix."""
    import kwant
    import numpy as np

    complete_transmissions = _load_script(SCRIPT, monkeypatch).complete_transmissions

    # Source: Kwant 1.5.0 kwant.smatrix (reference library): a 4-lead cross of a
    # one-orbital square lattice with on-site disorder
    lat = kwant.lattice.square(norbs=1)
    syst = kwant.Builder()
    rng = np.random.default_rng(3)
    for i in range(8):
        for j in range(8):
            syst[lat(i, j)] = 4 + rng.uniform(-1, 1)
    syst[lat.neighbors()] = -1
    for d in ((1, 0), (-1, 0), (0, 1), (0, -1)):
        lead = kwant.Builder(kwant.TranslationalSymmetry(d))
        cells = [lat(0, j) for j in range(2, 6)] if d[1] == 0 else [lat(j, 0) for j in range(2, 6)]
        lead[cells] = 4
        lead[lat.neighbors()] = -1
        syst.attach_lead(lead)
    fsyst = syst.finalized()
    energy = 1.3
    full = kwant.smatrix(fsyst, energy)
    T = np.array([[full.transmission(i, j) for j in range(4)] for i in range(4)])
    nprop = np.array([full.num_propagating(i) for i in range(4)])
    for skip_in, skip_out in ((3, 0), (1, 2), (2, 2)):
        ins = [j for j in range(4) if j != skip_in]
        outs = [i for i in range(4) if i != skip_out]
        part = kwant.smatrix(fsyst, energy, in_leads=ins, out_leads=outs)
        sub = np.array([[part.transmission(i, j) for j in ins] for i in outs])
        np.testing.assert_allclose(complete_transmissions(sub, outs, ins, nprop), T,
                                   atol=1e-12)


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_scaling_smoke_run_fits_and_checks_the_estimate(tmp_path):
    out_json = tmp_path / "scaling.json"
    text = _run([SCALING, "--smoke", "--write", tmp_path / "scaling.md", "--json", out_json],
                tmp_path)
    for needle in ("SMOKE TEST", "Command: `", "; git ", "Load average",
                   "## strip, spin block", "## H-bar, spin block", "## strip, four-band",
                   "| size | sites | unknowns |", "preflight estimate MiB",
                   "Log-log least squares", "extrapolated from the memory fit",
                   "## Preflight memory estimate"):
        assert needle in text, needle
    raw = json.loads(out_json.read_text())
    rows = [r for rs in raw["series"].values() for r in rs]
    assert rows and all(r["peak_rss_mb"] >= r["build_peak_mb"] > 0 for r in rows)
    # the four-band series solves with 4 orbitals per site, the others with 2
    assert {r["norbs"] for r in raw["series"]["strip4"]} == {4}
    assert {r["norbs"] for r in raw["series"]["strip"]} == {2}
    # a recorded run renders again (estimate recomputed) without running anything
    again = _run([SCALING, "--render-from", out_json], tmp_path, timeout=120)
    assert "rendered again from its raw numbers" in again and "SMOKE TEST" in again
    assert again.split("Machine:")[1].split("## Preflight")[0].count("| strip ") == \
        text.split("Machine:")[1].split("## Preflight")[0].count("| strip ")


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_concat_smoke_run_prints_its_tables(tmp_path):
    out_md = tmp_path / "concat.md"
    text = _run([CONCAT, "--smoke", "--write", out_md], tmp_path)
    for needle in ("SMOKE TEST", "Command: `", "; git ", "Load average",
                   "| segment pool, 1 um segments | 4 |", "| direct solves at 2 um | 4 |",
                   "CPU(<G> at 20 um by concatenation) / CPU(<G> at 2 um direct)",
                   "`ScatteringProblem.smatrix`", "Kwant's own `smatrix`"):
        assert needle in text, needle
    assert out_md.read_text().strip() == text.strip()


def test_bad_size_is_refused_with_the_accepted_forms():
    proc = subprocess.run([sys.executable, str(SCRIPT), "--sizes", "strip:200"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode != 0
    assert "strip:LxW" in proc.stderr and "hbar:LxWxALxAW" in proc.stderr


def test_scaling_refuses_a_size_limit_below_every_size():
    proc = subprocess.run([sys.executable, str(SCALING), "--max-sites", "10"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode != 0
    assert "--max-sites" in proc.stderr and "below every size" in proc.stderr
