"""Direct solves of long strips (Kwant's linear system, :mod:`pipeline.transport.scattering`): the references a composed edge is validated against.

:func:`joined_smatrix` solves the strip made of given pool segments joined in order (exactly
their disorder), which the composed S-matrix must reproduce up to the evanescent coupling
across the junctions. :func:`direct_conductance` solves an independent ensemble of strips as
long as ``n`` segments with the same disorder model, for a statistical comparison with
:func:`pipeline.longedges.compose.concatenated_conductance`.

Units: lengths nm, energies meV, fields T, conductance e^2/h.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from pipeline.device.templates import two_terminal_strip
from pipeline.errors import ModelError, TransportError
from pipeline.longedges.modes import StripScatterer
from pipeline.longedges.pools import SegmentSet, buffer_mask, masked_disorder
from pipeline.longedges.smatrix import SMatrix
from pipeline.system.mesh import mesh_device

__all__ = ["joined_smatrix", "direct_conductance"]


def joined_smatrix(segment_set: SegmentSet, indices: Sequence[int]) -> SMatrix:
    """Direct solve of the strip made of the given segments joined in order.

    The joined strip carries exactly the disorder of those segments (buffers included), so
    it is the reference the composed S-matrix must reproduce up to the evanescent coupling
    across the junctions. Undoped leads; the result is in the canonical basis.

    Parameters
    ----------
    segment_set : SegmentSet
    indices : sequence of int
        Segment indices, left to right.

    Returns
    -------
    SMatrix
    """
    indices = [int(k) for k in indices]
    if not indices or min(indices) < 0 or max(indices) >= segment_set.n_segments:
        raise ModelError(f"indices must be segment numbers in [0, {segment_set.n_segments}), got "
                         f"{indices!r}")
    a, n = segment_set.lattice_constant, segment_set.n_columns
    rows = int(round(segment_set.width / a))
    strip = StripScatterer(segment_set.material, a, rows, n * len(indices), segment_set.energy,
                           segment_set.b_perp, basis=segment_set.basis)
    tags = strip.dsys.mesh.tags
    where = {tuple(t): i for i, t in enumerate(tags.tolist())}
    pot = np.zeros(len(tags))
    extra = None
    seg_mesh = mesh_device(two_terminal_strip(segment_set.segment_length, segment_set.width), a)
    for pos, k in enumerate(indices):
        seg_tags, p, x = segment_set.disorder_of(k, mesh=seg_mesh)
        target = np.array([where[(int(i) + pos * n, int(j))] for i, j in seg_tags.tolist()])
        pot[target] = p
        if x is not None:
            if extra is None:
                extra = np.zeros((len(tags), 4, 4), dtype=complex)
            extra[target] = x
    return strip.solve(strip.dsys.params(b_perp=segment_set.b_perp, potential=pot,
                                         onsite_extra=extra))


def direct_conductance(segment_set: SegmentSet, n_segments: int, n_realisations: int, seed: int,
                       *, first_realisation: int = 0):
    """Direct-solve ensemble of a strip as long as ``n_segments`` segments, for validation.

    The strip has the segment set's width, material, energy, field and contacts, and its
    disorder is drawn over the whole strip (realisation ``first_realisation + r`` of root
    ``seed``) with the same clean buffers every ``segment_length`` as a concatenated edge,
    so both ensembles describe the same disorder model. Use a ``seed`` different from the
    segment pool's: the disorder is keyed by lattice site, so equal seeds would correlate the
    two ensembles.

    Parameters
    ----------
    segment_set : SegmentSet
    n_segments : int
        Length of the strip in segments (``n_segments * segment_length`` nm, plus the contact
        sections when the contacts are doped).
    n_realisations : int
    seed : int
    first_realisation : int, optional

    Returns
    -------
    xarray.Dataset
        ``conductance`` (realisation) in e^2/h and ``kwant_unitarity`` (realisation);
        coordinate ``length`` (nm, size 1) so that ensembles of several lengths concatenate
        along it.
    """
    import xarray as xr  # heavy optional dependency, only needed for the result

    _check_counts_positive(n_segments=n_segments, n_realisations=n_realisations)
    s = segment_set
    a = s.lattice_constant
    c = max(s.buffer_columns, 1) if s.contact_left is not None else 0
    strip = _direct_strip(s, int(n_segments), c)
    cols = strip.dsys.mesh.tags[:, 0] - c
    clean = (buffer_mask(cols, s.n_columns, s.buffer_columns) | (cols < 0)
             | (cols >= s.n_columns * int(n_segments)))
    g, kerr = _direct_ensemble(strip, s, clean, int(n_realisations), seed=int(seed),
                               first_realisation=int(first_realisation))
    length = float(s.n_columns * int(n_segments) * a)
    return xr.Dataset(
        {"conductance": (("length", "realisation"), g[None, :], {"units": "e^2/h"}),
         "kwant_unitarity": (("length", "realisation"), kerr[None, :], {"units": "1"})},
        coords={"length": ("length", [length], {"units": "nm"}),
                "realisation": np.arange(int(n_realisations))},
        attrs={"seed": int(seed), "first_realisation": int(first_realisation),
               "contact_length": float(c * a), "energy": s.energy, "width": s.width},
    )


def _check_counts_positive(**counts) -> None:
    """ModelError naming the first of the given counts that is not a positive integer."""
    for name, value in counts.items():
        if not (isinstance(value, (int, np.integer)) and value >= 1):
            raise ModelError(f"{name} must be a positive integer, got {value!r}")


def _direct_strip(s: SegmentSet, n_segments: int, contact_columns: int) -> StripScatterer:
    """The uncalibrated strip of ``n_segments`` segments plus doped contact sections."""
    rows = int(round(s.width / s.lattice_constant))
    total = s.n_columns * n_segments + 2 * contact_columns
    doping = {"L": s.contact_doping, "R": s.contact_doping} if contact_columns else None
    return StripScatterer(s.material, s.lattice_constant, rows, total, s.energy, s.b_perp,
                          doping=doping, basis=s.basis, calibrate=False)


def _direct_ensemble(strip: StripScatterer, s: SegmentSet, clean: np.ndarray,
                     n_realisations: int, *, seed: int, first_realisation: int
                     ) -> tuple[np.ndarray, np.ndarray]:
    """Conductance and Kwant unitarity error of each realisation of the direct strip."""
    mesh = strip.dsys.mesh
    g = np.empty(n_realisations)
    kerr = np.empty_like(g)
    for r in range(n_realisations):
        pot, extra = masked_disorder(s.disorder, mesh, strip.device, seed=seed,
                                     realisation=first_realisation + r,
                                     strength=s.strength, clean=clean)
        params = strip.dsys.params(b_perp=s.b_perp, potential=pot, onsite_extra=extra)
        try:
            sm = strip.problem.smatrix(s.energy, params, fsyst=strip.fsyst)
        except Exception as exc:  # re-raised with the context a user needs
            raise TransportError(
                f"the scattering solve of the {strip.n_columns * s.lattice_constant:g} nm "
                f"direct strip failed at E = {s.energy!r} meV, realisation "
                f"{first_realisation + r}: {exc}"
            ) from exc
        g[r] = sm.transmission(1, 0)
        kerr[r] = np.linalg.norm(sm.data.conj().T @ sm.data - np.eye(sm.data.shape[0]), ord=2)
    return g, kerr
