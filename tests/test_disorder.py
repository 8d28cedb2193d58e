"""Disorder realisations: hashing, statistics of every term, reproducibility and validation."""

from types import SimpleNamespace

import numpy as np
import pytest
import shapely
from scipy import stats
from shapely.geometry import LineString, Polygon, box

import pipeline.physics.disorder as dis
from pipeline.errors import ModelError
from pipeline.physics.bhz import exchange_matrices


def _square_mesh(ni: int, nj: int, a: float = 1.0, i0: int = 0, j0: int = 0):
    ii, jj = np.meshgrid(np.arange(i0, i0 + ni), np.arange(j0, j0 + nj), indexing="ij")
    tags = np.stack([ii.ravel(), jj.ravel()], axis=1)
    return SimpleNamespace(tags=tags, positions=(tags + 0.5) * a, lattice_constant=a)


def _outline_mesh(outline, a: float):
    minx, miny, maxx, maxy = outline.bounds
    ii, jj = np.meshgrid(np.arange(int(minx / a) - 1, int(maxx / a) + 1),
                         np.arange(int(miny / a) - 1, int(maxy / a) + 1), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    keep = shapely.contains_xy(outline, (ii + 0.5) * a, (jj + 0.5) * a)
    tags = np.stack([ii[keep], jj[keep]], axis=1)
    return SimpleNamespace(tags=tags, positions=(tags + 0.5) * a, lattice_constant=a)


def _subset(mesh, index):
    return SimpleNamespace(tags=mesh.tags[index], positions=mesh.positions[index],
                           lattice_constant=mesh.lattice_constant)


# --------------------------------------------------------------------------- hashing


def testhash_uniform_is_uniform_on_unit_interval():
    rng_free_i = np.arange(-50_000, 50_000)  # includes negative tags
    u = dis.hash_uniform(12345, 0, 0, rng_free_i, 7)
    assert u.shape == (100_000,)
    assert u.min() >= 0.0 and u.max() < 1.0
    assert stats.kstest(u, stats.uniform.cdf).pvalue > 1e-3
    # Lattice-like key patterns (a 2-D block of small tags) are uniform too.
    ii, jj = np.meshgrid(np.arange(-150, 150), np.arange(-150, 150))
    assert stats.kstest(dis.hash_uniform(0, 0, 0, ii, jj).ravel(), "uniform").pvalue > 1e-3


def testhash_normal_is_standard_normal():
    z = dis.hash_normal(3, 1, 2, np.arange(100_000), -4)
    assert stats.kstest(z, "norm").pvalue > 1e-3
    assert abs(z.mean()) < 0.02 and abs(z.var() - 1.0) < 0.03


@pytest.mark.parametrize(
    "other",
    [
        dict(seed=2), dict(stream=1), dict(realisation=1), dict(sub=1),
        dict(shift_i=1), dict(shift_j=1), dict(swap=True),
    ],
)
def test_hash_streams_are_uncorrelated(other):
    i = np.repeat(np.arange(-160, 160), 320)
    j = np.tile(np.arange(-160, 160), 320)
    base = dict(seed=1, stream=0, realisation=0, sub=0)
    u0 = dis.hash_uniform(1, 0, 0, i, j)
    key = {**base, **{k: v for k, v in other.items() if k in base}}
    ii = i + other.get("shift_i", 0)
    jj = j + other.get("shift_j", 0)
    if other.get("swap"):
        ii, jj = jj, ii
    u1 = dis.hash_uniform(key["seed"], key["stream"], key["realisation"], ii, jj,
                          sub=key["sub"])
    # 1e5 pairs: the standard error of the correlation coefficient is 0.003.
    assert abs(np.corrcoef(u0, u1)[0, 1]) < 0.015
    differs = (i != j) if other.get("swap") else np.ones(len(i), bool)  # swap keeps i == j
    assert np.mean(u0[differs] == u1[differs]) < 1e-3


def test_uniform_and_normal_of_same_key_are_independent():
    i = np.arange(100_000)
    u = dis.hash_uniform(5, 0, 0, i, 0)
    z = dis.hash_normal(5, 0, 0, i, 0)
    assert abs(stats.spearmanr(u, z).statistic) < 0.015


def test_hash_depends_only_on_the_key_not_on_order_or_subset():
    rng = np.random.default_rng(0)
    i = rng.integers(-10**6, 10**6, 2000)
    j = rng.integers(-10**6, 10**6, 2000)
    full = dis.hash_uniform(9, 3, 17, i, j)
    perm = rng.permutation(2000)
    np.testing.assert_array_equal(dis.hash_uniform(9, 3, 17, i[perm], j[perm]), full[perm])
    np.testing.assert_array_equal(dis.hash_uniform(9, 3, 17, i[:10], j[:10]), full[:10])
    assert dis.hash_uniform(9, 3, 17, int(i[5]), int(j[5])) == full[5]
    # Integer width of the tags does not matter.
    np.testing.assert_array_equal(
        dis.hash_normal(9, 3, 17, i.astype(np.int32), j.astype(np.int32)),
        dis.hash_normal(9, 3, 17, i, j),
    )


def test_hash_rejects_non_integer_tags():
    with pytest.raises(ModelError, match="integers"):
        dis.hash_uniform(0, 0, 0, np.array([0.5]), np.array([1]))


# --------------------------------------------------------------------------- Anderson


def test_anderson_statistics_and_bounds():
    mesh = _square_mesh(300, 300, a=2.0, i0=-150)
    sample = dis.Anderson(20.0).sample(mesh, seed=1, realisation=0, stream=0)
    v = sample.potential
    assert sample.exchange is None and sample.onsite_extra() is None
    assert v.min() >= -10.0 and v.max() < 10.0
    assert abs(v.mean()) < 0.1
    assert v.var() == pytest.approx(20.0**2 / 12, rel=0.02)
    assert stats.kstest(v, stats.uniform(loc=-10, scale=20).cdf).pvalue > 1e-3


def test_anderson_site_value_independent_of_order_subset_and_other_sites():
    mesh = _square_mesh(40, 30, a=1.0)
    term = dis.Anderson(5.0)
    full = term.sample(mesh, seed=4, realisation=2, stream=1).potential
    rng = np.random.default_rng(1)
    idx = rng.permutation(len(mesh.tags))[:300]
    part = term.sample(_subset(mesh, idx), seed=4, realisation=2, stream=1).potential
    np.testing.assert_array_equal(part, full[idx])
    other = term.sample(mesh, seed=4, realisation=3, stream=1).potential
    assert not np.allclose(other, full)


# --------------------------------------------------------------------------- smooth potential


def test_smooth_potential_variance_and_correlation():
    xi, amp, a = 4.0, 3.0, 1.0
    mesh = _square_mesh(160, 160, a=a)
    term = dis.SmoothPotential(amp, xi)
    fields = np.stack([
        term.sample(mesh, seed=11, realisation=r, stream=0).potential.reshape(160, 160)
        for r in range(30)
    ])
    assert fields.var() == pytest.approx(amp**2, rel=0.05)
    assert abs(fields.mean()) < 0.05 * amp
    for r in (xi, 2 * xi):
        d = int(r / a)
        c_x = np.mean(fields[:, d:, :] * fields[:, :-d, :]) / amp**2
        c_y = np.mean(fields[:, :, d:] * fields[:, :, :-d]) / amp**2
        expected = np.exp(-(r**2) / (2 * xi**2))
        assert abs(c_x - expected) < 0.05 and abs(c_y - expected) < 0.05
    # Diagonal separation: isotropy of the correlation function.
    c_diag = np.mean(fields[:, 3:, 3:] * fields[:, :-3, :-3]) / amp**2
    assert abs(c_diag - np.exp(-18 / (2 * xi**2))) < 0.05


def test_smooth_potential_does_not_depend_on_device_shape():
    term = dis.SmoothPotential(2.0, 3.0)
    big = _square_mesh(60, 50, a=2.0, i0=-20, j0=-5)
    full = term.sample(big, seed=7, realisation=5, stream=2).potential
    # An L-shaped subset listed in shuffled order, with a different bounding box.
    keep = np.flatnonzero((big.tags[:, 0] < 0) | (big.tags[:, 1] > 30))
    keep = np.random.default_rng(2).permutation(keep)
    part = term.sample(_subset(big, keep), seed=7, realisation=5, stream=2).potential
    np.testing.assert_allclose(part, full[keep], rtol=0, atol=1e-10)


def test_smooth_potential_refuses_subgrid_correlation_length():
    mesh = _square_mesh(5, 5, a=2.0)
    with pytest.raises(ModelError, match="use Anderson disorder"):
        dis.SmoothPotential(1.0, 0.9).sample(mesh, seed=0, realisation=0, stream=0)


def test_smooth_potential_refuses_a_huge_grid():
    mesh = _square_mesh(2, 2, a=1.0)
    with pytest.raises(ModelError, match="shorter correlation length"):
        dis.SmoothPotential(1.0, 1e4).sample(mesh, seed=0, realisation=0, stream=0)


# --------------------------------------------------------------------------- magnetic


def test_magnetic_density_azimuth_and_magnitude():
    a = 2.0
    mesh = _square_mesh(250, 200, a=a)
    term = dis.MagneticExchange(inplane=3.0, out_of_plane=-1.5, density=0.05)
    m = term.sample(mesh, seed=2, realisation=0, stream=0).exchange
    magnetic = np.any(m != 0, axis=1)
    p = 0.05 * a * a
    n = len(m)
    assert abs(magnetic.mean() - p) < 4 * np.sqrt(p * (1 - p) / n)
    mm = m[magnetic]
    np.testing.assert_allclose(np.hypot(mm[:, 0], mm[:, 1]), 3.0)
    np.testing.assert_array_equal(mm[:, 2], -1.5)  # aligned: one sign everywhere
    azimuth = np.mod(np.arctan2(mm[:, 1], mm[:, 0]), 2 * np.pi) / (2 * np.pi)
    assert stats.kstest(azimuth, "uniform").pvalue > 1e-3


def test_magnetic_random_sign_and_every_site():
    mesh = _square_mesh(100, 100)
    m = dis.MagneticExchange(out_of_plane=2.0, aligned=False).sample(
        mesh, seed=0, realisation=1, stream=3).exchange
    assert np.all(np.abs(m[:, 2]) == 2.0)
    assert abs(np.mean(m[:, 2] > 0) - 0.5) < 0.02
    np.testing.assert_array_equal(m[:, :2], 0.0)
    assert dis.conserves_sz([dis.MagneticExchange(out_of_plane=2.0, aligned=False)])
    assert not dis.conserves_sz([dis.Anderson(1.0), dis.MagneticExchange(inplane=0.1)])


def test_magnetic_onsite_extra_matches_exchange_matrices():
    mesh = _square_mesh(10, 10)
    sample = dis.MagneticExchange(1.0, 0.5).sample(mesh, seed=1, realisation=0, stream=0)
    extra = sample.onsite_extra(strength=2.0)
    np.testing.assert_allclose(extra, exchange_matrices(2.0 * sample.exchange))
    np.testing.assert_allclose(extra, extra.conj().swapaxes(-1, -2))
    with pytest.raises(ValueError):
        sample.exchange[0, 0] = 1.0  # samples are read-only


def test_magnetic_refuses_more_than_one_impurity_per_site():
    mesh = _square_mesh(4, 4, a=2.0)
    with pytest.raises(ModelError, match="impurities per site"):
        dis.MagneticExchange(1.0, density=0.3).sample(mesh, seed=0, realisation=0, stream=0)


# --------------------------------------------------------------------------- edge roughness


def _strip():
    outline = box(0.0, 0.0, 400.0, 300.0)
    contacts = (LineString([(0, 300), (0, 0)]), LineString([(400, 0), (400, 300)]))
    return outline, contacts, _outline_mesh(outline, 2.0)


def test_edge_roughness_keeps_contact_interfaces_and_grows_with_amplitude():
    outline, contacts, mesh = _strip()
    x, y = mesh.positions.T
    next_to_contact = (x < 2.0) | (x > 398.0)
    fractions = []
    for amp in (2.0, 6.0, 12.0):
        term = dis.EdgeRoughness(amp, 15.0)
        walled_any = np.zeros(len(x), bool)
        total = 0
        for r in range(3):
            s = term.sample(mesh, seed=3, realisation=r, stream=0, outline=outline,
                            contacts=contacts)
            np.testing.assert_array_equal(s.potential, np.where(s.walled, 1e4, 0.0))
            walled_any |= s.walled
            total += s.walled.sum()
        assert not walled_any[next_to_contact].any()
        # Only the free (top and bottom) edges erode, never the bulk.
        assert not walled_any[(y > 3 * amp + 20) & (y < 300 - 3 * amp - 20)].any()
        fractions.append(total / (3 * len(x)))
    assert 0 < fractions[0] < fractions[1] < fractions[2]


def test_edge_roughness_mean_depth_is_the_amplitude():
    outline, contacts, mesh = _strip()
    a, amp = 2.0, 8.0
    x, y = mesh.positions.T
    middle = (x > 100) & (x < 300)
    n_columns = len(np.unique(x[middle]))
    depths = []
    for r in range(20):
        s = dis.EdgeRoughness(amp, 5.0).sample(mesh, seed=21, realisation=r, stream=1,
                                               outline=outline, contacts=contacts)
        depths.append(s.walled[middle].sum() * a / (2 * n_columns))
    # E[max(0, A (1 + g))] = A (phi(1) + Phi(1)) for a standard normal g.
    expected = amp * (stats.norm.pdf(1.0) + stats.norm.cdf(1.0))
    # 20 realisations of 2 x 200 nm of edge: the standard error is about 3 %.
    assert np.mean(depths) == pytest.approx(expected, rel=0.12)


def test_edge_roughness_strength_scales_depth_not_wall():
    outline, contacts, mesh = _strip()
    term = dis.EdgeRoughness(10.0, 20.0, wall_potential=5e3)
    zero = term.sample(mesh, seed=0, realisation=0, stream=0, strength=0.0, outline=outline,
                       contacts=contacts)
    assert not zero.walled.any() and not zero.potential.any()
    half = term.sample(mesh, seed=0, realisation=0, stream=0, strength=0.5, outline=outline,
                       contacts=contacts)
    full = term.sample(mesh, seed=0, realisation=0, stream=0, outline=outline,
                       contacts=contacts)
    assert set(np.unique(half.potential)) == {0.0, 5e3}
    assert 0 < half.walled.sum() < full.walled.sum()
    assert not (half.walled & ~full.walled).any()  # erosion is monotonic in strength
    pot, extra = dis.realise([term], mesh, seed=0, realisation=0, strength=0.5,
                             outline=outline, contacts=contacts)
    np.testing.assert_array_equal(pot, half.potential)
    assert extra is None


def test_edge_roughness_erodes_holes_and_needs_the_outline():
    ring = Polygon([(0, 0), (200, 0), (200, 200), (0, 200)], [[(70, 70), (130, 70),
                                                            (130, 130), (70, 130)]])
    contacts = (LineString([(0, 0), (0, 200)]), LineString([(200, 0), (200, 200)]))
    mesh = _outline_mesh(ring, 2.0)
    term = dis.EdgeRoughness(6.0, 10.0)
    s = term.sample(mesh, seed=5, realisation=0, stream=0, outline=ring, contacts=contacts)
    hole_dist = shapely.distance(ring.interiors[0], shapely.points(mesh.positions))
    assert s.walled[hole_dist < 3].mean() > 0.5
    with pytest.raises(ModelError, match="outline"):
        term.sample(mesh, seed=5, realisation=0, stream=0)
    with pytest.raises(ModelError, match="does not lie on the outline"):
        term.sample(mesh, seed=5, realisation=0, stream=0, outline=ring,
                    contacts=(LineString([(50, 50), (50, 150)]),))
    # Contact objects with a `segment` attribute are accepted as well.
    wrapped = [SimpleNamespace(segment=c) for c in contacts]
    s2 = term.sample(mesh, seed=5, realisation=0, stream=0, outline=ring, contacts=wrapped)
    np.testing.assert_array_equal(s2.walled, s.walled)


# --------------------------------------------------------------------------- realise


def test_realise_streams_strength_and_order_independence():
    mesh = _square_mesh(40, 40, a=2.0, i0=-10)
    terms = [dis.Anderson(10.0), dis.SmoothPotential(3.0, 6.0)]
    pot, extra = dis.realise(terms, mesh, seed=8, realisation=4)
    assert extra is None
    a0 = terms[0].sample(mesh, seed=8, realisation=4, stream=0).potential
    s1 = terms[1].sample(mesh, seed=8, realisation=4, stream=1).potential
    np.testing.assert_allclose(pot, a0 + s1)
    # Appending a term leaves the earlier ones unchanged.
    more = terms + [dis.MagneticExchange(inplane=1.0, out_of_plane=0.5, density=0.1)]
    pot3, extra3 = dis.realise(more, mesh, seed=8, realisation=4)
    np.testing.assert_allclose(pot3, pot)
    assert extra3.shape == (len(mesh.tags), 4, 4)
    # Strength multiplies every scalar and exchange contribution.
    pot_h, extra_h = dis.realise(more, mesh, seed=8, realisation=4, strength=0.25)
    np.testing.assert_allclose(pot_h, 0.25 * pot3, atol=1e-12)
    np.testing.assert_allclose(extra_h, 0.25 * extra3, atol=1e-12)
    # Two terms of the same kind are independent (different streams).
    twin, _ = dis.realise([dis.Anderson(10.0), dis.Anderson(10.0)], mesh, seed=8,
                          realisation=4)
    assert not np.allclose(twin, 2 * a0)
    # Listing the sites in another order permutes the result.
    perm = np.random.default_rng(3).permutation(len(mesh.tags))
    pot_p, extra_p = dis.realise(more, _subset(mesh, perm), seed=8, realisation=4)
    np.testing.assert_allclose(pot_p, pot3[perm], atol=1e-10)
    np.testing.assert_allclose(extra_p, extra3[perm], atol=1e-12)


def test_describe_and_conserves_sz():
    terms = [dis.Anderson(20.0), dis.SmoothPotential(5.0, 30.0),
             dis.MagneticExchange(out_of_plane=1.0, density=0.002),
             dis.EdgeRoughness(4.0, 25.0)]
    text = dis.describe(terms)
    for fragment in ("U = 20 meV", "5 meV", "30 nm", "0.002 nm^-2", "4 nm", "25 nm"):
        assert fragment in text
    assert text.count(".") == 1 + text.count("0.") and text.endswith(".")
    assert dis.describe([]) == "No disorder was included."
    assert dis.conserves_sz(terms)


@pytest.mark.parametrize(
    "make, match",
    [
        (lambda: dis.Anderson(-1.0), "width"),
        (lambda: dis.Anderson(float("nan")), "finite"),
        (lambda: dis.SmoothPotential(1.0, 0.0), "correlation_length"),
        (lambda: dis.SmoothPotential(-1.0, 5.0), "amplitude"),
        (lambda: dis.MagneticExchange(inplane=-1.0), "inplane"),
        (lambda: dis.MagneticExchange(1.0, density=0.0), "density"),
        (lambda: dis.MagneticExchange(1.0, aligned="yes"), "aligned"),
        (lambda: dis.EdgeRoughness(-2.0, 10.0), "amplitude"),
        (lambda: dis.EdgeRoughness(2.0, 0.0), "correlation_length"),
        (lambda: dis.EdgeRoughness(2.0, 10.0, wall_potential=0.0), "wall_potential"),
    ],
)
def test_invalid_fields_are_refused(make, match):
    with pytest.raises(ModelError, match=match):
        make()


def test_invalid_calls_are_refused():
    mesh = _square_mesh(4, 4)
    with pytest.raises(ModelError, match="seed"):
        dis.realise([dis.Anderson(1.0)], mesh, seed=-1, realisation=0)
    with pytest.raises(ModelError, match="realisation"):
        dis.realise([dis.Anderson(1.0)], mesh, seed=0, realisation=1.5)
    with pytest.raises(ModelError, match="strength"):
        dis.realise([dis.Anderson(1.0)], mesh, seed=0, realisation=0, strength=-1.0)
    with pytest.raises(ModelError, match="not a disorder term"):
        dis.realise(["anderson"], mesh, seed=0, realisation=0)
    shifted = SimpleNamespace(tags=mesh.tags, positions=mesh.tags * 1.0, lattice_constant=1.0)
    with pytest.raises(ModelError, match=r"\(i \+ 1/2\) a"):
        dis.realise([dis.Anderson(1.0)], shifted, seed=0, realisation=0)
