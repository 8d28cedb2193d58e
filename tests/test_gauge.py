"""Contacts too close for Kwant's magnetic gauge: a clear error naming the device, the contacts
and the fix, from preflight, from a system built in a field and on the command line.

The device: a 40 nm square with a contact along each full side (a van der Pauw square with
edge-long contacts). Neighbouring leads share the corner sites, so gauge-fixed bonds close a
loop through all four leads; Kwant's check for that case builds its message with
``lil_matrix.A``, which SciPy 1.14 removed, so Kwant itself raises an ``AttributeError``.
"""

import kwant
import pytest
import shapely

from pipeline.cli.main import main
from pipeline.device.outline import Contact, Device, validate_device
from pipeline.errors import ModelError
from pipeline.physics.materials import get_preset
from pipeline.system.mesh import build_system
from pipeline.system.preflight import preflight

# the square is narrower than four edge decay lengths: preflight says so, which is not the point here
pytestmark = pytest.mark.filterwarnings("ignore::pipeline.errors.PreflightWarning")

A = 5.0  # nm
MATERIAL = get_preset("hgte-7.0nm")


def _square(inset: float = 0.0) -> Device:
    """40 nm square, one contact per side, each ending ``inset`` nm before the corners."""
    s, e = inset, 40.0 - inset
    sides = {"W": [(0, s), (0, e)], "S": [(s, 0), (e, 0)], "E": [(40, s), (40, e)],
             "N": [(s, 40), (e, 40)]}
    return Device("vdp-square", shapely.box(0, 0, 40, 40),
                  tuple(Contact(n, shapely.LineString(p)) for n, p in sides.items()))


def test_the_device_is_valid_and_trips_kwants_gauge_check():
    device = _square()
    validate_device(device, A)  # nothing else objects to it
    dsys = build_system(device, MATERIAL, A, with_field=True, spin_block=True)
    with pytest.raises((AttributeError, ValueError)):
        kwant.physics.magnetic_gauge(dsys.fsyst)


def _assert_clear(exc: ModelError) -> None:
    text = str(exc)
    assert "device 'vdp-square' cannot be put in a perpendicular field" in text
    for pair in ("W and S", "W and N", "S and E", "E and N"):
        assert pair in text, text
    assert f"at least {2 * A:g} nm" in text and "b_perp = 0" in text
    assert isinstance(exc.__cause__, (AttributeError, ValueError))  # Kwant's error is kept


def test_preflight_in_a_field_refuses_the_device_with_the_fix():
    with pytest.raises(ModelError) as err:
        preflight(_square(), MATERIAL, A, check_half=False, with_field=True)
    _assert_clear(err.value)


def test_a_system_in_a_field_refuses_it_too():
    dsys = build_system(_square(), MATERIAL, A, with_field=True)
    with pytest.raises(ModelError) as err:
        dsys.params(b_perp=0.5)
    _assert_clear(err.value)


def test_the_fix_in_the_message_works():
    device = _square(inset=2 * A)
    validate_device(device, A)
    report = preflight(device, MATERIAL, A, check_half=False, with_field=True)
    assert report.device == "vdp-square"
    params = build_system(device, MATERIAL, A, with_field=True).params(b_perp=0.5)
    assert "peierls" in params and "peierls_lead3" in params


def test_without_a_field_the_device_still_runs():
    report = preflight(_square(), MATERIAL, A, check_half=False)
    assert report.n_sites == 64


def test_the_command_line_prints_one_error_line(tmp_path, capsys):
    geometry = tmp_path / "vdp-square.wkt"
    geometry.write_text(
        "name: vdp-square\nunits: nm\n\n"
        "mesa: POLYGON ((0 0, 40 0, 40 40, 0 40, 0 0))\n\n"
        "contact W: LINESTRING (0 0, 0 40)\n"
        "contact S: LINESTRING (0 0, 40 0)\n"
        "contact E: LINESTRING (40 0, 40 40)\n"
        "contact N: LINESTRING (0 40, 40 40)\n")
    code = main(["solve", str(geometry), "--field", "0.5", "--energy", "1.0", "--doping", "25"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.startswith("helisweep: error: device 'vdp-square' cannot be put in a "
                          "perpendicular field"), err
    assert "Traceback" not in err and "lil_matrix" not in err
