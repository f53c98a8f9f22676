"""Amplitude fit of the measured curve against a template, and chi-square tests.

With the template t(r) = T_CMB v12(r) / c (uK per unit optical depth), the fitted amplitude is the
mean optical depth tau_mean:

    A = t^T Psi d / t^T Psi t,    sigma_A = (t^T Psi t)^(-1/2),

with Psi the inverse covariance times the Hartlap, Simon & Schneider (2007, A&A 464, 399) factor
(n - p - 2)/(n - 1) when the covariance comes from n samples.
"""

from __future__ import annotations

__all__ = ["AmplitudeFit", "hartlap_factor", "chi2_pte", "fit_amplitude", "chi2_against_zero"]

from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

from .errors import InputError


@dataclass(frozen=True)
class AmplitudeFit:
    """Result of :func:`fit_amplitude` (chi2_null is d^T Psi d with n_bins degrees of freedom).

    ``snr`` is amplitude / error; ``snr_delta_chi2`` is sqrt(chi2_null - chi2_min), the same number
    for a linear model with Gaussian errors (the two differ only by rounding), signed like the amplitude.
    """

    amplitude: float
    error: float
    snr: float
    chi2_min: float
    chi2_null: float
    dof: int
    pte_min: float
    pte_null: float
    n_bins: int
    precision_factor: float
    snr_delta_chi2: float = float("nan")

    def as_dict(self) -> dict:
        return {k: (int(v) if isinstance(v, (int, np.integer)) else float(v)) for k, v in asdict(self).items()}


def hartlap_factor(n_samples: int, n_bins: int) -> float:
    """(n - p - 2) / (n - 1): debiases an inverse covariance estimated from n samples of p bins.

    References
    ----------
    Hartlap, Simon & Schneider 2007, A&A 464, 399.
    """
    n, p = int(n_samples), int(n_bins)
    if n - p - 2 <= 0:
        raise InputError(f"the covariance from {n} samples cannot be inverted for {p} bins (Hartlap factor "
                         f"(n - p - 2)/(n - 1) <= 0); use more jackknife regions or fewer bins")
    return (n - p - 2) / (n - 1)


def chi2_pte(chi2: float, dof: int) -> float:
    """Probability that a chi-square variable with ``dof`` degrees of freedom exceeds ``chi2``."""
    return float(stats.chi2.sf(chi2, dof))


def _precision(covariance, n_bins, n_samples, what="covariance"):
    cov = np.asarray(covariance, dtype=float)
    if cov.shape != (n_bins, n_bins):
        raise InputError(f"{what} must have shape ({n_bins}, {n_bins}); got {cov.shape}")
    if not np.all(np.isfinite(cov)):
        raise InputError(f"{what} must be finite")
    if not np.allclose(cov, cov.T, rtol=1e-10, atol=0):
        raise InputError(f"{what} must be symmetric")
    try:
        chol = np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise InputError(f"{what} is not positive definite (too few jackknife regions for the bins?)") from None
    inv = np.linalg.inv(chol)
    factor = 1.0 if n_samples is None else hartlap_factor(n_samples, n_bins)
    return factor * inv.T @ inv, factor


def fit_amplitude(data, template, covariance, *, n_samples=None, use=None) -> AmplitudeFit:
    """Least-squares amplitude of ``template`` in ``data`` with a Gaussian likelihood.

    Parameters
    ----------
    data, template : ndarray of shape (nbins,)
    covariance : ndarray of shape (nbins, nbins)
    n_samples : int, optional
        Number of samples the covariance was estimated from (jackknife regions); applies the
        Hartlap factor.
    use : ndarray of shape (nbins,), bool, optional
        Bins to fit (the fit range); default all.
    """
    d = np.asarray(data, dtype=float)
    t = np.asarray(template, dtype=float)
    if d.ndim != 1 or t.shape != d.shape:
        raise InputError(f"data and template must be 1-D of equal length; got {d.shape} and {t.shape}")
    sel = np.ones(d.size, bool) if use is None else np.asarray(use, dtype=bool)
    if sel.shape != d.shape or sel.sum() < 2:
        raise InputError(f"the fit range must select at least 2 of the {d.size} bins; got {int(sel.sum())}")
    cov = np.asarray(covariance, dtype=float)
    if cov.shape != (d.size, d.size):
        raise InputError(f"covariance must have shape ({d.size}, {d.size}); got {cov.shape}")
    d, t, cov = d[sel], t[sel], cov[np.ix_(sel, sel)]
    if not (np.all(np.isfinite(d)) and np.all(np.isfinite(t))):
        raise InputError("data and template must be finite in the fitted bins")
    psi, factor = _precision(cov, d.size, n_samples)
    ftf = t @ psi @ t
    if not ftf > 0:
        raise InputError("the template is zero in the fitted bins; nothing to fit")
    amp = (t @ psi @ d) / ftf
    err = 1.0 / np.sqrt(ftf)
    resid = d - amp * t
    chi2_min = float(resid @ psi @ resid)
    chi2_null = float(d @ psi @ d)
    n = d.size
    delta = np.sign(amp) * np.sqrt(max(chi2_null - chi2_min, 0.0))
    return AmplitudeFit(float(amp), float(err), float(amp / err), chi2_min, chi2_null, n - 1,
                        chi2_pte(chi2_min, n - 1), chi2_pte(chi2_null, n), n, factor, float(delta))


def chi2_against_zero(data, covariance, *, n_samples=None):
    """chi2 = d^T Psi d of a curve against zero; returns (chi2, dof, pte)."""
    d = np.asarray(data, dtype=float)
    psi, _ = _precision(covariance, d.size, n_samples)
    chi2 = float(d @ psi @ d)
    return chi2, d.size, chi2_pte(chi2, d.size)
