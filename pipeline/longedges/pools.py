"""Pools of independent disordered segments: solving them, their container, merging parts.

Every segment is a strip of the device's cross-section (width ``W``, length ``l``) carrying
the run's disorder model, attached to clean leads of the same cross-section and material.
All segments of a pool come from ONE finalized strip system with precalculated leads and
differ only in their ``params`` (the onsite matrices), so they share the lead modes exactly;
their S-matrices are kept in the canonical basis of :mod:`pipeline.longedges.modes`, which
travels with the pool, so pools computed in separate processes can be checked for
compatibility (:func:`merge_segments`).

A segment's disorder leaves evanescent waves that the composition drops. Each segment
therefore holds ``b`` clean cells at both ends inside its scattering region, so the
disordered parts of neighbouring segments are ``2 b`` apart; the error of a junction is of
order ``exp(-2 b / l_ev)`` (measured: see docs/concatenation.md).

Units: lengths nm, energies meV, fields T.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field, replace

import numpy as np

from pipeline.device.templates import two_terminal_strip
from pipeline.errors import ModelError, TransportError
from pipeline.longedges.modes import (
    EVANESCENT_TOLERANCE,
    ModeBasis,
    StripScatterer,
    check_gap,
    check_width,
    decay_length,
    lattice_columns,
    lead_params,
    positive_length,
    transfer_eigenvalues,
)
from pipeline.longedges.smatrix import BLOCK_NAMES, SMatrix, check_blocks, read_only
from pipeline.physics.disorder import realise, term_to_dict
from pipeline.physics.materials import BHZParameters
from pipeline.system.mesh import mesh_device
from pipeline.timestamps import utc_now

__all__ = ["POOL_FORMAT", "SegmentSet", "segment_smatrices", "merge_segments", "buffer_mask",
           "masked_disorder", "contact_sections", "QUARTER_TURN", "turned_onsite"]

#: Format tag of a stored segment pool (see :mod:`pipeline.longedges.storage`).
POOL_FORMAT = "helisweep-segments/1"


def buffer_mask(columns: np.ndarray, n_columns: int, buffer_columns: int) -> np.ndarray:
    """True on sites in the clean buffers: first/last ``buffer_columns`` of every segment.

    Parameters
    ----------
    columns : numpy.ndarray
        Lattice column of every site (columns of consecutive segments continue the count).
    n_columns, buffer_columns : int
        Columns per segment and clean columns at each of its ends.

    Returns
    -------
    numpy.ndarray
        Boolean mask, shape of ``columns``.
    """
    c = np.mod(columns, n_columns)
    return (c < buffer_columns) | (c >= n_columns - buffer_columns)


def masked_disorder(terms, mesh, device, *, seed, realisation, strength, clean):
    """One disorder realisation of a strip, zero on the ``clean`` sites.

    Parameters
    ----------
    terms : sequence of pipeline.physics.disorder terms
    mesh : pipeline.system.mesh.Mesh
        Sites of the strip.
    device : pipeline.device.outline.Device
        The strip's outline and contacts.
    seed, realisation : int
        Root seed and realisation index (the disorder is counter-based per site).
    strength : float
        Multiplier of all terms.
    clean : numpy.ndarray
        Boolean mask of the sites to leave clean (see :func:`buffer_mask`).

    Returns
    -------
    potential : numpy.ndarray
        Scalar potential (meV) per site.
    onsite_extra : numpy.ndarray or None
        Exchange matrices (meV), shape (n_sites, 4, 4), or None without such terms.
    """
    if not terms:
        return np.zeros(mesh.n_sites), None
    pot, extra = realise(terms, mesh, seed=seed, realisation=realisation, strength=strength,
                         outline=device.outline, contacts=device.contacts)
    pot = np.where(clean, 0.0, pot)
    if extra is not None:
        extra = np.where(clean[:, None, None], 0.0, extra)
    return pot, extra


#: Basis change of a quarter turn of the device about z, on (E up, H up, E down, H down):
#: ``U^dagger H_x U`` turns the BHZ hopping along +x into the one along +y, and it leaves the
#: onsite terms of the material (including bulk-inversion asymmetry) unchanged. A device edge
#: along y is therefore an edge along x whose other onsite terms are transformed by ``U``:
#: an in-plane exchange then couples the E and H spins with opposite relative sign.
QUARTER_TURN = np.diag([1.0, 1.0j, 1.0j, 1.0]).astype(complex)


def turned_onsite(extra: np.ndarray | None, quarter_turns: int) -> np.ndarray | None:
    """Onsite matrices (n, 4, 4) of a strip turned by ``quarter_turns`` x 90 degrees.

    Parameters
    ----------
    extra : numpy.ndarray or None
        Onsite matrices (exchange, disorder) of an x-directed strip.
    quarter_turns : int
        Number of quarter turns; only its parity matters (a half turn maps the lattice
        model onto itself).

    Returns
    -------
    numpy.ndarray or None
        ``U^dagger extra U`` for an odd number of turns (see :data:`QUARTER_TURN`).
    """
    if extra is None or int(quarter_turns) % 2 == 0:
        return extra
    u = QUARTER_TURN
    return u.conj().T @ extra @ u


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
        The disorder terms (:mod:`pipeline.physics.disorder`); ``strength`` multiplies them all.
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
        ``1 / min Re lambda`` (nm) of the edge state (:func:`pipeline.physics.bhz.edge_decay_constants`).
    gauge_phase : float
        Gauge phase removed by the clean-strip calibration (radians; 0 without field).
    quarter_turns : int
        0: the segments are edges along x; 1: edges along y of the device, computed in the
        x-directed strip with the onsite terms turned (:func:`turned_onsite`).
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
    quarter_turns: int = 0
    created: str = field(default="", compare=False)

    def __post_init__(self) -> None:
        blocks = check_blocks("SegmentSet", self.r, self.t, self.tp, self.rp, complex)
        if len(blocks[0].shape) != 3:
            raise TransportError(
                f"SegmentSet blocks must have shape (n_segments, m, m), got {blocks[0].shape!r}"
            )
        for name, x in zip(BLOCK_NAMES, blocks, strict=True):
            object.__setattr__(self, name, x)
        if self.basis.n_modes != blocks[0].shape[-1] or blocks[0].shape[-1] != blocks[3].shape[-1]:
            raise TransportError(
                f"SegmentSet blocks have {blocks[0].shape[-1]} left and {blocks[3].shape[-1]} right "
                f"modes but the basis has {self.basis.n_modes}; segments must have the clean lead's "
                "modes on both sides"
            )
        object.__setattr__(self, "kwant_unitarity",
                           read_only(np.asarray(self.kwant_unitarity, dtype=float)))
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
            Exchange matrices (meV), shape (n, 4, 4), zero in the buffers, or None; turned
            with the pool (:attr:`quarter_turns`).
        """
        device = two_terminal_strip(self.segment_length, self.width)
        mesh = mesh if mesh is not None else mesh_device(device, self.lattice_constant)
        pot, extra = masked_disorder(
            self.disorder, mesh, device, seed=self.seed,
            realisation=self.first_realisation + int(k), strength=self.strength,
            clean=buffer_mask(mesh.tags[:, 0], self.n_columns, self.buffer_columns))
        return mesh.tags, pot, turned_onsite(extra, self.quarter_turns)

    def metadata(self) -> dict:
        """JSON-serialisable description (everything but the arrays)."""
        return {
            "format": POOL_FORMAT,
            "material": asdict(self.material),
            "lattice_constant": self.lattice_constant,
            "width": self.width,
            "segment_length": self.segment_length,
            "buffer": self.buffer,
            "energy": self.energy,
            "b_perp": self.b_perp,
            "disorder": [term_to_dict(t) for t in self.disorder],
            "strength": self.strength,
            "seed": self.seed,
            "first_realisation": self.first_realisation,
            "contact_doping": self.contact_doping,
            "evanescent_length": self.evanescent_length,
            "edge_decay_length": self.edge_decay_length,
            "evanescent_bound": self.evanescent_bound,
            "gauge_phase": self.gauge_phase,
            "quarter_turns": self.quarter_turns,
            "n_segments": self.n_segments,
            "n_modes": self.n_modes,
            "created": self.created,
            "units": {"length": "nm", "energy": "meV", "b_perp": "T", "conductance": "e^2/h"},
        }


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
    quarter_turns: int = 0,
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
    disorder_terms : sequence of pipeline.physics.disorder terms
        The run's disorder model (e.g. from :func:`pipeline.sweep.runmodel.disorder_terms`).
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
        that :func:`pipeline.longedges.compose.concatenated_conductance` puts at the ends of
        every edge.
    buffer : float, optional
        Clean length ``b`` (nm) at each end of a segment. Default: the smallest multiple of
        ``a`` with ``exp(-2 b / l_ev) <= evanescent_tolerance``.
    strength : float, optional
        Multiplier of all disorder terms.
    first_realisation : int, optional
        Realisation index of segment 0.
    evanescent_tolerance : float, optional
        Bound on ``exp(-2 b / l_ev)`` above which a
        :class:`~pipeline.errors.ConcatenationWarning` is issued.
    quarter_turns : int, optional
        1: segments of an edge along y (the onsite disorder turned with the device, see
        :func:`turned_onsite`); 0 (default): along x.

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
        Strip narrower than :data:`~pipeline.longedges.modes.EDGE_WIDTH_FACTOR` edge decay
        lengths; clean gap between segments short compared with the evanescent decay length.
    """
    a, rows, n_cols, tol = _check_pool_request(a, width, segment_length, n_segments, seed,
                                               first_realisation, evanescent_tolerance)
    energy = float(energy)
    edge_decay = check_width(material, rows * a, energy)

    strip, l_ev = _pool_strip(material, a, rows, n_cols, energy, b_perp)
    basis = strip.basis
    b_cols = _buffer_columns(buffer, l_ev, tol, a, n_cols, energy)
    check_gap(2 * b_cols * a, l_ev, tol, energy)
    strip.calibrate()
    terms = tuple(disorder_terms)
    blocks, kwant_err = _solve_segments(strip, terms, b_cols, n_segments=int(n_segments),
                                        seed=int(seed), first_realisation=int(first_realisation),
                                        strength=strength, b_perp=b_perp,
                                        quarter_turns=int(quarter_turns) % 2)
    contact_left, contact_right = _contact_sections(material, a, rows, max(b_cols, 1), energy,
                                                    b_perp, contact_doping, basis)
    return SegmentSet(
        *blocks, kwant_unitarity=kwant_err, basis=basis, material=material,
        lattice_constant=a, width=rows * a, segment_length=n_cols * a, buffer=b_cols * a,
        energy=energy, b_perp=float(b_perp), disorder=terms, strength=float(strength),
        seed=int(seed), first_realisation=int(first_realisation),
        contact_doping=float(contact_doping), contact_left=contact_left,
        contact_right=contact_right, evanescent_length=l_ev, edge_decay_length=edge_decay,
        gauge_phase=strip.gauge_phase, quarter_turns=int(quarter_turns) % 2, created=utc_now(),
    )


def _check_pool_request(a, width, segment_length, n_segments, seed, first_realisation,
                        evanescent_tolerance) -> tuple[float, int, int, float]:
    """Validated (a, rows, columns per segment, tolerance) of a pool request."""
    a = positive_length("lattice constant a", a, "nm")
    rows = lattice_columns("width", width, a)
    n_cols = lattice_columns("segment_length", segment_length, a)
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
    return a, rows, n_cols, tol


def _pool_strip(material, a, rows, n_cols, energy, b_perp) -> tuple[StripScatterer, float]:
    """The one (uncalibrated) strip of all segments and the l_ev of its clean lead."""
    # ONE finalized strip for all segments; its clean lead gives l_ev and the open modes
    strip = StripScatterer(material, a, rows, n_cols, energy, b_perp, calibrate=False)
    lam = transfer_eigenvalues(strip.dsys.fsyst.leads[1], energy, lead_params(strip.dsys, b_perp))
    l_ev, _ = decay_length(lam, a)
    if strip.basis.n_modes == 0:
        raise TransportError(
            f"a clean {rows * a:g} nm strip has no propagating mode at E = {energy!r} meV "
            f"(B = {b_perp!r} T), so nothing can be transmitted; choose an energy in a band or "
            "away from the finite-size gap of the edge states (widen the strip)"
        )
    return strip, l_ev


def _buffer_columns(buffer, l_ev: float, tol: float, a: float, n_cols: int, energy: float) -> int:
    """Clean columns at each segment end: as given, or the fewest with exp(-2b/l_ev) <= tol."""
    if buffer is None:
        b_cols = max(1, math.ceil(0.5 * l_ev * math.log(1.0 / tol) / a - 1e-9))
    else:
        b_cols = 0 if float(buffer) == 0.0 else lattice_columns("buffer", buffer, a)
    if 2 * b_cols >= n_cols:
        raise ModelError(
            f"clean buffers of {b_cols * a:g} nm at both ends leave no disorder in a "
            f"{n_cols * a:g} nm segment (l_ev = {l_ev:.1f} nm at E = {energy:g} meV); use "
            f"segment_length > {2 * b_cols * a:g} nm (several times that, so most of the edge "
            "is disordered) or a smaller buffer"
        )
    return b_cols


def _solve_segments(strip: StripScatterer, terms: tuple, b_cols: int, *, n_segments: int,
                    seed: int, first_realisation: int, strength: float, b_perp: float,
                    quarter_turns: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Blocks (4, n_segments, m, m) and Kwant unitarity errors of the pool's segments."""
    m = strip.basis.n_modes
    mesh = strip.dsys.mesh
    clean = buffer_mask(mesh.tags[:, 0], strip.n_columns, b_cols)
    blocks = np.empty((4, n_segments, m, m), complex)
    kwant_err = np.empty(n_segments)
    for k in range(n_segments):
        pot, extra = masked_disorder(terms, mesh, strip.device, seed=seed,
                                     realisation=first_realisation + k,
                                     strength=strength, clean=clean)
        extra = turned_onsite(extra, quarter_turns)
        s = strip.solve(strip.dsys.params(b_perp=b_perp, potential=pot, onsite_extra=extra))
        blocks[:, k] = (s.r, s.t, s.tp, s.rp)
        kwant_err[k] = strip.last_kwant_unitarity
    return blocks, kwant_err


def _contact_sections(material, a, rows, c_cols, energy, b_perp, contact_doping, basis
                      ) -> tuple[SMatrix | None, SMatrix | None]:
    """The clean contact sections (doped lead | clean device | device lead), or None, None."""
    if float(contact_doping) == 0.0:
        return None, None
    d = float(contact_doping)
    sections = []
    for doping in ({"L": d, "R": 0.0}, {"L": 0.0, "R": d}):
        strip = StripScatterer(material, a, rows, c_cols, energy, b_perp, doping=doping,
                               basis=basis)
        sections.append(strip.solve(strip.dsys.params(b_perp=b_perp)))
    return sections[0], sections[1]


def contact_sections(pool: SegmentSet, doping: float) -> tuple[SMatrix | None, SMatrix | None]:
    """Clean contact sections of a pool's strip for a given contact doping.

    Parameters
    ----------
    pool : SegmentSet
        Gives the strip (material, ``a``, width), the energy, field and canonical basis; the
        clean device length of a section is the pool's buffer (at least one column).
    doping : float
        Band shift (meV) of the contact's lead; 0 gives ``(None, None)``.

    Returns
    -------
    tuple of SMatrix or None
        ``(left, right)``: doped lead on the left (device side on the right, canonical basis),
        and the mirror one.
    """
    rows = int(round(pool.width / pool.lattice_constant))
    return _contact_sections(pool.material, pool.lattice_constant, rows,
                             max(pool.buffer_columns, 1), pool.energy, pool.b_perp, doping,
                             pool.basis)


def _same_model(a: SegmentSet, b: SegmentSet) -> list[str]:
    """Names of the model fields in which two pools differ."""
    keys = ("material", "lattice_constant", "width", "segment_length", "buffer", "energy",
            "b_perp", "disorder", "strength", "seed", "contact_doping", "quarter_turns")
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
    cat = {k: np.concatenate([getattr(s, k) for s in sets]) for k in BLOCK_NAMES + ("kwant_unitarity",)}
    return replace(first, **cat)
