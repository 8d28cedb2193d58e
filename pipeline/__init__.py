"""helisweep: disorder-averaged edge transport in quantum spin Hall devices.

Stages (one module each): :mod:`geometry` (device outlines, contacts, gates),
:mod:`geometry_io` (GeoJSON, WKT, GDSII), :mod:`materials` (BHZ parameter presets),
:mod:`model` (BHZ tight-binding values), :mod:`mesh` (outline -> Kwant system with leads),
:mod:`transport` (scattering -> transmission matrix), :mod:`landauer` (Landauer-Buttiker
resistances, independent of Kwant), :mod:`preflight` (checks before a sweep).
"""

import os as _os

# Parallelism is one single-threaded process per core (Dask workers). A multi-threaded BLAS in
# the same processes only contends for the cores: a 30-site lead-mode computation took 0.3 s
# with two OpenBLAS threads on a busy 2-core machine and 0.015 s with one. Respect a value the
# user set; this takes effect only if NumPy is not imported yet.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

__version__ = "0.1.0"
