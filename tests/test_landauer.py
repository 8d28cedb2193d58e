"""Landauer-Buttiker solver: ideal helical rings, invariants, units, errors."""

import itertools

import numpy as np
import pytest
import scipy.constants as sc

import pipeline.transport.landauer as landauer
from pipeline.constants import H_OVER_E2_OHM
from pipeline.errors import TransportError


def helical_ring(n: int) -> np.ndarray:
    """Transmissions of an ideal helical-edge ring with n contacts: each contact sends one
    channel (one spin) to each neighbour along the edge between them."""
    T = np.zeros((n, n))
    for i in range(n):
        T[(i + 1) % n, i] += 1.0
        T[(i - 1) % n, i] += 1.0
    return T


def ring_resistance_closed_form(n: int, s: int, d: int, plus: int, minus: int) -> float:
    """R_{sd,kl} (h/e^2) of the ring, k = plus and l = minus, derived independently of the LB
    matrix algebra.

    Every floating contact equilibrates the two channels that meet it, so each edge segment
    between neighbouring contacts acts as a resistor of h/e^2 (one channel each way), and
    the ring is a loop of n equal resistors. Current I from s to d splits over the two arcs
    in inverse proportion to their number of segments; the voltage of any contact follows by
    walking from d (grounded) along the arc that contains it.
    """
    def arc(a, b):  # contacts strictly after a and up to b, walking +1
        out, c = [], a
        while c != b:
            c = (c + 1) % n
            out.append(c)
        return out

    forward = arc(s, d)  # s -> d going +1: len(forward) segments
    n1 = len(forward)
    n2 = n - n1
    i1 = n2 / n  # current (per unit I) on the +1 arc
    i2 = n1 / n  # current on the -1 arc
    volt = {d: 0.0}
    # on the +1 arc, the voltage drops by i1 per segment from s towards d
    for steps_to_d, c in enumerate(reversed([s] + forward[:-1]), start=1):
        volt[c] = steps_to_d * i1
    backward = arc(d, s)  # d -> s going +1 is the -1 arc from s
    for steps_to_d, c in enumerate(backward[:-1], start=1):
        volt[c] = steps_to_d * i2
    return volt[plus] - volt[minus]


def test_roth_four_terminal_values():
    T = helical_ring(4)
    # Source: Roth et al., Science 325, 294 (2009): R14,23 = h/4e^2 and R14,14 = 3h/4e^2
    assert landauer.four_terminal_resistance(T, 0, 3, 1, 2) == pytest.approx(0.25, abs=1e-12)
    assert landauer.four_terminal_resistance(T, 0, 3, 0, 3) == pytest.approx(0.75, abs=1e-12)
    # the same paper's two-terminal value for a four-contact H-bar, 1->3: R13,13 = h/e^2
    assert landauer.four_terminal_resistance(T, 0, 2, 0, 2) == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("n", [2, 3, 4, 5, 6, 8])
def test_ring_general_result(n):
    T = helical_ring(n)
    for s, d, plus, minus in itertools.product(range(n), repeat=4):
        if s == d:
            continue
        expected = ring_resistance_closed_form(n, s, d, plus, minus)
        got = landauer.four_terminal_resistance(T, s, d, plus, minus)
        assert got == pytest.approx(expected, abs=1e-10), (n, s, d, plus, minus)


def test_two_terminal_ring_formula():
    # two-terminal resistance between contacts m segments apart: m (n - m) / n  (h/e^2)
    for n in range(2, 9):
        T = helical_ring(n)
        for m in range(1, n):
            g = landauer.two_terminal_conductance(T, 0, m)
            assert 1 / g == pytest.approx(m * (n - m) / n, rel=1e-12)


def test_sum_rules_and_stacking():
    rng = np.random.default_rng(7)
    T = rng.uniform(0, 1, size=(5, 4, 4))
    T = T + T.swapaxes(-1, -2)  # symmetric -> rows and columns sum alike
    G = landauer.conductance_matrix(T)
    np.testing.assert_allclose(G.sum(axis=-2), 0, atol=1e-12)
    np.testing.assert_allclose(G.sum(axis=-1), 0, atol=1e-12)
    stacked = landauer.four_terminal_resistance(T, 0, 2, 1, 3)
    single = [landauer.four_terminal_resistance(t, 0, 2, 1, 3) for t in T]
    np.testing.assert_allclose(stacked, single, rtol=1e-12)


def test_resistance_matrix_inverts_conductance():
    T = helical_ring(5) * 0.9 + 0.05
    R = landauer.resistance_matrix(T, reference=2)
    G = landauer.conductance_matrix(T)
    keep = [0, 1, 3, 4]
    np.testing.assert_allclose(R[np.ix_(keep, keep)] @ G[np.ix_(keep, keep)], np.eye(4), atol=1e-12)
    assert np.all(R[2] == 0) and np.all(R[:, 2] == 0)


def test_sum_rule_violation_is_reported():
    T = np.array([[0, 1.0], [0.5, 0]])
    with pytest.raises(TransportError, match="current conservation"):
        landauer.check_sum_rules(T)
    assert landauer.check_sum_rules(helical_ring(4)) < 1e-12


def test_disconnected_terminal_is_refused():
    T = helical_ring(3)
    T4 = np.zeros((4, 4))
    T4[:3, :3] = T  # terminal 4 sees nothing
    with pytest.raises(TransportError, match="singular"):
        landauer.four_terminal_resistance(T4, 0, 3, 1, 2)
    with pytest.raises(TransportError, match="same terminal"):
        landauer.four_terminal_resistance(T, 1, 1, 0, 2)
    with pytest.raises(TransportError, match="out of range"):
        landauer.four_terminal_resistance(T, 0, 5, 0, 2)


def test_von_klitzing_constant_in_ohm():
    # Source: SI Brochure, 9th edition (BIPM 2019): h = 6.62607015e-34 J s and
    # e = 1.602176634e-19 C exactly, so h/e^2 = 25812.807459... ohm exactly.
    exact = 6.62607015e-34 / 1.602176634e-19**2
    assert H_OVER_E2_OHM == pytest.approx(exact, rel=1e-15)
    assert H_OVER_E2_OHM == pytest.approx(sc.physical_constants["von Klitzing constant"][0], rel=1e-15)
    assert float(landauer.to_ohm(0.25)) == pytest.approx(exact / 4, rel=1e-15)


@pytest.mark.parametrize(
    "label, kind, contacts",
    [
        ("R14,23", "R", ("1", "4", "2", "3")),
        ("G14", "G", ("1", "4")),
        ("R(src,drn;a,b)", "R", ("src", "drn", "a", "b")),
        ("G(L, R)", "G", ("L", "R")),
    ],
)
def test_parse_measurement(label, kind, contacts):
    m = landauer.parse_measurement(label)
    assert (m.kind, m.contacts) == (kind, contacts)


@pytest.mark.parametrize("label", ["R14", "X14,23", "R1,23", "G1", "R(1,2)", ""])
def test_parse_measurement_rejects(label):
    with pytest.raises(TransportError, match="cannot read measurement"):
        landauer.parse_measurement(label)


def test_measurement_unknown_contact():
    m = landauer.parse_measurement("R15,23")
    with pytest.raises(TransportError, match="contact '5'"):
        m.evaluate(helical_ring(4), ("1", "2", "3", "4"))
