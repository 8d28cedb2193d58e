"""The fixed mode basis of a clean strip, the strip scatterer that uses it, and guard rails.

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

A segment's disorder leaves evanescent waves that the composition drops; the slowest of them
decays over ``l_ev = a / min |ln |lambda||`` (:func:`evanescent_length`). The guard rails
(:func:`check_width`, :func:`check_gap`) warn when the strip is too narrow for its two edges
to be independent or the clean gap between segments too short for the evanescent coupling.

Units: lengths nm, energies meV, fields T.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg as sla

from pipeline.device.templates import two_terminal_strip
from pipeline.errors import ConcatenationWarning, ModelError, TransportError
from pipeline.longedges.smatrix import SMatrix, read_only
from pipeline.physics.bhz import edge_decay_constants
from pipeline.physics.materials import BHZParameters
from pipeline.system.mesh import build_system
from pipeline.transport.scattering import ScatteringProblem

__all__ = ["EVANESCENT_TOLERANCE", "EDGE_WIDTH_FACTOR", "ModeBasis", "StripScatterer",
           "evanescent_length", "transfer_eigenvalues", "decay_length", "lead_params",
           "positive_length", "lattice_columns", "check_width", "check_gap"]

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
            object.__setattr__(self, name, read_only(getattr(self, name)))

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


def transfer_eigenvalues(lead, energy: float, params: dict) -> np.ndarray:
    """Eigenvalues ``lambda`` (psi_{j+1} = lambda psi_j) of a nearest-cell lead at ``energy``.

    Parameters
    ----------
    lead : kwant.system.InfiniteSystem
        A finalized lead whose unit cell couples to one whole neighbouring cell.
    energy : float
        Energy (meV).
    params : dict
        Kwant parameters of the lead (see :func:`lead_params`).

    Returns
    -------
    numpy.ndarray
        The finite, non-zero eigenvalues of the lead's transfer matrix; ``|lambda| = 1`` for
        propagating modes.
    """
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


def decay_length(lam: np.ndarray, a: float) -> tuple[float, int]:
    """Evanescent decay length and number of propagating modes from transfer eigenvalues.

    Parameters
    ----------
    lam : numpy.ndarray
        Eigenvalues from :func:`transfer_eigenvalues`.
    a : float
        Lattice constant (nm).

    Returns
    -------
    tuple of (float, int)
        ``l_ev = a / min |ln |lambda||`` (nm) over the evanescent eigenvalues (0 when there is
        none) and the number of propagating eigenvalues.
    """
    rate = np.abs(np.log(np.abs(lam)))
    evanescent = rate[rate > _PROPAGATING_TOL]
    n_prop = int(np.sum(rate <= _PROPAGATING_TOL))
    if evanescent.size == 0:
        return 0.0, n_prop
    return float(a / evanescent.min()), n_prop


def lead_params(dsys, b_perp: float) -> dict:
    """Kwant parameters of the clean leads of a strip system at field ``b_perp``.

    Parameters
    ----------
    dsys : pipeline.system.mesh.DeviceSystem
    b_perp : float
        Perpendicular field (T); the Peierls phases are added when the system has a field.

    Returns
    -------
    dict
    """
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
    a = positive_length("lattice_constant", lattice_constant, "nm")
    cols = lattice_columns("width", width, a)
    # a few columns: Kwant's magnetic gauge needs the two leads apart
    dsys = build_system(two_terminal_strip(4 * a, cols * a), material, a, with_field=b_perp != 0.0)
    lam = transfer_eigenvalues(dsys.fsyst.leads[1], float(energy), lead_params(dsys, b_perp))
    return decay_length(lam, a)[0]


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


class StripScatterer:
    """One finalized clean-lead strip of ``n_columns`` columns and its canonical-basis maps.

    All solves of one instance share Kwant's precalculated lead modes exactly, so segments
    that differ only in their onsite terms are written in one basis.

    Parameters
    ----------
    material : BHZParameters
    a : float
        Lattice constant (nm).
    rows, n_columns : int
        Width and length of the strip in lattice constants.
    energy, b_perp : float
        Fermi energy (meV) and perpendicular field (T).
    doping : dict, optional
        Maps "L"/"R" to the band shift of that lead (meV); a doped side keeps Kwant's own
        lead basis, an undoped side is written in the canonical basis.
    basis : ModeBasis, optional
        The canonical basis; computed here from the (undoped) right lead when not given.
    calibrate : bool, optional
        Run :meth:`calibrate` at once (only when both sides are undoped).
    """

    def __init__(self, material, a, rows, n_columns, energy, b_perp, *, doping=None,
                 basis: ModeBasis | None = None, calibrate: bool = True):
        self.a, self.rows, self.n_columns = a, rows, n_columns
        self.energy, self.b_perp = float(energy), float(b_perp)
        doping = dict(doping or {})
        self.doped = {side: float(doping.get(side, 0.0)) != 0.0 for side in ("L", "R")}
        self.device = two_terminal_strip(n_columns * a, rows * a)
        self.dsys = build_system(self.device, material, a, contact_doping=doping or 0.0,
                                 with_field=b_perp != 0.0)
        params = lead_params(self.dsys, b_perp)
        self.fsyst = self.dsys.fsyst.precalculate(self.energy, params=params)
        # one assembled problem for every solve of this strip (MUMPS' analysis reused)
        self.problem = ScatteringProblem(self.dsys)
        sets = self._lead_mode_sets(params)
        self.n_modes = (sets[0]["m"], sets[1]["m"])
        self.basis = basis if basis is not None else self._canonical_basis(sets[1])
        self._map_to_basis(sets)
        self.gauge_phase = 0.0
        self.calibration_error = math.nan
        if calibrate and not (self.doped["L"] or self.doped["R"]):
            self.calibrate()

    def _lead_mode_sets(self, params: dict) -> list[dict]:
        """Kwant's incoming and outgoing modes of both leads, sites ordered bottom to top."""
        leads = self.dsys.fsyst.leads
        modes = [self.fsyst.leads[i].modes(self.energy, params=params)[0] for i in (0, 1)]
        perm_y = [_cell_permutation(leads[i]) for i in (0, 1)]
        self.sz_op = np.tile([1.0, 1.0, -1.0, -1.0], self.rows)
        self.y_op = np.repeat(perm_y[1][1], 4)
        # Kwant's mode amplitudes refer to the system column next to the lead (calibrated by
        # the clean solve): column 0 for the left lead, N - 1 for the right one.
        sets = []
        for i, (direction, ref) in enumerate(((-1.0, 0.0), (1.0, self.n_columns - 1.0))):
            wf = modes[i].wave_functions[perm_y[i][0]]
            k = direction * np.asarray(modes[i].momenta, dtype=float)
            m = k.size // 2
            sets.append({"in": (wf[:, :m], k[:m], ref), "out": (wf[:, m:], k[m:], ref), "m": m})
        return sets

    def _canonical_basis(self, right_set: dict) -> ModeBasis:
        """The canonical basis from the modes of the (undoped) right lead."""
        if self.doped["R"]:
            raise ModelError("the canonical basis is taken from an undoped right lead")
        right, kr = _canonicalise(*right_set["out"][:2], self.sz_op, self.y_op)
        left, kl = _canonicalise(*right_set["in"][:2], self.sz_op, self.y_op)
        rsz, ry = _mode_labels(right, self.sz_op, self.y_op)
        lsz, ly = _mode_labels(left, self.sz_op, self.y_op)
        return ModeBasis(right, kr, left, kl, rsz, ry, lsz, ly)

    def _map_to_basis(self, sets: list[dict]) -> None:
        """Maps from Kwant's lead amplitudes to canonical ones (identity on a doped side)."""
        b, n = self.basis, float(self.n_columns)
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
        """Scattering solve with the given params, blocks in the canonical basis.

        The solve is :meth:`pipeline.transport.scattering.ScatteringProblem.smatrix` on this
        strip's precalculated leads: Kwant's linear system and lead modes, so its blocks are
        in Kwant's lead-mode basis, which the maps of this instance rewrite.
        """
        try:
            sm = self.problem.smatrix(self.energy, params, fsyst=self.fsyst)
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"the scattering solve of a {self.n_columns * self.a:g} nm x "
                f"{self.rows * self.a:g} nm strip failed at E = {self.energy!r} meV: {exc}"
            ) from exc
        self.last_kwant_unitarity = float(np.linalg.norm(
            sm.data.conj().T @ sm.data - np.eye(sm.data.shape[0]), ord=2))
        return SMatrix(self.l_out @ sm.submatrix(0, 0) @ self.l_in,
                       self.r_out @ sm.submatrix(1, 0) @ self.l_in,
                       self.l_out @ sm.submatrix(0, 1) @ self.r_in,
                       self.r_out @ sm.submatrix(1, 1) @ self.r_in)


def positive_length(name: str, value: Any, unit: str) -> float:
    """``value`` as a positive finite float, else :class:`ModelError` naming ``name``.

    Parameters
    ----------
    name : str
        What the value is (for the message).
    value : Any
    unit : str
        Its unit (for the message).

    Returns
    -------
    float
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise ModelError(f"{name} must be a positive number of {unit}, got {value!r}")
    return v


def lattice_columns(name: str, length: float, a: float) -> int:
    """Number of lattice constants in ``length``, which must be a positive multiple of ``a``.

    Parameters
    ----------
    name : str
        What the length is (for the message).
    length, a : float
        Length and lattice constant (nm).

    Returns
    -------
    int

    Raises
    ------
    ModelError
        ``length`` is not a positive multiple of ``a``; the message suggests the nearest one.
    """
    n = float(length) / a
    if not (math.isfinite(n) and n >= 1 and abs(n - round(n)) < 1e-9 * max(1.0, n)):
        raise ModelError(
            f"{name} = {length!r} nm is not a positive multiple of the lattice constant "
            f"a = {a!r} nm; use e.g. {max(1, round(n)) * a:g} nm"
        )
    return int(round(n))


def check_width(material, width: float, energy: float) -> float:
    """Warn when a strip is too narrow for its two edges to be independent.

    Parameters
    ----------
    material : BHZParameters
    width : float
        Strip width (nm).
    energy : float
        Fermi energy (meV), for the message.

    Returns
    -------
    float
        The edge-state decay length ``1 / min Re lambda`` (nm).

    Warns
    -----
    ConcatenationWarning
        ``width`` is less than :data:`EDGE_WIDTH_FACTOR` decay lengths; attributed to the
        caller of the function that calls this one.
    """
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


def check_gap(gap: float, l_ev: float, tolerance: float, energy: float) -> float:
    """Warn when the clean gap between segments lets evanescent waves through.

    Parameters
    ----------
    gap : float
        Clean length between the disordered parts of neighbouring segments (nm).
    l_ev : float
        Evanescent decay length (nm), see :func:`evanescent_length`.
    tolerance : float
        Largest acceptable ``exp(-gap / l_ev)``.
    energy : float
        Fermi energy (meV), for the message.

    Returns
    -------
    float
        ``exp(-gap / l_ev)`` (0 without evanescent modes).

    Warns
    -----
    ConcatenationWarning
        The bound exceeds ``tolerance``; attributed to the caller of the function that calls
        this one.
    """
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

