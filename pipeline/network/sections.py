"""The edge sections of a device: where its helical edges run from one contact to the next.

In the bulk gap a multi-terminal device conducts along its outline only. Walking each
boundary ring with the device on the left (the exterior counter-clockwise, holes clockwise,
as :class:`~pipeline.device.outline.Device` stores them), the outline alternates between
contacts and bare edge; every stretch of bare edge between the end of one contact and the
start of the next is an :class:`EdgeSection`. Its length is measured along the outline,
corners included. A section is split into :class:`EdgeRun` pieces in walking order, each
running along one lattice direction under one set of gates (the direction matters: see
:data:`pipeline.longedges.pools.QUARTER_TURN`).

Two geometric quantities feed the guard rails of the network model
(:mod:`pipeline.network.checks`): the local width of the mesa seen from every point of every
section (the distance to the opposite boundary along the inward normal, :func:`local_widths`)
and the distances between contacts (:func:`contact_distances`).

Units: nm.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import shapely
from shapely.geometry import LineString, Point
from shapely.ops import substring

from pipeline.device.outline import Device, perimeter_order
from pipeline.errors import GeometryError

__all__ = ["EdgeRun", "EdgeSection", "edge_sections", "local_widths", "contact_distances",
           "section_table"]

# Relative tolerance (of the device size) for points on a boundary and gate crossings.
_REL_TOL = 1e-9


@dataclass(frozen=True)
class EdgeRun:
    """A piece of an edge section with one set of covering gates.

    Parameters
    ----------
    start, stop : float
        Arc positions (nm) along the section, from its start.
    gates : tuple of str
        Names of the gates whose region covers this piece (sorted; empty: ungated).
    axis : int
        Lattice direction the edge runs along: 0 for x, 1 for y (an oblique stretch counts
        as its dominant direction: on the square lattice it is a staircase).
    """

    start: float
    stop: float
    gates: tuple[str, ...] = ()
    axis: int = 0

    @property
    def length(self) -> float:
        """Length of the piece along the outline (nm)."""
        return self.stop - self.start


@dataclass(frozen=True)
class EdgeSection:
    """The bare edge between two neighbouring contacts of one boundary ring.

    Parameters
    ----------
    index : int
        Position in the device's list of sections (rings in order, then walking order).
    ring : int
        Boundary ring (0: exterior, 1...: holes that carry contacts).
    start_contact, end_contact : int
        0-based indices of the contact the section leaves and the one it reaches, walking with
        the device on the left; equal when the ring carries one contact.
    path : shapely.LineString
        The section along the outline, from ``start_contact`` to ``end_contact``.
    runs : tuple of EdgeRun
        The pieces along x or y under one set of gates each, in walking order, covering the
        path.
    """

    index: int
    ring: int
    start_contact: int
    end_contact: int
    path: LineString
    runs: tuple[EdgeRun, ...]

    @property
    def length(self) -> float:
        """Length along the outline (nm), corners included."""
        return float(self.path.length)

    @property
    def corners(self) -> int:
        """Number of turns of the outline inside the section."""
        c = np.asarray(self.path.coords)
        if len(c) < 3:
            return 0
        d = np.diff(c, axis=0)
        cross = d[:-1, 0] * d[1:, 1] - d[:-1, 1] * d[1:, 0]
        norm = np.linalg.norm(d[:-1], axis=1) * np.linalg.norm(d[1:], axis=1)
        return int(np.sum(np.abs(cross) > 1e-9 * np.maximum(norm, 1e-300)))


def _ring_line(ring) -> LineString:
    return LineString(np.asarray(ring.coords))


def _arc(line: LineString, start: float, stop: float) -> LineString:
    """The piece of a closed ring from arc position ``start`` to ``stop`` (wrapping round)."""
    total = line.length
    if stop > start:
        return substring(line, start, stop)
    first = np.asarray(substring(line, start, total).coords)
    second = np.asarray(substring(line, 0.0, stop).coords) if stop > 0 else first[-1:]
    return LineString(np.concatenate([first, second[1:]]))


def _runs(path: LineString, device: Device, tol: float) -> tuple[EdgeRun, ...]:
    """Split a section into pieces of one direction under one set of gates, in walking order."""
    coords = np.asarray(path.coords)
    steps = np.diff(coords, axis=0)
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(steps[:, 0], steps[:, 1]))])
    total = float(arc[-1])
    cuts = set(arc.tolist())
    for gate in device.gates:
        crossing = path.intersection(gate.region.boundary)
        for geom in getattr(crossing, "geoms", [crossing]):
            for xy in np.asarray(geom.coords) if not geom.is_empty else ():
                cuts.add(float(path.project(Point(xy))))
    edges = sorted(cuts)
    pieces: list[EdgeRun] = []
    for a, b in zip(edges[:-1], edges[1:], strict=True):
        if b - a <= tol:
            continue
        m = 0.5 * (a + b)
        k = min(int(np.searchsorted(arc, m, side="right")) - 1, len(steps) - 1)
        axis = 0 if abs(steps[k, 0]) >= abs(steps[k, 1]) else 1
        mid = path.interpolate(m)
        names = tuple(sorted(g.name for g in device.gates if g.region.buffer(tol).contains(mid)))
        if pieces and pieces[-1].gates == names and pieces[-1].axis == axis:
            pieces[-1] = EdgeRun(pieces[-1].start, b, names, axis)
        else:
            pieces.append(EdgeRun(a, b, names, axis))
    if not pieces:
        pieces.append(EdgeRun(0.0, total))
    return tuple(pieces)


def edge_sections(device: Device) -> list[EdgeSection]:
    """The bare-edge sections between neighbouring contacts of every ring that has contacts.

    Rings without contacts are closed edge loops that no current enters; they are left out.

    Parameters
    ----------
    device : Device

    Returns
    -------
    list of EdgeSection
        Rings in the order of :func:`pipeline.device.outline.perimeter_order`, sections in
        walking order starting at the first contact of each ring.

    Raises
    ------
    GeometryError
        Contacts that overlap along the outline.
    """
    rings = [device.outline.exterior, *device.outline.interiors]
    scale = max(device.outline.bounds[2] - device.outline.bounds[0],
                device.outline.bounds[3] - device.outline.bounds[1], 1.0)
    tol = _REL_TOL * scale * 1e3
    out: list[EdgeSection] = []
    for order in perimeter_order(device):
        first = device.contacts[order[0]]
        mid = Point(first.midpoint)
        r = int(np.argmin([ring.distance(mid) for ring in rings]))
        line = _ring_line(rings[r])
        total = line.length
        spans = []
        for k in order:
            c = device.contacts[k]
            s0 = line.project(Point(c.segment.coords[0]))
            s1 = line.project(Point(c.segment.coords[-1]))
            if (s1 - s0) % total > c.width + tol:  # the end point sits on the ring's seam
                s1 = s0 + c.width
            spans.append((k, s0 % total, (s0 + c.width) % total))
        spans.sort(key=lambda x: x[1])
        for pos, (k, _, end) in enumerate(spans):
            k_next, start_next, _ = spans[(pos + 1) % len(spans)]
            gap = (start_next - end) % total
            if len(spans) == 1:
                gap = total - device.contacts[k].width
            if gap <= tol or gap > total - tol and len(spans) > 1:
                raise GeometryError(
                    f"contacts {device.contacts[k].name!r} and {device.contacts[k_next].name!r} "
                    "touch or overlap along the outline, so no edge runs between them; leave bare "
                    "edge between neighbouring contacts"
                )
            path = _arc(line, end, (end + gap) % total if gap < total else end)
            out.append(EdgeSection(len(out), r, k, k_next, path, _runs(path, device, tol)))
    return out


def local_widths(device: Device, sections: list[EdgeSection], *, step: float
                 ) -> tuple[float, tuple[float, float], int]:
    """The narrowest width of the mesa seen from any point of the sections.

    From points every ``step`` along every section (vertices excluded), a ray is cast along
    the inward normal; the distance to where it first meets the outline again is the local
    width there (the distance between an edge and the opposite edge).

    Parameters
    ----------
    device : Device
    sections : list of EdgeSection
    step : float
        Spacing of the probe points (nm).

    Returns
    -------
    width : float
        The smallest local width (nm; inf without sections).
    where : tuple of float
        The probe point (x, y) in nm where it occurs.
    section : int
        Index of that point's section.
    """
    boundary = device.outline.boundary
    minx, miny, maxx, maxy = device.outline.bounds
    reach = 2.0 * math.hypot(maxx - minx, maxy - miny)
    best = (math.inf, (math.nan, math.nan), -1)
    for sec in sections:
        coords = np.asarray(sec.path.coords)
        for p0, p1 in zip(coords[:-1], coords[1:], strict=True):
            seg = p1 - p0
            length = float(np.hypot(*seg))
            if length <= 0:
                continue
            n = max(1, int(length // step))
            s = (np.arange(n) + 0.5) / n
            pts = p0 + s[:, None] * seg
            inward = np.array([-seg[1], seg[0]]) / length  # device on the left of the walk
            starts = pts + 1e-6 * step * inward
            rays = shapely.linestrings(np.stack([starts, starts + reach * inward], axis=1))
            hits = shapely.intersection(rays, boundary)
            dist = shapely.distance(shapely.points(starts), hits)
            dist = np.where(shapely.is_empty(hits), np.inf, dist)
            k = int(np.argmin(dist))
            if dist[k] < best[0]:
                best = (float(dist[k]), (float(pts[k, 0]), float(pts[k, 1])), sec.index)
    return best


def contact_distances(device: Device) -> tuple[float, tuple[str, str]]:
    """The smallest straight-line distance between two contacts, and their names.

    Returns
    -------
    tuple
        ``(distance_nm, (name_a, name_b))``; ``(inf, ("", ""))`` with fewer than two contacts.
    """
    best = (math.inf, ("", ""))
    cs = device.contacts
    for i in range(len(cs)):
        for j in range(i + 1, len(cs)):
            d = float(cs[i].segment.distance(cs[j].segment))
            if d < best[0]:
                best = (d, (cs[i].name, cs[j].name))
    return best


def section_table(device: Device, sections: list[EdgeSection]) -> str:
    """A plain-text table of the sections (for logs and the methods text)."""
    names = device.contact_names
    rows = ["section  from -> to   length (nm)  corners  gated (nm)"]
    for s in sections:
        gated = sum(r.length for r in s.runs if r.gates)
        rows.append(f"{s.index:7d}  {names[s.start_contact]:>4} -> {names[s.end_contact]:<4} "
                    f"{s.length:11.1f}  {s.corners:7d}  {gated:10.1f}")
    return "\n".join(rows)
