"""One jackknife covariance across aperture radii and across proxy bins: cross-blocks against a brute-force
recomputation (tracers of region k removed, estimator from its formula), diagonal blocks against each
group's own covariance, and the amplitudes' covariance against the fits."""

import numpy as np
import pytest

from pairvel.input.config import TheoryConfig
from pairvel.model.cosmology import Cosmology
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import unit_vectors
from pairvel.stats.covariance import jackknife_covariance
from pairvel.stats.fit import fit_amplitude
from pairvel.stats.jointcov import amplitude_covariance, amplitude_weights, covariance_block, joint_jackknife_covariance
from pairvel.stats.radii import fit_radii, radius_joint
from pairvel.stats.subsamples import fit_proxy_bins

EDGES = np.array([0.0, 50.0, 100.0, 150.0])


def sky(n, seed):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0, 24, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-8)), np.sin(np.radians(8)), n)))
    pos = unit_vectors(ra, dec) * rng.uniform(700, 950, n)[:, None]
    regions = np.minimum((ra / 3.0).astype(np.int64), 7)  # 8 strips of 3 degrees
    return pos, regions, rng


def estimator(pos, temps):
    """p = -sum (T_i - T_j) c_ij / sum c_ij^2, c_ij = rhat_ij . (rhat_i + rhat_j) / 2 (Ferreira et al. 1999),
    straight from the formula over every pair, for each row of ``temps``."""
    i, j = np.triu_indices(pos.shape[0], 1)
    d = pos[i] - pos[j]
    r = np.linalg.norm(d, axis=1)
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    c = np.einsum("ij,ij->i", d, u[i] + u[j]) / (2 * r)
    b = np.searchsorted(EDGES, r, side="right") - 1
    ok = (b >= 0) & (b < EDGES.size - 1)
    den = np.bincount(b[ok], weights=(c**2)[ok], minlength=EDGES.size - 1)
    return np.array([-np.bincount(b[ok], weights=((t[i] - t[j]) * c)[ok], minlength=EDGES.size - 1) / den
                     for t in np.atleast_2d(temps)])


def brute_joint(samples):
    """(n-1)/n sum_k (x_k - xbar)(y_k - ybar) for every pair of entries of the stacked samples, by loops."""
    s = [np.concatenate([g[k] for g in samples]) for k in range(len(samples[0]))]
    n, m = len(s), s[0].size
    mean = sum(s) / n
    out = np.zeros((m, m))
    for k in range(n):
        for a in range(m):
            for b in range(m):
                out[a, b] += (s[k][a] - mean[a]) * (s[k][b] - mean[b])
    return (n - 1) / n * out


def test_radii_joint_covariance_matches_brute_force_and_fits():
    """Two temperature sets (two radii) through one pass: the joint covariance of their aligned delete-one
    samples equals the brute-force one; its diagonal blocks are each radius's own jackknife covariance,
    and Cov(tau) has the fits' amplitudes and, on its diagonal, error^2 / Hartlap factor (analytic, GLS)."""
    pos, regions, rng = sky(260, 1)
    temps = rng.normal(0, 10, (2, pos.shape[0]))
    temps[1] = 0.7 * temps[0] + 0.3 * temps[1]  # correlated like nested apertures
    pr = pairwise_momentum(pos, temps, EDGES, regions=regions)
    joint = joint_jackknife_covariance(pr.p_jk)
    brute = [[estimator(pos[regions != k], temps[g, regions != k])[0] for k in range(8)] for g in range(2)]
    np.testing.assert_allclose(joint, brute_joint(brute), rtol=1e-9, atol=1e-12 * np.abs(joint).max())
    assert np.abs(covariance_block(joint, 0, 1, 3)).max() > 0.1 * np.abs(covariance_block(joint, 0, 0, 3)).max()

    template = np.array([-0.3, -0.2, -0.1])
    use = np.ones(3, bool)
    fits = fit_radii([2.0, 3.0], pr.p, pr.p_jk, template, n_jk=8, in_fit=use, likelihood="hartlap")
    for g in range(2):
        np.testing.assert_allclose(covariance_block(joint, g, g, 3), jackknife_covariance(pr.p_jk[g]), rtol=1e-12)
    rj = radius_joint(fits, pr.p_jk, template, in_fit=use)
    np.testing.assert_allclose(rj["tau"], [f.fit.amplitude for f in fits], rtol=1e-10)
    np.testing.assert_allclose(np.diag(rj["tau_covariance"]),
                               [f.fit.error**2 * f.fit.precision_factor for f in fits], rtol=1e-10)
    np.testing.assert_allclose(rj["covariance"], joint, rtol=1e-12)
    # the amplitudes' covariance is the jackknife covariance of amplitudes fitted to each aligned sample
    # with fixed weights (the map is linear; analytic)
    w = np.array([amplitude_weights(template, covariance_block(joint, g, g, 3), use) for g in range(2)])
    tau_k = np.einsum("gb,gkb->kg", w, pr.p_jk)
    np.testing.assert_allclose(amplitude_covariance(w, joint), jackknife_covariance(tau_k), rtol=1e-10)


@pytest.mark.parametrize("retrend", [False, True])
def test_proxy_bins_joint_covariance_matches_brute_force(retrend):
    """Three proxy bins, one of which has no tracer in region 1 and one none in region 7 (the highest label):
    every bin keeps the run's 8 regions, sample k deletes region k's tracers (none for a bin without them)
    and, with re-trended sets, uses set k's temperatures - the joint covariance equals the brute-force one."""
    pos, regions, rng = sky(330, 2)
    n = pos.shape[0]
    proxy = rng.uniform(14.0, 15.0, n)
    proxy[(regions == 1) & (proxy < 14.33)] += 0.4  # bin 0 loses region 1
    proxy[(regions == 7) & (proxy >= 14.67)] -= 0.4  # bin 2 loses region 7
    temps = rng.normal(0, 10, n)
    retrended = None
    if retrend:
        retrended = temps[None, :] + rng.normal(0, 1, (8, n))
        retrended[regions[None, :] == np.arange(8)[:, None]] = 0.0
    edges_p = [14.0, 14.33, 14.67, 15.0]
    bins, joint = fit_proxy_bins(edges_p, proxy=proxy, positions=pos, temperatures=temps, redshifts=np.full(n, 0.2),
                                 regions=regions, edges=EDGES, in_fit=np.ones(3, bool),
                                 theory_cfg=TheoryConfig(bias=1.0), cosmo=Cosmology(), retrended=retrended)
    assert [b.n_regions for b in bins] == [7, 8, 7] and all(b.fit is not None for b in bins)
    assert joint["bins"] == [0, 1, 2] and joint["n_samples"] == 7
    brute = []
    for lo, hi in zip(edges_p[:-1], edges_p[1:]):
        sel = (proxy >= lo) & (proxy < hi)
        brute.append([estimator(pos[sel & (regions != k)],
                                (temps if retrended is None else retrended[k])[sel & (regions != k)])[0]
                      for k in range(8)])
    cov = np.array(joint["covariance"])
    np.testing.assert_allclose(cov, brute_joint(brute), rtol=1e-9, atol=1e-12 * np.abs(cov).max())
    np.testing.assert_allclose(joint["tau"], [b.fit.amplitude for b in bins], rtol=1e-10)
    for g, b in enumerate(bins):
        # the bin's own fit used exactly its diagonal block; Hartlap with the regions it occupies
        assert joint["tau_covariance"][g][g] == pytest.approx(b.fit.error**2 * b.fit.precision_factor, rel=1e-10)
    if not retrend:
        # bin 1 occupies every region: its block equals the per-bin jackknife of its own pass (internal consistency)
        sel = (proxy >= 14.33) & (proxy < 14.67)
        own = pairwise_momentum(pos[sel], temps[sel], EDGES, regions=regions[sel]).p_jk
        np.testing.assert_allclose(covariance_block(cov, 1, 1, 3), jackknife_covariance(own), rtol=1e-12)


def test_amplitude_weights_reproduce_the_fit():
    """w . d is fit_amplitude's least-squares amplitude; bins outside the fit range get weight 0 (analytic)."""
    rng = np.random.default_rng(4)
    a = rng.normal(size=(30, 5))
    cov = a.T @ a / 30
    t, d = rng.normal(size=5), rng.normal(size=5)
    use = np.array([True, True, False, True, True])
    w = amplitude_weights(t, cov, use)
    assert w[2] == 0.0
    assert w @ d == pytest.approx(fit_amplitude(d, t, cov, use=use).amplitude, rel=1e-12)
