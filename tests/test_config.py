"""Sweep configuration: valid examples load, bad input is refused with the key and the fix."""

from pathlib import Path

import pytest

from pipeline.errors import ConfigError, HelisweepError
from pipeline.sweep.config import config_hash, load_config, parse_config

CONFIGS = sorted((Path(__file__).resolve().parents[1] / "configs").glob("*.toml"))


@pytest.mark.parametrize("path", CONFIGS, ids=[p.name for p in CONFIGS])
def test_shipped_configs_are_valid(path):
    cfg = load_config(path)
    assert cfg.run.realisations >= 1 and cfg.measure.labels


def test_axes_ranges_and_defaults(tiny_config_text):
    text = tiny_config_text(**{"energy = [-3.0, 1.0, 5.0]": "energy = { start = -2, stop = 2, num = 5 }"})
    cfg = parse_config(text)
    assert cfg.axes["energy"] == [-2.0, -1.0, 0.0, 1.0, 2.0]
    assert cfg.axes["b_perp"] == [0.0] and cfg.axes["disorder_strength"] == [1.0]
    step = parse_config(tiny_config_text(**{"energy = [-3.0, 1.0, 5.0]": "energy = { start = 0, stop = 1, step = 0.25 }"}))
    assert step.axes["energy"] == [0.0, 0.25, 0.5, 0.75, 1.0]


def test_hash_ignores_name_workers_and_realisations_but_not_physics(tiny_config_text):
    base = config_hash(parse_config(tiny_config_text()))
    assert config_hash(parse_config(tiny_config_text(realisations=9))) == base
    assert config_hash(parse_config(tiny_config_text(**{'name = "tiny"': 'name = "other"'}))) == base
    assert config_hash(parse_config(tiny_config_text(**{"seed = 42": "seed = 43"}))) != base
    assert config_hash(parse_config(tiny_config_text(**{"width = 30.0": "width = 30.5"}))) != base


BAD = [
    # (replace old -> new, expected message fragment)
    ({"seed = 42": "sed = 42"}, "unknown key 'run.sed'. Did you mean 'seed'"),
    ({"[lattice]": "[latice]"}, "unknown key 'latice'. Did you mean 'lattice'"),
    ({"constant = 5.0": "constant = 0.005"}, "did you give um"),
    ({"constant = 5.0": "constant = -5.0"}, "positive length"),
    ({"constant = 5.0": "constant = \"five\""}, "lattice.constant"),
    ({'preset = "hgte-7.0nm"': 'preset = "hgte-7nm"'}, "Did you mean 'hgte-7.0nm'"),
    ({"realisations = 3": "realisations = 0"}, "run.realisations"),
    ({"width = 40.0": "width = 40000000.0"}, "over 1 mm"),
    ({'template = "strip"': 'template = "stripe"'}, "Did you mean 'strip'"),
    ({"parameters = { width = 40.0 }": "parameters = { widht = 40.0 }"}, "Did you mean 'width'"),
    ({"energy = [-3.0, 1.0, 5.0]": "energy = []"}, "empty"),
    ({"energy = [-3.0, 1.0, 5.0]": "energy = [3000.0]"}, "did you give eV"),
    ({"energy = [-3.0, 1.0, 5.0]": "energy = [1.0, 1.0]"}, "repeat"),
    ({"energy = [-3.0, 1.0, 5.0]": "energy = { start = 0, stop = 1 }"}, "exactly one of num or step"),
    ({'kind = "anderson"': 'kind = "andersen"'}, "disorder[0]"),
    ({"width = 30.0": "width = -1.0"}, "greater than or equal to 0"),
    ({'labels = ["G(L,R)", "R(L,R;L,R)"]': 'labels = ["R14"]'}, "cannot read measurement"),
    ({'labels = ["G(L,R)", "R(L,R;L,R)"]': "labels = []"}, "measure.labels"),
    ({"gate_voltage = 0.0": "gate_voltage = [0.0, 1.0]"}, "lever arm"),
    ({'parameter = "length"': 'parameter = "lenght"'}, "not a parameter of template"),
    ({"values = [60.0, 120.0]": "values = [-60.0, 120.0]"}, "must be positive"),
    ({"doping = 25.0": "doping = 25000.0"}, "outside [-2000, 2000] meV"),
    ({'preset = "hgte-7.0nm"': 'preset = "hgte-7.0nm"\nD = -900.0'}, "no bulk gap"),
    ({"[run]": "[run]\ncolour = 1"}, "unknown key 'run.colour'"),
    ({"seed = 42": "seed = 42\nseed = 43"}, "not valid TOML"),
]


@pytest.mark.parametrize("change, message", BAD, ids=[m for _, m in BAD])
def test_bad_config_is_refused_with_a_clear_message(tiny_config_text, change, message):
    text = tiny_config_text(**change)
    assert text != tiny_config_text(), "the replacement did not apply"
    with pytest.raises(HelisweepError) as err:
        parse_config(text)
    assert message in str(err.value)


def test_missing_file_and_geometry_file(tmp_path, tiny_config_text):
    with pytest.raises(ConfigError, match="does not exist"):
        load_config(tmp_path / "nope.toml")
    text = tiny_config_text(**{'template = "strip"\nparameters = { width = 40.0 }': 'file = "missing.geojson"',
                               'geometry = { parameter = "length", values = [60.0, 120.0] }\n': ""})
    with pytest.raises(ConfigError, match="relative to the config file"):
        parse_config(text, base_dir=tmp_path)
