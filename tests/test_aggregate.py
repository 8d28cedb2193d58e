"""Aggregation: statistics, bootstrap, units, partial runs, NetCDF and thermal smearing."""

import json
import warnings

import numpy as np
import pytest
import scipy.constants as sc
import scipy.stats
import xarray as xr
from scipy.special import expit

from pipeline.analysis.statistics import (
    bootstrap_mean_ci,
    sample_statistics,
    smear_transmission,
    thermal_weights,
)
from pipeline.analysis.summary import AggregateError, save_summary, summarize
from pipeline.constants import K_B_MEV_PER_K

LABELS = ["G(L,R)", "R(L,R;L,R)"]


def synthetic_store(rng, *, realisations=30, energies=(-1.0, 0.0, 1.0), gates=(0.0, 0.5),
                    transmission=None):
    """A Dataset with the sample store's layout: a two-contact strip, lengths 100 and 200 nm.

    Transmissions T_RL = T_LR = t per sample (t from ``transmission(shape)`` or uniform in
    (0.2, 1)); the measurements follow as G = t e^2/h and R = 1/t h/e^2.
    """
    shape = (realisations, 2, 1, 1, len(gates), len(energies))
    t = transmission(shape) if transmission is not None else rng.uniform(0.2, 1.0, size=shape)
    T = np.zeros(shape + (2, 2))
    T[..., 0, 1] = t
    T[..., 1, 0] = t
    meas = np.stack([t, 1.0 / t], axis=-1)
    dims = ("realisation", "geometry", "disorder_strength", "b_perp", "gate_voltage", "energy")
    ds = xr.Dataset(
        {
            "transmission": (dims + ("lead_to", "lead_from"), T),
            "measurements": (dims + ("measurement",), meas),
            "status": (dims, np.ones(shape, dtype=np.int8)),
        },
        coords={
            "realisation": np.arange(realisations),
            "geometry": ("geometry", [100.0, 200.0], {"units": "nm", "parameter": "length"}),
            "disorder_strength": ("disorder_strength", [1.0], {"units": "1"}),
            "b_perp": ("b_perp", [0.0], {"units": "T"}),
            "gate_voltage": ("gate_voltage", list(gates), {"units": "V"}),
            "energy": ("energy", list(energies), {"units": "meV", "long_name": "Fermi energy"}),
            "lead_to": ["L", "R"],
            "lead_from": ["L", "R"],
            "measurement": LABELS,
        },
        attrs={"run_name": "synthetic", "config_hash": "abc", "root_seed": 7,
               "sessions": [{"started": "now", "workers": 1}]},
    )
    return ds


QUANTISED = {"G(L,R)": 2.0, "R(L,R;L,R)": 0.5}


def quiet_summary(ds, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        return summarize(ds, quantised=QUANTISED, **kw)


# --------------------------------------------------------------------------- statistics
def test_statistics_match_numpy_on_the_same_samples():
    rng = np.random.default_rng(11)
    ds = synthetic_store(rng)
    out = quiet_summary(ds, bootstrap_resamples=200)
    x = ds["measurements"].values  # (R, G, S, B, V, E, M)
    flat = np.moveaxis(x, 0, -1).reshape(-1, x.shape[0])
    for name, ref in {
        # Source: numpy (np.mean, np.std ddof=1, np.median, np.quantile default 'linear')
        "mean": flat.mean(axis=1),
        "std": flat.std(axis=1, ddof=1),
        "sem": flat.std(axis=1, ddof=1) / np.sqrt(flat.shape[1]),
        "median": np.median(flat, axis=1),
        "q16": np.quantile(flat, 0.16, axis=1),
        "q84": np.quantile(flat, 0.84, axis=1),
    }.items():
        np.testing.assert_allclose(out[name].values.ravel(), ref, rtol=1e-12, err_msg=name)
    assert out["n_samples"].values.min() == out["n_samples"].values.max() == 30
    assert out["mean"].dims == ("geometry", "disorder_strength", "b_perp", "gate_voltage",
                                "energy", "measurement")


def test_sample_statistics_with_uneven_counts_match_numpy_per_row():
    rng = np.random.default_rng(12)
    x = rng.normal(size=(7, 25))
    valid = rng.random((7, 25)) < 0.7
    valid[0] = False  # no samples
    valid[1, 1:] = False  # one sample
    st = sample_statistics(x, valid, resamples=0)
    for i in range(7):
        v = x[i, valid[i]]
        assert st["n"][i] == v.size
        if v.size == 0:
            assert np.isnan(st["mean"][i]) and np.isnan(st["median"][i])
            continue
        # Source: numpy on the valid entries of the row
        assert st["mean"][i] == pytest.approx(v.mean(), rel=1e-12)
        assert st["median"][i] == pytest.approx(np.median(v), rel=1e-12)
        assert st["q16"][i] == pytest.approx(np.quantile(v, 0.16), rel=1e-12)
        assert st["q84"][i] == pytest.approx(np.quantile(v, 0.84), rel=1e-12)
        if v.size >= 2:
            assert st["std"][i] == pytest.approx(v.std(ddof=1), rel=1e-12)
        else:
            assert np.isnan(st["std"][i]) and np.isnan(st["sem"][i])


def test_bootstrap_interval_agrees_with_scipy_percentile_bootstrap():
    rng = np.random.default_rng(13)
    for x in (rng.exponential(size=40), rng.normal(2.0, 0.3, size=15), rng.lognormal(0, 1, 120)):
        low, high = bootstrap_mean_ci(x, resamples=5000, seed=0)
        ref = scipy.stats.bootstrap((x,), np.mean, n_resamples=5000, method="percentile",
                                    confidence_level=0.95, random_state=np.random.default_rng(0))
        width = ref.confidence_interval.high - ref.confidence_interval.low
        # Source: scipy.stats.bootstrap(method="percentile"); both are Monte-Carlo estimates,
        # each end scatters by ~1 % of the width with 5000 resamples, so 5 % is ~4 sigma
        # (common practice, no source)
        assert abs(low - ref.confidence_interval.low) < 0.05 * width
        assert abs(high - ref.confidence_interval.high) < 0.05 * width


def studentized_reference(x, resamples, rng, confidence=0.95):
    """The studentized (bootstrap-t) interval of the mean written out loop by loop.

    Source: Efron & Tibshirani, An Introduction to the Bootstrap (1993), ch. 12.5
    (bootstrap-t with se = s / sqrt(n) on each resample); tail levels widened as
    Phi(-sqrt(n/(n-1)) t_(n-1, 1-alpha/2)), Hesterberg, Am. Stat. 69, 371 (2015).
    """
    n = x.size
    m, se = x.mean(), x.std(ddof=1) / np.sqrt(n)
    ts = []
    for _ in range(resamples):
        xb = x[rng.integers(0, n, n)]
        ts.append((xb.mean() - m) / (xb.std(ddof=1) / np.sqrt(n)))
    tail = scipy.stats.norm.cdf(-np.sqrt(n / (n - 1)) * scipy.stats.t.ppf(0.5 + confidence / 2,
                                                                          n - 1))
    q_lo, q_hi = np.quantile(ts, [tail, 1 - tail])
    return m - q_hi * se, m - q_lo * se


def test_bootstrap_in_summary_uses_only_valid_samples_and_is_seeded():
    rng = np.random.default_rng(14)
    ds = synthetic_store(rng, realisations=40)
    status = ds["status"].values
    status[:12, 0, 0, 0, 1, 2] = 0  # point with 28 samples
    out = quiet_summary(ds, bootstrap_resamples=5000, bootstrap_seed=3)
    x = ds["measurements"].values[12:, 0, 0, 0, 1, 2, 1]
    low, high = studentized_reference(x, 5000, np.random.default_rng(1))
    width = high - low
    point = dict(geometry=0, disorder_strength=0, b_perp=0, gate_voltage=1, energy=2, measurement=1)
    # Source: the textbook bootstrap-t above; both are Monte-Carlo estimates whose ends
    # scatter by ~1-2 % of the width with 5000 resamples: 6 % is ~4 sigma (common practice,
    # no source)
    assert abs(float(out["ci95_low"][point]) - low) < 0.06 * width
    assert abs(float(out["ci95_high"][point]) - high) < 0.06 * width
    assert int(out["ci_flag"][point]) == 0
    again = quiet_summary(ds, bootstrap_resamples=5000, bootstrap_seed=3)
    other = quiet_summary(ds, bootstrap_resamples=5000, bootstrap_seed=4)
    np.testing.assert_array_equal(again["ci95_low"].values, out["ci95_low"].values)
    assert not np.array_equal(other["ci95_low"].values, out["ci95_low"].values)
    # a point's interval does not depend on which other points are summarised (up to rounding)
    alone = bootstrap_mean_ci(np.moveaxis(ds["measurements"].values, 0, -1)[0, 0, 0, 1, 2, 1],
                              status[:, 0, 0, 0, 1, 2] == 1, resamples=5000, seed=3,
                              method="studentized")
    assert float(alone[0]) == pytest.approx(float(out["ci95_low"][point]), rel=1e-12)
    assert float(alone[1]) == pytest.approx(float(out["ci95_high"][point]), rel=1e-12)


def test_typical_value_is_the_log_average_and_nan_with_nonpositive_samples():
    rng = np.random.default_rng(15)
    ds = synthetic_store(rng)
    x = ds["measurements"].values
    x[3, 1, 0, 0, 0, 0, 0] = -0.1  # one non-positive sample at this point
    out = quiet_summary(ds, bootstrap_resamples=0)
    g = x[:, 0, 0, 0, 1, 1, 0]
    # Source: numpy, exp(mean(log x))
    assert float(out["typical"][0, 0, 0, 1, 1, 0]) == pytest.approx(np.exp(np.mean(np.log(g))), rel=1e-12)
    assert np.isnan(float(out["typical"][1, 0, 0, 0, 0, 0]))
    assert np.all(np.isnan(out["ci95_low"].values))  # resamples=0 skips the intervals


def test_ohm_variables_use_the_von_klitzing_constant_and_are_nan_for_conductances():
    rng = np.random.default_rng(16)
    out = quiet_summary(synthetic_store(rng), bootstrap_resamples=200)
    rk = sc.h / sc.e**2  # Source: scipy.constants (SI 2019 exact h and e), R_K = 25812.807... ohm
    assert rk == pytest.approx(25812.807, abs=1e-3)  # Source: CODATA 2018, from memory
    for var, src in (("mean_ohm", "mean"), ("median_ohm", "median"), ("sem_ohm", "sem"),
                     ("ci95_low_ohm", "ci95_low"), ("ci95_high_ohm", "ci95_high")):
        r = out[var].sel(measurement="R(L,R;L,R)").values
        np.testing.assert_allclose(r, out[src].sel(measurement="R(L,R;L,R)").values * rk, rtol=1e-12)
        assert np.all(np.isnan(out[var].sel(measurement="G(L,R)").values))
        assert out[var].attrs["units"] == "ohm"


def test_partial_run_counts_and_excludes_missing_and_failed_samples():
    rng = np.random.default_rng(17)
    ds = synthetic_store(rng, realisations=10)
    st = ds["status"].values
    x = ds["measurements"].values
    st[0:3, 0, 0, 0, 0, 1] = 0  # missing
    st[5, 0, 0, 0, 0, 1] = 2  # failed
    x[0:3, 0, 0, 0, 0, 1] = 1e6  # whatever is stored there must not count
    x[5, 0, 0, 0, 0, 1] = 1e6
    x[7, 0, 0, 0, 0, 1, 0] = np.nan  # done but ill-posed
    with pytest.warns(UserWarning, match=r"3 of 120 samples are missing and 1 failed"):
        out = summarize(ds, quantised=QUANTISED, bootstrap_resamples=200)
    n = out["n_samples"].values
    assert n[0, 0, 0, 0, 1, 0] == 5 and n[0, 0, 0, 0, 1, 1] == 6
    assert n.sum() == (120 - 4) * 2 - 1
    g = x[[3, 4, 6, 8, 9], 0, 0, 0, 0, 1, 0]  # done and finite (7 is NaN for G only)
    r = x[[3, 4, 6, 7, 8, 9], 0, 0, 0, 0, 1, 1]
    # Source: numpy on the done, finite samples
    assert float(out["mean"][0, 0, 0, 0, 1, 0]) == pytest.approx(np.mean(g), rel=1e-12)
    assert float(out["std"][0, 0, 0, 0, 1, 1]) == pytest.approx(np.std(r, ddof=1), rel=1e-12)
    assert out.attrs["n_samples_missing"] == 3 and out.attrs["n_samples_failed"] == 1
    assert out.attrs["n_samples_done"] == 116 and out.attrs["complete"] == 0
    assert out.attrs["n_realisations_requested"] == 10
    assert float(out["transmission_mean"][0, 0, 0, 0, 1, 1, 0]) == pytest.approx(
        np.mean(ds["transmission"].values[[3, 4, 6, 7, 8, 9], 0, 0, 0, 0, 1, 1, 0]), rel=1e-12)


def test_coords_units_and_attrs():
    rng = np.random.default_rng(18)
    out = quiet_summary(synthetic_store(rng), bootstrap_resamples=200)
    assert list(out["unit"].values) == ["e^2/h", "h/e^2"]
    assert list(out["quantised"].values) == [2.0, 0.5]
    assert out["energy"].attrs["units"] == "meV" and out["geometry"].attrs["parameter"] == "length"
    assert out.attrs["Conventions"] == "CF-1.10"
    assert "model estimate" in out.attrs["note"].lower()
    assert out.attrs["complete"] == 1 and out.attrs["root_seed"] == 7
    assert json.loads(out.attrs["store_sessions"]) == [{"started": "now", "workers": 1}]
    for name, var in out.data_vars.items():
        assert "long_name" in var.attrs, name
        # CF flag variables carry flag_values/flag_meanings instead of units
        assert ("units" in var.attrs or "flag_values" in var.attrs
                or "see the 'unit' coordinate" in var.attrs.get("comment", "")), name


def test_bad_arguments_are_refused_with_the_value():
    ds = synthetic_store(np.random.default_rng(0))
    with pytest.raises(AggregateError, match=r"bootstrap_resamples = 5 "):
        summarize(ds, bootstrap_resamples=5)
    with pytest.raises(AggregateError, match=r"confidence = 1.5"):
        summarize(ds, confidence=1.5)
    with pytest.raises(AggregateError, match=r"\[-1.0\]"):
        summarize(ds, temperatures=[-1.0])
    with pytest.raises(AggregateError, match="no sample store"):
        summarize("/nonexistent/samples.zarr")


# --------------------------------------------------------------------------- NetCDF
def test_netcdf_round_trip_keeps_values_and_attrs(tmp_path):
    rng = np.random.default_rng(19)
    energies = np.round(np.arange(-2.0, 2.0001, 0.02), 10)
    ds = synthetic_store(rng, realisations=6, energies=energies, gates=(0.0,))
    out = quiet_summary(ds, bootstrap_resamples=200, temperatures=[1.0, 5.0])
    out.attrs["extra_nested"] = {"a": [1, {"b": 2}]}
    out.attrs["flag"] = True
    path = save_summary(out, tmp_path / "sub" / "summary.nc")
    back = xr.open_dataset(path, engine="h5netcdf").load()
    assert json.loads(back.attrs["extra_nested"]) == {"a": [1, {"b": 2}]}
    assert back.attrs["flag"] == 1
    del out.attrs["extra_nested"], out.attrs["flag"]
    del back.attrs["extra_nested"], back.attrs["flag"]
    xr.testing.assert_identical(back, out)
    assert json.loads(back.attrs["temperatures_K"]) == [1.0, 5.0]


# --------------------------------------------------------------------------- thermal smearing
def test_thermal_weights_rows_sum_to_one_in_any_energy_order():
    e = np.array([0.3, -0.2, 0.1, 0.0, -0.1, 0.2])
    w, cov = thermal_weights(e, 2.0)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, rtol=1e-12)
    order = np.argsort(e)
    ws, covs = thermal_weights(e[order], 2.0)
    np.testing.assert_allclose(w[np.ix_(order, order)], ws, rtol=1e-12)
    kt = K_B_MEV_PER_K * 2.0
    # Source: integral of -df/dE over [Emin, Emax] = f(Emin - mu) - f(Emax - mu), f = expit(-x/kT)
    np.testing.assert_allclose(cov, expit((e + 0.2) / kt) - expit((e - 0.3) / kt), rtol=1e-12)
    np.testing.assert_array_equal(thermal_weights(e, 0.0)[0], np.eye(6))


def test_linear_transmission_is_unchanged_in_the_interior():
    temp = 4.0
    kt = K_B_MEV_PER_K * temp
    e = np.arange(-300, 301) * (kt / 5)
    lin = 0.3 + 0.02 * e
    smeared = smear_transmission(lin, e, temp, axis=-1)
    _, cov = thermal_weights(e, temp)
    inner = cov > 1 - 1e-9
    assert inner.sum() > 100
    # Source: -df/dE is even about mu, so it maps a linear function onto itself (from memory)
    np.testing.assert_allclose(smeared[inner], lin[inner], atol=1e-8)


def test_smeared_step_is_the_fermi_function():
    temp = 4.0
    kt = K_B_MEV_PER_K * temp
    e = np.arange(-400, 401) * (kt / 10)
    e0 = e[400] + kt / 20  # step half-way between grid points
    step = (e > e0).astype(float)
    smeared = smear_transmission(np.stack([step, 2 * step]), e, temp, axis=-1)
    _, cov = thermal_weights(e, temp)
    inner = cov > 1 - 1e-9
    # Source: integral_{E0}^inf (-df/dE)(E - mu) dE = f(E0 - mu) = expit((mu - E0)/kT)
    # (scipy.special.expit); trapezoid error ~ (dE/kT)^2 / 24 with dE = kT/10 (from memory)
    np.testing.assert_allclose(smeared[0, inner], expit((e[inner] - e0) / kt), atol=1e-3)
    np.testing.assert_allclose(smeared[1, inner], 2 * expit((e[inner] - e0) / kt), atol=2e-3)


def test_summary_recomputes_measurements_from_smeared_transmissions():
    rng = np.random.default_rng(20)
    temp = 3.0
    kt = K_B_MEV_PER_K * temp
    energies = np.round(np.arange(-60, 61) * kt / 4, 12)
    slope = rng.uniform(0.0, 0.002, size=(8, 2, 1, 1, 1, 1))

    def linear(shape):
        return 0.5 + slope * energies  # linear in E per sample
    ds = synthetic_store(rng, realisations=8, energies=energies, gates=(0.0,), transmission=linear)
    with pytest.warns(UserWarning, match="outside the energy grid"):
        out = summarize(ds, quantised=QUANTISED, temperatures=[temp], bootstrap_resamples=200)
    cov = out["thermal_kernel_coverage"].values[0]
    inner = cov > 1 - 1e-9
    g = out["thermal_mean"].sel(measurement="G(L,R)", temperature=temp).values[..., inner]
    g0 = out["mean"].sel(measurement="G(L,R)").values[..., inner]
    # Source: a symmetric kernel leaves linear T unchanged; G = T_RL for two contacts
    # (Landauer formula, from memory)
    np.testing.assert_allclose(g, g0, atol=1e-8)
    # R = 1/T is computed after smearing T, not by smearing R
    t = ds["transmission"].values[..., 1, 0]
    ts = smear_transmission(t, energies, temp, axis=-1)
    r_ref = np.mean(1.0 / ts, axis=0)  # Source: numpy on the independently smeared matrices
    np.testing.assert_allclose(out["thermal_mean"].sel(measurement="R(L,R;L,R)", temperature=temp).values,
                               r_ref, rtol=1e-10)
    assert np.all(out["thermal_n_samples"].values == 8)


def test_coarse_grid_skips_the_temperature_with_a_warning():
    rng = np.random.default_rng(21)
    ds = synthetic_store(rng, energies=(-0.5, 0.0, 0.5), gates=(0.0,))
    with pytest.warns(UserWarning, match=r"energy step 0.5 meV vs k_B T = 0.0862 meV at 1 K"):
        out = summarize(ds, quantised=QUANTISED, temperatures=[1.0], bootstrap_resamples=200)
    assert np.all(np.isnan(out["thermal_mean"].values))
    assert json.loads(out.attrs["temperatures_skipped_K"]) == [1.0]
    single = synthetic_store(rng, energies=(0.0,), gates=(0.0,))
    with pytest.warns(UserWarning, match=r"energy axis has 1 point"):
        out = summarize(single, quantised=QUANTISED, temperatures=[300.0], bootstrap_resamples=200)
    assert np.all(np.isnan(out["thermal_mean"].values))


# --------------------------------------------------------------------------- a real store
@pytest.fixture(scope="module")
def partial_store(tmp_path_factory, dask_clients):
    from conftest import TINY_CONFIG

    from pipeline.sweep.config import parse_config
    from pipeline.sweep.driver import run_sweep

    root = tmp_path_factory.mktemp("agg")
    cfg = parse_config(TINY_CONFIG.format(realisations=3, directory=str(root / "run")))
    store = run_sweep(cfg, client=dask_clients[2], store_path=root / "s.zarr", progress=False,
                      max_tasks=5)
    return store.path


def test_summary_of_a_partly_finished_real_run(partial_store, tmp_path):
    with pytest.warns(UserWarning, match=r"3 of 18 samples are missing"):
        out = summarize(partial_store, temperatures=[0.0])
    raw = xr.open_zarr(str(partial_store), consolidated=False)
    x = raw["measurements"].values
    done = (raw["status"].values == 1)[..., None] & np.isfinite(x)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = np.nanmean(np.where(done, x, np.nan), axis=0)  # Source: numpy
    np.testing.assert_allclose(out["mean"].values, ref, rtol=1e-12, equal_nan=True)
    np.testing.assert_array_equal(out["n_samples"].values, done.sum(axis=0))
    # Source: ideal helical edges give G = 2 e^2/h for a two-terminal strip (one channel per
    # edge, Roth et al., Science 325, 294 (2009)), so R = h/2e^2 (from memory)
    assert out["quantised"].sel(measurement="G(L,R)") == 2.0
    assert out["quantised"].sel(measurement="R(L,R;L,R)") == pytest.approx(0.5)
    # zero temperature recomputes every measurement from the unsmeared matrices: same numbers
    np.testing.assert_allclose(out["thermal_mean"].values[0], out["mean"].values, rtol=1e-9,
                               equal_nan=True)
    assert out.attrs["run_name"] == "tiny" and out.attrs["n_samples_missing"] == 3
    path = save_summary(out, tmp_path / "summary.nc")
    xr.testing.assert_identical(xr.open_dataset(path, engine="h5netcdf").load(), out)
