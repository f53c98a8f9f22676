"""Null-test helpers: shuffles keep the values (and the redshift slices), chi2 of pure noise."""

import numpy as np
import pytest

from pairvel.stats.nulltests import evaluate_null, shuffled_sets


def test_shuffles_permute_values_and_respect_slices():
    rng = np.random.default_rng(0)
    z = rng.uniform(0.1, 0.5, 500)
    t = rng.normal(size=500)
    all_ = shuffled_sets(t, z, 3, rng=rng)
    assert all_.shape == (3, 500) and not np.allclose(all_[0], t)
    np.testing.assert_array_equal(np.sort(all_[1]), np.sort(t))  # analytic: a permutation
    inz = shuffled_sets(t, z, 2, rng=rng, z_slice_width=0.05)
    slices = np.floor((z - z.min()) / 0.05)
    for s in np.unique(slices):
        sel = slices == s
        np.testing.assert_array_equal(np.sort(inz[0][sel]), np.sort(t[sel]))  # values stay in their slice


def test_evaluate_null_on_pure_noise_is_chi2_distributed():
    rng = np.random.default_rng(1)
    n_real, n_jk, nb = 400, 60, 5
    # jackknife-like samples whose covariance matches the curves' own scatter (analytic construction)
    p = rng.normal(size=(n_real, nb))
    jk = p[:, None, :] + rng.normal(size=(n_real, n_jk, nb)) / np.sqrt(n_jk - 1)
    res = evaluate_null("shuffled", p, jk, n_jk, threshold=0.01)
    # with a Hartlap-corrected estimated covariance, chi2 of each curve averages close to nb (analytic)
    assert abs(res.chi2.mean() - nb) < 0.15 * nb
    assert 0.03 < np.mean(res.pte < 0.1) < 0.2  # PTEs roughly uniform
    assert res.passed == (res.pte_mean > 0.01)


def test_rotated_sets_equal_photometry_on_an_explicitly_rotated_map():
    """Analytic: every HEALPix ring holds a multiple of 4 pixels, so turning a RING map by +90 deg in
    longitude moves pixel centres onto pixel centres; photometry on that map at (ra, dec) must equal
    the rotated-map null at rotation 90 deg.  A rotation off a partial footprint must be skipped."""
    import healpy as hp

    from pairvel.core.errors import PairvelWarning
    from pairvel.maps.healpix import HealpixMap
    from pairvel.maps.photometry import measure_apertures
    from pairvel.stats.nulltests import rotated_sets

    nside = 64
    rng = np.random.default_rng(8)
    m = rng.normal(0, 10, hp.nside2npix(nside))
    lon, lat = hp.pix2ang(nside, np.arange(m.size), lonlat=True)
    m_rot = m[hp.ang2pix(nside, np.mod(lon - 90.0, 360.0), lat, lonlat=True)]
    ra, dec = rng.uniform(0, 360, 50), rng.uniform(-60, 60, 50)
    sets, kept = rotated_sets(HealpixMap.from_array(m), ra, dec, [90.0], radius_arcmin=100.0, max_masked_fraction=0.1)
    direct = measure_apertures(HealpixMap.from_array(m_rot), ra, dec, 100.0).temperatures[0]
    np.testing.assert_allclose(sets[0], direct, rtol=1e-9, atol=1e-9)
    assert kept == [(90.0, 1.0)]
    partial = np.full(m.size, hp.UNSEEN)
    partial[np.abs(lon - 180) < 40] = m[np.abs(lon - 180) < 40]
    ra_in = rng.uniform(160, 200, 30)
    with pytest.warns(PairvelWarning, match="rotation by 180 deg leaves only 0% of the tracers"):
        sets, kept = rotated_sets(HealpixMap.from_array(partial), ra_in, np.zeros(30), [5.0, 180.0], radius_arcmin=60.0,
                                  max_masked_fraction=0.1)
    assert sets.shape == (1, 30) and kept[0][0] == 5.0 and kept[0][1] > 0.5


@pytest.mark.slow
def test_null_ptes_are_uniform_without_signal():
    """Statistics (Kolmogorov-Smirnov, scipy): 300 temperature sets with no signal, tested against
    zero with a covariance from 400 other independent sets (Hartlap factor), give PTEs spread
    uniformly on [0, 1].  With each set's own delete-one jackknife covariance they do not: the
    jackknife of a pair statistic overestimates the variance (Efron & Stein 1981), so its PTEs pile
    up towards 1 - checked here too, so that a change in that behaviour is seen."""
    from scipy import stats

    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.stats.covariance import jackknife_covariance

    rng = np.random.default_rng(12)
    n = 3000
    pos = rng.uniform(0, 600, size=(n, 3)) + [0.0, 0.0, 900.0]
    regions = (np.floor(pos[:, 0] / 100) + 6 * np.floor(pos[:, 1] / 100)).astype(np.int64)  # 36 cells
    temps = rng.normal(0, 20, size=(700, n))
    pr = pairwise_momentum(pos, temps, np.array([0.0, 20.0, 40.0, 60.0]), regions=regions)
    cov = np.cov(pr.p[300:], rowvar=False)
    res = evaluate_null("shuffled", pr.p[:300], pr.p_jk[:300], pr.n_jk, threshold=0.01, covariance=cov,
                        n_samples=400)
    ks = stats.kstest(res.pte, "uniform")
    assert ks.pvalue > 0.01, (ks, np.histogram(res.pte, bins=5, range=(0, 1))[0])
    jk = evaluate_null("shuffled", pr.p[:300], pr.p_jk[:300], pr.n_jk, threshold=0.01)
    ratio = np.mean([np.diag(c) for c in jackknife_covariance(pr.p_jk[:300])], axis=0) / np.diag(cov)
    assert np.all(ratio > 1.0), ratio          # conservative jackknife, as measured (1.15-1.3 here)
    assert np.median(jk.pte) > 0.5
