"""Figures: every file written, reference lines from the summary, current-map physics."""

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

# the shared tiny configuration (tests/conftest.py) under another name and seed
from conftest import TINY_CONFIG  # noqa: E402  (tests/ is on sys.path)

from pipeline.analysis.lstar_results import LStarResult
from pipeline.errors import HelisweepError
from pipeline.output.figures import (
    RunData,
    figure_distribution,
    figure_vs_axis,
    figure_vs_length,
    load_run,
    make_figures,
    measurement_slug,
)
from pipeline.sweep.config import parse_config
from pipeline.sweep.driver import run_sweep
from pipeline.sweep.probe import current_map
from pipeline.sweep.runmodel import quantised_values

RUN_CONFIG = (TINY_CONFIG.replace('name = "tiny"', 'name = "figs"').replace("seed = 42", "seed = 7")
              .replace("{realisations}", "3"))

# A clean, wide strip: 400 nm is well over four edge-decay lengths (2 x 53 nm per edge).
CLEAN_STRIP = """
[run]
name = "clean"
seed = 1
realisations = 1

[device]
template = "strip"
parameters = {{ width = 400.0, length = 150.0 }}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"

[contacts]
doping = {doping}

[sweep]
energy = {energy}

[measure]
labels = ["G(L,R)"]
"""


def summary_from_store(store_path, cfg):
    """The run's summary: pipeline.analysis.summary when it exists, else plain statistics here."""
    try:
        from pipeline.analysis.summary import summarize
    except ImportError:
        summarize = None
    if summarize is not None:
        return summarize(store_path, bootstrap_resamples=400)
    from pipeline.transport.landauer import parse_measurement

    s = xr.open_zarr(str(store_path), consolidated=False)
    m = s.measurements.where(s.status == 1)
    n = m.count("realisation")
    mean, std = m.mean("realisation"), m.std("realisation", ddof=1)
    sem = std / np.sqrt(n)
    q = quantised_values(cfg)
    labels = [str(x) for x in s.measurement.values]
    ds = xr.Dataset({"mean": mean, "std": std, "sem": sem, "median": m.median("realisation"),
                     "ci95_low": mean - 1.96 * sem, "ci95_high": mean + 1.96 * sem,
                     "n_samples": n.astype(float)})
    ds = ds.assign_coords(unit=("measurement", [parse_measurement(x).unit for x in labels]),
                          quantised=("measurement", [q[x] for x in labels]))
    ds["geometry"].attrs.update(s.geometry.attrs)
    ds.attrs.update(run_name=s.attrs["run_name"], config_hash=s.attrs["config_hash"])
    return ds.compute()


@pytest.fixture(scope="module")
def real_run(tmp_path_factory, dask_clients):
    tmp = tmp_path_factory.mktemp("figrun")
    cfg = parse_config(RUN_CONFIG.format(directory=str(tmp / "run")))
    store = run_sweep(cfg, client=dask_clients[2], store_path=tmp / "run" / "samples.zarr",
                      progress=False)
    summary = summary_from_store(store.path, cfg)
    return load_run(tmp / "run", summary)


@pytest.fixture(scope="module")
def figure_files(real_run, tmp_path_factory):
    out = tmp_path_factory.mktemp("figs")
    return out, make_figures(real_run, out)


def _read_csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    return rows[0], rows[1:]


def test_every_figure_is_written_as_pdf_png_and_csv(figure_files, real_run):
    out, files = figure_files
    names = {f.name for f in files}
    assert all(f.parent == out for f in files)
    expected = ["fig-device", "fig-current"]
    for label in ("G(L,R)", "R(L,R;L,R)"):
        slug = measurement_slug(label)
        expected += [f"fig-vs-energy-{slug}", f"fig-vs-length-{slug}",
                     f"fig-distribution-{slug}"]
    for stem in expected:
        for ext in (".pdf", ".png", ".csv"):
            assert stem + ext in names, stem + ext
        pdf, png = out / f"{stem}.pdf", out / f"{stem}.png"
        assert pdf.stat().st_size > 1024 and pdf.read_bytes()[:5] == b"%PDF-"
        assert png.stat().st_size > 1024 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        header, rows = _read_csv(out / f"{stem}.csv")
        assert header and rows, stem
        assert all(len(r) == len(header) for r in rows), stem
    assert "fig-current.json" in names
    # no gate, field or strength axis is swept, so no figures against them
    assert not any(n.startswith(("fig-vs-gate", "fig-vs-field", "fig-vs-strength")) for n in names)


def test_csv_holds_the_plotted_summary_values(figure_files, real_run):
    out, _ = figure_files
    header, rows = _read_csv(out / "fig-vs-energy-G-L-R.csv")
    assert header[:2] == ["length [nm]", "disorder_strength [1]"]
    assert "mean [e^2/h]" in header and "ci95_low [e^2/h]" in header
    col = {h: i for i, h in enumerate(header)}
    s = real_run.summary.sel(measurement="G(L,R)").isel(disorder_strength=0, b_perp=0,
                                                        gate_voltage=0)
    for r in rows:
        want = float(s["mean"].sel(geometry=float(r[col["length [nm]"]]),
                                   energy=float(r[col["energy [meV]"]])))
        assert float(r[col["mean [e^2/h]"]]) == pytest.approx(want, rel=1e-12)
    assert len(rows) == 2 * 3  # two lengths x three energies


def test_quantised_line_is_the_summary_value(real_run, figure_files):
    out, _ = figure_files
    summary = real_run.summary
    ideal = quantised_values(real_run.config)
    for label in ("G(L,R)", "R(L,R;L,R)"):
        q = float(summary["quantised"].sel(measurement=label))
        # the summary's ideal value is the transport code's own: 2 e^2/h, 1/2 h/e^2 here
        assert q == pytest.approx(ideal[label], rel=1e-12)
        plot = figure_vs_axis(real_run, label, "energy", "x")
        lines = [ln for ax in plot.figure.axes for ln in ax.get_lines()
                 if ln.get_gid() == "quantised"]
        assert len(lines) == 1
        assert np.allclose(lines[0].get_ydata(), q, rtol=0, atol=0)
        assert "ideal QSH" in lines[0].get_label()
        header, rows = _read_csv(out / f"fig-vs-energy-{measurement_slug(label)}.csv")
        k = [i for i, h in enumerate(header) if h.startswith("quantised [")][0]
        assert {float(r[k]) for r in rows} == {q}
    assert float(summary["quantised"].sel(measurement="G(L,R)")) == 2.0


def test_distribution_uses_every_done_sample(real_run):
    plot = figure_distribution(real_run, "G(L,R)", "G", None)
    samples = real_run.samples
    n_real = samples.sizes["realisation"]
    assert len(plot.rows) == 2 * n_real  # first and last length, every realisation
    first = samples.measurements.sel(measurement="G(L,R)").isel(
        geometry=0, disorder_strength=0, b_perp=0, gate_voltage=0, energy=1).values
    values = sorted(float(r[-2]) for r in plot.rows if r[0] == 60.0)
    assert values == sorted(first.tolist())
    means = [ln.get_xdata()[0] for ln in plot.figure.axes[0].get_lines() if ln.get_gid() == "mean"]
    assert means[0] == pytest.approx(np.mean(first))


def test_measurement_slugs_are_filesystem_safe():
    assert measurement_slug("R14,23") == "R14-23"
    assert measurement_slug("G(L,R)") == "G-L-R"
    assert measurement_slug("R(L,R;L,R)") == "R-L-R-L-R"
    for bad in ("G(../a,/b)", "R(..,x;y,z)", "G(.,.)"):
        slug = measurement_slug(bad)
        assert "/" not in slug and ".." not in slug and not slug.startswith(".")


# --------------------------------------------------------------------------- synthetic summaries
def _synthetic(lengths=(100.0, 200.0, 400.0, 800.0), energies=(-2.0, 0.0, 2.0),
               gates=(0.0,), lam=300.0):
    labels = ["G14", "R14,23"]
    shape = (len(lengths), 1, 1, len(gates), len(energies), 2)
    L = np.asarray(lengths)[:, None, None, None, None]
    t = 1.0 / (1.0 + L / lam) * np.ones(shape[:-1])
    mean = np.stack([2.0 * t, 0.25 / t], axis=-1)
    dims = ("geometry", "disorder_strength", "b_perp", "gate_voltage", "energy", "measurement")
    data = {"mean": mean, "std": 0.1 * mean, "sem": 0.02 * mean, "median": mean,
            "ci95_low": 0.96 * mean, "ci95_high": 1.04 * mean,
            "n_samples": np.full(shape, 50.0)}
    ds = xr.Dataset({k: (dims, v) for k, v in data.items()},
                    coords={"geometry": ("geometry", list(lengths), {"units": "nm", "parameter": "length"}),
                            "disorder_strength": [1.0], "b_perp": [0.0],
                            "gate_voltage": list(gates), "energy": list(energies),
                            "measurement": labels,
                            "unit": ("measurement", ["e^2/h", "h/e^2"]),
                            "quantised": ("measurement", [2.0, 0.25])},
                    attrs={"run_name": "synthetic", "config_hash": "0" * 64})
    return ds


def _synthetic_run(summary):
    cfg = parse_config(RUN_CONFIG.format(directory="unused"))
    samples = xr.Dataset(attrs={"run_name": "synthetic", "config_hash": "0" * 64})
    return RunData(config=cfg, samples=samples, summary=summary, store_path=Path("unused"))


def test_synthetic_summary_line_figures_follow_the_spec():
    run = _synthetic_run(_synthetic(gates=(-1.0, 0.0, 1.0)))
    for label, q in (("G14", 2.0), ("R14,23", 0.25)):
        for x_dim in ("energy", "gate_voltage"):
            plot = figure_vs_axis(run, label, x_dim)
            ax = plot.figure.axes[0]
            (qline,) = [ln for ln in ax.get_lines() if ln.get_gid() == "quantised"]
            assert set(qline.get_ydata()) == {q}
            # one line per length (the geometry axis), over the x axis
            means = [ln for ln in ax.get_lines() if ln.get_label().startswith("length =")]
            assert len(means) == 4
            assert ax.get_xlabel() in ("E (meV)", "gate voltage (V)")
        assert plot.stem == f"fig-vs-gate-{measurement_slug(label)}"


def _fit_dict(form, value, error, to_lstar):
    return {"form": form, "parameter": "lambda" if form == "incoherent" else "xi",
            "value": value, "error": error, "chi2_reduced": 1.0, "dof": 1, "n_points": 2,
            "lstar": value * to_lstar, "lstar_error": error * to_lstar, "tolerance": 0.05,
            "ok": True, "message": ""}


def _stored_lstar(measurement, lstar, low, high, lam, lam_err, xi, xi_err, preferred):
    """An L* result as a reader of lstar.json gets it (two lengths, off the summary's)."""
    return LStarResult.from_dict({
        "measurement": measurement, "kind": "G", "quantised": 2.0, "tolerance": 0.05,
        "point": {}, "length_parameter": "length", "lengths": [10.0, 60.0], "n": [50, 50],
        "t_mean": [0.99, 0.9], "t_sem": [0.01, 0.01], "lnt_mean": [-0.01, -0.1],
        "lnt_sem": [0.01, 0.01], "lnt_n": [50, 50], "value_mean": [1.98, 1.8],
        "n_nonpositive": 0, "lstar": lstar, "lstar_kind": "interpolated", "lstar_ci_low": low,
        "lstar_ci_high": high, "confidence": 0.95, "bootstrap_resamples": 200,
        "bootstrap_seed": 0, "bootstrap_censored_fraction": 0.0,
        "incoherent": _fit_dict("incoherent", lam, lam_err, 0.05 / 0.95),
        "coherent": _fit_dict("coherent", xi, xi_err, -math.log(0.95)),
        "preferred": preferred, "notes": [], "method": "length sweep"})


def test_length_figure_draws_lstar_tolerance_and_fits():
    run = _synthetic_run(_synthetic())
    lstar = _stored_lstar("G14", 15.8, 10.0, 22.0, 300.0, 12.0, 900.0, 50.0, "incoherent")
    assert lstar.flags == ()
    plot = figure_vs_length(run, "G14", "G14", None, lstar)
    ax, axl = plot.figure.axes[:2]
    (ls,) = [ln for ln in ax.get_lines() if ln.get_gid() == "lstar"]
    assert set(ls.get_xdata()) == {15.8}
    assert axl.get_xscale() == "log" and axl.get_yscale() == "log"
    labels = [ln.get_label() for ln in axl.get_lines()]
    assert any(lb.startswith("incoherent") and "preferred" in lb for lb in labels)
    assert any(lb.startswith("coherent") for lb in labels)
    header = plot.columns
    col = {h: i for i, h in enumerate(header)}
    for row in plot.rows:
        L = row[col["length [nm]"]]
        # G/G_ideal of the synthetic data is exactly the incoherent form with lambda = 300 nm
        assert row[col["normalised [1]"]] == pytest.approx(1 / (1 + L / 300.0))
        assert row[col["incoherent_fit [1]"]] == pytest.approx(1 / (1 + L / 300.0))
        assert row[col["tolerance_low [e^2/h]"]] == pytest.approx(1.9)
    assert plot.extra["lstar"]["low_nm"] == 10.0 and plot.extra["lstar"]["high_nm"] == 22.0
    assert plot.extra["lstar"]["result"] == lstar.to_dict()
    assert plot.extra["normalised_from"] == "summary"  # the result's lengths are not the run's
    # a resistance is normalised as R_ideal / R, which falls below 1 in the same way
    plot_r = figure_vs_length(run, "R14,23", "R", None, None)
    k = plot_r.columns.index("normalised [1]")
    assert [r[k] for r in plot_r.rows] == pytest.approx([1 / (1 + L / 300.0)
                                                         for L in (100, 200, 400, 800)])


def test_points_off_the_sweep_axes_are_refused():
    run = _synthetic_run(_synthetic())
    with pytest.raises(HelisweepError, match="not on the run's sweep axis"):
        figure_vs_axis(run, "G14", "energy", select={"geometry": 150.0})
    with pytest.raises(HelisweepError, match="unknown sweep axis"):
        figure_vs_axis(run, "G14", "energy", select={"temperature": 1.0})


# --------------------------------------------------------------------------- current map physics
def _clean(energy, doping):
    return parse_config(CLEAN_STRIP.format(energy=energy, doping=doping))


@pytest.mark.slow
def test_current_runs_along_the_edges_in_the_gap_and_through_the_bulk_above_it():
    # Helical edge states carry all current inside the bulk gap (-10, 10) meV of this well;
    # in the conduction band bulk states carry most of it. The gap edges are those of the
    # material preset (Koenig et al., J. Phys. Soc. Jpn. 77, 031007 (2008), Table I).
    from pipeline.physics.bhz import continuum_bulk_gap
    from pipeline.sweep.tasks import system_for
    from pipeline.transport.solver import transmission_matrix

    cfg = _clean(2.0, 25.0)
    _, top, bottom = continuum_bulk_gap(cfg.material.parameters())
    assert top < 2.0 < bottom < 40.0
    gap = current_map(cfg).density
    band = current_map(_clean(40.0, 25.0)).density
    assert gap.edge_zone == pytest.approx(2 / 0.018697, rel=1e-3)  # 2 x 53.5 nm
    assert gap.edge_fraction > 0.9
    assert band.edge_fraction < 0.75
    assert band.edge_fraction < gap.edge_fraction - 0.2
    # Kwant normalises each incoming mode to unit flux, so the current crossing any column
    # of the strip is the total transmission T(R <- L) (current conservation; common
    # practice, no source): this pins the normalisation of the site current density.
    dsys = system_for(cfg, 0)
    T = transmission_matrix(dsys, 2.0, dsys.params()).matrix[1, 0]
    assert T == pytest.approx(2.0, abs=1e-2)  # two helical edges in the gap
    x = gap.positions[:, 0]
    for x0 in (37.5, 77.5, 112.5):
        column = np.isclose(x, x0)
        assert column.sum() == 80
        assert gap.vectors[column, 0].sum() == pytest.approx(T, rel=1e-6)


def test_current_map_json_reports_edge_fraction(figure_files):
    import json

    out, _ = figure_files
    facts = json.loads((out / "fig-current.json").read_text())
    assert 0.0 <= facts["edge_fraction"] <= 1.0
    assert facts["edge_decay_length_nm"] == pytest.approx(53.48, abs=0.05)
    assert facts["point"]["realisation"] == 0 and facts["point"]["energy"] == 1.0
    header, rows = _read_csv(out / "fig-current.csv")
    assert header[:3] == ["x_nm", "y_nm", "current"]
    assert len(rows) == 12 * 8  # every site of the 60 nm x 40 nm strip at a = 5 nm
    mags = np.array([float(r[2]) for r in rows])
    assert np.all(mags >= 0) and mags.sum() > 0
    near = np.array([r[4] == "true" for r in rows])
    assert mags[near].sum() / mags.sum() == pytest.approx(facts["edge_fraction"], rel=1e-9)


def test_current_map_refuses_a_realisation_outside_the_run(real_run):
    with pytest.raises(HelisweepError, match="realisation"):
        current_map(real_run.config, {"realisation": 99})
    with pytest.raises(HelisweepError, match="not on the run's sweep axis"):
        current_map(real_run.config, {"energy": 2.5})


def test_length_figure_with_a_real_lstar_result(real_run, tmp_path):
    lstar = pytest.importorskip("pipeline.analysis.lstar")
    result = lstar.longest_ballistic_length(real_run.store_path, "G(L,R)",
                                            point={"energy": 1.0}, bootstrap_resamples=200)
    plot = figure_vs_length(real_run, "G(L,R)", "G", None, result)
    (ls,) = [ln for ln in plot.figure.axes[0].get_lines() if ln.get_gid() == "lstar"]
    assert set(ls.get_xdata()) == {result.lstar}
    facts = plot.extra["lstar"]
    assert facts["value_nm"] == result.lstar and facts["kind"] == result.lstar_kind
    # 3 realisations are too few for the correlated fits (they need 4): NaN, stated as such
    for key, fit in (("lambda_nm", result.incoherent), ("xi_nm", result.coherent)):
        assert facts[key] == fit.value or (math.isnan(facts[key]) and math.isnan(fit.value)
                                           and not fit.ok)
    k = plot.columns.index("normalised [1]")
    assert [r[k] for r in plot.rows] == pytest.approx(list(result.t_mean))
    k = plot.columns.index("normalised_typical [1]")
    assert [r[k] for r in plot.rows] == pytest.approx(np.exp(result.lnt_mean).tolist())
    # a result read back from lstar.json draws the same figure
    path = lstar.save_lstar(tmp_path / "lstar.json", result)
    (back,) = lstar.load_lstar(path)
    again = figure_vs_length(real_run, "G(L,R)", "G", None, back)
    np.testing.assert_array_equal(np.array(again.rows, dtype=float), np.array(plot.rows, dtype=float))
    assert again.extra["lstar"]["result"] == facts["result"] == result.to_dict()
    # a table of all points: the figures pick the result at their own point
    table = lstar.longest_ballistic_length(real_run.store_path, "G(L,R)", bootstrap_resamples=0)
    assert len(table.results) == 3
    out = tmp_path / "figs"
    make_figures(real_run, out, lstar={"G(L,R)": table}, select={"energy": 5.0})
    facts = json.loads((out / "fig-vs-length-G-L-R.json").read_text())
    assert facts["lstar"]["result"]["point"]["energy"] == 5.0
    assert facts["normalised_from"] == "L* analysis"
    header, rows = _read_csv(out / "fig-vs-length-G-L-R.csv")
    k = header.index("energy [meV]")
    assert {float(r[k]) for r in rows} == {5.0}
    # the R figure has no L* result: drawn from the summary alone
    facts = json.loads((out / "fig-vs-length-R-L-R-L-R.json").read_text())
    assert "lstar" not in facts and facts["normalised_from"] == "summary"
    with pytest.raises(HelisweepError, match="'G14', which the run does not report"):
        make_figures(real_run, out, lstar=_stored_lstar("G14", 1.0, 0.5, 2.0, 1.0, 0.1, 1.0,
                                                        0.1, "comparable"))
