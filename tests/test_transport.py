"""Full BHZ devices through Kwant and the Landauer-Buttiker solver, against published results."""

import numpy as np
import pytest

import pipeline.transport.landauer as landauer
from pipeline.device.templates import h_bar, two_terminal_strip
from pipeline.physics.bhz import exchange_matrices
from pipeline.physics.materials import BHZParameters
from pipeline.system.mesh import build_system
from pipeline.transport.solver import transmission_matrix

# Source: Koenig et al., J. Phys. Soc. Jpn. 77, 031007 (2008), 7 nm HgTe well (the issue's
# measured set): A = 364.5 meV nm, B = -686 meV nm^2, D = -512 meV nm^2, M = -10 meV.
HGTE = BHZParameters(A=364.5, B=-686.0, C=0.0, D=-512.0, M=-10.0)
A_LAT = 5.0  # nm


@pytest.fixture(scope="module")
def strip_system():
    return build_system(two_terminal_strip(length=300.0, width=300.0), HGTE, A_LAT)


@pytest.fixture(scope="module")
def hbar_system():
    dev = h_bar(length=300.0, width=250.0, arm_length=200.0, arm_width=250.0)
    return build_system(dev, HGTE, A_LAT)


@pytest.mark.slow
def test_hbar_in_gap_gives_roth_values(hbar_system):
    res = transmission_matrix(hbar_system, -8.0, hbar_system.params())
    T = res.matrix
    landauer.check_sum_rules(T)
    # Source: Roth et al., Science 325, 294 (2009): R14,23 = h/4e^2, R14,14 = 3h/4e^2
    r1423 = landauer.four_terminal_resistance(T, 0, 3, 1, 2)
    r1414 = landauer.four_terminal_resistance(T, 0, 3, 0, 3)
    assert r1423 == pytest.approx(0.25, rel=1e-3)
    assert r1414 == pytest.approx(0.75, rel=1e-3)
    assert np.all(res.modes == 2)  # one Kramers pair of edge channels per lead


def test_clean_strip_in_gap_conducts_two_quanta(strip_system):
    # Source: Koenig et al., Science 318, 766 (2007): a clean QSH strip conducts 2e^2/h
    T = transmission_matrix(strip_system, 0.0, strip_system.params()).matrix
    assert T[1, 0] == pytest.approx(2.0, abs=1e-6)
    assert landauer.two_terminal_conductance(T, 0, 1) == pytest.approx(2.0, abs=1e-6)


def test_exchange_along_z_does_not_backscatter_but_in_plane_does(strip_system):
    # Source: Kane and Mele, Phys. Rev. Lett. 95, 226801 (2005): backscattering between the
    # helical partners needs a spin flip; with S_z conserved (field along z) G stays 2e^2/h.
    rng = np.random.default_rng(11)
    n = strip_system.n_sites
    mz = np.zeros((n, 3))
    mz[:, 2] = rng.uniform(-8, 8, n)
    T = transmission_matrix(strip_system, 0.0, strip_system.params(onsite_extra=exchange_matrices(mz))).matrix
    assert T[1, 0] == pytest.approx(2.0, abs=1e-6)
    # In-plane exchange couples the helical partners: a uniform 6 meV in-plane field opens a
    # gap at the edge Dirac point (7.46 meV), so the edges stop conducting there. Metallic
    # contacts keep the leads open at that energy.
    doped = build_system(two_terminal_strip(length=300.0, width=300.0), HGTE, A_LAT, contact_doping=40.0)
    clean = transmission_matrix(doped, 7.46, doped.params()).matrix[1, 0]
    mxy = np.zeros((doped.n_sites, 3))
    mxy[:, 0] = 6.0
    gapped = transmission_matrix(doped, 7.46, doped.params(onsite_extra=exchange_matrices(mxy))).matrix[1, 0]
    assert clean > 1.9
    assert gapped < 0.5 * clean


@pytest.mark.slow
def test_reciprocity_in_a_field():
    # Source: Buttiker, Phys. Rev. Lett. 57, 1761 (1986): R_ij,kl(B) = R_kl,ij(-B)
    dev = h_bar(length=200.0, width=150.0, arm_length=100.0, arm_width=150.0)
    p = HGTE.with_(g_E=22.7, g_H=-1.21)
    dsys = build_system(dev, p, A_LAT, with_field=True, contact_doping=30.0)
    pot = np.random.default_rng(3).uniform(-15, 15, dsys.n_sites)  # breaks spatial symmetry
    b = 0.7
    Tp = transmission_matrix(dsys, 12.0, dsys.params(b_perp=b, potential=pot)).matrix
    Tm = transmission_matrix(dsys, 12.0, dsys.params(b_perp=-b, potential=pot)).matrix
    np.testing.assert_allclose(Tp, Tm.T, atol=1e-8)
    assert np.abs(Tp - Tp.T).max() > 1e-3  # the field really breaks T_ij = T_ji
    for (i, j, k, m) in [(0, 3, 1, 2), (0, 2, 1, 3), (1, 3, 0, 2), (0, 1, 2, 3)]:  # R_ij,km
        r_plus = landauer.four_terminal_resistance(Tp, i, j, k, m)
        r_minus = landauer.four_terminal_resistance(Tm, k, m, i, j)
        assert r_plus == pytest.approx(r_minus, rel=1e-7)
    for T in (Tp, Tm):
        landauer.check_sum_rules(T, rtol=1e-8)
