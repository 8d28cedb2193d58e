"""Scattering: a finalized device system and parameters -> the full transmission matrix.

``T[i, j]`` is the total transmission probability from contact ``j`` to contact ``i`` summed
over modes and spin (Kwant's ``transmission(to, from)``); the diagonal holds the total
reflection probability. Together with the number of open modes per lead it is all the
Landauer-Buttiker solver (:mod:`pipeline.transport.landauer`) needs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from pipeline.errors import TransportError
from pipeline.system.mesh import DeviceSystem

__all__ = ['Transmissions', 'transmission_matrix', 'block_transmission_matrix', 'open_modes', 'MUMPS_ORDERING', 'SOLVER']

#: Fill-reducing orderings for MUMPS, in order of preference. Kwant picks SCOTCH when it is
#: available, and SCOTCH orderings differ from run to run, so the same solve differed in the
#: 13th digit between runs and workers. MUMPS silently replaces an ordering it was not built
#: with (Debian's build has no METIS) by its own choice, often SCOTCH. AMF is deterministic
#: and was also about 2x faster than SCOTCH on 200x80-site BHZ strips and H-bars here
#: (benchmarks/bench_pipeline.py); AMD, QAMD and PORD are deterministic fall-backs.
DETERMINISTIC_ORDERINGS = ("amf", "amd", "qamd", "pord")
MUMPS_ORDERING = DETERMINISTIC_ORDERINGS[0]


def _make_solver():
    """Our own solver instance (MUMPS with a deterministic ordering, else SciPy's)."""
    global MUMPS_ORDERING
    try:
        import kwant.linalg.mumps as linalg_mumps  # heavy, and optional: Kwant built without MUMPS lacks it
        import kwant.solvers.mumps as mumps  # heavy, and optional (as above)
    except ImportError:  # Kwant without MUMPS: SciPy's solver is deterministic already
        import kwant.solvers.sparse as sparse  # heavy: only when MUMPS is absent

        return sparse.Solver(), "scipy"
    available = linalg_mumps.possible_orderings()
    usable = [o for o in DETERMINISTIC_ORDERINGS if o in available]
    if not usable:
        raise RuntimeError(
            f"this MUMPS build offers no deterministic ordering (has {available!r}); results "
            f"would differ between runs. Rebuild Kwant against a MUMPS with AMD/AMF"
        )
    MUMPS_ORDERING = usable[0]
    solver = mumps.Solver()
    solver.options(ordering=MUMPS_ORDERING)
    return solver, "mumps"


SOLVER, SOLVER_NAME = _make_solver()


@dataclass(frozen=True)
class Transmissions:
    """Result of one scattering solve."""

    #: T[i, j]: transmission from contact j to contact i (diagonal: reflection)
    matrix: np.ndarray
    #: number of open (propagating) modes in each lead
    modes: np.ndarray


def open_modes(dsys: DeviceSystem, energy: float, params: dict, fsyst=None) -> np.ndarray:
    """Number of propagating modes in each lead at ``energy`` (meV)."""
    fsyst = dsys.fsyst if fsyst is None else fsyst
    return np.array(
        [lead.modes(energy, params=params)[0].velocities.size // 2 for lead in fsyst.leads]
    )


def transmission_matrix(
    dsys: DeviceSystem, energy: float, params: dict, *, fsyst=None
) -> Transmissions:
    """Full transmission matrix between all contacts at Fermi energy ``energy`` (meV).

    ``fsyst`` may be a version of ``dsys.fsyst`` with precalculated lead modes
    (``fsyst.precalculate``). Raises :class:`TransportError` when a lead has no open mode
    (no current can enter there), with the energy and the fix.
    """
    fsyst = dsys.fsyst if fsyst is None else fsyst
    try:
        smat = SOLVER.smatrix(fsyst, energy, params=params)
    except Exception as exc:  # re-raised with the context a user needs
        raise TransportError(
            f"Kwant's scattering solve failed at E = {energy!r} meV on device "
            f"{dsys.device.name!r}: {exc}"
        ) from exc
    n = len(fsyst.leads)
    modes = np.array([smat.num_propagating(i) for i in range(n)])
    closed = [dsys.contact_names[i] for i in range(n) if modes[i] == 0]
    if closed:
        raise TransportError(
            f"lead(s) {closed!r} have no open mode at E = {energy!r} meV: no current can enter "
            f"there. Use metallic contacts (contact_doping of tens of meV) or choose an energy "
            f"where the lead bands are occupied"
        )
    T = np.empty((n, n))
    for i in range(n):
        for j in range(n):
            T[i, j] = smat.transmission(i, j)
    return Transmissions(T, modes)


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
