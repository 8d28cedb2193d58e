"""Report which Kwant solver and which BLAS this environment uses.

Run as ``python -m pipeline.transport.environment``; the set-up script calls it last, and run
provenance records the same facts.
"""

from __future__ import annotations

import os
import platform
import sys

import numpy
import scipy

__all__ = ['kwant_solver', 'system_blas', 'describe']

_BLAS_LINK = "/usr/lib/{arch}-linux-gnu/libblas.so.3"


def kwant_solver() -> str:
    """Name of the solver behind ``kwant.smatrix`` ("mumps" or "scipy")."""
    import kwant.solvers.default as default  # heavy: builds systems; not needed to read stores or write reports

    # smatrix is a bound method of the default solver instance; its class tells the backend.
    module = type(default.smatrix.__self__).__module__
    return "mumps" if module.endswith("mumps") else "scipy"


def system_blas() -> str:
    """The library Debian's ``libblas.so.3`` alternative points at (used by MUMPS)."""
    link = _BLAS_LINK.format(arch=platform.machine())
    if not os.path.exists(link):
        return "unknown (no system libblas.so.3)"
    target = os.path.realpath(link)
    if "openblas" in target:
        return f"OpenBLAS ({target})"
    if "/blas/" in target:
        return f"reference BLAS ({target})"
    return target


def describe() -> dict[str, str]:
    """Facts about the numerical stack, for provenance and the set-up report."""
    import kwant  # heavy: builds systems; not needed to read stores or write reports

    return {
        "python": sys.version.split()[0],
        "kwant": kwant.__version__,
        "kwant_solver": kwant_solver(),
        "system_blas": system_blas(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "host": platform.node(),
    }


def _main() -> None:
    facts = describe()
    print(f"[setup] Kwant {facts['kwant']} solver: {facts['kwant_solver']}"
          + ("" if facts["kwant_solver"] == "mumps"
             else "  (SciPy fallback: install libmumps-scotch-dev and rerun the set-up)"))
    print(f"[setup] BLAS under MUMPS: {facts['system_blas']}")
    print(f"[setup] NumPy {facts['numpy']}, SciPy {facts['scipy']}, Python {facts['python']}")


if __name__ == "__main__":
    _main()
