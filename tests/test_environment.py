"""The environment report: the BLAS named is one threadpoolctl finds loaded, thread limits take
effect, and no machine path reaches the methods text.

Each report runs in a fresh interpreter, so what is loaded (Kwant's MUMPS, its BLAS) and the
thread settings are those of a process that starts the way the command line does.
"""

import json
import os
import subprocess
import sys

import pytest
from conftest import tiny_config  # noqa: E402  (tests/ is on sys.path)

from pipeline.output.figures import load_run
from pipeline.output.methods import methods_text, store_facts
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep

#: compares describe() with threadpoolctl's own view, in the same fresh process
_COMPARE = r"""
import json, os
from pipeline.transport.environment import describe
facts = describe()
from threadpoolctl import threadpool_info  # after describe(): the solver's BLAS is loaded
found = [dict(i, library=os.path.basename(i["filepath"])) for i in threadpool_info()
         if i["user_api"] == "blas"]
print(json.dumps({"facts": facts, "found": found}))
"""


def _python(code: str, **env) -> str:
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         timeout=300, env={**os.environ, **env})
    assert res.returncode == 0, res.stderr
    return res.stdout


@pytest.fixture(scope="module")
def report():
    return json.loads(_python(_COMPARE).strip().splitlines()[-1])


def test_the_report_names_a_blas_threadpoolctl_finds(report):
    facts, found = report["facts"], report["found"]
    assert found, "threadpoolctl finds no BLAS at all"
    libs = facts["blas_libraries"]
    # every library reported is one threadpoolctl found, with its version and threading layer
    # (an "unknown" entry would be a BLAS threadpoolctl cannot see: not the case here)
    for lib in libs:
        match = [f for f in found if f["library"] == lib["library"]]
        assert match, (lib, found)
        assert (lib["internal_api"], lib["version"], lib["threading_layer"]) == (
            match[0]["internal_api"], match[0]["version"], match[0]["threading_layer"])
    assert len(libs) == len(found)
    solver_lib = libs[0]
    if facts["kwant_solver"] == "mumps":
        # MUMPS cannot link the wheels' private copies (renamed symbols): its BLAS is another
        assert not solver_lib["private"] and solver_lib["used_by"].startswith("MUMPS"), libs
    assert solver_lib["version"] in facts["blas"]
    assert facts["system_blas"] == facts["blas"]


def test_no_machine_path_in_the_report(report):
    facts = report["facts"]
    text = json.dumps(facts)
    for found in report["found"]:
        assert os.path.dirname(found["filepath"]) not in text
    assert "/" not in text, text


def test_the_command_prints_the_solver_and_its_blas(report):
    out = _python("from pipeline.transport.environment import _main; _main()")
    facts = report["facts"]
    under = "MUMPS" if facts["kwant_solver"] == "mumps" else "SciPy's solver"
    assert f"solver: {facts['kwant_solver']}" in out
    assert f"BLAS under {under}: {facts['blas']}" in out


def test_thread_limits_apply_after_numpy_is_loaded():
    # NumPy loaded first with two BLAS threads requested: the environment variable has acted,
    # and only threadpoolctl can lower the count now
    code = r"""
import json, numpy
from pipeline.transport.environment import blas_libraries, limit_blas_threads
before = [l["num_threads"] for l in blas_libraries()]
after = [l["num_threads"] for l in limit_blas_threads(1)]
print(json.dumps([before, after]))
"""
    before, after = json.loads(_python(code, OPENBLAS_NUM_THREADS="2", OMP_NUM_THREADS="2"))
    assert after and all(n == 1 for n in after), after
    if (os.cpu_count() or 1) >= 2:
        assert max(before) == 2, before  # the limit changed something


@pytest.mark.parametrize("bad", [0, -1, 1.5, True, "1"])
def test_a_bad_thread_limit_is_refused(bad):
    from pipeline.transport.environment import limit_blas_threads

    with pytest.raises(ValueError, match="positive integer"):
        limit_blas_threads(bad)


def test_methods_text_has_no_machine_path(tmp_path, dask_clients):
    text = tiny_config(tmp_path / "run", 1, **{"energy = [-3.0, 1.0, 5.0]": "energy = [1.0]"})
    cfg = parse_config(text)
    store = run_sweep(cfg, client=dask_clients[1], store_path=tmp_path / "run" / "samples.zarr",
                      progress=False)
    run = load_run(store.path)
    facts = store_facts(store.path)
    session = facts["attrs"]["sessions"][-1]
    methods = methods_text(run, facts)
    assert f"BLAS: {session['blas']})" in methods
    # a store written before this report recorded the library's path after its name
    old = dict(facts, attrs=dict(facts["attrs"], sessions=[
        {k: v for k, v in session.items() if k not in ("blas", "blas_libraries")}
        | {"system_blas": "OpenBLAS (/usr/lib/x86_64-linux-gnu/openblas-pthread/libblas.so.3)"}]))
    old_methods = methods_text(run, old)
    assert "BLAS: OpenBLAS)" in old_methods
    for t in (methods, old_methods):
        assert "/usr/" not in t and str(tmp_path) not in t


def test_a_worker_process_limits_its_blas_to_one_thread_at_its_first_system(tmp_path, monkeypatch):
    # threadpoolctl raises the pools to 2 threads; the first system a process builds for a
    # sweep brings them back to 1, whatever the environment variables said at start-up
    from collections import OrderedDict

    from conftest import tiny_config
    from threadpoolctl import threadpool_info, threadpool_limits

    from pipeline.sweep import tasks
    from pipeline.sweep.config import parse_config

    pytest.importorskip("kwant.linalg.mumps")  # loads the BLAS under MUMPS, as a solve does
    monkeypatch.setattr(tasks, "_SYSTEM_CACHE", OrderedDict())
    threadpool_limits(limits=2)
    assert any(p["num_threads"] == 2 for p in threadpool_info())
    tasks.system_for(parse_config(tiny_config(tmp_path / "run", 1)), 0, reduced=True)
    assert all(p["num_threads"] == 1 for p in threadpool_info())
