"""L*: recovery of known decay lengths, direct crossing, bounds, normalisation, selection."""

import dataclasses
import json
import math

import numpy as np
import pytest
import xarray as xr

from pipeline.analysis.lstar import (
    LStarError,
    LStarResult,
    LStarTable,
    crossing_length,
    fit_coherent,
    fit_incoherent,
    load_lstar,
    longest_ballistic_length,
    lstar_results,
    normalised_transmission,
    save_lstar,
)
from pipeline.analysis.lstar_results import LSTAR_SCHEMA, concatenated_method, lstar_document

LENGTHS = np.linspace(100.0, 3000.0, 15)


def samples_dataset(values, lengths, label="G(L,R)", status=None, energies=None):
    """Synthetic samples with the store's layout: (realisation, geometry[, energy], measurement)."""
    values = np.asarray(values, dtype=float)
    dims = ("realisation", "geometry") + (("energy",) if energies is not None else ())
    coords = {
        "realisation": np.arange(values.shape[0]),
        "geometry": ("geometry", np.asarray(lengths, dtype=float), {"parameter": "length", "units": "nm"}),
        "measurement": [label],
    }
    if energies is not None:
        coords["energy"] = ("energy", list(energies), {"units": "meV"})
    data = {"measurements": (dims + ("measurement",), values[..., None])}
    if status is not None:
        data["status"] = (dims, np.asarray(status, dtype=np.int8))
    return xr.Dataset(data, coords=coords)


def incoherent_samples(rng, lam, lengths, n=200, concentration=50.0):
    """t ~ Beta with mean 1/(1 + L/lambda): bounded in (0, 1) like a transmission, and the
    ensemble mean is exactly the incoherent law."""
    m = 1.0 / (1.0 + lengths / lam)
    return rng.beta(concentration * m, concentration * (1 - m), size=(n, lengths.size))


def coherent_samples(rng, xi, lengths, n=200):
    """-ln t as a gamma process in L with mean L/xi and variance 2L/xi: independent segments
    add to -ln t, t <= 1, and for L >> xi it tends to the log-normal law of localisation,
    <ln T> = -L/xi, var ln T = 2L/xi (Source: Beenakker, Rev. Mod. Phys. 69, 731 (1997),
    from memory)."""
    return np.exp(-rng.gamma(lengths / (2 * xi), 2.0, size=(n, lengths.size)))


# --------------------------------------------------------------------------- fits
def test_incoherent_decay_length_is_recovered_and_preferred():
    rng = np.random.default_rng(101)
    t = incoherent_samples(rng, 2000.0, LENGTHS)
    res = longest_ballistic_length(samples_dataset(2.0 * t, LENGTHS), "G(L,R)", quantised=2.0, point={},
                                   bootstrap_resamples=200)
    f = res.incoherent
    assert f.ok and abs(f.value - 2000.0) < 2 * f.error  # Source: the value the samples were drawn with
    assert f.value_ci_low < 2000.0 < f.value_ci_high
    assert res.preferred == "incoherent" and res.coherent.p_value < 0.05 < f.p_value
    # Source: L*_fit from 1/(1 + L/lambda) = 1 - tol  =>  L = lambda tol / (1 - tol)
    assert f.lstar == pytest.approx(f.value * 0.05 / 0.95, rel=1e-12)


def test_coherent_localisation_length_is_recovered_and_preferred():
    rng = np.random.default_rng(102)
    t = coherent_samples(rng, 1500.0, LENGTHS, n=1000)
    res = longest_ballistic_length(samples_dataset(2.0 * t, LENGTHS), "G(L,R)", quantised=2.0, point={},
                                   bootstrap_resamples=200)
    f = res.coherent
    assert f.ok and abs(f.value - 1500.0) < 2 * f.error  # Source: the value the samples were drawn with
    assert f.value_ci_low < 1500.0 < f.value_ci_high
    assert res.preferred == "coherent" and res.incoherent.p_value < 0.05 < f.p_value
    # Source: L*_fit from exp(-L/xi) = 1 - tol  =>  L = -xi ln(1 - tol)
    assert f.lstar == pytest.approx(-f.value * math.log(0.95), rel=1e-12)


def test_coherent_fit_recovers_xi_from_the_log_normal_law_itself():
    rng = np.random.default_rng(103)
    xi = 1500.0
    # Source: ln T ~ Normal(-L/xi, sqrt(2L/xi)), Beenakker, Rev. Mod. Phys. 69, 731 (1997),
    # from memory (this law lets t exceed 1 at short L, so it is used for recovery only)
    lnt = rng.normal(-LENGTHS / xi, np.sqrt(2 * LENGTHS / xi), size=(200, LENGTHS.size))
    res = longest_ballistic_length(samples_dataset(2.0 * np.exp(lnt), LENGTHS), "G(L,R)",
                                   point={}, quantised=2.0, bootstrap_resamples=0)
    assert abs(res.coherent.value - xi) < 2 * res.coherent.error
    assert math.isnan(res.lstar_ci_low)  # no resamples, no interval


def test_fit_functions_on_nearly_exact_curves():
    rng = np.random.default_rng(109)
    L = np.array([100.0, 400.0, 900.0, 1600.0])
    noise = 1e-5 * rng.normal(size=(20, 4))
    # Source: the model formulas themselves, evaluated with numpy, plus tiny noise
    inc = fit_incoherent(L, 1 / (1 + L / 750.0) + noise, tolerance=0.1)
    coh = fit_coherent(L, -L / 420.0 + noise, tolerance=0.1)
    assert inc.value == pytest.approx(750.0, rel=1e-3) and coh.value == pytest.approx(420.0, rel=1e-3)
    assert coh.dof == 3 and coh.n_points == 4 and coh.realisations == 20
    assert inc.lstar == pytest.approx(inc.value * 0.1 / 0.9, rel=1e-12)
    assert coh.lstar == pytest.approx(-coh.value * math.log(0.9), rel=1e-12)
    few = fit_incoherent(L[:1], np.full((5, 1), 0.9) + noise[:5, :1])
    assert not few.ok and "need at least 2" in few.message


# --------------------------------------------------------------------------- direct L*
def test_crossing_is_the_linear_interpolation_of_the_first_exit():
    # a piecewise-linear curve: the interpolation is exact. Source: arithmetic
    c = crossing_length([0, 100, 200, 300], [1.0, 0.98, 0.90, 0.99], 0.05)
    assert c.kind == "interpolated" and c.length == pytest.approx(100 + 100 * 0.03 / 0.08)
    # unsorted input and a rise above 1 count the same
    c = crossing_length([200, 0, 100], [1.10, 1.0, 1.02], 0.05)
    assert c.length == pytest.approx(100 + 100 * 0.03 / 0.08)
    # dense sampling of 1/(1 + L/lambda) approaches lambda tol / (1 - tol)
    lam = 2000.0
    L = np.linspace(0, 400, 401)
    c = crossing_length(L, 1 / (1 + L / lam), 0.05)
    assert c.length == pytest.approx(lam * 0.05 / 0.95, abs=0.01)  # Source: solving 1/(1+L/lam) = 0.95


def test_direct_lstar_interval_contains_the_known_crossing():
    rng = np.random.default_rng(104)
    lam = 2000.0
    L = np.arange(20.0, 401.0, 20.0)
    t = incoherent_samples(rng, lam, L, n=200, concentration=200.0)
    res = longest_ballistic_length(samples_dataset(2.0 * t, L), "G(L,R)", quantised=2.0, point={},
                                   bootstrap_resamples=1000, seed=5)
    truth = lam * 0.05 / 0.95  # Source: solving 1/(1 + L/lambda) = 1 - 0.05
    assert res.lstar_kind == "interpolated"
    assert res.lstar_ci_low <= truth <= res.lstar_ci_high
    assert res.lstar_ci_low < res.lstar < res.lstar_ci_high
    again = longest_ballistic_length(samples_dataset(2.0 * t, L), "G(L,R)", quantised=2.0, point={},
                                     bootstrap_resamples=1000, seed=5)
    assert again.lstar_ci_low == res.lstar_ci_low  # seeded


def test_never_crossing_and_already_failing_are_flagged_as_bounds():
    L = np.array([100.0, 200.0, 400.0])
    c = crossing_length(L, [1.0, 0.99, 0.97], 0.05)
    assert (c.kind, c.length) == ("lower_bound", 400.0)
    c = crossing_length(L, [0.9, 0.8, 0.7], 0.05)
    assert (c.kind, c.length) == ("upper_bound", 100.0)
    rng = np.random.default_rng(105)
    ideal = 2.0 * (1 - 0.001 * rng.random((20, 3)))
    res = longest_ballistic_length(samples_dataset(ideal, L), "G(L,R)", quantised=2.0, point={},
                                   bootstrap_resamples=200)
    assert res.lstar_kind == "lower_bound" and res.lstar == 400.0
    assert "L* >= 400" in res.text() and "lower_bound" in res.flags
    assert res.to_dict()["flags"][0] == "lower_bound"
    broken = 2.0 * (0.5 + 0.01 * rng.random((20, 3)))
    res = longest_ballistic_length(samples_dataset(broken, L), "G(L,R)", quantised=2.0, point={},
                                   bootstrap_resamples=200)
    assert res.lstar_kind == "upper_bound" and res.lstar == 100.0
    assert "L* <= 100" in res.text() and "upper_bound" in res.flags


# --------------------------------------------------------------------------- normalisation
def test_resistance_normalisation_inverts():
    # Source: t = q / R for a resistance, t = G / q for a conductance (arithmetic)
    np.testing.assert_allclose(normalised_transmission([1.0, 0.5], 0.25, "R"), [0.25, 0.5])
    np.testing.assert_allclose(normalised_transmission([1.0, 2.0], 2.0, "G"), [0.5, 1.0])
    with pytest.raises(LStarError, match="'X'"):
        normalised_transmission([1.0], 2.0, "X")
    with pytest.raises(LStarError, match="nan"):
        normalised_transmission([1.0], float("nan"), "G")
    rng = np.random.default_rng(106)
    t = incoherent_samples(rng, 2000.0, LENGTHS, n=50)
    g = longest_ballistic_length(samples_dataset(2.0 * t, LENGTHS), "G(L,R)", quantised=2.0, point={},
                                 bootstrap_resamples=200)
    r = longest_ballistic_length(samples_dataset(0.25 / t, LENGTHS, label="R14,23"), "R14,23",
                                 point={}, quantised=0.25, bootstrap_resamples=200)
    assert r.kind == "R" and "t = quantised / R" in " ".join(r.notes)
    np.testing.assert_allclose(r.t_mean, g.t_mean, rtol=1e-12)
    assert r.lstar == pytest.approx(g.lstar, rel=1e-12)
    assert r.incoherent.value == pytest.approx(g.incoherent.value, rel=1e-9)


# --------------------------------------------------------------------------- selection, output
def test_points_table_status_and_json():
    rng = np.random.default_rng(107)
    L = np.array([100.0, 300.0, 600.0, 1000.0])
    t = np.stack([incoherent_samples(rng, lam, L, n=40) for lam in (500.0, 5000.0)], axis=-1)
    status = np.ones(t.shape, dtype=np.int8)
    values = 2.0 * t
    status[:5, 0, 0] = 2
    values[:5, 0, 0] = 1e6  # failed samples must not count
    ds = samples_dataset(values, L, status=status, energies=[-1.0, 1.0])
    table = longest_ballistic_length(ds, "G(L,R)", quantised=2.0, bootstrap_resamples=200)
    assert isinstance(table, LStarTable) and len(table.results) == 2
    assert table.results[0].n == (35, 40, 40, 40)
    by_value = longest_ballistic_length(ds, "G(L,R)", point={"energy": 1.0}, quantised=2.0,
                                        bootstrap_resamples=200)
    by_index = longest_ballistic_length(ds, "G(L,R)", point_index={"energy": 1}, quantised=2.0,
                                        bootstrap_resamples=200)
    assert isinstance(by_value, LStarResult) and by_value == by_index == table.results[1]
    assert by_value.point == (("energy", 1.0),)
    assert table.results[0].incoherent.value < by_value.incoherent.value
    text = json.dumps(lstar_document(table), allow_nan=False)  # JSON-safe (NaN -> null)
    doc = json.loads(text)
    row = doc["results"][1]
    assert row["point"] == {"energy": 1.0} and row["incoherent"]["value"] == by_value.incoherent.value
    assert [row["lstar_ci_low"], row["lstar_ci_high"]] == [by_value.lstar_ci_low, by_value.lstar_ci_high]
    assert row["method"] == "length sweep" and doc["schema"] == LSTAR_SCHEMA
    assert "model estimate" in doc["note"] and "model estimate" in by_value.text()
    assert list(table.to_dataframe()["energy"]) == [-1.0, 1.0]
    with pytest.raises(LStarError, match=r"'energy' has 2 values"):
        longest_ballistic_length(ds, "G(L,R)", point={}, quantised=2.0)
    with pytest.raises(LStarError, match=r"0.5 is not a swept value"):
        longest_ballistic_length(ds, "G(L,R)", point={"energy": 0.5}, quantised=2.0)


def test_results_round_trip_exactly_through_plain_data_and_the_lstar_file(tmp_path):
    rng = np.random.default_rng(108)
    L = np.array([100.0, 300.0, 600.0, 1000.0])
    t = np.stack([incoherent_samples(rng, lam, L, n=40) for lam in (500.0, 5000.0)], axis=-1)
    ds = samples_dataset(2.0 * t, L, energies=[-1.0, 1.0])
    table = longest_ballistic_length(ds, "G(L,R)", quantised=2.0, bootstrap_resamples=200)
    for r in table.results:
        d = r.to_dict()
        assert LStarResult.from_dict(d) == r  # every field, exactly
        assert LStarResult.from_dict(json.loads(json.dumps(d, allow_nan=False))) == r
        assert LStarResult.from_dict(d).to_dict() == d
    assert LStarTable.from_dict(table.to_dict()) == table
    # no bootstrap: the interval is NaN, written as null and read back as NaN
    bare = longest_ballistic_length(ds, "G(L,R)", point={"energy": 1.0}, quantised=2.0,
                                    bootstrap_resamples=0)
    d = bare.to_dict()
    assert d["lstar_ci_low"] is None and math.isnan(LStarResult.from_dict(d).lstar_ci_low)
    assert LStarResult.from_dict(d).to_dict() == d
    # one file format for length sweeps and concatenated edges, one reader
    concatenated = dataclasses.replace(bare, method=concatenated_method("coherent"),
                                       notes=bare.notes + ("sequences share segments",))
    path = save_lstar(tmp_path / "lstar.json", [table, concatenated])
    doc = json.loads(path.read_text())
    assert doc["schema"] == LSTAR_SCHEMA and "model estimate" in doc["note"]
    loaded = load_lstar(path)
    assert loaded[:2] == list(table.results)
    assert loaded[2].method == "concatenated, coherent" and loaded[2].to_dict() == concatenated.to_dict()
    assert [r.to_dict() for r in lstar_results(doc)] == [r.to_dict() for r in loaded]
    assert lstar_results({"G(L,R)": table.to_dict()}) == list(table.results)
    with pytest.raises(LStarError, match=r"lacks \['kind'"):
        LStarResult.from_dict({"measurement": "G(L,R)", "lstar": 1.0, "lengths": [1.0]})
    with pytest.raises(LStarError, match="'G14'"):
        concatenated_method("G14")
    path.write_text("[]")
    with pytest.raises(LStarError, match="not an L\\* document"):
        load_lstar(path)


def test_refuses_non_length_sweeps_and_unknown_measurements():
    ds = samples_dataset(np.ones((3, 2)), [40.0, 80.0])
    with pytest.raises(LStarError, match="'G14'"):
        longest_ballistic_length(ds, "G14", quantised=2.0)
    ds["geometry"].attrs["parameter"] = "width"
    with pytest.raises(LStarError, match="varies 'width', not a length"):
        longest_ballistic_length(ds, "G(L,R)", quantised=2.0)
    with pytest.raises(LStarError, match="quantised"):
        longest_ballistic_length(samples_dataset(np.ones((3, 2)), [40.0, 80.0]), "G(L,R)")
    with pytest.raises(LStarError, match="tolerance = 2"):
        longest_ballistic_length(samples_dataset(np.ones((3, 2)), [40.0, 80.0]), "G(L,R)",
                                 tolerance=2, quantised=2.0)


@pytest.fixture(scope="module")
def real_store(tmp_path_factory, dask_clients):
    from conftest import TINY_CONFIG

    from pipeline.sweep.config import parse_config
    from pipeline.sweep.driver import run_sweep

    root = tmp_path_factory.mktemp("lstar")
    cfg = parse_config(TINY_CONFIG.format(realisations=3, directory=str(root / "run")))
    return run_sweep(cfg, client=dask_clients[2], store_path=root / "s.zarr", progress=False).path


def test_runs_on_a_real_store_with_the_ideal_value_from_its_config(real_store):
    table = longest_ballistic_length(real_store, "G(L,R)", bootstrap_resamples=200)
    assert len(table.results) == 3  # one per energy
    raw = xr.open_zarr(str(real_store), consolidated=False)
    g = raw["measurements"].sel(measurement="G(L,R)").values[:, :, 0, 0, 0, 1]
    first = table.results[1]
    # Source: G = 2 e^2/h for two ideal helical edges (Roth et al., Science 325, 294 (2009))
    assert first.quantised == 2.0
    np.testing.assert_allclose(first.t_mean, g.mean(axis=0) / 2.0, rtol=1e-12)  # Source: numpy
    assert first.lengths == (60.0, 120.0) and first.length_parameter == "length"
