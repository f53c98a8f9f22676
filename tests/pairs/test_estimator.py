"""Pair engine: compiled kernel against a slow numpy pair loop, edge cases, the toy-pair sign check."""

import numpy as np
import pytest
from scipy.spatial import cKDTree

from pairvel.core.constants import C_KM_S, T_CMB_UK
from pairvel.core.errors import InputError
from pairvel.pairs import _kernels
from pairvel.pairs.estimator import mean_pairwise_velocity_3d, pairwise_momentum, pairwise_momentum_cross
from pairvel.pairs.geometry import unit_vectors
from pairvel.pairs.pathcost import estimate_pairs, path_costs


def reference(pos, temps, edges, regions=None, z=None, weights=None):
    """Slow O(N^2) numpy version of the estimator, written straight from the formula
    (pairs weighted by w_i w_j when weights are given)."""
    temps = np.atleast_2d(temps)
    n = pos.shape[0]
    i, j = np.triu_indices(n, 1)
    d = pos[i] - pos[j]
    r = np.linalg.norm(d, axis=1)
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        c = np.einsum("ij,ij->i", d, u[i] + u[j]) / (2 * r)
    wij = np.ones_like(r) if weights is None else weights[i] * weights[j]
    b = np.searchsorted(edges, r, side="right") - 1
    ok = (b >= 0) & (b < edges.size - 1) & (r > 0)
    nb = edges.size - 1

    def sums(sel):
        den = np.bincount(b[sel], weights=(wij * c**2)[sel], minlength=nb)
        num = np.array([np.bincount(b[sel], weights=(wij * (t[i] - t[j]) * c)[sel], minlength=nb) for t in temps])
        return num, den

    num, den = sums(ok)
    out = {"num": num, "den": den, "cnt": np.bincount(b[ok], minlength=nb)}
    with np.errstate(invalid="ignore", divide="ignore"):
        out["p"] = -num / den
        if z is not None:
            out["z"] = np.bincount(b[ok], weights=(wij * c**2 * 0.5 * (z[i] + z[j]))[ok], minlength=nb) / den
        if regions is not None:
            jk = []
            for k in range(regions.max() + 1):
                num_k, den_k = sums(ok & (regions[i] != k) & (regions[j] != k))
                jk.append(-num_k / den_k)
            out["jk"] = np.array(jk)
    return out


def sky(n, seed, ra_range=(0, 60), dec_range=(-20, 20), dist=(800, 1100)):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(*ra_range, n)
    dec = np.degrees(np.arcsin(rng.uniform(*np.sin(np.radians(dec_range)), n)))
    return unit_vectors(ra, dec) * rng.uniform(*dist, n)[:, None], rng


@pytest.mark.parametrize("edges", [np.linspace(0, 150, 16), np.array([5.0, 12.0, 30.0, 31.0, 80.0, 140.0])])
@pytest.mark.parametrize("m_sets", [1, 3])
@pytest.mark.parametrize("method", ["direct", "linear"])
@pytest.mark.parametrize("weighted", [False, True])
def test_kernel_matches_numpy_pair_loop(edges, m_sets, method, weighted):
    pos, rng = sky(1500, 11)
    temps = rng.normal(0, 20, (m_sets, 1500)) if m_sets > 1 else rng.normal(0, 20, 1500)
    regions = rng.integers(0, 7, 1500)
    z = rng.uniform(0.2, 0.4, 1500)
    w = rng.uniform(0.0, 3.0, 1500) if weighted else None
    res = pairwise_momentum(pos, temps, edges, regions=regions, redshifts=z, weights=w, method=method)
    ref = reference(pos, temps, edges, regions, z, weights=w)
    # reference: slow numpy loop over all pairs (analytic formula of Ferreira et al. 1999)
    np.testing.assert_array_equal(res.pair_counts, ref["cnt"])
    np.testing.assert_allclose(res.denominator, ref["den"], rtol=1e-10)
    np.testing.assert_allclose(np.atleast_2d(res.numerator), ref["num"], rtol=1e-10)
    np.testing.assert_allclose(np.atleast_2d(res.p), ref["p"], rtol=1e-10)
    np.testing.assert_allclose(res.z_eff, ref["z"], rtol=1e-10)
    jk = res.p_jk if m_sets > 1 else res.p_jk[None]
    np.testing.assert_allclose(np.moveaxis(jk, 0, 1), ref["jk"], rtol=1e-10)
    assert res.p.shape == ((edges.size - 1,) if m_sets == 1 else (m_sets, edges.size - 1))


def test_toy_pair_sign_and_value():
    """SCIENCE.md toy check [calc]: r_i = 1000, r_j = 1040 Mpc, theta = 0.01 rad, v12 = -300 km/s,
    tau = 1e-4 gives p = tau T_CMB v12 / c = -0.27274 uK."""
    theta = 0.01
    xi = np.array([1000.0, 0, 0])
    xj = 1040.0 * np.array([np.cos(theta), np.sin(theta), 0])
    rhat = (xi - xj) / np.linalg.norm(xi - xj)
    v12, tau = -300.0, 1e-4
    vi, vj = +v12 / 2 * rhat, -v12 / 2 * rhat
    vr = np.array([vi @ xi / 1000.0, vj @ xj / 1040.0])
    temps = -tau * T_CMB_UK * vr / C_KM_S
    res = pairwise_momentum(np.array([xi, xj]), temps, [0.0, 100.0])
    np.testing.assert_allclose(res.p[0], -0.27274, rtol=2e-5)  # [calc] SCIENCE.md toy check
    np.testing.assert_allclose(res.p[0], tau * T_CMB_UK * v12 / C_KM_S, rtol=1e-12)  # analytic
    # the 3D mean pairwise velocity of the same pair is v12 exactly (analytic)
    v3d, cnt = mean_pairwise_velocity_3d(np.array([xi, xj]), np.array([vi, vj]), [0.0, 100.0])
    np.testing.assert_allclose(v3d[0], v12, rtol=1e-12)
    assert cnt[0] == 1


@pytest.mark.parametrize("method", ["direct", "linear"])
def test_edge_cases_match_reference(method):
    rng = np.random.default_rng(5)
    n = 400
    ra = np.concatenate([rng.uniform(358, 360, n // 4), rng.uniform(0, 2, n // 4), rng.uniform(0, 360, n // 2)])
    dec = np.concatenate([rng.uniform(-3, 3, n // 2), rng.uniform(88, 90, n // 4), rng.uniform(-90, -88, n // 4)])
    pos = unit_vectors(ra, dec) * rng.uniform(500, 520, n)[:, None]
    pos[10] = pos[11]  # a duplicate position: never a pair with itself-like twin
    temps = rng.normal(size=n)
    edges = np.array([2.0, 10.0, 25.0, 40.0])  # not starting at zero
    regions = (ra // 90).astype(int) + 4 * (dec > 45)
    res = pairwise_momentum(pos.astype(np.float32), temps.astype(np.float32), edges, regions=regions, method=method)
    ref = reference(pos.astype(np.float32).astype(float), temps.astype(np.float32).astype(float), edges, regions)
    np.testing.assert_array_equal(res.pair_counts, ref["cnt"])
    np.testing.assert_allclose(res.p, ref["p"][0], rtol=1e-10)
    np.testing.assert_allclose(res.p_jk, ref["jk"][:, 0], rtol=1e-10)


@pytest.mark.parametrize("method", ["direct", "linear"])
def test_single_object_and_empty_bins(method):
    res = pairwise_momentum(np.array([[1000.0, 0, 0]]), np.array([3.0]), [0, 10, 20], method=method)
    assert np.all(np.isnan(res.p)) and np.all(res.pair_counts == 0)
    pos = np.array([[1000.0, 0, 0], [1005.0, 0, 0]])
    res = pairwise_momentum(pos, np.array([1.0, 2.0]), [0, 1, 10, 20], method=method)
    assert np.isnan(res.p[0]) and np.isfinite(res.p[1]) and np.isnan(res.p[2])
    np.testing.assert_array_equal(res.pair_counts, [0, 1, 0])


def test_many_sets_equal_single_calls_and_threads_agree():
    pos, rng = sky(3000, 2)
    temps = rng.normal(size=(4, 3000))
    edges = np.linspace(0, 100, 11)
    many = pairwise_momentum(pos, temps, edges, n_threads=2)
    for m in range(4):
        one = pairwise_momentum(pos, temps[m], edges, n_threads=1)
        np.testing.assert_allclose(many.p[m], one.p, rtol=1e-12)  # linearity / thread independence


def test_bad_inputs():
    pos = np.zeros((3, 3)) + [[1000, 0, 0]]
    with pytest.raises(InputError, match=r"positions must have shape \(N, 3\)"):
        pairwise_momentum(np.zeros((3, 2)), np.zeros(3), [0, 1])
    with pytest.raises(InputError, match=r"temperatures must have shape \(3,\) or \(M, 3\)"):
        pairwise_momentum(pos, np.zeros(4), [0, 1])
    with pytest.raises(InputError, match=r"temperatures must be finite; 1 tracers are not \(first: row 1\)"):
        pairwise_momentum(pos, np.array([0, np.nan, 0]), [0, 1])
    with pytest.raises(InputError, match=r"separation edges must be"):
        pairwise_momentum(pos, np.zeros(3), [0, 5, 5])


def test_cross_pairs_match_direct_cross_loop():
    pos_a, rng = sky(300, 21)
    pos_b, _ = sky(900, 22)
    pos_b[0] = pos_a[0]  # a shared position is never a pair
    ta, tb = rng.normal(size=(2, 300)), rng.normal(size=(2, 900))
    ra, rb = rng.integers(0, 5, 300), rng.integers(0, 5, 900)
    edges = np.linspace(0, 120, 7)
    res = pairwise_momentum_cross(pos_a, ta, pos_b, tb, edges, regions_a=ra, regions_b=rb)
    # direct numpy loop over all (a, b) pairs (analytic formula)
    d = pos_a[:, None, :] - pos_b[None, :, :]
    r = np.linalg.norm(d, axis=2)
    ua = pos_a / np.linalg.norm(pos_a, axis=1)[:, None]
    ub = pos_b / np.linalg.norm(pos_b, axis=1)[:, None]
    with np.errstate(invalid="ignore", divide="ignore"):
        c = np.einsum("ijk,ijk->ij", d, ua[:, None, :] + ub[None, :, :]) / (2 * r)
    b = np.searchsorted(edges, r, side="right") - 1
    ok = (b >= 0) & (b < 6) & (r > 0)
    den = np.bincount(b[ok], weights=c[ok] ** 2, minlength=6)
    num = np.array([np.bincount(b[ok], weights=((ta[m][:, None] - tb[m][None, :]) * c)[ok], minlength=6)
                    for m in range(2)])
    np.testing.assert_array_equal(res.pair_counts, np.bincount(b[ok], minlength=6))
    np.testing.assert_allclose(res.denominator, den, rtol=1e-10)
    np.testing.assert_allclose(res.p, -num / den, rtol=1e-9)
    keep = ok & (ra[:, None] != 3) & (rb[None, :] != 3)
    jk_den = np.bincount(b[keep], weights=c[keep] ** 2, minlength=6)
    jk_num = np.bincount(b[keep], weights=((ta[0][:, None] - tb[0][None, :]) * c)[keep], minlength=6)
    np.testing.assert_allclose(res.p_jk[0, 3], -jk_num / jk_den, rtol=1e-9)


def test_threads_give_identical_sums():
    """Fixed chunking: the sums do not depend on the thread count (internal regression, 1e-12)."""
    pos, rng = sky(4000, 8)
    temps = rng.normal(size=(2, 4000))
    regions = rng.integers(0, 5, 4000)
    edges = np.linspace(3, 90, 12)
    one = pairwise_momentum(pos, temps, edges, regions=regions, n_threads=1)
    two = pairwise_momentum(pos, temps, edges, regions=regions, n_threads=2)
    np.testing.assert_array_equal(one.pair_counts, two.pair_counts)
    np.testing.assert_allclose(one.p, two.p, rtol=1e-12, atol=0)
    np.testing.assert_allclose(one.p_jk, two.p_jk, rtol=1e-12, atol=0)


def test_mean_pairwise_velocity_matches_numpy_pair_loop():
    pos, rng = sky(1200, 13)
    vel = rng.normal(0, 300, (1200, 3))
    edges = np.array([4.0, 20.0, 45.0, 50.0, 110.0])
    v12, cnt = mean_pairwise_velocity_3d(pos, vel, edges)
    i, j = np.triu_indices(1200, 1)
    d = pos[i] - pos[j]
    r = np.linalg.norm(d, axis=1)
    proj = np.einsum("ij,ij->i", vel[i] - vel[j], d) / r
    b = np.searchsorted(edges, r, side="right") - 1
    ok = (b >= 0) & (b < 4)
    ref_cnt = np.bincount(b[ok], minlength=4)
    # reference: slow numpy loop over all pairs (analytic definition)
    np.testing.assert_array_equal(cnt, ref_cnt)
    np.testing.assert_allclose(v12, np.bincount(b[ok], weights=proj[ok], minlength=4) / ref_cnt, rtol=1e-10)


def test_sparse_wide_survey_uses_coarse_grid_and_stays_exact():
    """Few objects spread over a box far larger than r_max: the grid is coarsened (cells of side
    >= r_max, 13 forward neighbours) to bound memory; pairs must still all be found."""
    rng = np.random.default_rng(17)
    centres = rng.uniform(-4e4, 4e4, (30, 3))
    pos = (centres[:, None, :] + rng.normal(0, 3.0, (30, 20, 3))).reshape(-1, 3)  # tight groups
    temps = rng.normal(size=pos.shape[0])
    edges = np.linspace(0.5, 6.0, 5)
    from pairvel.pairs import _kernels
    _, start, _, rows = _kernels.build_cells(pos, edges[-1])
    assert rows.shape[0] == 5 and start.size - 1 <= 2**18  # coarse path taken: 13 neighbours in 5 rows
    res = pairwise_momentum(pos, temps, edges)
    ref = reference(pos, temps, edges)
    np.testing.assert_array_equal(res.pair_counts, ref["cnt"])
    np.testing.assert_allclose(res.p, ref["p"][0], rtol=1e-10)


@pytest.mark.parametrize("n_sub", [1, 2, 3])
def test_forward_rows_cover_every_neighbour_once(n_sub):
    """Each non-zero offset within reach appears exactly once, itself or its negative, and the
    z-rows hold exactly those offsets plus the cell itself (analytic)."""
    from pairvel.pairs._kernels import forward_offsets, forward_rows
    offs = {tuple(o) for o in forward_offsets(n_sub)}
    in_rows = [(dx, dy, dz) for dx, dy, z0, z1 in forward_rows(n_sub) for dz in range(z0, z1 + 1)]
    assert len(in_rows) == len(set(in_rows)) and set(in_rows) == offs | {(0, 0, 0)}
    reach = [(dx, dy, dz) for dx in range(-n_sub, n_sub + 1) for dy in range(-n_sub, n_sub + 1)
             for dz in range(-n_sub, n_sub + 1) if (dx, dy, dz) != (0, 0, 0)
             and sum(max(abs(o) - 1, 0) ** 2 for o in (dx, dy, dz)) < n_sub**2]
    for o in reach:
        assert (o in offs) != (tuple(-k for k in o) in offs)
    assert len(offs) == len(reach) // 2
    assert len(forward_offsets(1)) == 13


@pytest.mark.parametrize("n_sub", [1, 2, 3, 4])
def test_every_cell_refinement_matches_numpy_pair_loop(n_sub, monkeypatch):
    """The grid refinement (cells of side r_max / n_sub) is a speed choice only: same sums."""
    from pairvel.pairs import _kernels
    monkeypatch.setattr(_kernels, "choose_n_sub", lambda positions, r_max: n_sub)
    pos, rng = sky(1000, 31, ra_range=(350, 370), dec_range=(-10, 10), dist=(900, 1000))
    temps = rng.normal(0, 20, (2, 1000))
    regions = rng.integers(0, 4, 1000)
    edges = np.array([1.0, 15.0, 40.0, 41.0, 77.0])
    _, _, _, rows = _kernels.build_cells(pos, edges[-1])
    assert rows[-1, 3] == n_sub  # the requested grid was used (internal)
    res = pairwise_momentum(pos, temps, edges, regions=regions)
    ref = reference(pos, temps, edges, regions)
    # reference: slow numpy loop over all pairs (analytic formula)
    np.testing.assert_array_equal(res.pair_counts, ref["cnt"])
    np.testing.assert_allclose(res.p, ref["p"], rtol=1e-10)
    np.testing.assert_allclose(np.moveaxis(res.p_jk, 0, 1), ref["jk"], rtol=1e-10)


def test_linear_path_equals_direct_for_many_sets_offsets_and_sparse_regions(monkeypatch):
    # many sets with a large common offset (the linear path removes each set's mean first),
    # regions in spatial blocks so most tracers have partners in few other regions
    pos, rng = sky(4000, 31, ra_range=(0, 90))
    temps = rng.normal(0, 30, (40, 4000)) + 1e4
    regions = np.floor(np.degrees(np.arctan2(pos[:, 1], pos[:, 0])) / 9).astype(int)
    w = rng.uniform(0.5, 1.5, 4000)
    edges = np.linspace(0, 120, 13)
    kw = dict(regions=regions, weights=w, redshifts=np.linalg.norm(pos, axis=1) / 3000)
    a = pairwise_momentum(pos, temps, edges, method="direct", **kw)
    b = pairwise_momentum(pos, temps, edges, method="linear", **kw)
    np.testing.assert_array_equal(a.pair_counts, b.pair_counts)
    np.testing.assert_array_equal(a.denominator, b.denominator)   # same direct pass
    scale = np.abs(a.numerator).max()
    np.testing.assert_allclose(b.numerator, a.numerator, rtol=0, atol=1e-11 * scale)
    np.testing.assert_allclose(b.p_jk, a.p_jk, rtol=1e-9)
    monkeypatch.setattr("pairvel.pairs.pathcost.PAIR_SET_S", 1.0)   # direct made dear: auto goes linear
    c = pairwise_momentum(pos, temps, edges, method="auto", **kw)
    np.testing.assert_array_equal(c.p, b.p)
    monkeypatch.setattr("pairvel.pairs.pathcost.PAIR_SET_S", 0.0)   # direct made free: auto goes direct
    d = pairwise_momentum(pos, temps, edges, method="auto", **kw)
    np.testing.assert_array_equal(d.p, a.p)


def test_path_model_estimates_pairs_from_the_cell_grid_and_prefers_linear_for_many_sets():
    pos, _ = sky(6000, 51)
    r_max = 100.0
    order, start, dims, rows = _kernels.build_cells(pos, r_max)
    est = estimate_pairs(pos, start, dims, int(rows[-1, 3]), r_max)
    true = np.sum(cKDTree(pos).query_pairs(r_max, output_type="ndarray").shape[0])
    assert 0.7 * true < est < 1.3 * true      # common practice: uniform-density estimate, edges cost ~10-20%
    # by construction of the model: linear costs a few sets' direct work more up front, then less per
    # set when tracers have many more partners than bins x region rows; never when they have few
    dense = [path_costs(10**6, m, 15, 50, 1e9, 2 * 10**7).best for m in (1, 1000)]
    sparse = [path_costs(10**6, m, 15, 50, 1e7, 2 * 10**7).best for m in (1, 1000)]
    assert dense == ["direct", "linear"] and sparse == ["direct", "direct"]


def test_weights_zero_removes_a_tracer_and_bad_weights_are_refused():
    pos, rng = sky(800, 41)
    temps = rng.normal(0, 10, 800)
    edges = np.linspace(0, 100, 6)
    w = np.ones(800)
    w[:50] = 0.0
    for method in ("direct", "linear"):
        weighted = pairwise_momentum(pos, temps, edges, weights=w, method=method)
        dropped = pairwise_momentum(pos[50:], temps[50:], edges, method=method)
        np.testing.assert_allclose(weighted.p, dropped.p, rtol=1e-10)   # analytic: w = 0 removes the pairs
    with pytest.raises(InputError, match=r"weights must be finite and >= 0; 1 are not \(first: row 3\)"):
        pairwise_momentum(pos, temps, edges, weights=np.where(np.arange(800) == 3, -1.0, 1.0))
    with pytest.raises(InputError, match=r"weights must have shape \(800,\)"):
        pairwise_momentum(pos, temps, edges, weights=np.ones(5))
    with pytest.raises(InputError, match=r"method must be"):
        pairwise_momentum(pos, temps, edges, method="fast")
