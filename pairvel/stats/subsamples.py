"""Fits per subsample: bins of the mass/luminosity proxy, each with its own curve, template and fit, and
one joint covariance of all the bins.

Each proxy bin keeps its tracers' (trend-corrected) temperatures, positions and the whole sample's
jackknife regions, so that delete-one sample k of every bin removes the same region k and the
samples are aligned across bins (:mod:`pairvel.stats.jointcov`); a bin without tracers in region k
deletes no pair in sample k.  Where the data's jackknife re-estimates the redshift trend without
each region, so do the bins' samples.  The Hartlap factor or the Sellentin-Heavens likelihood of a
bin's own fit uses the number of regions the bin really occupies.  The template is rebuilt for each
bin from its own pair counts and redshift distribution (same bias for every bin: the template shape
barely depends on it at these separations, and the fitted tau_mean absorbs the rest).  The pair pass
runs once per bin on the data temperatures and the re-trended jackknife sets (no null sets).
"""

from __future__ import annotations

__all__ = ["ProxyBinFit", "fit_proxy_bins", "joint_markdown", "joint_summary", "plot_proxy_bins"]

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
from .jointcov import amplitude_covariance, amplitude_weights, correlation, covariance_block, joint_jackknife_covariance


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
                   theory_cfg, cosmo, power=None, n_threads=None, template_factor=None, retrended=None,
                   weights=None, tau_all=None, v12_table=None) -> tuple:
    """Fit tau_mean separately in each bin [lo, hi) of the proxy, and the joint covariance of the bins.

    Parameters
    ----------
    proxy_edges : sequence of float, increasing
    proxy, redshifts, temperatures : ndarray of shape (n,)
    positions : ndarray of shape (n, 3), comoving Mpc
    regions : ndarray of shape (n,), int
        Jackknife region labels 0..n_jk-1 of the whole sample; every bin keeps them, so that sample
        k of every bin deletes the same region k.
    edges : ndarray of shape (nbins + 1,), Mpc
    in_fit : ndarray of shape (nbins,), bool
        The fit range.
    theory_cfg : pairvel.input.config.TheoryConfig
    cosmo : Cosmology
    power : TabulatedPower, optional
    template_factor : ndarray of shape (nbins,), optional
        The whole run's signal fraction F(r) kept by the redshift-trend removal.  The trend is
        removed once from the whole sample, and what it takes from a pair is the shells' mean
        temperature, whose optical depth is the whole sample's, not the bin's; so a bin's curve is
        modelled as (tau_b - tau_all (1 - F)) t_b with t_b = T_CMB v12_b / c, and fitted as
        p_b + tau_all (1 - F) t_b = tau_b t_b.  Without ``tau_all`` it multiplies the template
        (tau_b F t_b: exact only when every bin has the sample's optical depth).
    tau_all : float, optional
        The whole sample's fitted tau_mean (with ``template_factor``).
    retrended : ndarray of shape (n_jk, n), optional
        The primary radius's temperatures with the redshift trend estimated without each region
        (:func:`pairvel.pipeline.retrended_sets`): when given, bin sample k uses set k, as the
        data's own jackknife does.
    weights : ndarray of shape (n,), optional
        Per-tracer pair weights, as in the main pair pass.
    v12_table : V12Table, optional
        For ``theory_cfg.velocity_model = "table"``.  With ``theory_cfg.bias_from_proxy`` each bin's
        bias comes from its own proxy values (equal tracer weights).

    Returns
    -------
    bins : tuple of ProxyBinFit
        One per proxy bin; a bin with too few tracers, pairs or regions carries ``problem`` instead
        of a fit (the run goes on).
    joint : dict or None
        The joint jackknife covariance of the fitted bins (:func:`joint_summary`); None when fewer
        than two bins have a fit.
    """
    pe = np.asarray(proxy_edges, dtype=float)
    if pe.ndim != 1 or pe.size < 2 or np.any(np.diff(pe) <= 0) or not np.all(np.isfinite(pe)):
        raise InputError(f"proxy bin edges must be at least two finite, increasing values; got {pe.tolist()}")
    proxy = np.asarray(proxy, dtype=float)
    n_jk = int(regions.max()) + 1
    out, curves = [], {}
    for b, (lo, hi) in enumerate(itertools.pairwise(pe)):
        sel = (proxy >= lo) & (proxy < hi)
        n = int(sel.sum())
        med = float(np.median(proxy[sel])) if n else float("nan")
        zm = float(np.mean(redshifts[sel])) if n else float("nan")
        n_reg = int(np.unique(regions[sel]).size)

        def skipped(problem, n_pairs=0, n_reg=n_reg):
            return ProxyBinFit(float(lo), float(hi), med, n, n_pairs, n_reg, zm, None, problem)

        if n < 10:
            out.append(skipped(f"only {n} tracers", n_reg=0))
            continue
        pr, samples = _bin_pass(sel, positions, temperatures, redshifts, regions, edges, n_jk, retrended, weights,
                                n_threads)
        n_pairs = int(pr.pair_counts.sum())
        ok = np.all(np.isfinite(samples), axis=0) & np.isfinite(pr.p[0])
        if not ok[in_fit].all():
            out.append(skipped("fitted separation bins without pairs in some jackknife sample", n_pairs))
            continue
        weight = pr.denominator * in_fit
        z_eff = float(np.sum(weight * np.nan_to_num(pr.z_eff)) / np.sum(weight))
        v12, _ = template_for_run(theory_cfg, cosmo, edges, pair_counts=pr.pair_counts, z_tracers=redshifts[sel],
                                  z_eff=z_eff, power=power, proxy=proxy[sel], v12_table=v12_table)
        t_uk = T_CMB_UK * v12 / C_KM_S
        offset = np.zeros_like(t_uk)
        if template_factor is not None and tau_all is not None:  # the trend's loss follows the whole sample's tau
            offset = tau_all * (1.0 - template_factor) * t_uk
        elif template_factor is not None:
            t_uk = t_uk * template_factor
        p, samples = np.where(ok, pr.p[0], 0.0) + offset, np.where(ok, samples, 0.0) + offset
        try:
            fit = fit_amplitude(p, t_uk, jackknife_covariance(samples), n_samples=n_reg, use=in_fit,
                                likelihood=theory_cfg.likelihood)
        except PairvelError as err:  # too few regions for the bins, singular covariance: report, go on
            out.append(skipped(str(err), n_pairs))
            continue
        out.append(ProxyBinFit(float(lo), float(hi), med, n, n_pairs, n_reg, zm, fit))
        curves[b] = (p, samples, t_uk)
    return tuple(out), joint_summary(curves, in_fit, n_regions=[out[b].n_regions for b in curves],
                                     likelihood=theory_cfg.likelihood)


def _bin_pass(sel, positions, temperatures, redshifts, regions, edges, n_jk, retrended, weights, n_threads):
    """The pair pass of one proxy bin's tracers, and its (n_jk, nbins) delete-one samples on the whole
    sample's regions: sample k of a bin without tracers in region k deletes no pair (it is the whole
    curve, re-trended without region k when ``retrended`` is given)."""
    values = temperatures[sel][None, :]
    if retrended is not None:
        values = np.vstack([values, retrended[:, sel]])
    pr = pairwise_momentum(positions[sel], values, edges, regions=regions[sel].astype(np.int64),
                           redshifts=redshifts[sel], weights=None if weights is None else weights[sel],
                           n_threads=n_threads)
    k = np.arange(pr.n_jk)
    if retrended is None:
        samples = np.repeat(pr.p[:1], n_jk, axis=0)
        samples[k] = pr.p_jk[0]
    else:
        samples = pr.p[1:].copy()
        samples[k] = pr.p_jk[1 + k, k]
    return pr, samples


def joint_summary(curves: dict, in_fit, *, n_regions, likelihood="hartlap") -> dict | None:
    """The joint jackknife covariance of the fitted proxy bins and the covariance of their tau_mean.

    ``curves`` maps a bin's index to (p, samples, template) of a fitted bin.  Returns a dict (None for
    fewer than two bins): ``bins`` (indices), ``n_samples`` (the fewest regions any of them has: the
    Hartlap count of a fit across them), ``tau`` and ``tau_covariance`` (:mod:`pairvel.stats.jointcov`),
    ``tau_correlation`` and ``covariance`` (the curves' joint covariance, bin-major).
    """
    if len(curves) < 2:
        return None
    idx = sorted(curves)
    joint = joint_jackknife_covariance([curves[b][1] for b in idx])
    nb = len(in_fit)
    w = np.array([amplitude_weights(curves[b][2], covariance_block(joint, g, g, nb), in_fit, likelihood=likelihood)
                  for g, b in enumerate(idx)])
    tau_cov = amplitude_covariance(w, joint)
    return {"bins": idx, "n_samples": int(min(n_regions)), "tau": [float(w[g] @ curves[b][0]) for g, b in enumerate(idx)],
            "tau_covariance": tau_cov.tolist(), "tau_correlation": correlation(tau_cov).tolist(),
            "covariance": joint.tolist()}


def joint_markdown(bins, joint: dict | None) -> list:
    """Report lines under the proxy-bin table: the best bin with the number of bins fitted, and the
    correlation of the bins' tau_mean from their joint covariance."""
    tried = [(k, b) for k, b in enumerate(bins) if b.fit is not None]
    if not tried:
        return []
    k, best = max(tried, key=lambda kb: kb[1].fit.snr)
    lines = ["", f"Highest S/N in bin {k} [{best.proxy_min:g}, {best.proxy_max:g}) ({best.fit.snr:+.2f}; best of "
                 f"{len(tried)} bins fitted): a bin picked for its S/N after the fact overstates it."]
    if joint is not None:
        lines += ["", f"Correlation of tau_mean between bins (joint jackknife covariance, {len(joint['bins'])} bins on "
                      f"the same regions; use it for any fit across bins):", "",
                  "| bin | " + " | ".join(str(b) for b in joint["bins"]) + " |", "|---:|" + "---:|" * len(joint["bins"])]
        lines += [f"| {b} | " + " | ".join(f"{c:+.2f}" for c in row) + " |"
                  for b, row in zip(joint["bins"], joint["tau_correlation"])]
    return lines


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
