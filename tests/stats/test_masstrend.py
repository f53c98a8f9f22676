"""tau against mass: the power-law fit across proxy bins (pairvel.stats.masstrend) on taus drawn from a known
tau(M) with a known covariance."""

import numpy as np
import pytest

from pairvel.stats.masstrend import fit_mass_trend
from pairvel.stats.subsamples import ProxyBinFit

EDGES = [14.0, 14.2, 14.4, 14.7, 15.0]


def setup(alpha=0.8, tau_pivot=2e-3, seed=0):
    """Log-masses of 2000 tracers (dN/dlog M ~ M^-1.5 like the mock), four bins, the bins' exact model taus
    <(M/10^14.5)^alpha> tau_pivot and a covariance with positive correlations between bins."""
    rng = np.random.default_rng(seed)
    u = rng.uniform(size=2000)
    lm = np.log10(10 ** (-1.5 * 14) + u * (10 ** (-1.5 * 15) - 10 ** (-1.5 * 14))) / -1.5
    bins = tuple(ProxyBinFit(lo, hi, np.nan, 0, 0, 0, np.nan, None) for lo, hi in zip(EDGES[:-1], EDGES[1:]))
    exact = np.array([np.mean(10 ** (alpha * (lm[(lm >= lo) & (lm < hi)] - 14.5)))
                      for lo, hi in zip(EDGES[:-1], EDGES[1:])]) * tau_pivot
    err = np.array([3e-4, 3.5e-4, 4e-4, 6e-4])
    corr = 0.3 + 0.7 * np.eye(4)
    return lm, bins, exact, np.outer(err, err) * corr


def joint(tau, cov, n_samples=10**9):
    return {"bins": list(range(len(tau))), "tau": list(tau), "tau_covariance": cov.tolist(), "n_samples": n_samples}


def test_exact_taus_return_the_injected_power_law_at_a_decorrelated_pivot():
    lm, bins, exact, cov = setup()
    t = fit_mass_trend(bins, joint(exact, cov), proxy=lm, proxy_scale="log10")
    assert t["problem"] is None and t["chi2_min"] == pytest.approx(0.0, abs=1e-12)
    assert t["alpha"] == pytest.approx(0.8, abs=1e-6)  # injected
    # tau_0 is the injected law at the chosen pivot (analytic)
    assert t["tau_0"] == pytest.approx(2e-3 * (t["pivot_mass"] / 10**14.5) ** 0.8, rel=1e-6)
    assert abs(t["correlation"]) < 1e-6 and 10**14 < t["pivot_mass"] < 10**15
    # Delta chi2 against alpha = 0 from its definition: the best constant-times-<1> fit
    psi = np.linalg.inv(cov)
    g = np.ones(4)
    c = (g @ psi @ exact) / (g @ psi @ g)
    r = exact - c * g
    assert t["delta_chi2_alpha0"] == pytest.approx(r @ psi @ r, rel=1e-8)
    assert t["alpha_significance"] == pytest.approx(np.sqrt(r @ psi @ r), rel=1e-8)


def test_blinding_scales_tau0_not_alpha():
    """taus times f and covariance times f^2 (a blinded run): tau_0 and its error scale by f; alpha, the pivot
    and every chi2 stay (the rules declared in pairvel.report.blinding)."""
    lm, bins, exact, cov = setup(alpha=0.5)
    noisy = exact + np.linalg.cholesky(cov) @ np.random.default_rng(3).normal(size=4)
    a = fit_mass_trend(bins, joint(noisy, cov, 50), proxy=lm, proxy_scale="log10")
    b = fit_mass_trend(bins, joint(1.37 * noisy, 1.37**2 * cov, 50), proxy=lm, proxy_scale="log10")
    for key in ("alpha", "alpha_error", "pivot_mass", "chi2_min", "delta_chi2_alpha0"):
        assert b[key] == pytest.approx(a[key], rel=1e-6), key
    for key in ("tau_0", "tau_0_error"):
        assert b[key] == pytest.approx(1.37 * a[key], rel=1e-6), key


def test_power_law_is_unbiased_with_calibrated_errors_over_draws():
    """300 draws of the four taus from N(exact, C): mean alpha and tau_0 within 3 standard errors of the
    injected values, the scatter of alpha within 10% of its quoted error, and alpha-tau_0 uncorrelated
    at the pivot (a linearised Gaussian fit; common practice)."""
    lm, bins, exact, cov = setup(alpha=0.8)
    rng = np.random.default_rng(7)
    chol = np.linalg.cholesky(cov)
    pivot = fit_mass_trend(bins, joint(exact, cov), proxy=lm, proxy_scale="log10")["pivot_mass"]
    fits = [fit_mass_trend(bins, joint(exact + chol @ rng.normal(size=4), cov), proxy=lm, proxy_scale="log10")
            for _ in range(300)]
    alpha = np.array([f["alpha"] for f in fits])
    tau0 = np.array([f["tau_0"] * (pivot / f["pivot_mass"]) ** f["alpha"] for f in fits])  # at one pivot
    err = np.median([f["alpha_error"] for f in fits])
    assert abs(alpha.mean() - 0.8) < 3 * alpha.std() / np.sqrt(alpha.size), alpha.mean()
    true_tau0 = 2e-3 * (pivot / 10**14.5) ** 0.8
    assert abs(tau0.mean() - true_tau0) < 3 * tau0.std() / np.sqrt(tau0.size), (tau0.mean(), true_tau0)
    assert alpha.std() / err == pytest.approx(1.0, abs=0.1)
    assert abs(np.corrcoef(alpha, tau0)[0, 1]) < 0.15
    pte = np.array([f["pte"] for f in fits])
    assert 0.4 < pte.mean() < 0.6  # uniform PTEs for a correct covariance (mean 1/2)


def test_too_few_bins_or_bad_masses_are_reported_not_fatal():
    lm, bins, exact, cov = setup()
    few = fit_mass_trend(bins, joint(exact[:2], cov[:2, :2]), proxy=lm, proxy_scale="log10")
    assert few["problem"].startswith("a power law needs at least 3 fitted proxy bins; 2 have a fit")
    assert fit_mass_trend(bins, None, proxy=lm, proxy_scale="log10")["n_bins_fitted"] == 0
    shifted = tuple(ProxyBinFit(lo - 14.5, hi - 14.5, np.nan, 0, 0, 0, np.nan, None) for lo, hi in zip(EDGES[:-1], EDGES[1:]))
    neg = fit_mass_trend(shifted, joint(exact, cov), proxy=lm - 14.5, proxy_scale="linear")
    assert "masses <= 0" in neg["problem"]
    hart = fit_mass_trend(bins, joint(exact, cov, n_samples=5), proxy=lm, proxy_scale="log10")
    assert "Hartlap" in hart["problem"]
