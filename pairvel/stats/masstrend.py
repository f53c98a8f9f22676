"""Optical depth against mass: tau(M) = tau_0 (M / M_0)^alpha fitted across the proxy bins.

In: the proxy bins' tau_mean with their joint covariance (:func:`pairvel.stats.subsamples.fit_proxy_bins`,
one jackknife over the same regions for every bin) and the proxy of every used tracer.
Out: tau_0, alpha, their errors and correlation, chi2 of the fit, and the significance of alpha
against 0 (a plain dict, JSON-ready; blinding: tau_0 and the taus scale with the hidden factor,
alpha, the pivot and every chi2 do not).

Model.  A bin's tau_mean is the pair-weighted mean of its tracers' optical depths, so the power law
is averaged over each bin's tracers rather than evaluated at one mass:

    tau_b(tau_0, alpha) = tau_0 g_b(alpha),   g_b(alpha) = < (M_i / M_0)^alpha >_{i in b},

with the catalogue weights when the run has them (each tracer's share of the pairs is taken as
equal within a bin).  chi2 = r^T Psi r with r = tau - tau_0 g(alpha) and Psi the inverse of the
taus' joint covariance times the Hartlap factor for ``n_samples`` regions and the number of bins.
For fixed alpha the best tau_0 is linear, g^T Psi tau / g^T Psi g; alpha minimises the profiled
chi2 (a grid over [-5, 5], then a bounded 1-D search).  Errors come from the inverse of the Fisher
matrix J^T Psi J, J = (g, tau_0 dg/dalpha), at the best fit.

Pivot.  M_0 is chosen so that tau_0 and alpha are uncorrelated: moving the pivot by a factor e^s
changes dg/dalpha into dg/dalpha - s g, so the Fisher matrix is diagonal for
s = g^T Psi dg/dalpha / g^T Psi g.  Starting from the geometric-mean mass of the fitted tracers,
the pivot is moved that way until the correlation is below 1e-6 (alpha does not change; tau_0 is
the power law at the new pivot).

Significance against alpha = 0: Delta chi2 = chi2(alpha = 0, best tau_0) - chi2_min, one degree of
freedom; ``alpha_significance`` is sign(alpha) sqrt(Delta chi2) and ``pte_alpha0`` its chi2 tail.
"""

from __future__ import annotations

__all__ = ["fit_mass_trend", "mass_trend_line", "mass_trend_report", "plot_mass_trend", "PROXY_SCALES"]

import numpy as np
from scipy import optimize, stats

from ..core.errors import PairvelError
from ..core.plotstyle import new_figure, plot_style, save_figure
from .fit import hartlap_factor

#: How the proxy column gives the mass: M = 10^proxy, or M = proxy.
PROXY_SCALES = ("log10", "linear")
_ALPHA_RANGE = (-5.0, 5.0)


def fit_mass_trend(bins, joint, *, proxy, proxy_scale: str, weights=None) -> dict:
    """Fit tau_0 (M / M_0)^alpha to the proxy bins' tau_mean with their joint covariance.

    Parameters
    ----------
    bins : sequence of ProxyBinFit
        Every proxy bin of the run (their ranges select the tracers).
    joint : dict or None
        :func:`pairvel.stats.subsamples.joint_summary` of the fitted bins.
    proxy : ndarray of shape (n,)
        The proxy of every used tracer.
    proxy_scale : {"log10", "linear"}
        M = 10^proxy or M = proxy.
    weights : ndarray of shape (n,), optional
        Catalogue weights of the tracers.

    Returns
    -------
    dict
        The fit (keys in the module notes and :data:`pairvel.report.blinding.EXTRA_RULES`), or one with
        only ``problem`` (and ``n_bins_fitted``) when fewer than three bins have a fit or the fit fails.
    """
    n_fitted = 0 if joint is None else len(joint["bins"])
    if n_fitted < 3:
        return {"problem": f"a power law needs at least 3 fitted proxy bins; {n_fitted} have a fit",
                "n_bins_fitted": n_fitted}
    idx = joint["bins"]
    proxy = np.asarray(proxy, dtype=float)
    w_all = np.ones(proxy.size) if weights is None else np.asarray(weights, dtype=float)
    masses, wts = [], []
    for b in idx:
        sel = (proxy >= bins[b].proxy_min) & (proxy < bins[b].proxy_max)
        m = 10.0 ** proxy[sel] if proxy_scale == "log10" else proxy[sel]
        if not np.all(m > 0):
            return {"problem": f"proxy bin {b} has masses <= 0; a power law needs M > 0 "
                               f"(theory.proxy_power_law = {proxy_scale!r})", "n_bins_fitted": n_fitted}
        masses.append(m)
        wts.append(w_all[sel] / w_all[sel].sum())
    tau = np.asarray(joint["tau"], dtype=float)
    cov = np.asarray(joint["tau_covariance"], dtype=float)
    try:
        factor = hartlap_factor(joint["n_samples"], n_fitted)
    except PairvelError as err:
        return {"problem": str(err), "n_bins_fitted": n_fitted}
    psi = factor * np.linalg.inv(cov)
    pivot = float(np.exp(np.sum([np.sum(w * np.log(m)) for m, w in zip(masses, wts)]) / len(masses)))
    model = _PowerLawModel(masses, wts, tau, psi)
    alpha = model.best_alpha(pivot)
    if alpha is None:
        return {"problem": f"the best alpha lies outside {list(_ALPHA_RANGE)}", "n_bins_fitted": n_fitted}
    for _ in range(20):  # move the pivot until tau_0 and alpha are uncorrelated
        shift = model.decorrelating_shift(alpha, pivot)
        pivot *= float(np.exp(shift))
        if abs(shift) < 1e-9:
            break
    return model.summary(alpha, pivot, factor=factor, n_samples=joint["n_samples"], bins=idx,
                         tau_error=np.sqrt(np.diag(cov)), proxy_scale=proxy_scale)


class _PowerLawModel:
    """tau_b = tau_0 < (M / M_0)^alpha >_b against the taus ``tau`` with precision ``psi``."""

    def __init__(self, masses, wts, tau, psi):
        self.masses, self.wts, self.tau, self.psi = masses, wts, tau, psi

    def g(self, alpha, pivot):
        """(g_b, dg_b / dalpha) of every bin."""
        g, dg = [], []
        for m, w in zip(self.masses, self.wts):
            ln = np.log(m / pivot)
            x = np.exp(alpha * ln)
            g.append(np.sum(w * x))
            dg.append(np.sum(w * x * ln))
        return np.array(g), np.array(dg)

    def profile(self, alpha, pivot):
        """(chi2, tau_0) with tau_0 at its best for this alpha."""
        g = self.g(alpha, pivot)[0]
        tau0 = (g @ self.psi @ self.tau) / (g @ self.psi @ g)
        r = self.tau - tau0 * g
        return float(r @ self.psi @ r), float(tau0)

    def best_alpha(self, pivot):
        grid = np.linspace(*_ALPHA_RANGE, 401)
        g = np.array([np.exp(np.outer(grid, np.log(m / pivot))) @ w for m, w in zip(self.masses, self.wts)]).T
        gp = g @ self.psi
        tau0 = (gp @ self.tau) / np.einsum("ab,ab->a", gp, g)
        r = self.tau[None, :] - tau0[:, None] * g
        chi2 = np.einsum("ab,bc,ac->a", r, self.psi, r)
        k = int(np.argmin(chi2))
        if k in (0, grid.size - 1):
            return None
        res = optimize.minimize_scalar(lambda a: self.profile(a, pivot)[0], bounds=(grid[k - 1], grid[k + 1]),
                                       method="bounded", options={"xatol": 1e-10})
        return float(res.x)

    def fisher(self, alpha, pivot):
        tau0 = self.profile(alpha, pivot)[1]
        g, dg = self.g(alpha, pivot)
        jac = np.column_stack([g, tau0 * dg])
        return jac.T @ self.psi @ jac

    def decorrelating_shift(self, alpha, pivot):
        g, dg = self.g(alpha, pivot)
        return float((g @ self.psi @ dg) / (g @ self.psi @ g))

    def summary(self, alpha, pivot, *, factor, n_samples, bins, tau_error, proxy_scale) -> dict:
        chi2_min, tau0 = self.profile(alpha, pivot)
        chi2_zero = self.profile(0.0, pivot)[0]
        cov = np.linalg.inv(self.fisher(alpha, pivot))
        err = np.sqrt(np.diag(cov))
        delta = max(chi2_zero - chi2_min, 0.0)
        dof = len(self.tau) - 2
        mass_mean = [float(np.exp(np.sum(w * np.log(m)))) for m, w in zip(self.masses, self.wts)]
        return {"proxy_scale": proxy_scale, "bins": list(bins), "mass_geometric_mean": mass_mean,
                "tau": self.tau.tolist(), "tau_error": tau_error.tolist(),
                "model_tau": (tau0 * self.g(alpha, pivot)[0]).tolist(),
                "pivot_mass": pivot, "tau_0": tau0, "tau_0_error": float(err[0]), "alpha": alpha,
                "alpha_error": float(err[1]), "correlation": float(cov[0, 1] / (err[0] * err[1])),
                "chi2_min": chi2_min, "dof": dof, "pte": float(stats.chi2.sf(chi2_min, dof)) if dof > 0 else None,
                "delta_chi2_alpha0": delta, "pte_alpha0": float(stats.chi2.sf(delta, 1)),
                "alpha_significance": float(np.sign(alpha) * np.sqrt(delta)),
                "n_samples": int(n_samples), "hartlap_factor": float(factor), "n_bins_fitted": len(self.tau),
                "problem": None}


def mass_trend_report(trend: dict, *, proxy_name: str) -> str:
    """Markdown body of the report section on tau against mass."""
    if trend.get("problem"):
        return f"No power law fitted: {trend['problem']}."
    mass = "10^" + proxy_name if trend["proxy_scale"] == "log10" else proxy_name
    pte = "-" if trend["pte"] is None else f"{trend['pte']:.3g}"
    lines = [f"tau(M) = tau_0 (M / M_0)^alpha with M = {mass}, fitted to the tau_mean of {trend['n_bins_fitted']} proxy "
             f"bins with their joint jackknife covariance (one set of regions for every bin; Hartlap factor "
             f"{trend['hartlap_factor']:.3f} for {trend['n_samples']} regions). The model averages the power law over "
             f"each bin's tracers. The pivot M_0 = {trend['pivot_mass']:.4g} is chosen so that tau_0 and alpha are "
             f"uncorrelated (correlation {trend['correlation']:+.1e}).", "",
             f"- tau_0 = {trend['tau_0']:.4e} ± {trend['tau_0_error']:.4e}",
             f"- alpha = {trend['alpha']:.3f} ± {trend['alpha_error']:.3f}; against alpha = 0: Delta chi2 = "
             f"{trend['delta_chi2_alpha0']:.2f} ({trend['alpha_significance']:+.2f} sigma, PTE {trend['pte_alpha0']:.3g})",
             f"- chi2 = {trend['chi2_min']:.2f} for {trend['dof']} dof (PTE {pte})", "",
             "| bin | geometric-mean M | tau_mean | error (joint covariance, before Hartlap) | power law |", "|---:|---:|---:|---:|---:|"]
    for b, m, t, e, mod in zip(trend["bins"], trend["mass_geometric_mean"], trend["tau"], trend["tau_error"],
                               trend["model_tau"]):
        lines.append(f"| {b} | {m:.4g} | {t:.4e} | {e:.4e} | {mod:.4e} |")
    return "\n".join(lines)


def mass_trend_line(trend: dict) -> str | None:
    """One line for the terminal's closing summary (None without a fit)."""
    if trend.get("problem"):
        return None
    return (f"  tau(M): alpha = {trend['alpha']:.2f} ± {trend['alpha_error']:.2f} ({trend['alpha_significance']:+.1f} "
            f"sigma against 0), tau_0 = {trend['tau_0']:.3e} ± {trend['tau_0_error']:.3e} at M_0 = "
            f"{trend['pivot_mass']:.3g} ({trend['n_bins_fitted']} proxy bins, joint covariance)")


def plot_mass_trend(trend: dict, folder, stem: str, *, proxy_name: str) -> list[str]:
    """tau_mean of each proxy bin against its geometric-mean mass with the fitted power law; writes
    ``<stem>.pdf`` and ``<stem>.png`` into ``folder`` and returns their names."""
    with plot_style():
        fig = new_figure(width="column", height_in=2.8)
        ax = fig.subplots()
        m = np.array(trend["mass_geometric_mean"])
        ax.errorbar(m, np.array(trend["tau"]) * 1e4, np.array(trend["tau_error"]) * 1e4, fmt="o", color="C0",
                    capsize=2, label="proxy bins (joint covariance)")
        ax.plot(m, np.array(trend["model_tau"]) * 1e4, "s", mfc="none", color="C3", label="power law, bin average")
        grid = np.geomspace(m.min() / 1.3, m.max() * 1.3, 100)
        ax.plot(grid, trend["tau_0"] * (grid / trend["pivot_mass"]) ** trend["alpha"] * 1e4, color="C3", lw=1,
                label=f"alpha = {trend['alpha']:.2f} ± {trend['alpha_error']:.2f}")
        ax.axhline(0.0, color="0.6", lw=0.8)
        ax.set_xscale("log")
        ax.set_xlabel("M = 10^" + proxy_name if trend["proxy_scale"] == "log10" else proxy_name)
        ax.set_ylabel(r"$\bar\tau$ [$10^{-4}$]")
        ax.legend(fontsize="small")
        return save_figure(fig, folder, stem)
