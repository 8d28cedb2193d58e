"""Long edges by composing the scattering matrices of independent disordered segments.

A direct scattering solve of a strip costs time roughly proportional to its length, and a
10-100 um edge at a lattice constant of a few nm is far beyond a routine ensemble. Instead a
*pool* of short disordered segments is solved once -- each a strip of the device's
cross-section (width ``W``, length ``l``) carrying the run's disorder model, attached to clean
leads of the same cross-section and material -- and random sequences drawn from the pool are
composed into edges of length ``n l``:

* **coherently**, with the composition rule for scattering matrices (the Redheffer star
  product) over the clean lead's propagating modes: the phase of every multiply reflected
  wave is kept, so interference (and with it localisation) is included;
* **incoherently**, with the same rule applied to the matrices of mode-resolved
  probabilities ``|S_ij|^2``: full dephasing between segments, i.e. classical addition of
  the segments as series resistors channel by channel.

Mode basis
----------
Kwant gives each lead's modes in a basis of its own: the left lead of a segment (symmetry
vector ``-a x``) and the right lead (``+a x``) are different eigenproblems, and where several
modes share a momentum Kwant picks an arbitrary orthonormal basis of them. Composition needs
one basis on both sides of every junction, so each S-matrix is rewritten in a *canonical
basis* of the clean strip (:class:`ModeBasis`):

1. the propagating modes of the right lead are taken and, inside each group of equal
   momentum, rotated to diagonalise the projected S_z operator and then the transverse
   position ``y``; each mode's phase is fixed by making its largest component real positive.
   For the helical edge in the gap this gives one mode per (edge, spin);
2. Kwant's mode amplitudes of each lead are mapped onto it by matching the wave functions on
   two neighbouring columns (least squares; the residual and the unitarity of the map are
   checked). Amplitudes of a segment occupying columns ``0 .. N-1`` refer to column 0 on its
   left side and column ``N`` on its right side, so the right reference of one segment is
   the left reference of the next one and the star product needs no phase at the junction;
3. a clean solve of the same strip calibrates the result: it must give ``r = 0`` and
   ``t = diag(exp(i k_n N))`` up to one common phase (non-zero only in a field, where it is
   the gauge phase of the scattering region relative to the leads, which is removed). A
   failure of this check raises :class:`~pipeline.errors.TransportError` instead of giving
   wrong numbers.

All segments come from ONE finalized strip system with precalculated leads and differ only
in their ``params`` (the onsite matrices), so they share the lead modes exactly; the
canonical basis is kept with the segments, so sets computed in separate processes can be
checked for compatibility (:func:`merge_segments`).

Boundaries
----------
A segment's disorder leaves evanescent waves that the composition drops. Each segment
therefore holds ``b`` clean cells at both ends inside its scattering region, so the
disordered parts of neighbouring segments are ``2 b`` apart. The slowest evanescent mode of
the clean lead at the energy decays by ``exp(-2 b / l_ev)`` over that gap, with ``l_ev = a /
min |ln |lambda||`` over the evanescent eigenvalues ``lambda`` of the lead's transfer matrix;
the error of the composed S-matrix is of that order (measured: see docs/concatenation.md).

Units: lengths nm, energies meV, fields T, conductance e^2/h (the sum of ``|t|^2`` over all
modes, both spins: 2 for a clean strip in the gap).
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import warnings
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from .errors import ModelError, StoreError, TransportError
from .materials import BHZParameters

__all__ = [
    "ConcatenationWarning",
    "SMatrix",
    "ProbabilityMatrix",
    "ModeBasis",
    "SegmentSet",
    "EVANESCENT_TOLERANCE",
    "EDGE_WIDTH_FACTOR",
    "evanescent_length",
    "segment_smatrices",
    "merge_segments",
    "compose_coherent",
    "compose_incoherent",
    "concatenated_conductance",
    "joined_smatrix",
    "direct_conductance",
    "lstar_dataset",
    "save_segments",
    "load_segments",
]

#: Largest allowed bound exp(-gap / l_ev) on the evanescent coupling of neighbouring
#: segments before a warning (and the default target of the automatic buffer).
EVANESCENT_TOLERANCE: float = 1e-6
#: A strip must be this many edge-state decay lengths wide for its two edges not to couple
#: (common practice, no source).
EDGE_WIDTH_FACTOR: float = 4.0

# |ln|lambda|| below this counts as a propagating mode (|lambda| = 1).
_PROPAGATING_TOL = 1e-6
# Momenta (rad per cell) closer than this are one degenerate group.
_DEGENERATE_TOL = 1e-7
# Relative residual allowed when matching Kwant's lead modes onto the canonical ones.
_MATCH_TOL = 1e-8
# Allowed deviation of the clean-strip calibration from r = 0, t = phase * diag(exp(ikN)).
_CALIBRATION_TOL = 1e-7
# Memory (bytes) one batch of sequences may use while composing.
_BATCH_BYTES = 256 * 2**20
_FORMAT = "helisweep-segments/1"
_BLOCKS = ("r", "t", "tp", "rp")


class ConcatenationWarning(UserWarning):
    """A segment set or composition is outside the regime where it is accurate."""


# --------------------------------------------------------------------------------------------
# Scattering and probability matrices
# --------------------------------------------------------------------------------------------


def _frozen(x: np.ndarray) -> np.ndarray:
    x = np.array(x)
    x.setflags(write=False)
    return x


def _check_blocks(owner: str, r, t, tp, rp, dtype) -> tuple[np.ndarray, ...]:
    r, t, tp, rp = (np.asarray(x, dtype=dtype) for x in (r, t, tp, rp))
    if min(x.ndim for x in (r, t, tp, rp)) < 2:
        raise TransportError(
            f"{owner} blocks must be matrices (..., out, in), got shapes "
            f"{[x.shape for x in (r, t, tp, rp)]!r}; pass 2-d (or batched) arrays"
        )
    n_left, n_right = r.shape[-1], rp.shape[-1]
    want = {"r": (n_left, n_left), "t": (n_right, n_left), "tp": (n_left, n_right),
            "rp": (n_right, n_right)}
    for name, x in zip(_BLOCKS, (r, t, tp, rp)):
        if x.shape[-2:] != want[name]:
            raise TransportError(
                f"{owner} block {name!r} has shape {x.shape!r}, expected (..., "
                f"{want[name][0]}, {want[name][1]}) for {n_left} left and {n_right} right modes; "
                "pass r (left<-left), t (right<-left), tp (left<-right), rp (right<-right)"
            )
    try:
        batch = np.broadcast_shapes(*(x.shape[:-2] for x in (r, t, tp, rp)))
    except ValueError:
        raise TransportError(
            f"{owner} blocks have incompatible batch shapes "
            f"{[x.shape[:-2] for x in (r, t, tp, rp)]!r}; give all four the same leading axes"
        ) from None
    return tuple(_frozen(np.broadcast_to(x, batch + x.shape[-2:])) for x in (r, t, tp, rp))


@dataclass(frozen=True, eq=False)
class SMatrix:
    """A two-sided scattering matrix ``S = [[r, tp], [t, rp]]`` in a fixed mode basis.

    Parameters
    ----------
    r : numpy.ndarray
        Reflection back to the left of waves incoming from the left, shape (..., nL, nL).
    t : numpy.ndarray
        Transmission left -> right, shape (..., nR, nL).
    tp : numpy.ndarray
        Transmission right -> left (``t'``), shape (..., nL, nR).
    rp : numpy.ndarray
        Reflection back to the right of waves incoming from the right (``r'``),
        shape (..., nR, nR).

    Notes
    -----
    Element ``[i, j]`` of a block is the amplitude of outgoing mode ``i`` for unit incoming
    amplitude in mode ``j`` (modes normalised to unit current). Leading axes are a batch of
    independent matrices. The arrays are stored read-only.
    """

    r: np.ndarray
    t: np.ndarray
    tp: np.ndarray
    rp: np.ndarray

    def __post_init__(self) -> None:
        blocks = _check_blocks("SMatrix", self.r, self.t, self.tp, self.rp, complex)
        for name, x in zip(_BLOCKS, blocks):
            object.__setattr__(self, name, x)

    @property
    def batch_shape(self) -> tuple[int, ...]:
        """Leading (batch) axes."""
        return self.r.shape[:-2]

    @property
    def n_left(self) -> int:
        """Number of modes on the left side (per direction)."""
        return self.r.shape[-1]

    @property
    def n_right(self) -> int:
        """Number of modes on the right side (per direction)."""
        return self.rp.shape[-1]

    def __getitem__(self, index) -> "SMatrix":
        """The matrix (or sub-batch) at a batch index."""
        if not self.batch_shape:
            raise TransportError("this SMatrix has no batch axis to index; it is one matrix")
        return SMatrix(self.r[index], self.t[index], self.tp[index], self.rp[index])

    def matrix(self) -> np.ndarray:
        """The full matrix ``[[r, tp], [t, rp]]``, shape (..., nL + nR, nL + nR)."""
        top = np.concatenate([self.r, self.tp], axis=-1)
        bottom = np.concatenate([self.t, self.rp], axis=-1)
        return np.concatenate([top, bottom], axis=-2)

    def conductance(self) -> np.ndarray | float:
        """Two-terminal conductance ``sum |t_ij|^2`` (e^2/h), shape of the batch."""
        g = np.sum(np.abs(self.t) ** 2, axis=(-2, -1))
        return float(g) if np.ndim(g) == 0 else g

    def unitarity_error(self) -> np.ndarray | float:
        """Spectral norm ``||S^dagger S - 1||_2`` (0 for an exactly unitary S), batch shape."""
        s = self.matrix()
        d = np.swapaxes(s.conj(), -1, -2) @ s - np.eye(s.shape[-1])
        err = np.linalg.norm(d, ord=2, axis=(-2, -1))
        return float(err) if np.ndim(err) == 0 else err

    def probabilities(self) -> "ProbabilityMatrix":
        """The mode-resolved probabilities ``|S_ij|^2`` as a :class:`ProbabilityMatrix`."""
        return ProbabilityMatrix(*(np.abs(x) ** 2 for x in (self.r, self.t, self.tp, self.rp)))


@dataclass(frozen=True, eq=False)
class ProbabilityMatrix:
    """Mode-resolved probabilities ``P = [[R, Tp], [T, Rp]]`` (``R_ij = |r_ij|^2`` etc.).

    Parameters
    ----------
    R, T, Tp, Rp : numpy.ndarray
        Shapes as the blocks of :class:`SMatrix`: (..., nL, nL), (..., nR, nL), (..., nL, nR),
        (..., nR, nR); real, non-negative.
    """

    R: np.ndarray
    T: np.ndarray
    Tp: np.ndarray
    Rp: np.ndarray

    def __post_init__(self) -> None:
        blocks = _check_blocks("ProbabilityMatrix", self.R, self.T, self.Tp, self.Rp, float)
        for name, x in zip(("R", "T", "Tp", "Rp"), blocks):
            object.__setattr__(self, name, x)

    @property
    def batch_shape(self) -> tuple[int, ...]:
        """Leading (batch) axes."""
        return self.R.shape[:-2]

    def conductance(self) -> np.ndarray | float:
        """Two-terminal conductance ``sum T_ij`` (e^2/h), shape of the batch."""
        g = np.sum(self.T, axis=(-2, -1))
        return float(g) if np.ndim(g) == 0 else g

    def conservation_error(self) -> np.ndarray | float:
        """Largest ``|sum_i P_ij - 1|`` over incoming modes ``j`` (0: current conserved)."""
        left = np.sum(self.R, axis=-2) + np.sum(self.T, axis=-2)
        right = np.sum(self.Tp, axis=-2) + np.sum(self.Rp, axis=-2)
        err = np.max(np.abs(np.concatenate([left, right], axis=-1) - 1.0), axis=-1)
        return float(err) if np.ndim(err) == 0 else err


def _star(a: tuple, b: tuple) -> tuple:
    """Redheffer star product of block tuples ``(r, t, tp, rp)`` (``a`` left of ``b``).

    Works for amplitudes (coherent) and for probability matrices (incoherent) alike, and
    for batches (leading axes broadcast). Inverses are never formed: two linear solves.
    """
    r1, t1, tp1, rp1 = a
    r2, t2, tp2, rp2 = b
    one = np.eye(rp1.shape[-1], dtype=np.result_type(rp1, r2))
    x = np.linalg.solve(one - rp1 @ r2, t1)  # (1 - r1' r2)^-1 t1: right-movers in the junction
    y = np.linalg.solve(one - r2 @ rp1, tp2)  # (1 - r2 r1')^-1 t2': left-movers in the junction
    return (r1 + tp1 @ (r2 @ x), t2 @ x, tp1 @ y, rp2 + t2 @ (rp1 @ y))


def _tree(blocks: list[tuple]) -> tuple:
    """Compose a chain of block tuples (left to right) in a balanced binary tree."""
    if not blocks:
        raise TransportError("cannot compose an empty list of segments; pass at least one")
    level = list(blocks)
    while len(level) > 1:
        nxt = [_star(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


def _as_chain(segments, kind: str) -> list[tuple]:
    if isinstance(segments, (SMatrix, ProbabilityMatrix)):
        if not segments.batch_shape:
            items = [segments]
        else:
            items = [segments[i] if isinstance(segments, SMatrix)
                     else ProbabilityMatrix(segments.R[i], segments.T[i], segments.Tp[i],
                                            segments.Rp[i])
                     for i in range(segments.batch_shape[0])]
    else:
        items = list(segments)
    out = []
    for k, s in enumerate(items):
        if isinstance(s, SMatrix):
            out.append((s.r, s.t, s.tp, s.rp) if kind == "coherent" else
                       tuple(np.abs(x) ** 2 for x in (s.r, s.t, s.tp, s.rp)))
        elif isinstance(s, ProbabilityMatrix) and kind == "incoherent":
            out.append((s.R, s.T, s.Tp, s.Rp))
        else:
            raise TransportError(
                f"segment {k} is {type(s).__name__!r}; compose_{kind} takes SMatrix objects"
                + (" or ProbabilityMatrix objects" if kind == "incoherent" else "")
            )
    for k in range(len(out) - 1):
        if out[k][3].shape[-1] != out[k + 1][0].shape[-1]:
            raise TransportError(
                f"segment {k} has {out[k][3].shape[-1]} modes on its right side but segment "
                f"{k + 1} has {out[k + 1][0].shape[-1]} on its left; neighbouring segments must "
                "share the clean lead between them"
            )
    return out


def compose_coherent(segments: Sequence[SMatrix] | SMatrix) -> SMatrix:
    """Compose scattering matrices left to right with the Redheffer star product.

    Parameters
    ----------
    segments : sequence of SMatrix, or SMatrix with a leading batch axis
        The segments in order from left to right, all in one mode basis (the right side of
        each in the basis of the left side of the next). Each may itself be batched (the
        batch axes broadcast): one chain per batch entry.

    Returns
    -------
    SMatrix
        The composed matrix, ``t = t2 (1 - r1' r2)^-1 t1``, ``r = r1 + t1' r2 (1 - r1' r2)^-1
        t1``, ``t' = t1' (1 - r2 r1')^-1 t2'``, ``r' = r2' + t2 r1' (1 - r2 r1')^-1 t2'``,
        evaluated in a balanced binary tree with linear solves.
    """
    return SMatrix(*_tree(_as_chain(segments, "coherent")))


def compose_incoherent(segments: Sequence[SMatrix | ProbabilityMatrix] | SMatrix
                       ) -> ProbabilityMatrix:
    """Compose segments classically (full dephasing between them), left to right.

    Parameters
    ----------
    segments : sequence of SMatrix or ProbabilityMatrix, or a batched SMatrix
        As for :func:`compose_coherent`; amplitudes are turned into ``|S_ij|^2``.

    Returns
    -------
    ProbabilityMatrix
        The star product of the probability matrices (``T = T2 (1 - R1' R2)^-1 T1`` etc.):
        the sum over all multiple-reflection paths with intensities added instead of
        amplitudes, channel by channel in the mode basis of the segments.
    """
    return ProbabilityMatrix(*_tree(_as_chain(segments, "incoherent")))


# --------------------------------------------------------------------------------------------
# Lead modes, canonical basis, evanescent decay
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class ModeBasis:
    """The canonical basis of the propagating modes of a clean strip at one energy and field.

    Parameters
    ----------
    right_wave, left_wave : numpy.ndarray
        Wave functions of the right- and left-moving modes on one column of the strip, shape
        (4 W/a, m): rows are the sites from bottom (y = a/2) to top, 4 orbitals each (E up,
        H up, E down, H down); each column carries unit current.
    right_momentum, left_momentum : numpy.ndarray
        Momentum along +x of each mode, radians per lattice constant, shape (m,): the wave is
        ``wave * exp(i k (x - x_ref) / a)``.
    right_sz, left_sz : numpy.ndarray
        Expectation value of S_z (+1 up, -1 down) of each mode, shape (m,).
    right_y, left_y : numpy.ndarray
        Mean transverse position of each mode (nm), shape (m,): which edge it runs along.
    """

    right_wave: np.ndarray
    right_momentum: np.ndarray
    left_wave: np.ndarray
    left_momentum: np.ndarray
    right_sz: np.ndarray
    right_y: np.ndarray
    left_sz: np.ndarray
    left_y: np.ndarray

    def __post_init__(self) -> None:
        for name in ("right_wave", "right_momentum", "left_wave", "left_momentum", "right_sz",
                     "right_y", "left_sz", "left_y"):
            object.__setattr__(self, name, _frozen(getattr(self, name)))

    @property
    def n_modes(self) -> int:
        """Number of propagating modes per direction."""
        return self.right_momentum.size

    def max_difference(self, other: "ModeBasis") -> float:
        """Largest absolute difference of wave functions and momenta to another basis."""
        if (self.right_wave.shape != other.right_wave.shape
                or self.left_wave.shape != other.left_wave.shape):
            return math.inf
        return float(max(np.max(np.abs(getattr(self, k) - getattr(other, k)), initial=0.0)
                         for k in ("right_wave", "right_momentum", "left_wave", "left_momentum")))


def _transfer_eigenvalues(lead, energy: float, params: dict) -> np.ndarray:
    """Eigenvalues ``lambda`` (psi_{j+1} = lambda psi_j) of a nearest-cell lead at ``energy``."""
    import scipy.linalg as sla

    h0 = np.asarray(lead.cell_hamiltonian(params=params))
    v = np.asarray(lead.inter_cell_hopping(params=params))
    n = h0.shape[0]
    if v.shape != (n, n):
        raise ModelError(
            f"the lead hopping has shape {v.shape!r}, not ({n}, {n}); the evanescent-mode "
            "analysis needs a lead whose cell couples to one whole neighbouring cell"
        )
    zero, one = np.zeros((n, n)), np.eye(n)
    # V^dagger psi_{j-1} + (H0 - E) psi_j + V psi_{j+1} = 0 (either orientation of V gives the
    # same set of |lambda| pairs, lambda and 1/lambda*).
    lhs = np.block([[-(h0 - energy * one), -v.conj().T], [one, zero]])
    rhs = np.block([[v, zero], [zero, one]])
    lam = sla.eigvals(lhs, rhs)
    return lam[np.isfinite(lam) & (lam != 0)]


def _decay_length(lam: np.ndarray, a: float) -> tuple[float, int]:
    """(l_ev in nm, number of propagating eigenvalues) from transfer eigenvalues."""
    rate = np.abs(np.log(np.abs(lam)))
    evanescent = rate[rate > _PROPAGATING_TOL]
    n_prop = int(np.sum(rate <= _PROPAGATING_TOL))
    if evanescent.size == 0:
        return 0.0, n_prop
    return float(a / evanescent.min()), n_prop


def _lead_params(dsys, b_perp: float) -> dict:
    out = {"onsite_stack": None}
    if dsys.with_field:
        out["b_perp"] = float(b_perp)
        out.update(dsys.peierls_phases(b_perp))
    return out


def evanescent_length(material: BHZParameters, lattice_constant: float, width: float,
                      energy: float, *, b_perp: float = 0.0) -> float:
    """Decay length (nm) of the slowest evanescent mode of a clean strip at ``energy``.

    Parameters
    ----------
    material : BHZParameters
    lattice_constant : float
        ``a`` (nm).
    width : float
        Strip width (nm), a multiple of ``a``.
    energy : float
        Fermi energy (meV).
    b_perp : float, optional
        Perpendicular field (T).

    Returns
    -------
    float
        ``l_ev = a / min |ln |lambda||`` over the evanescent eigenvalues of the lead's transfer
        matrix: an evanescent wave falls off as ``exp(-x / l_ev)`` (0 when there is none).
    """
    from .geometry import two_terminal_strip
    from .mesh import build_system

    a = _positive("lattice_constant", lattice_constant, "nm")
    cols = _columns("width", width, a)
    # a few columns: Kwant's magnetic gauge needs the two leads apart
    dsys = build_system(two_terminal_strip(4 * a, cols * a), material, a, with_field=b_perp != 0.0)
    lam = _transfer_eigenvalues(dsys.fsyst.leads[1], float(energy), _lead_params(dsys, b_perp))
    return _decay_length(lam, a)[0]


def _cell_permutation(lead, norbs: int = 4) -> tuple[np.ndarray, np.ndarray]:
    """Orbital permutation putting a lead cell in bottom-to-top order, and the site y (nm)."""
    cs = lead.cell_size
    ys = np.array([lead.sites[k].pos[1] for k in range(cs)], dtype=float)
    order = np.argsort(ys, kind="stable")
    perm = (norbs * order[:, None] + np.arange(norbs)).ravel()
    return perm, ys[order]


def _match(src_wave, src_k, src_ref, dst_wave, dst_k, dst_ref) -> np.ndarray:
    """Matrix M with dst amplitudes = M @ src amplitudes for the same propagating waves.

    A set of modes is (wave (dim, m), momentum per column (m,), reference column); the wave
    at column c is ``sum_n amp_n wave_n exp(i k_n (c - ref))``. The two sets must span the
    same solutions of the clean strip; they are matched on two neighbouring columns.
    """
    cols = (float(dst_ref), float(dst_ref) + 1.0)
    src = np.concatenate([src_wave * np.exp(1j * src_k * (c - src_ref)) for c in cols])
    dst = np.concatenate([dst_wave * np.exp(1j * dst_k * (c - dst_ref)) for c in cols])
    m, *_ = np.linalg.lstsq(dst, src, rcond=None)
    residual = np.linalg.norm(dst @ m - src) / max(np.linalg.norm(src), 1e-300)
    unitary = np.linalg.norm(m.conj().T @ m - np.eye(m.shape[1]), ord=2) if m.size else 0.0
    if residual > _MATCH_TOL or unitary > _MATCH_TOL:
        raise TransportError(
            f"the lead modes could not be mapped onto the canonical basis (residual "
            f"{residual:.3g}, non-unitarity {unitary:.3g}, tolerance {_MATCH_TOL:g}): the two "
            "leads of the strip do not describe the same clean wire. This happens when the "
            "gauge of a field differs between the leads; compose at b_perp = 0"
        )
    return m


def _rotate(block: np.ndarray, op: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rotate a set of degenerate modes to diagonalise a diagonal operator projected on them."""
    proj = block.conj().T @ (op[:, None] * block)
    vals, vecs = np.linalg.eigh(0.5 * (proj + proj.conj().T))
    return block @ vecs, vals


def _canonicalise(wave: np.ndarray, k: np.ndarray, sz: np.ndarray, y: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Deterministic basis of the modes moving one way.

    Kwant chooses an arbitrary orthonormal basis among modes of equal momentum; here each
    such group is rotated to diagonalise S_z projected on it, then ``y`` inside groups of
    equal S_z. Modes of equal momentum have equal velocity, so the rotations are unitary and
    keep the unit-current normalisation. Each mode's largest component is made real positive
    and the modes are sorted by (momentum, -S_z, y).
    """
    order = np.argsort(k, kind="stable")
    out, k = wave[:, order].copy(), k[order]
    start = 0
    while start < k.size:
        stop = start + 1
        while stop < k.size and abs(k[stop] - k[start]) < _DEGENERATE_TOL:
            stop += 1
        if stop - start > 1:
            block, vals = _rotate(out[:, start:stop], sz)
            tol = 1e-6 * max(1.0, float(np.abs(vals).max()))
            runs = np.split(np.arange(vals.size), np.flatnonzero(np.diff(vals) > tol) + 1)
            for run in runs:
                if run.size > 1:
                    block[:, run] = _rotate(block[:, run], y)[0]
            out[:, start:stop] = block
        start = stop
    for n in range(out.shape[1]):
        col = out[:, n]
        big = col[np.argmax(np.abs(col))]
        out[:, n] = col * (abs(big) / big)
    msz, my = _mode_labels(out, sz, y)
    key = np.lexsort((np.round(my, 6), np.round(-msz, 6), np.round(k, 9)))
    return out[:, key], k[key]


def _mode_labels(wave: np.ndarray, sz: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, ...]:
    w = np.abs(wave) ** 2
    norm = np.sum(w, axis=0)
    return np.sum(sz[:, None] * w, axis=0) / norm, np.sum(y[:, None] * w, axis=0) / norm


class _StripScatterer:
    """One finalized clean-lead strip of ``n_columns`` columns and its canonical-basis maps.

    ``doping`` maps "L"/"R" to the band shift of that lead (meV); a doped side keeps Kwant's
    own lead basis, an undoped side is written in the canonical basis ``basis`` (computed
    here from the right lead when not given).
    """

    def __init__(self, material, a, rows, n_columns, energy, b_perp, *, doping=None,
                 basis: ModeBasis | None = None, calibrate: bool = True):
        from .geometry import two_terminal_strip
        from .mesh import build_system
        from .transport import _SOLVER

        self.solver = _SOLVER
        self.a, self.rows, self.n_columns = a, rows, n_columns
        self.energy, self.b_perp = float(energy), float(b_perp)
        doping = dict(doping or {})
        self.doped = {side: float(doping.get(side, 0.0)) != 0.0 for side in ("L", "R")}
        self.device = two_terminal_strip(n_columns * a, rows * a)
        self.dsys = build_system(self.device, material, a, contact_doping=doping or 0.0,
                                 with_field=b_perp != 0.0)
        lead_params = _lead_params(self.dsys, b_perp)
        self.fsyst = self.dsys.fsyst.precalculate(self.energy, params=lead_params)
        leads = self.dsys.fsyst.leads
        modes = [self.fsyst.leads[i].modes(self.energy, params=lead_params)[0] for i in (0, 1)]
        perm_y = [_cell_permutation(leads[i]) for i in (0, 1)]
        y_sites = perm_y[1][1]
        self.sz_op = np.tile([1.0, 1.0, -1.0, -1.0], rows)
        self.y_op = np.repeat(y_sites, 4)
        # Kwant's mode amplitudes refer to the system column next to the lead (calibrated by
        # the clean solve below): column 0 for the left lead, N - 1 for the right one.
        sets = []
        for i, (direction, ref) in enumerate(((-1.0, 0.0), (1.0, n_columns - 1.0))):
            wf = modes[i].wave_functions[perm_y[i][0]]
            k = direction * np.asarray(modes[i].momenta, dtype=float)
            m = k.size // 2
            sets.append({"in": (wf[:, :m], k[:m], ref), "out": (wf[:, m:], k[m:], ref), "m": m})
        self.n_modes = (sets[0]["m"], sets[1]["m"])
        if basis is None:
            if self.doped["R"]:
                raise ModelError("the canonical basis is taken from an undoped right lead")
            right, kr = _canonicalise(*sets[1]["out"][:2], self.sz_op, self.y_op)
            left, kl = _canonicalise(*sets[1]["in"][:2], self.sz_op, self.y_op)
            rsz, ry = _mode_labels(right, self.sz_op, self.y_op)
            lsz, ly = _mode_labels(left, self.sz_op, self.y_op)
            basis = ModeBasis(right, kr, left, kl, rsz, ry, lsz, ly)
        self.basis = basis
        b, n = basis, float(n_columns)
        eye_l, eye_r = (np.eye(s["m"], dtype=complex) for s in sets)
        # canonical amplitudes: left side referred to column 0, right side to column N
        self.l_in = eye_l if self.doped["L"] else _match(
            b.right_wave, b.right_momentum, 0.0, *sets[0]["in"])
        self.l_out = eye_l if self.doped["L"] else _match(
            *sets[0]["out"], b.left_wave, b.left_momentum, 0.0)
        self.r_in = eye_r if self.doped["R"] else _match(
            b.left_wave, b.left_momentum, n, *sets[1]["in"])
        self.r_out = eye_r if self.doped["R"] else _match(
            *sets[1]["out"], b.right_wave, b.right_momentum, n)
        self.gauge_phase = 0.0
        self.calibration_error = math.nan
        if calibrate and not (self.doped["L"] or self.doped["R"]):
            self.calibrate()

    def calibrate(self) -> None:
        """Check the conventions on the clean strip and remove the gauge phase (see module)."""
        s = self.solve(self.dsys.params(b_perp=self.b_perp))
        expected = np.exp(1j * self.basis.right_momentum * self.n_columns)
        phase = np.sum(np.diag(s.t) * expected.conj())
        phase = phase / abs(phase) if abs(phase) > 0 else 1.0
        err = max(float(np.max(np.abs(s.t - phase * np.diag(expected)))),
                  float(np.max(np.abs(s.r))), float(np.max(np.abs(s.rp))))
        if err > _CALIBRATION_TOL:
            raise TransportError(
                f"the clean strip does not give r = 0 and t = diag(exp(i k N)) in the canonical "
                f"basis (deviation {err:.3g} > {_CALIBRATION_TOL:g}) at E = {self.energy!r} meV, "
                f"B = {self.b_perp!r} T: the mode-basis conventions of this Kwant version differ "
                "from the ones this module was validated with (Kwant 1.5.0); do not compose"
            )
        self.r_out = self.r_out * phase.conjugate()
        self.r_in = self.r_in * phase
        self.gauge_phase = float(np.angle(phase))
        self.calibration_error = err

    def solve(self, params: dict) -> SMatrix:
        """Kwant solve with the given params, blocks in the canonical basis."""
        try:
            sm = self.solver.smatrix(self.fsyst, self.energy, params=params)
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"Kwant's scattering solve of a {self.n_columns * self.a:g} nm x "
                f"{self.rows * self.a:g} nm strip failed at E = {self.energy!r} meV: {exc}"
            ) from exc
        self.last_kwant_unitarity = float(np.linalg.norm(
            sm.data.conj().T @ sm.data - np.eye(sm.data.shape[0]), ord=2))
        return SMatrix(self.l_out @ sm.submatrix(0, 0) @ self.l_in,
                       self.r_out @ sm.submatrix(1, 0) @ self.l_in,
                       self.l_out @ sm.submatrix(0, 1) @ self.r_in,
                       self.r_out @ sm.submatrix(1, 1) @ self.r_in)


# --------------------------------------------------------------------------------------------
# Segments
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class SegmentSet:
    """A pool of independent disordered segments, their S-matrices in one canonical basis.

    Parameters
    ----------
    r, t, tp, rp : numpy.ndarray
        The blocks of segment ``k`` are ``r[k]`` etc., each of shape (n_segments, m, m)
        complex, in the canonical basis :attr:`basis` (left side referred to the segment's
        first column, right side to the column after its last; see the module docstring).
    kwant_unitarity : numpy.ndarray
        ``||S^dagger S - 1||_2`` of each segment's Kwant S-matrix, shape (n_segments,).
    basis : ModeBasis
        The canonical mode basis (m modes per direction).
    material : BHZParameters
    lattice_constant, width, segment_length, buffer : float
        ``a``, ``W``, ``l`` and the clean length ``b`` at each end of a segment (nm).
    energy, b_perp : float
        Fermi energy (meV) and perpendicular field (T).
    disorder : tuple
        The disorder terms (:mod:`pipeline.disorder`); ``strength`` multiplies them all.
    strength : float
    seed, first_realisation : int
        Segment ``k`` carries disorder realisation ``first_realisation + k`` of root ``seed``.
    contact_doping : float
        Band shift (meV) of the two outer contacts; 0: the edge ends in clean leads of the
        device material.
    contact_left, contact_right : SMatrix or None
        With doped contacts: the clean contact sections (doped lead | ``b`` of clean device
        material | device lead), the device side in the canonical basis.
    evanescent_length : float
        ``l_ev`` (nm) of the clean lead at the energy.
    edge_decay_length : float
        ``1 / min Re lambda`` (nm) of the edge state (:func:`pipeline.model.edge_decay_constants`).
    gauge_phase : float
        Gauge phase removed by the clean-strip calibration (radians; 0 without field).
    """

    r: np.ndarray
    t: np.ndarray
    tp: np.ndarray
    rp: np.ndarray
    kwant_unitarity: np.ndarray
    basis: ModeBasis
    material: BHZParameters
    lattice_constant: float
    width: float
    segment_length: float
    buffer: float
    energy: float
    b_perp: float
    disorder: tuple
    strength: float
    seed: int
    first_realisation: int
    contact_doping: float = 0.0
    contact_left: SMatrix | None = None
    contact_right: SMatrix | None = None
    evanescent_length: float = math.nan
    edge_decay_length: float = math.nan
    gauge_phase: float = 0.0
    created: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        blocks = _check_blocks("SegmentSet", self.r, self.t, self.tp, self.rp, complex)
        if len(blocks[0].shape) != 3:
            raise TransportError(
                f"SegmentSet blocks must have shape (n_segments, m, m), got {blocks[0].shape!r}"
            )
        for name, x in zip(_BLOCKS, blocks):
            object.__setattr__(self, name, x)
        if self.basis.n_modes != blocks[0].shape[-1] or blocks[0].shape[-1] != blocks[3].shape[-1]:
            raise TransportError(
                f"SegmentSet blocks have {blocks[0].shape[-1]} left and {blocks[3].shape[-1]} right "
                f"modes but the basis has {self.basis.n_modes}; segments must have the clean lead's "
                "modes on both sides"
            )
        object.__setattr__(self, "kwant_unitarity",
                           _frozen(np.asarray(self.kwant_unitarity, dtype=float)))
        object.__setattr__(self, "disorder", tuple(self.disorder))

    @property
    def n_segments(self) -> int:
        """Number of segments in the pool."""
        return self.r.shape[0]

    @property
    def n_modes(self) -> int:
        """Propagating modes per direction in the clean lead (2 for the helical edge pair)."""
        return self.r.shape[-1]

    @property
    def n_columns(self) -> int:
        """Lattice columns per segment."""
        return int(round(self.segment_length / self.lattice_constant))

    @property
    def buffer_columns(self) -> int:
        """Clean columns at each end of a segment."""
        return int(round(self.buffer / self.lattice_constant))

    @property
    def gap(self) -> float:
        """Clean length between the disordered parts of neighbouring segments, ``2 b`` (nm)."""
        return 2.0 * self.buffer

    @property
    def evanescent_bound(self) -> float:
        """``exp(-2 b / l_ev)``: order of the error a junction adds (see module docstring)."""
        if not self.evanescent_length > 0:
            return 0.0
        return float(math.exp(-self.gap / self.evanescent_length))

    @property
    def disordered_fraction(self) -> float:
        """Fraction of an edge's length that carries disorder, ``(l - 2 b) / l``."""
        return 1.0 - self.gap / self.segment_length

    @property
    def segments(self) -> SMatrix:
        """All segments as one batched :class:`SMatrix` (batch axis = segment)."""
        return SMatrix(self.r, self.t, self.tp, self.rp)

    def segment(self, k: int) -> SMatrix:
        """The S-matrix of segment ``k``."""
        return SMatrix(self.r[k], self.t[k], self.tp[k], self.rp[k])

    def disorder_of(self, k: int, *, mesh=None) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        """Recompute the disorder of segment ``k`` (deterministic, counter-based).

        Returns
        -------
        tags : numpy.ndarray
            Lattice tags (i, j) of the segment's sites, shape (n, 2); columns i = 0 .. N-1.
        potential : numpy.ndarray
            Scalar potential (meV), shape (n,), zero in the clean buffers.
        onsite_extra : numpy.ndarray or None
            Exchange matrices (meV), shape (n, 4, 4), zero in the buffers, or None.
        """
        from .geometry import two_terminal_strip
        from .mesh import mesh_device

        device = two_terminal_strip(self.segment_length, self.width)
        mesh = mesh if mesh is not None else mesh_device(device, self.lattice_constant)
        pot, extra = _masked_disorder(
            self.disorder, mesh, device, seed=self.seed,
            realisation=self.first_realisation + int(k), strength=self.strength,
            clean=_buffer_mask(mesh.tags[:, 0], self.n_columns, self.buffer_columns))
        return mesh.tags, pot, extra

    def metadata(self) -> dict:
        """JSON-serialisable description (everything but the arrays)."""
        return {
            "format": _FORMAT,
            "material": asdict(self.material),
            "lattice_constant": self.lattice_constant,
            "width": self.width,
            "segment_length": self.segment_length,
            "buffer": self.buffer,
            "energy": self.energy,
            "b_perp": self.b_perp,
            "disorder": [_term_to_dict(t) for t in self.disorder],
            "strength": self.strength,
            "seed": self.seed,
            "first_realisation": self.first_realisation,
            "contact_doping": self.contact_doping,
            "evanescent_length": self.evanescent_length,
            "edge_decay_length": self.edge_decay_length,
            "evanescent_bound": self.evanescent_bound,
            "gauge_phase": self.gauge_phase,
            "n_segments": self.n_segments,
            "n_modes": self.n_modes,
            "created": self.created,
            "units": {"length": "nm", "energy": "meV", "b_perp": "T", "conductance": "e^2/h"},
        }


def _term_to_dict(term) -> dict:
    return {"kind": type(term).__name__, **asdict(term)}


def _term_from_dict(d: dict):
    from . import disorder as dis

    kinds = {c.__name__: c for c in (dis.Anderson, dis.SmoothPotential, dis.MagneticExchange,
                                     dis.EdgeRoughness)}
    d = dict(d)
    kind = d.pop("kind", None)
    if kind not in kinds:
        raise StoreError(f"unknown disorder term kind {kind!r} in a segment store; "
                         f"expected one of {sorted(kinds)!r}")
    return kinds[kind](**d)


def _positive(name: str, value: Any, unit: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise ModelError(f"{name} must be a positive number of {unit}, got {value!r}")
    return v


def _columns(name: str, length: float, a: float) -> int:
    n = float(length) / a
    if not (math.isfinite(n) and n >= 1 and abs(n - round(n)) < 1e-9 * max(1.0, n)):
        raise ModelError(
            f"{name} = {length!r} nm is not a positive multiple of the lattice constant "
            f"a = {a!r} nm; use e.g. {max(1, round(n)) * a:g} nm"
        )
    return int(round(n))


def _buffer_mask(columns: np.ndarray, n_columns: int, buffer_columns: int) -> np.ndarray:
    """True on sites in the clean buffers: first/last ``buffer_columns`` of every segment."""
    c = np.mod(columns, n_columns)
    return (c < buffer_columns) | (c >= n_columns - buffer_columns)


def _masked_disorder(terms, mesh, device, *, seed, realisation, strength, clean):
    from .disorder import realise

    if not terms:
        return np.zeros(mesh.n_sites), None
    pot, extra = realise(terms, mesh, seed=seed, realisation=realisation, strength=strength,
                         outline=device.outline, contacts=device.contacts)
    pot = np.where(clean, 0.0, pot)
    if extra is not None:
        extra = np.where(clean[:, None, None], 0.0, extra)
    return pot, extra


def _check_width(material, width: float, energy: float) -> float:
    from .model import edge_decay_constants

    decay = float(1.0 / np.min(edge_decay_constants(material).real))
    if width < EDGE_WIDTH_FACTOR * decay:
        warnings.warn(
            f"strip width {width:g} nm is less than {EDGE_WIDTH_FACTOR:g} edge-state decay "
            f"lengths ({EDGE_WIDTH_FACTOR * decay:.0f} nm; decay length {decay:.1f} nm from "
            f"1/min Re lambda): the two edges couple and backscatter into each other at "
            f"E = {energy:g} meV; widen the strip to at least {EDGE_WIDTH_FACTOR * decay:.0f} nm",
            ConcatenationWarning, stacklevel=3,
        )
    return decay


def _check_gap(gap: float, l_ev: float, tolerance: float, energy: float) -> float:
    bound = math.exp(-gap / l_ev) if l_ev > 0 else 0.0
    if bound > tolerance:
        need = l_ev * math.log(1.0 / tolerance)
        warnings.warn(
            f"the disordered parts of neighbouring segments are {gap:g} nm apart, only "
            f"{gap / l_ev if l_ev > 0 else math.inf:.1f} evanescent decay lengths (l_ev = "
            f"{l_ev:.1f} nm at E = {energy:g} meV): evanescent waves reach the next segment with "
            f"relative amplitude exp(-gap/l_ev) = {bound:.2g} > {tolerance:g}, which the "
            f"composition neglects; use a clean buffer of at least {need / 2:.0f} nm per "
            "segment end",
            ConcatenationWarning, stacklevel=3,
        )
    return bound


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def segment_smatrices(
    material: BHZParameters,
    a: float,
    width: float,
    segment_length: float,
    disorder_terms: Sequence,
    *,
    energy: float,
    n_segments: int,
    seed: int,
    b_perp: float = 0.0,
    contact_doping: float = 0.0,
    buffer: float | None = None,
    strength: float = 1.0,
    first_realisation: int = 0,
    evanescent_tolerance: float = EVANESCENT_TOLERANCE,
) -> SegmentSet:
    """Solve a pool of independent disordered segments and store their S-matrices.

    Parameters
    ----------
    material : BHZParameters
    a : float
        Lattice constant (nm).
    width : float
        Strip width ``W`` (nm), a multiple of ``a``.
    segment_length : float
        Segment length ``l`` (nm) including the clean buffers, a multiple of ``a``.
    disorder_terms : sequence of pipeline.disorder terms
        The run's disorder model (e.g. from :func:`pipeline.engine._disorder_terms`).
    energy : float
        Fermi energy (meV); the clean strip must have propagating modes there.
    n_segments : int
        Size of the pool.
    seed : int
        Root seed of the disorder; segment ``k`` is realisation ``first_realisation + k``, so
        a pool computed in parts (by workers) is the same as in one go.
    b_perp : float, optional
        Perpendicular field (T).
    contact_doping : float, optional
        Band shift (meV) of the two outer contacts. The segments' own leads are always the
        undoped device material (a junction between segments is a piece of the device); a
        non-zero value adds two clean contact sections (doped lead | ``b`` | device lead)
        that :func:`concatenated_conductance` puts at the ends of every edge.
    buffer : float, optional
        Clean length ``b`` (nm) at each end of a segment. Default: the smallest multiple of
        ``a`` with ``exp(-2 b / l_ev) <= evanescent_tolerance``.
    strength : float, optional
        Multiplier of all disorder terms.
    first_realisation : int, optional
        Realisation index of segment 0.
    evanescent_tolerance : float, optional
        Bound on ``exp(-2 b / l_ev)`` above which a :class:`ConcatenationWarning` is issued.

    Returns
    -------
    SegmentSet

    Raises
    ------
    ModelError
        Bad sizes (not multiples of ``a``, buffers leaving no disordered part).
    TransportError
        No propagating mode at the energy, or the mode-basis calibration failed.

    Warns
    -----
    ConcatenationWarning
        Strip narrower than :data:`EDGE_WIDTH_FACTOR` edge decay lengths; clean gap between
        segments short compared with the evanescent decay length.
    """
    a = _positive("lattice constant a", a, "nm")
    rows = _columns("width", width, a)
    n_cols = _columns("segment_length", segment_length, a)
    if not (isinstance(n_segments, (int, np.integer)) and n_segments >= 1):
        raise ModelError(f"n_segments must be a positive integer, got {n_segments!r}")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if not (isinstance(first_realisation, (int, np.integer)) and first_realisation >= 0):
        raise ModelError(f"first_realisation must be a non-negative integer, got "
                         f"{first_realisation!r}")
    tol = float(evanescent_tolerance)
    if not 0 < tol < 1:
        raise ModelError(f"evanescent_tolerance must be in (0, 1), got {evanescent_tolerance!r}")
    energy = float(energy)
    edge_decay = _check_width(material, rows * a, energy)

    # ONE finalized strip for all segments; its clean lead gives l_ev and the open modes
    strip = _StripScatterer(material, a, rows, n_cols, energy, b_perp, calibrate=False)
    basis = strip.basis
    lam = _transfer_eigenvalues(strip.dsys.fsyst.leads[1], energy, _lead_params(strip.dsys, b_perp))
    l_ev, _ = _decay_length(lam, a)
    if basis.n_modes == 0:
        raise TransportError(
            f"a clean {rows * a:g} nm strip has no propagating mode at E = {energy!r} meV "
            f"(B = {b_perp!r} T), so nothing can be transmitted; choose an energy in a band or "
            "away from the finite-size gap of the edge states (widen the strip)"
        )
    if buffer is None:
        b_cols = max(1, math.ceil(0.5 * l_ev * math.log(1.0 / tol) / a - 1e-9))
    else:
        b_cols = 0 if float(buffer) == 0.0 else _columns("buffer", buffer, a)
    if 2 * b_cols >= n_cols:
        raise ModelError(
            f"clean buffers of {b_cols * a:g} nm at both ends leave no disorder in a "
            f"{n_cols * a:g} nm segment (l_ev = {l_ev:.1f} nm at E = {energy:g} meV); use "
            f"segment_length > {2 * b_cols * a:g} nm (several times that, so most of the edge "
            "is disordered) or a smaller buffer"
        )
    _check_gap(2 * b_cols * a, l_ev, tol, energy)
    strip.calibrate()
    device = strip.device
    mesh = strip.dsys.mesh
    clean = _buffer_mask(mesh.tags[:, 0], n_cols, b_cols)
    terms = tuple(disorder_terms)
    blocks = np.empty((4, int(n_segments), basis.n_modes, basis.n_modes), complex)
    kwant_err = np.empty(int(n_segments))
    for k in range(int(n_segments)):
        pot, extra = _masked_disorder(terms, mesh, device, seed=int(seed),
                                      realisation=int(first_realisation) + k,
                                      strength=strength, clean=clean)
        s = strip.solve(strip.dsys.params(b_perp=b_perp, potential=pot, onsite_extra=extra))
        blocks[:, k] = (s.r, s.t, s.tp, s.rp)
        kwant_err[k] = strip.last_kwant_unitarity

    contact_left = contact_right = None
    if float(contact_doping) != 0.0:
        c_cols = max(b_cols, 1)
        d = float(contact_doping)
        contact_left = _StripScatterer(material, a, rows, c_cols, energy, b_perp,
                                       doping={"L": d, "R": 0.0}, basis=basis)
        contact_left = contact_left.solve(contact_left.dsys.params(b_perp=b_perp))
        contact_right = _StripScatterer(material, a, rows, c_cols, energy, b_perp,
                                        doping={"L": 0.0, "R": d}, basis=basis)
        contact_right = contact_right.solve(contact_right.dsys.params(b_perp=b_perp))
    return SegmentSet(
        *blocks, kwant_unitarity=kwant_err, basis=basis, material=material,
        lattice_constant=a, width=rows * a, segment_length=n_cols * a, buffer=b_cols * a,
        energy=energy, b_perp=float(b_perp), disorder=terms, strength=float(strength),
        seed=int(seed), first_realisation=int(first_realisation),
        contact_doping=float(contact_doping), contact_left=contact_left,
        contact_right=contact_right, evanescent_length=l_ev, edge_decay_length=edge_decay,
        gauge_phase=strip.gauge_phase, created=_now(),
    )


def _same_model(a: SegmentSet, b: SegmentSet) -> list[str]:
    keys = ("material", "lattice_constant", "width", "segment_length", "buffer", "energy",
            "b_perp", "disorder", "strength", "seed", "contact_doping")
    return [k for k in keys if getattr(a, k) != getattr(b, k)]


def merge_segments(sets: Sequence[SegmentSet], *, atol: float = 1e-9) -> SegmentSet:
    """Join pools computed separately (e.g. by workers) into one, in realisation order.

    Parameters
    ----------
    sets : sequence of SegmentSet
        Pools of the same model whose realisation ranges are contiguous once sorted.
    atol : float, optional
        Largest allowed difference of the canonical mode bases.

    Returns
    -------
    SegmentSet
    """
    sets = sorted(sets, key=lambda s: s.first_realisation)
    if not sets:
        raise TransportError("merge_segments needs at least one SegmentSet")
    first = sets[0]
    for s in sets[1:]:
        diff = _same_model(first, s)
        if diff:
            raise TransportError(f"segment sets differ in {diff!r}; only pools of the same model "
                                 "can be merged")
        gap = first.basis.max_difference(s.basis)
        if gap > atol:
            raise TransportError(
                f"segment sets have different canonical mode bases (max difference {gap:.3g} > "
                f"{atol:g}); recompute them with the same Kwant version and parameters"
            )
    expected = first.first_realisation
    for s in sets:
        if s.first_realisation != expected:
            raise TransportError(
                f"segment realisations are not contiguous: expected a set starting at "
                f"{expected}, got {s.first_realisation}; compute the missing range"
            )
        expected += s.n_segments
    cat = {k: np.concatenate([getattr(s, k) for s in sets]) for k in _BLOCKS + ("kwant_unitarity",)}
    return replace(first, **cat)


# --------------------------------------------------------------------------------------------
# Composition of random sequences
# --------------------------------------------------------------------------------------------


def _check_counts(n_segments_per_edge) -> np.ndarray:
    counts = np.asarray(list(n_segments_per_edge))
    if counts.ndim != 1 or counts.size == 0 or not np.issubdtype(counts.dtype, np.integer) \
            or np.any(counts < 1):
        raise ModelError(
            f"n_segments_per_edge must be a non-empty sequence of positive integers, got "
            f"{n_segments_per_edge!r}"
        )
    if np.unique(counts).size != counts.size:
        raise ModelError(f"n_segments_per_edge repeats values: {counts.tolist()!r}")
    return counts.astype(np.int64)


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)
_SEQUENCE_STREAM = np.uint64(0x5E9C)


def _mix64(x: np.ndarray) -> np.ndarray:
    """splitmix64 finaliser (Steele, Lea, Flood, OOPSLA 2014), element-wise on uint64."""
    x = x ^ (x >> np.uint64(30))
    x = x * _MIX1
    x = x ^ (x >> np.uint64(27))
    x = x * _MIX2
    return x ^ (x >> np.uint64(31))


def _draw_sequences(seed: int, n_sequences: int, n_max: int, pool: int) -> np.ndarray:
    """Segment indices of every sequence, shape (n_sequences, n_max), drawn with replacement.

    Index ``j`` of sequence ``s`` is a counter-based hash of (seed, s, j), so it does not
    depend on how many sequences or segments are drawn, nor on batching or workers. Shorter
    edges use the first ``n`` segments of each sequence (nested edges, as in a direct length
    sweep where a longer device contains the shorter one's disorder).
    """
    with np.errstate(over="ignore"):
        h = _mix64(np.array([int(seed)], dtype=np.uint64) * _GOLDEN + _SEQUENCE_STREAM)
        s = np.arange(n_sequences, dtype=np.uint64)[:, None]
        j = np.arange(n_max, dtype=np.uint64)[None, :]
        h = _mix64(h ^ (s * _GOLDEN + np.uint64(1)))
        h = _mix64(h ^ (j * _MIX1 + np.uint64(2)))
    u = (h >> np.uint64(11)).astype(np.float64) * 2.0**-53
    return np.minimum((u * pool).astype(np.int64), pool - 1)


def _compose_prefixes(blocks: tuple, idx: np.ndarray, counts: np.ndarray, contacts) -> list:
    """Composed chains of the first ``n`` segments of each row of ``idx``, for each count.

    ``blocks`` are the pool's (r, t, tp, rp) arrays (pool, m, m); the chain is built from
    aligned power-of-two blocks, each composed as a balanced binary tree.
    """
    level = tuple(x[idx] for x in blocks)  # (batch, n_max, m, m)
    levels = [level]
    while level[0].shape[1] >= 2:
        h = level[0].shape[1] // 2
        level = _star(tuple(x[:, 0:2 * h:2] for x in level),
                      tuple(x[:, 1:2 * h:2] for x in level))
        levels.append(level)
    out = []
    for n in counts:
        acc, start = None, 0
        for k in range(len(levels) - 1, -1, -1):
            if n & (1 << k):
                piece = tuple(x[:, start >> k] for x in levels[k])
                acc = piece if acc is None else _star(acc, piece)
                start += 1 << k
        if contacts is not None:
            acc = _star(_star(contacts[0], acc), contacts[1])
        out.append(acc)
    return out


def _contact_blocks(segment_set: SegmentSet, coherent: bool):
    if segment_set.contact_left is None:
        return None
    res = []
    for c in (segment_set.contact_left, segment_set.contact_right):
        bl = (c.r, c.t, c.tp, c.rp)
        res.append(bl if coherent else tuple(np.abs(x) ** 2 for x in bl))
    return res


def _compose_all(segment_set, idx, counts, mode, pool_map=None):
    coherent = mode == "coherent"
    blocks = (segment_set.r, segment_set.t, segment_set.tp, segment_set.rp)
    if not coherent:
        blocks = tuple(np.abs(x) ** 2 for x in blocks)
    contacts = _contact_blocks(segment_set, coherent)
    m = segment_set.n_modes
    per_seq = 2 * 4 * m * m * 16 * max(1, idx.shape[1]) * 3
    batch = max(1, _BATCH_BYTES // per_seq)
    g = np.empty((counts.size, idx.shape[0]))
    err = np.empty_like(g)
    for lo in range(0, idx.shape[0], batch):
        rows = idx[lo:lo + batch]
        if pool_map is not None:
            rows = pool_map[rows]
        for i, res in enumerate(_compose_prefixes(blocks, rows, counts, contacts)):
            if coherent:
                s = SMatrix(*res)
                g[i, lo:lo + batch] = s.conductance()
                err[i, lo:lo + batch] = s.unitarity_error()
            else:
                p = ProbabilityMatrix(*res)
                g[i, lo:lo + batch] = p.conductance()
                err[i, lo:lo + batch] = p.conservation_error()
    return g, err


def concatenated_conductance(
    segment_set: SegmentSet,
    n_segments_per_edge: Sequence[int],
    n_sequences: int,
    seed: int,
    mode: str = "coherent",
    *,
    pool_resamples: int = 0,
):
    """Conductance of edges made of random sequences of segments from a pool.

    Parameters
    ----------
    segment_set : SegmentSet
        The pool.
    n_segments_per_edge : sequence of int
        Edge lengths in segments; the edge length is ``n * segment_length``.
    n_sequences : int
        Number of random sequences (edges) per length.
    seed : int
        Seed of the sequence draw: segment ``j`` of sequence ``s`` is drawn with replacement
        from the pool by a counter-based hash of (seed, s, j), so the draw does not depend on
        the other lengths, the number of sequences or batching; an edge of ``n`` segments is
        the first ``n`` of its sequence (nested edges, like a direct length sweep).
    mode : {"coherent", "incoherent"}
        Star product of amplitudes, or of probabilities ``|S_ij|^2`` (full dephasing between
        segments).
    pool_resamples : int, optional
        Bootstrap resamples of the pool for ``conductance_sem_pool`` (0: skip). Sequences
        share segments, so the plain standard error over sequences understates the
        uncertainty once ``n * n_sequences`` exceeds the pool; resampling the pool with
        replacement and recomposing gives the standard error of the mean including it.

    Returns
    -------
    xarray.Dataset
        ``conductance`` (length, sequence) in e^2/h; ``composition_error`` (length, sequence):
        ``||S^dagger S - 1||_2`` (coherent) or the largest violation of current conservation
        (incoherent); ``conductance_mean``, ``conductance_sem`` (plain) and, with
        ``pool_resamples``, ``conductance_sem_pool`` per length. Coordinates ``length`` (nm),
        ``n_segments``, ``sequence``. Attributes hold the model, ``quantised`` (the ideal
        value: the number of modes of the clean lead, 2 for the helical edges in the gap;
        doped contacts lower the clean value slightly by contact scattering) and
        ``evanescent_bound``.
    """
    import xarray as xr

    if mode not in ("coherent", "incoherent"):
        raise ModelError(f"mode must be 'coherent' or 'incoherent', got {mode!r}")
    if not isinstance(segment_set, SegmentSet):
        raise ModelError(f"segment_set must be a SegmentSet, got {type(segment_set).__name__!r}; "
                         "compute one with segment_smatrices or load_segments")
    counts = _check_counts(n_segments_per_edge)
    if not (isinstance(n_sequences, (int, np.integer)) and n_sequences >= 1):
        raise ModelError(f"n_sequences must be a positive integer, got {n_sequences!r}")
    if not (isinstance(seed, (int, np.integer)) and seed >= 0):
        raise ModelError(f"seed must be a non-negative integer, got {seed!r}")
    if not (isinstance(pool_resamples, (int, np.integer)) and pool_resamples >= 0):
        raise ModelError(f"pool_resamples must be an integer >= 0, got {pool_resamples!r}")
    n_max = int(counts.max())
    pool = segment_set.n_segments
    idx = _draw_sequences(seed, int(n_sequences), n_max, pool)
    g, err = _compose_all(segment_set, idx, counts, mode)
    mean = g.mean(axis=1)
    if g.shape[1] > 1:
        sem = g.std(axis=1, ddof=1) / math.sqrt(g.shape[1])
    else:
        sem = np.full_like(mean, np.nan)
    quantised = float(segment_set.n_modes)  # ideal: every mode of the clean lead transmitted
    lengths = counts * segment_set.segment_length
    data = {
        "conductance": (("length", "sequence"), g,
                        {"units": "e^2/h", "long_name": "two-terminal conductance of the edge"}),
        "composition_error": (("length", "sequence"), err, {
            "units": "1", "long_name": ("||S^dagger S - 1||_2 of the composed S-matrix"
                                        if mode == "coherent" else
                                        "largest |sum of outgoing probabilities - 1|")}),
        "conductance_mean": (("length",), mean, {"units": "e^2/h"}),
        "conductance_sem": (("length",), sem, {
            "units": "e^2/h", "long_name": "standard error over sequences (ignores pool sharing)"}),
    }
    if pool_resamples:
        rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0xB007]))
        means = np.empty((int(pool_resamples), counts.size))
        for b in range(int(pool_resamples)):
            pool_map = rng.integers(0, pool, size=pool)
            gb, _ = _compose_all(segment_set, idx, counts, mode, pool_map=pool_map)
            means[b] = gb.mean(axis=1)
        data["conductance_sem_pool"] = (("length",), means.std(axis=0, ddof=1), {
            "units": "e^2/h",
            "long_name": "standard error of the mean from resampling the segment pool"})
    ds = xr.Dataset(
        data,
        coords={"length": ("length", lengths.astype(float), {"units": "nm",
                                                              "long_name": "edge length n * l"}),
                "n_segments": ("length", counts),
                "sequence": np.arange(int(n_sequences))},
    )
    ds.attrs.update(
        mode=mode, seed=int(seed), n_pool=pool, quantised=quantised,
        energy=segment_set.energy, b_perp=segment_set.b_perp, width=segment_set.width,
        segment_length=segment_set.segment_length, buffer=segment_set.buffer,
        disordered_fraction=segment_set.disordered_fraction,
        evanescent_length=segment_set.evanescent_length,
        evanescent_bound=segment_set.evanescent_bound,
        contact_doping=segment_set.contact_doping,
        contact_length=(max(segment_set.buffer_columns, 1) * segment_set.lattice_constant
                        if segment_set.contact_left is not None else 0.0),
        max_composition_error=float(np.max(err)),
        disorder=json.dumps([_term_to_dict(t) for t in segment_set.disorder]),
    )
    return ds


def lstar_dataset(ds, label: str = "G(L,R)"):
    """Recast :func:`concatenated_conductance` output in the layout :mod:`pipeline.lstar` reads.

    Parameters
    ----------
    ds : xarray.Dataset
        Output of :func:`concatenated_conductance` (or of :func:`direct_conductance` for
        several lengths, concatenated along ``length``).
    label : str, optional
        Measurement label to give the conductance.

    Returns
    -------
    xarray.Dataset
        ``measurements`` (realisation, geometry, measurement) with ``geometry`` the edge
        length (attribute ``parameter = "length"``) and ``quantised`` in the attributes; use
        ``pipeline.lstar.longest_ballistic_length(out, label, quantised=out.attrs["quantised"])``.
    """
    import xarray as xr

    g = ds["conductance"].transpose("sequence" if "sequence" in ds.dims else "realisation",
                                    "length")
    out = xr.Dataset(
        {"measurements": (("realisation", "geometry", "measurement"),
                          np.asarray(g.values)[:, :, None])},
        coords={"realisation": np.arange(g.shape[0]),
                "geometry": ("geometry", np.asarray(ds["length"].values, dtype=float),
                             {"parameter": "length", "units": "nm"}),
                "measurement": np.array([label], dtype=object)},
    )
    out.attrs.update(ds.attrs)
    return out


# --------------------------------------------------------------------------------------------
# Direct solves for validation
# --------------------------------------------------------------------------------------------


def joined_smatrix(segment_set: SegmentSet, indices: Sequence[int]) -> SMatrix:
    """Direct Kwant solve of the strip made of the given segments joined in order.

    The joined strip carries exactly the disorder of those segments (buffers included), so
    it is the reference the composed S-matrix must reproduce up to the evanescent coupling
    across the junctions. Undoped leads; the result is in the canonical basis.

    Parameters
    ----------
    segment_set : SegmentSet
    indices : sequence of int
        Segment indices, left to right.

    Returns
    -------
    SMatrix
    """
    from .geometry import two_terminal_strip
    from .mesh import mesh_device

    indices = [int(k) for k in indices]
    if not indices or min(indices) < 0 or max(indices) >= segment_set.n_segments:
        raise ModelError(f"indices must be segment numbers in [0, {segment_set.n_segments}), got "
                         f"{indices!r}")
    a, n = segment_set.lattice_constant, segment_set.n_columns
    rows = int(round(segment_set.width / a))
    strip = _StripScatterer(segment_set.material, a, rows, n * len(indices), segment_set.energy,
                            segment_set.b_perp, basis=segment_set.basis)
    tags = strip.dsys.mesh.tags
    where = {tuple(t): i for i, t in enumerate(tags.tolist())}
    pot = np.zeros(len(tags))
    extra = None
    seg_mesh = mesh_device(two_terminal_strip(segment_set.segment_length, segment_set.width), a)
    for pos, k in enumerate(indices):
        seg_tags, p, x = segment_set.disorder_of(k, mesh=seg_mesh)
        target = np.array([where[(int(i) + pos * n, int(j))] for i, j in seg_tags.tolist()])
        pot[target] = p
        if x is not None:
            if extra is None:
                extra = np.zeros((len(tags), 4, 4), dtype=complex)
            extra[target] = x
    return strip.solve(strip.dsys.params(b_perp=segment_set.b_perp, potential=pot,
                                         onsite_extra=extra))


def direct_conductance(segment_set: SegmentSet, n_segments: int, n_realisations: int, seed: int,
                       *, first_realisation: int = 0):
    """Direct-solve ensemble of a strip as long as ``n_segments`` segments, for validation.

    The strip has the segment set's width, material, energy, field and contacts, and its
    disorder is drawn over the whole strip (realisation ``first_realisation + r`` of root
    ``seed``) with the same clean buffers every ``segment_length`` as a concatenated edge,
    so both ensembles describe the same disorder model. Use a ``seed`` different from the
    segment pool's: the disorder is keyed by lattice site, so equal seeds would correlate the
    two ensembles.

    Parameters
    ----------
    segment_set : SegmentSet
    n_segments : int
        Length of the strip in segments (``n_segments * segment_length`` nm, plus the contact
        sections when the contacts are doped).
    n_realisations : int
    seed : int
    first_realisation : int, optional

    Returns
    -------
    xarray.Dataset
        ``conductance`` (realisation) in e^2/h and ``kwant_unitarity`` (realisation);
        coordinate ``length`` (nm, size 1) so that ensembles of several lengths concatenate
        along it.
    """
    import xarray as xr

    from .transport import _SOLVER

    if not (isinstance(n_segments, (int, np.integer)) and n_segments >= 1):
        raise ModelError(f"n_segments must be a positive integer, got {n_segments!r}")
    if not (isinstance(n_realisations, (int, np.integer)) and n_realisations >= 1):
        raise ModelError(f"n_realisations must be a positive integer, got {n_realisations!r}")
    s = segment_set
    a, n, b = s.lattice_constant, s.n_columns, s.buffer_columns
    rows = int(round(s.width / a))
    c = max(b, 1) if s.contact_left is not None else 0
    total = n * int(n_segments) + 2 * c
    doping = {"L": s.contact_doping, "R": s.contact_doping} if c else None
    strip = _StripScatterer(s.material, a, rows, total, s.energy, s.b_perp, doping=doping,
                            basis=s.basis, calibrate=False)
    mesh = strip.dsys.mesh
    cols = mesh.tags[:, 0] - c
    clean = _buffer_mask(cols, n, b) | (cols < 0) | (cols >= n * int(n_segments))
    g = np.empty(int(n_realisations))
    kerr = np.empty_like(g)
    for r in range(int(n_realisations)):
        pot, extra = _masked_disorder(s.disorder, mesh, strip.device, seed=int(seed),
                                      realisation=int(first_realisation) + r,
                                      strength=s.strength, clean=clean)
        params = strip.dsys.params(b_perp=s.b_perp, potential=pot, onsite_extra=extra)
        try:
            sm = _SOLVER.smatrix(strip.fsyst, s.energy, params=params)
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"Kwant's scattering solve of the {total * a:g} nm direct strip failed at "
                f"E = {s.energy!r} meV, realisation {int(first_realisation) + r}: {exc}"
            ) from exc
        g[r] = sm.transmission(1, 0)
        kerr[r] = np.linalg.norm(sm.data.conj().T @ sm.data - np.eye(sm.data.shape[0]), ord=2)
    length = float(n * int(n_segments) * a)
    return xr.Dataset(
        {"conductance": (("length", "realisation"), g[None, :], {"units": "e^2/h"}),
         "kwant_unitarity": (("length", "realisation"), kerr[None, :], {"units": "1"})},
        coords={"length": ("length", [length], {"units": "nm"}),
                "realisation": np.arange(int(n_realisations))},
        attrs={"seed": int(seed), "first_realisation": int(first_realisation),
               "contact_length": float(c * a), "energy": s.energy, "width": s.width},
    )


# --------------------------------------------------------------------------------------------
# Zarr storage
# --------------------------------------------------------------------------------------------


def _codecs():
    from zarr.codecs import Crc32cCodec, ZstdCodec

    return [ZstdCodec(level=3), Crc32cCodec()]


def _open_group(zarr_group, mode: str):
    import zarr

    if isinstance(zarr_group, (str, Path)):
        return zarr.open_group(str(zarr_group), mode=mode, zarr_format=3)
    return zarr_group


def _put(group, name: str, data: np.ndarray, chunk0: int | None = None) -> None:
    data = np.asarray(data)
    if np.iscomplexobj(data):  # plain float64 with a trailing (real, imag) axis
        data = np.stack([data.real, data.imag], axis=-1)
    data = np.ascontiguousarray(data)
    chunks = data.shape if chunk0 is None or data.ndim == 0 else \
        (min(chunk0, max(data.shape[0], 1)),) + data.shape[1:]
    arr = group.create_array(name, shape=data.shape, dtype=data.dtype,
                             chunks=tuple(max(1, c) for c in chunks), compressors=_codecs())
    arr[...] = data


def _get(group, name: str, complex_valued: bool) -> np.ndarray:
    data = group[name][...]
    if complex_valued:
        if data.shape[-1:] != (2,):
            raise StoreError(f"array {name!r} of the segment pool has shape {data.shape!r}, "
                             "expected a trailing (real, imag) axis of length 2")
        return data[..., 0] + 1j * data[..., 1]
    return data


def save_segments(segment_set: SegmentSet, zarr_group, *, name: str = "segments",
                  overwrite: bool = False):
    """Store a segment pool in a sub-group of a Zarr v3 group.

    Parameters
    ----------
    segment_set : SegmentSet
    zarr_group : zarr.Group or str or Path
        The parent group, or a path opened with ``zarr.open_group(path, mode="a")``.
    name : str, optional
        Name of the sub-group.
    overwrite : bool, optional
        Replace an existing sub-group of that name (else :class:`StoreError`).

    Returns
    -------
    zarr.Group
        The sub-group: arrays ``r``, ``t``, ``tp``, ``rp`` (n_segments, m, m, 2),
        ``kwant_unitarity`` (n_segments,), the basis (``basis_right_wave`` (4 W/a, m, 2) ...),
        the contact blocks when doped (``contact_left_r`` ...), metadata in the attributes.
        Complex values are stored as float64 with a trailing (real, imag) axis, so the pool
        holds only plain real arrays like the sample store; every chunk carries a CRC32C
        checksum.
    """
    parent = _open_group(zarr_group, "a")
    if name in parent:
        if not overwrite:
            raise StoreError(
                f"the group already holds {name!r}; pass overwrite=True to replace it or choose "
                "another name"
            )
        del parent[name]
    g = parent.create_group(name)
    for k in _BLOCKS:
        _put(g, k, getattr(segment_set, k), chunk0=4096)
    _put(g, "kwant_unitarity", segment_set.kwant_unitarity, chunk0=4096)
    for k in ("right_wave", "right_momentum", "left_wave", "left_momentum", "right_sz",
              "right_y", "left_sz", "left_y"):
        _put(g, f"basis_{k}", getattr(segment_set.basis, k))
    for side in ("left", "right"):
        c = getattr(segment_set, f"contact_{side}")
        if c is not None:
            for k in _BLOCKS:
                _put(g, f"contact_{side}_{k}", getattr(c, k))
    g.attrs.update(segment_set.metadata(), complex_storage="trailing (real, imag) axis")
    return g


def load_segments(zarr_group, *, name: str = "segments") -> SegmentSet:
    """Read a segment pool written by :func:`save_segments`.

    Parameters
    ----------
    zarr_group : zarr.Group or str or Path
        The parent group (or its path).
    name : str, optional
        Name of the sub-group.

    Returns
    -------
    SegmentSet
    """
    parent = _open_group(zarr_group, "r")
    if name not in parent:
        raise StoreError(f"no segment pool {name!r} in the group; write one with save_segments")
    g = parent[name]
    meta = dict(g.attrs)
    if meta.get("format") != _FORMAT:
        raise StoreError(f"group {name!r} is not a segment pool (format {meta.get('format')!r}, "
                         f"expected {_FORMAT!r})")
    basis = ModeBasis(*(_get(g, f"basis_{k}", k.endswith("wave")) for k in (
        "right_wave", "right_momentum", "left_wave", "left_momentum", "right_sz", "right_y",
        "left_sz", "left_y")))
    contacts = {}
    for side in ("left", "right"):
        if f"contact_{side}_r" in g:
            contacts[f"contact_{side}"] = SMatrix(*(_get(g, f"contact_{side}_{k}", True)
                                                    for k in _BLOCKS))
    return SegmentSet(
        *(_get(g, k, True) for k in _BLOCKS), kwant_unitarity=g["kwant_unitarity"][...],
        basis=basis,
        material=BHZParameters(**meta["material"]), lattice_constant=meta["lattice_constant"],
        width=meta["width"], segment_length=meta["segment_length"], buffer=meta["buffer"],
        energy=meta["energy"], b_perp=meta["b_perp"],
        disorder=tuple(_term_from_dict(d) for d in meta["disorder"]),
        strength=meta["strength"], seed=meta["seed"],
        first_realisation=meta["first_realisation"], contact_doping=meta["contact_doping"],
        evanescent_length=meta["evanescent_length"], edge_decay_length=meta["edge_decay_length"],
        gauge_phase=meta["gauge_phase"], created=meta.get("created", ""), **contacts,
    )
