"""The helical-edge network model (pipeline.network): geometry, the network solve, the
quarter turn of the lattice model, guard rails, the stage and its agreement with direct solves.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import xarray as xr
from shapely.geometry import LineString, Polygon

from pipeline.device.outline import Contact, Device, perimeter_order
from pipeline.device.readers import load_device
from pipeline.device.templates import h_bar, hall_bar, two_terminal_strip
from pipeline.errors import ConfigError, ModelError, NetworkWarning
from pipeline.longedges.pools import QUARTER_TURN, segment_smatrices, turned_onsite
from pipeline.network.plan import plan_network
from pipeline.network.run import POOLS_STORE, network_status, run_network
from pipeline.network.sections import edge_sections, local_widths
from pipeline.network.solve import ABSORBING, edge_blocks, edge_leak, network_transmissions
from pipeline.physics.bhz import lattice_matrices
from pipeline.physics.disorder import build_term, realise
from pipeline.physics.materials import get_preset
from pipeline.sweep.config import config_hash, parse_config
from pipeline.system.mesh import build_system
from pipeline.transport.landauer import four_terminal_resistance
from pipeline.transport.solver import transmission_matrix

HGTE = get_preset("hgte-7.0nm")

NETWORK_CONFIG = """
[run]
name = "{name}"
seed = 11
realisations = 4
directory = "{directory}"

[device]
template = "hbar"
parameters = {{ length = 600.0, width = 300.0, arm_length = 450.0, arm_width = 300.0 }}

[lattice]
constant = 5.0

[material]
preset = "hgte-7.0nm"
{disorder}
[sweep]
energy = [-2.0, 2.0]

[measure]
labels = ["R14,23", "R14,14", "G14"]

[edges]
segment_length = 350.0
buffer = 100.0
segments = 8
sequences = 64
pool_resamples = 4
evanescent_tolerance = 1e-2
"""

MAGNETIC = """
[[disorder]]
kind = "magnetic"
inplane = 12.0
density = 0.004
aligned = false
"""


def network_config(tmp_path, name="net", disorder=MAGNETIC, **replace):
    text = NETWORK_CONFIG.format(name=name, directory=str(tmp_path / name), disorder=disorder)
    for old, new in replace.items():
        assert old in text, old
        text = text.replace(old, new)
    return parse_config(text, base_dir=tmp_path)


# --------------------------------------------------------------------------- geometry
def test_sections_run_along_the_outline_between_neighbouring_contacts():
    dev = h_bar(800.0, 300.0, 600.0, 300.0)
    secs = edge_sections(dev)
    names = dev.contact_names
    got = {(names[s.start_contact], names[s.end_contact]): s.length for s in secs}
    # arm_length + bridge + arm_length between the bottom (top) contacts, the full bar height
    # between the two contacts of one bar
    assert got == {("2", "3"): 2000.0, ("3", "4"): 1500.0, ("4", "1"): 2000.0, ("1", "2"): 1500.0}
    perimeter = dev.outline.exterior.length
    assert math.isclose(sum(s.length for s in secs) + sum(c.width for c in dev.contacts),
                        perimeter)
    order = perimeter_order(dev)[0]
    for s in secs:  # each section joins neighbours in the walking order of the perimeter
        assert order[(order.index(s.start_contact) + 1) % len(order)] == s.end_contact
    # a section that turns a corner splits into pieces along x and along y
    axes = {(names[s.start_contact], names[s.end_contact]): [(r.axis, r.length) for r in s.runs]
            for s in secs}
    assert axes[("2", "3")] == [(1, 600.0), (0, 800.0), (1, 600.0)]
    assert axes[("1", "2")] == [(1, 1500.0)]


def test_sections_of_a_hall_bar_and_its_narrowest_arm():
    dev = hall_bar(2100.0, 500.0, 300.0, 500.0, 800.0)
    secs = edge_sections(dev)
    assert [round(s.length) for s in secs] == [1500, 1000, 1000, 1500, 1000, 1000]
    assert [s.corners for s in secs] == [2, 1, 1, 2, 1, 1]
    width, _, _ = local_widths(dev, secs, step=10.0)
    assert width == pytest.approx(300.0, abs=1e-3)  # the probe arms


def test_gated_pieces_of_the_drawn_hbar(tmp_path):
    dev = load_device("geometries/tarn-hbar-A.geojson")
    secs = edge_sections(dev)
    gated = [sum(r.length for r in s.runs if r.gates == ("TG",)) for s in secs]
    assert sorted(gated) == [0.0, 0.0, 400.0, 400.0]  # the bridge's two edges under TG


def test_a_hole_without_contacts_carries_no_section():
    outline = Polygon([(0, 0), (3000, 0), (3000, 1000), (0, 1000)],
                      [[(1000, 300), (2000, 300), (2000, 700), (1000, 700)]])
    dev = Device("ring", outline, (Contact("L", LineString([(0, 1000), (0, 0)])),
                                   Contact("R", LineString([(3000, 0), (3000, 1000)]))))
    secs = edge_sections(dev)
    assert len(secs) == 2 and {s.ring for s in secs} == {0}


# --------------------------------------------------------------------------- the solve
def _ring(T_sections, n):
    """Sections of transmission probability T (both ways) on a ring of n contacts."""
    T = np.asarray(T_sections, float)
    blocks = (1 - T, T, T, 1 - T)  # probabilities: R, T, T', R'
    return network_transmissions(blocks, list(range(n)), [(i + 1) % n for i in range(n)],
                                 [ABSORBING] * n)


def test_clean_edges_give_the_quantised_nonlocal_values():
    # Source: Roth et al., Science 325, 294 (2009): H-bar R14,23 = h/4e^2, R14,14 = 3h/4e^2
    T = _ring([1.0] * 4, 4)
    assert four_terminal_resistance(T, 0, 3, 1, 2) == pytest.approx(0.25, abs=1e-12)
    assert four_terminal_resistance(T, 0, 3, 0, 3) == pytest.approx(0.75, abs=1e-12)


@pytest.mark.parametrize("t", [0.9, 0.5, 0.2])
def test_uniform_nonideal_edges_act_as_resistors_of_h_over_e2_t(t):
    # Source: Buttiker, Phys. Rev. B 38, 9375 (1988): an edge channel of transmission T
    # between two reservoirs is a resistor h/(e^2 T); on the four-contact ring the current
    # from 1 to 4 splits between the edge 1-4 and the three edges 1-2-3-4, so
    # R14,14 = 3/(4T) and R14,23 = 1/(4T) (h/e^2).
    T = _ring([t] * 4, 4)
    assert four_terminal_resistance(T, 0, 3, 0, 3) == pytest.approx(0.75 / t, rel=1e-12)
    assert four_terminal_resistance(T, 0, 3, 1, 2) == pytest.approx(0.25 / t, rel=1e-12)
    # six contacts, current between opposite ones: two paths of three edges
    T6 = _ring([t] * 6, 6)
    assert four_terminal_resistance(T6, 0, 3, 0, 3) == pytest.approx(1.5 / t, rel=1e-12)
    assert four_terminal_resistance(T6, 0, 3, 1, 2) == pytest.approx(0.5 / t, rel=1e-12)


def test_network_conserves_current_with_reflecting_contacts():
    # Buttiker's sum rule (Phys. Rev. B 38, 9375 (1988)): what a contact emits reaches some
    # contact (itself included), sum_i T_ij = N_j - R_jj^lead, and what arrives is absorbed,
    # sum_j T_ij = N_i - R_ii^lead, for N = 2 modes (the helical pair) at every contact
    rng = np.random.default_rng(3)
    n = 5
    t = rng.uniform(0.1, 1.0, n)
    r = 1 - t
    from pipeline.network.solve import ContactNode

    nodes, leaks = [], rng.uniform(0, 0.3, n)
    for leak in leaks:  # part of an arriving wave the contact sends on into the other edge
        p = np.array([[0.0, leak], [leak, 0.0]])
        nodes.append(ContactNode(np.sqrt(p).astype(complex), np.eye(2) * (1 - leak) + 0j,
                                 np.eye(2) * (1 - leak) + 0j))
    T = network_transmissions((r, t, t, r), list(range(n)), [(i + 1) % n for i in range(n)],
                              nodes)
    lead_reflection = 2 * leaks  # a unitary contact reflects into its own lead what it passes on
    np.testing.assert_allclose(T.sum(axis=0), 2.0 - lead_reflection, atol=1e-12)
    np.testing.assert_allclose(T.sum(axis=1), 2.0 - lead_reflection, atol=1e-12)


def test_quarter_turn_maps_the_x_hopping_onto_the_y_hopping():
    # the basis change U of a 90 degree turn of the lattice BHZ model: U^dagger H_x U = H_y,
    # U^dagger H_y U = H_x^dagger, onsite terms (with bulk-inversion asymmetry) unchanged
    p = get_preset("hgte-7.0nm")
    for delta in (0.0, 1.6):
        onsite, hx, hy = lattice_matrices(type(p)(**{**p.__dict__, "delta_bia": delta}), 5.0)
        u = QUARTER_TURN
        np.testing.assert_allclose(u.conj().T @ hx @ u, hy, atol=1e-12)
        np.testing.assert_allclose(u.conj().T @ hy @ u, hx.conj().T, atol=1e-12)
        np.testing.assert_allclose(u.conj().T @ onsite @ u, onsite, atol=1e-12)


def test_turned_strip_equals_kwants_solve_of_the_strip_along_y():
    """A strip along y with magnetic impurities, solved by Kwant, equals the strip along x
    carrying the turned exchange (the construction of the y-edge pools)."""
    a, W, L = 5.0, 100.0, 150.0
    terms = [build_term({"kind": "magnetic", "inplane": 30.0, "density": 0.01,
                         "aligned": False})]
    vertical = Device("v", Polygon([(0, 0), (W, 0), (W, L), (0, L)]),
                      (Contact("B", LineString([(0, 0), (W, 0)])),
                       Contact("T", LineString([(W, L), (0, L)]))))
    dv = build_system(vertical, HGTE, a)
    _, ex_v = realise(terms, dv.mesh, seed=5, realisation=0)
    dh = build_system(two_terminal_strip(L, W), HGTE, a)
    # site (x, y) of the x-strip is site (W - y, x) of the y-strip (a quarter turn)
    pos_v = {tuple(np.round(p, 6)): k for k, p in enumerate(dv.mesh.positions)}
    idx = [pos_v[(round(W - y, 6), round(x, 6))] for x, y in dh.mesh.positions]
    u = QUARTER_TURN
    ex_h = u @ ex_v[idx] @ u.conj().T
    for e in (-2.0, 2.0):
        tv = transmission_matrix(dv, e, dv.params(onsite_extra=ex_v)).matrix
        th = transmission_matrix(dh, e, dh.params(onsite_extra=ex_h)).matrix
        assert tv[1, 0] == pytest.approx(th[1, 0], abs=1e-8)
        assert 0.2 < tv[1, 0] < 1.95  # the impurities do backscatter
    # the pools' own transform is this one up to a half turn (which maps the model onto
    # itself and only reverses the in-plane moments)
    np.testing.assert_allclose(turned_onsite(ex_h, 1), u.conj().T @ ex_h @ u)


def test_edge_scatterers_are_the_strips_edges():
    terms = [build_term({"kind": "magnetic", "inplane": 12.0, "density": 0.004,
                         "aligned": False})]
    pool = segment_smatrices(HGTE, 5.0, 270.0, 350.0, terms, energy=2.0, n_segments=6, seed=1,
                             buffer=100.0, evanescent_tolerance=0.01)
    r, t, tp, rp = (x[:, 0, 0] for x in edge_blocks(pool))
    # each edge scatterer is unitary up to the coupling through the strip
    assert edge_leak(pool) < 1e-6
    np.testing.assert_allclose(np.abs(r) ** 2 + np.abs(t) ** 2, 1.0, atol=1e-6)
    np.testing.assert_allclose(np.abs(t), np.abs(tp), atol=1e-6)
    # the two edges carry all of the strip's conductance
    g = np.abs(t[0::2]) ** 2 + np.abs(t[1::2]) ** 2
    np.testing.assert_allclose(g, pool.segments.conductance(), atol=1e-6)


# --------------------------------------------------------------------------- config, guards
def test_edges_table_does_not_change_the_store_identity(tmp_path):
    with_edges = network_config(tmp_path)
    text = with_edges.source_text.split("[edges]")[0]
    assert config_hash(parse_config(text, base_dir=tmp_path)) == config_hash(with_edges)


def test_edges_lengths_must_sit_on_the_lattice(tmp_path):
    with pytest.raises(ConfigError, match="segment_length.*multiple of the lattice"):
        network_config(tmp_path, **{"segment_length = 350.0": "segment_length = 352.0"})


@pytest.mark.parametrize("replace, message", [
    ({"energy = [-2.0, 2.0]": "energy = [2.0, 12.0]"}, "outside the bulk gap"),
    ({"arm_width = 300.0 }": "arm_width = 200.0 }"}, "only 200 nm wide"),
    ({"[sweep]\n": "[sweep]\nb_perp = 12.0\n"}, "instead of the helical pair"),
    ({"length = 600.0,": "length = 120.0,"}, "evanescent coupling"),
    ({"segment_length = 350.0": "segment_length = 1600.0", "evanescent_tolerance = 1e-2":
      "evanescent_tolerance = 1e-2\nwidth = 300.0"}, "less than half a segment"),
])
@pytest.mark.filterwarnings("ignore::pipeline.errors.NetworkWarning")  # rounding, not tested here
def test_guard_rails_refuse_before_any_compute(tmp_path, replace, message):
    cfg = network_config(tmp_path, **replace)
    with pytest.raises(ModelError, match=message):
        run_network(cfg, progress=False)
    assert not (tmp_path / "net").exists()  # nothing computed, no directory made


def gated_config(tmp_path, sweep: str, disorder: str = "", extra: str = ""):
    """The drawn gated H-bar scaled up twice (its 200 nm arms are below the width guard)."""
    src = json.loads(open("geometries/tarn-hbar-A.geojson").read())

    def scale(obj):
        if isinstance(obj, list):
            return [scale(x) for x in obj]
        return obj * 2 if isinstance(obj, (int, float)) else obj

    for feature in src["features"]:
        feature["geometry"]["coordinates"] = scale(feature["geometry"]["coordinates"])
    (tmp_path / "big.geojson").write_text(json.dumps(src))
    text = NETWORK_CONFIG.format(name="gated", directory=str(tmp_path / "gated"),
                                 disorder=disorder)
    text = text.replace('template = "hbar"\nparameters = { length = 600.0, width = 300.0, '
                        'arm_length = 450.0, arm_width = 300.0 }', 'file = "big.geojson"')
    text = text.replace("[sweep]\nenergy = [-2.0, 2.0]",
                        f'{extra}[gates]\nlever_arm = 8.0\ndriven = ["TG"]\n\n[sweep]\n{sweep}')
    return parse_config(text, base_dir=tmp_path)


def test_gate_that_pushes_an_edge_out_of_the_gap_is_refused(tmp_path):
    cfg = gated_config(tmp_path, "energy = -2.0\ngate_voltage = [0.0, 2.0]")
    with pytest.raises(ModelError, match="under gate.*TG.*gate voltage 2 V"):
        plan_network(cfg)


def test_every_sweep_axis_and_metallic_contacts_run_through_the_model(tmp_path):
    cfg = gated_config(
        tmp_path, "energy = -2.0\ngate_voltage = [-0.25, 0.25]\nb_perp = [0.0, 0.5]\n"
        "disorder_strength = [0.0, 1.0]", disorder=MAGNETIC, extra="[contacts]\ndoping = 25.0\n\n")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", NetworkWarning)
        res = run_network(cfg, progress=False)
    assert any(issubclass(w.category, NetworkWarning)
               and "400 nm long but modelled by 3 segment" in str(w.message) for w in caught)
    s = res["summary"]
    assert dict(s["mean"].sizes) == {"geometry": 1, "disorder_strength": 2, "b_perp": 2,
                                     "gate_voltage": 2, "energy": 1, "measurement": 3}
    assert int(s["n_samples"].min()) == cfg.edges.sequences
    # per field and strength: ungated edges along x and y at -2 meV, the gated bridge edges
    # (along x only) at E - U = -2 -+ 2 meV
    assert len(res["plan"].pool_keys(cfg)) == (2 + 2) * 2 * 2
    clean = s.sel(disorder_strength=0.0, b_perp=0.0)
    # metallic contacts reflect a little, so the clean device is close to, not at, the ideal
    r1423 = clean["mean"].sel(measurement="R14,23")
    assert np.all(np.abs(r1423 - 0.25) < 0.02) and np.all(np.abs(r1423 - 0.25) > 1e-6)
    np.testing.assert_allclose(clean["std"], 0.0, atol=1e-9)
    dirty = s.sel(disorder_strength=1.0)["mean"].sel(measurement="R14,23")
    assert float(dirty.min()) > float(r1423.max())


# --------------------------------------------------------------------------- the stage
def test_clean_device_gives_the_ideal_values_exactly(tmp_path):
    # Source: Roth et al., Science 325, 294 (2009): ideal helical edges on an H-bar give
    # R14,23 = h/4e^2 and R14,14 = 3h/4e^2 (G14 = 4e^2/3h)
    res = run_network(network_config(tmp_path, disorder=""), progress=False)
    s = res["summary"]
    expected = {"R14,23": 0.25, "R14,14": 0.75, "G14": 4.0 / 3.0}
    for label, value in expected.items():
        np.testing.assert_allclose(s["mean"].sel(measurement=label), value, atol=1e-9)
        np.testing.assert_allclose(s["std"].sel(measurement=label), 0.0, atol=1e-9)


def test_stage_writes_edges_nc_with_the_summary_layout_and_resumes(tmp_path):
    cfg = network_config(tmp_path)
    res = run_network(cfg, progress=False)
    with xr.open_dataset(res["netcdf"]) as opened:
        ds = opened.load()
    for name in ("mean", "sem", "ci95_low", "ci95_high", "n_samples", "sem_pool"):
        assert name in ds
    assert ds.attrs["model"].startswith("helical-edge network")
    assert "not a device certification" in ds.attrs["note"]
    assert int(ds["n_samples"].min()) == cfg.edges.sequences
    # magnetic impurities spoil the quantised value
    assert float(ds["mean"].sel(measurement="R14,23").min()) > 0.26
    # a rerun reuses the stored pools and gives the same numbers
    again = run_network(cfg, progress=False, compute=False)
    xr.testing.assert_identical(again["summary"]["mean"], res["summary"]["mean"])
    assert "8 of 8 pools stored" not in network_status(cfg)  # 2 energies x 2 directions = 4
    assert "4 of 4 pools stored" in network_status(cfg)


def test_missing_pools_are_refused_without_compute(tmp_path):
    cfg = network_config(tmp_path)
    with pytest.raises(Exception, match="helisweep run"):
        run_network(cfg, progress=False, compute=False)
    assert not (tmp_path / "net" / POOLS_STORE).exists()


def test_same_numbers_on_any_number_of_workers(tmp_path, dask_clients):
    cfg = network_config(tmp_path)
    runs = {n: run_network(cfg, tmp_path / f"w{n}", client=client, progress=False,
                           chunk=3 if n == 1 else None)["summary"]
            for n, client in dask_clients.items()}
    # bitwise on one and two workers, whatever the chunks
    xr.testing.assert_identical(runs[1]["mean"], runs[2]["mean"])
    xr.testing.assert_identical(runs[1]["sem_pool"], runs[2]["sem_pool"])
    # without a cluster the pools are solved in this process (its BLAS may round differently)
    here = run_network(cfg, tmp_path / "here", progress=False)["summary"]
    np.testing.assert_allclose(here["mean"], runs[1]["mean"], rtol=1e-12, atol=0)


def test_length_sweep_gives_lstar_of_the_network_model(tmp_path):
    cfg = network_config(tmp_path, **{
        "[sweep]\n": '[sweep]\ngeometry = { parameter = "length", values = [600.0, 1200.0, '
                     '2400.0, 4800.0] }\n',
        "length = 600.0, ": ""})
    res = run_network(cfg, progress=False)
    doc = json.loads(res["lstar"].read_text())
    assert {r["method"] for r in doc["results"]} == {"edge network, coherent"}
    assert {r["measurement"] for r in doc["results"]} == {"R14,23", "R14,14", "G14"}


def test_network_agrees_with_direct_solves_of_the_same_hbar(tmp_path, dask_clients):
    """Fast version of benchmarks/edge_network/validate.py: an H-bar with magnetic impurities,
    24 direct solves against the edge-network model, every mean within 3 combined errors."""
    from pipeline.analysis.summary import summarize
    from pipeline.sweep.driver import run_sweep

    client = dask_clients[2]
    cfg = network_config(tmp_path, **{"segments = 8": "segments = 48",
                                       "sequences = 64": "sequences = 1000",
                                       "pool_resamples = 4": "pool_resamples = 40",
                                       "realisations = 4": "realisations = 24"})
    direct_cfg = parse_config(cfg.source_text.split("[edges]")[0], base_dir=tmp_path)
    run_sweep(direct_cfg, client=client, progress=False)
    direct = summarize(direct_cfg.run_dir / "samples.zarr")
    net = run_network(cfg, tmp_path / "network", client=client, progress=False)["summary"]
    z = (net["mean"] - direct["mean"]) / np.sqrt(direct["sem"] ** 2 + net["sem"] ** 2
                                                  + net["sem_pool"] ** 2)
    assert float(np.abs(z).max()) < 3.0, z.values
    # and the disorder is strong enough for the comparison to mean something
    assert float(direct["mean"].sel(measurement="R14,23").min()) > 0.3


def test_commands_run_status_report_of_an_edges_config(tmp_path, capsys):
    from pipeline.cli.main import main
    from pipeline.output.package import verify_package

    text = NETWORK_CONFIG.format(name="cli", directory=str(tmp_path / "cli"), disorder=MAGNETIC)
    path = tmp_path / "cli.toml"
    path.write_text(text)
    assert main(["report", str(path), "--quiet"]) == 2  # no pools yet: refused, nothing made
    assert "helisweep run" in capsys.readouterr().err
    assert not (tmp_path / "cli").exists()
    assert main(["preflight", str(path)]) == 0
    assert "guard rails passed" in capsys.readouterr().out
    assert main(["run", str(path), "--workers", "1", "--quiet"]) == 0
    assert "edge-network model" in capsys.readouterr().out
    assert main(["status", str(path)]) == 0
    assert "4 of 4 pools stored" in capsys.readouterr().out
    assert main(["report", str(path), "--quiet"]) == 0
    run_dir = tmp_path / "cli"
    (package,) = [p for p in run_dir.glob("package-cli") if p.is_dir()]
    assert not verify_package(package)
    assert (package / "edges.nc").is_file() and not (package / "summary.nc").exists()
    assert "edge-network model" in (package / "methods.md").read_text()
    figures = sorted(p.name for p in (package / "figures").iterdir())
    assert any(f.startswith("fig-vs-energy-R14-23") for f in figures)
    assert not any(f.startswith(("fig-device", "fig-current")) for f in figures)


def test_an_edges_run_never_writes_into_a_direct_runs_directory(tmp_path):
    cfg = network_config(tmp_path)
    (cfg.run_dir / "samples.zarr").mkdir(parents=True)
    (cfg.run_dir / "lstar.json").write_text("{}")
    with pytest.raises(ConfigError, match="own directory"):
        run_network(cfg, progress=False)
    assert (cfg.run_dir / "lstar.json").read_text() == "{}"
    assert not (cfg.run_dir / POOLS_STORE).exists()


def test_pool_store_is_locked_and_knows_its_material_numbers_and_scheme(tmp_path, monkeypatch):
    # (issue 14) one driver per pool store; pools of other material numbers or another
    # random-number scheme are refused, as a sample store's identity does
    import json
    import time

    from pipeline.errors import StoreError
    from pipeline.network.plan import plan_network
    from pipeline.network.run import pools_hash
    from pipeline.physics import disorder
    from pipeline.sweep import identity
    from pipeline.sweep.lock import lock_path

    cfg = network_config(tmp_path)
    pools = cfg.run_dir / POOLS_STORE
    lock_path(pools).parent.mkdir(parents=True, exist_ok=True)
    lock_path(pools).write_text(json.dumps({
        "host": "node-elsewhere-17", "pid": 12345, "user": "ana", "started": "earlier",
        "heartbeat": "earlier", "heartbeat_unix": time.time(), "store": str(pools)}))
    with pytest.raises(StoreError, match="node-elsewhere-17"):
        run_network(cfg, progress=False)
    assert not pools.exists()  # refused before any pool was solved
    lock_path(pools).unlink()
    plan = plan_network(cfg)
    before = pools_hash(cfg, plan)
    monkeypatch.setattr(identity, "RANDOM_SCHEME_VERSION", disorder.RANDOM_SCHEME_VERSION + 1)
    assert pools_hash(cfg, plan) != before
