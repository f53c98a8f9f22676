"""Amplitude fit, Hartlap factor and chi-square helpers."""

import numpy as np
import pytest

from pairvel.errors import InputError
from pairvel.fit import chi2_against_zero, fit_amplitude, hartlap_factor


def test_hartlap_values():
    # [calc] SCIENCE.md, Hartlap, Simon & Schneider 2007 (A&A 464, 399)
    np.testing.assert_allclose(hartlap_factor(100, 10), 0.888889, rtol=1e-6)
    np.testing.assert_allclose(hartlap_factor(50, 10), 0.775510, rtol=1e-6)
    with pytest.raises(InputError, match=r"cannot be inverted for 10 bins"):
        hartlap_factor(12, 10)


def test_noiseless_recovery_and_diagonal_error():
    t = np.linspace(-3, -0.5, 8)
    sig = np.linspace(0.2, 0.5, 8)
    fit = fit_amplitude(2.5 * t, t, np.diag(sig**2))
    np.testing.assert_allclose(fit.amplitude, 2.5, rtol=1e-12)  # analytic: exact data
    np.testing.assert_allclose(fit.error, 1 / np.sqrt(np.sum(t**2 / sig**2)), rtol=1e-12)  # analytic
    assert fit.chi2_min == pytest.approx(0.0, abs=1e-18) and fit.dof == 7
    masked = fit_amplitude(2.5 * t, t, np.diag(sig**2), use=np.arange(8) >= 3)
    assert masked.n_bins == 5


def test_monte_carlo_unbiased_with_honest_error():
    rng = np.random.default_rng(7)
    nb = 6
    t = -np.linspace(1, 0.3, nb)
    a = rng.normal(size=(nb, nb))
    cov = a @ a.T / nb + np.eye(nb) * 0.2
    chol = np.linalg.cholesky(cov)
    amps = [fit_amplitude(1.3 * t + chol @ rng.normal(size=nb), t, cov) for _ in range(3000)]
    est = np.array([f.amplitude for f in amps])
    err = amps[0].error
    # analytic: unbiased, scatter equal to the quoted error (Monte-Carlo tolerance ~3 sigma of 3000 draws)
    assert abs(est.mean() - 1.3) < 3 * err / np.sqrt(3000)
    np.testing.assert_allclose(est.std(ddof=1), err, rtol=0.05)
    chi2 = np.array([f.chi2_min for f in amps])
    np.testing.assert_allclose(chi2.mean(), nb - 1, rtol=0.05)  # analytic: chi2 with nb - 1 dof
    # analytic: for a linear model chi2_null - chi2_min = (A / sigma_A)^2
    np.testing.assert_allclose([f.snr_delta_chi2 for f in amps[:50]], [f.snr for f in amps[:50]], rtol=1e-8)


def test_chi2_against_zero_and_errors():
    chi2, dof, pte = chi2_against_zero(np.zeros(4), np.eye(4))
    assert chi2 == 0.0 and dof == 4 and pte == 1.0
    with pytest.raises(InputError, match="not positive definite"):
        fit_amplitude(np.ones(3), np.ones(3), -np.eye(3))
    with pytest.raises(InputError, match="must be symmetric"):
        fit_amplitude(np.ones(3), np.ones(3), np.eye(3) + np.triu(np.ones((3, 3)), 1))
    with pytest.raises(InputError, match="template is zero"):
        fit_amplitude(np.ones(3), np.zeros(3), np.eye(3))
    with pytest.raises(InputError, match=r"covariance must have shape \(3, 3\)"):
        fit_amplitude(np.ones(3), np.ones(3), np.eye(4))
