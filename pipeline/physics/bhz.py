"""The BHZ four-band model on a square lattice: the matrices every site and hopping carries.

Basis ``(E up, H up, E down, H down)``. The spin-up block is (Bernevig, Hughes, Zhang,
Science 314, 1757 (2006))::

    h(k) = eps(k) + A (k_x s_x - k_y s_y) + M(k) s_z,   eps = C - D k^2,   M(k) = M - B k^2

and the spin-down block is ``h*(-k)``. On a square lattice of constant ``a`` the standard
finite-difference discretisation ``k^2 -> (4 - 2 cos k_x a - 2 cos k_y a)/a^2``,
``k_i -> sin(k_i a)/a`` gives constant onsite and hopping matrices; in Kwant's convention
(``H[site + d, site] = T_d``) the Bloch Hamiltonian is ``H0 + sum_d (T_d e^{-ik.d} + h.c.)``.
The spin-down matrices are the complex conjugates of the spin-up ones (time reversal).

Terms that vary with the sweep (potential, Zeeman energy, exchange field, Peierls phases)
are separate functions so the system is finalized once and these enter through ``params``.
"""

from __future__ import annotations

import numpy as np

from pipeline.constants import MU_B_MEV_PER_T
from pipeline.physics.materials import BHZParameters

__all__ = ['PAULI', 'lattice_matrices', 'zeeman_matrix', 'exchange_matrices', 'bia_matrix', 'bloch_hamiltonian', 'continuum_hamiltonian', 'continuum_bulk_gap', 'edge_dirac_point', 'edge_velocity', 'edge_decay_constants']

_s0 = np.eye(2, dtype=complex)
_sx = np.array([[0, 1], [1, 0]], dtype=complex)
_sy = np.array([[0, -1j], [1j, 0]], dtype=complex)
_sz = np.array([[1, 0], [0, -1]], dtype=complex)

#: Pauli matrices (s0, sx, sy, sz)
PAULI = (_s0, _sx, _sy, _sz)


def _spin_blocks(up: np.ndarray) -> np.ndarray:
    """4x4 block-diagonal matrix (up, conj(up))."""
    out = np.zeros((4, 4), dtype=complex)
    out[:2, :2] = up
    out[2:, 2:] = up.conj()
    return out


def lattice_matrices(p: BHZParameters, a: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Onsite matrix and the hoppings along +x and +y (meV) for lattice constant ``a`` (nm).

    BIA, when present, is included in the onsite matrix.
    """
    onsite_up = (p.C - 4 * p.D / a**2) * _s0 + (p.M - 4 * p.B / a**2) * _sz
    curv = (p.D * _s0 + p.B * _sz) / a**2
    hop_x_up = curv + 1j * p.A / (2 * a) * _sx
    hop_y_up = curv - 1j * p.A / (2 * a) * _sy
    onsite = _spin_blocks(onsite_up) + bia_matrix(p.delta_bia)
    return onsite, _spin_blocks(hop_x_up), _spin_blocks(hop_y_up)


def bia_matrix(delta: float) -> np.ndarray:
    """Bulk-inversion-asymmetry coupling between opposite spins (Koenig et al., JPSJ 77,
    031007 (2008)): couples E up with H down and H up with E down; breaks S_z conservation."""
    m = np.zeros((4, 4), dtype=complex)
    m[0, 3] = m[3, 0] = -delta
    m[1, 2] = m[2, 1] = delta
    return m


def zeeman_matrix(p: BHZParameters, b_perp: float) -> np.ndarray:
    """Zeeman energy of a perpendicular field ``b_perp`` (T), separate g-factors for E and H."""
    half = 0.5 * MU_B_MEV_PER_T * b_perp
    return np.diag([p.g_E * half, p.g_H * half, -p.g_E * half, -p.g_H * half]).astype(complex)


def exchange_matrices(field: np.ndarray) -> np.ndarray:
    """Exchange coupling ``m . s`` (meV) acting on spin, the same on E and H bands.

    ``field`` has shape (..., 3) with components (m_x, m_y, m_z); the result (..., 4, 4).
    Only m_z conserves S_z; in-plane components mix the spins and allow backscattering.
    """
    field = np.asarray(field, dtype=float)
    spin = np.stack([np.kron(s, _s0) for s in (_sx, _sy, _sz)])  # (3, 4, 4)
    return np.einsum("...c,cij->...ij", field, spin)


def bloch_hamiltonian(p: BHZParameters, a: float, kx: np.ndarray, ky: np.ndarray) -> np.ndarray:
    """Lattice Bloch Hamiltonian H(k) (shape (..., 4, 4)) for wavevectors in 1/nm."""
    onsite, tx, ty = lattice_matrices(p, a)
    kx = np.asarray(kx, dtype=float)[..., None, None]
    ky = np.asarray(ky, dtype=float)[..., None, None]
    hx = tx * np.exp(-1j * kx * a)
    hy = ty * np.exp(-1j * ky * a)
    h = onsite + hx + hy
    return h + (hx + hy).conj().swapaxes(-1, -2)


def continuum_hamiltonian(p: BHZParameters, kx: np.ndarray, ky: np.ndarray) -> np.ndarray:
    """Continuum BHZ Hamiltonian H(k) (shape (..., 4, 4)) for wavevectors in 1/nm."""
    kx = np.asarray(kx, dtype=float)[..., None, None]
    ky = np.asarray(ky, dtype=float)[..., None, None]
    k2 = kx**2 + ky**2
    up = (p.C - p.D * k2) * _s0 + p.A * (kx * _sx - ky * _sy) + (p.M - p.B * k2) * _sz
    down = (p.C - p.D * k2) * _s0 + p.A * (-kx * _sx - ky * _sy) + (p.M - p.B * k2) * _sz
    out = np.zeros(np.broadcast(kx, ky).shape[:-2] + (4, 4), dtype=complex)
    out[..., :2, :2] = up
    out[..., 2:, 2:] = down
    return out + bia_matrix(p.delta_bia)


def continuum_bulk_gap(p: BHZParameters, k_max: float | None = None, n: int = 4001):
    """Bulk gap (meV) of the continuum model and the band edges (E_valence_top, E_conduction_bottom).

    The BHZ bands depend on |k| only (without BIA): E = eps(k) +- sqrt(A^2 k^2 + M(k)^2).
    The gap is indirect when D != 0, so it is found on a dense radial grid.
    """
    if k_max is None:
        k_max = 4 * np.sqrt(abs(p.M / p.B)) + 4 * abs(p.A / p.B) + 0.5
    k = np.linspace(0, k_max, n)
    eps = p.C - p.D * k**2
    root = np.sqrt((p.A * k) ** 2 + (p.M - p.B * k**2) ** 2)
    top, bottom = float(np.max(eps - root)), float(np.min(eps + root))
    return bottom - top, top, bottom


def edge_dirac_point(p: BHZParameters) -> float:
    """Energy of the helical edge-state crossing, E0 = C - M D / B (meV).

    Source: Zhou et al., Phys. Rev. Lett. 101, 246807 (2008).
    """
    return p.C - p.M * p.D / p.B


def edge_velocity(p: BHZParameters) -> float:
    """hbar v of the helical edge states, A sqrt(B^2 - D^2)/|B| (meV nm).

    Source: Zhou et al., Phys. Rev. Lett. 101, 246807 (2008).
    """
    return p.A * np.sqrt(p.B**2 - p.D**2) / abs(p.B)


def edge_decay_constants(p: BHZParameters, energy: float | None = None) -> np.ndarray:
    """The two (complex) inverse decay lengths lambda_1,2 (1/nm) of the edge state at k = 0.

    lambda^2 = F +- sqrt(F^2 - (M^2 - E^2)/(B^2 - D^2)),
    F = (A^2 - 2 (M B + E D)) / (2 (B^2 - D^2)), with E measured from C
    (Zhou et al., Phys. Rev. Lett. 101, 246807 (2008)). The slower decay, min Re(lambda),
    sets how wide a strip must be for its two edges not to couple.
    """
    e = (edge_dirac_point(p) if energy is None else energy) - p.C
    b2d2 = p.B**2 - p.D**2
    F = (p.A**2 - 2 * (p.M * p.B + e * p.D)) / (2 * b2d2)
    disc = np.sqrt(complex(F**2 - (p.M**2 - e**2) / b2d2))
    return np.sqrt(np.array([F + disc, F - disc], dtype=complex))
