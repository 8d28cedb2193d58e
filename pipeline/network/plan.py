"""What an ``[edges]`` run will compute, and the guard rails it must pass before any compute.

:func:`plan_network` turns a config with an ``[edges]`` table into a :class:`NetworkPlan`:
the device and its edge sections at every geometry value, each section's parts (ungated and
under each set of gates) with the number of pool segments that model them, the pools needed
(one per edge energy ``E - U_gate``, field and disorder strength), the contacts' doping, the
pool strip and its clean buffers. On the way it refuses, with the reason and the fix:

* a Fermi level outside the bulk gap on any edge (under a gate: ``E - U_gate``);
* an energy or field at which a clean strip does not carry exactly the helical pair, one
  mode per edge and direction (a field large enough to close the gap, the finite-size gap of
  the edge states near their Dirac point);
* an arm narrower than :data:`~pipeline.longedges.modes.EDGE_WIDTH_FACTOR` edge decay
  lengths (the opposite edges couple);
* contacts closer than the evanescent coupling length ``ln(1/tol) l_ev`` to each other, or an
  edge section shorter than it (the contacts then couple through the gap);
* a section part shorter than half a segment's disordered length (it cannot be modelled).

Only small lead calculations of the clean pool strip run here (its transfer eigenvalues at
each edge energy and field), no disordered solve.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from pipeline.device.templates import two_terminal_strip
from pipeline.errors import ConfigError, ModelError, NetworkWarning
from pipeline.longedges.modes import EDGE_WIDTH_FACTOR, decay_length, lead_params, transfer_eigenvalues
from pipeline.network.sections import EdgeSection, contact_distances, edge_sections, local_widths
from pipeline.physics.bhz import continuum_bulk_gap, edge_decay_constants
from pipeline.sweep.config import SweepConfig
from pipeline.sweep.runmodel import device_for, gate_potentials
from pipeline.system.mesh import build_system

__all__ = ["SectionPart", "NetworkPlan", "plan_network", "pool_name", "LENGTH_MISMATCH"]

#: A section part whose modelled length (whole segments) differs from its real length by more
#: than this fraction gets a warning (common practice, no source).
LENGTH_MISMATCH = 0.1

# Edge decay lengths of an automatic pool strip width.
_AUTO_WIDTH_DECAYS = 5.0


@dataclass(frozen=True)
class SectionPart:
    """The part of one edge section under one set of gates (the pieces joined).

    Parameters
    ----------
    gates : tuple of str
        Covering gates (empty: ungated).
    axis : int
        0: the part runs along x, 1: along y (its pool is computed with the disorder turned).
    length : float
        Length along the outline (nm).
    n_segments : int
        Pool segments that model it (each ``segment_length - 2 buffer`` of disordered edge).
    """

    gates: tuple[str, ...]
    axis: int
    length: float
    n_segments: int


@dataclass(frozen=True)
class NetworkPlan:
    """Everything an ``[edges]`` run needs, checked (see :func:`plan_network`)."""

    devices: tuple                          # Device per geometry index
    sections: tuple                         # tuple[EdgeSection] per geometry index
    parts: tuple                            # per geometry: per section: tuple[SectionPart]
    contact_names: tuple[str, ...]
    contact_doping: tuple[float, ...]
    gate_potentials: tuple                  # per gate-voltage index: {gate: U (meV)}
    pool_width: float
    buffer: float
    segment_length: float
    evanescent_lengths: dict = field(default_factory=dict)   # (E_edge, B) -> l_ev (nm)
    edge_decay_length: float = math.nan
    min_width: float = math.nan
    min_contact_distance: float = math.nan
    evanescent_bound: float = 0.0

    @property
    def disordered_length(self) -> float:
        """Edge length one segment stands for: its disordered part (nm)."""
        return self.segment_length - 2.0 * self.buffer

    def edge_energy(self, energy: float, gate_index: int, gates: tuple[str, ...]) -> float:
        """Fermi energy relative to the local bands on an edge part: ``E - sum U_gate``."""
        pots = self.gate_potentials[gate_index]
        # rounded to 1e-9 meV, so that E - U reached two ways names one pool
        return round(float(energy) - sum(pots.get(g, 0.0) for g in gates), 9)

    def pool_keys(self, cfg: SweepConfig) -> list[tuple[float, float, float, int]]:
        """The (edge energy, field, strength, axis) of every pool the run needs, sorted.

        The ungated pools along x are always included (the contacts are read from them)."""
        keys = set()
        kinds = {(p.gates, p.axis) for per_geo in self.parts for sec in per_geo for p in sec}
        kinds |= {((), 0)}
        for e in cfg.axes["energy"]:
            for iv in range(len(cfg.axes["gate_voltage"])):
                for gs, axis in kinds:
                    for b in cfg.axes["b_perp"]:
                        for s in cfg.axes["disorder_strength"]:
                            keys.add((self.edge_energy(e, iv, gs), float(b), float(s), axis))
        return sorted(keys)


def pool_name(key: tuple[float, float, float, int]) -> str:
    """Name of the stored pool of an (edge energy, field, strength, axis) key."""
    e, b, s, axis = key
    return f"E{e:+.9g}_B{b:+.9g}_S{s:.9g}_{'xy'[axis]}"


def _pool_width(cfg: SweepConfig, decay: float) -> float:
    a = cfg.lattice.constant
    w = cfg.edges.width
    if w == "auto":
        return math.ceil(_AUTO_WIDTH_DECAYS * decay / a) * a
    if w < EDGE_WIDTH_FACTOR * decay:
        raise ConfigError(
            f"'edges.width' = {w:g} nm is narrower than {EDGE_WIDTH_FACTOR:g} edge decay lengths "
            f"({EDGE_WIDTH_FACTOR * decay:.0f} nm): the pool strip's two edges would couple; use "
            f"at least {math.ceil(EDGE_WIDTH_FACTOR * decay / cfg.lattice.constant) * cfg.lattice.constant:g} nm "
            "or \"auto\""
        )
    return float(w)


def _check_gap(cfg, energies: dict, material) -> None:
    """Refuse edge energies outside the bulk gap."""
    _, top, bottom = continuum_bulk_gap(material)
    for e_edge, (energy, voltage, gates) in sorted(energies.items()):
        if not top < e_edge < bottom:
            where = (f"under gate(s) {', '.join(gates)} at gate voltage {voltage:g} V "
                     f"(E - U = {e_edge:g} meV)" if gates else "on the ungated edges")
            raise ModelError(
                f"at E = {energy:g} meV the Fermi level lies outside the bulk gap "
                f"({top:g} .. {bottom:g} meV) {where}: the bulk conducts there and the edge "
                "network does not describe the device. Keep every edge in the gap (energies "
                "and gate voltages), or run the direct model (drop [edges])"
            )


def _lead_check(material, a: float, width: float, e_edge: float, b: float) -> float:
    """Refuse an energy/field without exactly the helical pair; return l_ev (nm)."""
    dsys = build_system(two_terminal_strip(4 * a, width), material, a, with_field=b != 0.0)
    lam = transfer_eigenvalues(dsys.fsyst.leads[1], float(e_edge), lead_params(dsys, b))
    l_ev, n_prop = decay_length(lam, a)
    if n_prop != 4:
        reason = ("a field of this size closes the bulk gap or Landau levels cross the Fermi "
                  "level" if b != 0 and n_prop > 4 else
                  "bulk bands are open" if n_prop > 4 else
                  "the edge states are gapped there (their finite-size gap near the edge Dirac "
                  "point, or the field's Zeeman gap)")
        raise ModelError(
            f"a clean {width:g} nm strip carries {n_prop // 2} mode(s) per direction at edge "
            f"energy {e_edge:g} meV and B = {b:g} T instead of the helical pair (2): {reason}. "
            "Choose energies and fields where only the edge states carry current"
            + (" (a smaller field)" if b != 0 else "")
        )
    return l_ev


def _parts(sec: EdgeSection, l_d: float, where: str) -> tuple[SectionPart, ...]:
    """Join a section's runs by (gate set, direction) and count the segments of each.

    Joining pieces of equal kind reorders the section's scatterers; independent scatterers
    with random phases give the same ensemble in any order, and the counts lose less to
    rounding."""
    order: list[tuple[tuple[str, ...], int]] = []
    total: dict[tuple[tuple[str, ...], int], float] = {}
    for run in sec.runs:
        kind = (run.gates, run.axis)
        if kind not in total:
            order.append(kind)
            total[kind] = 0.0
        total[kind] += run.length
    out = []
    for gates, axis in order:
        length = total[(gates, axis)]
        n = int(round(length / l_d))
        label = (f"under {', '.join(gates)}" if gates else "ungated") + f", along {'xy'[axis]},"
        if n < 1:
            raise ModelError(
                f"{where}: the {label} part of edge section {sec.index} is {length:.0f} nm long, "
                f"less than half a segment's disordered length ({l_d:g} nm), so no segment can "
                f"model it; use a shorter 'edges.segment_length' (at most about "
                f"{2 * length:.0f} nm of disorder per segment)"
            )
        if abs(n * l_d - length) > LENGTH_MISMATCH * length:
            warnings.warn(
                f"{where}: the {label} part of edge section {sec.index} is {length:.0f} nm long "
                f"but modelled by {n} segment(s) of {l_d:g} nm of disorder ({n * l_d:.0f} nm); "
                "choose 'edges.segment_length' so that the sections are close to whole "
                "multiples of the disordered length",
                NetworkWarning, stacklevel=3)
        out.append(SectionPart(gates, axis, length, n))
    return tuple(out)


def _check_geometry(device, sections, decay: float, coupling: float, step: float, where: str,
                    width_guard: bool = True) -> tuple[float, float]:
    """Arm widths and contact distances; returns (min width, min contact distance)."""
    width, xy, sec = local_widths(device, sections, step=step)
    if width_guard and width < EDGE_WIDTH_FACTOR * decay:
        raise ModelError(
            f"{where}: the device is only {width:.0f} nm wide at ({xy[0]:.0f}, {xy[1]:.0f}) nm "
            f"(edge section {sec}), less than {EDGE_WIDTH_FACTOR:g} edge decay lengths "
            f"({EDGE_WIDTH_FACTOR * decay:.0f} nm; decay length {decay:.1f} nm): the opposite "
            "edges couple there and the edge network does not apply. Widen that arm or run the "
            "direct model (drop [edges])"
        )
    dist, names = contact_distances(device)
    if dist < coupling:
        raise ModelError(
            f"{where}: contacts {names[0]!r} and {names[1]!r} are {dist:.0f} nm apart, closer "
            f"than the evanescent coupling length {coupling:.0f} nm (ln(1/tolerance) evanescent "
            "decay lengths): they couple through the gap. Move them apart or run the direct "
            "model (drop [edges])"
        )
    for s in sections:
        if s.length < coupling:
            names = device.contact_names
            raise ModelError(
                f"{where}: contacts {names[s.start_contact]!r} and {names[s.end_contact]!r} are "
                f"joined by only {s.length:.0f} nm of edge, less than the evanescent coupling "
                f"length {coupling:.0f} nm; move them apart or run the direct model"
            )
    return width, dist


def plan_network(cfg: SweepConfig, *, width_guard: bool = True) -> NetworkPlan:
    """Check a config's ``[edges]`` run and describe it (see the module docstring).

    Parameters
    ----------
    cfg : SweepConfig
    width_guard : bool, optional
        False skips the arm-width guard rail: only for studies of where the model breaks
        (``benchmarks/edge_network/validate.py``); results are then outside its validity.

    Raises
    ------
    ConfigError
        No ``[edges]`` table, or a pool strip narrower than the guard rail.
    ModelError
        A guard rail (with the value that fails it and the fix).

    Warns
    -----
    NetworkWarning
        A section part whose modelled length differs from its real one by more than
        :data:`LENGTH_MISMATCH`.
    """
    ec = cfg.edges
    if ec is None:
        raise ConfigError("the config has no [edges] table; add one (see docs/edge-network.md) "
                          "to use the edge-network model")
    material = cfg.material.parameters()
    a = cfg.lattice.constant
    decay = float(1.0 / np.min(edge_decay_constants(material).real))
    width = _pool_width(cfg, decay)
    axes = cfg.axes
    devices = [device_for(cfg, g) for g in range(len(axes["geometry"]))]
    sections = [edge_sections(d) for d in devices]
    names = devices[0].contact_names
    pots = tuple(gate_potentials(cfg, devices[0], v) for v in axes["gate_voltage"])
    gate_sets = {r.gates for secs in sections for s in secs for r in s.runs} | {()}
    energies = {}
    for e in axes["energy"]:
        for iv, v in enumerate(axes["gate_voltage"]):
            for gs in gate_sets:
                e_edge = float(e) - sum(pots[iv].get(g, 0.0) for g in gs)
                energies.setdefault(e_edge, (float(e), float(v), gs))
    _check_gap(cfg, energies, material)
    l_ev = {(e, float(b)): _lead_check(material, a, width, e, float(b))
            for e in energies for b in axes["b_perp"]}
    tol = ec.evanescent_tolerance
    if ec.buffer == "auto":
        b_cols = max(max(1, math.ceil(0.5 * x * math.log(1.0 / tol) / a - 1e-9))
                     for x in l_ev.values())
    else:
        b_cols = int(round(float(ec.buffer) / a))
    buffer = b_cols * a
    bound = max(math.exp(-2 * buffer / x) if x > 0 else 0.0 for x in l_ev.values())
    if bound > tol:
        warnings.warn(
            f"the clean buffers of {buffer:g} nm leave an evanescent coupling exp(-2b/l_ev) = "
            f"{bound:.2g} between segments, above 'edges.evanescent_tolerance' = {tol:g}; use "
            f"buffer = \"auto\" or at least "
            f"{math.ceil(0.5 * max(l_ev.values()) * math.log(1 / tol) / a) * a:g} nm, or raise "
            "the tolerance", NetworkWarning, stacklevel=2)
    l_d = ec.segment_length - 2 * buffer
    if l_d <= 0:
        raise ConfigError(
            f"clean buffers of {buffer:g} nm at both ends leave no disorder in a "
            f"{ec.segment_length:g} nm segment; use 'edges.segment_length' well above "
            f"{2 * buffer:g} nm (several times, so most of an edge is disordered)"
        )
    coupling = max(l_ev.values()) * math.log(1.0 / tol)
    parts, widths, dists = [], [], []
    for g, (dev, secs) in enumerate(zip(devices, sections, strict=True)):
        where = f"device {dev.name!r}" + (f" at {cfg.sweep.geometry.parameter} = "
                                          f"{axes['geometry'][g]:g} nm" if cfg.sweep.geometry else "")
        if dev.contact_names != names:
            raise ModelError(f"{where}: the contacts change along the geometry axis "
                             f"({dev.contact_names!r} vs {names!r})")
        w, d = _check_geometry(dev, secs, decay, coupling, step=max(a, 1e-4 * dev.outline.length),
                               where=where, width_guard=width_guard)
        widths.append(w)
        dists.append(d)
        parts.append(tuple(_parts(s, l_d, where) for s in secs))
    kinds = [[[(p.gates, p.axis) for p in sec] for sec in per_geo] for per_geo in parts]
    for g, k in enumerate(kinds):
        if k != kinds[0]:
            raise ModelError(
                f"the edge sections change their pieces (direction or gates) along the geometry "
                f"axis (at {cfg.sweep.geometry.parameter} = {axes['geometry'][g]:g} nm), so sampled "
                "devices cannot be nested along it; sweep a parameter that only changes lengths"
            )
    doping = cfg.contacts.doping
    dop = tuple(float(doping.get(n, 0.0)) if isinstance(doping, dict) else float(doping)
                for n in names)
    return NetworkPlan(
        devices=tuple(devices), sections=tuple(tuple(s) for s in sections), parts=tuple(parts),
        contact_names=tuple(names), contact_doping=dop, gate_potentials=pots,
        pool_width=width, buffer=buffer, segment_length=float(ec.segment_length),
        evanescent_lengths=l_ev, edge_decay_length=decay, min_width=min(widths),
        min_contact_distance=min(dists), evanescent_bound=bound,
    )


