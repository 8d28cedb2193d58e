"""helisweep: disorder-averaged edge transport in quantum spin Hall devices.

One subpackage per stage, each importing only the ones below it (checked by the layers
contract in ``pyproject.toml``), from the top: :mod:`~pipeline.cli` (the command),
:mod:`~pipeline.output` (figures, package), :mod:`~pipeline.longedges` (composed long edges),
:mod:`~pipeline.analysis` (statistics, L*), :mod:`~pipeline.sweep` (config, run model, store,
execution), :mod:`~pipeline.transport` (transmissions, Landauer-Buttiker),
:mod:`~pipeline.system` (meshing into Kwant, preflight), :mod:`~pipeline.physics` (materials,
BHZ model, disorder) and :mod:`~pipeline.device` (outlines); at the bottom
:mod:`~pipeline.errors`, :mod:`~pipeline.constants` and :mod:`~pipeline.timestamps`.

From Python (``docs/python-api.md``)::

    import pipeline as hs
    cfg = hs.load_config("configs/api-quickstart.toml")
    hs.run(cfg, workers=2)              # a local Dask cluster for the call
    summary = hs.summarize(cfg)         # xarray Dataset

The names in ``__all__`` come from :mod:`pipeline.api` and are imported on first use (PEP 562
``__getattr__``): every module imports this package for its bottom modules, and the command
line should start without loading the stages it does not use.
"""

import importlib as _importlib
import os as _os

# Parallelism is one single-threaded process per core (Dask workers). A multi-threaded BLAS in
# the same processes only contends for the cores: a 30-site lead-mode computation took 0.3 s
# with two OpenBLAS threads on a busy 2-core machine and 0.015 s with one. Respect a value the
# user set; this takes effect only if NumPy is not imported yet.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_var, "1")

__version__ = "0.1.0"

#: the notebook interface (:mod:`pipeline.api`), imported on first access of any of its names
__all__ = ['__version__', 'load_config', 'local_client', 'open_client', 'run', 'status',
           'open_samples', 'summarize', 'save_summary', 'lstar', 'figures', 'package',
           'verify_package', 'report', 'HelisweepError']

_LAZY = frozenset(__all__) - {"__version__"}


def __getattr__(name: str):
    # PEP 562: the API module (and with it every stage) loads only when one of its names is
    # used. Through importlib, not an import statement: a static import here would make every
    # bottom module that imports the package depend on the top of it (layers contract).
    if name in _LAZY:
        value = getattr(_importlib.import_module("pipeline.api"), name)
        globals()[name] = value  # later look-ups find it without this function
        return value
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}; its public names are "
                         f"{', '.join(__all__)} (and the subpackages)")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
