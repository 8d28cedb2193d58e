"""Landauer-Buttiker multi-terminal transport, in plain NumPy and independent of Kwant.

Conventions
-----------
``T[..., i, j]`` is the total transmission probability *from* terminal ``j`` *to* terminal
``i`` (Kwant's ``transmission(to, from)``), summed over modes and spin; diagonal entries are
ignored. Currents are positive when they flow from a terminal's reservoir into the device.
Conductances are in units of e^2/h and resistances in h/e^2 (multiply by
:data:`pipeline.constants.H_OVER_E2_OHM` for ohms).

Terminal voltages obey the Landauer-Buttiker equations (Buttiker, PRL 57, 1761 (1986))::

    I_i = sum_j G_ij V_j,   G_ij = -T_ij (i != j),   G_ii = sum_{k != i} T_ki

so columns of ``G`` sum to zero (charge conservation) and, for a unitary scattering matrix,
so do its rows (a common shift of all voltages drives no current). Voltage probes draw no
current. Every function accepts a stack of matrices (leading axes are broadcast), so a whole
ensemble is processed in one call.

Examples
--------
An ideal helical-edge ring of four contacts (each contact passes one channel to each neighbour):

>>> import numpy as np
>>> T = np.zeros((4, 4))
>>> for i in range(4):
...     T[(i + 1) % 4, i] = T[(i - 1) % 4, i] = 1.0
>>> round(float(four_terminal_resistance(T, 0, 3, 1, 2)), 12)
0.25
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from pipeline.constants import H_OVER_E2_OHM
from pipeline.errors import TransportError

__all__ = ['conductance_matrix', 'check_sum_rules', 'four_terminal_resistance', 'two_terminal_conductance', 'resistance_matrix', 'Measurement', 'parse_measurement', 'to_ohm', 'helical_ring_transmissions']

#: largest acceptable condition number of the reduced conductance matrix
_MAX_CONDITION = 1e12


def conductance_matrix(T: np.ndarray) -> np.ndarray:
    """Conductance matrix ``G`` (e^2/h) from a transmission matrix (or a stack of them)."""
    T = np.asarray(T, dtype=float)
    if T.ndim < 2 or T.shape[-1] != T.shape[-2]:
        raise TransportError(
            f"transmission matrix must be square in its last two axes, got shape {T.shape!r}"
        )
    n = T.shape[-1]
    off = T * (1.0 - np.eye(n))
    G = -off
    idx = np.arange(n)
    G[..., idx, idx] = off.sum(axis=-2)  # sum_{k != i} T_ki
    return G


def check_sum_rules(T: np.ndarray, *, rtol: float = 1e-6) -> float:
    """Largest row-sum violation of ``G`` relative to its scale; raise if above ``rtol``.

    Row sums vanish only when the transmissions come from a unitary scattering matrix
    (sum_j T_ij = sum_j T_ji). A violation points at a broken solve or at mixed-up data.
    """
    G = conductance_matrix(T)
    scale = max(float(np.abs(G).max(initial=0.0)), 1e-300)
    worst = float(np.abs(G.sum(axis=-1)).max(initial=0.0)) / scale
    if worst > rtol:
        raise TransportError(
            f"transmission matrix violates current conservation: conductance-matrix rows sum "
            f"to {worst:.3g} of its scale (tolerance {rtol:g}); the scattering matrix is not "
            f"unitary - check that every open mode was counted and the solve converged"
        )
    return worst


def _reduced_solve(G: np.ndarray, source: int, drain: int) -> np.ndarray:
    """Terminal voltages for unit current from ``source`` to ``drain`` (drain grounded)."""
    n = G.shape[-1]
    _check_terminal(source, n, "source")
    _check_terminal(drain, n, "drain")
    if source == drain:
        raise TransportError(
            f"source and drain are the same terminal ({source + 1}); a current needs two "
            f"different contacts"
        )
    keep = [t for t in range(n) if t != drain]
    Gr = G[..., keep, :][..., :, keep]
    cond = np.linalg.cond(Gr)
    if not np.all(np.isfinite(cond)) or np.any(cond > _MAX_CONDITION):
        raise TransportError(
            "the conductance matrix is singular (condition number "
            f"{float(np.max(cond)):.3g}): some terminal is not connected to the others, so a "
            "voltage there is undefined; check the transmissions or drop that terminal"
        )
    current = np.zeros(Gr.shape[:-1])
    current[..., keep.index(source)] = 1.0
    Vr = np.linalg.solve(Gr, current[..., None])[..., 0]
    V = np.zeros(G.shape[:-1])
    V[..., keep] = Vr
    return V


def _check_terminal(t: int, n: int, role: str) -> None:
    if not (0 <= int(t) < n):
        raise TransportError(
            f"{role} contact index {t!r} is out of range for a device with {n} contacts "
            f"(valid: 0..{n - 1}, i.e. contacts 1..{n})"
        )


def four_terminal_resistance(
    T: np.ndarray, source: int, drain: int, v_plus: int, v_minus: int
) -> np.ndarray:
    """R_{source drain, v_plus v_minus} in h/e^2 (0-based terminal indices).

    Current enters at ``source`` and leaves at ``drain``; the voltage is
    ``V[v_plus] - V[v_minus]``; all contacts other than source and drain are floating probes.
    """
    G = conductance_matrix(T)
    n = G.shape[-1]
    _check_terminal(v_plus, n, "v_plus")
    _check_terminal(v_minus, n, "v_minus")
    V = _reduced_solve(G, source, drain)
    return V[..., v_plus] - V[..., v_minus]


def two_terminal_conductance(T: np.ndarray, source: int, drain: int) -> np.ndarray:
    """Two-terminal conductance (e^2/h) between two contacts, the others floating."""
    return 1.0 / four_terminal_resistance(T, source, drain, source, drain)


def resistance_matrix(T: np.ndarray, reference: int) -> np.ndarray:
    """Inverse of ``G`` with ``reference`` grounded: ``V_i = sum_j R_ij I_j`` (h/e^2).

    Rows and columns of the reference terminal are zero.
    """
    G = conductance_matrix(T)
    n = G.shape[-1]
    _check_terminal(reference, n, "reference")
    keep = [t for t in range(n) if t != reference]
    Gr = G[..., keep, :][..., :, keep]
    cond = np.linalg.cond(Gr)
    if not np.all(np.isfinite(cond)) or np.any(cond > _MAX_CONDITION):
        raise TransportError(
            f"the conductance matrix with terminal {reference + 1} grounded is singular "
            f"(condition number {float(np.max(cond)):.3g}): a terminal is disconnected"
        )
    R = np.zeros(G.shape)
    ix = np.ix_(keep, keep)
    R[(..., *ix)] = np.linalg.inv(Gr)
    return R


def helical_ring_transmissions(rings: list[list[int]], n_contacts: int) -> np.ndarray:
    """Transmissions of ideal helical edges: one channel from each contact to each neighbour.

    ``rings`` lists the contacts (0-based) in the order a walk along each boundary meets them
    (:func:`pipeline.device.outline.perimeter_order`). Along an ideal quantum spin Hall edge each
    spin species runs one way round, so every contact passes exactly one channel to the next
    contact and one to the previous one (Roth et al., Science 325, 294 (2009)). A ring with a
    single contact passes nothing.
    """
    T = np.zeros((n_contacts, n_contacts))
    for ring in rings:
        m = len(ring)
        if m < 2:
            continue
        for pos, c in enumerate(ring):
            T[ring[(pos + 1) % m], c] += 1.0
            T[ring[(pos - 1) % m], c] += 1.0
    return T


def to_ohm(r_h_over_e2: np.ndarray) -> np.ndarray:
    """Convert resistances from h/e^2 to ohms (h/e^2 from ``scipy.constants``)."""
    return np.asarray(r_h_over_e2) * H_OVER_E2_OHM


@dataclass(frozen=True)
class Measurement:
    """A named transport quantity on a device.

    Attributes
    ----------
    label:
        The name as written, e.g. ``"R14,23"`` or ``"G14"``.
    kind:
        ``"R"`` for a four-terminal resistance (h/e^2), ``"G"`` for a two-terminal
        conductance (e^2/h) with the other contacts floating.
    contacts:
        Contact names: (source, drain, v_plus, v_minus) for ``R``; (source, drain) for ``G``.
    """

    label: str
    kind: str
    contacts: tuple[str, ...]

    def indices(self, contact_names: tuple[str, ...]) -> tuple[int, ...]:
        """0-based contact indices of this measurement on a device with these contacts."""
        out = []
        for name in self.contacts:
            if name not in contact_names:
                raise TransportError(
                    f"measurement {self.label!r} names contact {name!r}, which the device does "
                    f"not have (contacts: {', '.join(contact_names)})"
                )
            out.append(contact_names.index(name))
        return tuple(out)

    def evaluate(self, T: np.ndarray, contact_names: tuple[str, ...]) -> np.ndarray:
        """Value of the measurement (h/e^2 for R, e^2/h for G) for transmissions ``T``."""
        idx = self.indices(contact_names)
        if self.kind == "R":
            return four_terminal_resistance(T, *idx)
        return two_terminal_conductance(T, *idx)

    @property
    def unit(self) -> str:
        return "h/e^2" if self.kind == "R" else "e^2/h"


_COMPACT = re.compile(r"^([RG])([^\s,()]+?)(?:,([^\s,()]+))?$")
_EXPLICIT = re.compile(r"^([RG])\(\s*([^;()]+?)\s*(?:;\s*([^;()]+?)\s*)?\)$")


def parse_measurement(label: str) -> Measurement:
    """Parse ``"R14,23"`` / ``"G14"`` (single-character contact names) or the explicit
    forms ``"R(src,drn;v+,v-)"`` / ``"G(src,drn)"`` for longer names.

    >>> parse_measurement("R14,23").contacts
    ('1', '4', '2', '3')
    >>> parse_measurement("G(left,right)").contacts
    ('left', 'right')
    """
    text = label.strip()
    m = _EXPLICIT.match(text)
    if m:
        kind, first, second = m.group(1), m.group(2), m.group(3)
        pair1 = tuple(s.strip() for s in first.split(","))
        pair2 = tuple(s.strip() for s in second.split(",")) if second else ()
    else:
        m = _COMPACT.match(text)
        if not m:
            raise TransportError(_bad_label(label))
        kind, first, second = m.group(1), m.group(2), m.group(3)
        pair1 = tuple(first)
        pair2 = tuple(second) if second else ()
    if kind == "R":
        if len(pair1) != 2 or len(pair2) != 2:
            raise TransportError(_bad_label(label))
        return Measurement(text, "R", pair1 + pair2)
    if len(pair1) != 2 or pair2:
        raise TransportError(_bad_label(label))
    return Measurement(text, "G", pair1)


def _bad_label(label: str) -> str:
    return (
        f"cannot read measurement {label!r}: write a four-terminal resistance as 'R14,23' "
        f"(current 1->4, voltage 2-3) or 'R(src,drn;vp,vm)', and a two-terminal conductance "
        f"as 'G14' or 'G(src,drn)'"
    )
