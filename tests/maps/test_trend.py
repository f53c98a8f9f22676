"""Redshift-trend correction: both evaluation paths against the direct O(N^2) kernel sum."""

import numpy as np
import pytest

from pairvel.core.errors import InputError
from pairvel.maps.trend import _trend_2d, redshift_trend, remove_redshift_trend


def direct_reference(t, z, sigma_z):
    """The kernel mean written out as an N x N matrix (slow, tests only)."""
    k = np.exp(-((z[:, None] - z[None, :]) ** 2) / (2 * sigma_z**2))
    return (t @ k.T) / k.sum(axis=1)


def mock_redshifts(rng, n):
    # uniform + a dense clump + an isolated outlier: dense and sparse regions in one catalogue
    return np.concatenate([rng.uniform(0.1, 0.7, n // 2), rng.normal(0.3, 0.02, n - n // 2 - 1), [1.4]])


@pytest.mark.parametrize("sigma_z", [0.002, 0.01, 0.05])
@pytest.mark.parametrize("method", ["direct", "grid"])
def test_both_paths_match_the_direct_sum(method, sigma_z):
    rng = np.random.default_rng(0)
    z = mock_redshifts(rng, 2500)
    t = 10 * rng.normal(size=(2, z.size)) + 30 * z
    ref = direct_reference(t, z, sigma_z)  # analytic: the defining sum, evaluated in full
    got = _trend_2d(t, z, sigma_z, method)
    # the windowed sum drops weights < 3e-18; the gridded sum has 8th-order interpolation errors
    np.testing.assert_allclose(got, ref, rtol=1e-6, atol=1e-9 * np.abs(t).max())


def test_auto_choice_agrees_with_reference_for_one_and_several_sets():
    rng = np.random.default_rng(1)
    z = rng.uniform(0.05, 0.9, 4000)
    t = rng.normal(size=(3, 4000))
    ref = direct_reference(t, z, 0.01)  # analytic: the defining sum
    np.testing.assert_allclose(redshift_trend(t, z), ref, rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(redshift_trend(t[1], z), ref[1], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(remove_redshift_trend(t, z), t - ref, rtol=1e-6, atol=1e-9)
    assert remove_redshift_trend(t[0], z).shape == (4000,)


@pytest.mark.parametrize("method", ["direct", "grid"])
def test_constant_removed_and_linear_trend_removed_in_interior(method):
    z = np.linspace(0.1, 0.6, 3001)
    const = np.full((1, z.size), 4.0)
    # analytic: the kernel mean of a constant is the constant
    np.testing.assert_allclose(const - _trend_2d(const, z, 0.01, method), 0.0, atol=1e-9)
    lin = (-50.0 * z + 3.0)[None, :]
    out = lin - _trend_2d(lin, z, 0.01, method)
    # analytic: on evenly spaced z the kernel is symmetric about z_i more than 9 sigma_z from the ends,
    # so the kernel mean of a linear function is its value at z_i
    inner = (z > 0.1 + 0.095) & (z < 0.6 - 0.095)
    np.testing.assert_allclose(out[0, inner], 0.0, atol=1e-8)
    # ... and near the ends it is not (the test can fail): the one-sided kernel leaves a residual
    assert abs(out[0, 0]) > 0.1


def test_single_tracer_and_empty_input():
    np.testing.assert_array_equal(remove_redshift_trend([5.0], [0.3]), [0.0])  # analytic: its own mean
    assert remove_redshift_trend(np.zeros((2, 0)), np.zeros(0)).shape == (2, 0)


def test_bad_inputs_are_named():
    with pytest.raises(InputError, match=r"temperatures must be finite .* \(first: tracer 1\)"):
        remove_redshift_trend([1.0, np.nan], [0.1, 0.2])
    with pytest.raises(InputError, match=r"z must be finite .* \(first: row 0, z=nan\)"):
        remove_redshift_trend([1.0, 2.0], [np.nan, 0.2])
    with pytest.raises(InputError, match=r"sigma_z must be a finite number > 0; got 0.0"):
        remove_redshift_trend([1.0, 2.0], [0.1, 0.2], sigma_z=0.0)
    with pytest.raises(InputError, match=r"shape \(N,\) or \(M, N\) with N = len\(z\) = 2; got \(3,\)"):
        remove_redshift_trend([1.0, 2.0, 3.0], [0.1, 0.2])
