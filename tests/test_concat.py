"""Long edges by scattering-matrix composition: algebra, mode basis, exact and statistical
agreement with direct Kwant solves, guard rails, storage."""

import warnings

import numpy as np
import pytest

from pipeline.device.templates import two_terminal_strip
from pipeline.errors import ConcatenationWarning, ModelError, StoreError, TransportError
from pipeline.longedges.compose import concatenated_conductance, draw_sequences, lstar_dataset
from pipeline.longedges.direct import direct_conductance, joined_smatrix
from pipeline.longedges.modes import ModeBasis, evanescent_length
from pipeline.longedges.pools import SegmentSet, merge_segments, segment_smatrices
from pipeline.longedges.smatrix import SMatrix, compose_coherent, compose_incoherent
from pipeline.longedges.storage import load_segments, save_segments
from pipeline.physics.disorder import Anderson, MagneticExchange
from pipeline.physics.materials import PRESETS
from pipeline.system.mesh import build_system
from pipeline.transport.solver import SOLVER

# Source: Koenig et al., J. Phys. Soc. Jpn. 77, 031007 (2008), 7 nm HgTe well (the preset).
HGTE = PRESETS["hgte-7.0nm"]
A = 5.0  # nm
E = 1.0  # meV: in the bulk gap, 6.5 meV below the edge Dirac point (7.46 meV)


def _random_unitary(rng, n):
    z = rng.normal(size=(n, n)) + 1j * rng.normal(size=(n, n))
    q, r = np.linalg.qr(z)
    return q * (np.diag(r) / np.abs(np.diag(r)))


def _random_smatrix(rng, m):
    u = _random_unitary(rng, 2 * m)
    return SMatrix(u[:m, :m], u[m:, :m], u[:m, m:], u[m:, m:])


def _transfer(s):
    """Transfer matrix (right amplitudes from left ones) of a two-sided S-matrix."""
    tpi = np.linalg.inv(s.tp)
    return np.block([[s.t - s.rp @ tpi @ s.r, s.rp @ tpi], [-tpi @ s.r, tpi]])


# --------------------------------------------------------------------------- algebra
def test_star_product_agrees_with_transfer_matrix_product():
    # Source: the composition rule of scattering matrices (Redheffer star product,
    # R. Redheffer, J. Math. and Phys. 41, 1 (1962), from memory) is equivalent to the
    # product of transfer matrices M = [[t - r' t'^-1 r, r' t'^-1], [-t'^-1 r, t'^-1]]
    # (common practice, no source); both are checked on random unitary matrices.
    rng = np.random.default_rng(7)
    chain = [_random_smatrix(rng, 3) for _ in range(5)]
    composed = compose_coherent(chain)
    m = np.eye(6, dtype=complex)
    for s in chain:
        m = _transfer(s) @ m
    np.testing.assert_allclose(_transfer(composed), m, atol=1e-9)
    assert composed.unitarity_error() < 1e-12
    # the balanced tree equals left-to-right sequential composition (associativity)
    seq = chain[0]
    for s in chain[1:]:
        seq = compose_coherent([seq, s])
    np.testing.assert_allclose(composed.matrix(), seq.matrix(), atol=1e-12)
    # a batched SMatrix composes along its first axis
    batched = SMatrix(*(np.stack([getattr(s, k) for s in chain]) for k in ("r", "t", "tp", "rp")))
    np.testing.assert_allclose(compose_coherent(batched).matrix(), composed.matrix(), atol=1e-12)


def test_incoherent_identical_channels_add_as_series_resistors():
    # Source: classical (Ohmic) addition of N identical single-channel scatterers,
    # 1/T_N - 1 = N (1/T - 1) (Datta, Electronic Transport in Mesoscopic Systems, CUP 1995,
    # Sec. 2.5, from memory).
    rng = np.random.default_rng(3)
    s = _random_smatrix(rng, 1)
    T = float(np.abs(s.t[0, 0]) ** 2)
    for n in (1, 2, 7, 64):
        p = compose_incoherent([s] * n)
        assert p.conductance() == pytest.approx(T / (n - (n - 1) * T), rel=1e-12)
        assert p.conservation_error() < 1e-12


def test_bad_blocks_are_refused_with_the_shapes():
    with pytest.raises(TransportError, match="expected"):
        SMatrix(np.zeros((2, 2)), np.zeros((3, 2)), np.zeros((2, 2)), np.zeros((3, 3)))
    rng = np.random.default_rng(0)
    with pytest.raises(TransportError, match="modes on its right side"):
        compose_coherent([_random_smatrix(rng, 2), _random_smatrix(rng, 3)])
    with pytest.raises(TransportError, match="empty"):
        compose_coherent([])


# --------------------------------------------------------------------------- mode basis
def test_kwant_lead_modes_are_shared_by_segments_of_one_precalculated_system():
    dsys = build_system(two_terminal_strip(60.0, 100.0), HGTE, A)
    fs = dsys.fsyst.precalculate(E, params={"onsite_stack": None})
    rng = np.random.default_rng(1)
    infos = []
    for _ in range(2):
        params = dsys.params(potential=rng.uniform(-20, 20, dsys.n_sites))
        infos.append(SOLVER.smatrix(fs, E, params=params).lead_info)
    for i in range(2):
        assert np.array_equal(infos[0][i].wave_functions, infos[1][i].wave_functions)


def test_canonical_basis_is_the_same_for_separately_built_strips_and_edge_resolved():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConcatenationWarning)
        s1 = segment_smatrices(HGTE, A, 100.0, 120.0, [], energy=E, n_segments=1, seed=0,
                               buffer=20.0)
        s2 = segment_smatrices(HGTE, A, 100.0, 200.0, [], energy=E, n_segments=1, seed=0,
                               buffer=40.0)
    assert s1.basis.max_difference(s2.basis) < 1e-10
    b = s1.basis
    assert b.n_modes == 2  # one Kramers pair of helical edge states per edge
    # Source: Kane and Mele, Phys. Rev. Lett. 95, 226801 (2005): the right-movers of the
    # two edges have opposite spin, each localised at one edge.
    np.testing.assert_allclose(np.sort(b.right_sz), [-1.0, 1.0], atol=1e-3)
    assert np.min(b.right_y) < 25.0 and np.max(b.right_y) > 75.0
    # clean segments: no reflection, t = diag(exp(i k N)) (the calibration itself)
    clean = s2.segment(0)
    assert np.abs(clean.r).max() < 1e-8
    np.testing.assert_allclose(clean.t, np.diag(np.exp(1j * b.right_momentum * 40)), atol=1e-8)


# --------------------------------------------------------------------------- exact validation
_EXACT_TERMS = [Anderson(30.0), MagneticExchange(inplane=30.0, density=0.01, aligned=False)]


def _two_segments(buffer):
    return segment_smatrices(HGTE, A, 100.0, 2 * buffer + 100.0, _EXACT_TERMS, energy=E,
                             n_segments=2, seed=1, buffer=buffer)


def test_composition_equals_direct_solve_of_the_joined_strip():
    # Reference: Kwant's direct solve of the strip made of both segments (segment 1, clean
    # gap of 2 b, segment 2). The composition neglects evanescent waves crossing the gap,
    # an error ~ C exp(-2 b / l_ev); C was measured between 0.04 and 1.3 for this disorder
    # (docs/concatenation.md). A gap of 15 l_ev therefore bounds it by ~4e-7 < 1e-6.
    l_ev = evanescent_length(HGTE, A, 100.0, E)
    buffer = A * np.ceil(7.5 * l_ev / A)
    with pytest.warns(ConcatenationWarning, match="edge-state decay lengths") as rec:
        ss = _two_segments(buffer)
    assert not [w for w in rec if "evanescent" in str(w.message)]
    assert ss.evanescent_bound < np.exp(-15)
    composed = compose_coherent([ss.segment(0), ss.segment(1)])
    direct = joined_smatrix(ss, [0, 1])
    err = np.abs(composed.matrix() - direct.matrix()).max()
    assert err < 1e-6
    assert err < 3 * ss.evanescent_bound
    assert composed.conductance() == pytest.approx(direct.conductance(), abs=1e-6)
    # the test is not trivial: the segments backscatter strongly
    assert np.abs(ss.r).max() > 0.5 and composed.conductance() < 1.0


def test_short_buffer_is_flagged_and_really_inaccurate():
    with pytest.warns(ConcatenationWarning) as rec:
        ss = _two_segments(40.0)
    assert any("exp(-gap/l_ev) = 0.027" in str(w.message) for w in rec)
    composed = compose_coherent([ss.segment(0), ss.segment(1)])
    err = np.abs(composed.matrix() - joined_smatrix(ss, [0, 1]).matrix()).max()
    assert err > 1e-4  # far from the 1e-6 target: the warning was deserved
    assert err < 3 * ss.evanescent_bound


def test_guard_rails_and_refusals():
    with pytest.warns(ConcatenationWarning) as rec:
        segment_smatrices(HGTE, A, 100.0, 60.0, [], energy=E, n_segments=1, seed=0,
                          buffer=0.0)
    text = " ".join(str(w.message) for w in rec)
    assert "214 nm" in text  # 4 x the 53.5 nm edge decay length
    assert "exp(-gap/l_ev) = 1" in text  # disorder reaching the segment ends
    with pytest.raises(ModelError, match="multiple of the lattice constant"):
        segment_smatrices(HGTE, A, 100.0, 62.0, [], energy=E, n_segments=1, seed=0)
    with pytest.raises(ModelError, match="leave no disorder"):
        segment_smatrices(HGTE, A, 220.0, 100.0, [], energy=E, n_segments=1, seed=0)
    with pytest.raises(TransportError, match="no propagating mode"), \
            pytest.warns(ConcatenationWarning, match="edge-state decay lengths"):
        # the finite-size gap of the edge states of a 100 nm strip at the Dirac point
        segment_smatrices(HGTE, A, 100.0, 60.0, [], energy=7.46, n_segments=1, seed=0,
                          buffer=10.0)


# --------------------------------------------------------------------------- long edges
@pytest.fixture(scope="module")
def anderson_pool():
    return segment_smatrices(HGTE, A, 220.0, 500.0, [Anderson(40.0)], energy=E,
                             n_segments=6, seed=5)


@pytest.fixture(scope="module")
def magnetic_pool():
    return segment_smatrices(HGTE, A, 220.0, 500.0,
                             [MagneticExchange(inplane=8.0, density=0.004, aligned=False)],
                             energy=E, n_segments=8, seed=6)


@pytest.mark.slow
def test_time_reversal_symmetric_disorder_keeps_100um_edges_quantised(anderson_pool):
    # Source: Kane and Mele, Phys. Rev. Lett. 95, 226801 (2005); Xu and Moore, Phys. Rev. B
    # 73, 045322 (2006): time-reversal-symmetric disorder cannot backscatter a helical edge
    # state into its Kramers partner (same edge, opposite spin). The two edges of a finite
    # strip are two Kramers pairs, though: scalar disorder can still reflect a right-mover
    # into the other edge's left-mover of the same spin, with an amplitude set by the overlap
    # of the edges (exp(-W / decay length)); that is what the width guard is about.
    pool = anderson_pool
    assert pool.buffer == 215.0  # auto: exp(-2 b / l_ev) <= 1e-6
    b = pool.basis
    same_edge = (b.left_y[:, None] < pool.width / 2) == (b.right_y[None, :] < pool.width / 2)
    assert np.abs(pool.r[:, same_edge]).max() < 1e-10  # Kramers partners: exactly zero
    leak = float(np.max(np.sum(np.abs(pool.r) ** 2, axis=(1, 2))))
    assert 0 < leak < 1e-5  # inter-edge reflection per segment of a 4-decay-length strip
    for mode in ("coherent", "incoherent"):
        ds = concatenated_conductance(pool, [2, 40, 200], 20, seed=1, mode=mode)
        assert float(ds["length"][-1]) == 100_000.0
        g = ds["conductance"].values
        # at most the classical sum of 200 segments' inter-edge reflections (x 2 for coherent
        # enhancement), far below any measurable deviation
        assert np.all(np.abs(2.0 - g) <= 2 * 200 * leak)
        assert float(ds["composition_error"].max()) < 1e-10
    seq = compose_coherent([pool.segment(k % pool.n_segments) for k in range(200)])
    assert np.abs(seq.r[same_edge]).max() < 1e-9  # the zero survives 200 compositions


@pytest.mark.slow
def test_magnetic_edges_to_100um_feed_the_lstar_estimator(magnetic_pool):
    from pipeline.analysis.lstar import longest_ballistic_length

    counts = [1, 2, 4, 10, 20, 40, 100, 200]
    ds = concatenated_conductance(magnetic_pool, counts, 200, seed=2, mode="coherent")
    inc = concatenated_conductance(magnetic_pool, counts, 200, seed=2, mode="incoherent")
    g, gi = ds["conductance_mean"].values, inc["conductance_mean"].values
    assert float(ds["composition_error"].max()) < 1e-9
    assert ds.attrs["quantised"] == 2.0
    assert g[0] < 2.0 - 1e-3 and np.all(np.diff(g) < 0)  # backscattering accumulates
    # Source: Beenakker, Rev. Mod. Phys. 69, 731 (1997), from memory: phase coherence
    # (localisation) lowers the conductance of long disordered wires below the classical
    # series value, which falls off only as 1/L.
    assert g[-1] < gi[-1]
    lst = longest_ballistic_length(lstar_dataset(ds), "G(L,R)", point={},
                                   quantised=ds.attrs["quantised"],
                                   bootstrap_resamples=50)
    assert np.isfinite(lst.incoherent.value) and lst.incoherent.value > 0


def test_sequences_do_not_depend_on_batching_or_sweep():
    rng = np.random.default_rng(11)
    chain = [_random_smatrix(rng, 2) for _ in range(5)]
    pool = _fake_pool(chain)
    a = concatenated_conductance(pool, [3, 8], 30, seed=4)
    b = concatenated_conductance(pool, [8], 50, seed=4)
    np.testing.assert_allclose(a["conductance"].sel(length=8 * pool.segment_length),
                               b["conductance"].isel(length=0, sequence=slice(0, 30)),
                               rtol=1e-12)
    c = concatenated_conductance(pool, [3, 8], 30, seed=4, batch_bytes=1)  # one per batch
    np.testing.assert_allclose(a["conductance"].values, c["conductance"].values, rtol=1e-12)
    # prefix composition equals composing the drawn sequence directly
    idx = draw_sequences(4, 30, 8, pool.n_segments)
    direct = compose_coherent([pool.segment(k) for k in idx[7, :3]]).conductance()
    assert a["conductance"].values[0, 7] == pytest.approx(direct, rel=1e-12)


def _fake_pool(chain):
    m = chain[0].n_left
    basis = ModeBasis(np.eye(4, m), np.zeros(m), np.eye(4, m), np.zeros(m), np.zeros(m),
                      np.zeros(m), np.zeros(m), np.zeros(m))
    return SegmentSet(*(np.stack([getattr(s, k) for s in chain]) for k in ("r", "t", "tp", "rp")),
                      kwant_unitarity=np.zeros(len(chain)), basis=basis, material=HGTE,
                      lattice_constant=A, width=20.0, segment_length=100.0, buffer=10.0,
                      energy=E, b_perp=0.0, disorder=(), strength=1.0, seed=0,
                      first_realisation=0)


# --------------------------------------------------------------------------- statistics
@pytest.mark.slow
def test_concatenated_and_direct_ensembles_agree():
    # Reference: direct Kwant solves of 1.2 um strips with the same disorder model (dilute
    # in-plane magnetic impurities: S_z broken, the helical edges backscatter), disorder drawn
    # over the whole strip with independent realisations.
    terms = [MagneticExchange(inplane=15.0, density=0.004, aligned=False)]
    pool = segment_smatrices(HGTE, A, 220.0, 400.0, terms, energy=E, n_segments=64,
                             seed=11, buffer=100.0, evanescent_tolerance=2e-3)
    conc = concatenated_conductance(pool, [3], 2000, seed=5, pool_resamples=100)
    g_conc = float(conc["conductance_mean"][0])
    sem_conc = float(conc["conductance_sem_pool"][0])
    direct = direct_conductance(pool, 3, 80, seed=999)["conductance"].values[0]
    g_dir, sem_dir = direct.mean(), direct.std(ddof=1) / np.sqrt(direct.size)
    assert g_dir < 1.8  # backscattering is real: the comparison is not of two quantised values
    assert abs(g_conc - g_dir) < 3 * np.hypot(sem_conc, sem_dir)


# --------------------------------------------------------------------------- contacts, storage
def test_doped_contacts_compose_like_the_direct_device(tmp_path):
    # Reference: Kwant's direct solve of the clean strip between two doped leads. The two
    # doped interfaces are 2 x 20 nm + 2 x 300 nm = 640 nm apart, ~29 l_ev, so the
    # evanescent coupling the composition drops is ~exp(-29) (the brief check at 240 nm gave
    # a 2.5e-6 difference, as expected from exp(-11)).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConcatenationWarning)
        pool = segment_smatrices(HGTE, A, 100.0, 300.0, [], energy=E, n_segments=1, seed=0,
                                 buffer=20.0, contact_doping=25.0)
        direct = direct_conductance(pool, 2, 1, seed=1)
    assert pool.contact_left.n_left > pool.n_modes  # the metallic lead has many modes
    ds = concatenated_conductance(pool, [2], 1, seed=0)
    assert float(ds["conductance"][0, 0]) == pytest.approx(float(direct["conductance"][0, 0]),
                                                           abs=1e-7)
    # Source: Koenig et al., Science 318, 766 (2007): the ideal value is 2 e^2/h; metallic
    # contacts reflect a little at the doped/undoped interfaces
    assert ds.attrs["quantised"] == 2.0
    assert 1.9 < float(ds["conductance"][0, 0]) < 2.0
    back = load_segments(_saved(pool, tmp_path))
    for side in ("contact_left", "contact_right"):
        np.testing.assert_array_equal(getattr(back, side).matrix(), getattr(pool, side).matrix())


def _saved(pool, tmp_path):
    path = str(tmp_path / "pool.zarr")
    save_segments(pool, path)
    return path


def test_save_and_load_round_trip(tmp_path, magnetic_pool):
    import zarr

    root = zarr.open_group(str(tmp_path / "store.zarr"), mode="a")
    group = save_segments(magnetic_pool, root)
    for name, arr in group.arrays():  # plain real data, checksummed, as in the sample store
        assert arr.dtype.kind in "fiub", (name, arr.dtype)
        assert "Crc32cCodec" in {type(c).__name__ for c in arr.metadata.codecs}
    assert group["r"].shape == magnetic_pool.r.shape + (2,)
    back = load_segments(str(tmp_path / "store.zarr"))
    for k in ("r", "t", "tp", "rp", "kwant_unitarity"):
        assert np.array_equal(getattr(back, k), getattr(magnetic_pool, k))
    assert back.basis.max_difference(magnetic_pool.basis) == 0.0
    assert back.disorder == magnetic_pool.disorder and back.material == magnetic_pool.material
    assert back.buffer == magnetic_pool.buffer
    with pytest.raises(StoreError, match="overwrite=True"):
        save_segments(magnetic_pool, root)
    with pytest.raises(StoreError, match="no segment pool"):
        load_segments(root, name="other")


def test_pool_in_parts_equals_pool_in_one_go():
    kw = dict(energy=E, seed=3, buffer=50.0)
    terms = [MagneticExchange(inplane=20.0, density=0.01, aligned=False)]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConcatenationWarning)
        whole = segment_smatrices(HGTE, A, 100.0, 200.0, terms, n_segments=3, **kw)
        parts = [segment_smatrices(HGTE, A, 100.0, 200.0, terms, n_segments=n,
                                   first_realisation=f, **kw) for f, n in ((2, 1), (0, 2))]
    merged = merge_segments(parts)
    np.testing.assert_allclose(merged.t, whole.t, atol=1e-12)
    np.testing.assert_allclose(merged.r, whole.r, atol=1e-12)
    with pytest.raises(TransportError, match="not contiguous"):
        merge_segments([parts[0], parts[0]])
