"""Local current density: one solved system, one energy, one injecting contact -> current per site.

:func:`current_density` takes the scattering states injected from one contact, turns the bond
currents into a current-density vector per site and measures how much of the current runs
along the device's *free edges* (the outline boundary without the contact segments, where
the leads attach): the *edge fraction* is the share of the summed current magnitude on sites
within two edge-decay lengths of a free edge. It solves nothing else and knows nothing about
configurations or sweeps (see :mod:`pipeline.sweep.probe` for that).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import shapely

from pipeline.device.outline import Device
from pipeline.errors import TransportError
from pipeline.physics.bhz import edge_decay_constants
from pipeline.physics.materials import BHZParameters

if TYPE_CHECKING:  # pipeline.system.mesh loads kwant; only the annotation needs it here
    from pipeline.system.mesh import DeviceSystem

__all__ = ['CurrentDensity', 'current_density', 'site_current_vectors', 'free_edges',
           'edge_decay_length']


@dataclass(frozen=True)
class CurrentDensity:
    """Site-resolved current density injected from one contact, and its share near the edges.

    Attributes
    ----------
    positions : numpy.ndarray
        Site positions (nm), shape (n, 2), in the finalized system's site order.
    vectors : numpy.ndarray
        Current density vector per site, shape (n, 2): half the sum over the site's bonds of
        the bond current times the bond's unit vector. Units: particle flux of one incoming
        lead mode (dimensionless), summed over all incoming modes of the contact.
    magnitude : numpy.ndarray
        ``|vectors|`` per site, shape (n,).
    edge_distance : numpy.ndarray
        Distance (nm) of each site from the nearest free edge.
    edge_decay_length : float
        1 / min Re(lambda) of the material's helical edge state (nm), see
        :func:`pipeline.physics.bhz.edge_decay_constants`.
    edge_fraction : float
        Share of the summed current magnitude on sites within two edge-decay lengths of a free
        edge (NaN when no current flows).
    n_modes : int
        Number of incoming modes of the injecting contact.
    """

    positions: np.ndarray
    vectors: np.ndarray
    magnitude: np.ndarray
    edge_distance: np.ndarray
    edge_decay_length: float
    edge_fraction: float
    n_modes: int

    @property
    def edge_zone(self) -> float:
        """Width (nm) of the zone counted as edge: two edge-decay lengths."""
        return 2.0 * self.edge_decay_length


def site_current_vectors(positions: np.ndarray, hoppings: np.ndarray,
                         bond_current: np.ndarray) -> np.ndarray:
    """Current density vector per site from the bond currents of a finalized system.

    Parameters
    ----------
    positions : numpy.ndarray
        Site positions (nm), shape (n, 2).
    hoppings : numpy.ndarray
        The system graph's edges ``(a, b)``, shape (m, 2), each bond in both directions.
    bond_current : numpy.ndarray
        Kwant's current on each edge (flowing from ``b`` to ``a``), shape (m,).

    Returns
    -------
    numpy.ndarray
        Shape (n, 2): half the sum over each site's bonds of the bond current times the bond's
        unit vector.
    """
    vectors = np.zeros_like(positions, dtype=float)
    if len(hoppings):
        # Kwant's bond current on hopping (a, b) flows from b to a; each bond appears in both
        # directions with opposite sign, so each end collects the same flow vector twice.
        d = positions[hoppings[:, 0]] - positions[hoppings[:, 1]]
        d /= np.linalg.norm(d, axis=1)[:, None]
        f = bond_current[:, None] * d
        np.add.at(vectors, hoppings[:, 0], f)
        np.add.at(vectors, hoppings[:, 1], f)
        vectors /= 4.0
    return vectors


def free_edges(device: Device) -> Any:
    """The outline boundary without the contact segments (where the leads attach).

    Parameters
    ----------
    device : Device

    Returns
    -------
    shapely geometry
        The free part of the boundary; the whole boundary when the contacts cover all of it.
    """
    free = device.outline.boundary
    eps = 1e-6 * max(1.0, max(abs(c) for c in device.outline.bounds))
    for c in device.contacts:
        free = free.difference(c.segment.buffer(eps))
    return device.outline.boundary if free.is_empty else free


def edge_decay_length(material: BHZParameters) -> float:
    """Decay length (nm) of the helical edge state into the bulk: 1 / min Re(lambda).

    Parameters
    ----------
    material : BHZParameters

    Returns
    -------
    float
    """
    return float(1.0 / np.min(np.real(edge_decay_constants(material))))


def _solve_bond_currents(fsyst: Any, energy: float, params: dict,
                         contact: int) -> tuple[np.ndarray, int]:
    """Bond currents summed over the incoming modes of one contact, and the number of modes."""
    import kwant  # heavy; only a solve needs it

    psi = kwant.wave_function(fsyst, energy, params=params)(contact)
    op = kwant.operator.Current(fsyst).bind(params=params)
    bond = np.zeros(fsyst.graph.num_edges)
    for mode in psi:
        bond += op(mode)
    return bond, int(len(psi))


def current_density(dsys: DeviceSystem, energy: float, params: dict,
                    contact: int) -> CurrentDensity:
    """Solve the scattering states injected from one contact and reduce them to site currents.

    The states come from ``kwant.wave_function`` and the bond currents from
    ``kwant.operator.Current``, summed over the contact's incoming modes.

    Parameters
    ----------
    dsys : pipeline.system.mesh.DeviceSystem
        The finalized device system (full four-band system, not a spin block).
    energy : float
        Fermi energy (meV).
    params : dict
        Kwant params of the system (``DeviceSystem.params``).
    contact : int
        Index of the injecting contact in ``dsys.contact_names``.

    Returns
    -------
    CurrentDensity

    Raises
    ------
    TransportError
        If ``contact`` is not an index of the system's contacts.
    """
    n_contacts = len(dsys.contact_names)
    if not 0 <= int(contact) < n_contacts:
        raise TransportError(
            f"contact index {contact!r} is outside 0..{n_contacts - 1}; pick one of "
            f"{', '.join(dsys.contact_names)}"
        )
    fsyst = dsys.fsyst
    bond, n_modes = _solve_bond_currents(fsyst, energy, params, int(contact))
    pos = np.array([s.pos for s in fsyst.sites], dtype=float)
    hops = np.array([(a_, b_) for a_, b_ in fsyst.graph], dtype=int)
    vectors = site_current_vectors(pos, hops, bond)
    magnitude = np.linalg.norm(vectors, axis=1)
    dist = np.asarray(shapely.distance(free_edges(dsys.device), shapely.points(pos)), dtype=float)
    ell = edge_decay_length(dsys.material)
    total = float(magnitude.sum())
    frac = float(magnitude[dist <= 2.0 * ell].sum() / total) if total > 0 else math.nan
    return CurrentDensity(pos, vectors, magnitude, dist, ell, frac, n_modes)
