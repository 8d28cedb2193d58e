"""BHZ model: discretisation, material presets and edge states against published results."""

import kwant
import numpy as np
import pytest

import pipeline.physics.bhz as model
from pipeline.errors import ModelError
from pipeline.physics.materials import PRESETS, BHZParameters, get_preset
from pipeline.system.mesh import strip_lead
from pipeline.system.preflight import lattice_bulk_gap, strip_edge_properties

# Source: the measured set, equal to Koenig et al., J. Phys. Soc. Jpn. 77, 031007
# (2008) for a 7 nm HgTe well: A = 364.5 meV nm, B = -686, D = -512 meV nm^2, M = -10 meV.
HGTE = BHZParameters(A=364.5, B=-686.0, C=0.0, D=-512.0, M=-10.0)


def test_lattice_matches_continuum_at_small_k():
    # The finite-difference lattice model agrees with the continuum to O((ka)^2).
    a = 2.0
    k = np.array([0.002, 0.01, 0.03])
    for angle in (0.0, 0.7):
        kx, ky = k * np.cos(angle), k * np.sin(angle)
        e_lat = np.linalg.eigvalsh(model.bloch_hamiltonian(HGTE, a, kx, ky))
        e_con = np.linalg.eigvalsh(model.continuum_hamiltonian(HGTE, kx, ky))
        err = np.abs(e_lat - e_con).max(axis=-1)
        assert np.all(err < 0.5 * (k * a) ** 2 * abs(HGTE.B) / a**2 + 1e-9)


def test_kwant_lead_bands_follow_the_bloch_hamiltonian():
    # A one-site-wide lead along x has the 1D Bloch Hamiltonian H(kx, ky-term onsite only);
    # this checks the hopping direction convention H[site + d, site] = T_d.
    a = 5.0
    lead = strip_lead(HGTE, a, 1)
    onsite, tx, _ = model.lattice_matrices(HGTE, a)
    bands = kwant.physics.Bands(lead)
    for k in (0.0, 0.3, -1.1, 2.0):
        h = onsite + tx * np.exp(-1j * k) + tx.conj().T * np.exp(1j * k)
        np.testing.assert_allclose(np.sort(bands(k)), np.linalg.eigvalsh(h), atol=1e-10)


def test_spin_down_block_is_time_reverse_of_spin_up():
    onsite, tx, ty = model.lattice_matrices(HGTE, 5.0)
    for m in (onsite, tx, ty):
        np.testing.assert_allclose(m[2:, 2:], m[:2, :2].conj())
        assert np.all(m[:2, 2:] == 0)


def test_bulk_gap_and_inversion():
    # at D = 0 the k = 0 gap is 2|M| (Bernevig, Hughes, Zhang, Science 314, 1757 (2006))
    p = HGTE.with_(D=0.0)
    gap, top, bottom = model.continuum_bulk_gap(p)
    assert gap == pytest.approx(2 * abs(p.M), rel=1e-6)
    assert lattice_bulk_gap(p, 5.0)[0] == pytest.approx(2 * abs(p.M), rel=1e-3)
    assert PRESETS["hgte-7.0nm"].inverted and PRESETS["inas-gasb"].inverted
    assert not PRESETS["hgte-5.5nm"].inverted


def test_edge_dirac_point_and_velocity_from_strip_bands():
    # Source: Zhou et al., Phys. Rev. Lett. 101, 246807 (2008): E0 = C - MD/B and
    # hbar v = A sqrt(B^2 - D^2)/|B|; for these parameters 7.4636 meV and 242.59 meV nm
    # (the measured values).
    assert model.edge_dirac_point(HGTE) == pytest.approx(7.4636, abs=1e-4)
    assert model.edge_velocity(HGTE) == pytest.approx(242.59, abs=0.01)
    edge = strip_edge_properties(HGTE, 2.5, 400.0)
    assert edge.dirac_point == pytest.approx(7.4636, abs=0.01)
    assert edge.hbar_velocity == pytest.approx(242.59, rel=0.005)
    assert edge.finite_size_gap < 0.02


@pytest.mark.slow
def test_finite_size_gap_falls_exponentially_with_width():
    # Source: Zhou et al., Phys. Rev. Lett. 101, 246807 (2008): the gap of a strip of width W
    # decays as exp(-lambda W), lambda the slower edge-state decay constant at E0.
    widths = np.arange(160.0, 301.0, 20.0)
    gaps = np.array([strip_edge_properties(HGTE, 2.5, w).finite_size_gap for w in widths])
    slope, _ = np.polyfit(widths, np.log(gaps), 1)
    lam = float(np.min(model.edge_decay_constants(HGTE).real))
    assert -slope == pytest.approx(lam, rel=0.05)
    assert np.all(np.diff(gaps) < 0)


def test_presets_name_their_source():
    for name, p in PRESETS.items():
        assert p.source and p.source != "user supplied", name
    with pytest.raises(ModelError, match="Did you mean 'hgte-7.0nm'"):
        get_preset("hgte-7nm")


@pytest.mark.parametrize(
    "changes, match",
    [({"B": 0.0}, "non-zero"), ({"D": -700.0}, "no bulk gap"), ({"A": float("nan")}, "real number")],
)
def test_bad_parameters_refused(changes, match):
    with pytest.raises(ModelError, match=match):
        HGTE.with_(**changes)


def test_zeeman_and_exchange_matrices():
    from pipeline.constants import MU_B_MEV_PER_T

    p = HGTE.with_(g_E=2.0, g_H=-1.0)
    z = model.zeeman_matrix(p, 1.0)
    np.testing.assert_allclose(np.diag(z).real, 0.5 * MU_B_MEV_PER_T * np.array([2, -1, -2, 1]))
    ex = model.exchange_matrices(np.array([0.0, 0.0, 1.5]))
    np.testing.assert_allclose(np.diag(ex).real, [1.5, 1.5, -1.5, -1.5])
    ex = model.exchange_matrices(np.array([1.0, 0.0, 0.0]))
    assert ex[0, 2] == 1 and ex[1, 3] == 1
