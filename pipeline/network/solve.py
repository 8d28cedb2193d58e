"""The helical-edge network: edge scatterers from segment pools, contacts, and the solve.

Conventions
-----------
An edge section is walked from its start contact to its end contact with the device on the
left (:mod:`pipeline.network.sections`). Along it the helical pair has one *forward* mode
(moving in the walking direction) and one *backward* mode. Its scattering matrix in this
orientation is the 2 x 2 block tuple ``(r, t, tp, rp)``: ``r`` start <- start, ``t`` end <-
start, ``tp`` start <- end, ``rp`` end <- end (scalars, stored as batched 1 x 1 matrices so
the star product of :mod:`pipeline.longedges.smatrix` composes them).

A pool segment (:class:`~pipeline.longedges.pools.SegmentSet`) is a strip with two edges; in
its canonical basis every mode belongs to one edge (its mean ``y``). Its bottom edge walked
with the device on the left runs along +x, its top edge along -x, so each segment gives two
edge scatterers (:func:`edge_blocks`), exact up to the inter-edge coupling of the strip
(measured by :func:`edge_leak`).

A contact is a node of the network. Walking the ring, the section *before* contact ``c``
ends there and the section *after* it starts there. The node's matrices, in the order
(before, after), are ``n_ii`` (edge -> edge, the part of an arriving wave the contact sends
on into an edge instead of absorbing it), ``a = N_LI^dagger N_LI`` (what reaches the
contact's reservoir from each arriving edge wave) and ``b = N_IL N_IL^dagger`` (what the
reservoir emits into each leaving edge wave). A contact of the device material absorbs
everything: ``n_ii = 0``, ``a = b = 1``. A metallic (doped) contact is read from a solved
contact section (doped lead | clean device | device lead) by :func:`contact_node`.

:func:`network_transmissions` then gives the transmission matrix ``T[i, j]`` (from contact
``j`` to contact ``i``, summed over modes) of the whole network from the sections'
probabilities (each section itself composed coherently or not, as configured): a wave that a
metallic contact sends on into the next section is dephased at the contact, since the mode
phase conventions on either side of a contact are not physical and a metallic contact is a
reservoir. The multi-terminal resistances follow from
:mod:`pipeline.transport.landauer` (Buttiker, Phys. Rev. B 38, 9375 (1988)).
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from pipeline.errors import ModelError
from pipeline.longedges.compose import compose_prefixes, draw_sequences
from pipeline.longedges.pools import SegmentSet
from pipeline.longedges.smatrix import SMatrix, star_product

__all__ = ["ContactNode", "ABSORBING", "edge_blocks", "edge_leak", "edge_modes", "contact_node",
           "draw_edge_samples", "compose_runs", "composed_section_parts", "network_transmissions"]


@dataclass(frozen=True)
class ContactNode:
    """A contact as a node of the network (see the module docstring).

    Parameters
    ----------
    n_ii : numpy.ndarray
        (2, 2) complex: amplitude sent into the edge (before, after) for a unit wave arriving
        from the edge (before, after).
    a, b : numpy.ndarray
        (2, 2) complex Hermitian: absorption and emission Gram matrices.
    """

    n_ii: np.ndarray
    a: np.ndarray
    b: np.ndarray


#: A contact of the device material: every arriving edge wave enters the reservoir.
ABSORBING = ContactNode(np.zeros((2, 2), complex), np.eye(2, dtype=complex),
                        np.eye(2, dtype=complex))


def edge_modes(pool: SegmentSet) -> dict[str, int]:
    """Indices of the bottom and top edge's right- and left-movers in the canonical basis.

    Raises
    ------
    ModelError
        The clean strip does not carry exactly one mode per edge and direction.
    """
    b = pool.basis
    if b.n_modes != 2:
        raise ModelError(
            f"the clean {pool.width:g} nm strip carries {b.n_modes} modes per direction at "
            f"E = {pool.energy:g} meV, B = {pool.b_perp:g} T; the edge network needs exactly the "
            "helical pair (one per edge): put the Fermi level in the bulk gap"
        )
    rb, rt = int(np.argmin(b.right_y)), int(np.argmax(b.right_y))
    lb, lt = int(np.argmin(b.left_y)), int(np.argmax(b.left_y))
    if rb == rt or lb == lt:
        raise ModelError("the two modes of the clean strip run along the same edge; the strip "
                         "is too narrow for separate edges (widen the pool strip)")
    return {"rb": rb, "rt": rt, "lb": lb, "lt": lt}


def edge_blocks(pool: SegmentSet) -> tuple[np.ndarray, ...]:
    """Edge scatterers of every pool segment, in the walking orientation.

    Returns
    -------
    tuple of numpy.ndarray
        ``(r, t, tp, rp)``, each (2 n_segments, 1, 1) complex; entry ``2 k`` is the bottom
        edge of segment ``k``, ``2 k + 1`` its top edge.
    """
    i = edge_modes(pool)
    rb, rt, lb, lt = i["rb"], i["rt"], i["lb"], i["lt"]
    bottom = (pool.r[:, lb, rb], pool.t[:, rb, rb], pool.tp[:, lb, lb], pool.rp[:, rb, lb])
    top = (pool.rp[:, rt, lt], pool.tp[:, lt, lt], pool.t[:, rt, rt], pool.r[:, lt, rt])
    out = []
    for x, y in zip(bottom, top, strict=True):
        z = np.empty(2 * x.shape[0], complex)
        z[0::2], z[1::2] = x, y
        out.append(z[:, None, None])
    return tuple(out)


def edge_leak(pool: SegmentSet) -> float:
    """Largest ``||S_e^dagger S_e - 1||_2`` of the edge scatterers: the inter-edge coupling."""
    s = SMatrix(*edge_blocks(pool))
    return float(np.max(s.unitarity_error(), initial=0.0))


def contact_node(section: SMatrix, pool: SegmentSet) -> ContactNode:
    """A metallic contact as a network node, from a solved contact section.

    Parameters
    ----------
    section : SMatrix
        Doped lead on the left, clean device material, device lead on the right (the right
        side in the pool's canonical basis), e.g. ``pool.contact_left``.
    pool : SegmentSet
        A pool of the same strip (for the mode indices).

    Returns
    -------
    ContactNode
    """
    i = edge_modes(pool)
    # device on the right: the section before the contact arrives along the top edge
    # (left-mover), the one after leaves along the bottom edge (right-mover)
    ins, outs = [i["lt"], i["lb"]], [i["rt"], i["rb"]]
    n_ii = section.rp[np.ix_(outs, ins)]
    n_li = section.tp[:, ins]
    n_il = section.t[outs, :]
    return ContactNode(n_ii, n_li.conj().T @ n_li, n_il @ n_il.conj().T)


def draw_edge_samples(seed: int, section: int, part: int, n_devices: int, n_max: int,
                      pool_size: int) -> np.ndarray:
    """Pool entries (edge scatterers) of one part of one section for every sampled device.

    Entry ``j`` of device ``s`` is a counter-based hash of (seed, section, part, s, j): it does
    not depend on the number of devices or of segments drawn, and device ``s`` of a longer
    section begins with the segments of the shorter one (nested, as in a length sweep).

    Returns
    -------
    numpy.ndarray
        Indices in ``[0, pool_size)``, shape (n_devices, n_max).
    """
    key = hashlib.blake2b(f"{int(seed)}/edge/{int(section)}/{int(part)}".encode(),
                          digest_size=8).digest()
    return draw_sequences(int.from_bytes(key, "little") >> 1, n_devices, max(1, n_max),
                          pool_size)


def compose_runs(parts: Sequence[tuple]) -> tuple:
    """Join the composed parts of one section (left to right) without scattering between them.

    Parameters
    ----------
    parts : sequence of tuple
        Block tuples ``(r, t, tp, rp)`` of shape (batch, 1, 1), amplitudes or probabilities
        (the star product serves both).

    Returns
    -------
    tuple
        The composed block tuple.
    """
    acc = parts[0]
    for p in parts[1:]:
        acc = star_product(acc, p)
    return acc


def _node_positions(starts: np.ndarray, ends: np.ndarray, n_contacts: int):
    """Indices of each contact's arriving (beta) and leaving (alpha) edge waves."""
    ins = np.full((n_contacts, 2), -1)
    outs = np.full((n_contacts, 2), -1)
    for s, (c0, c1) in enumerate(zip(starts, ends, strict=True)):
        # beta: 2s forward out at the end, 2s+1 backward out at the start
        # alpha: 2s forward in at the start, 2s+1 backward in at the end
        ins[c1, 0], outs[c1, 0] = 2 * s, 2 * s + 1      # section before contact c1
        ins[c0, 1], outs[c0, 1] = 2 * s + 1, 2 * s      # section after contact c0
    return ins, outs


def network_transmissions(blocks: tuple, starts: Sequence[int], ends: Sequence[int],
                          nodes: Sequence[ContactNode]) -> np.ndarray:
    """Transmission matrix of the network of edge sections and contacts (probabilities).

    Parameters
    ----------
    blocks : tuple of numpy.ndarray
        ``(R, T, T', R')`` of every section, each of shape (..., K): the probabilities
        ``|r|^2, |t|^2, |t'|^2, |r'|^2`` in the walking orientation.
    starts, ends : sequence of int
        Start and end contact of each section.
    nodes : sequence of ContactNode
        One per contact; only probabilities of it enter (``|n_ii|^2`` and the diagonals of
        ``a`` and ``b``).

    Returns
    -------
    numpy.ndarray
        ``T[..., i, j]``, from contact ``j`` to contact ``i``; the diagonal holds what returns
        into the same contact through the edges.

    Notes
    -----
    With ``alpha`` the waves entering the sections and ``beta`` those leaving them,
    ``beta = S alpha`` (sections) and ``alpha = P beta + emission`` (contacts), so
    ``beta = (1 - S P)^-1 S emission``; contact ``i`` absorbs ``a_i`` of what arrives.
    """
    r, t, tp, rp = (np.asarray(x, dtype=float) for x in blocks)
    k = r.shape[-1]
    n_c = len(nodes)
    ins, outs = _node_positions(np.asarray(starts), np.asarray(ends), n_c)
    if np.any(ins < 0) or np.any(outs < 0):
        raise ModelError("every contact needs an edge section arriving and one leaving; "
                         "the sections do not form closed rings")
    s = np.zeros(r.shape[:-1] + (2 * k, 2 * k))
    ix = np.arange(k)
    s[..., 2 * ix, 2 * ix] = t
    s[..., 2 * ix, 2 * ix + 1] = rp
    s[..., 2 * ix + 1, 2 * ix] = r
    s[..., 2 * ix + 1, 2 * ix + 1] = tp
    p = np.zeros((2 * k, 2 * k))
    for c, node in enumerate(nodes):
        p[np.ix_(outs[c], ins[c])] += np.abs(node.n_ii) ** 2
    x = np.linalg.solve(np.eye(2 * k) - s @ p, s)
    y = x[..., ins[:, :, None, None], outs[None, None, :, :]]  # (..., i, a, j, e)
    a = np.stack([np.real(np.diag(nd.a)) for nd in nodes])
    b = np.stack([np.real(np.diag(nd.b)) for nd in nodes])
    return np.einsum("ia,...iaje,je->...ij", a, y, b, optimize=True)


def composed_section_parts(pool_blocks: tuple, idx: np.ndarray, counts: Sequence[int],
                           pool_map: np.ndarray | None = None) -> list[tuple]:
    """Edge scatterers of the first ``n`` drawn segments of every device, for each count.

    Parameters
    ----------
    pool_blocks : tuple
        Edge scatterers of a pool (:func:`edge_blocks`; probabilities when incoherent).
    idx : numpy.ndarray
        Drawn pool entries (n_devices, n_max).
    counts : sequence of int
        Numbers of segments wanted (each >= 1 and <= n_max).
    pool_map : numpy.ndarray, optional
        A resampling of the pool's segments (bootstrap): segment ``k`` is replaced by
        ``pool_map[k]``, both of its edges together.

    Returns
    -------
    list of tuple
        One block tuple of shape (n_devices, 1, 1) per count.
    """
    if pool_map is not None:
        idx = 2 * pool_map[idx // 2] + idx % 2
    return compose_prefixes(pool_blocks, idx, np.asarray(counts, dtype=np.int64), None)
