"""The benchmark script runs end to end at toy sizes and prints its tables.

No timing is asserted here: performance numbers live in the benchmark's recorded output
(docs/benchmarks.md), never in a test.
"""

import os
import subprocess
import sys
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parent.parent / "benchmarks" / "bench_pipeline.py"

COLUMNS = "| variant | size | median s/sample | ratio to naive | ratio to floor | peak RSS MB |"


@pytest.mark.slow
@pytest.mark.timeout(600)
def test_smoke_run_prints_the_tables_and_writes_the_report(tmp_path):
    out_md = tmp_path / "bench.md"
    out_json = tmp_path / "bench.json"
    env = dict(os.environ, OPENBLAS_NUM_THREADS="1", OMP_NUM_THREADS="1")
    proc = subprocess.run(
        [sys.executable, str(SCRIPT), "--smoke", "--sizes", "strip:12x6", "hbar:8x6x4x8",
         "--write", str(out_md), "--json", str(out_json)],
        capture_output=True, text=True, env=env, cwd=tmp_path, timeout=600,
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = proc.stdout
    assert COLUMNS in text
    # one row per variant and size
    for variant in ("naive loop", "bare solver floor, 4-band", "bare solver floor, spin block",
                    "pipeline solve_realisation"):
        for size in ("strip 12×6", "hbar 8×6×4×8"):
            assert any(line.startswith(f"| {variant}") and size in line
                       for line in text.splitlines()), (variant, size)
    # the machine, the command, the smoke label and the other sections are there
    for needle in ("| nproc |", "| CPU |", "| RAM |", "| Kwant |", "| BLAS under MUMPS |",
                   "Command: `", "SMOKE TEST", "## Targets", "## Whole sweeps",
                   "| workers | median wall s |", "| samples/s | ratio to 1 worker |",
                   "## Profile of the pipeline path", "| solver setting |"):
        assert needle in text, needle
    # every variant solved the same problem
    assert "agree with the four-band floor" in text
    # --write wrote the same report, --json the raw numbers
    assert out_md.read_text().strip() == text.strip()
    assert out_json.stat().st_size > 0


def test_bad_size_is_refused_with_the_accepted_forms():
    proc = subprocess.run([sys.executable, str(SCRIPT), "--sizes", "strip:200"],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode != 0
    assert "strip:LxW" in proc.stderr and "hbar:LxWxALxAW" in proc.stderr
