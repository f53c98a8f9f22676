"""The figures of a run, drawn in the style of :mod:`pairvel.core.plotstyle` (PDF + 200-dpi PNG).

:func:`write_figures` draws every figure a result has data for and returns a list of
:class:`FigureFile` records (stem, report section, caption) in reading order; report.md and
report.html embed them from that list.  Figures are drawn from the result as written, so a
blinded result gives blinded figures.

The per-tracer diagnostics (footprint, redshifts, aperture temperatures) need ``result.tracers``
(an astropy Table, one row per tracer read); results without it, such as one read back from an
older folder, simply have no diagnostics figures.
"""

from __future__ import annotations

__all__ = ["FigureFile", "PTE_HIGH", "PTE_LOW", "OUTLIER_SIGMA", "format_tau", "pte_flag", "robust_outliers",
           "template_label", "write_figures", "plot_curve", "plot_nulls", "plot_covariance", "plot_tracers"]

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.plotstyle import new_figure, plot_style, save_figure

#: A null test's PTE below PTE_LOW (too much signal) or above PTE_HIGH (curves too close to zero
#: for their errors, e.g. overestimated errors) is flagged alike.
PTE_LOW, PTE_HIGH = 0.01, 0.99
#: Aperture temperatures further than this many robust standard deviations from the median are
#: marked as outliers in the diagnostics.
OUTLIER_SIGMA = 5.0


@dataclass(frozen=True)
class FigureFile:
    """One figure written as ``<stem>.pdf`` and ``<stem>.png``."""

    stem: str
    section: str  # "curve", "covariance", "nulls", "diagnostics", "radii", "proxy", "masstrend", "joint", "prefilter", "calibration", "templates"
    caption: str

    @property
    def png(self) -> str:
        return f"{self.stem}.png"


# ------------------------------------------------------------------------------ small helpers
def format_tau(value: float, error: float, *, name: str = "tau_mean") -> str:
    """``tau_mean = (2.03 +/- 0.19) x 10^-3``: value and error with one power of ten, plain text.

    The power is that of the larger of |value| and error; two decimals, or more when the error
    would otherwise show fewer than two significant digits.
    """
    if not (math.isfinite(value) and math.isfinite(error)):
        return f"{name} = {value:g} +/- {error:g}"
    top = max(abs(value), abs(error))
    if top == 0:
        return f"{name} = 0 +/- 0"
    power = math.floor(math.log10(top))
    v, e = value / 10.0**power, abs(error) / 10.0**power
    decimals = 2 if e == 0 else min(6, max(2, 1 - math.floor(math.log10(e))))
    body = f"{v:.{decimals}f} +/- {e:.{decimals}f}"
    return f"{name} = {body}" if power == 0 else f"{name} = ({body}) x 10^{power}"


def pte_flag(pte: float) -> str:
    """"low" below :data:`PTE_LOW`, "high" above :data:`PTE_HIGH`, else ""."""
    if not math.isfinite(pte):
        return ""
    return "low" if pte < PTE_LOW else "high" if pte > PTE_HIGH else ""


def robust_outliers(values, *, n_sigma: float = OUTLIER_SIGMA) -> tuple[np.ndarray, float, float]:
    """Mask of values further than ``n_sigma`` robust standard deviations from the median.

    The robust standard deviation is 1.4826 times the median absolute deviation (equal to sigma
    for a Gaussian).  Returns (mask, median, robust sigma); non-finite values are not outliers.
    """
    values = np.asarray(values, dtype=float)
    ok = np.isfinite(values)
    if not ok.any():
        return np.zeros(values.shape, dtype=bool), float("nan"), float("nan")
    med = float(np.median(values[ok]))
    sigma = 1.4826 * float(np.median(np.abs(values[ok] - med)))
    mask = ok & (np.abs(np.where(ok, values, med) - med) > n_sigma * sigma) if sigma > 0 else np.zeros(values.shape, bool)
    return mask, med, sigma


def template_label(result) -> str:
    """What the fitted model curve is: the linear-theory template, times the trend-loss factor when modelled."""
    info = result.extra.get("template", {})
    name = {"jsd99": "JSD99 template", "table": "v12-table template"}.get(info.get("velocity_model"),
                                                                           "linear-theory template")
    return f"{name} x trend-loss factor" if info.get("trend_loss_model") else name


def _blinded(result) -> bool:
    return bool(result.extra.get("blinding", {}).get("blinded"))


def _title_prefix(result) -> str:
    return "BLINDED - " if _blinded(result) else ""


# ------------------------------------------------------------------------------ the figures
def plot_curve(result, folder: Path) -> FigureFile:
    """pairwise: the measured curve, the fitted model and a residual panel in units of the error."""
    r, p, err, fit_bins = result.r_mid, result.p, result.p_err, result.in_fit
    f = result.fit
    fig = new_figure(width="column", height_in=4.6)
    top, bottom = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1]})
    top.axhline(0.0, color="0.6", lw=0.7)
    random = [n for n in result.nulls if n.kind == "random_positions"]
    if random:
        n = random[0]
        spread = n.p.std(axis=0, ddof=1) if n.n_real > 1 else np.zeros_like(r)
        top.fill_between(r, n.p.mean(axis=0) - spread, n.p.mean(axis=0) + spread, color="0.88", lw=0,
                         label=f"random-position null, mean +/- 1 sigma ({n.n_real})")
    top.errorbar(r[fit_bins], p[fit_bins], yerr=err[fit_bins], fmt="o", color="C0",
                 label=f"measured ({result.config.covariance.estimator} errors)")
    if (~fit_bins).any():
        top.errorbar(r[~fit_bins], p[~fit_bins], yerr=err[~fit_bins], fmt="o", mfc="none", color="C0",
                     label="measured, not fitted")
    top.plot(r, result.model_uk, color="C3", label=f"{template_label(result)}:\n{format_tau(f.amplitude, f.error)}")
    for name, curve in result.extra.get("plot_curves", {}).items():
        top.plot(r, curve, ls="--", lw=1.0, label=name)
    top.set_ylabel("p(r) [uK]")
    top.set_title(f"{_title_prefix(result)}{result.config.run.name}: S/N = {f.snr:.1f}")
    fig.legend(loc="outside lower center")  # below the panels: never over a data point
    with np.errstate(divide="ignore", invalid="ignore"):
        resid = (p - result.model_uk) / err
    bottom.axhspan(-1, 1, color="0.92", lw=0)
    bottom.axhline(0.0, color="0.6", lw=0.7)
    bottom.plot(r[fit_bins], resid[fit_bins], "o", color="C0")
    bottom.plot(r[~fit_bins], resid[~fit_bins], "o", mfc="none", color="C0")
    bottom.set_ylabel("(data - model)\n/ error")
    bottom.set_xlabel("comoving separation r [Mpc]")
    save_figure(fig, folder, "pairwise")
    return FigureFile("pairwise", "curve",
                      f"Measured pairwise momentum with the fitted {template_label(result)}; lower panel: "
                      f"residuals in units of the error ({result.n_tracers:,} tracers, aperture "
                      f"{result.config.aperture.radius_arcmin:g} arcmin, z_eff = {result.z_eff:.2f}).")


def _pte_text(pte: float) -> str:
    flag = pte_flag(pte)
    return f"PTE {pte:.3g}" + {"low": " (LOW)", "high": " (HIGH)", "": ""}[flag]


def plot_nulls(result, folder: Path) -> FigureFile:
    """nulls: per kind, the realisation curves and their mean, and the histogram of the realisations'
    chi2 against the chi2 distribution with the test's degrees of freedom."""
    from scipy import stats

    kinds = result.nulls
    fig = new_figure(width="page", height_in=4.4 if len(kinds) > 1 else 4.0)
    axes = fig.subplots(2, len(kinds), squeeze=False)
    for ax, n in zip(axes[0], kinds):
        ax.axhline(0.0, color="0.6", lw=0.7)
        for k in range(n.n_real):
            ax.plot(result.r_mid, n.p[k], color="0.8", lw=0.6)
        ax.errorbar(result.r_mid, n.p.mean(axis=0), yerr=n.mean_error, fmt="o", color="C2", label="mean")
        ax.set_title(f"{n.kind}\nmean: chi2 = {n.chi2_mean:.1f}/{n.dof}, {_pte_text(n.pte_mean)}")
        ax.set_xlabel("r [Mpc]")
    axes[0][0].set_ylabel("null p(r) [uK]")
    for ax, n in zip(axes[1], kinds):
        hi = max(float(np.max(n.chi2)) * 1.05, stats.chi2.ppf(0.995, n.dof))
        ax.hist(n.chi2, bins=np.linspace(0, hi, 16), density=True, color="C2", alpha=0.55,
                label=f"{n.n_real} realisations")
        xs = np.linspace(0, hi, 200)
        ax.plot(xs, stats.chi2.pdf(xs, n.dof), color="k", lw=1, label=f"chi2 pdf, {n.dof} dof")
        ax.axvline(n.chi2_mean, color="C3", lw=1, ls="--", label="mean curve")
        ax.set_xlabel("chi2 against zero")
        ax.legend(loc="upper right")
    axes[1][0].set_ylabel("probability density")
    fig.suptitle(f"{_title_prefix(result)}null tests: PTE < {PTE_LOW:g} or > {PTE_HIGH:g} is flagged")
    save_figure(fig, folder, "nulls")
    return FigureFile("nulls", "nulls", "Null tests: realisation curves (grey) and their mean; histogram of the "
                                        "realisations' chi2 against the chi2 distribution (dashed: the mean curve).")


def plot_covariance(result, folder: Path) -> list[FigureFile]:
    """correlation: the correlation matrix; covariance_errors: each estimator's errors when several ran."""
    sig = np.sqrt(np.diag(result.covariance))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = result.covariance / np.outer(sig, sig)
    fig = new_figure(width="column", height_in=2.9)
    ax = fig.subplots()
    e = result.edges
    im = ax.pcolormesh(e, e, corr, cmap="RdBu_r", vmin=-1, vmax=1)
    fig.colorbar(im, ax=ax, label="correlation")
    ax.set_xlabel("r [Mpc]")
    ax.set_ylabel("r [Mpc]")
    ax.set_aspect("equal")
    ax.set_title(f"{_title_prefix(result)}condition number {np.linalg.cond(result.covariance):.3g}")
    save_figure(fig, folder, "correlation")
    out = [FigureFile("correlation", "covariance", f"Correlation matrix of the covariance used in the fit "
                                                   f"({result.config.covariance.estimator}).")]
    diag = result.extra.get("covariance_diagnostics")
    if diag and len(diag["errors"]) > 1:
        used = diag["used"]
        fig = new_figure(width="column", height_in=3.4)
        top, bottom = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [2, 1]})
        ref = np.asarray(diag["errors"][used], dtype=float)
        for k, (name, errs) in enumerate(diag["errors"].items()):
            errs = np.asarray(errs, dtype=float)
            label = f"{name} ({diag['n_samples'].get(name, '?')} samples)" + (", used" if name == used else "")
            top.plot(result.r_mid, errs, "o-", color=f"C{k}", label=label)
            bottom.plot(result.r_mid, errs / ref, "o-", color=f"C{k}")
        top.set_ylabel("error of p(r) [uK]")
        top.set_title(_title_prefix(result) + "errors of each covariance estimate")
        top.legend(loc="best")
        bottom.axhline(1.0, color="0.6", lw=0.7)
        bottom.set_ylabel(f"ratio to {used}")
        bottom.set_xlabel("r [Mpc]")
        save_figure(fig, folder, "covariance_errors")
        out.append(FigureFile("covariance_errors", "covariance",
                              "Diagonal errors of every covariance estimate that ran, and their ratio to the one used."))
    return out


def _continuous_ra(ra: np.ndarray) -> np.ndarray:
    """RA shifted by multiples of 360 deg so that a footprint across RA = 0 is drawn in one piece."""
    if ra.size == 0:
        return ra
    centre = np.degrees(np.arctan2(np.mean(np.sin(np.radians(ra))), np.mean(np.cos(np.radians(ra))))) % 360
    return centre + ((ra - centre + 180.0) % 360.0) - 180.0


def plot_tracers(tracers, folder: Path, *, blinded: bool = False) -> list[FigureFile]:
    """Diagnostics from the per-tracer table: footprint, redshifts, temperatures against z, histogram."""
    col = {name: np.asarray(tracers[name]) for name in ("ra_deg", "dec_deg", "z", "region", "used", "t_raw_uK", "t_uK")}
    used = col["used"].astype(bool)
    prefix = "BLINDED - " if blinded else ""
    out = [_plot_footprint(col, used, tracers, folder, prefix), _plot_redshifts(col, used, folder, prefix)]
    out += _plot_temperatures(col, used, folder, prefix)
    return out


def _plot_footprint(col, used, tracers, folder, prefix) -> FigureFile:
    from matplotlib.ticker import FuncFormatter

    ra, dec = _continuous_ra(col["ra_deg"].astype(float)), col["dec_deg"].astype(float)
    fig = new_figure(width="column", height_in=3.0)
    ax = fig.subplots()
    regions = col["region"].astype(int)
    n_regions = np.unique(regions[used & (regions >= 0)]).size
    ax.scatter(ra[used], dec[used], c=regions[used] % 20, cmap="tab20", vmin=0, vmax=19, s=4, lw=0,
               label=f"used, coloured by region ({n_regions})")
    if (~used).any():
        ax.scatter(ra[~used], dec[~used], marker="x", color="k", s=8, lw=0.6, label=f"dropped ({int((~used).sum())})")
    if dec.size:
        ax.set_aspect(1.0 / max(np.cos(np.radians(np.median(dec))), 0.1), adjustable="datalim")
    ax.invert_xaxis()  # east to the left, as on the sky
    ax.xaxis.set_major_formatter(FuncFormatter(lambda x, _: f"{x % 360:g}"))
    ax.set_xlabel("right ascension [deg]")
    ax.set_ylabel("declination [deg]")
    ax.set_title(f"{prefix}footprint and jackknife regions")
    ax.legend(loc="best", markerscale=2)
    save_figure(fig, folder, "footprint")
    reasons = {}
    if "drop_reason" in tracers.colnames:
        for reason in np.asarray(tracers["drop_reason"])[~used]:
            reasons[str(reason)] = reasons.get(str(reason), 0) + 1
    why = "; ".join(f"{n} {r}" for r, n in sorted(reasons.items())) or "none dropped"
    return FigureFile("footprint", "diagnostics", f"Tracers on the sky, coloured by jackknife region; crosses: "
                                                  f"tracers dropped ({why}).")


def _plot_redshifts(col, used, folder, prefix) -> FigureFile:
    z = col["z"].astype(float)
    fig = new_figure(width="column", height_in=2.5)
    ax = fig.subplots()
    finite = np.isfinite(z)
    bins = np.histogram_bin_edges(z[finite], bins=30) if finite.any() else 10
    ax.hist(z[finite], bins=bins, histtype="step", color="0.4", label=f"read ({int(finite.sum()):,})")
    ax.hist(z[used & finite], bins=bins, color="C0", alpha=0.6, label=f"used ({int(used.sum()):,})")
    ax.set_xlabel("redshift z")
    ax.set_ylabel("tracers per bin")
    ax.set_title(f"{prefix}redshift distribution")
    ax.legend(loc="best")
    save_figure(fig, folder, "redshifts")
    return FigureFile("redshifts", "diagnostics", "Redshift distribution of the tracers read and of those used.")


def _plot_temperatures(col, used, folder, prefix) -> list[FigureFile]:
    z, t_raw, t = col["z"].astype(float)[used], col["t_raw_uK"].astype(float)[used], col["t_uK"].astype(float)[used]
    trend = t_raw - t
    order = np.argsort(z)
    fig = new_figure(width="column", height_in=2.7)
    ax = fig.subplots()
    ax.plot(z, t_raw, ".", ms=1.5, color="0.55", label="aperture temperature")
    ax.plot(z[order], trend[order], color="C3", label="removed redshift trend")
    ax.axhline(0.0, color="0.6", lw=0.7)
    lim = np.nanpercentile(np.abs(t_raw), 99.5) * 1.1 if t_raw.size else 1.0
    ax.set_ylim(-lim, lim)
    ax.set_xlabel("redshift z")
    ax.set_ylabel("T before trend removal [uK]")
    ax.set_title(f"{prefix}aperture temperature against redshift")
    ax.legend(loc="upper right")
    save_figure(fig, folder, "temperature_vs_z")

    mask, med, sigma = robust_outliers(t)
    fig = new_figure(width="column", height_in=2.6)
    ax = fig.subplots()
    ax.hist(t, bins=40, color="C0", alpha=0.6, label=f"used tracers ({t.size:,})")
    if np.isfinite(sigma) and sigma > 0:
        ax.axvspan(med - OUTLIER_SIGMA * sigma, med + OUTLIER_SIGMA * sigma, color="0.93", lw=0, zorder=0,
                   label=f"within {OUTLIER_SIGMA:g} robust sigma")
    if mask.any():
        ax.plot(t[mask], np.full(int(mask.sum()), 0.8), "v", color="C3", ms=5, label=f"outliers ({int(mask.sum())})")
    ax.set_yscale("log")
    ax.set_xlabel("aperture temperature after trend removal [uK]")
    ax.set_ylabel("tracers per bin")
    ax.set_title(f"{prefix}aperture temperatures")
    ax.legend(loc="upper right")
    save_figure(fig, folder, "temperatures")
    return [FigureFile("temperature_vs_z", "diagnostics", "Aperture temperature of each used tracer before the "
                                                          "redshift-trend removal, and the trend removed."),
            FigureFile("temperatures", "diagnostics",
                       f"Aperture temperatures used by the estimator; triangles: {int(mask.sum())} outliers beyond "
                       f"{OUTLIER_SIGMA:g} robust standard deviations (1.4826 x MAD) of the median.")]


# ------------------------------------------------------------------------------ all of them
def write_figures(result, folder) -> list[FigureFile]:
    """Draw every figure ``result`` has data for into ``folder``; return them in reading order."""
    from ..maps.prefilter import plot_transfer
    from ..stats.joint import plot_velocity_scale
    from ..stats.mockcalib import plot_mock_calibration
    from ..stats.radii import plot_radii
    from ..stats.subsamples import plot_proxy_bins

    folder = Path(folder)
    extra = result.extra
    with plot_style():
        out = [plot_curve(result, folder)]
        out += plot_covariance(result, folder)
        if result.nulls:
            out.append(plot_nulls(result, folder))
        tracers = getattr(result, "tracers", None)
        if tracers is not None and len(tracers):
            out += plot_tracers(tracers, folder, blinded=_blinded(result))
        if "radius_fits" in extra:
            plot_radii(extra["radius_fits"], folder, "tau_vs_radius")
            out.append(FigureFile("tau_vs_radius", "radii", "tau_mean and its S/N against the aperture radius "
                                                            "(star: the main result)."))
        if "proxy_bins" in extra:
            proxy = str(result.config.catalogue.proxy_column)
            plot_proxy_bins(extra["proxy_bins"], folder, "tau_vs_proxy", proxy_name=proxy,
                            tau_all=result.fit.amplitude, tau_all_error=result.fit.error)
            out.append(FigureFile("tau_vs_proxy", "proxy", f"tau_mean in bins of {proxy} (band: the whole sample)."))
        if not extra.get("mass_trend", {"problem": "none"}).get("problem"):
            from ..stats.masstrend import plot_mass_trend

            plot_mass_trend(extra["mass_trend"], folder, "tau_vs_mass", proxy_name=str(result.config.catalogue.proxy_column))
            out.append(FigureFile("tau_vs_mass", "masstrend", "tau_mean per proxy bin against mass with the fitted "
                                                              "power law tau_0 (M/M_0)^alpha (joint covariance)."))
        if "velocity_scale_fit" in extra:
            plot_velocity_scale(extra["velocity_scale_fit"], folder, "velocity_scale")
            out.append(FigureFile("velocity_scale", "joint", "Joint fit of tau_mean and f sigma_8: 68% and 95% regions."))
        if "mock_calibration" in extra:
            plot_mock_calibration(extra["mock_calibration"], folder, "mock_calibration")
            out.append(FigureFile("mock_calibration", "calibration", "Jackknife error over the scatter of p(r) "
                                                                     "across validation mocks, per bin."))
        if "compared" in extra.get("template", {}):
            from .templatemodels import SECTION, plot_templates

            plot_templates(extra["template"], folder, "templates")
            out.append(FigureFile("templates", SECTION, "Pairwise-velocity templates side by side and their ratio "
                                                        "to linear theory (crosses: bins left out of the fit)."))
        if "prefilter_transfer" in extra:
            plot_transfer(extra["prefilter_transfer"], extra["prefilter"], folder, "prefilter")
            out.append(FigureFile("prefilter", "prefilter", "Transfer function of the map pre-filter."))
    return out
