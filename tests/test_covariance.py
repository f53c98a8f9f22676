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
