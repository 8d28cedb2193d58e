"""Tests of device geometry: templates, validation refusals, file formats and example devices."""

from __future__ import annotations

import importlib.util
import json
from pathlib import Path

import gdstk
import numpy as np
import pytest
import shapely
from shapely.geometry import LineString, Point, Polygon, box

from pipeline.device.drawing import plot_device
from pipeline.device.outline import Contact, Device, Gate, validate_device
from pipeline.device.readers import SUFFIXES, device_from_dict, device_to_dict, load_device, save_geojson
from pipeline.device.templates import TEMPLATES, h_bar, hall_bar, two_terminal_strip
from pipeline.errors import GeometryError

A = 5.0  # lattice constant (nm) used throughout
ROOT = Path(__file__).resolve().parent.parent
GEOMETRIES = ROOT / "geometries"


def _perimeter_order(device: Device) -> list[int]:
    """Contact indices in the order a counter-clockwise walk of the exterior meets them,
    rotated to start at contact 0."""
    ring = device.outline.exterior
    assert ring.is_ccw
    along = [ring.project(Point(c.midpoint)) for c in device.contacts]
    order = [int(i) for i in np.argsort(along)]
    k = order.index(0)
    return order[k:] + order[:k]


def _side_normal(device: Device, contact: Contact) -> tuple[int, int]:
    """Outward normal found independently: the direction whose a/2 probe leaves the mesa."""
    mx, my = contact.midpoint
    outs = [
        d
        for d in ((1, 0), (-1, 0), (0, 1), (0, -1))
        if device.outline.contains(Point(mx - d[0] * A / 2, my - d[1] * A / 2))
        and not device.outline.intersects(Point(mx + d[0] * A / 2, my + d[1] * A / 2))
    ]
    assert len(outs) == 1, outs
    return outs[0]


def _strip_contacts(outline: Polygon, *segments: tuple) -> tuple[Contact, ...]:
    return tuple(Contact(f"C{k}", LineString(seg)) for k, seg in enumerate(segments, 1))


# ---------------------------------------------------------------------------------------------
# Templates
# ---------------------------------------------------------------------------------------------

TEMPLATE_CASES = [
    (
        two_terminal_strip(length=400, width=200),
        ("L", "R"),
        [(-1, 0), (1, 0)],
        [200, 200],
    ),
    (
        h_bar(length=600, width=200, arm_length=200, arm_width=150),
        ("1", "2", "3", "4"),
        [(0, 1), (0, -1), (0, -1), (0, 1)],
        [150, 150, 150, 150],
    ),
    (
        hall_bar(length=800, width=200, probe_width=100, probe_length=150, probe_spacing=400),
        ("1", "2", "3", "4", "5", "6"),
        [(-1, 0), (0, -1), (0, -1), (1, 0), (0, 1), (0, 1)],
        [200, 100, 100, 200, 100, 100],
    ),
]


@pytest.mark.parametrize(
    "device, names, normals, widths", TEMPLATE_CASES, ids=["strip", "hbar", "hallbar"]
)
def test_template_contacts(device, names, normals, widths):
    validate_device(device, A)
    assert device.contact_names == names
    assert [c.normal for c in device.contacts] == normals
    assert [_side_normal(device, c) for c in device.contacts] == normals
    assert [c.width for c in device.contacts] == pytest.approx(widths)
    assert [c.axis for c in device.contacts] == [0 if n[0] else 1 for n in normals]
    assert _perimeter_order(device) == list(range(len(names)))
    coords = np.asarray(device.outline.exterior.coords)
    assert np.all(np.mod(coords, A) == 0), "corners must be multiples of the lattice constant"


def test_h_bar_layout():
    d = h_bar(length=600, width=200, arm_length=200, arm_width=150)
    # Contacts 1 and 4 are joined by the bridge's top edge; 1 is top-left, 3 bottom-right.
    top = LineString([(150, 400), (750, 400)])
    assert d.outline.boundary.covers(top)
    assert d.contacts[0].midpoint == (75, 600)
    assert d.contacts[2].midpoint == (825, 0)
    assert d.outline.area == pytest.approx(2 * 150 * 600 + 600 * 200)


def test_hall_bar_probes_centred():
    d = hall_bar(length=800, width=200, probe_width=100, probe_length=150, probe_spacing=400)
    xs = [d.contacts[d.contact_index(n)].midpoint[0] for n in ("2", "3", "5", "6")]
    assert xs == [200, 600, 600, 200]
    assert d.contacts[1].midpoint[1] == -150
    assert d.contacts[4].midpoint[1] == 350


def test_templates_registry_and_argument_errors():
    assert set(TEMPLATES) == {"strip", "hbar", "hallbar"}
    assert TEMPLATES["strip"](length=100, width=50).contact_names == ("L", "R")
    with pytest.raises(GeometryError, match=r"width must be a positive length in nm, got -1"):
        two_terminal_strip(length=100, width=-1)
    with pytest.raises(GeometryError, match=r"probe_spacing 100 nm must exceed probe_width 100"):
        hall_bar(length=800, width=200, probe_width=100, probe_length=150, probe_spacing=100)
    with pytest.raises(GeometryError, match=r"do not fit inside the bar length 500"):
        hall_bar(length=500, width=200, probe_width=100, probe_length=150, probe_spacing=400)


def test_device_orients_contacts_and_outline():
    # Clockwise outline and contacts given "backwards": the Device normalises both.
    outline = Polygon([(0, 0), (0, 200), (400, 200), (400, 0)])
    contacts = (
        Contact("L", LineString([(0, 0), (0, 200)])),
        Contact("R", LineString([(400, 200), (400, 0)])),
    )
    d = Device("cw", outline, list(contacts))
    assert d.outline.exterior.is_ccw
    assert isinstance(d.contacts, tuple)
    assert [c.normal for c in d.contacts] == [(-1, 0), (1, 0)]
    validate_device(d, A)


def test_contact_index():
    d = h_bar(length=600, width=200, arm_length=200, arm_width=200)
    assert d.contact_index("3") == 2
    with pytest.raises(GeometryError, match=r"no contact 'X'.*\['1', '2', '3', '4'\]"):
        d.contact_index("X")


def test_plot_device(tmp_path):
    d = load_device(GEOMETRIES / "tarn-hbar-A.geojson")
    sites = np.array([[x, y] for x in np.arange(2.5, 1000, 50) for y in np.arange(2.5, 600, 50)])
    fig = plot_device(d, sites=sites, lattice_constant=A)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "x (nm)" and ax.get_ylabel() == "y (nm)"
    assert ax.get_aspect() == 1.0
    texts = {t.get_text() for t in ax.texts}
    assert {"1", "2", "3", "4", "TG"} <= texts
    assert len(ax.lines) == 1 + len(d.contacts)  # site dots + one thick line per contact
    fig.savefig(tmp_path / "hbar.png")
    assert (tmp_path / "hbar.png").stat().st_size > 0


# ---------------------------------------------------------------------------------------------
# Example files
# ---------------------------------------------------------------------------------------------

EXAMPLES = sorted(p for p in GEOMETRIES.iterdir() if p.suffix.lower() in SUFFIXES)


def test_examples_present():
    assert {p.suffix for p in EXAMPLES} >= {".geojson", ".wkt", ".gds"}
    assert len(EXAMPLES) >= 4


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_example_loads_and_validates(path):
    d = load_device(path)
    validate_device(d, A)
    assert len(d.contacts) >= 2
    assert _perimeter_order(d) == list(range(len(d.contacts)))
    # Small enough to mesh at 5 nm into at most ~20k sites.
    assert 1000 < d.outline.area / A**2 < 20_000
    coords = np.concatenate(
        [np.asarray(r.coords) for r in (d.outline.exterior, *d.outline.interiors)]
    )
    assert np.all(np.mod(coords, A) == 0)


def test_example_contents():
    hbar = load_device(GEOMETRIES / "tarn-hbar-A.geojson")
    assert hbar.name == "tarn-hbar-A" and hbar.gate_names == ("TG",)
    ring = load_device(GEOMETRIES / "tarn-ring-C.geojson")
    assert len(ring.outline.interiors) == 1 and ring.contact_names == ("L", "R")
    hall = load_device(GEOMETRIES / "tarn-hallbar-B.wkt")
    assert hall.name == "tarn-hallbar-B" and hall.contact_names == tuple("123456")
    cross = load_device(GEOMETRIES / "tarn-cross-D.gds")
    assert cross.name == "tarn-cross-D"
    assert cross.contact_names == ("1", "2", "3", "4") and cross.gate_names == ("TG",)
    assert list(cross.contacts[0].segment.coords) == [(0.0, 500.0), (0.0, 300.0)]
    assert [c.normal for c in cross.contacts] == [(-1, 0), (0, -1), (1, 0), (0, 1)]
    assert cross.gates[0].region.equals(box(250, 250, 550, 550))


def test_shipped_gds_matches_script(tmp_path):
    spec = importlib.util.spec_from_file_location(
        "make_example_gds", ROOT / "scripts" / "make_example_gds.py"
    )
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    assert module.main([str(tmp_path / "cross.gds")]) == 0
    fresh = load_device(tmp_path / "cross.gds")
    shipped = load_device(GEOMETRIES / "tarn-cross-D.gds")
    assert device_to_dict(fresh) == device_to_dict(shipped)


# ---------------------------------------------------------------------------------------------
# Round trips and formats
# ---------------------------------------------------------------------------------------------

ROUND_TRIP = [
    TEMPLATE_CASES[1][0],
    TEMPLATE_CASES[2][0],
    load_device(GEOMETRIES / "tarn-ring-C.geojson"),
    load_device(GEOMETRIES / "tarn-hbar-A.geojson"),
]


@pytest.mark.parametrize("device", ROUND_TRIP, ids=lambda d: d.name)
def test_geojson_round_trip(device, tmp_path):
    path = save_geojson(device, tmp_path / f"{device.name}.geojson")
    back = load_device(path)
    assert back.name == device.name
    assert back.outline.equals_exact(device.outline, 0)
    assert list(back.outline.exterior.coords) == list(device.outline.exterior.coords)
    assert back.contact_names == device.contact_names
    for c0, c1 in zip(device.contacts, back.contacts, strict=True):
        assert list(c0.segment.coords) == list(c1.segment.coords)
    assert [g.region.wkt for g in back.gates] == [g.region.wkt for g in device.gates]
    assert device_from_dict(device_to_dict(device)) == device
    json.loads(path.read_text())  # it is plain JSON


def _fc(mesa_geometry, *extra, **top):
    return {
        "type": "FeatureCollection",
        **top,
        "features": [
            {"type": "Feature", "properties": {"role": "mesa"}, "geometry": mesa_geometry},
            *extra,
        ],
    }


def _contact_feature(name, coords):
    return {
        "type": "Feature",
        "properties": {"role": "contact", "name": name},
        "geometry": {"type": "LineString", "coordinates": coords},
    }


SQUARE = {"type": "Polygon", "coordinates": [[[0, 0], [400, 0], [400, 200], [0, 200], [0, 0]]]}


def test_geojson_units_um():
    mesa = {"type": "Polygon", "coordinates": [[[0, 0], [0.55, 0], [0.55, 0.2], [0, 0.2], [0, 0]]]}
    d = device_from_dict(
        _fc(
            mesa,
            _contact_feature("L", [[0, 0.2], [0, 0]]),
            _contact_feature("R", [[0.55, 0], [0.55, 0.2]]),
            units="um",
        )
    )
    assert d.outline.bounds == (0.0, 0.0, 550.0, 200.0)
    validate_device(d, A)
    with pytest.raises(GeometryError, match=r"units 'mm' are not one of"):
        device_from_dict(_fc(SQUARE, units="mm"))


def test_wkt_units_and_name(tmp_path):
    p = tmp_path / "dev.wkt"
    p.write_text(
        "# a strip in micrometres\nunits: um\nname: tarn-strip-E\n\n"
        "mesa: POLYGON ((0 0, 0.4 0, 0.4 0.2, 0 0.2, 0 0))\n"
        "contact L: LINESTRING (0 0, 0 0.2)  # west\n"
        "contact R: LINESTRING (0.4 0, 0.4 0.2)\n"
        "gate TG: POLYGON ((0.1 -0.02, 0.3 -0.02, 0.3 0.22, 0.1 0.22, 0.1 -0.02))\n"
    )
    d = load_device(p)
    assert d.name == "tarn-strip-E" and d.contact_names == ("L", "R")
    assert d.outline.bounds == (0.0, 0.0, 400.0, 200.0)
    assert d.gates[0].region.bounds == (100.0, -20.0, 300.0, 220.0)
    validate_device(d, A)


# ---------------------------------------------------------------------------------------------
# Refusals: validate_device
# ---------------------------------------------------------------------------------------------


def test_refuses_bow_tie():
    bow_tie = Polygon([(0, 0), (100, 100), (100, 0), (0, 100)])
    d = Device("bow", bow_tie, _strip_contacts(bow_tie, [(0, 0), (0, 100)]))
    with pytest.raises(
        GeometryError, match=r"not a valid polygon: Self-intersection at \(50, 50\)"
    ):
        validate_device(d, A)


def test_refuses_contact_off_outline():
    s = two_terminal_strip(length=400, width=200)
    d = Device("off", s.outline, (s.contacts[0], Contact("B", LineString([(0, -20), (400, -20)]))))
    with pytest.raises(
        GeometryError, match=r"contact 'B'.*does not lie on the device outline.*20\.0 nm from"
    ):
        validate_device(d, A)


def test_refuses_diagonal_contact():
    outline = Polygon([(0, 0), (400, 0), (400, 200), (200, 400), (0, 200)])
    d = Device(
        "diag",
        outline,
        (
            Contact("L", LineString([(0, 200), (0, 0)])),
            Contact("D", LineString([(400, 200), (200, 400)])),
        ),
    )
    with pytest.raises(
        GeometryError, match=r"'D'.*not aligned with a lattice direction.*135\.0 degrees"
    ):
        validate_device(d, A)


def test_refuses_overlapping_contacts():
    s = two_terminal_strip(length=400, width=200)
    d = Device(
        "ov",
        s.outline,
        (
            Contact("A", LineString([(0, 0), (0, 150)])),
            Contact("B", LineString([(0, 100), (0, 200)])),
        ),
    )
    with pytest.raises(GeometryError, match=r"contacts 'A' and 'B' overlap along 50 nm"):
        validate_device(d, A)


def test_refuses_narrow_neck():
    outline = shapely.union_all(
        [box(0, 0, 200, 200), box(300, 0, 500, 200), box(200, 95, 300, 105)]
    )
    d = Device(
        "neck",
        outline,
        (
            Contact("L", LineString([(0, 0), (0, 200)])),
            Contact("R", LineString([(500, 0), (500, 200)])),
        ),
    )
    with pytest.raises(GeometryError, match=r"neck narrower than 15 nm .* near \(250, 100\)"):
        validate_device(d, A)
    validate_device(d, A, min_neck_sites=1.5)  # a 10 nm neck is fine when 7.5 nm is allowed


def test_refuses_lead_through_device():
    # A "C": the contact on the floor of the slot faces the upper jaw.
    c_shape = box(0, 0, 300, 300).difference(box(100, 100, 300, 200))
    d = Device(
        "C",
        c_shape,
        (
            Contact("W", LineString([(0, 0), (0, 300)])),
            Contact("F", LineString([(100, 100), (300, 100)])),
        ),
    )
    with pytest.raises(
        GeometryError, match=r"'F'.*would run back through the device.*100 nm from the contact"
    ):
        validate_device(d, A)


def test_refuses_contact_on_hole():
    ring = Polygon(
        [(0, 0), (300, 0), (300, 300), (0, 300)], [[(100, 100), (200, 100), (200, 200), (100, 200)]]
    )
    d = Device(
        "ring",
        ring,
        (
            Contact("W", LineString([(0, 0), (0, 300)])),
            Contact("H", LineString([(100, 100), (100, 200)])),
        ),
    )
    with pytest.raises(GeometryError, match=r"'H' lies on the edge of hole 0"):
        validate_device(d, A)


def test_refuses_crossing_leads():
    outline = shapely.simplify(
        shapely.union_all(
            [
                box(0, -100, 100, 100),
                box(0, -100, 400, 0),
                box(300, -100, 400, 300),
                box(200, 200, 400, 300),
            ]
        ),
        0,
    )
    d = Device(
        "x",
        outline,
        (
            Contact("P", LineString([(0, 100), (100, 100)])),
            Contact("Q", LineString([(200, 200), (200, 300)])),
        ),
    )
    with pytest.raises(GeometryError, match=r"leads of contacts 'P' .* and 'Q' .* would overlap"):
        validate_device(d, A)


def test_refuses_um_coordinates_read_as_nm():
    hb = hall_bar(length=800, width=200, probe_width=100, probe_length=150, probe_spacing=400)
    scale = lambda g: shapely.transform(g, lambda xy: xy / 1000)  # noqa: E731
    in_um = Device(
        "um", scale(hb.outline), tuple(Contact(c.name, scale(c.segment)) for c in hb.contacts)
    )
    with pytest.raises(GeometryError, match=r"only 0\.8 nm across.*written in µm"):
        validate_device(in_um, A)
    huge = Device("pm", box(0, 0, 8e8, 2e8), (Contact("L", LineString([(0, 0), (0, 2e8)])),))
    with pytest.raises(GeometryError, match=r"800000000\.0 nm .* exceeds .* units"):
        validate_device(huge, A)


def test_refuses_other_problems():
    s = two_terminal_strip(length=400, width=200)
    with pytest.raises(
        GeometryError, match=r"'A'.* is 5\.0 nm wide, less than 2 lattice constants"
    ):
        validate_device(Device("n", s.outline, (Contact("A", LineString([(0, 0), (0, 5)])),)), A)
    with pytest.raises(GeometryError, match=r"gate 'TG' .* lies entirely outside the mesa"):
        validate_device(Device("g", s.outline, s.contacts, (Gate("TG", box(900, 0, 990, 90)),)), A)
    with pytest.raises(GeometryError, match=r"contact names must be unique, but \['L'\]"):
        validate_device(
            Device("d", s.outline, (s.contacts[0], Contact("L", s.contacts[1].segment))), A
        )
    with pytest.raises(GeometryError, match=r"0 contact\(s\).*2 for a transport"):
        validate_device(Device("none", s.outline, ()), A)
    with pytest.raises(GeometryError, match=r"1 contact\(s\) but at least 2"):
        validate_device(Device("one", s.outline, s.contacts[:1]), A, min_contacts=2)
    with pytest.raises(GeometryError, match=r"outline is a MultiPolygon of 2 pieces"):
        validate_device(Device("m", box(0, 0, 100, 100).union(box(200, 0, 300, 100)), ()), A)
    with pytest.raises(GeometryError, match=r"lattice constant must be a positive number"):
        validate_device(s, 0.0)
    # A hollow just behind the contact: the lead would not meet material along its full width.
    holed = Polygon(s.outline.exterior.coords, [[(3, 20), (4.5, 20), (4.5, 80), (3, 80)]])
    with pytest.raises(
        GeometryError, match=r"'L'.*not meet device material.*: 90 nm².*near \(3\.75, 50\)"
    ):
        validate_device(Device("h", holed, s.contacts), A)


# ---------------------------------------------------------------------------------------------
# Refusals: file formats
# ---------------------------------------------------------------------------------------------


def test_refuses_open_geojson_ring(tmp_path):
    data = _fc({"type": "Polygon", "coordinates": [[[0, 0], [400, 0], [400, 200], [0, 200]]]})
    p = tmp_path / "open.geojson"
    p.write_text(json.dumps(data))
    with pytest.raises(
        GeometryError,
        match=r"open\.geojson.*feature 0 .*ring 0 \(exterior\) is "
        r"open: its first position \[0, 0\] differs from its "
        r"last \[0, 200\]",
    ):
        load_device(p)


def test_refuses_point_mesa():
    with pytest.raises(GeometryError, match=r"feature 0 \(mesa\) is a 'Point'.*single 'Polygon'"):
        device_from_dict(_fc({"type": "Point", "coordinates": [0, 0]}))
    multi = {"type": "MultiPolygon", "coordinates": [SQUARE["coordinates"]]}
    with pytest.raises(GeometryError, match=r"is a 'MultiPolygon'.*one connected piece"):
        device_from_dict(_fc(multi))


@pytest.mark.parametrize(
    "data, pattern",
    [
        ({"type": "Feature"}, r"'Feature', not 'FeatureCollection'"),
        ([1, 2], r"top level is a list"),
        (
            _fc(
                SQUARE,
                {
                    "type": "Feature",
                    "properties": {"role": "lead", "name": "x"},
                    "geometry": SQUARE,
                },
            ),
            r"feature 1 has role 'lead'; valid roles are "
            r"\['mesa', 'contact', 'gate'\]",
        ),
        (
            _fc(SQUARE, {"type": "Feature", "properties": {}, "geometry": SQUARE}),
            r"feature 1 has no properties\.role",
        ),
        (
            _fc(SQUARE, _contact_feature(None, [[0, 0], [0, 200]])),
            r"feature 1 \(role 'contact'\) has name None",
        ),
        (_fc(SQUARE, _contact_feature("L", [[0, 0], ["a", 200]])), r"position 1 is \['a', 200\]"),
        (
            _fc(SQUARE, _contact_feature("L", [[0, 0], [0, 100], [0, 200]])),
            r"has 3 positions .* exactly its 2 end points",
        ),
        (
            _fc({"type": "Polygon", "coordinates": [[[0, 0], [400, 0], [0, 0]]]}),
            r"ring 0 \(exterior\) has 3 positions; a closed ring needs at least 4",
        ),
        ({"type": "FeatureCollection", "features": []}, r"no feature with role 'mesa'"),
        (
            _fc(SQUARE, {"type": "Feature", "properties": {"role": "mesa"}, "geometry": SQUARE}),
            r"2 mesa features \(features \[0, 1\]\)",
        ),
    ],
)
def test_refuses_bad_geojson(data, pattern):
    with pytest.raises(GeometryError, match=pattern):
        device_from_dict(data)


@pytest.mark.parametrize(
    "text, pattern",
    [
        (
            "mesa: POLYGON ((0 0, 400 0, 400 200, 0 200, 0 0))\ncontact L: LINESTRING (0 0, 0\n",
            r"line 2: cannot parse the WKT of the contact",
        ),
        (
            "# c\n\nmesa: POLYGON ((0 0, 400 0, 400 200, 0 200))\n",
            r"line 3: .*Points of LinearRing do not form a closed linestring; the ring is open",
        ),
        (
            "mesa: POLYGON ((0 0, 400 0, 400 200, 0 200, 0 0))\nlead L: LINESTRING (0 0, 0 200)\n",
            r"line 2: unknown key 'lead L'; valid keys",
        ),
        (
            "mesa: POLYGON ((0 0, 400 0, 400 200, 0 200, 0 0))\ncontact: LINESTRING (0 0, 0 200)\n",
            r"line 2: contact without a name",
        ),
        ("mesa: POINT (0 0)\n", r"line 1 \(mesa\) is a 'Point'"),
        ("units: mm\n", r"line 1: units 'mm' are not one of"),
        ("contact L: LINESTRING (0 0, 0 200)\n", r"has no 'mesa:' line"),
        ("mesa POLYGON ((0 0, 1 0, 1 1, 0 0))\n", r"line 1: .* is not 'key: value'"),
    ],
)
def test_refuses_bad_wkt(text, pattern, tmp_path):
    p = tmp_path / "bad.wkt"
    p.write_text(text)
    with pytest.raises(GeometryError, match=pattern):
        load_device(p)


def test_refuses_unknown_suffix_and_missing_file(tmp_path):
    with pytest.raises(GeometryError, match=r"suffix '\.dxf'"):
        load_device(tmp_path / "x.dxf")
    with pytest.raises(GeometryError, match=r"no device file at"):
        load_device(tmp_path / "missing.geojson")
    p = tmp_path / "broken.json"
    p.write_text('{"type": "FeatureCollection",\n "features": [}')
    with pytest.raises(GeometryError, match=r"not valid JSON: .* line 2"):
        load_device(p)


# ---------------------------------------------------------------------------------------------
# GDSII
# ---------------------------------------------------------------------------------------------


def _write_gds(path, shapes, labels=(), unit=1e-9, cells=("DEV",)):
    """shapes: (x0, y0, x1, y1, layer) rectangles in nm; labels: (text, x, y, layer)."""
    lib = gdstk.Library(unit=unit, precision=1e-12)
    s = 1e-9 / unit
    cell = lib.new_cell(cells[0])
    for x0, y0, x1, y1, layer in shapes:
        cell.add(gdstk.rectangle((x0 * s, y0 * s), (x1 * s, y1 * s), layer=layer))
    for text, x, y, layer in labels:
        cell.add(gdstk.Label(text, (x * s, y * s), layer=layer))
    for extra in cells[1:]:
        lib.new_cell(extra).add(gdstk.rectangle((0, 0), (1, 1)))
    lib.write_gds(str(path))
    return path


STRIP_PADS = [(0, 0, 400, 200, 1), (-50, 50, 10, 150, 2), (390, 20, 450, 180, 2)]


def test_gds_unnamed_pads_and_units(tmp_path):
    p = _write_gds(tmp_path / "s.gds", STRIP_PADS, unit=1e-6)
    d = load_device(p, layer_map={"mesa": (1, 0), "contact": (2, 0)})
    # Numbered counter-clockwise from +x around the mesa centre: east pad first.
    assert d.contact_names == ("C1", "C2")
    assert list(d.contacts[0].segment.coords) == [(400.0, 20.0), (400.0, 180.0)]
    assert list(d.contacts[1].segment.coords) == [(0.0, 150.0), (0.0, 50.0)]
    validate_device(d, A)


def test_gds_labels_name_contacts_in_natural_order(tmp_path):
    shapes = [*STRIP_PADS, (100, -20, 300, 220, 3)]
    labels = [("10", -20, 100, 2), ("2", 420, 100, 2), ("TG", 200, 100, 3)]
    d = load_device(_write_gds(tmp_path / "l.gds", shapes, labels))
    assert d.contact_names == ("2", "10") and d.gate_names == ("TG",)
    assert d.contacts[0].normal == (1, 0)


def test_gds_refuses_missing_layer(tmp_path):
    p = _write_gds(tmp_path / "m.gds", STRIP_PADS)
    with pytest.raises(GeometryError, match=r"layer 3/0 .*role 'gate'.* layers present: 1/0, 2/0"):
        load_device(p)


def test_gds_refuses_pad_over_corner_and_ambiguous_cells(tmp_path):
    corner = [(0, 0, 400, 200, 1), (-50, -50, 50, 50, 2)]
    with pytest.raises(GeometryError, match=r"contact pad 'C1'.*bent stretch.*corner"):
        load_device(
            _write_gds(tmp_path / "c.gds", corner), layer_map={"mesa": (1, 0), "contact": (2, 0)}
        )
    p = _write_gds(tmp_path / "two.gds", STRIP_PADS, cells=("A", "B"))
    with pytest.raises(GeometryError, match=r"2 top cells \['A', 'B'\]; pass name="):
        load_device(p, layer_map={"mesa": (1, 0), "contact": (2, 0)})
    d = load_device(p, layer_map={"mesa": (1, 0), "contact": (2, 0)}, name="A")
    assert d.name == "A"
    split = [(0, 0, 100, 100, 1), (200, 0, 300, 100, 1)]
    with pytest.raises(GeometryError, match=r"mesa layer 1/0 holds 2 separate pieces"):
        load_device(_write_gds(tmp_path / "split.gds", split), layer_map={"mesa": (1, 0)})
    with pytest.raises(GeometryError, match=r"layer_map=.* applies only to GDSII"):
        load_device(GEOMETRIES / "tarn-hbar-A.geojson", layer_map={"mesa": (1, 0)})
