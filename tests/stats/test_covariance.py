"""Jackknife covariance and k-means regions."""

import numpy as np
import pytest

from pairvel.core.errors import InputError
import pairvel.stats.covariance as covariance
from pairvel.stats.covariance import fit_subsample, jackknife_covariance, kmeans_regions


def test_jackknife_of_a_mean_reproduces_var_over_n():
    """Analytic identity (Norberg et al. 2009, MNRAS 396, 19): the delete-one jackknife variance of
    the mean of N values equals the sample variance / N exactly."""
    x = np.random.default_rng(0).normal(size=(40, 3))
    n = x.shape[0]
    samples = (x.sum(axis=0) - x) / (n - 1)  # mean without value k
    cov = jackknife_covariance(samples)
    np.testing.assert_allclose(cov, np.cov(x, rowvar=False) / n, rtol=1e-12)


def test_stacked_sets_and_bad_samples():
    s = np.random.default_rng(1).normal(size=(3, 20, 4))
    stacked = jackknife_covariance(s)
    np.testing.assert_allclose(stacked[1], jackknife_covariance(s[1]), rtol=1e-14)
    s[0, 3, 2] = np.nan
    with pytest.raises(InputError, match=r"bins \[2\] are not"):
        jackknife_covariance(s)


def test_kmeans_regions_cover_and_are_compact():
    rng = np.random.default_rng(4)
    ra, dec = rng.uniform(100, 160, 5000), rng.uniform(-10, 20, 5000)
    lab = kmeans_regions(ra, dec, 20, seed=3)
    counts = np.bincount(lab)
    assert counts.size == 20 and counts.min() > 0.4 * counts.mean()
    # compact: each region spans well under the whole footprint in RA
    spans = [np.ptp(ra[lab == k]) for k in range(20)]
    assert max(spans) < 40
    np.testing.assert_array_equal(lab, kmeans_regions(ra, dec, 20, seed=3))  # seeded: reproducible
    with pytest.raises(InputError, match="between 2 and the 5000 tracers"):
        kmeans_regions(ra, dec, 1)


def test_kmeans_regions_from_a_subsample_do_not_depend_on_row_order(monkeypatch):
    rng = np.random.default_rng(7)
    n = 6000
    monkeypatch.setattr("pairvel.stats.covariance.FIT_MIN", 5000)   # the centres come from a subsample
    ra, dec = rng.uniform(0, 90, n), np.degrees(np.arcsin(rng.uniform(-0.3, 0.5, n)))
    assert n > max(covariance.FIT_PER_REGION * 20, covariance.FIT_MIN)
    lab = kmeans_regions(ra, dec, 20, seed=5)
    perm = rng.permutation(n)
    np.testing.assert_array_equal(kmeans_regions(ra[perm], dec[perm], 20, seed=5), lab[perm])  # analytic
    counts = np.bincount(lab)
    assert counts.size == 20 and counts.min() > 0.5 * counts.mean()   # common practice: k-means areas within 2x
    sub = fit_subsample(ra, dec, 1000)
    np.testing.assert_array_equal(np.sort(perm[fit_subsample(ra[perm], dec[perm], 1000)]), np.sort(sub))


def test_healpix_regions_merge_sparse_pixels():
    import healpy as hp

    from pairvel.stats.covariance import healpix_regions

    rng = np.random.default_rng(6)
    ra, dec = rng.uniform(100, 160, 4000), rng.uniform(-10, 20, 4000)
    lab = healpix_regions(ra, dec, 8, min_tracers=30)
    assert lab.min() == 0 and np.bincount(lab).min() >= 30
    # every region is made of whole nside-8 pixels (analytic: labels are functions of the pixel)
    pix = hp.ang2pix(8, ra, dec, lonlat=True)
    for p in np.unique(pix):
        assert np.unique(lab[pix == p]).size == 1
    with pytest.raises(InputError, match="power of 2"):
        healpix_regions(ra, dec, 6)


def test_bootstrap_of_a_mean_matches_population_variance_over_n():
    """Analytic (Efron & Tibshirani 1993, ch. 5): the bootstrap variance of the mean of n values is
    (1/n) (1/n) sum (x - xbar)^2; with num_k = x_k, den_k = 1 the ratio estimator is minus the mean."""
    from pairvel.stats.covariance import bootstrap_covariance, bootstrap_samples

    x = np.random.default_rng(2).normal(size=(30, 2)) * [1.0, 3.0]
    n = x.shape[0]
    samples = bootstrap_samples(x, np.ones((n, 2)), 40000, seed=5)
    cov = bootstrap_covariance(samples)
    expected = np.cov(x, rowvar=False, ddof=0) / n
    # Monte Carlo error of a variance from 40000 replicates: sqrt(2/40000) ~ 0.7 per cent
    np.testing.assert_allclose(np.diag(cov), np.diag(expected), rtol=0.03)
    np.testing.assert_allclose(cov[0, 1], expected[0, 1], atol=0.03 * np.sqrt(expected[0, 0] * expected[1, 1]))
    assert np.all(np.abs(samples.mean(axis=0) + x.mean(axis=0)) < 4 * np.sqrt(np.diag(expected) / 40000))


def test_jackknife_and_bootstrap_agree_with_iid_variance_of_a_ratio_mean():
    """Analytic: for iid region values y_k ~ N(0, s^2), var(mean) = s^2 / n; the average of both
    estimators over many independent data sets must match it (jackknife unbiased; bootstrap biased
    by (n - 1)/n, which the check allows for)."""
    from pairvel.stats.covariance import bootstrap_covariance, bootstrap_samples

    rng = np.random.default_rng(9)
    n, s, n_sets = 20, 2.0, 300
    jk, bs = [], []
    for _ in range(n_sets):
        y = rng.normal(0, s, size=(n, 1))
        jk.append(jackknife_covariance((y.sum(axis=0) - y) / (n - 1))[0, 0])
        bs.append(bootstrap_covariance(bootstrap_samples(y, np.ones((n, 1)), 400, seed=rng))[0, 0])
    truth = s**2 / n
    # each estimate scatters by ~ sqrt(2/(n-1)) = 32 per cent; the mean of 300 by ~2 per cent
    np.testing.assert_allclose(np.mean(jk), truth, rtol=0.08)
    np.testing.assert_allclose(np.mean(bs), truth * (n - 1) / n, rtol=0.08)


def test_region_shares_add_up_and_match_a_pair_list():
    """The shares add to the full sums, and region 0's shares equal a numpy pair-list sum."""
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.stats.covariance import bootstrap_samples, region_half_sums

    rng = np.random.default_rng(3)
    pos = rng.uniform(0, 200, size=(400, 3)) + [0, 0, 800]
    temps = rng.normal(size=(2, 400))
    reg = (pos[:, 0] // 50).astype(np.int64)
    edges = np.linspace(0, 60, 4)
    full = pairwise_momentum(pos, temps, edges, regions=reg)
    num_k, den_k = region_half_sums(pos, temps, edges, reg)
    assert num_k.shape == (4, 2, 3) and den_k.shape == (4, 3)
    np.testing.assert_allclose(num_k.sum(axis=0), full.numerator, rtol=1e-10)
    np.testing.assert_allclose(den_k.sum(axis=0), full.denominator, rtol=1e-10)
    # a brute-force share from the pair list for region 0, bin 0 (numpy reference)
    i, j = np.triu_indices(400, 1)
    d = pos[i] - pos[j]
    r = np.linalg.norm(d, axis=1)
    rhat = d / r[:, None]
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    c = np.einsum("ij,ij->i", rhat, 0.5 * (u[i] + u[j]))
    inbin = (r >= edges[0]) & (r < edges[1])
    share = 0.5 * ((reg[i] == 0).astype(float) + (reg[j] == 0))
    np.testing.assert_allclose(den_k[0, 0], np.sum((c**2 * share)[inbin]), rtol=1e-10)
    # numerator share of region 0: sum over pairs of (T_i 1[i in 0] - T_j 1[j in 0]) c_ij, T about its mean
    t = temps[1] - temps[1].mean()
    own = np.where(reg == 0, t, 0.0)
    np.testing.assert_allclose(num_k[0, 1, 0], np.sum(((own[i] - own[j]) * c)[inbin]), rtol=1e-10)
    boot = bootstrap_samples(num_k, den_k, 50, seed=1)
    assert boot.shape == (2, 50, 3) and np.all(np.isfinite(boot))
    with pytest.raises(InputError, match="n_bootstrap must be >= 2"):
        bootstrap_samples(num_k, den_k, 1)


@pytest.mark.slow
def test_region_bootstrap_variance_on_white_noise_matches_the_scatter():
    """300 independent white-noise sets on one geometry: the bootstrap variance of p per bin is
    within 0.7-1.3 of the scatter across sets (analytic truth: the scatter itself)."""
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.pairs.geometry import comoving_positions
    from pairvel.stats.covariance import bootstrap_covariance, bootstrap_samples, kmeans_regions, region_half_sums

    rng = np.random.default_rng(3)
    n = 8000
    ra, dec = rng.uniform(0, 40, n), np.degrees(np.arcsin(rng.uniform(-0.3, 0.3, n)))
    pos = comoving_positions(ra, dec, rng.uniform(0.1, 0.4, n))
    reg = kmeans_regions(ra, dec, 30, seed=1)
    edges = np.linspace(0, 200, 6)
    temps = rng.normal(0, 20, (300, n))
    true_var = pairwise_momentum(pos, temps, edges).p.var(axis=0, ddof=1)
    num_k, den_k = region_half_sums(pos, temps[:30], edges, reg)
    boot = np.mean([np.diag(bootstrap_covariance(bootstrap_samples(num_k[:, m], den_k, 400, seed=m)))
                    for m in range(30)], axis=0)
    ratio = boot / true_var
    assert np.all((ratio > 0.7) & (ratio < 1.3)), ratio


def _white_noise_jackknives(n_sets, seed):
    """Tracer-split and pair-deleting jackknife variances of p per bin, averaged over ``n_sets`` white-noise
    sets on one geometry (400 tracers in a 200 Mpc box cut into 16 column regions), and the scatter of p."""
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.stats.covariance import tracer_split_samples

    rng = np.random.default_rng(seed)
    n = 400
    pos = rng.uniform(0, 200, size=(n, 3)) + [0, 0, 800]
    reg = (pos[:, 0] // 50).astype(np.int64) * 4 + (pos[:, 1] // 50).astype(np.int64)
    n_jk = 16
    edges = np.array([0.0, 20.0, 60.0, 100.0])
    temps = rng.normal(size=(n_sets, n))
    zeroed = (temps[:, None, :] * (reg[None, None, :] != np.arange(n_jk)[None, :, None])).reshape(-1, n)
    pr = pairwise_momentum(pos, np.vstack([temps, zeroed]), edges, regions=reg)
    split = np.array([tracer_split_samples(pr.numerator[n_sets + m * n_jk:n_sets + (m + 1) * n_jk],
                                           pr.denominator, pr.den_jk) for m in range(n_sets)])
    var_split = np.mean([np.diag(jackknife_covariance(s)) for s in split], axis=0)
    var_pairs = np.mean([np.diag(jackknife_covariance(s)) for s in pr.p_jk[:n_sets]], axis=0)
    return pos, reg, temps, pr, var_split, var_pairs, pr.p[:n_sets].var(axis=0, ddof=1)


def test_tracer_split_samples_match_a_pair_list():
    """Sample k = -(numerator of T zeroed in region k, over all pairs) / (D - D_touch_k D / sum_l D_touch_l),
    checked against a numpy pair-list sum (reference: the estimator's definition, SCIENCE.md)."""
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.stats.covariance import tracer_split_samples

    pos, reg, temps, pr, *_ = _white_noise_jackknives(2, 5)
    edges = pr.edges
    i, j = np.triu_indices(pos.shape[0], 1)
    d = pos[i] - pos[j]
    r = np.linalg.norm(d, axis=1)
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    c = np.einsum("ij,ij->i", d / r[:, None], 0.5 * (u[i] + u[j]))
    inbin = (r >= edges[1]) & (r < edges[2])
    touch = np.array([np.sum((c**2)[inbin & ((reg[i] == k) | (reg[j] == k))]) for k in range(16)])
    den = np.sum((c**2)[inbin])
    t = temps[1]
    for k in (0, 7):
        t0 = np.where(reg == k, 0.0, t)
        num = np.sum(((t0[i] - t0[j]) * c)[inbin])
        zeroed = np.where(reg[None, :] == np.arange(16)[:, None], 0.0, t[None, :])
        got = tracer_split_samples(pairwise_momentum(pos, zeroed, edges).numerator, pr.denominator, pr.den_jk)
        np.testing.assert_allclose(got[k, 1], -num / (den - touch[k] * den / touch.sum()), rtol=1e-10)
    with pytest.raises(InputError, match="tracer-split jackknife needs"):
        tracer_split_samples(np.zeros((16, 3)), np.ones(3), np.ones((15, 3)))


def test_tracer_split_jackknife_matches_white_noise_scatter_where_pair_deleting_does_not():
    """60 white-noise sets: the tracer-split jackknife variance of p is 0.75-1.3 of the scatter across sets
    in every bin (truth: the scatter itself; tolerance ~3x the sampling error of 60 variances), while the
    pair-deleting one, which also drops each cross pair's partner term, is larger in every bin (measured
    1.11-1.28 times here; with 200 sets and two seeds 1.09-1.27)."""
    *_, var_split, var_pairs, scatter = _white_noise_jackknives(60, 8)
    ratio = var_split / scatter
    assert np.all((ratio > 0.75) & (ratio < 1.3)), ratio
    assert np.all(var_pairs > 1.05 * var_split), var_pairs / var_split
