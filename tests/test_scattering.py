"""The assembled scattering solve against Kwant's own, and its reproducibility.

Reference values of every comparison here come from Kwant itself:
# Source: Kwant 1.5.0 kwant.smatrix (reference library)
"""

import kwant
import numpy as np
import pytest

import pipeline.transport.scattering as scattering
from pipeline.device.templates import h_bar, hall_bar, two_terminal_strip
from pipeline.errors import ModelError, TransportError
from pipeline.longedges.modes import StripScatterer
from pipeline.physics.bhz import exchange_matrices
from pipeline.physics.materials import PRESETS
from pipeline.system.mesh import build_system
from pipeline.transport.scattering import ScatteringProblem, problem_for
from pipeline.transport.solver import block_transmission_matrix, transmission_matrix

HGTE = PRESETS["hgte-7.0nm"]  # g-factors non-zero: the Zeeman term is exercised
A_LAT = 5.0  # nm
TOL = 1e-10  # agreement with Kwant's solve (absolute, transmissions are O(1))

DEVICES = {
    "strip": lambda: two_terminal_strip(length=60.0, width=40.0),
    "hbar": lambda: h_bar(length=40.0, width=30.0, arm_length=20.0, arm_width=30.0),
    "hallbar-6": lambda: hall_bar(length=140.0, width=40.0, probe_width=30.0, probe_length=20.0,
                                  probe_spacing=70.0),
}
_SYSTEMS: dict = {}


def system(name: str, *, spin_block: bool = False, doping: float = 25.0):
    """A small device system with field support, built once per test module."""
    key = (name, spin_block, doping)
    if key not in _SYSTEMS:
        _SYSTEMS[key] = build_system(DEVICES[name](), HGTE, A_LAT, with_field=True,
                                     contact_doping=doping, spin_block=spin_block)
    return _SYSTEMS[key]


def disorder(dsys, seed: int, *, inplane: bool):
    """Anderson potential and an exchange field (in-plane components only when asked)."""
    rng = np.random.default_rng(seed)
    pot = rng.uniform(-30.0, 30.0, dsys.n_sites)
    m = np.zeros((dsys.n_sites, 3))
    m[:, 2] = rng.uniform(-5.0, 5.0, dsys.n_sites)
    if inplane:
        m[:, :2] = rng.uniform(-4.0, 4.0, (dsys.n_sites, 2))
    return pot, exchange_matrices(m)


def kwant_transmissions(fsyst, energy, params):
    sm = kwant.smatrix(fsyst, energy, params=params)
    n = len(fsyst.leads)
    T = np.array([[sm.transmission(i, j) for j in range(n)] for i in range(n)])
    return T, np.array([sm.num_propagating(i) for i in range(n)])


# ---------------------------------------------------------------- agreement with Kwant
@pytest.mark.parametrize("name", list(DEVICES))
@pytest.mark.parametrize("b_perp", [0.0, 1.3], ids=["B0", "B1.3"])
def test_four_band_transmissions_agree_with_kwant(name, b_perp):
    dsys = system(name)
    pot, extra = disorder(dsys, 1, inplane=True)  # in-plane exchange mixes the spins
    params = dsys.params(b_perp=b_perp, potential=pot, onsite_extra=extra)
    problem = ScatteringProblem(dsys)
    for energy in (0.0, 6.0):
        ref, modes = kwant_transmissions(dsys.fsyst, energy, params)
        got = problem.transmissions(energy, params)
        full = problem.transmissions(energy, params, inject="all")
        np.testing.assert_allclose(got.matrix, ref, atol=TOL, rtol=0)
        np.testing.assert_allclose(full.matrix, ref, atol=TOL, rtol=0)
        np.testing.assert_allclose(got.matrix, full.matrix, atol=TOL, rtol=0)
        np.testing.assert_array_equal(got.modes, modes)
        # current conservation: rows and columns sum to the open modes
        np.testing.assert_allclose(full.matrix.sum(axis=1), modes, atol=TOL)
        np.testing.assert_allclose(full.matrix.sum(axis=0), modes, atol=TOL)


@pytest.mark.parametrize("name", list(DEVICES))
@pytest.mark.parametrize("b_perp", [0.0, 1.3], ids=["B0", "B1.3"])
def test_spin_block_transmissions_agree_with_kwant(name, b_perp):
    half = system(name, spin_block=True)
    pot, extra = disorder(half, 2, inplane=False)
    blocks = half.block_params(b_perp=b_perp, potential=pot, onsite_extra=extra)
    for params, _ in blocks:  # each block (the spin-down one at the reversed field) alone
        ref, modes = kwant_transmissions(half.fsyst, 6.0, params)
        got = transmission_matrix(half, 6.0, params)
        np.testing.assert_allclose(got.matrix, ref, atol=TOL, rtol=0)
        np.testing.assert_array_equal(got.modes, modes)
    # and the sum over the blocks equals Kwant's four-band solve
    full = system(name)
    ref, modes = kwant_transmissions(
        full.fsyst, 6.0, full.params(b_perp=b_perp, potential=pot, onsite_extra=extra))
    got = block_transmission_matrix(half, 6.0, blocks)
    np.testing.assert_allclose(got.matrix, ref, atol=TOL, rtol=0)
    np.testing.assert_array_equal(got.modes, modes)


def test_precalculated_leads_and_undoped_contacts_agree_with_kwant():
    dsys = system("strip", doping=0.0)
    pot, extra = disorder(dsys, 3, inplane=True)
    params = dsys.params(potential=pot, onsite_extra=extra)
    fs = dsys.fsyst.precalculate(2.0, params={"b_perp": 0.0, "onsite_stack": None,
                                              **dsys.peierls_phases(0.0)})
    ref, _ = kwant_transmissions(dsys.fsyst, 2.0, params)
    got = transmission_matrix(dsys, 2.0, params, fsyst=fs)
    np.testing.assert_allclose(got.matrix, ref, atol=TOL, rtol=0)


@pytest.mark.parametrize("name", ["strip", "hallbar-6"])
def test_smatrix_blocks_agree_with_kwant(name):
    dsys = system(name)
    pot, extra = disorder(dsys, 4, inplane=True)
    params = dsys.params(b_perp=0.7, potential=pot, onsite_extra=extra)
    lead_params = {"b_perp": 0.7, "onsite_stack": None, **dsys.peierls_phases(0.7)}
    fs = dsys.fsyst.precalculate(6.0, params=lead_params)  # one mode basis for both solves
    ref = kwant.smatrix(fs, 6.0, params=params)
    got = ScatteringProblem(dsys).smatrix(6.0, params, fsyst=fs)
    n = len(fs.leads)
    for i in range(n):
        for j in range(n):
            np.testing.assert_allclose(got.submatrix(i, j), ref.submatrix(i, j), atol=TOL,
                                       rtol=0)
    unitarity = np.abs(got.data.conj().T @ got.data - np.eye(got.data.shape[1])).max()
    assert unitarity < TOL


def test_pool_segment_blocks_agree_with_kwant():
    # what the segment pools consume: r, t, t', r' in the canonical edge-mode basis
    strip = StripScatterer(HGTE, A_LAT, 16, 10, 3.0, 0.0, calibrate=False)
    rng = np.random.default_rng(5)
    params = strip.dsys.params(potential=rng.uniform(-30.0, 30.0, strip.dsys.n_sites))
    got = strip.solve(params)
    sm = kwant.smatrix(strip.fsyst, 3.0, params=params)
    want = (strip.l_out @ sm.submatrix(0, 0) @ strip.l_in,
            strip.r_out @ sm.submatrix(1, 0) @ strip.l_in,
            strip.l_out @ sm.submatrix(0, 1) @ strip.r_in,
            strip.r_out @ sm.submatrix(1, 1) @ strip.r_in)
    for block, ref in zip((got.r, got.t, got.tp, got.rp), want):
        np.testing.assert_allclose(block, ref, atol=TOL, rtol=0)
    assert strip.last_kwant_unitarity < TOL


# ---------------------------------------------------------------- reproducibility
def _solves(dsys, order, pots):
    """S-matrix data of fresh-problem solves in the given order of (realisation, E, B)."""
    problem = ScatteringProblem(dsys)
    out = {}
    for r, energy, b in order:
        params = dsys.params(b_perp=b, potential=pots[r])
        out[(r, energy, b)] = (problem.smatrix(energy, params).data,
                               problem.transmissions(energy, params).matrix)
    return out, problem


ORDER = [(0, 0.0, 0.0), (1, 6.0, 0.0), (0, 6.0, 1.0), (1, 0.0, 1.0)]


def _order_differences(dsys):
    rng = np.random.default_rng(9)
    pots = [rng.uniform(-60.0, 60.0, dsys.n_sites) for _ in range(2)]
    forward, problem = _solves(dsys, ORDER, pots)
    backward, _ = _solves(dsys, ORDER[::-1], pots)
    shuffled, _ = _solves(dsys, [ORDER[2], ORDER[0], ORDER[3], ORDER[1]], pots)
    diffs = [max(np.abs(forward[k][i] - other[k][i]).max() for i in (0, 1))
             for other in (backward, shuffled) for k in ORDER]
    return max(diffs), problem


def test_results_are_bitwise_independent_of_solve_order():
    dsys = system("hbar")
    diff, problem = _order_differences(dsys)
    assert diff == 0.0
    # one MUMPS analysis served both realisations, both energies and both fields
    assert problem.n_analyses == 1


def test_order_check_detects_a_value_dependent_analysis(monkeypatch):
    # control: with MUMPS' value-based column permutation and scaling at the analysis
    # (ICNTL(6) = 5, ICNTL(8) = -2) the same check finds order-dependent results, so the
    # test above can fail
    monkeypatch.setattr(scattering, "_ICNTL_NO_VALUE_PERMUTATION", (6, 5))
    monkeypatch.setattr(scattering, "_ICNTL_FACTOR_TIME_SCALING", (8, -2))
    diff, _ = _order_differences(system("hbar"))
    assert diff > 0.0


def test_a_new_onsite_pattern_gets_its_own_analysis_and_right_numbers():
    dsys = system("strip")
    problem = ScatteringProblem(dsys)
    pot, extra = disorder(dsys, 6, inplane=True)
    for params in (dsys.params(potential=pot),  # spins decoupled: two blocks in the pattern
                   dsys.params(potential=pot, onsite_extra=extra)):  # spin mixing
        ref, _ = kwant_transmissions(dsys.fsyst, 6.0, params)
        np.testing.assert_allclose(problem.transmissions(6.0, params).matrix, ref, atol=TOL,
                                   rtol=0)
    assert problem.n_analyses == 2


def test_problem_cache_keeps_one_set_of_factors_per_thread():
    a, b = system("strip"), system("hbar")
    pa = problem_for(a)
    transmission_matrix(a, 6.0, a.params())
    assert pa.holds_factors
    transmission_matrix(b, 6.0, b.params())
    pb = problem_for(b)
    assert pb is not pa and pb.holds_factors and not pa.holds_factors
    assert problem_for(a) is pa and not pb.holds_factors  # assembled parts stay cached


# ---------------------------------------------------------------- options and fall-back
def test_block_low_rank_option_keeps_kwant_accuracy():
    dsys = system("hbar")
    pot, extra = disorder(dsys, 7, inplane=True)
    params = dsys.params(potential=pot, onsite_extra=extra)
    ref, _ = kwant_transmissions(dsys.fsyst, 6.0, params)
    got = ScatteringProblem(dsys, blr_tolerance=1e-13).transmissions(6.0, params)
    np.testing.assert_allclose(got.matrix, ref, atol=TOL, rtol=0)


def test_kwant_backend_and_scipy_fallback_agree(monkeypatch):
    import kwant.solvers.sparse

    dsys = system("hbar")
    pot, extra = disorder(dsys, 8, inplane=True)
    params = dsys.params(b_perp=0.5, potential=pot, onsite_extra=extra)
    ours = ScatteringProblem(dsys).transmissions(6.0, params)
    via_kwant = ScatteringProblem(dsys, backend="kwant").transmissions(6.0, params)
    np.testing.assert_allclose(via_kwant.matrix, ours.matrix, atol=TOL, rtol=0)
    # Kwant built without MUMPS: the default backend is Kwant's path with SciPy's solver
    monkeypatch.setattr(scattering, "SOLVER", kwant.solvers.sparse.Solver())
    monkeypatch.setattr(scattering, "SOLVER_NAME", "scipy")
    fallback = ScatteringProblem(dsys)
    assert fallback.backend == "kwant"
    got = fallback.transmissions(6.0, params)
    np.testing.assert_allclose(got.matrix, ours.matrix, atol=TOL, rtol=0)
    sm = fallback.smatrix(6.0, params)
    assert type(sm).__name__ == "SMatrix" and fallback.n_solves == 2


# ---------------------------------------------------------------- errors
def test_closed_lead_is_a_transport_error_before_the_factorisation():
    dsys = system("strip", doping=0.0)
    problem = ScatteringProblem(dsys)
    with pytest.raises(TransportError, match=r"no open mode at E = 5000.0 meV"):
        problem.transmissions(5000.0, dsys.params())
    assert problem.n_analyses == 0 and problem.timings["factorisation"] == 0.0


def test_bad_input_is_refused_with_the_value_and_the_fix():
    dsys = system("strip")
    problem = ScatteringProblem(dsys)
    params = dsys.params()
    with pytest.raises(ModelError, match=r"must have shape \(96, 4, 4\).*got \(96, 2, 2\)"):
        problem.transmissions(6.0, {**params, "onsite_stack": params["onsite_stack"][:, :2, :2]})
    bad = params["onsite_stack"].copy()
    bad[5, 0, 1] += 1.0  # not Hermitian
    with pytest.raises(ModelError, match=r"site 5 .* not Hermitian"):
        problem.transmissions(6.0, {**params, "onsite_stack": bad})
    bad = params["onsite_stack"].copy()
    bad[7, 2, 2] = np.nan
    with pytest.raises(ModelError, match=r"non-finite entry at site 7"):
        problem.transmissions(6.0, {**params, "onsite_stack": bad})
    assert problem.n_analyses == 0
    with pytest.raises(ModelError, match=r"blr_tolerance must be a number in \(0, 1\).*got 2"):
        ScatteringProblem(dsys, blr_tolerance=2)
    with pytest.raises(ModelError, match=r"backend must be one of .*got 'umfpack'"):
        ScatteringProblem(dsys, backend="umfpack")
    with pytest.raises(ModelError, match=r"inject must be"):
        problem.transmissions(6.0, params, inject="some")
