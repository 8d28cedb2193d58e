"""Read and write device files: GeoJSON, WKT and GDSII.

All loaders return a :class:`~pipeline.device.outline.Device` with coordinates in nanometres. They
check the *file* (structure, roles, names, closed rings, units, layers) and refuse a malformed
one with a :class:`~pipeline.errors.GeometryError` naming the file, the feature or line, the bad
value and the fix. They do not call :func:`~pipeline.device.outline.validate_device`, which needs the
lattice constant: the caller validates.

Formats
-------
GeoJSON (``.geojson``, ``.json``)
    An RFC 7946 ``FeatureCollection``. Unlike RFC 7946's longitude/latitude, coordinates are nm
    in a local Cartesian frame (a top-level foreign member ``"units": "nm"`` or ``"um"`` selects
    the unit; nm by default). Each feature has ``properties.role`` in ``{"mesa", "contact",
    "gate"}`` and ``properties.name``. Exactly one mesa ``Polygon`` (holes allowed); contacts
    are 2-position ``LineString`` s on the mesa edge, in terminal order; gates are ``Polygon`` s.
    Rings must be closed (first position repeated last) with at least 4 positions.
WKT (``.wkt``)
    One entry per line: ``mesa: POLYGON ((...))``, ``contact <name>: LINESTRING (...)``,
    ``gate <name>: POLYGON ((...))``, optionally ``units: nm|um`` and ``name: <device name>``.
    ``#`` starts a comment; blank lines are ignored.
GDSII (``.gds``)
    Read with gdstk from the top cell (or the cell called `name`). ``layer_map`` maps roles to
    ``(layer, datatype)``; default :data:`DEFAULT_LAYER_MAP`. The mesa is the union of the mesa
    layer's polygons; each contact is a pad polygon overlapping the mesa edge, and its segment
    is the stretch of mesa edge the pad covers; gates are polygons on the gate layer. Labels
    (text) on a contact or gate layer whose anchor lies inside a shape name it.
"""

from __future__ import annotations

import json
import math
import re
from collections.abc import Mapping
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np
import shapely
import shapely.wkt
from shapely.geometry import LineString, Point, Polygon
from shapely.validation import explain_validity

from pipeline.device.outline import Contact, Device, Gate, polygon_pieces
from pipeline.errors import GeometryError

__all__ = ['load_device', 'save_geojson', 'device_to_dict', 'device_from_dict', 'ROLES', 'UNITS', 'DEFAULT_LAYER_MAP', 'SUFFIXES']

#: Roles a shape can play in a device file.
ROLES: tuple[str, ...] = ("mesa", "contact", "gate")

#: Accepted unit names and their size in nm.
UNITS: Mapping[str, float] = MappingProxyType({"nm": 1.0, "um": 1000.0, "µm": 1000.0})

#: GDSII (layer, datatype) of each role unless a layer_map says otherwise.
DEFAULT_LAYER_MAP: Mapping[str, tuple[int, int]] = MappingProxyType(
    {"mesa": (1, 0), "contact": (2, 0), "gate": (3, 0)}
)

#: File suffixes load_device understands.
SUFFIXES: tuple[str, ...] = (".geojson", ".json", ".wkt", ".gds")


def load_device(
    path: str | Path,
    *,
    layer_map: Mapping[str, tuple[int, int]] | None = None,
    name: str | None = None,
) -> Device:
    """Load a device from a GeoJSON, WKT or GDSII file, chosen by the file suffix.

    Parameters
    ----------
    path : str or pathlib.Path
        ``.geojson``/``.json``, ``.wkt`` or ``.gds`` file. Coordinates become nm.
    layer_map : mapping, optional
        GDSII only: role -> (layer, datatype), e.g. ``{"mesa": (1, 0), "contact": (2, 0)}``.
        Leave out roles the file has no shapes for. Default :data:`DEFAULT_LAYER_MAP`.
    name : str, optional
        GDSII: the cell to read (needed when the file has several top cells); the device takes
        the cell's name. GeoJSON/WKT: the device name (default: the file's ``name`` member or
        line, else the file stem).

    Returns
    -------
    Device
        Not yet validated: call :func:`pipeline.device.outline.validate_device`.

    Raises
    ------
    GeometryError
        If the file is missing, has an unknown suffix, or is malformed.
    """
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in SUFFIXES:
        raise GeometryError(
            f"cannot tell the format of {str(p)!r} from its suffix {p.suffix!r}; use one of "
            f"{list(SUFFIXES)!r}"
        )
    if not p.is_file():
        raise GeometryError(f"no device file at {str(p)!r}; check the path")
    if layer_map is not None and suffix != ".gds":
        raise GeometryError(
            f"layer_map={dict(layer_map)!r} applies only to GDSII files, not {str(p)!r}; drop it"
        )
    if suffix == ".gds":
        return _load_gds(p, layer_map, name)
    text = _read_text(p)
    if suffix == ".wkt":
        return _load_wkt(text, source=str(p), name=name, default_name=p.stem)
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise GeometryError(
            f"{str(p)!r} is not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}; "
            "fix the syntax (a JSON linter shows the spot)"
        ) from exc
    return _device_from_geojson(data, source=str(p), name=name, default_name=p.stem)


def _read_text(p: Path) -> str:
    try:
        return p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise GeometryError(
            f"{str(p)!r} is not UTF-8 text (byte {exc.start}); save it as UTF-8 — is it a "
            "binary file with the wrong suffix?"
        ) from exc


def _unit_scale(value: Any, where: str) -> float:
    if not isinstance(value, str) or value.strip() not in UNITS:
        raise GeometryError(f"{where}: units {value!r} are not one of {list(UNITS)!r}")
    return UNITS[value.strip()]


def _natural_key(text: str) -> list[Any]:
    """Sort key that orders "2" before "10" (digit runs compare as numbers)."""
    return [(0, int(t), "") if t.isdigit() else (1, 0, t) for t in re.split(r"(\d+)", text) if t]


def _number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _positions(coords: Any, where: str, scale: float) -> list[tuple[float, float]]:
    """Validate a GeoJSON list of positions and return them scaled to nm."""
    if not isinstance(coords, list):
        raise GeometryError(f"{where}: expected a list of [x, y] positions, got {coords!r}")
    out = []
    for k, pos in enumerate(coords):
        if not isinstance(pos, list) or len(pos) != 2 or not all(_number(v) for v in pos):
            raise GeometryError(
                f"{where}: position {k} is {pos!r}; each position must be [x, y] with two "
                "finite numbers (nm; planar, no altitude)"
            )
        # Rounding to 1e-6 nm removes float noise of the unit conversion (0.55 um * 1000).
        out.append(
            (round(pos[0] * scale, 6), round(pos[1] * scale, 6))
            if scale != 1.0
            else (float(pos[0]), float(pos[1]))
        )
    return out


def _ring(coords: Any, where: str, scale: float) -> list[tuple[float, float]]:
    """A closed GeoJSON linear ring (RFC 7946 section 3.1.6), scaled to nm."""
    pts = _positions(coords, where, scale)
    if pts and pts[0] != pts[-1]:
        raise GeometryError(
            f"{where} is open: its first position {coords[0]!r} differs from its last "
            f"{coords[-1]!r}; repeat the first position at the end (RFC 7946 rings are closed)"
        )
    if len(pts) < 4:
        raise GeometryError(
            f"{where} has {len(pts)} positions; a closed ring needs at least 4 (three corners "
            "and the first repeated at the end)"
        )
    return pts


def _polygon(geom: dict, where: str, scale: float) -> Polygon:
    rings = geom.get("coordinates")
    if not isinstance(rings, list) or not rings:
        raise GeometryError(
            f"{where}: Polygon coordinates must be a non-empty list of rings, got {rings!r}"
        )
    shell = _ring(rings[0], f"{where}, ring 0 (exterior)", scale)
    holes = [
        _ring(r, f"{where}, ring {k} (hole {k - 1})", scale) for k, r in enumerate(rings) if k > 0
    ]
    return Polygon(shell, holes)


_KIND_HINT = {
    "Point": "a Point has no area",
    "MultiPoint": "points have no area",
    "LineString": "a line has no area (close it into a Polygon ring)",
    "MultiLineString": "lines have no area",
    "MultiPolygon": "a device must be one connected piece: join the parts or make one file "
    "per device",
    "GeometryCollection": "give one Polygon",
}


def _device_from_geojson(
    data: Any, *, source: str, name: str | None = None, default_name: str = "device"
) -> Device:
    if not isinstance(data, dict):
        raise GeometryError(
            f"{source}: top level is a {type(data).__name__}, not a GeoJSON FeatureCollection "
            'object; wrap the shapes as {"type": "FeatureCollection", "features": [...]}'
        )
    if data.get("type") != "FeatureCollection":
        raise GeometryError(
            f"{source}: top-level \"type\" is {data.get('type')!r}, not 'FeatureCollection'; a "
            "device file is a FeatureCollection of features with properties.role in "
            f"{list(ROLES)!r}"
        )
    features = data.get("features")
    if not isinstance(features, list):
        raise GeometryError(
            f'{source}: "features" is {features!r}, not a list; list the mesa, contact and '
            "gate features"
        )
    scale = _unit_scale(data.get("units", "nm"), f'{source}: top-level "units"')

    mesas: list[tuple[int, Polygon, Any]] = []
    contacts: list[Contact] = []
    gates: list[Gate] = []
    for i, feature in enumerate(features):
        where = f"{source}: feature {i}"
        if not isinstance(feature, dict) or feature.get("type") != "Feature":
            raise GeometryError(
                f"{where} is {feature!r:.120}, not a GeoJSON Feature object; write "
                '{"type": "Feature", "properties": {...}, "geometry": {...}}'
            )
        props = feature.get("properties")
        if not isinstance(props, dict) or "role" not in props:
            raise GeometryError(
                f'{where} has no properties.role; set "role" to one of {list(ROLES)!r}'
            )
        role = props["role"]
        if role not in ROLES:
            raise GeometryError(f"{where} has role {role!r}; valid roles are {list(ROLES)!r}")
        fname = props.get("name")
        if role != "mesa" and (not isinstance(fname, str) or not fname.strip()):
            raise GeometryError(
                f"{where} (role {role!r}) has name {fname!r}; every {role} needs a non-empty "
                'string properties.name, e.g. "1" or "TG"'
            )
        where = f"{where} ({role}{'' if fname is None else f' {fname!r}'})"
        geom = feature.get("geometry")
        if not isinstance(geom, dict) or "type" not in geom:
            raise GeometryError(f"{where} has geometry {geom!r}; give a GeoJSON geometry object")
        gtype = geom["type"]

        if role == "mesa":
            if gtype != "Polygon":
                hint = _KIND_HINT.get(gtype, "give a Polygon")
                raise GeometryError(
                    f"{where} is a {gtype!r}, but the mesa must be a single 'Polygon' (holes "
                    f"allowed): {hint}"
                )
            mesas.append((i, _polygon(geom, where, scale), fname))
        elif role == "contact":
            if gtype != "LineString":
                raise GeometryError(
                    f"{where} is a {gtype!r}; a contact must be a 'LineString' of its 2 end "
                    "points on the mesa edge"
                )
            pts = _positions(geom.get("coordinates"), where, scale)
            if len(pts) != 2:
                raise GeometryError(
                    f"{where} has {len(pts)} positions {geom.get('coordinates')!r}; a contact is "
                    "a straight segment: give exactly its 2 end points"
                )
            contacts.append(Contact(fname, LineString(pts)))
        else:
            if gtype != "Polygon":
                raise GeometryError(
                    f"{where} is a {gtype!r}; a gate must be a 'Polygon' (split a multi-part "
                    "gate into separately named gates)"
                )
            gates.append(Gate(fname, _polygon(geom, where, scale)))

    if not mesas:
        raise GeometryError(
            f"{source} has no feature with role 'mesa'; add the device outline as a Polygon "
            'feature with properties {"role": "mesa"}'
        )
    if len(mesas) > 1:
        raise GeometryError(
            f"{source} has {len(mesas)} mesa features (features {[m[0] for m in mesas]!r}); a "
            "device has exactly one mesa Polygon: merge them or make one file per device"
        )
    _, outline, mesa_name = mesas[0]
    top_name = data.get("name")
    dev_name = next(
        (n for n in (name, top_name, mesa_name, default_name) if isinstance(n, str) and n),
        "device",
    )
    return Device(dev_name, outline, tuple(contacts), tuple(gates))


def _num(v: float) -> int | float:
    """Write integral floats as integers: device files stay readable and exact."""
    f = float(v)
    return int(f) if f.is_integer() and abs(f) < 2**53 else f


def _ring_coords(ring: Any) -> list[list[int | float]]:
    return [[_num(x), _num(y)] for x, y, *_ in ring.coords]


def device_to_dict(device: Device) -> dict[str, Any]:
    """A GeoJSON FeatureCollection dict of `device` (nm, the format :func:`load_device` reads).

    Parameters
    ----------
    device : Device
        The device.

    Returns
    -------
    dict
        JSON-serialisable; feature order is mesa, contacts (terminal order), gates.
    """
    if not isinstance(device, Device):
        raise GeometryError(f"expected a Device, got {type(device).__name__} {device!r}")
    outline = device.outline
    if not isinstance(outline, Polygon):
        raise GeometryError(
            f"device {device.name!r}: outline is a {type(outline).__name__}, not a Polygon; "
            "only single-polygon devices can be written"
        )
    features: list[dict[str, Any]] = [
        {
            "type": "Feature",
            "properties": {"role": "mesa", "name": device.name},
            "geometry": {
                "type": "Polygon",
                "coordinates": [_ring_coords(r) for r in (outline.exterior, *outline.interiors)],
            },
        }
    ]
    for c in device.contacts:
        features.append(
            {
                "type": "Feature",
                "properties": {"role": "contact", "name": c.name},
                "geometry": {
                    "type": "LineString",
                    "coordinates": [[_num(x), _num(y)] for x, y, *_ in c.segment.coords],
                },
            }
        )
    for g in device.gates:
        region = g.region
        features.append(
            {
                "type": "Feature",
                "properties": {"role": "gate", "name": g.name},
                "geometry": {
                    "type": "Polygon",
                    "coordinates": [_ring_coords(r) for r in (region.exterior, *region.interiors)],
                },
            }
        )
    return {"type": "FeatureCollection", "name": device.name, "units": "nm", "features": features}


def device_from_dict(d: Mapping[str, Any]) -> Device:
    """Inverse of :func:`device_to_dict` (accepts any dict in the GeoJSON device format).

    Raises
    ------
    GeometryError
        If the dict is not a valid device FeatureCollection.
    """
    return _device_from_geojson(dict(d) if isinstance(d, Mapping) else d, source="<dict>")


_POSITION_RE = re.compile(r"\[\s*(-?[0-9.eE+-]+),\s*(-?[0-9.eE+-]+)\s*\]")


def save_geojson(device: Device, path: str | Path) -> Path:
    """Write `device` as a GeoJSON device file (nm) that :func:`load_device` reads back.

    Parameters
    ----------
    device : Device
        The device (e.g. from a template).
    path : str or pathlib.Path
        Output file, conventionally ``*.geojson``.

    Returns
    -------
    pathlib.Path
        The path written.
    """
    p = Path(path)
    text = json.dumps(device_to_dict(device), indent=2, ensure_ascii=False)
    # One position per line keeps hand-edited files readable (json puts each number on its own).
    text = _POSITION_RE.sub(r"[\1, \2]", text)
    p.write_text(text + "\n", encoding="utf-8")
    return p


def _load_wkt(text: str, *, source: str, name: str | None, default_name: str) -> Device:
    mesa: tuple[int, Polygon] | None = None
    contacts: list[Contact] = []
    gates: list[Gate] = []
    units: tuple[int, float] | None = None
    file_name: str | None = None
    valid_keys = "'mesa', 'contact <name>', 'gate <name>', 'units', 'name'"

    for lineno, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("#", 1)[0].strip()
        if not line:
            continue
        where = f"{source}, line {lineno}"
        key, sep, value = line.partition(":")
        if not sep:
            raise GeometryError(
                f"{where}: {raw.strip()!r} is not 'key: value'; write e.g. "
                "'mesa: POLYGON ((0 0, 400 0, 400 200, 0 200, 0 0))'"
            )
        words = key.split(None, 1)
        keyword = words[0].lower() if words else ""
        label = words[1].strip() if len(words) > 1 else ""
        value = value.strip()
        if keyword == "units":
            if units is not None:
                raise GeometryError(
                    f"{where}: units given twice (first on line {units[0]}); keep one"
                )
            units = (lineno, _unit_scale(value, where))
            continue
        if keyword == "name":
            if not value:
                raise GeometryError(f"{where}: empty device name; write 'name: tarn-hallbar-B'")
            file_name = value
            continue
        if keyword not in ROLES:
            raise GeometryError(
                f"{where}: unknown key {key.strip()!r}; valid keys are {valid_keys}"
            )
        if keyword == "mesa" and label:
            raise GeometryError(
                f"{where}: the mesa takes no name ({key.strip()!r}); write 'mesa: POLYGON (...)' "
                "and name the device with a 'name:' line"
            )
        if keyword != "mesa" and not label:
            raise GeometryError(
                f"{where}: {keyword} without a name; write '{keyword} <name>: ...', e.g. "
                f"'{keyword} 1: ...'"
            )
        geom = _parse_wkt(value, where, keyword)
        what = f"{where} ({keyword}{f' {label!r}' if label else ''})"
        if keyword == "mesa":
            if mesa is not None:
                raise GeometryError(
                    f"{what}: a second mesa (the first is on line {mesa[0]}); a device has "
                    "exactly one mesa polygon — merge them"
                )
            if not isinstance(geom, Polygon):
                hint = _KIND_HINT.get(geom.geom_type, "give a POLYGON")
                raise GeometryError(
                    f"{what} is a {geom.geom_type!r}, but the mesa must be a single POLYGON "
                    f"(holes allowed): {hint}"
                )
            mesa = (lineno, geom)
        elif keyword == "contact":
            if not isinstance(geom, LineString) or len(geom.coords) != 2:
                raise GeometryError(
                    f"{what} is {geom.wkt!r}; a contact must be a LINESTRING of exactly its 2 "
                    "end points on the mesa edge"
                )
            contacts.append(Contact(label, geom))
        else:
            if not isinstance(geom, Polygon):
                raise GeometryError(
                    f"{what} is a {geom.geom_type!r}; a gate must be a POLYGON (split a "
                    "multi-part gate into separately named gates)"
                )
            gates.append(Gate(label, geom))

    if mesa is None:
        raise GeometryError(
            f"{source} has no 'mesa:' line; add the device outline, e.g. "
            "'mesa: POLYGON ((0 0, 400 0, 400 200, 0 200, 0 0))'"
        )
    scale = units[1] if units else 1.0
    outline = mesa[1]
    if scale != 1.0:
        # Rounding to 1e-6 nm removes float noise of the unit conversion (0.55 um * 1000).
        def rescale(xy: np.ndarray) -> np.ndarray:
            return np.round(xy * scale, 6)

        outline = shapely.transform(outline, rescale)
        contacts = [Contact(c.name, shapely.transform(c.segment, rescale)) for c in contacts]
        gates = [Gate(g.name, shapely.transform(g.region, rescale)) for g in gates]
    dev_name = name or file_name or default_name or "device"
    return Device(dev_name, outline, tuple(contacts), tuple(gates))


def _parse_wkt(value: str, where: str, keyword: str) -> Any:
    try:
        geom = shapely.wkt.loads(value)
    except shapely.errors.ShapelyError as exc:
        msg = str(exc)
        hint = (
            "the ring is open: repeat its first point at the end"
            if "closed linestring" in msg
            else "check the parentheses and that points are 'x y' pairs separated by commas"
        )
        raise GeometryError(
            f"{where}: cannot parse the WKT of the {keyword} {value!r:.80}: {msg}; {hint}"
        ) from exc
    if geom.is_empty:
        raise GeometryError(f"{where}: the {keyword} {value!r} is empty; give its coordinates")
    if geom.has_z:
        raise GeometryError(
            f"{where}: the {keyword} has 3D coordinates ({value!r:.80}); give planar 'x y' pairs"
        )
    return geom


def _check_layer_map(layer_map: Mapping[str, Any] | None) -> dict[str, tuple[int, int]]:
    if layer_map is None:
        return dict(DEFAULT_LAYER_MAP)
    if not isinstance(layer_map, Mapping):
        raise GeometryError(
            f"layer_map must be a dict of role -> (layer, datatype), got {layer_map!r}"
        )
    out: dict[str, tuple[int, int]] = {}
    for role, ld in layer_map.items():
        if role not in ROLES:
            raise GeometryError(
                f"layer_map has unknown role {role!r}; valid roles are {list(ROLES)!r}"
            )
        ok = (
            isinstance(ld, (tuple, list))
            and len(ld) == 2
            and all(isinstance(v, (int, np.integer)) and not isinstance(v, bool) for v in ld)
        )
        if not ok:
            raise GeometryError(
                f"layer_map[{role!r}] is {ld!r}; give a (layer, datatype) pair of integers, "
                "e.g. (1, 0)"
            )
        out[role] = (int(ld[0]), int(ld[1]))
    if "mesa" not in out:
        raise GeometryError(
            f"layer_map {layer_map!r} has no 'mesa' entry; say which (layer, datatype) holds "
            "the mesa, e.g. {'mesa': (1, 0), 'contact': (2, 0)}"
        )
    return out


def _fmt_layers(layers: Any) -> str:
    return ", ".join(f"{ly}/{dt}" for ly, dt in sorted(layers)) or "none"


def _load_gds(path: Path, layer_map: Mapping[str, Any] | None, cell_name: str | None) -> Device:
    import gdstk  # compiled GDSII library: loaded only when a .gds file is read

    lm = _check_layer_map(layer_map)
    try:
        lib = gdstk.read_gds(str(path))
    except Exception as exc:  # gdstk raises assorted types for unreadable streams
        raise GeometryError(
            f"cannot read {str(path)!r} as GDSII: {exc}; is it a GDSII stream file?"
        ) from exc

    cells = [c for c in lib.cells if isinstance(c, gdstk.Cell)]
    if cell_name is not None:
        by_name = {c.name: c for c in cells}
        if cell_name not in by_name:
            raise GeometryError(
                f"{str(path)!r} has no cell {cell_name!r}; its cells are {sorted(by_name)!r}"
            )
        cell = by_name[cell_name]
    else:
        tops = [c for c in lib.top_level() if isinstance(c, gdstk.Cell)]
        if len(tops) != 1:
            names = sorted(c.name for c in tops)
            raise GeometryError(
                f"{str(path)!r} has {len(tops)} top cells {names!r}; pass name=<cell> to say "
                "which one is the device"
            )
        cell = tops[0]

    # User units -> nm, rounded to the database grid so e.g. 0.3 um becomes exactly 300 nm.
    nm_per_unit = lib.unit / 1e-9
    grid_nm = lib.precision / 1e-9
    decimals = max(0, math.ceil(-math.log10(grid_nm) - 1e-9))

    def to_nm(points: Any) -> np.ndarray:
        return np.round(np.asarray(points, dtype=float) * nm_per_unit, decimals) + 0.0

    where = f"{str(path)!r} (cell {cell.name!r})"
    polygons = cell.get_polygons()
    labels = cell.get_labels()
    present = {(p.layer, p.datatype) for p in polygons}
    for role, ld in lm.items():
        if ld not in present:
            label_layers = {(lb.layer, lb.texttype) for lb in labels}
            raise GeometryError(
                f"{where}: layer {ld[0]}/{ld[1]} (layer/datatype, mapped to role {role!r}) holds "
                f"no polygons; polygon layers present: {_fmt_layers(present)} (labels on: "
                f"{_fmt_layers(label_layers)}); fix layer_map (e.g. layer_map={{{role!r}: "
                f"(layer, datatype), ...}}) or leave {role!r} out if the device has none"
            )

    def shapes(role: str) -> list[Polygon]:
        out = []
        for k, p in enumerate(x for x in polygons if (x.layer, x.datatype) == lm[role]):
            poly = Polygon(to_nm(p.points))
            if not poly.is_valid:
                raise GeometryError(
                    f"{where}: polygon {k} on the {role} layer {lm[role][0]}/{lm[role][1]} is "
                    f"invalid: {explain_validity(poly)} (nm); redraw it without self-crossings"
                )
            out.append(poly)
        return out

    merged = shapely.union_all(shapes("mesa"))
    pieces = polygon_pieces(merged)
    if len(pieces) != 1:
        centres = ", ".join(f"({p.centroid.x:.6g}, {p.centroid.y:.6g})" for p in pieces)
        raise GeometryError(
            f"{where}: the mesa layer {lm['mesa'][0]}/{lm['mesa'][1]} holds {len(pieces)} "
            f"separate pieces (centred at {centres} nm); a device is one connected mesa — join "
            "them or move extra shapes to another layer"
        )
    # Drop collinear vertices left where drawn rectangles were merged.
    outline = shapely.simplify(pieces[0], 0)
    centre = outline.centroid
    tol = 1e-6 * max(outline.bounds[2] - outline.bounds[0], outline.bounds[3] - outline.bounds[1])

    contacts: list[Contact] = []
    if "contact" in lm:
        pads = polygon_pieces(shapely.union_all(shapes("contact")))
        names = _label_names(pads, labels, lm["contact"][0], to_nm, "contact", where, "C", centre)
        for pad, pad_name in sorted(
            zip(pads, names, strict=True), key=lambda t: _natural_key(t[1])
        ):
            contacts.append(Contact(pad_name, _pad_segment(outline, pad, tol, where, pad_name)))
    gates: list[Gate] = []
    if "gate" in lm:
        regions = polygon_pieces(shapely.union_all(shapes("gate")))
        names = _label_names(regions, labels, lm["gate"][0], to_nm, "gate", where, "G", centre)
        for region, gate_name in sorted(
            zip(regions, names, strict=True), key=lambda t: _natural_key(t[1])
        ):
            gates.append(Gate(gate_name, region))
    return Device(cell.name, outline, tuple(contacts), tuple(gates))


def _label_names(
    shapes: list[Polygon],
    labels: list[Any],
    layer: int,
    to_nm: Any,
    kind: str,
    where: str,
    prefix: str,
    centre: Point,
) -> list[str]:
    """Names of `shapes` from labels on `layer` inside them; unnamed ones get prefix1, ..."""
    names: list[str | None] = [None] * len(shapes)
    for lb in labels:
        if lb.layer != layer:
            continue
        x, y = to_nm([lb.origin])[0]
        anchor = Point(x, y)
        hits = [k for k, s in enumerate(shapes) if s.covers(anchor)]
        if not hits:
            raise GeometryError(
                f"{where}: label {lb.text!r} at ({x:.6g}, {y:.6g}) nm on the {kind} layer {layer} "
                f"lies in no {kind} shape; move its anchor inside the {kind} it names"
            )
        k = hits[0]
        if names[k] is not None:
            raise GeometryError(
                f"{where}: {kind} shape at ({shapes[k].centroid.x:.6g}, "
                f"{shapes[k].centroid.y:.6g}) nm has two labels, {names[k]!r} and {lb.text!r}; "
                "keep one"
            )
        names[k] = lb.text
    # Unlabelled shapes are numbered counter-clockwise from the +x axis around the mesa centre.
    unnamed = [k for k, n in enumerate(names) if n is None]
    unnamed.sort(
        key=lambda k: (
            math.atan2(shapes[k].centroid.y - centre.y, shapes[k].centroid.x - centre.x)
            % (2 * math.pi)
        )
    )
    for i, k in enumerate(unnamed, start=1):
        names[k] = f"{prefix}{i}"
    return [str(n) for n in names]


def _pad_segment(outline: Polygon, pad: Polygon, tol: float, where: str, name: str) -> LineString:
    """The straight stretch of the mesa edge (exterior or a hole) covered by a contact pad."""
    where = f"{where}: contact pad {name!r} (bounds {tuple(round(v, 6) for v in pad.bounds)!r})"
    pieces: list[LineString] = []
    for ring in (outline.exterior, *outline.interiors):
        for line in _lines(ring.intersection(pad)):
            coords = list(line.coords)
            pieces.extend(LineString(coords[k : k + 2]) for k in range(len(coords) - 1))
    pieces = [p for p in pieces if p.length > tol]
    if not pieces:
        raise GeometryError(
            f"{where} does not overlap the mesa edge; draw the pad across the edge where the "
            "lead attaches"
        )
    # A pad exactly as wide as its arm also runs along the arm's sides; those edge pieces lie on
    # the pad's own outline, whereas the contacted edge crosses the pad's interior.
    pad_edge = pad.boundary.buffer(tol)
    crossing = [p for p in pieces if p.difference(pad_edge).length > tol]
    merged = shapely.line_merge(shapely.union_all(crossing or pieces))
    if not isinstance(merged, LineString):
        parts = [tuple(round(v, 6) for v in g.bounds) for g in _lines(merged)]
        raise GeometryError(
            f"{where} meets the mesa edge in {len(parts)} separate pieces (bounds {parts!r}); "
            "draw the pad so it covers one straight stretch of one edge"
        )
    merged = shapely.simplify(merged, 0)
    coords = [tuple(float(v) for v in c) for c in merged.coords]
    if len(coords) != 2:
        raise GeometryError(
            f"{where} covers a bent stretch of the mesa edge through {coords!r} (a corner); "
            "draw the pad so it covers one straight edge only (no wider than that edge)"
        )
    (x0, y0), (x1, y1) = coords
    if abs(x1 - x0) > tol and abs(y1 - y0) > tol:
        raise GeometryError(
            f"{where} covers the edge from ({x0:.6g}, {y0:.6g}) to ({x1:.6g}, {y1:.6g}), which is "
            "not horizontal or vertical; contacts must sit on axis-aligned edges"
        )
    return LineString(coords)


def _lines(geom: Any) -> list[LineString]:
    """LineString parts of a geometry (points where a pad merely touches are dropped)."""
    if geom is None or geom.is_empty:
        return []
    if isinstance(geom, LineString):
        return [geom]
    out: list[LineString] = []
    for g in getattr(geom, "geoms", []):
        out.extend(_lines(g))
    return out
