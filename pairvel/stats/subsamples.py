"""Fits per subsample: bins of the mass/luminosity proxy, each with its own curve, covariance and template.

Each proxy bin keeps its tracers' (trend-corrected) temperatures, positions and jackknife regions;
regions with no tracer of the bin are dropped and the rest relabelled, so the Hartlap factor or the
Sellentin-Heavens likelihood uses the number of regions the bin really has.  The template is rebuilt
for each bin from its own pair counts and redshift distribution (same bias for every bin: the
template shape barely depends on it at these separations, and the fitted tau_mean absorbs the rest).
The pair pass runs once per bin on the data temperatures only (no null sets).
"""

from __future__ import annotations

__all__ = ["ProxyBinFit", "fit_proxy_bins", "plot_proxy_bins"]

import itertools
from dataclasses import dataclass

import numpy as np

from ..core.constants import C_KM_S, T_CMB_UK
from ..core.errors import InputError, PairvelError
from ..core.plotstyle import new_figure, plot_style, save_figure
from ..model.template import template_for_run
from ..pairs.estimator import pairwise_momentum
from .covariance import jackknife_covariance
from .fit import AmplitudeFit, fit_amplitude


@dataclass(frozen=True)
class ProxyBinFit:
    """The fit of one proxy bin; ``fit`` is None (and ``problem`` says why) when it could not be done."""

    proxy_min: float
    proxy_max: float
    proxy_median: float
    n_tracers: int
    n_pairs: int
    n_regions: int
    z_mean: float
    fit: AmplitudeFit | None
    problem: str | None = None

    def as_dict(self) -> dict:
        out = {"proxy_min": self.proxy_min, "proxy_max": self.proxy_max, "proxy_median": self.proxy_median,
               "n_tracers": self.n_tracers, "n_pairs": self.n_pairs, "n_regions": self.n_regions,
               "z_mean": self.z_mean, "problem": self.problem}
        if self.fit is not None:  # the flat headline numbers, and the whole fit to read back
            f = self.fit
            out.update(tau_mean=f.amplitude, tau_mean_error=f.error, snr=f.snr, chi2_min=f.chi2_min,
                       pte_min=f.pte_min, chi2_null=f.chi2_null, pte_null=f.pte_null, fit=f.as_dict())
        return out


def fit_proxy_bins(proxy_edges, *, proxy, positions, temperatures, redshifts, regions, edges, in_fit,
                   theory_cfg, cosmo, power=None, n_threads=None, template_factor=None, v12_table=None) -> tuple:
    """Fit tau_mean separately in each bin [lo, hi) of the proxy.

    Parameters
    ----------
    proxy_edges : sequence of float, increasing
    proxy, redshifts, temperatures : ndarray of shape (n,)
    positions : ndarray of shape (n, 3), comoving Mpc
    regions : ndarray of shape (n,), int
        Jackknife region labels of the whole sample.
    edges : ndarray of shape (nbins + 1,), Mpc
    in_fit : ndarray of shape (nbins,), bool
        The fit range.
    theory_cfg : pairvel.input.config.TheoryConfig
    cosmo : Cosmology
    power : TabulatedPower, optional
    template_factor : ndarray of shape (nbins,), optional
        Per-bin factor on every bin's template: the whole run's signal fraction kept by the
        redshift-trend removal (the trend is removed once from the whole sample, so its shells are
        the same for every proxy bin).
    v12_table : V12Table, optional
        For ``theory_cfg.velocity_model = "table"``.  With ``theory_cfg.bias_from_proxy`` each bin's
        bias comes from its own proxy values (equal tracer weights).

    Returns
    -------
    tuple of ProxyBinFit
        One per proxy bin; a bin with too few tracers, pairs or regions carries ``problem`` instead
        of a fit (the run goes on).
    """
    pe = np.asarray(proxy_edges, dtype=float)
    if pe.ndim != 1 or pe.size < 2 or np.any(np.diff(pe) <= 0) or not np.all(np.isfinite(pe)):
        raise InputError(f"proxy bin edges must be at least two finite, increasing values; got {pe.tolist()}")
    proxy = np.asarray(proxy, dtype=float)
    out = []
    for lo, hi in itertools.pairwise(pe):
        sel = (proxy >= lo) & (proxy < hi)
        n = int(sel.sum())
        med = float(np.median(proxy[sel])) if n else float("nan")
        zm = float(np.mean(redshifts[sel])) if n else float("nan")
        if n < 10:
            out.append(ProxyBinFit(float(lo), float(hi), med, n, 0, 0, zm, None, f"only {n} tracers"))
            continue
        _, reg = np.unique(regions[sel], return_inverse=True)
        n_reg = int(reg.max()) + 1
        pr = pairwise_momentum(positions[sel], temperatures[sel], edges, regions=reg.astype(np.int64),
                               redshifts=redshifts[sel], n_threads=n_threads)
        n_pairs = int(pr.pair_counts.sum())
        ok = np.all(np.isfinite(pr.p_jk), axis=0) & np.isfinite(pr.p)
        if not ok[in_fit].all():
            out.append(ProxyBinFit(float(lo), float(hi), med, n, n_pairs, n_reg, zm, None,
                                   "fitted separation bins without pairs in some jackknife sample"))
            continue
        weight = pr.denominator * in_fit
        z_eff = float(np.sum(weight * np.nan_to_num(pr.z_eff)) / np.sum(weight))
        v12, _ = template_for_run(theory_cfg, cosmo, edges, pair_counts=pr.pair_counts, z_tracers=redshifts[sel],
                                  z_eff=z_eff, power=power, proxy=proxy[sel], v12_table=v12_table)
        if template_factor is not None:
            v12 = v12 * template_factor
        cov = jackknife_covariance(np.where(np.isfinite(pr.p_jk), pr.p_jk, 0.0))
        try:
            fit = fit_amplitude(np.where(ok, pr.p, 0.0), T_CMB_UK * v12 / C_KM_S, cov, n_samples=n_reg,
                                use=in_fit, likelihood=theory_cfg.likelihood)
        except PairvelError as err:  # too few regions for the bins, singular covariance: report, go on
            out.append(ProxyBinFit(float(lo), float(hi), med, n, n_pairs, n_reg, zm, None, str(err)))
            continue
        out.append(ProxyBinFit(float(lo), float(hi), med, n, n_pairs, n_reg, zm, fit))
    return tuple(out)


def plot_proxy_bins(bins, folder, stem: str, *, proxy_name: str, tau_all=None, tau_all_error=None) -> list[str]:
    """tau_mean against the median proxy of each bin, with the whole-sample value as a band;
    writes ``<stem>.pdf`` and ``<stem>.png`` into ``folder`` and returns their names."""
    with plot_style():
        fig = new_figure(width="column", height_in=2.8)
        _draw_proxy_bins(fig.subplots(), bins, proxy_name, tau_all, tau_all_error)
        return save_figure(fig, folder, stem)


def _draw_proxy_bins(ax, bins, proxy_name, tau_all, tau_all_error) -> None:
    done = [b for b in bins if b.fit is not None]
    if tau_all is not None:
        ax.axhspan((tau_all - tau_all_error) * 1e4, (tau_all + tau_all_error) * 1e4, color="0.88",
                   label="whole sample (±1σ)")
    ax.axhline(0.0, color="0.6", lw=0.8)
    if done:
        x = np.array([b.proxy_median for b in done])
        xerr = np.array([[b.proxy_median - b.proxy_min, b.proxy_max - b.proxy_median] for b in done]).T
        y = np.array([b.fit.amplitude for b in done]) * 1e4
        yerr = np.array([b.fit.error for b in done]) * 1e4
        ax.errorbar(x, y, xerr=xerr, yerr=yerr, fmt="o", color="C0", capsize=2, label="proxy bins")
    ax.set_xlabel(f"{proxy_name} (median of the bin; bars: bin range)")
    ax.set_ylabel(r"mean optical depth $\bar\tau$ [$10^{-4}$]")
    ax.legend()
