"""One table of bad inputs, each refused through ``helisweep run`` before any compute, with a
clear message, and without touching an existing run."""

import hashlib
import json
from pathlib import Path

import gdstk
import pytest
from conftest import tiny_config

from pipeline.cli.main import main
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep

STRIP = [[0, 0], [120, 0], [120, 40], [0, 40], [0, 0]]


def geojson(mesa=None, contacts=None, extra=None):
    feats = [{"type": "Feature", "properties": {"role": "mesa"},
              "geometry": mesa or {"type": "Polygon", "coordinates": [STRIP]}}]
    for name, coords in (contacts or {"L": [[0, 0], [0, 40]], "R": [[120, 0], [120, 40]]}).items():
        feats.append({"type": "Feature", "properties": {"role": "contact", "name": name},
                      "geometry": {"type": "LineString", "coordinates": coords}})
    doc = {"type": "FeatureCollection", "features": feats}
    doc.update(extra or {})
    return json.dumps(doc)


def gds_without_contact_layer(path: Path) -> None:
    lib = gdstk.Library(unit=1e-9)
    cell = lib.new_cell("dev")
    cell.add(gdstk.rectangle((0, 0), (120, 40), layer=1, datatype=0))
    lib.write_gds(str(path))


FILE_DEVICE = ('template = "strip"\nparameters = { width = 40.0 }',
               'file = "{file}"')
NO_GEO_AXIS = ('geometry = { parameter = "length", values = [60.0, 120.0] }\n', "")


def _file_case(content, suffix=".geojson", **more):
    changes = {FILE_DEVICE[0]: FILE_DEVICE[1], NO_GEO_AXIS[0]: NO_GEO_AXIS[1], **more}
    return {"changes": changes, "file": (suffix, content)}


CASES = {
    # ---- configuration: typos, types, sizes, units, empty sweeps, disk
    "typo in a key": ({"changes": {"seed = 42": "seeed = 42"}}, "Did you mean 'seed'"),
    "typo in a section": ({"changes": {"[sweep]": "[swep]"}}, "Did you mean 'sweep'"),
    "wrong type": ({"changes": {"realisations = 3": 'realisations = "many"'}}, "run.realisations"),
    "zero realisations": ({"changes": {"realisations = 3": "realisations = 0"}}, "greater than or equal to 1"),
    "negative lattice constant": ({"changes": {"constant = 5.0": "constant = -5.0"}}, "positive length"),
    "lattice constant in um": ({"changes": {"constant = 5.0": "constant = 0.005"}}, "did you give um"),
    "width in um": ({"changes": {"width = 40.0 }": "width = 0.04 }"}}, "did you give um"),
    "length sweep in m": ({"changes": {"values = [60.0, 120.0]": "values = [6e-8, 1.2e-7]"}}, "smaller than"),
    "zero width": ({"changes": {"width = 40.0 }": "width = 0.0 }"}}, "positive length"),
    "empty energy sweep": ({"changes": {"energy = [-3.0, 1.0, 5.0]": "energy = []"}}, "empty"),
    "energy in eV as meV": ({"changes": {"energy = [-3.0, 1.0, 5.0]": "energy = [4000.0]"}}, "did you give eV"),
    "range without num": ({"changes": {"energy = [-3.0, 1.0, 5.0]": "energy = { start = 0, stop = 2 }"}}, "num or step"),
    "unknown template": ({"changes": {'template = "strip"': 'template = "hbarr"'}}, "Did you mean 'hbar'"),
    "unknown material": ({"changes": {'preset = "hgte-7.0nm"': 'preset = "hgte"'}}, "unknown material preset"),
    "gapless material": ({"changes": {'preset = "hgte-7.0nm"': 'preset = "hgte-7.0nm"\nD = 700.0'}}, "no bulk gap"),
    "unknown disorder kind": ({"changes": {'kind = "anderson"': 'kind = "gaussian"'}}, "disorder"),
    "negative disorder": ({"changes": {"width = 30.0": "width = -30.0"}}, "greater than or equal to 0"),
    "bad measurement label": ({"changes": {'labels = ["G(L,R)", "R(L,R;L,R)"]': 'labels = ["R1"]'}}, "cannot read measurement"),
    "measurement on unknown contact": ({"changes": {'labels = ["G(L,R)", "R(L,R;L,R)"]': 'labels = ["G(L,X)"]'}}, "contact 'X'"),
    "gate sweep without lever arm": ({"changes": {"gate_voltage = 0.0": "gate_voltage = [0.0, 0.5]"}}, "lever arm"),
    "more samples than the disk holds": ({"changes": {"realisations = 3": "realisations = 9000000",
                                                      "energy = [-3.0, 1.0, 5.0]": "energy = { start = -5, stop = 5, num = 4001 }"}},
                                         "MB are free"),
    "not TOML": ({"changes": {"[run]": "[run"}}, "not valid TOML"),
    # ---- geometry files
    "geometry file missing": ({"changes": {FILE_DEVICE[0]: 'file = "nowhere.geojson"', NO_GEO_AXIS[0]: ""}}, "does not exist"),
    "non-polygon mesa": (_file_case(geojson(mesa={"type": "Point", "coordinates": [0, 0]})), "Point"),
    "self-intersecting mesa": (_file_case(geojson(mesa={"type": "Polygon", "coordinates": [[[0, 0], [120, 40], [120, 0], [0, 40], [0, 0]]]})), "elf-intersection"),
    "open ring": (_file_case(geojson(mesa={"type": "Polygon", "coordinates": [STRIP[:-1]]})), "open"),
    "contact off the outline": (_file_case(geojson(contacts={"L": [[0, 0], [0, 40]], "R": [[100, 0], [100, 40]]})), "does not lie on the device outline"),
    "overlapping contacts": (_file_case(geojson(contacts={"L": [[0, 0], [0, 40]], "R": [[0, 10], [0, 30]]})), "overlap"),
    "diagonal contact": (_file_case(geojson(mesa={"type": "Polygon", "coordinates": [[[0, 0], [120, 0], [140, 40], [0, 40], [0, 0]]]},
                                            contacts={"L": [[0, 0], [0, 40]], "R": [[120, 0], [140, 40]]})), "lattice direction"),
    "coordinates in um read as nm": (_file_case(geojson(mesa={"type": "Polygon", "coordinates": [[[0, 0], [0.12, 0], [0.12, 0.04], [0, 0.04], [0, 0]]]},
                                                        contacts={"L": [[0, 0], [0, 0.04]], "R": [[0.12, 0], [0.12, 0.04]]})), "um"),
    "absurd coordinates": (_file_case(geojson(mesa={"type": "Polygon", "coordinates": [[[0, 0], [1.2e8, 0], [1.2e8, 40], [0, 40], [0, 0]]]},
                                              contacts={"L": [[0, 0], [0, 40]], "R": [[1.2e8, 0], [1.2e8, 40]]})), "1 mm"),
    "GDSII missing a mapped layer": (_file_case(None, suffix=".gds"), "layer"),
    # ---- run time, still before compute
    "no open lead mode at the energy": ({"changes": {"doping = 25.0": "doping = 0.0", "energy = [-3.0, 1.0, 5.0]": "energy = [7.46]"}}, "no open mode"),
    "lattice too coarse for the model": ({"changes": {"constant = 5.0": "constant = 10.0", "width = 40.0 }": "width = 60.0 }"}}, "lattice too coarse"),
    "lattice too fine for memory": ({"changes": {"constant = 5.0": "constant = 0.2", "width = 40.0 }": "width = 2000.0 }",
                                                 "values = [60.0, 120.0]": "values = [60000.0, 120000.0]"}}, "needs an estimated"),
}


@pytest.fixture(scope="module")
def existing_run(tmp_path_factory, dask_clients):
    d = tmp_path_factory.mktemp("existing")
    text = tiny_config(d, realisations=2)
    store = run_sweep(parse_config(text), client=dask_clients[1], store_path=d / "samples.zarr",
                      progress=False)
    return store.path


def _fingerprint(path: Path) -> str:
    h = hashlib.sha256()
    for f in sorted(p for p in path.rglob("*") if p.is_file()):
        h.update(str(f.relative_to(path)).encode())
        h.update(f.read_bytes())
    return h.hexdigest()


def test_the_table_has_at_least_thirty_cases():
    assert len(CASES) >= 30


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_is_refused_before_compute(name, tmp_path, existing_run, capsys):
    case, message = CASES[name]
    changes = case["changes"]
    if "file" in case:
        suffix, content = case["file"]
        geo = tmp_path / f"device{suffix}"
        if content is None:
            gds_without_contact_layer(geo)
        else:
            geo.write_text(content)
        changes = {k: v.replace("{file}", geo.name) for k, v in changes.items()}
    text = tiny_config(tmp_path / "run", realisations=3, **changes)
    config = tmp_path / "bad.toml"
    config.write_text(text)
    before = _fingerprint(existing_run)
    code = main(["run", str(config), "--store", str(existing_run), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert "helisweep: error:" in err
    assert message in err, err
    assert _fingerprint(existing_run) == before  # the existing run is untouched
    assert not (tmp_path / "run").exists()  # nothing was created for the bad run
