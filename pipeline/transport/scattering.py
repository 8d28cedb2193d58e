"""The scattering solve: Kwant's linear system, assembled once per system and solved per sample.

Kwant's ``smatrix`` rebuilds the whole sparse Hamiltonian for every solve through one Python
call per site and bond, factorises it from scratch, and injects from every lead through dense
right-hand sides. For a disorder ensemble only the onsite matrices change between samples, so
:class:`ScatteringProblem` takes Kwant's own linear system apart (the one of
``kwant.solvers.common.SparseSolver._make_linear_sys``) and keeps what does not change:

* the hoppings of the scattering region (with the Peierls phases of a field) are read from
  Kwant once per (system, field), through ``hamiltonian_submatrix``;
* a sample adds its onsite matrices, ``params["onsite_stack"]``, as a block-diagonal update
  built from index arrays of the finalized system's site order (no Python call per site);
* the lead blocks come from Kwant's lead modes (``lead.modes``) at each energy; they are
  kept dense, so the sparsity pattern of the whole matrix does not depend on the values;
* MUMPS analyses (orders and symbolically factorises) a pattern once and every later matrix
  of the same pattern (other samples, energies and fields of the same system) reuses it;
* the right-hand sides are sparse (only the injected modes' interface rows), and the modes of
  one lead -- the one with most open modes -- are not injected by default: the missing column
  of the transmission matrix follows from current conservation, ``sum_j T[i, j] = N_i``.

Reproducibility: MUMPS by default chooses a column permutation and scalings from the matrix
*values* during the analysis (ICNTL(6) = 7, ICNTL(8) = 77). A reused analysis would then
depend on which matrix a process happened to analyse first, i.e. on the order a worker meets
realisations, energies and fields. Here the analysis uses the pattern only: no value-based
column permutation (ICNTL(6) = 0) and a scaling computed at each factorisation from the matrix
being factorised (ICNTL(8) = 7). Each matrix is therefore factorised the same way whatever
came before it in the process, and results are bitwise independent of the order of solves.

When Kwant was built without MUMPS (``SOLVER_NAME == "scipy"``) the problem falls back to
Kwant's own ``smatrix`` with SciPy's solver (``backend="kwant"``), with the same results up to
roundoff.
"""

from __future__ import annotations

import hashlib
import math
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass

import kwant
import numpy as np
import scipy.sparse as sp

from pipeline.errors import ModelError, TransportError

__all__ = ['Transmissions', 'ScatteringProblem', 'problem_for', 'BACKENDS', 'PHASES',
           'DETERMINISTIC_ORDERINGS', 'MUMPS_ORDERING', 'SOLVER', 'SOLVER_NAME']

#: Fill-reducing orderings for MUMPS, in order of preference. Kwant picks SCOTCH when it is
#: available, and SCOTCH orderings differ from run to run, so the same solve differed in the
#: 13th digit between runs and workers. MUMPS silently replaces an ordering it was not built
#: with (Debian's build has no METIS) by its own choice, often SCOTCH. AMF is deterministic
#: and was also about 2x faster than SCOTCH on 200x80-site BHZ strips and H-bars here
#: (benchmarks/bench_pipeline.py); AMD, QAMD and PORD are deterministic fall-backs.
DETERMINISTIC_ORDERINGS = ("amf", "amd", "qamd", "pord")
MUMPS_ORDERING = DETERMINISTIC_ORDERINGS[0]

#: ``backend`` values of :class:`ScatteringProblem`: our assembly and MUMPS ("mumps"), or
#: Kwant's own ``smatrix`` with the project's solver instance (``SOLVER``).
BACKENDS = ("mumps", "kwant")

#: Names of the timed phases of a solve (see :attr:`ScatteringProblem.timings`).
PHASES = ("assembly", "lead_modes", "analysis", "factorisation", "solve")

# MUMPS control parameters (1-based, as in the MUMPS users' guide) that make the analysis a
# function of the sparsity pattern only; see the module docstring.
_ICNTL_NO_VALUE_PERMUTATION = (6, 0)  # ICNTL(6) = 0: no column permutation from the values
_ICNTL_FACTOR_TIME_SCALING = (8, 7)  # ICNTL(8) = 7: row/column scaling at factorisation
_ICNTL_BLR = 35  # ICNTL(35): block low-rank factorisation (1: on, MUMPS picks the variant)
_CNTL_BLR_TOLERANCE = 7  # CNTL(7): BLR dropping tolerance
# Kwant's default threshold for partial pivoting (CNTL(1)), kept.
_PIVOT_TOLERANCE = 0.01
# Kwant's Hermiticity tolerance: rtol * max |H| + atol.
_HERMITICITY_RTOL = 1e-13
_HERMITICITY_ATOL = 1e-300


def _make_solver():
    """Kwant's solver instance for the fall-back path, its name, and MUMPS' context class."""
    global MUMPS_ORDERING
    try:
        import kwant.linalg.mumps as linalg_mumps  # heavy, and optional: Kwant built without MUMPS lacks it
        import kwant.solvers.mumps as mumps  # heavy, and optional (as above)
    except ImportError:  # Kwant without MUMPS: SciPy's solver is deterministic already
        import kwant.solvers.sparse as sparse  # heavy: only when MUMPS is absent

        return sparse.Solver(), "scipy", None
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
    return solver, "mumps", linalg_mumps.MUMPSContext


SOLVER, SOLVER_NAME, _MUMPS_CONTEXT = _make_solver()


@dataclass(frozen=True)
class Transmissions:
    """Result of one scattering solve."""

    #: T[i, j]: transmission from contact j to contact i (diagonal: reflection)
    matrix: np.ndarray
    #: number of open (propagating) modes in each lead
    modes: np.ndarray


@dataclass(frozen=True, eq=False)
class _FieldPart:
    """The hoppings of the scattering region at one field, in the canonical entry order."""

    #: row and column of each hopping entry (scattering-region orbitals), sorted by (row, col)
    rows: np.ndarray
    cols: np.ndarray
    #: the hopping values, same order
    data: np.ndarray
    #: digest of (rows, cols): equal digests, equal pattern
    digest: str
    #: largest |entry|, for the Hermiticity tolerance
    max_abs: float
    #: the phase function this part was built with (kept alive so its id stays unique)
    peierls: object


@dataclass(eq=False)
class _Pattern:
    """One sparsity pattern of the full linear system and its MUMPS analysis."""

    #: row and column indices of every entry, in the order the data is concatenated
    rows: np.ndarray
    cols: np.ndarray
    size: int
    #: MUMPS context after the analysis (None until the first factorisation)
    context: object = None


@dataclass(frozen=True, eq=False)
class _LeadBlocks:
    """Kwant's lead modes at one energy and the blocks they add to the linear system."""

    lead_info: list
    nprop: np.ndarray
    #: rank of each lead's inter-cell hopping (number of extra unknowns per lead)
    rank: tuple
    #: the lhs blocks of every lead, flattened in pattern order
    data: np.ndarray
    #: per lead: (interface rows block (n_iface, nprop), lead rows block (rank, nprop))
    rhs: list


class ScatteringProblem:
    """Scattering solves of one finalized device system, assembled once and solved per sample.

    Parameters
    ----------
    dsys : pipeline.system.mesh.DeviceSystem
        The device system. Its scattering region's onsite value function must be the lookup
        ``onsite_stack[site_index[site]]`` of :func:`pipeline.system.mesh.build_system`
        (checked once per field).
    backend : {"mumps", "kwant"}, optional
        "mumps" (default when Kwant has MUMPS): this module's assembly and solve; "kwant":
        Kwant's own ``smatrix`` with :data:`SOLVER` (the default without MUMPS).
    blr_tolerance : float, optional
        Turn on MUMPS' block low-rank factorisation with this dropping tolerance (CNTL(7)),
        e.g. ``1e-12``. Default: off (exact factorisation).
    max_patterns : int, optional
        Analysed sparsity patterns kept, each with the MUMPS factors of its last solve; 1 by
        default (another pattern costs a new analysis, about a sixth of a factorisation on a
        200x80-site strip, and no second set of factors is held).

    Notes
    -----
    Not thread-safe: use one instance per thread (:func:`problem_for` does so).
    The MUMPS analysis of a pattern depends only on the pattern, so any order of solves gives
    bitwise the same numbers.

    Examples
    --------
    >>> problem = ScatteringProblem(dsys)                           # doctest: +SKIP
    >>> problem.transmissions(0.0, dsys.params()).matrix[1, 0]      # doctest: +SKIP
    2.0000000000000004
    """

    def __init__(self, dsys, *, backend: str | None = None, blr_tolerance: float | None = None,
                 max_patterns: int = 1):
        if backend is None:
            backend = "mumps" if SOLVER_NAME == "mumps" else "kwant"
        if backend not in BACKENDS:
            raise ModelError(f"backend must be one of {BACKENDS!r}, got {backend!r}")
        if backend == "mumps" and _MUMPS_CONTEXT is None:
            raise ModelError(
                "backend 'mumps' needs Kwant built with MUMPS, but this Kwant has SciPy's "
                "solver only; use backend='kwant' or leave backend unset"
            )
        if blr_tolerance is not None:
            tol = float(blr_tolerance)
            if not (math.isfinite(tol) and 0.0 < tol < 1.0):
                raise ModelError(
                    f"blr_tolerance must be a number in (0, 1) (e.g. 1e-12), got "
                    f"{blr_tolerance!r}; leave it unset for an exact factorisation"
                )
            if backend != "mumps":
                raise ModelError("blr_tolerance needs backend='mumps' (block low-rank is a "
                                 "MUMPS option); leave it unset with backend='kwant'")
            blr_tolerance = tol
        if not (isinstance(max_patterns, int) and max_patterns >= 1):
            raise ModelError(f"max_patterns must be a positive integer, got {max_patterns!r}")
        self.dsys = dsys
        self.backend = backend
        self.blr_tolerance = blr_tolerance
        self.max_patterns = max_patterns
        #: cumulative seconds per phase (see :data:`PHASES`) and number of solves
        self.timings = dict.fromkeys(PHASES, 0.0)
        self.n_solves = 0
        #: number of MUMPS analyses done (one per new pattern)
        self.n_analyses = 0
        fsyst = dsys.fsyst
        self._n_leads = len(fsyst.leads)
        if backend == "kwant":
            return
        ranges = fsyst.site_ranges
        norbs = {int(r[1]) for r in ranges[:-1]} if ranges is not None else set()
        if len(norbs) != 1:
            raise ModelError(
                f"device {dsys.device.name!r}: the scattering solve needs one number of "
                f"orbitals on every site (found {sorted(norbs)!r}); build the system with "
                "pipeline.system.mesh.build_system"
            )
        self.norbs = norbs.pop()
        n_sites = fsyst.graph.num_nodes
        self.n_orbitals = n_sites * self.norbs
        self._site_to_mesh = _site_order(fsyst, dsys.mesh.tags)
        o = self.norbs
        base = (np.arange(n_sites, dtype=np.int32) * o)[:, None, None]
        orbital = np.arange(o, dtype=np.int32)
        self._onsite_rows = np.broadcast_to(base + orbital[None, :, None], (n_sites, o, o))
        self._onsite_cols = np.broadcast_to(base + orbital[None, None, :], (n_sites, o, o))
        self._iface = [
            (np.asarray(iface, dtype=np.int32)[:, None] * o + np.arange(o, dtype=np.int32)).ravel()
            for iface in fsyst.lead_interfaces
        ]
        self._fields: OrderedDict = OrderedDict()
        self._patterns: OrderedDict = OrderedDict()

    # ------------------------------------------------------------------ public API
    def transmissions(self, energy: float, params: dict, *, fsyst=None,
                      inject: str = "all_but_one") -> Transmissions:
        """Total transmissions between all contacts at Fermi energy ``energy`` (meV).

        Parameters
        ----------
        energy : float
            Fermi energy (meV).
        params : dict
            Kwant parameters from :meth:`DeviceSystem.params` or ``block_params``.
        fsyst : kwant.system.FiniteSystem, optional
            ``dsys.fsyst`` with precalculated lead modes at ``energy`` (``precalculate``).
        inject : {"all_but_one", "all"}
            "all_but_one" (default): no injection from the lead with most open modes (the
            last of them on a tie); its column follows from ``sum_j T[i, j] = N_i``. "all":
            inject from every lead.

        Returns
        -------
        Transmissions
            ``T[i, j]`` from contact ``j`` to contact ``i`` (diagonal: reflection) and the
            open modes per lead.

        Raises
        ------
        TransportError
            A lead has no open mode at ``energy``, or the solve failed.
        """
        if inject not in ("all_but_one", "all"):
            raise ModelError(f"inject must be 'all_but_one' or 'all', got {inject!r}")
        if self.backend == "kwant":
            smat = self._kwant_smatrix(energy, params, fsyst)
            modes = np.array([smat.num_propagating(i) for i in range(self._n_leads)])
            self._check_open(modes, energy)
            n = self._n_leads
            T = np.empty((n, n))
            for i in range(n):
                for j in range(n):
                    T[i, j] = smat.transmission(i, j)
            return Transmissions(T, modes)
        leads = self._lead_blocks(energy, params, fsyst)
        nprop = leads.nprop
        n = self._n_leads
        if inject == "all" or n == 1:
            skip = None
        else:  # the lead with most open modes saves most right-hand sides
            skip = n - 1 - int(np.argmax(nprop[::-1]))
        in_leads = [j for j in range(n) if j != skip]
        data = self._solve(energy, params, leads, in_leads)
        out_off = np.concatenate([[0], np.cumsum(nprop)])
        in_off = np.concatenate([[0], np.cumsum(nprop[in_leads])])
        prob = np.abs(data) ** 2
        # sum |S|^2 over the out-modes of each lead, then over the in-modes of each lead
        rows = np.add.reduceat(prob, out_off[:-1], axis=0)
        T = np.empty((n, n))
        T[:, in_leads] = np.add.reduceat(rows, in_off[:-1], axis=1)
        if skip is not None:
            T[:, skip] = nprop - T[:, in_leads].sum(axis=1)
        return Transmissions(T, nprop.copy())

    def smatrix(self, energy: float, params: dict, *, fsyst=None):
        """The full, mode-resolved scattering matrix (injection from and into every lead).

        Parameters are those of :meth:`transmissions`.

        Returns
        -------
        kwant.solvers.common.SMatrix
            Kwant's own result object (``data``, ``submatrix(i, j)``, ``transmission``,
            ``lead_info``), in the basis of Kwant's lead modes, as ``kwant.smatrix`` gives.
        """
        if self.backend == "kwant":
            return self._kwant_smatrix(energy, params, fsyst)
        leads = self._lead_blocks(energy, params, fsyst)
        everything = list(range(self._n_leads))
        data = self._solve(energy, params, leads, everything)
        return kwant.solvers.common.SMatrix(data, leads.lead_info, everything, everything,
                                            current_conserving=True)

    @property
    def holds_factors(self) -> bool:
        """True while a MUMPS analysis (and the factors of the last solve) is held."""
        return self.backend == "mumps" and any(
            p.context is not None for p in self._patterns.values())

    def release(self) -> None:
        """Free the MUMPS analyses and factors held (the next solve analyses again)."""
        for pattern in self._patterns.values() if self.backend == "mumps" else ():
            pattern.context = None

    def reset_timings(self) -> None:
        """Set :attr:`timings` and the solve count to zero."""
        self.timings = dict.fromkeys(PHASES, 0.0)
        self.n_solves = 0

    # ------------------------------------------------------------------ Kwant fall-back
    def _kwant_smatrix(self, energy, params, fsyst):
        fsyst = self.dsys.fsyst if fsyst is None else fsyst
        t0 = time.perf_counter()
        try:
            smat = SOLVER.smatrix(fsyst, energy, params=params)
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"Kwant's scattering solve failed at E = {energy!r} meV on device "
                f"{self.dsys.device.name!r}: {exc}"
            ) from exc
        self.timings["solve"] += time.perf_counter() - t0
        self.n_solves += 1
        return smat

    # ------------------------------------------------------------------ the MUMPS path
    def _check_open(self, nprop, energy) -> None:
        closed = [self.dsys.contact_names[i] for i in range(self._n_leads) if nprop[i] == 0]
        if closed:
            raise TransportError(
                f"lead(s) {closed!r} have no open mode at E = {energy!r} meV: no current can "
                f"enter there. Use metallic contacts (contact_doping of tens of meV) or choose "
                f"an energy where the lead bands are occupied"
            )

    def _lead_blocks(self, energy, params, fsyst) -> _LeadBlocks:
        """Kwant's lead modes and the lead blocks of the linear system (as Kwant builds them)."""
        fsyst = self.dsys.fsyst if fsyst is None else fsyst
        if len(fsyst.leads) != self._n_leads:
            raise ModelError(
                f"fsyst has {len(fsyst.leads)} leads but device {self.dsys.device.name!r} has "
                f"{self._n_leads}; pass dsys.fsyst or its precalculate() copy"
            )
        t0 = time.perf_counter()
        infos, nprop, rank, parts, rhs = [], [], [], [], []
        for i, lead in enumerate(fsyst.leads):
            try:
                prop, stab = lead.modes(energy, params=params)
            except Exception as exc:  # re-raised with the context a user needs
                raise TransportError(
                    f"Kwant's lead modes of contact {self.dsys.contact_names[i]!r} failed at "
                    f"E = {energy!r} meV on device {self.dsys.device.name!r}: {exc}"
                ) from exc
            u, ulinv, m, v = stab.vecs, stab.vecslmbdainv, int(stab.nmodes), stab.sqrt_hop
            if v is None or len(u) == 0 or v.shape[0] != self._iface[i].size:
                raise TransportError(
                    f"the lead of contact {self.dsys.contact_names[i]!r} does not couple to "
                    f"its {self._iface[i].size} interface orbitals as Kwant's linear system "
                    "needs; build the system with pipeline.system.mesh.build_system"
                )
            r = v.shape[1]
            if u.shape[1] != m + r:
                raise TransportError(
                    f"Kwant's stabilised modes of contact {self.dsys.contact_names[i]!r} have "
                    f"{u.shape[1]} columns, not open modes + hopping rank = {m + r}, at "
                    f"E = {energy!r} meV; this Kwant version is not the one the solve was "
                    "validated with (Kwant 1.5.0)"
                )
            # Kwant's blocks: [[H - E, V^+ u_out], [V, -u_out lambda^-1]], injection
            # rhs = [-V^+ u_in; u_in lambda^-1] (kwant/solvers/common.py, _make_linear_sys)
            parts += [(v @ u[:, m:]).ravel(), v.conj().T.ravel(), (-ulinv[:, m:]).ravel()]
            rhs.append((-(v @ u[:, :m]), ulinv[:, :m]))
            infos.append(prop)
            nprop.append(m)
            rank.append(r)
        nprop = np.array(nprop)
        self._check_open(nprop, energy)
        self.timings["lead_modes"] += time.perf_counter() - t0
        return _LeadBlocks(infos, nprop, tuple(rank), np.concatenate(parts), rhs)

    def _field_part(self, params) -> _FieldPart:
        """The hoppings at the params' field, read from Kwant once and cached."""
        peierls = params.get("peierls")
        key = (float(params.get("b_perp", 0.0)), id(peierls))
        part = self._fields.get(key)
        if part is not None:
            self._fields.move_to_end(key)
            return part
        part = self._read_hoppings(params)
        self._fields[key] = part
        while len(self._fields) > 4:
            self._fields.popitem(last=False)
        return part

    def _read_hoppings(self, params) -> _FieldPart:
        """Kwant's Hamiltonian with a probe onsite stack: the hoppings, and a check of the
        onsite lookup (every onsite entry must be the probe's entry of the right mesh site)."""
        o = self.norbs
        n_mesh = len(self.dsys.mesh.tags)
        probe = (np.arange(n_mesh * o * o, dtype=float) + 1.0).reshape(n_mesh, o, o)
        probe_params = dict(params)
        probe_params["onsite_stack"] = probe.astype(complex)
        try:
            h = self.dsys.fsyst.hamiltonian_submatrix(sparse=True, params=probe_params).tocoo()
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"Kwant could not evaluate the Hamiltonian of device "
                f"{self.dsys.device.name!r} with these params: {exc}"
            ) from exc
        rows, cols, data = h.row.astype(np.int32), h.col.astype(np.int32), h.data
        onsite = rows // o == cols // o
        expected = probe[self._site_to_mesh[rows[onsite] // o], rows[onsite] % o,
                         cols[onsite] % o]
        if onsite.sum() != self.n_orbitals * o or not np.array_equal(data[onsite], expected):
            raise ModelError(
                f"the onsite matrices of device {self.dsys.device.name!r} are not the lookup "
                "onsite_stack[site_index[site]] this solve assumes; build the system with "
                "pipeline.system.mesh.build_system"
            )
        hop = ~onsite
        rows, cols, data = rows[hop], cols[hop], data[hop]
        order = np.lexsort((cols, rows))
        rows, cols, data = rows[order], cols[order], np.ascontiguousarray(data[order])
        n = self.n_orbitals
        hmat = sp.csr_matrix((data, (rows, cols)), shape=(n, n))
        max_abs = float(np.abs(data).max(initial=0.0))
        tol = _HERMITICITY_RTOL * max_abs + _HERMITICITY_ATOL
        if np.any(np.abs((hmat - hmat.conj().T).data) > tol):
            raise ModelError(
                f"the hoppings of device {self.dsys.device.name!r} are not Hermitian at "
                f"b_perp = {params.get('b_perp', 0.0)!r} T; check the Peierls phase functions "
                "in params"
            )
        digest = hashlib.sha1(rows.tobytes() + cols.tobytes()).hexdigest()
        return _FieldPart(rows, cols, data, digest, max_abs, params.get("peierls"))

    def _onsite(self, params, energy, field: _FieldPart) -> tuple[np.ndarray, np.ndarray]:
        """The onsite entries minus ``energy`` (site order of the system) and their mask."""
        stack = params.get("onsite_stack")
        o, n_mesh = self.norbs, len(self.dsys.mesh.tags)
        stack = np.asarray(stack) if stack is not None else None
        if stack is None or stack.shape != (n_mesh, o, o):
            raise ModelError(
                f"params['onsite_stack'] must have shape ({n_mesh}, {o}, {o}) for device "
                f"{self.dsys.device.name!r}, got "
                f"{None if stack is None else stack.shape!r}; build params with "
                "DeviceSystem.params or block_params"
            )
        if not np.all(np.isfinite(stack)):
            bad = int(np.flatnonzero(~np.isfinite(stack).all(axis=(1, 2)))[0])
            raise ModelError(
                f"params['onsite_stack'] has a non-finite entry at site {bad} of device "
                f"{self.dsys.device.name!r}: {stack[bad]!r}; check the potential and disorder"
            )
        deviation = np.abs(stack - stack.conj().transpose(0, 2, 1))
        tol = _HERMITICITY_RTOL * max(field.max_abs, float(np.abs(stack).max())) + \
            _HERMITICITY_ATOL
        if np.any(deviation > tol):
            bad = int(np.argmax(deviation.max(axis=(1, 2))))
            raise ModelError(
                f"the onsite matrix of site {bad} of device {self.dsys.device.name!r} is not "
                f"Hermitian (|H - H^+| up to {float(deviation[bad].max()):.3g} meV); fix the "
                "onsite terms (exchange, disorder) that built params['onsite_stack']"
            )
        # structural entries: the diagonal always, an off-diagonal entry when non-zero at any
        # site of this sample (a 4-band system without spin mixing stays two blocks)
        mask = np.any(stack != 0, axis=0) | np.eye(o, dtype=bool)
        values = stack[self._site_to_mesh][:, mask].astype(complex)
        entries = np.flatnonzero(mask.ravel())
        values[:, entries // o == entries % o] -= energy
        return values.ravel(), mask

    def _pattern(self, field: _FieldPart, mask: np.ndarray, leads: _LeadBlocks) -> _Pattern:
        """The pattern of the linear system (cached by its digest, onsite mask and lead ranks)."""
        key = (field.digest, mask.tobytes(), leads.rank)
        pattern = self._patterns.get(key)
        if pattern is not None:
            self._patterns.move_to_end(key)
            return pattern
        n = self.n_orbitals
        rows, cols = [field.rows, self._onsite_rows[:, mask].ravel()], \
            [field.cols, self._onsite_cols[:, mask].ravel()]
        offset = n
        for iface, r in zip(self._iface, leads.rank):
            lead = np.arange(offset, offset + r, dtype=np.int32)
            rows += [np.repeat(iface, r), np.repeat(lead, iface.size), np.repeat(lead, r)]
            cols += [np.tile(lead, iface.size), np.tile(iface, r), np.tile(lead, r)]
            offset += r
        pattern = _Pattern(np.concatenate(rows), np.concatenate(cols), offset)
        self._patterns[key] = pattern
        while len(self._patterns) > self.max_patterns:
            self._patterns.popitem(last=False)  # frees that context's analysis and factors
        return pattern

    def _analysed_context(self, pattern: _Pattern, matrix):
        """A MUMPS context holding the analysis of ``pattern`` (made on first use)."""
        if pattern.context is not None:
            return pattern.context
        ctx = _MUMPS_CONTEXT()
        # The context makes its MUMPS instance at its first analysis; a 1x1 analysis creates
        # it so that the controls below are in place before the real (pattern-only) analysis.
        ctx.analyze(sp.coo_matrix(np.ones((1, 1), dtype=complex)), ordering=MUMPS_ORDERING)
        inst = ctx.mumps_instance
        for index, value in (_ICNTL_NO_VALUE_PERMUTATION, _ICNTL_FACTOR_TIME_SCALING):
            inst.icntl[index] = value
        if self.blr_tolerance is not None:
            inst.icntl[_ICNTL_BLR] = 1
            inst.cntl[_CNTL_BLR_TOLERANCE] = self.blr_tolerance
        ctx.analyze(matrix, ordering=MUMPS_ORDERING)
        pattern.context = ctx
        self.n_analyses += 1
        return ctx

    def _solve(self, energy, params, leads: _LeadBlocks, in_leads: list[int]) -> np.ndarray:
        """Factorise and solve; the S-matrix rows of all leads' outgoing modes, columns of the
        incoming modes of ``in_leads`` (Kwant's ``SMatrix.data`` layout)."""
        t0 = time.perf_counter()
        field = self._field_part(params)
        onsite, mask = self._onsite(params, energy, field)
        pattern = self._pattern(field, mask, leads)
        data = np.concatenate([field.data, onsite, leads.data])
        matrix = sp.coo_matrix((data, (pattern.rows, pattern.cols)),
                               shape=(pattern.size, pattern.size))
        t1 = time.perf_counter()
        self.timings["assembly"] += t1 - t0
        try:
            ctx = self._analysed_context(pattern, matrix)
            t2 = time.perf_counter()
            self.timings["analysis"] += t2 - t1
            ctx.factor(matrix, ordering=MUMPS_ORDERING, pivot_tol=_PIVOT_TOLERANCE,
                       reuse_analysis=True)
            t3 = time.perf_counter()
            self.timings["factorisation"] += t3 - t2
            rhs = self._rhs(pattern.size, leads, in_leads)
            x = ctx.solve(rhs)
        except Exception as exc:  # re-raised with the context a user needs
            pattern.context = None  # a failed context is not reused
            raise TransportError(
                f"the scattering solve (MUMPS) failed at E = {energy!r} meV on device "
                f"{self.dsys.device.name!r}: {exc}"
            ) from exc
        offsets = self.n_orbitals + np.concatenate([[0], np.cumsum(leads.rank)])[:-1]
        kept = np.concatenate([off + np.arange(m) for off, m in zip(offsets, leads.nprop)])
        out = np.ascontiguousarray(x[kept])
        self.timings["solve"] += time.perf_counter() - t3
        self.n_solves += 1
        return out

    def _rhs(self, size: int, leads: _LeadBlocks, in_leads: list[int]):
        """Sparse right-hand sides: the injected modes of ``in_leads``, in Kwant's layout."""
        offsets = self.n_orbitals + np.concatenate([[0], np.cumsum(leads.rank)])[:-1]
        rows, cols, vals = [], [], []
        col = 0
        for j in in_leads:
            iface_part, lead_part = leads.rhs[j]
            m = iface_part.shape[1]
            lead_rows = offsets[j] + np.arange(lead_part.shape[0])
            rows += [np.repeat(self._iface[j], m), np.repeat(lead_rows, m)]
            cols += [np.tile(col + np.arange(m), self._iface[j].size),
                     np.tile(col + np.arange(m), lead_rows.size)]
            vals += [iface_part.ravel(), lead_part.ravel()]
            col += m
        return sp.csc_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                             shape=(size, col))


def _site_order(fsyst, mesh_tags: np.ndarray) -> np.ndarray:
    """Mesh index of each site of the finalized system (Kwant orders sites its own way)."""
    tags = np.array([s.tag for s in fsyst.sites], dtype=np.int64)
    mesh_tags = np.asarray(mesh_tags, dtype=np.int64)
    lo = mesh_tags.min(axis=0)
    span = mesh_tags.max(axis=0) - lo + 1
    key_mesh = (mesh_tags[:, 0] - lo[0]) * span[1] + (mesh_tags[:, 1] - lo[1])
    key_sys = (tags[:, 0] - lo[0]) * span[1] + (tags[:, 1] - lo[1])
    order = np.argsort(key_mesh)
    pos = np.searchsorted(key_mesh[order], key_sys)
    pos = np.minimum(pos, len(order) - 1)
    found = order[pos]
    if len(tags) != len(mesh_tags) or not np.array_equal(mesh_tags[found], tags):
        raise ModelError(
            "the finalized system's sites are not the mesh's sites; build the system with "
            "pipeline.system.mesh.build_system"
        )
    return found


_LOCAL = threading.local()
#: problems kept per thread; only the one used last keeps its MUMPS analysis and factors
_MAX_PROBLEMS = 4


def problem_for(dsys) -> ScatteringProblem:
    """The :class:`ScatteringProblem` of a device system, made once per thread and reused.

    Parameters
    ----------
    dsys : pipeline.system.mesh.DeviceSystem

    Returns
    -------
    ScatteringProblem
        With the default backend. The last few systems used in this thread keep theirs;
        switching to another system frees the MUMPS factors of the previous one, so a thread
        holds at most one set of factors.
    """
    cache = getattr(_LOCAL, "problems", None)
    if cache is None:
        cache = _LOCAL.problems = OrderedDict()
    key = id(dsys)
    if cache and next(reversed(cache)) != key:
        cache[next(reversed(cache))][1].release()  # one set of factors per thread
    entry = cache.get(key)
    if entry is None or entry[0] is not dsys:
        entry = cache[key] = (dsys, ScatteringProblem(dsys))  # dsys kept: its id stays unique
    cache.move_to_end(key)
    while len(cache) > _MAX_PROBLEMS:
        cache.popitem(last=False)
    return entry[1]
