"""Checks to run before spending compute on a device: is the model in the regime the user
thinks, is the lattice fine enough, how big is a solve.

* bulk gap and band inversion (sign of M/B) of the continuum and the lattice model;
* edge Dirac point and edge velocity read off the bands of a clean strip of the device's
  narrowest contact width, next to the analytic values of Zhou et al., PRL 101, 246807 (2008);
* discretisation error: the same lattice quantities at ``a/2``;
* finite-size coupling of the two edges (edge-state decay length versus strip width);
* number of sites and a memory estimate per solve;
* with ``with_field=True``: that Kwant can fix the magnetic gauge (contacts not too close);
* a figure of the outline, contacts, gates and mesh.

Everything here is a model estimate for the chosen parameters, not a statement about a
fabricated device.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass

import kwant
import numpy as np

from pipeline.device.outline import Device
from pipeline.errors import ModelError, PreflightWarning
from pipeline.physics.bhz import (
    bloch_hamiltonian,
    continuum_bulk_gap,
    edge_decay_constants,
    edge_dirac_point,
    edge_velocity,
)
from pipeline.physics.materials import BHZParameters
from pipeline.system.gauge import magnetic_gauge
from pipeline.system.mesh import build_system, mesh_device, strip_lead

__all__ = ['lattice_bulk_gap', 'strip_edge_properties', 'EdgeProperties', 'PreflightReport', 'preflight', 'estimate_memory_mb']

#: relative change between a and a/2 above which the lattice is called too coarse
#: (common practice, no source)
DISCRETISATION_TOLERANCE = 0.05


def lattice_bulk_gap(p: BHZParameters, a: float, n: int = 241) -> tuple[float, float, float]:
    """Bulk gap (meV) of the lattice model and its band edges (valence top, conduction bottom).

    The gap of the BHZ model opens near k = 0, so the search covers |k_i| up to the larger of
    pi/(4a) and a few times the continuum band-edge wavevector, plus the zone corners.
    """
    k_edge = 4 * np.sqrt(abs(p.M / p.B)) + 4 * abs(p.A / p.B) + 0.2
    k_max = min(np.pi / a, max(k_edge, np.pi / (4 * a)))
    k = np.linspace(-k_max, k_max, n)
    kx, ky = np.meshgrid(k, k, indexing="ij")
    e = np.linalg.eigvalsh(bloch_hamiltonian(p, a, kx, ky))
    # whole-zone coarse pass guards against band extrema far from Gamma on coarse lattices
    kz = np.linspace(-np.pi / a, np.pi / a, 61)
    zx, zy = np.meshgrid(kz, kz, indexing="ij")
    ez = np.linalg.eigvalsh(bloch_hamiltonian(p, a, zx, zy))
    top = float(max(e[..., 1].max(), ez[..., 1].max()))
    bottom = float(min(e[..., 2].min(), ez[..., 2].min()))
    return bottom - top, top, bottom


@dataclass(frozen=True)
class EdgeProperties:
    """Edge-state facts read off the bands of a clean strip."""

    #: strip width (nm)
    width: float
    #: energy of the edge-state crossing at k = 0 (meV)
    dirac_point: float
    #: hbar times the edge velocity (meV nm)
    hbar_velocity: float
    #: gap at k = 0 between the edge states of the two edges (meV): finite-size coupling
    finite_size_gap: float


def strip_edge_properties(p: BHZParameters, a: float, width: float) -> EdgeProperties:
    """Dirac point, velocity and finite-size gap of the edge states of a strip ``width`` nm wide.

    At k = 0 the in-gap states of the strip are the two Kramers pairs of edge states; their
    mean is the Dirac point and their splitting the finite-size gap. The velocity is
    ``dE/dk`` of the in-gap states at a small wavevector, where the dispersion is linear.
    """
    n = int(round(width / a))
    lead = strip_lead(p, a, n)
    bands = kwant.physics.Bands(lead)
    _, top, bottom = lattice_bulk_gap(p, a)
    # 4n bands, 2n of them filled at charge neutrality: bands 2n-1 and 2n straddle the gap.
    e0 = np.sort(np.asarray(bands(0.0)))
    lower, upper = float(e0[2 * n - 1]), float(e0[2 * n])
    coarse = bottom - top < 0.5 * continuum_bulk_gap(p)[0]
    if not p.inverted or coarse:
        if not p.inverted:
            why = f"the parameters are not band-inverted (M/B = {p.M / p.B:.3g} <= 0)"
        else:
            why = (f"the lattice is too coarse: a = {a} nm shrinks the bulk gap to "
                   f"{bottom - top:.3g} meV (continuum {continuum_bulk_gap(p)[0]:.3g} meV); "
                   f"use a smaller lattice constant")
        raise ModelError(
            f"no edge states in the bulk gap ({top:.3g}, {bottom:.3g}) meV of a {width} nm "
            f"strip: {why}"
        )
    dirac = 0.5 * (lower + upper)
    fs_gap = upper - lower
    # velocity at a momentum where hbar v k is a tenth of the bulk gap (linear regime)
    k_probe = 0.1 * (bottom - top) / max(edge_velocity(p), 1e-9) * a  # per lattice period
    energies, velocities = bands(k_probe, derivative_order=1)
    order = np.argsort(energies)
    hv = float(np.median(np.abs(np.asarray(velocities)[order][2 * n - 2 : 2 * n + 2]))) * a
    return EdgeProperties(n * a, dirac, hv, fs_gap)


def estimate_memory_mb(n_sites: int, width_sites: int, norbs: int = 4) -> float:
    """Peak resident memory (MB, 10^6 bytes) of a worker process that solves one device.

    The import baseline plus a term that grows like the factors of a sparse direct solve of
    a 2D system, ``n log2 n`` for ``n`` sites (as for a nested-dissection ordering), fitted
    to the peaks (``VmHWM``) that ``benchmarks/bench_scaling.py`` measured through the
    pipeline (``docs/benchmarks-scaling.md``, 2026-12-03: strips and H-bars of 1e4 to 1e6
    sites with 2 orbitals per site, strips of 1e4 to 3e5 sites with 4)::

        MB = 146 + 5.39e-4 * (norbs / 2) ** 1.31 * n_sites * log2(n_sites)

    146 MB is the measured peak of a process that only imports the pipeline and Kwant;
    the two coefficients are the least-squares fit of log(MB) over the 14 measured sizes.
    The estimate is within 9 % of every measured peak (from -7.3 % on the 1e6-site strip to
    +8.8 % on the 3e5-site H-bar); above 1e6 sites it is an extrapolation.

    Parameters
    ----------
    n_sites : int
        Lattice sites of the device.
    width_sites : int
        Sites across the widest contact. Not used by the fit: a dense lead block of
        ``(norbs * width_sites) ** 2`` complex numbers stayed below 0.3 % of the measured
        peak at every size. Kept for the callers.
    norbs : int, optional
        Orbitals per site of the solve: 2 for the spin-block solve (S_z conserved), 4 for the
        four-band solve (the default, the larger estimate).

    Returns
    -------
    float
        Estimated peak in MB.

    Examples
    --------
    >>> round(estimate_memory_mb(100_000, 200, norbs=2))
    1041
    """
    n = max(int(n_sites), 2)
    return float(146.0 + 5.39e-4 * (norbs / 2) ** 1.31 * n * np.log2(n))


@dataclass(frozen=True)
class PreflightReport:
    """Everything :func:`preflight` found; all values are model estimates."""

    device: str
    material: str
    lattice_constant: float
    inverted: bool
    bulk_gap_continuum: float
    bulk_gap_lattice: float
    valence_top: float
    conduction_bottom: float
    dirac_point_analytic: float
    hbar_velocity_analytic: float
    edge: EdgeProperties
    edge_half: EdgeProperties | None
    discretisation_error: float | None
    edge_decay_length: float
    narrowest_contact: float
    n_sites: int
    memory_mb: float
    warnings: tuple[str, ...]

    def as_dict(self) -> dict:
        return asdict(self)

    def text(self) -> str:
        """Human-readable summary."""
        lines = [
            f"device {self.device!r}, material {self.material!r}, a = {self.lattice_constant} nm",
            f"  bands inverted (M/B > 0): {'yes' if self.inverted else 'no'}",
            f"  bulk gap: {self.bulk_gap_continuum:.3f} meV continuum, "
            f"{self.bulk_gap_lattice:.3f} meV lattice "
            f"(valence top {self.valence_top:.3f}, conduction bottom {self.conduction_bottom:.3f} meV)",
            f"  edge Dirac point: {self.edge.dirac_point:.4f} meV lattice, "
            f"{self.dirac_point_analytic:.4f} meV analytic (C - MD/B)",
            f"  edge hbar*v: {self.edge.hbar_velocity:.2f} meV nm lattice, "
            f"{self.hbar_velocity_analytic:.2f} meV nm analytic (A sqrt(B^2-D^2)/|B|)",
            f"  finite-size gap of a {self.edge.width:.0f} nm strip: {self.edge.finite_size_gap:.3g} meV;"
            f" edge decay length {self.edge_decay_length:.1f} nm",
        ]
        if self.discretisation_error is not None:
            lines.append(
                f"  discretisation error (a vs a/2, velocity and Dirac point): "
                f"{100 * self.discretisation_error:.2f} %"
            )
        lines.append(f"  sites: {self.n_sites}, estimated memory per solve: {self.memory_mb:.0f} MB")
        lines += [f"  WARNING: {w}" for w in self.warnings]
        return "\n".join(lines)


def preflight(
    device: Device,
    material: BHZParameters,
    lattice_constant: float,
    *,
    check_half: bool = True,
    with_field: bool = False,
) -> PreflightReport:
    """Run all checks for one device, material and lattice constant (see module docstring).

    ``with_field=True`` (the run has a non-zero perpendicular field) also builds the Kwant
    system and fixes its magnetic gauge, so contacts too close for that are refused here with
    a :class:`ModelError` naming them and the fix, not deep inside a run.
    """
    a = float(lattice_constant)
    mesh = mesh_device(device, a)
    if with_field:
        # the gauge depends on the lattice graph only: the spin-block system is enough
        magnetic_gauge(build_system(device, material, a, with_field=True, spin_block=True).fsyst,
                       device, a)
    gap_c, _, _ = continuum_bulk_gap(material)
    gap_l, top, bottom = lattice_bulk_gap(material, a)
    widths = [c.width for c in device.contacts] or [min(np.ptp(device.outline.bounds[0::2]),
                                                       np.ptp(device.outline.bounds[1::2]))]
    narrow = float(min(widths))
    notes: list[str] = []
    decay = float(1.0 / np.min(edge_decay_constants(material).real))
    if not material.inverted:
        notes.append(
            f"M/B = {material.M / material.B:.3g} <= 0: the bands are not inverted, there are no "
            f"helical edge states (trivial insulator)"
        )
        edge = EdgeProperties(narrow, float("nan"), float("nan"), float("nan"))
        edge_half, err = None, None
    else:
        edge = strip_edge_properties(material, a, narrow)
        edge_half, err = None, None
        if check_half:
            edge_half = strip_edge_properties(material, a / 2, narrow)
            err = max(
                abs(edge.hbar_velocity - edge_half.hbar_velocity) / edge_half.hbar_velocity,
                abs(edge.dirac_point - edge_half.dirac_point) / max(gap_l, 1e-9),
            )
            if err > DISCRETISATION_TOLERANCE:
                notes.append(
                    f"lattice too coarse: a = {a} nm and a/2 differ by {100 * err:.1f} % in edge "
                    f"velocity or Dirac point (tolerance {100 * DISCRETISATION_TOLERANCE:.0f} %); "
                    f"use a smaller lattice constant"
                )
        if narrow < 4 * decay:
            notes.append(
                f"narrowest contact/strip {narrow:.0f} nm is less than 4 edge decay lengths "
                f"({decay:.0f} nm): the two edges couple (finite-size gap "
                f"{edge.finite_size_gap:.3g} meV); widen the device"
            )
    width_sites = int(round(narrow / a))
    mem = estimate_memory_mb(mesh.n_sites, max(int(round(max(widths) / a)), width_sites))
    report = PreflightReport(
        device=device.name,
        material=material.name,
        lattice_constant=a,
        inverted=material.inverted,
        bulk_gap_continuum=gap_c,
        bulk_gap_lattice=gap_l,
        valence_top=top,
        conduction_bottom=bottom,
        dirac_point_analytic=edge_dirac_point(material),
        hbar_velocity_analytic=edge_velocity(material),
        edge=edge,
        edge_half=edge_half,
        discretisation_error=err,
        edge_decay_length=decay,
        narrowest_contact=narrow,
        n_sites=mesh.n_sites,
        memory_mb=mem,
        warnings=tuple(notes),
    )
    for note in notes:
        warnings.warn(note, PreflightWarning, stacklevel=2)
    return report
