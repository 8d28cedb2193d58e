"""Shared test helpers: the tiny sweep configuration, store readers and comparisons, random
unitary matrices, and a Dask cluster reused across tests.

The plain helpers (:func:`tiny_config`, :func:`store_arrays`, :func:`assert_same_samples`,
:func:`done_samples`, :func:`haar_unitary`) are imported where they are needed, e.g. by
module-scoped fixtures, which cannot use function-scoped ones: ``from conftest import
tiny_config`` (pytest puts ``tests/`` on ``sys.path``).
"""

import os

# before NumPy loads OpenBLAS: the test process solves with one BLAS thread, like the workers
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import pytest  # noqa: E402

from pipeline.sweep.store import SampleStatus, SampleStore  # noqa: E402

TINY_CONFIG = """
[run]
name = "tiny"
seed = 42
realisations = {realisations}
directory = "{directory}"

[device]
template = "strip"
parameters = {{ width = 40.0 }}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[contacts]
doping = 25.0

[[disorder]]
kind = "anderson"
width = 30.0

[[disorder]]
kind = "magnetic"
inplane = 10.0
density = 0.01
aligned = false

[sweep]
energy = [-3.0, 1.0, 5.0]
gate_voltage = 0.0
geometry = {{ parameter = "length", values = [60.0, 120.0] }}

[measure]
labels = ["G(L,R)", "R(L,R;L,R)"]
"""

#: the per-sample arrays of a store (store format 1), in the order the writer fills them
SAMPLE_ARRAYS = ("transmission", "modes", "measurements", "status")


def tiny_config(directory, realisations: int = 3, **replace: str) -> str:
    """The tiny sweep (a 40 nm strip of two lengths, three energies) as TOML text.

    Parameters
    ----------
    directory : str or Path
        The run directory written into ``[run] directory``.
    realisations : int
        ``[run] realisations``.
    **replace : str
        ``old=new`` text replacements applied after formatting (pass them as
        ``**{"width = 30.0": "width = 31.0"}``). Each ``old`` must occur in the text, so a
        test never checks the unchanged configuration by mistake.
    """
    text = TINY_CONFIG.format(realisations=realisations, directory=str(directory))
    for old, new in replace.items():
        assert old in text, f"{old!r} is not in the tiny configuration; fix the replacement"
        text = text.replace(old, new)
    return text


@pytest.fixture
def tiny_config_text(tmp_path):
    """:func:`tiny_config` with the run directory defaulting to ``tmp_path / "run"``."""
    def make(realisations=3, directory=None, **replace):
        return tiny_config(directory or tmp_path / "run", realisations, **replace)
    return make


def store_arrays(path) -> dict[str, np.ndarray]:
    """Every per-sample array of the store at ``path``, read as xarray reads it."""
    import xarray as xr  # heavy; only the tests that read stores need it

    ds = xr.open_zarr(str(path), consolidated=False)
    return {name: ds[name].values for name in SAMPLE_ARRAYS}


def assert_same_samples(got: dict[str, np.ndarray], want: dict[str, np.ndarray]) -> None:
    """Bitwise equality of two :func:`store_arrays` results, array by array."""
    assert set(got) == set(want), (sorted(got), sorted(want))
    for name in want:
        np.testing.assert_array_equal(got[name], want[name], err_msg=name)


def done_samples(path) -> int:
    """Samples marked done in the store at ``path``; 0 while it does not exist yet.

    For polling a store that another process or thread is writing.
    """
    try:
        status = SampleStore.open(path).status()
    except Exception:  # noqa: BLE001 - a store half-created this instant counts as empty
        return 0
    return int((status == SampleStatus.DONE).sum())


def haar_unitary(n: int, rng: np.random.Generator) -> np.ndarray:
    """A random n x n unitary matrix, uniformly (Haar) distributed.

    QR of a complex Gaussian matrix, with the phases of R's diagonal moved into Q so that
    the distribution does not depend on the QR convention.
    """
    z = (rng.normal(size=(n, n)) + 1j * rng.normal(size=(n, n))) / np.sqrt(2)
    q, r = np.linalg.qr(z)
    return q * (np.diag(r) / np.abs(np.diag(r)))


@pytest.fixture(scope="session")
def dask_clients():
    """A one-worker and a two-worker local cluster, shared by the engine tests."""
    from pipeline.sweep.clusters import local_client  # starts dask.distributed

    clients = {1: local_client(1), 2: local_client(2)}
    yield clients
    for c in clients.values():
        cluster = c.cluster
        c.close()
        cluster.close()
