"""Joint fit of the mean optical depth and the velocity amplitude f sigma_8, with a prior on tau_mean.

At fixed b sigma_8 (what galaxy clustering measures) linear theory gives v12 proportional to
f sigma_8: v12 = -(2/3) H a r (f sigma_8)(b sigma_8) xibar_1 / (1 + (b sigma_8)^2 xi_1), with xi_1 and
xibar_1 normalised to sigma_8 = 1.  The model of the measured curve is therefore

    p(r) = tau_mean (s / s_fid) t_fid(r),     s = f sigma_8 at the pairs' redshift,

where t_fid = T_CMB v12_fid / c is the template and s_fid its f sigma_8.  The data constrain only
the product A = tau_mean s / s_fid (the amplitude of the one-parameter fit): the posterior in
(tau_mean, s) is a ridge along the hyperbola tau_mean s = A s_fid, and only a prior on tau_mean
(from the config: a Gaussian) turns it into a constraint on s.  The posterior is evaluated on a grid
with the same likelihood as the amplitude fit (Hartlap-corrected Gaussian or Sellentin-Heavens),
flat in s on [0, S_MAX_OVER_FID s_fid].
"""

from __future__ import annotations

__all__ = ["S_MAX_OVER_FID", "VelocityScaleFit", "fit_velocity_scale", "hpd_levels", "plot_velocity_scale"]

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..core.errors import InputError, PairvelWarning
from ..core.plotstyle import new_figure, plot_style, save_figure
from .fit import ONE_SIGMA, AmplitudeFit

#: Upper end of the flat prior on f sigma_8, in units of the template's value.
S_MAX_OVER_FID = 3.0


@dataclass(frozen=True)
class VelocityScaleFit:
    """Grid posterior of (tau_mean, f sigma_8) and the marginal constraint on f sigma_8.

    Attributes
    ----------
    tau_grid : ndarray of shape (n_tau,)
    s_grid : ndarray of shape (n_s,)
        f sigma_8 values.
    posterior : ndarray of shape (n_tau, n_s)
        Normalised to sum 1.
    s_fid : float
        f sigma_8 of the template.
    amplitude, amplitude_error : float
        A = tau_mean s / s_fid from the one-parameter fit (what the data measure).
    prior : tuple (mean, sigma) or None
    s_mean, s_std, s_lower_68, s_upper_68 : float
        Marginal of f sigma_8 (nan without a prior: it is then set by the grid's bounds).
    tau_mean_post, tau_std_post : float
        Marginal of tau_mean.
    likelihood : str
    n_samples : int or None
        Jackknife regions behind the covariance (what the Sellentin-Heavens likelihood needs), kept
        so the fit can be made again from another amplitude fit (blinding, unblinding).
    """

    tau_grid: np.ndarray
    s_grid: np.ndarray
    posterior: np.ndarray
    s_fid: float
    amplitude: float
    amplitude_error: float
    prior: tuple | None
    s_mean: float
    s_std: float
    s_lower_68: float
    s_upper_68: float
    tau_mean_post: float
    tau_std_post: float
    likelihood: str
    n_samples: int | None = None

    def as_dict(self) -> dict:
        """Headline numbers (no grids) for summary.json."""
        return {"parameters": "tau_mean and f_sigma8 (velocity amplitude)",
                "model": "p(r) = tau_mean * (f_sigma8 / f_sigma8_template) * T_CMB * v12_template(r) / c",
                "f_sigma8_template": self.s_fid, "measured_product_A": self.amplitude,
                "measured_product_A_error": self.amplitude_error, "likelihood": self.likelihood,
                "tau_prior": None if self.prior is None else {"mean": self.prior[0], "sigma": self.prior[1]},
                "f_sigma8_mean": self.s_mean, "f_sigma8_std": self.s_std,
                "f_sigma8_68": [self.s_lower_68, self.s_upper_68],
                "tau_mean_posterior_mean": self.tau_mean_post, "tau_mean_posterior_std": self.tau_std_post,
                "f_sigma8_prior_range": [0.0, S_MAX_OVER_FID * self.s_fid], "n_samples": self.n_samples,
                "grid_size": [int(self.tau_grid.size), int(self.s_grid.size)]}


def hpd_levels(posterior, masses=(ONE_SIGMA, 0.9545)):
    """Density thresholds enclosing the given probability masses (highest-density regions)."""
    flat = np.sort(np.asarray(posterior, dtype=float).ravel())[::-1]
    cum = np.cumsum(flat) / flat.sum()
    return [float(flat[min(np.searchsorted(cum, m), flat.size - 1)]) for m in masses]


def _log_like(a, fit: AmplitudeFit, n_samples):
    """ln L of the amplitude A, from the one-parameter fit's chi2 curve (exact for a linear model)."""
    if fit.likelihood != "sellentin-heavens":  # Gaussian in A about the fit, with its error
        return -0.5 * (fit.chi2_min + ((a - fit.amplitude) / fit.error) ** 2)
    # Sellentin-Heavens: chi2 with the plain inverse is the Hartlap chi2 / factor; recover sigma_0 from
    # the Student-t half-width error = sigma_0 sqrt((nu + chi2_min)/nu) t_ppf (pairvel.stats.fit notes)
    nu = n_samples - 1
    c2min = fit.chi2_min / fit.precision_factor
    scale = fit.error / stats.t.ppf(0.5 + ONE_SIGMA / 2, nu)
    sigma_0 = scale / np.sqrt((nu + c2min) / nu)
    return -0.5 * n_samples * np.log1p((c2min + ((a - fit.amplitude) / sigma_0) ** 2) / nu)


def fit_velocity_scale(fit: AmplitudeFit, s_fid: float, *, n_samples=None, tau_prior=None,
                       n_tau: int = 301, n_s: int = 301) -> VelocityScaleFit:
    """Posterior of (tau_mean, f sigma_8) from the one-parameter fit of the same curve.

    Parameters
    ----------
    fit : AmplitudeFit
        The amplitude fit of the measured curve against the template (its likelihood is reused).
    s_fid : float
        f sigma_8 of the template at the pairs' redshift.
    n_samples : int, optional
        Jackknife regions (needed for the Sellentin-Heavens likelihood).
    tau_prior : (mean, sigma), optional
        Gaussian prior on tau_mean; without it f sigma_8 is not constrained.
    n_tau, n_s : int
        Grid sizes.

    Notes
    -----
    For a model linear in A = tau_mean s / s_fid the likelihood depends on (tau_mean, s) only through
    A, so it is evaluated from the one-parameter fit: chi2(A) = chi2_min + (A - A_hat)^2 / sigma^2.
    """
    if not (np.isfinite(s_fid) and s_fid > 0):
        raise InputError(f"the template's f sigma_8 must be finite and > 0; got {s_fid!r}")
    if fit.likelihood == "sellentin-heavens" and n_samples is None:
        raise InputError("the Sellentin-Heavens joint fit needs n_samples (the number of jackknife regions)")
    if tau_prior is not None:
        mu, sig = (float(x) for x in tau_prior)
        if not (np.isfinite(mu) and np.isfinite(sig) and sig > 0):
            raise InputError(f"the prior on tau_mean needs a finite mean and sigma > 0; got ({mu}, {sig})")
    a_hat, a_err = fit.amplitude, fit.error
    s = np.linspace(0.0, S_MAX_OVER_FID * s_fid, n_s)
    if tau_prior is not None:
        tau = np.linspace(mu - 5 * sig, mu + 5 * sig, n_tau)
    else:  # cover the ridge A within +-5 sigma for s from s_fid/10 to the top of the s range
        ends = np.array([a_hat - 5 * a_err, a_hat + 5 * a_err, 0.0])
        span = np.concatenate([ends * 10.0, ends / S_MAX_OVER_FID])
        tau = np.linspace(span.min(), span.max(), n_tau)
    amp = tau[:, None] * s[None, :] / s_fid
    lnp = _log_like(amp, fit, n_samples)
    if tau_prior is not None:
        lnp = lnp - 0.5 * ((tau[:, None] - mu) / sig) ** 2
    post = np.exp(lnp - lnp.max())
    post /= post.sum()
    ps = post.sum(axis=0)
    pt = post.sum(axis=1)
    tau_m = float(np.sum(pt * tau))
    tau_sd = float(np.sqrt(np.sum(pt * (tau - tau_m) ** 2)))
    if tau_prior is not None:
        s_m = float(np.sum(ps * s))
        s_sd = float(np.sqrt(np.sum(ps * (s - s_m) ** 2)))
        cdf = np.cumsum(ps)
        lo, hi = (float(np.interp(q, cdf, s)) for q in (0.5 - ONE_SIGMA / 2, 0.5 + ONE_SIGMA / 2))
    else:
        s_m = s_sd = lo = hi = float("nan")
    edge_mass = float(ps[-max(1, n_s // 50):].sum()) if tau_prior is not None else 0.0
    if edge_mass > 0.01:
        warnings.warn(f"the f sigma_8 posterior reaches the top of its flat prior ({s[-1]:.3g}; {edge_mass:.1%} of the "
                      f"mass in the top 2%): the marginal is truncated; check the prior on tau_mean",
                      PairvelWarning, stacklevel=2)
    return VelocityScaleFit(tau, s, post, float(s_fid), float(a_hat), float(a_err),
                            None if tau_prior is None else (mu, sig), s_m, s_sd, lo, hi, tau_m, tau_sd,
                            fit.likelihood, None if n_samples is None else int(n_samples))


def plot_velocity_scale(vfit: VelocityScaleFit, folder, stem: str) -> list[str]:
    """Contour plot of the (tau_mean, f sigma_8) posterior with 68% and 95% regions; writes
    ``<stem>.pdf`` and ``<stem>.png`` into ``folder`` and returns their names."""
    with plot_style():
        fig = new_figure(width="column", height_in=3.0)
        _draw_velocity_scale(fig.subplots(), vfit)
        return save_figure(fig, folder, stem)


def _draw_velocity_scale(ax, vfit: VelocityScaleFit) -> None:
    levels = hpd_levels(vfit.posterior)
    x = vfit.tau_grid * 1e4
    ax.contourf(x, vfit.s_grid, vfit.posterior.T, levels=[levels[1], levels[0], vfit.posterior.max() * 1.001],
                colors=["#9ecae1", "#3182bd"])
    ax.contour(x, vfit.s_grid, vfit.posterior.T, levels=[levels[1], levels[0]], colors="k", linewidths=0.8)
    s_line = np.linspace(vfit.s_grid[1], vfit.s_grid[-1], 200)
    ax.plot(vfit.amplitude * vfit.s_fid / s_line * 1e4, s_line, "r--", lw=1,
            label=r"$\bar\tau\, f\sigma_8 / (f\sigma_8)_{\rm tmpl}$ = best-fit amplitude")
    ax.axhline(vfit.s_fid, color="0.4", lw=0.8, ls=":", label=f"template fσ8 = {vfit.s_fid:.3f}")
    if vfit.prior is not None:
        ax.axvspan((vfit.prior[0] - vfit.prior[1]) * 1e4, (vfit.prior[0] + vfit.prior[1]) * 1e4, color="0.9",
                   zorder=0, label="prior on τ̄ (±1σ)")
    ax.set_xlim(x.min(), x.max())
    ax.set_ylim(vfit.s_grid.min(), vfit.s_grid.max())
    ax.set_xlabel(r"mean optical depth $\bar\tau$ [$10^{-4}$]")
    ax.set_ylabel(r"velocity amplitude $f\sigma_8$")
    ax.set_title("joint fit: 68% and 95% regions")
    ax.legend(loc="upper right")
