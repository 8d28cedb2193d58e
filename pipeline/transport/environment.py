"""Report which Kwant solver and which BLAS this environment uses, and limit BLAS threads.

Run as ``python -m pipeline.transport.environment``; the set-up script calls it last, and run
provenance, the benchmarks and the methods text record the same facts (:func:`describe`).

The BLAS libraries are those `threadpoolctl`_ finds loaded in this process, whatever the
install route (Debian packages, a conda environment, a site MUMPS). The solver is imported
first: MUMPS links the system BLAS (``libblas.so.3`` or a site's) through Kwant's extension
module ``kwant.linalg._mumps``, so before that import that BLAS is not loaded at all. The
NumPy and SciPy wheels carry private OpenBLAS copies whose symbols are renamed
(``scipy_dgemm_``...); MUMPS cannot link those, so the BLAS under MUMPS is the one loaded
library that is not such a private copy.

.. _threadpoolctl: https://github.com/joblib/threadpoolctl
"""

from __future__ import annotations

import os
import platform
import sys

import numpy
import scipy
import scipy.linalg  # noqa: F401  (loads SciPy's BLAS, so the report sees it)
from threadpoolctl import threadpool_info, threadpool_limits

__all__ = ['kwant_solver', 'blas_libraries', 'solver_blas', 'limit_blas_threads', 'describe',
           'summary_line']

#: file-name prefix threadpoolctl gives the OpenBLAS copies bundled in the NumPy/SciPy wheels
#: (their symbols carry a ``scipy_`` prefix, so no other library can link them)
_PRIVATE_PREFIX = "libscipy_openblas"

#: the wheel directories those private copies live in, and who loads them
_PRIVATE_OWNERS = {"numpy.libs": "NumPy (private copy in its wheel)",
                   "scipy.libs": "SciPy (private copy in its wheel)"}

#: loaded libraries that may be a BLAS threadpoolctl cannot control (reference BLAS, ...)
_BLAS_NAME_STARTS = ("libblas", "libopenblas", "libmkl", "libblis", "libflexiblas",
                     "libcblas", "libgoto")

_NAMES = {"openblas": "OpenBLAS", "mkl": "Intel MKL", "blis": "BLIS", "flexiblas": "FlexiBLAS"}


def kwant_solver() -> str:
    """Name of the solver behind ``kwant.smatrix`` ("mumps" or "scipy").

    Imports Kwant's default solver, and with it MUMPS and the BLAS MUMPS links, if Kwant was
    built with MUMPS.
    """
    import kwant.solvers.default as default  # heavy: builds systems; not needed to read stores or write reports

    # smatrix is a bound method of the default solver instance; its class tells the backend.
    module = type(default.smatrix.__self__).__module__
    return "mumps" if module.endswith("mumps") else "scipy"


def _owner(info: dict, solver: str) -> str:
    """Who uses a BLAS library threadpoolctl reported (from its prefix and wheel directory)."""
    if info.get("prefix") == _PRIVATE_PREFIX:
        parent = os.path.basename(os.path.dirname(info.get("filepath") or ""))
        return _PRIVATE_OWNERS.get(parent, "a wheel's private copy")
    if solver == "mumps":
        return "MUMPS (Kwant's sparse solver), and NumPy and SciPy if they link it"
    return "NumPy and SciPy (shared library)"


def _unrecognised_blas(known: set[str]) -> list[str]:
    """File names of loaded BLAS-like libraries that threadpoolctl does not report (Linux).

    Read from ``/proc/self/maps`` (the files actually mapped into this process, after every
    link is resolved); empty where that file does not exist.
    """
    try:
        with open("/proc/self/maps") as fh:
            paths = {line.split(None, 5)[5].strip() for line in fh if len(line.split(None, 5)) == 6}
    except OSError:
        return []
    names = {os.path.basename(p) for p in paths if p.startswith("/")}
    return sorted(n for n in names
                  if n.startswith(_BLAS_NAME_STARTS) and n not in known
                  and not n.startswith(_PRIVATE_PREFIX))


def blas_libraries(solver: str | None = None) -> list[dict]:
    """The BLAS libraries loaded in this process once the solver is imported.

    Parameters
    ----------
    solver : str, optional
        :func:`kwant_solver`'s answer; imported (and computed) when omitted.

    Returns
    -------
    list of dict
        One entry per library: ``internal_api`` (``"openblas"``, ``"mkl"``, ``"blis"``,
        ``"flexiblas"``, or ``"unknown"`` for a library threadpoolctl cannot control, such as
        the reference BLAS), ``version``, ``threading_layer``, ``architecture``,
        ``num_threads``, ``library`` (the file name, no directory: no machine paths),
        ``used_by`` and ``private`` (a wheel's private copy, which no other library can
        link). The solver's BLAS comes first.
    """
    solver = solver or kwant_solver()
    out = []
    for info in threadpool_info():
        if info.get("user_api") != "blas":
            continue
        out.append({
            "internal_api": str(info.get("internal_api")),
            "version": str(info.get("version")),
            "threading_layer": str(info.get("threading_layer", "unknown")),
            "architecture": str(info.get("architecture", "unknown")),
            "num_threads": int(info.get("num_threads") or 0),
            "library": os.path.basename(info.get("filepath") or ""),
            "used_by": _owner(info, solver),
            "private": info.get("prefix") == _PRIVATE_PREFIX,
        })
    known = {e["library"] for e in out}
    if solver == "mumps" and all(e["private"] for e in out):
        for name in _unrecognised_blas(known):
            out.append({"internal_api": "unknown", "version": "unknown",
                        "threading_layer": "unknown", "architecture": "unknown",
                        "num_threads": 1, "library": name, "private": False,
                        "used_by": "MUMPS (Kwant's sparse solver); not recognised by "
                                   "threadpoolctl (no thread control; e.g. the reference BLAS)"})
    out.sort(key=lambda e: _rank(e, solver))
    return out


def _rank(entry: dict, solver: str) -> int:
    if solver == "mumps":
        return 0 if entry["used_by"].startswith("MUMPS") else 1
    # SciPy's sparse direct solver (SuperLU) calls SciPy's BLAS
    return 0 if entry["used_by"].startswith(("SciPy", "NumPy and SciPy")) else 1


def solver_blas(libraries: list[dict], solver: str) -> str:
    """One phrase naming the BLAS under the sparse solver, without machine paths.

    Examples: ``"OpenBLAS 0.3.21 (pthreads, 1 thread)"``; ``"libblas.so.3.11.0, not
    recognised by threadpoolctl (e.g. the reference BLAS)"``; ``"unknown (threadpoolctl
    found no BLAS)"``.
    """
    if not libraries:
        return "unknown (threadpoolctl found no BLAS)"
    lib = libraries[0]
    if solver == "mumps" and lib["private"]:
        return "unknown (no BLAS outside the NumPy and SciPy wheels is loaded)"
    if lib["internal_api"] == "unknown":
        return f"{lib['library']}, not recognised by threadpoolctl (e.g. the reference BLAS)"
    name = _NAMES.get(lib["internal_api"], lib["internal_api"])
    n = lib["num_threads"]
    return f"{name} {lib['version']} ({lib['threading_layer']}, {n} thread{'s' if n != 1 else ''})"


def limit_blas_threads(n: int = 1) -> list[dict]:
    """Limit every BLAS and OpenMP pool loaded in this process to ``n`` threads.

    Parallelism here is one single-threaded process per core; a multi-threaded BLAS in the
    same processes only contends for the cores. Environment variables
    (``OPENBLAS_NUM_THREADS``...) act only before NumPy is loaded; this acts at any time,
    through threadpoolctl. The solver is imported first so the BLAS under MUMPS is limited
    too.

    Parameters
    ----------
    n : int
        Threads per pool, at least 1.

    Returns
    -------
    list of dict
        :func:`blas_libraries` after the limit (``num_threads`` shows it took effect).
    """
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise ValueError(f"BLAS thread limit must be a positive integer, got {n!r}; use e.g. 1")
    solver = kwant_solver()
    threadpool_limits(limits=n)
    return blas_libraries(solver)


def describe() -> dict:
    """Facts about the numerical stack, for provenance, preflight and the set-up report.

    Keys: ``python``, ``kwant``, ``kwant_solver``, ``blas`` (:func:`solver_blas`),
    ``blas_libraries`` (:func:`blas_libraries`), ``system_blas`` (the same phrase as
    ``blas``, kept for readers of older provenance), ``numpy``, ``scipy``, ``host``. No value
    holds a file path.
    """
    import kwant  # heavy: builds systems; not needed to read stores or write reports

    solver = kwant_solver()
    libs = blas_libraries(solver)
    blas = solver_blas(libs, solver)
    return {
        "python": sys.version.split()[0],
        "kwant": kwant.__version__,
        "kwant_solver": solver,
        "blas": blas,
        "blas_libraries": libs,
        "system_blas": blas,
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "host": platform.node(),
    }


def summary_line(facts: dict) -> str:
    """``describe()`` in one line: Kwant, its solver and the BLAS under the solver."""
    under = "MUMPS" if facts["kwant_solver"] == "mumps" else "SciPy's solver"
    return (f"Kwant {facts['kwant']}, solver {facts['kwant_solver']}; BLAS under "
            f"{under}: {facts['blas']}")


def _main() -> None:
    facts = describe()
    print(f"[setup] Kwant {facts['kwant']} solver: {facts['kwant_solver']}"
          + ("" if facts["kwant_solver"] == "mumps"
             else "  (SciPy fallback, several times slower per sample: see the README's "
                  "Set-up for the MUMPS routes)"))
    under = "MUMPS" if facts["kwant_solver"] == "mumps" else "SciPy's solver"
    print(f"[setup] BLAS under {under}: {facts['blas']}")
    for lib in facts["blas_libraries"][1:]:
        print(f"[setup]   also loaded: {_NAMES.get(lib['internal_api'], lib['internal_api'])} "
              f"{lib['version']} ({lib['library']}; {lib['used_by']}, "
              f"{lib['num_threads']} thread(s))")
    print(f"[setup] NumPy {facts['numpy']}, SciPy {facts['scipy']}, Python {facts['python']}")


if __name__ == "__main__":
    _main()
