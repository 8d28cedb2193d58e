#!/usr/bin/env python3
"""Decide how ``scripts/setup.sh`` gets Kwant on this machine, and write Kwant's build.conf.

Install routes, the first that applies (``HELISWEEP_ROUTE=apt|conda|site-mumps`` forces one):

``conda``
    An active conda/mamba environment (``CONDA_PREFIX``) whose Python imports Kwant, e.g.
    conda-forge's build, which brings MUMPS. That Kwant is used; nothing is compiled. With
    ``HELISWEEP_ROUTE=conda`` and no Kwant there yet, the set-up installs it from conda-forge.
``site-mumps``
    ``HELISWEEP_MUMPS_DIR`` (a prefix holding ``lib/`` and ``include/``), or
    ``HELISWEEP_MUMPS_LIB_DIR`` and ``HELISWEEP_MUMPS_INCLUDE_DIR``, name a MUMPS the site
    installed (e.g. by ``module load mumps``). Kwant is built from source with a
    ``build.conf`` whose ``[mumps]`` section names its libraries, library and include
    directories (Kwant's build configuration file). ``HELISWEEP_MUMPS_LIBS`` overrides the
    library names found in the library directory.
``apt``
    Root with ``apt-get`` (the Debian packages are installed), or Debian's MUMPS package
    already installed: Kwant's build finds Debian's MUMPS by itself.
``scipy``
    None of these: Kwant is built without MUMPS and uses SciPy's sparse solver (several
    times slower per sample).

Commands (standard library only; any Python 3.8 or newer runs this file)::

    install_plan.py plan [--python PY]   shell assignments for setup.sh to eval
    install_plan.py advice ROUTE         the commands of the routes other than ROUTE
    install_plan.py build-conf OUT       write build.conf for the site-mumps route

Errors (a directory that does not exist, no MUMPS library in it, a conda Python too old...)
are printed as ``[setup] ERROR: ...`` with the value and the fix, exit status 2.
"""

from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Mapping, Optional

ROUTES = ("conda", "site-mumps", "apt", "scipy")

#: routes HELISWEEP_ROUTE may force (the SciPy fallback is what is left, never a choice)
FORCEABLE = ("conda", "site-mumps", "apt")

#: Debian packages of the apt route: MUMPS for Kwant, OpenBLAS for MUMPS, pkg-config
APT_PACKAGES = ("libmumps-scotch-dev", "libopenblas0-pthread", "pkg-config")

#: the package without which the apt route has no MUMPS
APT_MUMPS = "libmumps-scotch-dev"

#: oldest Python the package supports (pyproject.toml, requires-python)
MIN_PYTHON = (3, 11)

#: oldest NumPy the package supports (pyproject.toml)
MIN_NUMPY = (2, 0)

#: sequential MUMPS builds, by library-name suffix: conda-forge's ``_seq``, Debian's
#: ``_scotch``, then a plain build (which needs its ``mpiseq`` stub library to be sequential)
_MUMPS_SUFFIXES = ("_seq", "_scotch", "")

_PROBE = r"""
import json, sys
out = {"python": list(sys.version_info[:3]), "kwant": None, "solver": None, "numpy": None,
       "dists": []}
try:
    import importlib.metadata as md
    out["dists"] = sorted({(d.metadata["Name"] or "").lower() for d in md.distributions()})
except Exception:
    pass
try:
    import numpy
    out["numpy"] = numpy.__version__
    import kwant, kwant.solvers.default as d
    out["kwant"] = kwant.__version__
    out["solver"] = "mumps" if type(d.smatrix.__self__).__module__.endswith("mumps") else "scipy"
except Exception as exc:
    out["error"] = f"{type(exc).__name__}: {exc}"
print(json.dumps(out))
"""


class PlanError(Exception):
    """The environment asks for a route that cannot work (the message names the fix)."""


@dataclass
class Plan:
    """What the set-up will do: the route, why, and what each step needs."""

    #: one of :data:`ROUTES`
    route: str
    #: one line saying why this route was chosen
    reason: str
    #: whether the built (or conda) Kwant must end up with the MUMPS solver
    expect_mumps: bool
    #: the Python that creates the virtual environment
    base_python: str
    #: Debian packages of the apt route that are not installed
    apt_missing: list = field(default_factory=list)
    #: apt route: whether the set-up can install them (root with apt-get)
    can_apt: bool = False
    #: conda route: the environment's prefix, its Kwant version and solver
    conda_prefix: str = ""
    conda_kwant: str = ""
    conda_solver: str = ""
    #: conda route: constraint names the conda environment provides (not reinstalled by pip)
    conda_provides: list = field(default_factory=list)
    #: conda route: command that installs Kwant into the environment (empty: it has Kwant)
    conda_install: list = field(default_factory=list)
    #: site-mumps route: build.conf contents
    mumps_lib_dir: str = ""
    mumps_include_dir: str = ""
    mumps_libraries: list = field(default_factory=list)
    #: True when not root: the set-up ends with the commands of the other routes
    advise: bool = False

    def build_conf(self) -> str:
        """Kwant's build.conf for the site-mumps route ('' for the others)."""
        if self.route != "site-mumps":
            return ""
        return build_conf_text(self.mumps_lib_dir, self.mumps_include_dir, self.mumps_libraries)


# --------------------------------------------------------------------------- site MUMPS
def _has_lib(lib_dir: Path, name: str) -> bool:
    return any(lib_dir.glob(f"lib{name}.so*")) or (lib_dir / f"lib{name}.a").exists() \
        or any(lib_dir.glob(f"lib{name}.dylib"))


def find_mumps_libraries(lib_dir: str | os.PathLike) -> list[str]:
    """Library names (``-l`` without ``lib``) of a sequential complex MUMPS in ``lib_dir``.

    Looks for ``zmumps`` with the suffixes ``_seq`` (conda-forge), ``_scotch`` (Debian) and
    none (a plain build), in that order, and adds ``mumps_common``, ``pord`` and ``mpiseq``
    with the same suffix (or without one) where they exist; a plain build must have
    ``mpiseq`` (otherwise it is MUMPS for MPI, which Kwant cannot use).

    Raises
    ------
    PlanError
        If no such set is in ``lib_dir``.
    """
    d = Path(lib_dir)
    for sfx in _MUMPS_SUFFIXES:
        if not _has_lib(d, f"zmumps{sfx}"):
            continue
        libs = [f"zmumps{sfx}"]
        for part in ("mumps_common", "pord", "mpiseq"):
            for name in (f"{part}{sfx}", part):
                if _has_lib(d, name):
                    libs.append(name)
                    break
        if sfx == "" and "mpiseq" not in libs:
            continue  # the MPI build: Kwant needs the sequential one
        if not any(x.startswith("mumps_common") for x in libs):
            continue
        return libs
    raise PlanError(
        f"no sequential MUMPS in {str(d)!r}: looked for libzmumps_seq, libzmumps_scotch, or "
        f"libzmumps with libmpiseq, each with libmumps_common. Point HELISWEEP_MUMPS_LIB_DIR "
        f"at the directory holding libzmumps*, or name the libraries yourself, e.g. "
        f"HELISWEEP_MUMPS_LIBS='zmumps mumps_common pord mpiseq'"
    )


def site_mumps_dirs(environ: Mapping[str, str]) -> Optional[tuple[str, str]]:
    """(library dir, include dir) named by the environment, or None if none is named.

    ``HELISWEEP_MUMPS_LIB_DIR``/``HELISWEEP_MUMPS_INCLUDE_DIR`` win over the prefix
    ``HELISWEEP_MUMPS_DIR`` (whose ``lib``, ``lib64`` and ``include`` are used).
    """
    prefix = environ.get("HELISWEEP_MUMPS_DIR", "").strip()
    lib = environ.get("HELISWEEP_MUMPS_LIB_DIR", "").strip()
    inc = environ.get("HELISWEEP_MUMPS_INCLUDE_DIR", "").strip()
    if not (prefix or lib or inc):
        return None
    if prefix:
        p = Path(prefix)
        if not p.is_dir():
            raise PlanError(f"HELISWEEP_MUMPS_DIR={prefix!r} is not a directory; give the MUMPS "
                            f"installation prefix (the directory holding lib/ and include/)")
        if not lib:
            cands = [p / "lib", p / "lib64"]
            found = [c for c in cands if c.is_dir() and any(c.glob("libzmumps*"))]
            lib = str(found[0]) if found else str(cands[0])
        if not inc:
            inc = str(p / "include")
    if not lib or not inc:
        which = "HELISWEEP_MUMPS_INCLUDE_DIR" if lib else "HELISWEEP_MUMPS_LIB_DIR"
        raise PlanError(f"{which} is not set; set both HELISWEEP_MUMPS_LIB_DIR and "
                        f"HELISWEEP_MUMPS_INCLUDE_DIR, or HELISWEEP_MUMPS_DIR (a prefix)")
    for name, d in (("library", lib), ("include", inc)):
        if not Path(d).is_dir():
            raise PlanError(f"the MUMPS {name} directory {d!r} does not exist; check "
                            f"HELISWEEP_MUMPS_DIR / HELISWEEP_MUMPS_{'LIB' if name == 'library' else 'INCLUDE'}_DIR")
    if not (Path(inc) / "zmumps_c.h").exists() and not (Path(inc) / "MUMPS" / "zmumps_c.h").exists():
        raise PlanError(f"no zmumps_c.h in the MUMPS include directory {inc!r} (nor in its "
                        f"MUMPS/); set HELISWEEP_MUMPS_INCLUDE_DIR to the directory holding it")
    if (Path(inc) / "MUMPS" / "zmumps_c.h").exists() and not (Path(inc) / "zmumps_c.h").exists():
        inc = str(Path(inc) / "MUMPS")
    return lib, inc


def build_conf_text(lib_dir: str, include_dir: str, libraries: list[str]) -> str:
    """Kwant's build.conf: a ``[mumps]`` section naming the site's MUMPS.

    The keys are ``setuptools.Extension`` arguments (Kwant's setup.py reads them with
    configparser; values are whitespace-separated lists): ``libraries``, ``library_dirs``,
    ``include_dirs`` and ``runtime_library_dirs`` (an rpath, so the built module finds MUMPS
    without ``LD_LIBRARY_PATH``).
    """
    for d in (lib_dir, include_dir):
        if re.search(r"\s", d):
            raise PlanError(f"the directory {d!r} contains whitespace, which Kwant's "
                            f"build.conf cannot express (its values are space-separated); "
                            f"use a path (or symlink) without spaces")
    return (
        "# Kwant build configuration written by scripts/setup.sh (site-mumps route)\n"
        "[mumps]\n"
        f"libraries = {' '.join(libraries)}\n"
        f"library_dirs = {lib_dir}\n"
        f"include_dirs = {include_dir}\n"
        f"runtime_library_dirs = {lib_dir}\n"
    )


# --------------------------------------------------------------------------- conda
def probe_python(python: str) -> Optional[dict]:
    """Python version, NumPy, Kwant version and solver, and distributions of ``python``.

    Returns None if it does not run.
    """
    try:
        res = subprocess.run([python, "-c", _PROBE], capture_output=True, text=True,
                             timeout=300, env={**os.environ, "OPENBLAS_NUM_THREADS": "1"})
    except (OSError, subprocess.TimeoutExpired):
        return None
    if res.returncode != 0:
        return None
    try:
        return json.loads(res.stdout.strip().splitlines()[-1])
    except (ValueError, IndexError):
        return None


def _conda_tool(environ: Mapping[str, str]) -> Optional[str]:
    for var, name in (("MAMBA_EXE", "mamba"), ("CONDA_EXE", "conda")):
        if environ.get(var) and Path(environ[var]).exists():
            return environ[var]
        found = shutil.which(name, path=environ.get("PATH"))
        if found:
            return found
    return None


def _version_tuple(text: str) -> tuple:
    return tuple(int(x) for x in re.findall(r"\d+", text or "0")[:2])


def _normalise(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower()


def constraint_names(constraints: str | os.PathLike) -> list[str]:
    """Distribution names pinned in a constraints file (normalised)."""
    out = []
    for line in Path(constraints).read_text().splitlines():
        line = line.split("#", 1)[0].strip()
        if "==" in line:
            out.append(_normalise(line.split("==", 1)[0]))
    return out


# --------------------------------------------------------------------------- the plan
def _deb_installed(pkg: str) -> bool:
    try:
        res = subprocess.run(["dpkg-query", "-W", "-f=${Status}", pkg], capture_output=True,
                             text=True, timeout=60)
    except (OSError, subprocess.TimeoutExpired):
        return False
    return res.returncode == 0 and "install ok installed" in res.stdout


def detect(
    environ: Mapping[str, str],
    *,
    is_root: bool,
    has_apt: bool,
    deb_installed: Callable[[str], bool] = _deb_installed,
    probe: Callable[[str], Optional[dict]] = probe_python,
    base_python: str = "python3",
    constraints: str | os.PathLike | None = None,
) -> Plan:
    """Choose the install route for this environment (see the module docstring).

    Parameters
    ----------
    environ : mapping
        The environment (``CONDA_PREFIX``, ``HELISWEEP_ROUTE``, ``HELISWEEP_MUMPS_*``).
    is_root, has_apt : bool
        Whether the set-up runs as root and ``apt-get`` exists.
    deb_installed : callable
        ``deb_installed(package) -> bool`` (dpkg-query by default).
    probe : callable
        ``probe(python) -> dict | None`` (:func:`probe_python` by default).
    base_python : str
        The Python that would create the virtual environment outside the conda route.
    constraints : path, optional
        The constraints file (names the conda environment provides are listed in the plan).

    Raises
    ------
    PlanError
        If the environment forces or configures a route that cannot work here.
    """
    forced = environ.get("HELISWEEP_ROUTE", "").strip()
    if forced and forced not in FORCEABLE:
        raise PlanError(f"HELISWEEP_ROUTE={forced!r} is not a route; use one of "
                        f"{', '.join(FORCEABLE)}, or leave it unset to detect one")
    advise = not is_root
    missing = [p for p in APT_PACKAGES if not deb_installed(p)]
    can_apt = is_root and has_apt

    # conda: an active environment whose Python imports Kwant (or forced)
    prefix = environ.get("CONDA_PREFIX", "").strip()
    conda_py = str(Path(prefix) / "bin" / "python") if prefix else ""
    info = probe(conda_py) if prefix and Path(conda_py).exists() else None
    if forced == "conda" or (not forced and info and info.get("kwant")):
        return _conda_plan(environ, prefix, conda_py, info, forced == "conda", advise,
                           constraints)

    # site MUMPS through build.conf
    dirs = site_mumps_dirs(environ)
    if forced == "site-mumps" or (not forced and dirs):
        if not dirs:
            raise PlanError("HELISWEEP_ROUTE=site-mumps needs the MUMPS location: set "
                            "HELISWEEP_MUMPS_DIR=/prefix (with lib/ and include/), or "
                            "HELISWEEP_MUMPS_LIB_DIR and HELISWEEP_MUMPS_INCLUDE_DIR")
        lib, inc = dirs
        names = environ.get("HELISWEEP_MUMPS_LIBS", "").split() or find_mumps_libraries(lib)
        _check_python(base_python)
        return Plan("site-mumps", f"MUMPS named by the environment: libraries {' '.join(names)} "
                    f"in {lib}, headers in {inc}", True, base_python, missing, False,
                    mumps_lib_dir=lib, mumps_include_dir=inc, mumps_libraries=names,
                    advise=advise)

    # Debian packages
    has_mumps = APT_MUMPS not in missing
    if forced == "apt" or (not forced and (can_apt or has_mumps)):
        if not (can_apt or has_mumps):
            raise PlanError(f"HELISWEEP_ROUTE=apt needs root with apt-get to install "
                            f"{', '.join(missing)}, or those packages installed; run the set-up "
                            f"as root, or choose another route (see the README, Set-up)")
        _check_python(base_python)
        why = ("root with apt-get: Debian's MUMPS and OpenBLAS packages" if can_apt else
               f"Debian's MUMPS ({APT_MUMPS}) is installed")
        return Plan("apt", why, True, base_python, missing, can_apt, advise=advise)

    _check_python(base_python)
    why = (f"not root or no apt-get, no {APT_MUMPS}, no active conda environment with Kwant, "
           f"no HELISWEEP_MUMPS_DIR: Kwant without MUMPS (SciPy's sparse solver)")
    return Plan("scipy", why, False, base_python, missing, False, advise=True)


def _check_python(python: str) -> None:
    try:
        res = subprocess.run([python, "-c", "import sys; print(*sys.version_info[:2])"],
                             capture_output=True, text=True, timeout=60)
    except OSError:
        raise PlanError(f"no Python interpreter {python!r}; set PYTHON=/path/to/python3.11 "
                        f"(or newer), e.g. after `module load python`") from None
    version = tuple(int(x) for x in res.stdout.split()) if res.returncode == 0 else ()
    if version < MIN_PYTHON:
        shown = ".".join(map(str, version)) or "unknown"
        raise PlanError(f"{python!r} is Python {shown}; the package needs "
                        f"{'.'.join(map(str, MIN_PYTHON))} or newer: set "
                        f"PYTHON=/path/to/python3.11 (e.g. after `module load python`)")


def _conda_plan(environ, prefix, conda_py, info, forced, advise, constraints) -> Plan:
    if not prefix:
        raise PlanError("HELISWEEP_ROUTE=conda needs an active conda environment (CONDA_PREFIX "
                        "is not set): `conda activate <env>` first")
    if not Path(conda_py).exists() or info is None:
        raise PlanError(f"the conda environment {prefix!r} has no working Python at "
                        f"{conda_py!r}: `conda install -c conda-forge python=3.11` in it")
    py = tuple(info.get("python", [0, 0])[:2])
    if py < MIN_PYTHON:
        raise PlanError(f"the conda environment {prefix!r} has Python "
                        f"{'.'.join(map(str, py))}; the package needs "
                        f"{'.'.join(map(str, MIN_PYTHON))} or newer: "
                        f"`conda install -c conda-forge python=3.11 kwant` in it")
    install: list = []
    if not info.get("kwant"):
        tool = _conda_tool(environ)
        if tool is None:
            raise PlanError(f"HELISWEEP_ROUTE=conda: the environment {prefix!r} has no Kwant "
                            f"and neither mamba nor conda is on PATH to install it; "
                            f"install it yourself: `conda install -c conda-forge kwant`")
        install = [tool, "install", "-y", "-p", prefix, "-c", "conda-forge", "kwant"]
    elif info.get("numpy") and _version_tuple(info["numpy"]) < MIN_NUMPY:
        raise PlanError(f"the conda environment {prefix!r} has NumPy {info['numpy']}; the "
                        f"package needs NumPy >= {'.'.join(map(str, MIN_NUMPY))} (and a Kwant "
                        f"built against it): `conda install -c conda-forge 'numpy>=2' kwant`")
    provides = sorted(set(map(_normalise, info.get("dists", [])))
                      & set(constraint_names(constraints) if constraints else []))
    if install:
        why = f"HELISWEEP_ROUTE=conda: Kwant will be installed from conda-forge into {prefix}"
        kwant, solver = "", ""
    else:
        kwant, solver = info["kwant"], info.get("solver") or "unknown"
        why = f"active conda environment {prefix} has Kwant {kwant} (solver {solver})"
    return Plan("conda", why, solver == "mumps", conda_py, conda_prefix=prefix,
                conda_kwant=kwant, conda_solver=solver, conda_provides=provides,
                conda_install=install, advise=advise)


# --------------------------------------------------------------------------- output
def advice(route: str, kwant_version: str) -> list[str]:
    """The exact commands of the install routes other than ``route``."""
    conda = [
        "conda/mamba environment (conda-forge's Kwant brings MUMPS; nothing is compiled):",
        f"    conda create -n helisweep -c conda-forge python=3.11 kwant={kwant_version}"
        "    # or mamba create ...",
        "    conda activate helisweep",
        "    make clean-venv && make setup    # .venv is rebuilt on the conda Python",
    ]
    site = [
        "a MUMPS your site installed (e.g. `module load mumps`; `module avail mumps` lists "
        "them), through Kwant's build.conf:",
        "    HELISWEEP_MUMPS_DIR=/path/to/mumps make setup    # the prefix holding lib/ and "
        "include/",
        "    # or: HELISWEEP_MUMPS_LIB_DIR=/path/lib HELISWEEP_MUMPS_INCLUDE_DIR=/path/include "
        "make setup",
        "    # library names other than libzmumps_seq/_scotch/+libmpiseq: "
        "HELISWEEP_MUMPS_LIBS='zmumps mumps_common pord mpiseq'",
    ]
    apt = [
        f"Debian's packages (needs root): apt-get install {' '.join(APT_PACKAGES)}, "
        "then make setup",
    ]
    out = ["Other install routes (README, Set-up, says which suits whom and what each costs):"]
    for name, lines in (("conda", conda), ("site-mumps", site), ("apt", apt)):
        if name != route:
            out += [f"  {lines[0]}"] + lines[1:]
    return out


def shell_assignments(plan: Plan) -> str:
    """The plan as ``NAME=value`` lines (shell-quoted) for ``eval`` in setup.sh."""
    values = {
        "ROUTE": plan.route,
        "ROUTE_REASON": plan.reason,
        "EXPECT_MUMPS": "yes" if plan.expect_mumps else "no",
        "BASE_PYTHON": plan.base_python,
        "APT_MISSING": " ".join(plan.apt_missing),
        "CAN_APT": "yes" if plan.can_apt else "no",
        "CONDA_ENV": plan.conda_prefix,
        "CONDA_KWANT": plan.conda_kwant,
        "CONDA_SOLVER": plan.conda_solver,
        "CONDA_PROVIDES": " ".join(plan.conda_provides),
        "CONDA_INSTALL": " ".join(shlex.quote(x) for x in plan.conda_install),
        "MUMPS_LIBS": " ".join(plan.mumps_libraries),
        "ADVISE": "yes" if plan.advise else "no",
    }
    return "\n".join(f"{k}={shlex.quote(v)}" for k, v in values.items())


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    here = Path(__file__).resolve().parent.parent
    constraints = here / "requirements" / "constraints.txt"
    try:
        if argv[:1] == ["plan"]:
            python = argv[argv.index("--python") + 1] if "--python" in argv else "python3"
            plan = detect(os.environ, is_root=os.geteuid() == 0,
                          has_apt=shutil.which("apt-get") is not None,
                          base_python=python, constraints=constraints)
            print(shell_assignments(plan))
            return 0
        if argv[:1] == ["advice"] and len(argv) == 2:
            version = next((n.split("==")[1] for n in constraints.read_text().splitlines()
                            if n.startswith("kwant==")), "1.5.0")
            print("\n".join(advice(argv[1], version)))
            return 0
        if argv[:1] == ["build-conf"] and len(argv) == 2:
            dirs = site_mumps_dirs(os.environ)
            if dirs is None:
                raise PlanError("build-conf needs HELISWEEP_MUMPS_DIR, or "
                                "HELISWEEP_MUMPS_LIB_DIR and HELISWEEP_MUMPS_INCLUDE_DIR")
            names = (os.environ.get("HELISWEEP_MUMPS_LIBS", "").split()
                     or find_mumps_libraries(dirs[0]))
            Path(argv[1]).write_text(build_conf_text(dirs[0], dirs[1], names))
            return 0
    except PlanError as exc:
        print(f"[setup] ERROR: {exc}", file=sys.stderr)
        return 2
    print("usage: install_plan.py plan [--python PY] | advice ROUTE | build-conf OUT",
          file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main())
