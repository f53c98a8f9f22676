"""Redshift-trend correction against a direct O(N^2) sum."""

import numpy as np
import pytest

from pairvel.errors import InputError
from pairvel.trend import redshift_trend, remove_redshift_trend


def test_matches_direct_kernel_sum():
    rng = np.random.default_rng(0)
    z = rng.uniform(0.1, 0.6, 800)
    t = rng.normal(size=(2, 800)) + 30 * z
    k = np.exp(-((z[:, None] - z[None, :]) ** 2) / (2 * 0.02**2))
    direct = (t @ k.T) / k.sum(axis=1)  # analytic: the kernel mean written out
    np.testing.assert_allclose(redshift_trend(t, z, sigma_z=0.02), direct, rtol=1e-9)


def test_constant_removed_and_linear_trend_removed_in_interior():
    z = np.linspace(0.1, 0.6, 3000)
    np.testing.assert_allclose(remove_redshift_trend(np.full(3000, 4.0), z), 0.0, atol=1e-12)
    out = remove_redshift_trend(-50.0 * z, z, sigma_z=0.01)
    inner = (z > 0.18) & (z < 0.52)  # symmetric kernel: a linear trend cancels > 7 sigma_z from the ends
    np.testing.assert_allclose(out[inner], 0.0, atol=1e-9)


def test_bad_input():
    with pytest.raises(InputError, match="must be finite"):
        remove_redshift_trend([1.0, np.nan], [0.1, 0.2])
    with pytest.raises(InputError, match="sigma_z must be > 0"):
        remove_redshift_trend([1.0, 2.0], [0.1, 0.2], sigma_z=0.0)
