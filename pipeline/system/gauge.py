"""Kwant's magnetic gauge for a device, with its failure turned into a message a user can act on.

``kwant.physics.magnetic_gauge`` fixes the gauge of a system with leads in several directions.
It cannot when the leads of two contacts touch (their first cells share a device site, as
when contacts meet at a corner of the outline) so that gauge-fixed bonds close a loop through
the leads. Kwant then raises a ``ValueError`` with its explanation, except when the loop runs
through more than two leads: there its message is built with ``lil_matrix.A``, which SciPy
1.14 removed, and an ``AttributeError`` from deep inside Kwant is all the user sees. Both
become a :class:`~pipeline.errors.ModelError` naming the device, the contacts that touch and
the fix.
"""

from __future__ import annotations

from itertools import combinations

import kwant

from pipeline.device.outline import Device
from pipeline.errors import ModelError

__all__ = ["magnetic_gauge", "touching_contacts"]


def touching_contacts(fsyst, names: tuple[str, ...]) -> list[tuple[str, str]]:
    """Pairs of contacts whose leads share an interface site of the finalized system.

    Parameters
    ----------
    fsyst : kwant.system.FiniteSystem
        The finalized system with one lead per contact, in the order of ``names``.
    names : tuple of str
        Contact names, one per lead.

    Returns
    -------
    list of (str, str)
        The pairs, in lead order; empty when no two leads touch.
    """
    faces = [set(map(int, iface)) for iface in fsyst.lead_interfaces]
    pads = [set(map(int, pad)) for pad in fsyst.lead_paddings]
    return [(names[i], names[j]) for i, j in combinations(range(len(faces)), 2)
            if faces[i] & (faces[j] | pads[j]) or faces[j] & (faces[i] | pads[i])]


def _is_gauge_check_failure(exc: BaseException) -> bool:
    """True for the two ways Kwant's check of gauge-fixed loops fails (see module)."""
    if isinstance(exc, AttributeError):
        # the message of the loop-through-several-leads case uses lil_matrix.A (SciPy < 1.14)
        return "'A'" in str(exc)
    return isinstance(exc, ValueError) and "gauge" in str(exc)


def magnetic_gauge(fsyst, device: Device, lattice_constant: float):
    """``kwant.physics.magnetic_gauge(fsyst)``, or a :class:`ModelError` saying why not.

    Parameters
    ----------
    fsyst : kwant.system.FiniteSystem
        The device's finalized system, one lead per contact of ``device``.
    device : Device
        The device (its name and contact names go into the message).
    lattice_constant : float
        Lattice constant in nm (the message says how far to move the contacts).

    Returns
    -------
    callable
        Kwant's gauge object: called with the fluxes it returns the Peierls phases.

    Raises
    ------
    ModelError
        If the contacts sit too close for the gauge to be fixed in a field.
    """
    try:
        return kwant.physics.magnetic_gauge(fsyst)
    except (ValueError, AttributeError) as exc:
        if not _is_gauge_check_failure(exc):
            raise
        pairs = touching_contacts(fsyst, device.contact_names)
        where = (", ".join(f"{a} and {b}" for a, b in pairs) if pairs
                 else "(no pair shares a site; the leads overlap further out)")
        a = lattice_constant
        raise ModelError(
            f"device {device.name!r} cannot be put in a perpendicular field: Kwant's gauge "
            f"fixing needs the contacts apart, but the leads of contacts {where} touch (they "
            f"share a site of the device, as where two contacts meet at a corner), which closes "
            f"a loop of gauge-fixed bonds through the leads. Fix: end these contacts at least "
            f"{2 * a:g} nm (two lattice constants) before the corner they share, or keep "
            f"b_perp = 0 for this device"
        ) from exc
