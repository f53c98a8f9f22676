"""Amplitude fit of the measured curve against a template, and chi-square tests.

With the template t(r) = T_CMB v12(r) / c (uK per unit optical depth), the fitted amplitude is the
mean optical depth tau_mean:

    A = t^T Psi d / t^T Psi t,    sigma_A = (t^T Psi t)^(-1/2),

with Psi the inverse covariance times the Hartlap, Simon & Schneider (2007, A&A 464, 399) factor
(n - p - 2)/(n - 1) when the covariance comes from n samples.  Alternatively the Sellentin & Heavens
(2016, MNRAS 456, L132) likelihood, which marginalises over the true covariance given the estimate
from n samples: L(A) ~ [1 + chi2(A)/(n - 1)]^(-n/2) with chi2 from the plain inverse.  For a model
linear in A with a flat prior this is a Student t with n - 1 degrees of freedom,

    A = A_hat + s t_{n-1},   s = sigma_0 sqrt((n - 1 + chi2_min) / (n - 1)),

sigma_0 = (t^T C^-1 t)^(-1/2) (derived from their eq. 17; tests/stats/test_fit.py checks it against a
numerical integration of the likelihood).

"hartlap-percival" is the Gaussian one with the error widened by sqrt(m1) (Percival et al. 2014,
MNRAS 439, 2531, eq. 18; after Dodelson & Schneider 2013, PRD 88, 063537): a precision estimated
from n samples is noisy, so the fitted amplitude scatters more than its Hartlap-corrected error,
by m1 = (1 + B (n_b - n_p)) / (1 + A + B (n_p + 1)) in variance with A = 2 / ((n - n_b - 1)
(n - n_b - 4)), B = (n - n_b - 2) / ((n - n_b - 1)(n - n_b - 4)), n_b fitted bins and n_p = 1
(1.35 for 50 jackknife regions and 15 bins).

"variance-weighted" takes the amplitude with weights from the covariance's diagonal only and its
error from the whole covariance:

    A = w^T d,   w = (t / diag C) / (t^T (t / diag C)),   sigma_A^2 = w^T C w.

It gives up the inverse of an estimated covariance, whose noise makes the generalised least-squares
amplitude scatter more than its own error says (the Dodelson & Schneider 2013 effect above): with
50 jackknife regions and 15 bins, pairvel's mocks (tests/stats/test_fit_weights.py, and the
`pairvel validate` runs in the README) show that amplitude scattering 1.2-1.3 times its error, while
the variance-weighted one scatters as its sandwich error says and, where the bins are weakly
correlated, about as little as the amplitude fitted with the true covariance.  w^T C w is linear in
C, so an unbiased covariance gives an unbiased variance; no Hartlap factor enters it.  The chi2
values and PTEs stay those of the Hartlap-corrected precision (the goodness of fit of the model).
"""

from __future__ import annotations

__all__ = ["LIKELIHOODS", "AmplitudeFit", "amplitude_weights", "chi2_against_zero", "chi2_pte", "fit_amplitude", "hartlap_factor",
           "hartlap_ratio", "sellentin_heavens_interval"]

from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats

from ..core.errors import InputError
from ..input.config import LIKELIHOODS  # the likelihoods fit_amplitude offers, declared with the config key

#: Probability inside +-1 sigma of a Gaussian, 0.682689...
ONE_SIGMA = float(stats.norm.cdf(1.0) - stats.norm.cdf(-1.0))


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
    likelihood: str = "hartlap"
    lower_68: float = float("nan")
    upper_68: float = float("nan")

    def as_dict(self) -> dict:
        return {k: (v if isinstance(v, str) else int(v) if isinstance(v, (int, np.integer)) else float(v))
                for k, v in asdict(self).items()}


def hartlap_factor(n_samples: int, n_bins: int) -> float:
    """(n - p - 2) / (n - 1): debiases an inverse covariance estimated from n samples of p bins.

    References
    ----------
    Hartlap, Simon & Schneider 2007, A&A 464, 399.
    """
    n, p = int(n_samples), int(n_bins)
    factor = hartlap_ratio(n, p)
    if not factor > 0:
        raise InputError(f"the covariance from {n} samples cannot be inverted for {p} bins (Hartlap factor "
                         f"(n - p - 2)/(n - 1) <= 0); use more jackknife regions or fewer bins")
    return factor


def hartlap_ratio(n_samples: int, n_bins: int) -> float:
    """(n - p - 2) / (n - 1) as it stands, without the check of :func:`hartlap_factor` (-1 for n <= 1).

    ``n_bins`` is the number of bins the precision matrix is made for: the fitted bins, when a fit
    range leaves some out.
    """
    n, p = int(n_samples), int(n_bins)
    return (n - p - 2) / (n - 1) if n > 1 else -1.0


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


def percival_m1(n_samples, n_bins: int, n_params: int = 1):
    """m1 of Percival et al. (2014, MNRAS 439, 2531, eq. 18): the factor on a parameter's variance from a
    Hartlap-corrected precision estimated from ``n_samples`` samples of ``n_bins`` bins (see the module notes)."""
    d = np.asarray(n_samples, dtype=float) - n_bins
    a = 2.0 / ((d - 1) * (d - 4))
    b = (d - 2) / ((d - 1) * (d - 4))
    return (1 + b * (n_bins - n_params)) / (1 + a + b * (n_params + 1))


def sellentin_heavens_interval(amplitude, sigma_0, chi2_min, n_samples, *, level=ONE_SIGMA):
    """Central interval of A under the Sellentin & Heavens (2016) likelihood (see the module notes).

    Parameters
    ----------
    amplitude, sigma_0 : float
        Best fit and its Gaussian error from the plain (uncorrected) inverse covariance.
    chi2_min : float
        chi2 at the best fit with the plain inverse.
    n_samples : int
        Samples the covariance was estimated from.
    level : float
        Probability inside the interval.

    Returns
    -------
    (lower, upper) : tuple of float
    """
    nu = int(n_samples) - 1
    if nu < 1:
        raise InputError(f"the Sellentin-Heavens likelihood needs a covariance from >= 2 samples; got {n_samples}")
    scale = sigma_0 * np.sqrt((nu + chi2_min) / nu)
    half = scale * stats.t.ppf(0.5 + level / 2, nu)
    return amplitude - half, amplitude + half


def amplitude_weights(template, covariance, use=None, *, likelihood="hartlap") -> np.ndarray:
    """w with w . d equal to the amplitude :func:`fit_amplitude` fits to a curve d.

    Parameters
    ----------
    template : ndarray of shape (nbins,)
    covariance : ndarray of shape (nbins, nbins)
    use : ndarray of shape (nbins,), bool, optional
        The fitted bins (default all); w is 0 elsewhere.
    likelihood : str, default "hartlap"
        As in :func:`fit_amplitude`: "variance-weighted" weights by the diagonal only, every other
        likelihood by the inverse covariance (a Hartlap factor cancels).

    Returns
    -------
    ndarray of shape (nbins,)
    """
    t = np.asarray(template, dtype=float)
    sel = np.ones(t.size, bool) if use is None else np.asarray(use, dtype=bool)
    cov = np.asarray(covariance, dtype=float)[np.ix_(sel, sel)]
    if likelihood == "variance-weighted":
        ct = t[sel] / np.diag(cov)
    else:
        ct = np.linalg.solve(cov, t[sel])
    w = np.zeros(t.size)
    w[sel] = ct / (t[sel] @ ct)
    return w


def fit_amplitude(data, template, covariance, *, n_samples=None, use=None, likelihood="hartlap") -> AmplitudeFit:
    """Least-squares amplitude of ``template`` in ``data`` with a Gaussian or Sellentin-Heavens likelihood.

    Parameters
    ----------
    data, template : ndarray of shape (nbins,)
    covariance : ndarray of shape (nbins, nbins)
    n_samples : int, optional
        Number of samples the covariance was estimated from (jackknife regions); applies the
        Hartlap factor.
    use : ndarray of shape (nbins,), bool, optional
        Bins to fit (the fit range); default all.
    likelihood : {"hartlap", "sellentin-heavens", "hartlap-percival", "variance-weighted"}, default "hartlap"
        "hartlap": Gaussian with the Hartlap-corrected precision (error = 1-sigma).
        "sellentin-heavens": the Student-t posterior of the module notes (needs ``n_samples``);
        ``error`` is half the central 68.27% (ONE_SIGMA) interval, ``snr`` = amplitude / error, and
        ``snr_delta_chi2`` is sqrt(-2 ln L(0)/L(A_hat)) of that likelihood.  The chi2 values and
        PTEs are those of the Hartlap-corrected precision in both cases (goodness of fit).
        "hartlap-percival": "hartlap" with the error widened by sqrt(m1).
        "variance-weighted": the amplitude from the diagonal's weights, its error sqrt(w^T C w)
        (module notes); chi2_min is still the minimum over A of the Hartlap chi2.

    Notes
    -----
    The first three give the same best fit A_hat and differ in the width and tails of its
    distribution; "variance-weighted" has its own best fit.
    """
    if likelihood not in LIKELIHOODS:
        raise InputError(f"likelihood must be one of {LIKELIHOODS}; got {likelihood!r}")
    if likelihood in ("sellentin-heavens", "hartlap-percival") and n_samples is None:
        raise InputError(f"the {likelihood} likelihood needs n_samples (the number of jackknife regions)")
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
    if likelihood == "variance-weighted":
        w = t / np.diag(cov)
        w = w / (t @ w)
        amp, err = float(w @ d), float(np.sqrt(w @ cov @ w))
        delta = amp / err
    if likelihood == "hartlap-percival":
        widen = float(np.sqrt(percival_m1(n_samples, n)))
        err, delta = err * widen, delta / widen
    lo, hi = amp - err, amp + err
    if likelihood == "sellentin-heavens":
        sigma_0 = err * np.sqrt(factor)  # the plain inverse is the Hartlap one divided by the factor
        c2min, c2null = chi2_min / factor, chi2_null / factor
        lo, hi = sellentin_heavens_interval(amp, sigma_0, c2min, n_samples)
        err = 0.5 * (hi - lo)
        lnr = 0.5 * n_samples * (np.log1p(c2null / (n_samples - 1)) - np.log1p(c2min / (n_samples - 1)))
        delta = np.sign(amp) * np.sqrt(max(2 * lnr, 0.0))
    return AmplitudeFit(float(amp), float(err), float(amp / err), chi2_min, chi2_null, n - 1,
                        chi2_pte(chi2_min, n - 1), chi2_pte(chi2_null, n), n, factor, float(delta),
                        likelihood, float(lo), float(hi))


def chi2_against_zero(data, covariance, *, n_samples=None):
    """chi2 = d^T Psi d of a curve against zero; returns (chi2, dof, pte)."""
    d = np.asarray(data, dtype=float)
    psi, _ = _precision(covariance, d.size, n_samples)
    chi2 = float(d @ psi @ d)
    return chi2, d.size, chi2_pte(chi2, d.size)
