"""Scattering: a finalized device system and parameters -> the full transmission matrix.

``T[i, j]`` is the total transmission probability from contact ``j`` to contact ``i`` summed
over modes and spin (Kwant's ``transmission(to, from)``); the diagonal holds the total
reflection probability. Together with the number of open modes per lead it is all the
Landauer-Buttiker solver (:mod:`pipeline.transport.landauer`) needs.

The solve itself is :class:`pipeline.transport.scattering.ScatteringProblem` (Kwant's linear
system assembled once per system, MUMPS' analysis reused, sparse right-hand sides); this
module keeps the functions the rest of the package calls and the solver settings.
"""

from __future__ import annotations

import numpy as np

from pipeline.system.mesh import DeviceSystem
from pipeline.transport.scattering import (
    DETERMINISTIC_ORDERINGS,
    MUMPS_ORDERING,
    SOLVER,
    SOLVER_NAME,
    Transmissions,
    problem_for,
)

__all__ = ['Transmissions', 'transmission_matrix', 'block_transmission_matrix', 'open_modes',
           'DETERMINISTIC_ORDERINGS', 'MUMPS_ORDERING', 'SOLVER', 'SOLVER_NAME']


def open_modes(dsys: DeviceSystem, energy: float, params: dict, fsyst=None) -> np.ndarray:
    """Number of propagating modes in each lead at ``energy`` (meV)."""
    fsyst = dsys.fsyst if fsyst is None else fsyst
    return np.array(
        [lead.modes(energy, params=params)[0].velocities.size // 2 for lead in fsyst.leads]
    )


def transmission_matrix(
    dsys: DeviceSystem, energy: float, params: dict, *, fsyst=None, inject: str = "all_but_one"
) -> Transmissions:
    """Full transmission matrix between all contacts at Fermi energy ``energy`` (meV).

    Parameters
    ----------
    dsys : DeviceSystem
    energy : float
        Fermi energy (meV).
    params : dict
        From :meth:`DeviceSystem.params` (or one entry of ``block_params``).
    fsyst : kwant.system.FiniteSystem, optional
        ``dsys.fsyst`` with precalculated lead modes at ``energy`` (``fsyst.precalculate``).
    inject : {"all_but_one", "all"}
        See :meth:`pipeline.transport.scattering.ScatteringProblem.transmissions`.

    Returns
    -------
    Transmissions

    Raises
    ------
    TransportError
        A lead has no open mode (no current can enter there), with the energy and the fix;
        or the solve failed.

    Examples
    --------
    >>> transmission_matrix(dsys, 0.0, dsys.params()).matrix[1, 0]  # doctest: +SKIP
    2.0000000000000004
    """
    return problem_for(dsys).transmissions(energy, params, fsyst=fsyst, inject=inject)


def block_transmission_matrix(
    dsys: DeviceSystem, energy: float, blocks: list[tuple[dict, bool]], *, fsyst_for=None
) -> Transmissions:
    """Total transmissions of a spin-block system: the sum over the two spin blocks.

    ``blocks`` comes from :meth:`pipeline.system.mesh.DeviceSystem.block_params`; ``fsyst_for``
    maps a field value (T) to a finalized system with precalculated leads (the spin-down
    block is solved at the reversed field). A block listed twice is solved once.
    """
    total, modes, solved = None, None, {}
    for params, transpose in blocks:
        key = id(params)
        if key not in solved:
            b = params.get("b_perp", 0.0)
            fs = fsyst_for(b) if fsyst_for is not None else None
            solved[key] = transmission_matrix(dsys, energy, params, fsyst=fs)
        res = solved[key]
        T = res.matrix.T if transpose else res.matrix
        total = T.copy() if total is None else total + T
        modes = res.modes.copy() if modes is None else modes + res.modes
    return Transmissions(total, modes)
