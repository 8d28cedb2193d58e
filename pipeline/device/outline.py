"""Device outlines, contacts and gates, and the checks a device must pass before meshing.

A :class:`Device` is a planar mesa (a Shapely polygon, holes allowed) in nanometres in a local
Cartesian frame, with straight axis-aligned :class:`Contact` segments on its edge where
semi-infinite leads attach, and optional :class:`Gate` regions. The square tight-binding
lattice puts sites at ``((i + 1/2) a, (j + 1/2) a)``, so outlines whose corners are multiples of
the lattice constant ``a`` are meshed without partial cells.

:func:`validate_device` refuses a device that cannot be meshed sensibly at a given ``a`` (bad
polygon, contacts off the edge or diagonal, leads running back through the device, necks that
pinch off, coordinates in the wrong units) with a :class:`~pipeline.errors.GeometryError` that
says what is wrong, where, and what to change.

Parametric templates live in :mod:`pipeline.device.templates`, the file readers in
:mod:`pipeline.device.readers` and the drawing in :mod:`pipeline.device.drawing`.
"""

from __future__ import annotations

import dataclasses
import math
import re
from collections import Counter
from dataclasses import dataclass
from typing import Any

import numpy as np
import shapely
from shapely.geometry import LineString, MultiPolygon, Point, Polygon
from shapely.geometry.polygon import orient
from shapely.validation import explain_validity

from pipeline.errors import GeometryError

__all__ = ['perimeter_order', 'polygon_pieces', 'Contact', 'Gate', 'Device', 'validate_device', 'MAX_COORDINATE_NM']

#: Largest coordinate magnitude accepted (1 mm): anything beyond is almost surely a unit mix-up.
MAX_COORDINATE_NM: float = 1e6

# A segment counts as horizontal/vertical if its minor component is below this fraction of its
# length (an angle of 1e-6 rad): exact for lattice-aligned data, forgiving of float round-off.
_ALIGN_RTOL = 1e-6

# Relative tolerance (of the device size) for "lies on the outline" and sliver areas.
_REL_TOL = 1e-6

# The semi-infinite lead is modelled as a strip this many device diagonals long.
_LEAD_LENGTH_DIAGONALS = 10.0


@dataclass(frozen=True)
class Contact:
    """A straight, axis-aligned stretch of the device edge where a semi-infinite lead attaches.

    Parameters
    ----------
    name : str
        Unique name of the contact (``"1"``, ``"source"``, ...).
    segment : shapely.LineString
        Two end points in nm, lying on the device outline (exterior or a hole ring).

    Notes
    -----
    The segment is *directed*: the device lies on its left, as when walking the exterior ring
    counter-clockwise. :class:`Device` re-orients its contacts to this convention on
    construction, so ``normal`` of a contact taken from a device is the outward normal whichever
    way round the end points were given.
    """

    name: str
    segment: LineString

    @property
    def width(self) -> float:
        """Length of the contact segment in nm (the width of its lead)."""
        return float(self.segment.length)

    @property
    def normal(self) -> tuple[int, int]:
        """Outward unit normal as an integer lattice direction: (1,0), (-1,0), (0,1) or (0,-1).

        Raises
        ------
        GeometryError
            If the segment is not a non-degenerate horizontal or vertical 2-point line.
        """
        dx, dy = _unit_direction(self.segment, f"contact {self.name!r}")
        # The device is on the left of the direction of travel, so outward is the right-hand side.
        return (dy, -dx)

    @property
    def axis(self) -> int:
        """0 if the lead runs along x (vertical contact segment), 1 if it runs along y."""
        nx, _ = self.normal
        return 0 if nx != 0 else 1

    @property
    def midpoint(self) -> tuple[float, float]:
        """Centre of the contact segment in nm."""
        (x0, y0), (x1, y1) = self.segment.coords[0], self.segment.coords[-1]
        return (0.5 * (x0 + x1), 0.5 * (y0 + y1))


@dataclass(frozen=True)
class Gate:
    """A gate electrode: a polygon (nm) whose potential acts on the sites it covers.

    Parameters
    ----------
    name : str
        Unique name of the gate (``"TG"``, ``"plunger"``, ...).
    region : shapely.Polygon
        The gate's footprint; it may extend beyond the mesa but must overlap it.
    """

    name: str
    region: Polygon


@dataclass(frozen=True)
class Device:
    """A mesa with contacts and gates, coordinates in nm.

    Parameters
    ----------
    name : str
        Device name, used in file names and figure titles.
    outline : shapely.Polygon
        The mesa; holes are allowed. Stored with the exterior counter-clockwise.
    contacts : tuple of Contact
        Terminal order: ``contacts[i]`` is terminal ``i + 1``. Stored re-oriented so that each
        segment has the device on its left (see :class:`Contact`).
    gates : tuple of Gate, optional
        Gate electrodes.

    Notes
    -----
    Construction does not validate the geometry (that needs the lattice constant); call
    :func:`validate_device`.
    """

    name: str
    outline: Polygon
    contacts: tuple[Contact, ...]
    gates: tuple[Gate, ...] = ()

    def __post_init__(self) -> None:
        if not isinstance(self.name, str):
            raise GeometryError(
                f"device name must be a string, got {self.name!r}; pass e.g. name='tarn-hbar-A'"
            )
        contacts = tuple(self.contacts)
        gates = tuple(self.gates)
        for c in contacts:
            if not isinstance(c, Contact):
                raise GeometryError(
                    f"device {self.name!r}: contacts must be Contact objects, got {c!r}; "
                    "wrap segments as Contact(name, LineString([(x0, y0), (x1, y1)]))"
                )
        for g in gates:
            if not isinstance(g, Gate):
                raise GeometryError(
                    f"device {self.name!r}: gates must be Gate objects, got {g!r}; "
                    "wrap regions as Gate(name, Polygon(...))"
                )
        outline = self.outline
        if isinstance(outline, Polygon) and not outline.is_empty:
            # A canonical orientation makes perimeter walks and contact normals well defined.
            outline = orient(outline, 1.0)
            contacts = tuple(_orient_contact(c, outline) for c in contacts)
        object.__setattr__(self, "outline", outline)
        object.__setattr__(self, "contacts", contacts)
        object.__setattr__(self, "gates", gates)

    @property
    def contact_names(self) -> tuple[str, ...]:
        """Contact names in terminal order."""
        return tuple(c.name for c in self.contacts)

    @property
    def gate_names(self) -> tuple[str, ...]:
        """Gate names in the order given."""
        return tuple(g.name for g in self.gates)

    def contact_index(self, name: str) -> int:
        """0-based index of the contact called `name` (terminal number minus one).

        Raises
        ------
        GeometryError
            If the device has no such contact; the message lists the valid names.
        """
        for i, c in enumerate(self.contacts):
            if c.name == name:
                return i
        raise GeometryError(
            f"device {self.name!r} has no contact {name!r}; its contacts are "
            f"{list(self.contact_names)!r} (use one of these names)"
        )


def _xy(x: float, y: float) -> str:
    """Format a location for messages."""
    return f"({x:.6g}, {y:.6g})"


def _pt(p: Any) -> str:
    """Format a shapely Point or an (x, y) pair for messages."""
    if isinstance(p, Point):
        return _xy(p.x, p.y)
    return _xy(float(p[0]), float(p[1]))


def _unit_direction(segment: Any, what: str) -> tuple[int, int]:
    """Integer direction of travel of an axis-aligned 2-point segment, or GeometryError."""
    if not isinstance(segment, LineString):
        raise GeometryError(
            f"{what}: segment must be a shapely LineString, got {type(segment).__name__} "
            f"{segment!r}; give the two end points as LineString([(x0, y0), (x1, y1)])"
        )
    coords = list(segment.coords)
    if len(coords) != 2:
        raise GeometryError(
            f"{what}: segment has {len(coords)} points {coords!r}; a contact is a straight "
            "segment given by exactly its 2 end points"
        )
    (x0, y0), (x1, y1) = coords
    dx, dy = x1 - x0, y1 - y0
    length = math.hypot(dx, dy)
    if not length > 0:
        raise GeometryError(
            f"{what}: both end points are {_xy(x0, y0)}; give two distinct end points"
        )
    if abs(dy) <= _ALIGN_RTOL * length:
        return (1 if dx > 0 else -1, 0)
    if abs(dx) <= _ALIGN_RTOL * length:
        return (0, 1 if dy > 0 else -1)
    angle = math.degrees(math.atan2(dy, dx))
    raise GeometryError(
        f"{what}: segment from {_xy(x0, y0)} to {_xy(x1, y1)} is not aligned with a lattice "
        f"direction: it runs at {angle!r} degrees to the x axis; contacts must be horizontal or "
        "vertical because leads run along the square lattice's x or y axis — redraw the "
        "device so this edge is axis-aligned"
    )


def _orient_contact(contact: Contact, outline: Polygon) -> Contact:
    """Return `contact` directed so that `outline` lies on its left (unchanged if undecidable)."""
    seg = contact.segment
    try:
        dx, dy = _unit_direction(seg, "contact")
    except GeometryError:
        return contact  # validate_device reports the problem with full context
    (x0, y0), (x1, y1) = seg.coords
    mx, my = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    # A probe far smaller than any meshable feature, so only the edge itself decides the side.
    d = 1e-4 * seg.length
    try:
        left_in = outline.contains(Point(mx - dy * d, my + dx * d))
        right_in = outline.contains(Point(mx + dy * d, my - dx * d))
    except shapely.errors.GEOSException:
        return contact
    if right_in and not left_in:
        return dataclasses.replace(contact, segment=LineString([(x1, y1), (x0, y0)]))
    return contact


def _rect_beside(segment: LineString, direction: tuple[int, int], depth: float) -> Polygon:
    """Rectangle spanning an axis-aligned `segment`, extruded `depth` along `direction`."""
    (x0, y0), (x1, y1) = segment.coords
    nx, ny = direction
    xs = [x0, x1, x0 + nx * depth, x1 + nx * depth]
    ys = [y0, y1, y0 + ny * depth, y1 + ny * depth]
    return shapely.box(min(xs), min(ys), max(xs), max(ys))


def polygon_pieces(geom: Any) -> list[Polygon]:
    """The non-empty polygons of a polygon, multipolygon or geometry collection (any depth);
    lines and points are dropped. One helper for the readers, the checks and the drawings."""
    if geom is None or geom.is_empty:
        return []
    if isinstance(geom, Polygon):
        return [geom]
    if hasattr(geom, "geoms"):
        out: list[Polygon] = []
        for g in geom.geoms:
            out.extend(polygon_pieces(g))
        return out
    return []


_VALIDITY_LOC = re.compile(r"\[\s*([-+0-9.eE]+)\s+([-+0-9.eE]+)\s*\]")


def _validity_text(geom: Any) -> str:
    """explain_validity text with the location spelled as (x, y)."""
    reason = explain_validity(geom)
    m = _VALIDITY_LOC.search(reason)
    if m:
        reason = f"{reason[: m.start()]} at {_xy(float(m.group(1)), float(m.group(2)))}"
    return reason


def _all_coordinates(device: Device) -> list[tuple[str, np.ndarray]]:
    """(label, Nx2 array) for every coordinate-bearing part of the device."""
    parts: list[tuple[str, np.ndarray]] = []
    outline = device.outline
    parts.append(("outline exterior", np.asarray(outline.exterior.coords, dtype=float)))
    for k, ring in enumerate(outline.interiors):
        parts.append((f"outline hole {k}", np.asarray(ring.coords, dtype=float)))
    for c in device.contacts:
        if isinstance(c.segment, LineString):
            parts.append((f"contact {c.name!r}", np.asarray(c.segment.coords, dtype=float)))
    for g in device.gates:
        for poly in polygon_pieces(g.region):
            parts.append((f"gate {g.name!r}", np.asarray(poly.exterior.coords, dtype=float)))
    # Drop any z column: only the plane matters for these checks.
    return [(label, arr.reshape(len(arr), -1)[:, :2]) for label, arr in parts]


def validate_device(
    device: Device,
    lattice_constant: float,
    *,
    min_neck_sites: float = 3.0,
    min_contacts: int = 1,
) -> None:
    """Check that `device` can be meshed on a square lattice of constant `lattice_constant`.

    Parameters
    ----------
    device : Device
        The device to check.
    lattice_constant : float
        Lattice constant ``a`` in nm.
    min_neck_sites : float, optional
        Narrowest allowed constriction, in lattice constants (default 3). 0 disables the check.
    min_contacts : int, optional
        Fewest contacts accepted (default 1; a transport calculation needs 2).

    Raises
    ------
    GeometryError
        For the first problem found, naming the offending value, its location and the fix.

    Notes
    -----
    The checks, in order: outline type and coordinates (finite, not absurdly large or small —
    a sign of µm/nm mix-ups), polygon validity, contact and gate names, each contact (2 distinct
    points, axis-aligned, on the outline, at least 2 ``a`` wide, material on exactly the inner
    side, material along its full width one ``a`` deep, its semi-infinite lead clear of the
    device), pairs of contacts (no overlap, no crossing leads), gates (valid, overlapping the
    mesa), and necks (eroding by ``min_neck_sites * a / 2`` must not split the mesa).
    """
    a = _check_lattice_constant(lattice_constant)
    if not isinstance(device, Device):
        raise GeometryError(
            f"expected a Device, got {type(device).__name__} {device!r}; build one with "
            "Device(name, outline, contacts) or load it with pipeline.device.readers.load_device"
        )
    _check_outline_type(device)
    _check_coordinates(device, a)
    _check_outline_validity(device)
    _check_names(device, min_contacts)

    minx, miny, maxx, maxy = device.outline.bounds
    diagonal = math.hypot(maxx - minx, maxy - miny)
    tol = _REL_TOL * max(maxx - minx, maxy - miny)
    lead_length = _LEAD_LENGTH_DIAGONALS * diagonal

    for contact in device.contacts:
        _check_contact(device, contact, a, tol)
    leads = [_rect_beside(c.segment, c.normal, lead_length) for c in device.contacts]
    for contact, lead in zip(device.contacts, leads, strict=True):
        _check_lead_clear(device, contact, lead, tol)
    _check_contact_pairs(device, leads, tol)
    for gate in device.gates:
        _check_gate(device, gate, tol)
    _check_necks(device, a, min_neck_sites)


def _check_lattice_constant(lattice_constant: float) -> float:
    try:
        a = float(lattice_constant)
    except (TypeError, ValueError):
        a = float("nan")
    if not (math.isfinite(a) and a > 0):
        raise GeometryError(
            f"lattice constant must be a positive number of nm, got {lattice_constant!r}; "
            "pass e.g. lattice_constant=5.0"
        )
    return a


def _check_outline_type(device: Device) -> None:
    outline = device.outline
    if isinstance(outline, MultiPolygon):
        centres = ", ".join(_pt(p.centroid) for p in outline.geoms)
        raise GeometryError(
            f"device {device.name!r}: outline is a MultiPolygon of {len(outline.geoms)} pieces "
            f"(centred at {centres}); a device must be one connected Polygon — join the pieces "
            "or make separate devices"
        )
    if not isinstance(outline, Polygon):
        raise GeometryError(
            f"device {device.name!r}: outline must be a shapely Polygon, got "
            f"{type(outline).__name__} {outline!r}; draw the mesa as a closed polygon"
        )
    if outline.is_empty:
        raise GeometryError(f"device {device.name!r}: outline is empty; give the mesa's corners")


def _check_coordinates(device: Device, a: float) -> None:
    units_hint = (
        "coordinates are read as nm — a µm layout must be scaled by 1000 (or declare "
        '\'units: um\' in a WKT file, "units": "um" in GeoJSON, or the right library unit in '
        "GDSII)"
    )
    worst_value, worst_where = 0.0, ""
    for label, arr in _all_coordinates(device):
        if arr.size == 0:
            continue
        bad = ~np.isfinite(arr)
        if bad.any():
            k = int(np.argwhere(bad)[0][0])
            raise GeometryError(
                f"device {device.name!r}: {label} has a non-finite coordinate "
                f"{tuple(float(v) for v in arr[k])!r} at vertex {k}; give finite numbers in nm"
            )
        k = int(np.argmax(np.abs(arr).max(axis=1)))
        value = float(np.abs(arr[k]).max())
        if value > worst_value:
            worst_value, worst_where = value, f"{label} vertex {_pt(arr[k])}"
    if worst_value > MAX_COORDINATE_NM:
        raise GeometryError(
            f"device {device.name!r}: coordinate magnitude {worst_value!r} nm at {worst_where} "
            f"exceeds {MAX_COORDINATE_NM:g} nm (1 mm), far beyond any mesoscopic device: the "
            f"units are probably mixed up; {units_hint}"
        )
    minx, miny, maxx, maxy = device.outline.bounds
    size = max(maxx - minx, maxy - miny)
    if size < 2 * a:
        raise GeometryError(
            f"device {device.name!r} is only {size!r} nm across (outline bounds "
            f"{device.outline.bounds!r}), less than 2 lattice constants ({2 * a:g} nm): were "
            f"the coordinates written in µm? {units_hint}"
        )


def _check_outline_validity(device: Device) -> None:
    outline = device.outline
    if not outline.is_valid:
        raise GeometryError(
            f"device {device.name!r}: outline is not a valid polygon: {_validity_text(outline)}; "
            "reorder the vertices so the boundary neither crosses nor touches itself and holes "
            "lie strictly inside the exterior (shapely.make_valid(outline) shows one repair)"
        )
    if not outline.area > 0:
        raise GeometryError(
            f"device {device.name!r}: outline {outline.wkt!r} has zero area; give at least "
            "three non-collinear corners"
        )


def _check_names(device: Device, min_contacts: int) -> None:
    n = len(device.contacts)
    if n < max(1, min_contacts):
        need = max(1, min_contacts)
        raise GeometryError(
            f"device {device.name!r} has {n} contact(s) but at least {need} is needed "
            "(1 to attach a lead; 2 for a transport calculation): add contacts on the outline "
            "edge where leads attach"
        )
    for kind, names in (("contact", device.contact_names), ("gate", device.gate_names)):
        for nm in names:
            if not isinstance(nm, str) or not nm.strip():
                raise GeometryError(
                    f"device {device.name!r}: {kind} name {nm!r} is not a non-empty string; "
                    f'give every {kind} a name such as "1" or "TG"'
                )
        dupes = sorted(nm for nm, count in Counter(names).items() if count > 1)
        if dupes:
            raise GeometryError(
                f"device {device.name!r}: {kind} names must be unique, but {dupes!r} occur more "
                f"than once in {list(names)!r}; rename them"
            )


def _check_contact(device: Device, contact: Contact, a: float, tol: float) -> None:
    what = f"device {device.name!r}, contact {contact.name!r}"
    outline = device.outline
    seg = contact.segment
    dx, dy = _unit_direction(seg, what)
    (x0, y0), (x1, y1) = seg.coords
    ends = f"from {_xy(x0, y0)} to {_xy(x1, y1)}"

    boundary = outline.boundary
    off = seg.difference(boundary.buffer(tol))
    if not off.is_empty:
        samples = [Point(p) for p in shapely.segmentize(seg, seg.length / 64).coords]
        samples.append(off.representative_point())
        dists = [boundary.distance(p) for p in samples]
        k = int(np.argmax(dists))
        raise GeometryError(
            f"{what} ({ends}) does not lie on the device outline: its point {_pt(samples[k])} "
            f"is {dists[k]!r} nm from the outline (tolerance {tol:.3g} nm); move the contact "
            "onto an edge of the mesa (the exterior or a hole)"
        )

    width = contact.width
    if width < 2 * a * (1 - 1e-9):
        raise GeometryError(
            f"{what} ({ends}) is {width!r} nm wide, less than 2 lattice constants "
            f"({2 * a:g} nm at a = {a:g} nm): a lead needs at least 2 sites across; widen the "
            "contact or use a smaller lattice constant"
        )

    nx, ny = dy, -dx
    mx, my = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    probe_in = Point(mx - nx * a / 2, my - ny * a / 2)
    probe_out = Point(mx + nx * a / 2, my + ny * a / 2)
    in_ok = outline.contains(probe_in)
    out_hit = outline.intersects(probe_out)
    if in_ok and out_hit:
        raise GeometryError(
            f"{what} ({ends}): there is device material on both sides of the contact (probed "
            f"{a / 2:g} nm either side of its midpoint {_xy(mx, my)}), so it is not on the "
            "outer edge of the mesa (a slit narrower than a lattice constant?); put the contact "
            "on an edge that has free space outside"
        )
    if not in_ok:
        raise GeometryError(
            f"{what} ({ends}): no device material within {a / 2:g} nm inside the contact at its "
            f"midpoint {_xy(mx, my)}: the mesa is thinner than half a lattice constant there; "
            "widen the mesa behind the contact"
        )

    strip = _rect_beside(seg, (-nx, -ny), a)
    missing = strip.difference(outline)
    if missing.area > tol * width:
        raise GeometryError(
            f"{what} ({ends}): the lead would not meet device material along the full contact "
            f"width: {missing.area:.4g} nm² of the strip one lattice constant ({a:g} nm) deep "
            f"just inside the contact lies outside the mesa near {_pt(missing.centroid)}; "
            "shorten the contact to the part of the edge backed by material, or widen the mesa "
            "there"
        )


def _check_lead_clear(device: Device, contact: Contact, lead: Polygon, tol: float) -> None:
    outline = device.outline
    # Keep only the areal part: the lead also touches the outline along the contact itself.
    hit = shapely.union_all(polygon_pieces(lead.intersection(outline)))
    if hit.area <= tol * contact.width:
        return
    what = f"device {device.name!r}, contact {contact.name!r}"
    seg = contact.segment
    for k, ring in enumerate(outline.interiors):
        if seg.distance(ring) <= tol:
            raise GeometryError(
                f"{what} lies on the edge of hole {k} (hole bounds "
                f"{Polygon(ring).bounds!r}): a semi-infinite lead from inside a hole can only "
                f"leave through the device (it crosses {hit.area:.4g} nm² of mesa near "
                f"{_pt(hit.centroid)}); move the contact to the outer edge of the mesa"
            )
    nearest = Point(shapely.shortest_line(seg, hit).coords[-1])
    raise GeometryError(
        f"{what}: its semi-infinite lead (width {contact.width:g} nm, running in direction "
        f"{contact.normal!r}) would run back through the device: it crosses {hit.area:.4g} nm² "
        f"of mesa, first at {_pt(nearest)}, {seg.distance(hit):.4g} nm from the contact; move "
        "the contact to an edge with free space in front of it, or reshape the mesa"
    )


def _check_contact_pairs(device: Device, leads: list[Polygon], tol: float) -> None:
    contacts = device.contacts
    for i in range(len(contacts)):
        for j in range(i + 1, len(contacts)):
            ci, cj = contacts[i], contacts[j]
            shared = ci.segment.intersection(cj.segment)
            if shared.length > tol:
                (sx0, sy0), (sx1, sy1) = shared.bounds[:2], shared.bounds[2:]
                raise GeometryError(
                    f"device {device.name!r}: contacts {ci.name!r} and {cj.name!r} overlap "
                    f"along {shared.length:.4g} nm from {_xy(sx0, sy0)} to {_xy(sx1, sy1)}; "
                    "contacts may share at most an end point — shorten one of them"
                )
    for i in range(len(contacts)):
        for j in range(i + 1, len(contacts)):
            cross = leads[i].intersection(leads[j])
            if cross.area > tol * min(contacts[i].width, contacts[j].width):
                raise GeometryError(
                    f"device {device.name!r}: the semi-infinite leads of contacts "
                    f"{contacts[i].name!r} (direction {contacts[i].normal!r}) and "
                    f"{contacts[j].name!r} (direction {contacts[j].normal!r}) would overlap "
                    f"near {_pt(cross.centroid)}; move one contact so the leads point apart"
                )


def _check_gate(device: Device, gate: Gate, tol: float) -> None:
    what = f"device {device.name!r}, gate {gate.name!r}"
    region = gate.region
    if not isinstance(region, Polygon):
        raise GeometryError(
            f"{what}: region must be a shapely Polygon, got {type(region).__name__} "
            f"{region!r}; split a multi-part gate into separately named gates"
        )
    if region.is_empty or not region.area > 0:
        raise GeometryError(f"{what}: region {region.wkt!r} is empty; give the gate an area")
    if not region.is_valid:
        raise GeometryError(
            f"{what}: region is not a valid polygon: {_validity_text(region)}; reorder its "
            "vertices so the boundary does not cross itself"
        )
    minx, miny, maxx, maxy = device.outline.bounds
    overlap = region.intersection(device.outline).area
    if overlap <= tol * max(maxx - minx, maxy - miny):
        raise GeometryError(
            f"{what} (bounds {region.bounds!r}) lies entirely outside the mesa (bounds "
            f"{device.outline.bounds!r}), so it would act on no site; move it over the device "
            "or remove it"
        )


def _check_necks(device: Device, a: float, min_neck_sites: float) -> None:
    try:
        sites = float(min_neck_sites)
    except (TypeError, ValueError):
        sites = float("nan")
    if not (math.isfinite(sites) and sites >= 0):
        raise GeometryError(
            f"min_neck_sites must be a non-negative number, got {min_neck_sites!r}; "
            "use e.g. 3.0 (0 disables the neck check)"
        )
    if sites == 0:
        return
    outline = device.outline
    w = sites * a
    eroded = outline.buffer(-w / 2)
    pieces = polygon_pieces(eroded)
    if not pieces:
        raise GeometryError(
            f"device {device.name!r} is nowhere wider than {w:g} nm ({sites:g} lattice "
            f"constants of {a:g} nm): eroding the outline by {w / 2:g} nm leaves nothing; widen "
            "the device, use a smaller lattice constant, or lower min_neck_sites"
        )
    if len(pieces) <= 1:
        return
    # Opening (erode then dilate) removes exactly the parts narrower than w; the lost part that
    # touches two surviving pieces is the neck that splits them.
    grown = [p.buffer(w / 2, join_style="mitre") for p in pieces]
    lost = polygon_pieces(outline.difference(shapely.union_all(grown)))
    touch_tol = 1e-3 * a
    bridging = [piece for piece in lost if sum(piece.distance(g) <= touch_tol for g in grown) >= 2]
    where = max(bridging or lost, key=lambda p: p.area, default=None)
    location = _pt(where.centroid) if where is not None else _pt(outline.centroid)
    raise GeometryError(
        f"device {device.name!r} has a neck narrower than {w:g} nm ({sites:g} lattice constants "
        f"of {a:g} nm) near {location}: eroding the outline by {w / 2:g} nm splits it into "
        f"{len(pieces)} pieces, so the edges on either side would couple or pinch off; widen the "
        "neck, use a smaller lattice constant, or lower min_neck_sites"
    )


#: Parametric device templates by short name.
def perimeter_order(device: Device) -> list[list[int]]:
    """Contacts in the order a walk along each boundary ring meets them.

    Returns one list of 0-based contact indices per ring (exterior first, then holes) that
    carries contacts. An ideal helical edge connects each contact to its neighbours in this
    order, which fixes the quantised value of every measurement (see
    :func:`pipeline.transport.landauer.helical_ring_transmissions`).
    """
    rings = [device.outline.exterior, *device.outline.interiors]
    groups: dict[int, list[tuple[float, int]]] = {}
    for k, contact in enumerate(device.contacts):
        mid = shapely.Point(contact.midpoint)
        dist = [ring.distance(mid) for ring in rings]
        r = int(np.argmin(dist))
        groups.setdefault(r, []).append((rings[r].project(mid), k))
    return [[k for _, k in sorted(groups[r])] for r in sorted(groups)]
