"""Property-based tests (hypothesis): the Landauer-Buttiker solver on random unitary
scattering matrices, and meshing of random valid polygons."""

import numpy as np
import shapely
from conftest import haar_unitary
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

import pipeline.transport.landauer as landauer
from pipeline.device.outline import Contact, Device, validate_device
from pipeline.errors import GeometryError
from pipeline.system.mesh import mesh_device


def _transmissions(S: np.ndarray, modes: list[int]) -> np.ndarray:
    edges = np.concatenate([[0], np.cumsum(modes)])
    n = len(modes)
    T = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            block = S[edges[i]:edges[i + 1], edges[j]:edges[j + 1]]
            T[i, j] = np.sum(np.abs(block) ** 2)
    return T


def _assert_reciprocal(T: np.ndarray, T_rev: np.ndarray, rng: np.random.Generator) -> None:
    """R_ij,kl from ``T`` equals R_kl,ij from ``T_rev`` for five random choices of contacts."""
    n = T.shape[0]
    for _ in range(5):
        source, drain = rng.choice(n, 2, replace=False)
        plus, minus = rng.choice(n, 2, replace=False)
        a = landauer.four_terminal_resistance(T, source, drain, plus, minus)
        b = landauer.four_terminal_resistance(T_rev, plus, minus, source, drain)
        assert abs(a - b) <= 1e-8 * max(1.0, abs(a)), (source, drain, plus, minus, a, b)


scattering = st.tuples(
    st.lists(st.integers(1, 3), min_size=2, max_size=5),
    st.integers(0, 2**32 - 1),
)


@settings(max_examples=60, deadline=None)
@given(scattering)
def test_sum_rules_and_positive_two_terminal_resistance(case):
    modes, seed = case
    S = haar_unitary(sum(modes), np.random.default_rng(seed))
    T = _transmissions(S, modes)
    G = landauer.conductance_matrix(T)
    # unitarity: every row and column of G sums to zero (Buttiker, PRL 57, 1761 (1986))
    np.testing.assert_allclose(G.sum(axis=0), 0, atol=1e-10)
    np.testing.assert_allclose(G.sum(axis=1), 0, atol=1e-10)
    landauer.check_sum_rules(T, rtol=1e-9)
    n = len(modes)
    for i in range(n):
        for j in range(n):
            if i != j:
                assert landauer.four_terminal_resistance(T, i, j, i, j) > 0


@settings(max_examples=40, deadline=None)
@given(scattering)
def test_reciprocity(case):
    # Source: Buttiker, Phys. Rev. Lett. 57, 1761 (1986): R_ij,kl(B) = R_kl,ij(-B); reversing
    # the field transposes the scattering matrix, S(-B) = S(B)^T.
    modes, seed = case
    assume(len(modes) >= 3)
    S = haar_unitary(sum(modes), np.random.default_rng(seed))
    T, T_rev = _transmissions(S, modes), _transmissions(S.T, modes)
    _assert_reciprocal(T, T_rev, np.random.default_rng(seed + 1))


@settings(max_examples=40, deadline=None)
@given(scattering)
def test_reciprocity_at_one_field_with_time_reversal_symmetry(case):
    # Source: Buttiker, Phys. Rev. Lett. 57, 1761 (1986): with time-reversal symmetry
    # (B = 0, S = S^T) the reciprocity relation holds at the same field, R_ij,kl = R_kl,ij.
    modes, seed = case
    assume(len(modes) >= 3)
    U = haar_unitary(sum(modes), np.random.default_rng(seed))
    T = _transmissions(U @ U.T, modes)  # U U^T is unitary and symmetric
    _assert_reciprocal(T, T, np.random.default_rng(seed + 1))


A = 5.0


@st.composite
def bumpy_strips(draw):
    """A strip with random rectangular bumps on top and an optional hole, contacts on the
    full left and right ends: always a valid device by construction."""
    nx = draw(st.integers(8, 30))
    ny = draw(st.integers(4, 12))
    poly = shapely.box(0, 0, nx * A, ny * A)
    for _ in range(draw(st.integers(0, 3))):
        x0 = draw(st.integers(1, nx - 4))
        w = draw(st.integers(3, max(3, min(8, nx - 1 - x0))))
        h = draw(st.integers(3, 8))
        poly = poly.union(shapely.box(x0 * A, ny * A, min(x0 + w, nx - 1) * A, (ny + h) * A))
    if draw(st.booleans()) and nx >= 14 and ny >= 10:
        hx = draw(st.integers(4, nx - 8))
        hy = draw(st.integers(4, ny - 6))
        poly = poly.difference(shapely.box(hx * A, hy * A, (hx + 2) * A, (hy + 2) * A))
    poly = shapely.Polygon(poly.exterior, [r for r in poly.interiors])
    contacts = (Contact("L", shapely.LineString([(0, 0), (0, ny * A)])),
                Contact("R", shapely.LineString([(nx * A, 0), (nx * A, ny * A)])))
    return Device("random", shapely.normalize(poly), contacts)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(bumpy_strips())
def test_meshing_random_polygons(device):
    try:
        validate_device(device, A)
    except GeometryError:
        assume(False)  # e.g. a bump narrower than the neck limit
    mesh = mesh_device(device, A)
    x, y = mesh.positions.T
    assert shapely.contains_xy(device.outline, x, y).all()  # every site inside
    # and every lattice point inside the outline is a site
    assert mesh.n_sites == round(device.outline.area / A**2)
    tags = {tuple(t) for t in mesh.tags.tolist()}
    for contact, cell, (nx, ny) in zip(device.contacts, mesh.lead_cells, mesh.lead_normals):
        assert len(cell) == round(contact.width / A)  # every contact attached, full width
        assert all((i - nx, j - ny) in tags and (i, j) not in tags for i, j in cell.tolist())
    # bonds only between nearest neighbours whose midpoint lies inside
    for bonds, d in ((mesh.bonds_x, (1, 0)), (mesh.bonds_y, (0, 1))):
        diff = mesh.tags[bonds[:, 1]] - mesh.tags[bonds[:, 0]]
        assert (diff == d).all()
