"""The spin-block reduction agrees with the full four-band solve and is used only when valid."""

import numpy as np
import pytest

from pipeline.device.templates import h_bar, hall_bar, two_terminal_strip
from pipeline.errors import ModelError
from pipeline.physics.bhz import exchange_matrices
from pipeline.physics.materials import PRESETS
from pipeline.sweep.config import parse_config
from pipeline.sweep.runmodel import uses_spin_blocks
from pipeline.sweep.tasks import solve_realisation
from pipeline.system.mesh import build_system
from pipeline.transport.solver import block_transmission_matrix, transmission_matrix

HGTE = PRESETS["hgte-7.0nm"]  # g-factors non-zero: the Zeeman term is exercised

DEVICES = {
    "strip": two_terminal_strip(length=150.0, width=100.0),
    "hbar": h_bar(length=150.0, width=100.0, arm_length=60.0, arm_width=100.0),
    "hallbar": hall_bar(length=300.0, width=100.0, probe_width=50.0, probe_length=50.0,
                        probe_spacing=150.0),
}


@pytest.mark.parametrize("name", list(DEVICES))
@pytest.mark.parametrize("b_perp", [0.0, 1.3])
@pytest.mark.parametrize("with_mz", [False, True])
def test_block_solve_equals_full_solve(name, b_perp, with_mz):
    dev = DEVICES[name]
    full = build_system(dev, HGTE, 5.0, with_field=True, contact_doping=25.0)
    half = build_system(dev, HGTE, 5.0, with_field=True, contact_doping=25.0, spin_block=True)
    rng = np.random.default_rng(5)
    pot = rng.uniform(-25, 25, full.n_sites)
    extra = None
    if with_mz:
        m = np.zeros((full.n_sites, 3))
        m[:, 2] = rng.uniform(-4, 4, full.n_sites)  # exchange along z conserves S_z
        extra = exchange_matrices(m)
    ref = transmission_matrix(full, 6.0, full.params(b_perp=b_perp, potential=pot, onsite_extra=extra))
    got = block_transmission_matrix(half, 6.0, half.block_params(b_perp=b_perp, potential=pot, onsite_extra=extra))
    np.testing.assert_allclose(got.matrix, ref.matrix, atol=1e-9, rtol=0)
    np.testing.assert_array_equal(got.modes, ref.modes)
    blocks = half.block_params(b_perp=b_perp, potential=pot, onsite_extra=extra)
    # one solve serves both spins only when the blocks are time-reverses (B = 0, no m_z)
    assert (blocks[0][0] is blocks[1][0]) == (b_perp == 0.0 and not with_mz)


def test_reduction_refused_with_inplane_exchange_or_bia():
    dev = DEVICES["strip"]
    half = build_system(dev, HGTE, 5.0, spin_block=True)
    m = np.zeros((half.n_sites, 3))
    m[:, 0] = 2.0
    with pytest.raises(ModelError, match="mix spin up and spin down"):
        half.block_params(onsite_extra=exchange_matrices(m))
    with pytest.raises(ModelError, match="BIA"):
        build_system(dev, HGTE.with_(delta_bia=1.6), 5.0, spin_block=True)


def test_engine_detects_when_the_reduction_applies(tiny_config_text):
    with_inplane = parse_config(tiny_config_text())  # the tiny config has in-plane exchange
    assert not uses_spin_blocks(with_inplane)
    no_magnetic = tiny_config_text(**{"inplane = 10.0": "inplane = 0.0\nout_of_plane = 3.0"})
    assert uses_spin_blocks(parse_config(no_magnetic))
    off = no_magnetic + '\n[execution]\nspin_blocks = "off"\n'
    assert not uses_spin_blocks(parse_config(off))
    bia = no_magnetic.replace('preset = "hgte-7.0nm"', 'preset = "hgte-7.0nm"\ndelta_bia = 1.6')
    assert not uses_spin_blocks(parse_config(bia))
    # the engine's results agree with and without the reduction
    a = solve_realisation(parse_config(no_magnetic), (0, 1, 0))
    b = solve_realisation(parse_config(off), (0, 1, 0))
    np.testing.assert_allclose(a.transmission, b.transmission, atol=1e-9, rtol=0)
    np.testing.assert_array_equal(a.status, b.status)
