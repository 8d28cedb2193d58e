"""Scattering matrices of two-sided scatterers and their composition (the star product).

:class:`SMatrix` holds amplitudes ``[[r, tp], [t, rp]]`` in a fixed mode basis,
:class:`ProbabilityMatrix` the mode-resolved probabilities ``|S_ij|^2``. Chains of them are
composed left to right with the Redheffer star product: coherently over amplitudes
(:func:`compose_coherent`: every multiply reflected wave keeps its phase, so interference and
localisation are included) or incoherently over probabilities (:func:`compose_incoherent`:
full dephasing between the parts, i.e. classical series addition channel by channel). The
same rule works for both, and for batches of matrices (:func:`star_product`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.errors import TransportError

__all__ = ["BLOCK_NAMES", "SMatrix", "ProbabilityMatrix", "read_only", "check_blocks",
           "star_product", "compose_coherent", "compose_incoherent"]

#: Names of the four blocks of a two-sided scattering matrix, in storage order:
#: r (left <- left), t (right <- left), tp (left <- right), rp (right <- right).
BLOCK_NAMES = ("r", "t", "tp", "rp")


def read_only(x: np.ndarray) -> np.ndarray:
    """A read-only copy of ``x``.

    Parameters
    ----------
    x : array_like

    Returns
    -------
    numpy.ndarray
        A new array with the write flag cleared, so frozen dataclasses stay immutable.
    """
    x = np.array(x)
    x.setflags(write=False)
    return x


def check_blocks(owner: str, r, t, tp, rp, dtype) -> tuple[np.ndarray, ...]:
    """Validate the four blocks of a (batched) two-sided matrix and freeze them.

    Parameters
    ----------
    owner : str
        Name of the class the blocks are for (used in error messages).
    r, t, tp, rp : array_like
        Blocks of shapes (..., nL, nL), (..., nR, nL), (..., nL, nR), (..., nR, nR).
    dtype : type
        Element type to convert to (``complex`` for amplitudes, ``float`` for probabilities).

    Returns
    -------
    tuple of numpy.ndarray
        ``(r, t, tp, rp)`` broadcast to one batch shape, read-only.

    Raises
    ------
    TransportError
        Blocks that are not matrices, have inconsistent mode counts or batch shapes.
    """
    r, t, tp, rp = (np.asarray(x, dtype=dtype) for x in (r, t, tp, rp))
    if min(x.ndim for x in (r, t, tp, rp)) < 2:
        raise TransportError(
            f"{owner} blocks must be matrices (..., out, in), got shapes "
            f"{[x.shape for x in (r, t, tp, rp)]!r}; pass 2-d (or batched) arrays"
        )
    n_left, n_right = r.shape[-1], rp.shape[-1]
    want = {"r": (n_left, n_left), "t": (n_right, n_left), "tp": (n_left, n_right),
            "rp": (n_right, n_right)}
    for name, x in zip(BLOCK_NAMES, (r, t, tp, rp), strict=True):
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
    return tuple(read_only(np.broadcast_to(x, batch + x.shape[-2:])) for x in (r, t, tp, rp))


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
        blocks = check_blocks("SMatrix", self.r, self.t, self.tp, self.rp, complex)
        for name, x in zip(BLOCK_NAMES, blocks, strict=True):
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
        blocks = check_blocks("ProbabilityMatrix", self.R, self.T, self.Tp, self.Rp, float)
        for name, x in zip(("R", "T", "Tp", "Rp"), blocks, strict=True):
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


def star_product(a: tuple, b: tuple) -> tuple:
    """Redheffer star product of block tuples ``(r, t, tp, rp)`` (``a`` left of ``b``).

    Works for amplitudes (coherent) and for probability matrices (incoherent) alike, and
    for batches (leading axes broadcast). Inverses are never formed: two linear solves.

    Parameters
    ----------
    a, b : tuple of numpy.ndarray
        The blocks ``(r, t, tp, rp)`` of the left and the right scatterer; the right side of
        ``a`` must have as many modes as the left side of ``b``.

    Returns
    -------
    tuple of numpy.ndarray
        The blocks of the composed scatterer.
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
        nxt = [star_product(level[i], level[i + 1]) for i in range(0, len(level) - 1, 2)]
        if len(level) % 2:
            nxt.append(level[-1])
        level = nxt
    return level[0]


def _as_chain(segments, kind: str) -> list[tuple]:
    """Block tuples of a chain of segments (amplitudes, or probabilities when incoherent)."""
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
