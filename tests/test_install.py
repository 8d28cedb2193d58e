"""The set-up's install routes: detection, Kwant's build.conf, the advice, the plan mode.

``scripts/install_plan.py`` decides the route; these tests drive it with fake environments
(a fake conda prefix whose Python is this test's own, which has Kwant; fake MUMPS library
directories) and run ``scripts/setup.sh --plan``, which only detects and prints. The builds
themselves are checked in CI (.ci/run): the apt route on a bare machine, the site-MUMPS
route against Debian's MUMPS, and the plan as a throw-away non-root user. The conda route is
not tested end to end (no conda-forge here): its detection is, with a fake prefix.
"""

import configparser
import importlib.util
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SETUP = ROOT / "scripts" / "setup.sh"
CONSTRAINTS = ROOT / "requirements" / "constraints.txt"

_spec = importlib.util.spec_from_file_location("install_plan", ROOT / "scripts" / "install_plan.py")
plan_mod = importlib.util.module_from_spec(_spec)
sys.modules["install_plan"] = plan_mod
_spec.loader.exec_module(plan_mod)
PlanError = plan_mod.PlanError


def _fake_python(prefix: Path, target: str) -> Path:
    """``prefix/bin/python``: a wrapper that runs ``target`` (a symlink would make Python look
    for its installation next to the link)."""
    bindir = prefix / "bin"
    bindir.mkdir(parents=True, exist_ok=True)
    py = bindir / "python"
    py.write_text(f'#!/bin/sh\nexec {target} "$@"\n')
    py.chmod(0o755)
    return py


def _mumps_prefix(tmp_path: Path, libs: list[str], header: bool = True) -> Path:
    prefix = tmp_path / "mumps"
    (prefix / "lib").mkdir(parents=True)
    (prefix / "include").mkdir()
    for name in libs:
        (prefix / "lib" / f"lib{name}.so").write_bytes(b"")
    if header:
        (prefix / "include" / "zmumps_c.h").write_text("/* fake */\n")
    return prefix


def _detect(environ, *, root=False, apt=False, debs=(), probe=None, **kw):
    return plan_mod.detect(environ, is_root=root, has_apt=apt,
                           deb_installed=lambda p: p in debs,
                           probe=probe or (lambda py: None), base_python=sys.executable,
                           constraints=CONSTRAINTS, **kw)


# --------------------------------------------------------------------------- routes
def test_root_with_apt_keeps_the_debian_route():
    plan = _detect({}, root=True, apt=True)
    assert (plan.route, plan.can_apt, plan.expect_mumps, plan.advise) == ("apt", True, True, False)
    assert plan.apt_missing == list(plan_mod.APT_PACKAGES)


def test_non_root_with_debian_mumps_installed_uses_it_and_advises():
    plan = _detect({}, debs=("libmumps-scotch-dev",))
    assert (plan.route, plan.can_apt, plan.expect_mumps, plan.advise) == ("apt", False, True, True)
    assert "libopenblas0-pthread" in plan.apt_missing


def test_non_root_without_mumps_falls_back_to_scipy_and_advises():
    plan = _detect({})
    assert (plan.route, plan.expect_mumps, plan.advise) == ("scipy", False, True)


def test_an_active_conda_environment_with_kwant_is_used(tmp_path):
    # a fake conda prefix whose Python is this interpreter (Kwant importable): the real probe
    import kwant

    prefix = tmp_path / "conda-env"
    py = _fake_python(prefix, sys.executable)
    plan = plan_mod.detect({"CONDA_PREFIX": str(prefix), "PATH": os.environ["PATH"]},
                           is_root=True, has_apt=True, constraints=CONSTRAINTS)
    assert plan.route == "conda" and plan.base_python == str(py)
    assert plan.conda_kwant == kwant.__version__
    from pipeline.transport.environment import kwant_solver

    assert plan.conda_solver == kwant_solver()
    assert plan.expect_mumps == (kwant_solver() == "mumps")
    # what the environment has is left to it (no pip reinstall of its NumPy under its Kwant)
    assert {"kwant", "numpy", "scipy"} <= set(plan.conda_provides)
    assert not plan.conda_install


def test_a_conda_environment_without_kwant_is_not_used_unless_forced(tmp_path):
    prefix = tmp_path / "conda-env"
    _fake_python(prefix, sys.executable)
    no_kwant = {"python": [3, 11, 7], "kwant": None, "solver": None, "numpy": "2.4.6",
                "dists": ["numpy", "pip"]}
    env = {"CONDA_PREFIX": str(prefix), "PATH": str(tmp_path / "empty-bin")}
    assert _detect(env, root=True, apt=True, probe=lambda py: no_kwant).route == "apt"
    # forced, with no conda/mamba to install Kwant: refused with the command to run
    with pytest.raises(PlanError, match="conda install -c conda-forge kwant"):
        _detect(dict(env, HELISWEEP_ROUTE="conda"), probe=lambda py: no_kwant)
    # forced, with mamba on PATH: the plan installs Kwant from conda-forge into that prefix
    mamba = _fake_python(tmp_path / "tools", "true").rename(tmp_path / "tools" / "bin" / "mamba")
    env["PATH"] = str(mamba.parent)
    plan = _detect(dict(env, HELISWEEP_ROUTE="conda"), probe=lambda py: no_kwant)
    assert plan.conda_install == [str(mamba), "install", "-y", "-p", str(prefix), "-c",
                                  "conda-forge", "kwant"]


@pytest.mark.parametrize("info, message", [
    ({"python": [3, 9, 1], "kwant": "1.4.3", "solver": "mumps", "numpy": "1.26.4"}, "Python 3.9"),
    ({"python": [3, 11, 0], "kwant": "1.4.3", "solver": "mumps", "numpy": "1.26.4"}, "NumPy 1.26.4"),
], ids=["old-python", "old-numpy"])
def test_an_unusable_conda_environment_is_refused_with_the_fix(tmp_path, info, message):
    prefix = tmp_path / "conda-env"
    _fake_python(prefix, sys.executable)
    with pytest.raises(PlanError, match=message) as err:
        _detect({"CONDA_PREFIX": str(prefix)}, probe=lambda py: info)
    assert "conda install -c conda-forge" in str(err.value)


def test_forcing_conda_without_an_active_environment_is_refused():
    with pytest.raises(PlanError, match="CONDA_PREFIX is not set"):
        _detect({"HELISWEEP_ROUTE": "conda"})


def test_an_unknown_route_is_refused():
    with pytest.raises(PlanError, match=r"HELISWEEP_ROUTE='mumps' is not a route"):
        _detect({"HELISWEEP_ROUTE": "mumps"})


# --------------------------------------------------------------------------- site MUMPS
@pytest.mark.parametrize("libs, expected", [
    (["zmumps_seq", "mumps_common_seq", "dmumps_seq"], ["zmumps_seq", "mumps_common_seq"]),
    (["zmumps_scotch", "mumps_common_scotch", "pord", "mpiseq_scotch", "zmumps", "mumps_common"],
     ["zmumps_scotch", "mumps_common_scotch", "pord", "mpiseq_scotch"]),
    (["zmumps", "mumps_common", "pord", "mpiseq"], ["zmumps", "mumps_common", "pord", "mpiseq"]),
], ids=["conda-forge-names", "debian-names", "plain-sequential-build"])
def test_site_mumps_prefix_gives_a_build_conf_kwant_reads(tmp_path, libs, expected):
    prefix = _mumps_prefix(tmp_path, libs)
    plan = _detect({"HELISWEEP_MUMPS_DIR": str(prefix)})
    assert (plan.route, plan.expect_mumps) == ("site-mumps", True)
    assert plan.mumps_libraries == expected
    # read the way Kwant 1.5.0's setup.py reads it: configparser, [mumps] is an alias of
    # [kwant.linalg._mumps], values are whitespace-separated lists of Extension arguments
    conf = configparser.ConfigParser()
    conf.read_string(plan.build_conf())
    assert conf.sections() == ["mumps"]
    section = conf["mumps"]
    assert section["libraries"].split() == expected
    assert section["library_dirs"].split() == [str(prefix / "lib")]
    assert section["include_dirs"].split() == [str(prefix / "include")]
    assert section["runtime_library_dirs"].split() == [str(prefix / "lib")]


def test_site_mumps_library_names_can_be_given(tmp_path):
    prefix = _mumps_prefix(tmp_path, ["zmumps", "mumps_common"])  # an MPI build: not found alone
    with pytest.raises(PlanError, match="no sequential MUMPS"):
        _detect({"HELISWEEP_MUMPS_DIR": str(prefix)})
    plan = _detect({"HELISWEEP_MUMPS_DIR": str(prefix),
                    "HELISWEEP_MUMPS_LIBS": "zmumps mumps_common mpiseq metis"})
    assert plan.mumps_libraries == ["zmumps", "mumps_common", "mpiseq", "metis"]


def test_debian_mumps_through_build_conf_is_found():
    lib = Path(f"/usr/lib/{os.uname().machine}-linux-gnu")
    if not (lib / "libzmumps_scotch.so").exists() or not Path("/usr/include/zmumps_c.h").exists():
        pytest.skip("Debian's libmumps-scotch-dev is not installed")
    plan = _detect({"HELISWEEP_MUMPS_LIB_DIR": str(lib), "HELISWEEP_MUMPS_INCLUDE_DIR": "/usr/include"})
    assert plan.route == "site-mumps"
    assert plan.mumps_libraries[:2] == ["zmumps_scotch", "mumps_common_scotch"]


@pytest.mark.parametrize("env, message", [
    ({"HELISWEEP_MUMPS_DIR": "/no/such/mumps"}, "HELISWEEP_MUMPS_DIR='/no/such/mumps' is not a directory"),
    ({"HELISWEEP_MUMPS_LIB_DIR": "/tmp"}, "HELISWEEP_MUMPS_INCLUDE_DIR is not set"),
    ({"HELISWEEP_ROUTE": "site-mumps"}, "needs the MUMPS location"),
], ids=["missing-prefix", "half-given", "forced-without-location"])
def test_bad_mumps_locations_are_refused_with_the_fix(env, message):
    with pytest.raises(PlanError, match=message):
        _detect(env)


def test_a_mumps_include_directory_without_the_header_is_refused(tmp_path):
    prefix = _mumps_prefix(tmp_path, ["zmumps_seq", "mumps_common_seq"], header=False)
    with pytest.raises(PlanError, match="no zmumps_c.h"):
        _detect({"HELISWEEP_MUMPS_DIR": str(prefix)})


# --------------------------------------------------------------------------- output
@pytest.mark.parametrize("route", plan_mod.ROUTES)
def test_the_advice_gives_the_commands_of_the_other_routes(route):
    text = "\n".join(plan_mod.advice(route, "1.5.0"))
    conda = "conda create -n helisweep -c conda-forge python=3.11 kwant=1.5.0"
    site = "HELISWEEP_MUMPS_DIR=/path/to/mumps make setup"
    assert (conda in text) == (route != "conda")
    assert (site in text) == (route != "site-mumps")
    assert ("apt-get install libmumps-scotch-dev" in text) == (route != "apt")


def test_the_plan_survives_the_shell(tmp_path):
    plan = plan_mod.Plan("site-mumps", "it's \"quoted\" $(not run) `nor this`", True,
                         "/x y/python", mumps_libraries=["zmumps_seq", "mumps_common_seq"])
    out = subprocess.run(["bash", "-c", 'eval "$(cat)"; printf "%s|%s|%s" "$ROUTE" "$ROUTE_REASON" "$MUMPS_LIBS"'],
                         input=plan_mod.shell_assignments(plan), capture_output=True, text=True,
                         check=True).stdout
    assert out == "site-mumps|it's \"quoted\" $(not run) `nor this`|zmumps_seq mumps_common_seq"


# --------------------------------------------------------------------------- setup.sh --plan
def _setup(*args, **env):
    keep = {k: v for k, v in os.environ.items()
            if not k.startswith(("HELISWEEP_", "CONDA_", "MAMBA_"))}
    return subprocess.run(["bash", str(SETUP), *args], capture_output=True, text=True,
                          timeout=300, env={**keep, "PYTHON": sys.executable, **env})


def test_setup_plan_with_a_site_mumps_prints_the_build_conf(tmp_path):
    prefix = _mumps_prefix(tmp_path, ["zmumps_seq", "mumps_common_seq"])
    res = _setup("--plan", HELISWEEP_MUMPS_DIR=str(prefix), VENV=str(tmp_path / "venv"))
    assert res.returncode == 0, res.stderr
    assert "[setup] install route: site-mumps" in res.stdout
    assert f"library_dirs = {prefix / 'lib'}" in res.stdout
    assert not (tmp_path / "venv").exists()  # the plan changes nothing


def test_setup_plan_with_a_conda_environment_reports_its_solver(tmp_path):
    prefix = tmp_path / "conda-env"
    _fake_python(prefix, sys.executable)
    res = _setup("--plan", CONDA_PREFIX=str(prefix), VENV=str(tmp_path / "venv"))
    assert res.returncode == 0, res.stderr
    from pipeline.transport.environment import kwant_solver

    assert f"[setup] install route: conda (active conda environment {prefix} has Kwant" in res.stdout
    assert f"(solver {kwant_solver()})" in res.stdout


@pytest.mark.parametrize("args, env, message", [
    (["--plan"], {"HELISWEEP_MUMPS_DIR": "/no/such/mumps"}, "HELISWEEP_MUMPS_DIR='/no/such/mumps'"),
    (["--plan"], {"HELISWEEP_ROUTE": "spack"}, "HELISWEEP_ROUTE='spack' is not a route"),
    (["--fast"], {}, "unknown option '--fast'"),
    (["--plan"], {"PYTHON": "/no/such/python3"}, "no Python interpreter '/no/such/python3'"),
], ids=["bad-mumps-dir", "bad-route", "bad-option", "no-python"])
def test_setup_refuses_bad_input_before_doing_anything(tmp_path, args, env, message):
    res = _setup(*args, VENV=str(tmp_path / "venv"), **env)
    assert res.returncode == 2
    assert "[setup] ERROR: " in res.stderr and message in res.stderr, res.stderr
    assert not (tmp_path / "venv").exists()
