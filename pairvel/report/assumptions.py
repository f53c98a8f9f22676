"""What tau_mean assumes and what it is, stated beside the number.

tau_mean is the amplitude of the template T_CMB v12(r) / c in the measured curve.  It therefore
scales as 1/b with the tracer bias and inversely with the velocity scale (f sigma_8) of the linear
template, and it depends on the cosmology, the fit range and the trend-loss factor the template
carries.  It is also an *aperture* optical depth: the compensated aperture returns the mean over
the disc minus the mean over the annulus of the beam-convolved optical-depth map, not the integral
over a tracer's profile.  :func:`assumptions` collects all of it as the flat dict summary.json keeps
(``assumptions``: short label -> number or short text); the report and the terminal show it.

Everything here reads attributes only, so a result read back from an output folder (whose config
is a plain namespace of summary.json's ``config``) gives the same dict.
"""

from __future__ import annotations

__all__ = ["assumptions", "assumptions_markdown", "beam_fwhm", "closing_lines", "tau_mean_meaning"]

import math

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..maps.photometry import point_source_fraction
from ..model.cosmology import distance_convention

#: How the two redshifts of a run differ (report and summary.json).
REDSHIFTS_NOTE = ("z_eff is the mean redshift of the measured pairs in the fit range, weighted as the estimator "
                  "weights them; the template is averaged over the redshifts of the pairs (theory.redshift_weighting) "
                  "and z_template is the mean of that distribution (equal to z_eff with redshift_weighting = "
                  "'effective'). The velocity scale of the template is f sigma_8 over those redshifts.")


def beam_fwhm(config) -> tuple[float | None, str | None]:
    """The map's Gaussian beam FWHM in arcmin and the key it came from, or (None, None)."""
    for section, key in (("aperture", "beam_fwhm_arcmin"), ("prefilter", "beam_fwhm_arcmin")):
        value = getattr(getattr(config, section, None), key, None)
        if value is not None:
            return float(value), f"{section}.{key}"
    return None, None


def tau_mean_meaning(config) -> dict:
    """What tau_mean measures for the run's aperture, and, with a beam FWHM, the factor to a profile integral.

    ``point_source_fraction`` f: a beam-convolved point-like profile of integral Y gives the aperture
    f Y / (pi theta^2) (:func:`pairvel.maps.photometry.point_source_fraction`), so such tracers have a
    mean profile integral tau_mean pi theta^2 / f; ``profile_integral_arcmin2_per_unit_tau_mean`` is
    pi theta^2 / f.  Given only for a fixed angular radius (a physical radius changes theta per tracer).
    """
    ap = config.aperture
    theta = float(ap.radius_arcmin)
    kpc = getattr(ap, "radius_kpc", None)
    where = (f"a disc of {kpc:g} kpc {getattr(ap, 'radius_kpc_kind', 'proper')} (theta per tracer)" if kpc is not None
             else f"theta = {theta:g} arcmin")
    out = {"definition": (f"the mean optical depth the compensated aperture measures at {where}: the beam-convolved "
                          f"optical depth averaged over the disc minus its average over the annulus theta..sqrt(2) "
                          f"theta, over the tracers as the pairwise estimator weights them; not the integral over a "
                          f"tracer's profile")}
    fwhm, key = beam_fwhm(config)
    if fwhm is not None and kpc is None:
        f = point_source_fraction(theta, fwhm)
        out.update({"beam_fwhm_arcmin": fwhm, "beam_from": key, "point_source_fraction": f,
                    "profile_integral_arcmin2_per_unit_tau_mean": math.pi * theta**2 / f if f > 0 else math.inf,
                    "profile_integral_sr_per_unit_tau_mean": math.pi * (theta * ARCMIN_RAD) ** 2 / f if f > 0
                    else math.inf})
    return out


def _fit_range(result) -> str:
    e, use = np.asarray(result.edges), np.asarray(result.in_fit, dtype=bool)
    k = np.flatnonzero(use)
    if not k.size:
        return "no bin"
    return f"{e[k[0]]:g}-{e[k[-1] + 1]:g} Mpc ({k.size} of {use.size} bins)"


def _trend_loss(result) -> str | None:
    loss = result.extra.get("template", {}).get("trend_loss_model")
    if loss:
        kept = loss["kept_fraction"]
        return f"{min(kept):.3f}-{max(kept):.3f} (the template is multiplied by it, bin by bin)"
    if getattr(result.config.trend, "enabled", True):
        return "not modelled (theory.model_trend_loss = false): tau_mean is biased low by the loss"
    return None


#: theory.likelihood -> how tau_mean and its error are made from the curve and its covariance.
ESTIMATOR_NOTES = {
    "hartlap": "least squares with the Hartlap-corrected inverse covariance",
    "hartlap-percival": "least squares with the Hartlap-corrected inverse covariance, error x sqrt(m1)",
    "sellentin-heavens": "least squares, interval of the Sellentin-Heavens likelihood",
    "variance-weighted": "bins weighted by 1/variance, error sqrt(w^T C w) from the whole covariance",
}


def _bias(cfg, info: dict):
    """theory.bias, or the pair-weighted b_eff derived from the proxy (theory.bias_from_proxy)."""
    derived = info.get("bias_from_proxy")
    return cfg.theory.bias if derived is None else derived["b_eff"]


def assumptions(result) -> dict:
    """summary.json's ``assumptions``: short label -> number or short text (see the module notes)."""
    cfg, info = result.config, result.extra.get("template", {})
    cosmo = cfg.cosmology
    out = {"bias b": _bias(cfg, info),
           "z_eff (measured pairs in the fit range)": float(result.z_eff)}
    if "z_mean_model" in info:
        out["z_template (mean over the template's pair redshifts)"] = float(info["z_mean_model"])
    if info.get("f_sigma8_at_z_eff") is not None:
        out["f sigma_8 at z_eff"] = info["f_sigma8_at_z_eff"]
    if info.get("f_sigma8_template") is not None:
        out["f sigma_8 at z_template"] = info["f_sigma8_template"]
    out.update({"h": cosmo.h, "Omega_m": cosmo.omega_m, "Omega_b": cosmo.omega_b, "sigma_8": cosmo.sigma_8,
                "n_s": cosmo.n_s, "distances": distance_convention(cosmo)})
    if "power_spectrum" in info:
        out["P(k)"] = info["power_spectrum"]
    if "growth_rate" in info:
        out["growth rate"] = info["growth_rate"] + " (matter + Lambda)"
    out["fit range"] = _fit_range(result)
    out["amplitude estimator"] = ESTIMATOR_NOTES.get(cfg.theory.likelihood, cfg.theory.likelihood)
    if cfg.covariance.estimator == "jackknife":
        out["jackknife sample k drops"] = ("region k's tracers" if cfg.covariance.jackknife_deletes == "tracers"
                                           else "every pair touching region k")
    loss = _trend_loss(result)
    if loss is not None:
        out["trend-loss factor"] = loss
    meaning = tau_mean_meaning(cfg)
    out["tau_mean"] = meaning["definition"]
    if "point_source_fraction" in meaning:
        out[f"beam FWHM [arcmin] ({meaning['beam_from']})"] = meaning["beam_fwhm_arcmin"]
        out["point-source fraction f (aperture value x pi theta^2 / profile integral)"] = \
            meaning["point_source_fraction"]
        out["profile integral per unit tau_mean [arcmin^2]"] = meaning["profile_integral_arcmin2_per_unit_tau_mean"]
    return out


def assumptions_markdown(summary_assumptions: dict) -> str:
    """The report section: the assumptions table and the two redshifts explained."""
    lines = ["tau_mean scales as 1/b and inversely with the template's velocity scale; it holds for these "
             "settings only.", "", "| assumption | value |", "|---|---|"]
    for label, value in summary_assumptions.items():
        shown = f"{value:.4g}" if isinstance(value, float) else str(value)
        lines.append(f"| {label} | {shown} |")
    return "\n".join(lines + ["", REDSHIFTS_NOTE])


def closing_lines(result) -> list:
    """Two short lines for the terminal summary: what tau_mean assumes, and what it is."""
    cfg, info = result.config, result.extra.get("template", {})
    c = cfg.cosmology
    fs8 = info.get("f_sigma8_at_z_eff")
    first = (f"  assumes b = {_bias(cfg, info):.4g}" + (f", f sigma_8(z_eff) = {fs8:.3f}" if fs8 is not None else "")
             + f"; h = {c.h:g}, Omega_m = {c.omega_m:g}, sigma_8 = {c.sigma_8:g}; fit {_fit_range(result)}")
    meaning = tau_mean_meaning(cfg)
    theta = cfg.aperture.radius_arcmin
    second = (f"  tau_mean: disc-minus-annulus optical depth at {theta:g}' (not a profile integral" +
              (f"; a beam-sized point source keeps f = {meaning['point_source_fraction']:.3f})"
               if "point_source_fraction" in meaning else ")"))
    if getattr(cfg.aperture, "radius_kpc", None) is not None:
        second = f"  tau_mean: disc-minus-annulus optical depth in a {cfg.aperture.radius_kpc:g} kpc aperture " \
                 f"(not a profile integral)"
    return [first, second]
