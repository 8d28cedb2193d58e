"""Shared fixtures: small configurations and a Dask cluster reused across tests."""

import os

import pytest

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")

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
report = ["G(L,R)", "R(L,R;L,R)"]
"""


@pytest.fixture
def tiny_config_text(tmp_path):
    def make(realisations=3, directory=None, **replace):
        text = TINY_CONFIG.format(realisations=realisations,
                                  directory=directory or str(tmp_path / "run"))
        for old, new in replace.items():
            text = text.replace(old, new)
        return text
    return make


@pytest.fixture(scope="session")
def dask_clients():
    """A one-worker and a two-worker local cluster, shared by the engine tests."""
    from pipeline.engine import local_client

    clients = {1: local_client(1), 2: local_client(2)}
    yield clients
    for c in clients.values():
        cluster = c.cluster
        c.close()
        cluster.close()
