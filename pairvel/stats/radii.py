"""Several aperture radii in one run: the radius list, a tau_mean fit per radius, and their outputs.

The pipeline measures every radius at once (one photometry pass returns an (n_radii, N) stack),
puts the extra radii through the same pair pass as rows of the temperature stack, and fits the
same template to each radius's curve with that radius's own jackknife covariance.  The main
result stays the primary radius (``aperture.radius_arcmin``); this module only adds a table
(``aperture_radii.ecsv``), a figure (``tau_vs_radius.png``) and a report section.
"""

from __future__ import annotations

__all__ = ["RadiusFit", "fit_radii", "radius_joint", "plot_radii", "write_radius_outputs", "radius_report"]

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.plotstyle import new_figure, plot_style, save_figure
from .covariance import jackknife_covariance
from .fit import AmplitudeFit, fit_amplitude
from .simcov import simulation_covariance
from .jointcov import amplitude_covariance, amplitude_weights, correlation, joint_jackknife_covariance


@dataclass(frozen=True)
class RadiusFit:
    """tau_mean fitted to the pairwise curve measured with one aperture radius."""

    radius_arcmin: float
    primary: bool
    fit: AmplitudeFit | None
    p: np.ndarray
    p_err: np.ndarray
    problem: str | None = None

    def as_dict(self) -> dict:
        out = {"radius_arcmin": self.radius_arcmin, "primary": self.primary, "problem": self.problem,
               "p_uk": self.p.tolist(), "p_err_uk": self.p_err.tolist()}
        if self.fit is not None:  # the flat headline numbers, and the whole fit to read back
            out.update(tau_mean=self.fit.amplitude, tau_mean_error=self.fit.error, snr=self.fit.snr,
                       chi2_min=self.fit.chi2_min, pte_min=self.fit.pte_min, fit=self.fit.as_dict())
        return out


def fit_radii(radii, p_rows, p_jk_rows, template_uk, *, n_jk, in_fit, likelihood, sim_rows=None) -> list:
    """One :class:`RadiusFit` per radius.

    Parameters
    ----------
    radii : ndarray of shape (n_radii,), arcmin
        Primary first (see :func:`aperture_radii`).
    p_rows : ndarray of shape (n_radii, nbins), uK
        Pairwise curves, one per radius.
    p_jk_rows : ndarray of shape (n_radii, n_jk, nbins), uK
        Their delete-one jackknife samples.
    template_uk : ndarray of shape (nbins,), uK per unit tau
    n_jk : int
    in_fit : ndarray of shape (nbins,), bool
    likelihood : str
        As ``theory.likelihood``.
    sim_rows : ndarray of shape (n_radii, n_sim, nbins), uK, optional
        Curves of simulated skies measured at each radius (``covariance.estimator = "simulations"``);
        when given, each radius's covariance is theirs instead of the jackknife's.
    """
    out = []
    for k, r in enumerate(np.asarray(radii, dtype=float)):
        p, p_jk = np.asarray(p_rows[k]), np.asarray(p_jk_rows[k])
        if not (np.all(np.isfinite(p)) and np.all(np.isfinite(p_jk))):
            out.append(RadiusFit(float(r), k == 0, None, p, np.full(p.shape, np.nan),
                                 problem="a separation bin has no pairs in some jackknife sample"))
            continue
        cov, n_samples = jackknife_covariance(p_jk), n_jk
        if sim_rows is not None:
            cov, n_samples = simulation_covariance(sim_rows[k]), len(sim_rows[k])
        fit = fit_amplitude(p, template_uk, cov, n_samples=n_samples, use=in_fit, likelihood=likelihood)
        out.append(RadiusFit(float(r), k == 0, fit, p, np.sqrt(np.diag(cov))))
    return out


def radius_joint(fits: list, p_jk_rows, template_uk, *, in_fit, likelihood="hartlap") -> dict | None:
    """The joint jackknife covariance of the radii's curves and the covariance of their tau_mean.

    Every radius's jackknife samples come from the same pair pass and regions (re-trended the same
    way), so they are aligned and :func:`pairvel.stats.jointcov.joint_jackknife_covariance` applies.
    Returns None unless at least two radii have a fit; else a dict with ``radius_arcmin``, ``tau``,
    ``tau_covariance``, ``tau_correlation``, ``n_samples`` and ``covariance`` (the curves' joint
    covariance, radius-major, in the order of ``radius_arcmin``).
    """
    done = [k for k, f in enumerate(fits) if f.fit is not None]
    if len(done) < 2:
        return None
    samples = np.asarray(p_jk_rows)[done]
    joint = joint_jackknife_covariance(samples)
    nb = samples.shape[-1]
    w = np.array([amplitude_weights(template_uk, joint[g * nb:(g + 1) * nb, g * nb:(g + 1) * nb], in_fit,
                                   likelihood=likelihood)
                  for g in range(len(done))])
    tau_cov = amplitude_covariance(w, joint)
    return {"radius_arcmin": [fits[k].radius_arcmin for k in done], "tau": [float(w[g] @ fits[k].p)
                                                                         for g, k in enumerate(done)],
            "tau_covariance": tau_cov.tolist(), "tau_correlation": correlation(tau_cov).tolist(),
            "n_samples": int(samples.shape[1]), "covariance": joint.tolist()}


def write_radius_outputs(fits: list, folder: Path) -> list:
    """aperture_radii.ecsv (the figure: :func:`plot_radii`); returns the file names written."""
    from astropy.table import Table

    table = Table()
    table["radius_arcmin"] = [f.radius_arcmin for f in fits]
    table["primary"] = [f.primary for f in fits]
    for key, attr in (("tau_mean", "amplitude"), ("tau_mean_error", "error"), ("snr", "snr"),
                      ("chi2_min", "chi2_min"), ("pte_min", "pte_min")):
        table[key] = [np.nan if f.fit is None else float(getattr(f.fit, attr)) for f in fits]
    table["p_uk"] = np.array([f.p for f in fits])
    table["p_err_uk"] = np.array([f.p_err for f in fits])
    table["problem"] = [f.problem or "" for f in fits]
    table["radius_arcmin"].unit = "arcmin"
    table["p_uk"].unit = table["p_err_uk"].unit = "uK"
    table.meta["description"] = ("tau_mean fitted to the pairwise curve of each aperture radius (same tracers, "
                                 "template and fit range; covariance from each radius's own jackknife samples); "
                                 "p_uk and p_err_uk hold the curve per separation bin")
    table.write(folder / "aperture_radii.ecsv", format="ascii.ecsv")
    return ["aperture_radii.ecsv"]


def plot_radii(fits: list, folder: Path, stem: str) -> list[str]:
    """tau_mean and its S/N against the aperture radius; writes ``<stem>.pdf`` and ``<stem>.png``
    into ``folder`` and returns their names."""
    with plot_style():
        fig = new_figure(width="page", height_in=2.8)
        _draw_radii(fig.subplots(1, 2), fits)
        fig.suptitle("Signal against aperture radius (one pair pass, same tracers)")
        return save_figure(fig, folder, stem)


def _draw_radii(axes, fits: list) -> None:
    ok = [f for f in fits if f.fit is not None]
    r = np.array([f.radius_arcmin for f in ok])
    order = np.argsort(r)
    tau = np.array([f.fit.amplitude for f in ok])[order]
    err = np.array([f.fit.error for f in ok])[order]
    snr = np.array([f.fit.snr for f in ok])[order]
    axes[0].errorbar(r[order], tau, err, fmt="o-", capsize=3, color="C0")
    axes[0].axhline(0.0, color="0.6", lw=0.8)
    axes[0].set_xlabel("aperture radius θ [arcmin]")
    axes[0].set_ylabel("fitted tau_mean")
    axes[1].plot(r[order], snr, "s-", color="C1")
    axes[1].axhline(0.0, color="0.6", lw=0.8)
    axes[1].set_xlabel("aperture radius θ [arcmin]")
    axes[1].set_ylabel("S/N of tau_mean")
    for f in ok:
        if f.primary:
            for ax, y in ((axes[0], f.fit.amplitude), (axes[1], f.fit.snr)):
                ax.plot([f.radius_arcmin], [y], marker="*", ms=14, color="C3", ls="none", label="main result")
    axes[0].legend(loc="best")


def radius_report(fits: list, joint: dict | None = None) -> str:
    """Markdown body of the report section on the radii."""
    lines = ["Each radius gives its own pairwise curve from the same pair pass; tau_mean is fitted with the "
             "main template and fit range. The main result is the starred radius. Files: aperture_radii.ecsv, "
             "tau_vs_radius.png.", "",
             "| radius [arcmin] | tau_mean | error | S/N | chi2_min | PTE |", "|---:|---:|---:|---:|---:|---:|"]
    for f in fits:
        star = " *" if f.primary else ""
        if f.fit is None:
            lines.append(f"| {f.radius_arcmin:g}{star} | - | - | - | - | - ({f.problem}) |")
        else:
            lines.append(f"| {f.radius_arcmin:g}{star} | {f.fit.amplitude:.4e} | {f.fit.error:.4e} | {f.fit.snr:+.2f} | "
                         f"{f.fit.chi2_min:.2f} | {f.fit.pte_min:.3g} |")
    tried = [f for f in fits if f.fit is not None]
    best = max(tried, key=lambda f: f.fit.snr, default=None)
    if best is not None:
        lines += ["", f"Highest S/N at {best.radius_arcmin:g} arcmin ({best.fit.snr:+.2f}; best of {len(tried)} radii "
                      f"fitted); radii are not independent (nested apertures on the same tracers), so do not pick the "
                      f"best one after the fact."]
    if joint is not None:
        corr = np.asarray(joint["tau_correlation"])
        head = " | ".join(f"{r:g}" for r in joint["radius_arcmin"])
        lines += ["", f"Correlation of tau_mean between radii (joint jackknife covariance of all radii, "
                      f"{joint['n_samples']} aligned delete-one samples; use it for any fit across radii):", "",
                  f"| radius [arcmin] | {head} |", "|---:|" + "---:|" * len(joint["radius_arcmin"])]
        lines += [f"| {r:g} | " + " | ".join(f"{c:+.2f}" for c in row) + " |"
                  for r, row in zip(joint["radius_arcmin"], corr)]
    return "\n".join(lines)
