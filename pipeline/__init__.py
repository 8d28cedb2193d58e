"""helisweep: disorder-averaged edge transport in quantum spin Hall devices.

One subpackage per stage, each importing only the ones below it (checked by the layers
contract in ``pyproject.toml``), from the top: :mod:`~pipeline.cli` (the command),
:mod:`~pipeline.output` (figures, package), :mod:`~pipeline.longedges` (composed long edges),
:mod:`~pipeline.analysis` (statistics, L*), :mod:`~pipeline.sweep` (config, run model, store,
execution), :mod:`~pipeline.transport` (transmissions, Landauer-Buttiker),
:mod:`~pipeline.system` (meshing into Kwant, preflight), :mod:`~pipeline.physics` (materials,
BHZ model, disorder) and :mod:`~pipeline.device` (outlines); at the bottom
:mod:`~pipeline.errors`, :mod:`~pipeline.constants` and :mod:`~pipeline.timestamps`.
"""

import os as _os

# Parallelism is one single-threaded process per core (Dask workers). A multi-threaded BLAS in
# the same processes only contends for the cores: a 30-site lead-mode computation took 0.3 s
# with two OpenBLAS threads on a busy 2-core machine and 0.015 s with one. Respect a value the
# user set; this takes effect only if NumPy is not imported yet.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

__version__ = "0.1.0"
