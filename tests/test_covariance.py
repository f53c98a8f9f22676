"""Jackknife covariance and k-means regions."""

import numpy as np
import pytest

from pairvel.covariance import jackknife_covariance, kmeans_regions
from pairvel.errors import InputError


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


def test_healpix_regions_merge_sparse_pixels():
    import healpy as hp

    from pairvel.covariance import healpix_regions

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
