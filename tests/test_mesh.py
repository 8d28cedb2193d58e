"""Meshing: sites inside the outline, bonds that do not cross slits, leads at every contact."""

import numpy as np
import pytest
import shapely

from pipeline.device.outline import Contact, Device
from pipeline.device.templates import h_bar, hall_bar, two_terminal_strip
from pipeline.errors import GeometryError, ModelError
from pipeline.physics.materials import PRESETS
from pipeline.system.mesh import build_system, mesh_device

HGTE = PRESETS["hgte-7.0nm"]


def test_strip_site_count_and_positions():
    mesh = mesh_device(two_terminal_strip(length=200.0, width=100.0), 5.0)
    assert mesh.n_sites == 40 * 20
    assert np.allclose(np.sort(np.unique(mesh.positions[:, 0]))[:2], [2.5, 7.5])
    # every bond joins nearest neighbours: (40-1)*20 along x, 40*(20-1) along y
    assert len(mesh.bonds_x) == 39 * 20 and len(mesh.bonds_y) == 40 * 19
    assert [len(c) for c in mesh.lead_cells] == [20, 20]


@pytest.mark.parametrize("dev", [
    h_bar(length=300.0, width=150.0, arm_length=150.0, arm_width=150.0),
    hall_bar(length=800.0, width=200.0, probe_width=100.0, probe_length=150.0, probe_spacing=400.0),
])
def test_every_site_inside_and_every_contact_attached(dev):
    a = 5.0
    mesh = mesh_device(dev, a)
    assert shapely.contains_xy(dev.outline, mesh.positions[:, 0], mesh.positions[:, 1]).all()
    tags = {tuple(t) for t in mesh.tags.tolist()}
    for contact, cell, normal in zip(dev.contacts, mesh.lead_cells, mesh.lead_normals):
        assert len(cell) == round(contact.width / a)
        assert normal == contact.normal
        for t in cell.tolist():
            assert tuple(t) not in tags  # the lead starts outside the device ...
            assert (t[0] - normal[0], t[1] - normal[1]) in tags  # ... next to a device site
    dsys = build_system(dev, HGTE, a)
    assert len(dsys.fsyst.leads) == len(dev.contacts)
    assert dsys.n_sites == mesh.n_sites


def test_slit_narrower_than_a_cuts_bonds():
    # a U shape whose two arms are separated by a 2 nm slit: sites on both sides exist,
    # but no bond may cross the slit
    a = 5.0
    outer = shapely.box(0, 0, 100, 100)
    slit = shapely.box(48, 20, 50, 100)
    dev = Device("slit", outer.difference(slit), (
        Contact("L", shapely.LineString([(0, 0), (0, 100)])),
        Contact("R", shapely.LineString([(100, 0), (100, 100)])),
    ))
    mesh = mesh_device(dev, a)
    p = mesh.positions
    crossing = [(i, j) for i, j in mesh.bonds_x.tolist() if p[i, 0] < 49 < p[j, 0] and p[i, 1] > 20]
    assert crossing == []
    assert any(p[i, 0] < 49 < p[j, 0] for i, j in mesh.bonds_x.tolist())  # below the slit


def test_ring_with_hole_meshes_around_it():
    a = 5.0
    ring = shapely.box(0, 0, 400, 300).difference(shapely.box(150, 100, 250, 200))
    dev = Device("ring", ring, (
        Contact("L", shapely.LineString([(0, 0), (0, 300)])),
        Contact("R", shapely.LineString([(400, 0), (400, 300)])),
    ))
    mesh = mesh_device(dev, a)
    assert mesh.n_sites == 80 * 60 - 20 * 20
    assert not shapely.contains_xy(shapely.box(150, 100, 250, 200), mesh.positions[:, 0], mesh.positions[:, 1]).any()


def test_bad_lattice_constant_and_tiny_device():
    dev = two_terminal_strip(length=200.0, width=100.0)
    with pytest.raises(ModelError, match="positive"):
        mesh_device(dev, 0.0)
    tiny = Device("tiny", shapely.box(0, 0, 0.2, 0.2), (
        Contact("L", shapely.LineString([(0, 0), (0, 0.2)])),
        Contact("R", shapely.LineString([(0.2, 0), (0.2, 0.2)])),
    ))
    with pytest.raises(GeometryError, match="no lattice site"):
        mesh_device(tiny, 5.0)


def test_gate_masks_and_contact_doping_per_contact():
    dev = h_bar(length=300.0, width=150.0, arm_length=150.0, arm_width=150.0)
    from pipeline.device.outline import Gate

    gate = Gate("top", shapely.box(200, 100, 400, 400))
    dev = Device(dev.name, dev.outline, dev.contacts, (gate,))
    dsys = build_system(dev, HGTE, 5.0, contact_doping={"1": 30.0})
    assert dsys.contact_doping == (30.0, 0.0, 0.0, 0.0)
    mask = dsys.gate_masks["top"]
    assert 0 < mask.sum() < dsys.n_sites
    stack = dsys.onsite_stack(gate_potentials={"top": -7.0})
    base = dsys.onsite_stack()
    diff = (stack - base)[:, 0, 0].real
    np.testing.assert_allclose(diff[mask], -7.0)
    np.testing.assert_allclose(diff[~mask], 0.0)
    with pytest.raises(GeometryError, match="not defined"):
        dsys.onsite_stack(gate_potentials={"back": 1.0})
    with pytest.raises(GeometryError, match="does not have"):
        build_system(dev, HGTE, 5.0, contact_doping={"9": 1.0})
    with pytest.raises(ModelError, match="with_field=True"):
        dsys.params(b_perp=1.0)
