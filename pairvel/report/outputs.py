"""Write a run's tables, figure, summary and report into a new folder, all or nothing.

The files are written by :func:`write_outputs` through :mod:`pairvel.report.folders`, which
claims the output path, fills a hidden work folder beside it and swaps it in at the end; its
docstring says exactly what is guaranteed (concurrent commands, ``--force``, signals, runs that
were killed).  A run log captured by the caller (``run.log``) is the last output file written.
"""

from __future__ import annotations

__all__ = ["write_outputs", "OUTPUT_MARKER", "RUN_LOG", "prepare_output_dir", "report_sections", "write_folder_atomically"]

import json
import math
from pathlib import Path

import numpy as np

from ..stats.significance import significance_markdown, summary_lines
from .assumptions import assumptions, assumptions_markdown, closing_lines, tau_mean_meaning
from .blinding import check_declared
from .figures import PTE_HIGH, PTE_LOW, format_tau, pte_flag, template_label, write_figures
from .folders import OUTPUT_MARKER, RUN_LOG, prepare_output_dir, write_folder_atomically
from .html import render_html
from .templatemodels import SECTION as TEMPLATES_SECTION
from .templatemodels import comparison_lines, template_model_lines, write_template_table


def _json_default(obj):
    if isinstance(obj, (np.floating,)):
        return float(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _finite_or_none(obj):
    """JSON has no inf/nan: replace them by None, recursively."""
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, dict):
        return {k: _finite_or_none(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_finite_or_none(v) for v in obj]
    return obj


def _blinding(result) -> dict:
    return result.extra.get("blinding", {"blinded": False})


def _blind_tag(result) -> str:
    return "BLINDED (amplitude scaled by a hidden factor)" if _blinding(result).get("blinded") else "not blinded"


def _covariance_method(cc) -> str:
    if cc.estimator == "simulations":
        signal = " with a kSZ and thermal-SZ tracer signal" if cc.sim_signal_tau or cc.sim_signal_tsz_uk else ""
        return f"{cc.n_sim} simulated Gaussian sky maps{signal} through the same photometry and pair pass"
    if cc.estimator == "bootstrap":
        return f"bootstrap ({cc.n_bootstrap} replicates) over {cc.regions} sky regions, half-pair shares"
    return f"delete-one jackknife over {cc.regions} sky regions"


def summary_dict(result) -> dict:
    """The contents of summary.json: headline numbers, null test, selection and provenance."""
    fit = result.fit.as_dict()
    out = {
        "producer": "pairvel",
        "run_name": result.config.run.name,
        "blinded": bool(_blinding(result).get("blinded")),
        "blinding": _blinding(result),
        "tau_mean": fit["amplitude"],
        "tau_mean_error": fit["error"],
        "snr": fit["snr"],
        "chi2_null": fit["chi2_null"],
        "pte_null": fit["pte_null"],
        "chi2_min": fit["chi2_min"],
        "pte_min": fit["pte_min"],
        "dof": fit["dof"],
        "fit": fit,
        "z_eff": result.z_eff,
        "assumptions": assumptions(result),
        "tau_mean_meaning": tau_mean_meaning(result.config),
        "n_tracers": result.n_tracers,
        "n_pairs": int(result.pair_counts.sum()),
        "aperture_radius_arcmin": result.config.aperture.radius_arcmin,
        "covariance": {"method": _covariance_method(result.config.covariance),
                       "n_regions": result.n_jk,
                       "precision_correction": "Hartlap, Simon & Schneider 2007"},
        "template": {"kind": "linear-theory mean pairwise velocity",
                     "bias": result.config.theory.bias, "z_eff": result.z_eff,
                     "meaning": "p_model(r) = tau_mean * T_CMB * v12(r) / c"},
        "null_tests": [n.as_dict() for n in result.nulls],
        "null_tests_passed": all(n.passed for n in result.nulls),
        "selection": result.selection,
        "run_warnings": [w.as_dict() for w in result.warnings],
        "config": result.config.as_dict(),
        "provenance": result.provenance,
    }
    if "truth_check" in result.extra:
        out["truth_check"] = result.extra["truth_check"]
    if "template" in result.extra:
        out["template"].update(result.extra["template"])
    out.update(theory_summary(result))
    if "radius_fits" in result.extra:
        out["aperture_radii"] = [f.as_dict() for f in result.extra["radius_fits"]]
    if result.fit.likelihood == "sellentin-heavens":
        out["covariance"]["precision_correction"] = ("none: Sellentin & Heavens 2016 likelihood (the Hartlap factor "
                                                     "enters only the reported chi2 values)")
    if "empirical_significance" in result.extra:  # tau_mean among amplitudes fitted to signal-free curves
        out["empirical_significance"] = result.extra["empirical_significance"]
    if "rotations_used" in result.extra:
        out["null_rotations_used"] = result.extra["rotations_used"]
    if "covariance_diagnostics" in result.extra:
        out["covariance"]["diagnostics"] = result.extra["covariance_diagnostics"]
    if "region_seed_spread" in result.extra:  # tau_mean refitted with the regions of other seeds
        out["covariance"]["region_seed_spread"] = result.extra["region_seed_spread"]
    if "mock_calibration" in result.extra:  # per-bin errors against a validation run's mock scatter
        out["covariance"]["mock_calibration"] = result.extra["mock_calibration"]
    if "multifrequency" in result.extra:  # several frequency maps: weights, f_tSZ, noise cost
        out["multifrequency"] = result.extra["multifrequency"]
    if "prefilter" in result.extra:  # harmonic-space filter of the map
        out["prefilter"] = result.extra["prefilter"]
    if "cross" in result.extra:  # cross pairs with the [partner] catalogue
        out["cross"] = result.extra["cross"]
    if "channels" in result.extra:  # each frequency map alone, and their differences as nulls
        out["channels"] = result.extra["channels"]
    if "noise_weighting" in result.extra:  # aperture noise from a noise map, and the tracer weights
        out["noise_weighting"] = result.extra["noise_weighting"]
    return _finite_or_none(json.loads(json.dumps(out, default=_json_default)))


def conversion(result) -> dict:
    """How the fitted amplitude, tau_mean and a velocity scale relate, with the numbers of this run."""
    from ..core.constants import C_KM_S, T_CMB_UK

    uk_per_km_s = T_CMB_UK / C_KM_S
    tau = float(result.fit.amplitude)
    v_fit = result.v12_template[result.in_fit]
    info = result.extra.get("template", {})
    return {
        "statement": ("p(r) = tau_mean * T_CMB * v12(r) / c.  The fitted amplitude is tau_mean: the measured curve "
                      "is tau_mean times the template T_CMB v12_template(r) / c.  Only the product tau_mean * v12 is "
                      "measured, so a velocity scale different from the template's (e.g. f sigma_8 / "
                      "f_sigma8_template) rescales tau_mean inversely."),
        "uK_per_km_s_per_unit_tau": uk_per_km_s,
        "uK_per_km_s_at_fitted_tau": uk_per_km_s * tau,
        "km_s_per_uK_at_fitted_tau": (1.0 / (uk_per_km_s * tau)) if tau != 0 else float("inf"),
        "template_v12_km_s_in_fit_range": [float(v_fit.min()), float(v_fit.max())] if v_fit.size else None,
        "f_sigma8_template": info.get("f_sigma8_template"),
        "measured_tau_times_velocity_scale_over_template": tau,
    }


def theory_summary(result) -> dict:
    """summary.json entries for the conversion, the likelihood, proxy-bin fits and the joint fit."""
    out = {"conversion": conversion(result), "likelihood": result.fit.likelihood}
    if result.fit.likelihood == "sellentin-heavens":
        out["tau_mean_68"] = [result.fit.lower_68, result.fit.upper_68]
    if "proxy_bins" in result.extra:
        out["proxy_bins"] = {"proxy_column": result.config.catalogue.proxy_column,
                             "bins": [b.as_dict() for b in result.extra["proxy_bins"]]}
    if "velocity_scale_fit" in result.extra:
        out["velocity_scale_fit"] = result.extra["velocity_scale_fit"].as_dict()
    joint = {key: result.extra[key] for key in ("radius_joint", "proxy_joint") if key in result.extra}
    if joint:
        out["joint_covariances"] = joint
    if "mass_trend" in result.extra:
        out["tau_against_mass"] = result.extra["mass_trend"]
    return out


def _write_theory_outputs(result, folder: Path) -> list:
    """proxy_bins.ecsv and aperture_radii.ecsv when those fits ran; returns file names (figures:
    :func:`pairvel.report.figures.write_figures`)."""
    from astropy.table import Table

    written = []
    if "proxy_bins" in result.extra:
        rows = [b.as_dict() for b in result.extra["proxy_bins"]]
        table = Table()
        for key in ("proxy_min", "proxy_max", "proxy_median", "n_tracers", "n_pairs", "n_regions", "z_mean"):
            table[key] = [r[key] for r in rows]
        for key in ("tau_mean", "tau_mean_error", "snr", "chi2_min", "pte_min"):
            table[key] = [r.get(key, np.nan) for r in rows]
        table["problem"] = [r["problem"] or "" for r in rows]
        table.meta["description"] = (f"tau_mean fitted separately in bins of {result.config.catalogue.proxy_column}; "
                                     f"likelihood {result.fit.likelihood}")
        table.write(folder / "proxy_bins.ecsv", format="ascii.ecsv")
        written.append("proxy_bins.ecsv")
    if "radius_fits" in result.extra:
        from ..stats.radii import write_radius_outputs

        written += write_radius_outputs(result.extra["radius_fits"], folder)
    if "channels" in result.extra:
        from ..stats.perchannel import write_channel_table

        written.append(write_channel_table(result.extra["channels"], result.edges, folder))
    return written + write_template_table(result.extra.get("template", {}), folder)


def _theory_report(result, figures=()) -> list:
    """Report lines: template, likelihood, conversion, proxy bins, joint fit (with their figures)."""
    f = result.fit
    conv = conversion(result)
    info = result.extra.get("template", {})
    lines = ["", "## Template, likelihood and units", ""]
    if info:
        lines += [f"- power spectrum: {info.get('power_spectrum')}; growth rate: {info.get('growth_rate')}",
                  (f"- redshifts: {info.get('redshift_weighting')} (mean pair redshift of the model "
                   f"{info.get('z_mean_model', float('nan')):.3f}); separations inside bins: "
                   f"{info.get('separation_weighting')}"),
                  "- photo-z damping: " + ("none (spectroscopic redshifts)" if not info.get("photoz_model") else
                                            f"{info['photoz_model']}, sigma_z = {info['photoz_sigma_z0']:g} (1 + z)")]
        lines += template_model_lines(info)
        loss = info.get("trend_loss_model")
        if loss:
            kept = loss["kept_fraction"]
            lines.append(f"- redshift-trend removal: the template is multiplied by the linear-theory fraction of the "
                         f"signal the removal keeps on this catalogue, {kept[0]:.3f} in the first bin to "
                         f"{kept[-1]:.3f} in the last (Monte Carlo over {loss['pairs_per_bin']} pairs per bin; "
                         f"column trend_kept of the table)")
        elif result.config.trend.enabled:
            lines.append("- redshift-trend removal: its signal loss is not modelled (theory.model_trend_loss = false); "
                         "tau_mean is biased low by it")
    if f.likelihood == "sellentin-heavens":
        lines.append(f"- likelihood: Sellentin & Heavens (2016), {result.n_jk} jackknife regions; 68% interval of "
                     f"tau_mean [{f.lower_68:.4e}, {f.upper_68:.4e}]")
    elif f.likelihood == "hartlap-percival":
        lines.append(f"- likelihood: Gaussian with the Hartlap factor {f.precision_factor:.4f} and the error widened "
                     f"by sqrt(m1) for the covariance's own noise (Percival et al. 2014; {result.n_jk} jackknife regions)")
    else:
        lines.append(f"- likelihood: Gaussian with the Hartlap factor {f.precision_factor:.4f} "
                     f"({result.n_jk} jackknife regions)")
    lines += [f"- conversion: {conv['statement']}",
              f"- 1 km/s of v12 gives {conv['uK_per_km_s_per_unit_tau']:.4f} uK per unit optical depth, i.e. "
              f"{conv['uK_per_km_s_at_fitted_tau']:.3e} uK at the fitted tau_mean"
              + (f"; the template's f sigma_8 is {conv['f_sigma8_template']:.4f}" if conv["f_sigma8_template"] else "")]
    lines += comparison_lines(info) + _images(figures, TEMPLATES_SECTION)
    if "proxy_bins" in result.extra:
        lines += ["", f"## Fits per bin of {result.config.catalogue.proxy_column}", "",
                  "| proxy range | median | tracers | pairs | regions | tau_mean | error | S/N | note |",
                  "|---|---:|---:|---:|---:|---:|---:|---:|---|"]
        for b in result.extra["proxy_bins"]:
            fit_txt = (f"{b.fit.amplitude:.4e} | {b.fit.error:.4e} | {b.fit.snr:.2f}" if b.fit is not None
                       else "- | - | -")
            lines.append(f"| [{b.proxy_min:g}, {b.proxy_max:g}) | {b.proxy_median:.4g} | {b.n_tracers:,} | "
                         f"{b.n_pairs:,} | {b.n_regions} | {fit_txt} | {b.problem or ''} |")
        from ..stats.subsamples import joint_markdown

        lines += joint_markdown(result.extra["proxy_bins"], result.extra.get("proxy_joint"))
        lines += _images(figures, "proxy")
    if "velocity_scale_fit" in result.extra:
        v = result.extra["velocity_scale_fit"]
        lines += ["", "## Joint fit of tau_mean and f sigma_8", "",
                  (f"The data measure A = tau_mean f_sigma8 / {v.s_fid:.4f} = {v.amplitude:.4e} ± "
                   f"{v.amplitude_error:.4e}; tau_mean and f sigma_8 are degenerate along tau_mean f_sigma8 = const "
                   "(velocity_scale.png).")]
        if v.prior is None:
            lines.append("No prior on tau_mean is set (theory.tau_prior_mean / tau_prior_sigma), so f sigma_8 is "
                         "not constrained.")
        else:
            lines.append(f"With the prior tau_mean = {v.prior[0]:.4e} ± {v.prior[1]:.4e}: f sigma_8 = {v.s_mean:.4f} "
                         f"± {v.s_std:.4f} (68%: [{v.s_lower_68:.4f}, {v.s_upper_68:.4f}]; flat prior on "
                         f"[0, {v.s_grid[-1]:.3f}])")
    lines += _images(figures, "joint")
    return lines


def _write_tables(result, folder: Path) -> None:
    from astropy.io import fits
    from astropy.table import Table

    nb = result.edges.size - 1
    table = Table()
    table["r_min"] = result.edges[:-1]
    table["r_max"] = result.edges[1:]
    table["r_mid"] = result.r_mid
    table["p_uK"] = result.p
    table["p_err_uK"] = result.p_err
    table["n_pairs"] = result.pair_counts.astype(np.int64)
    table["z_pair"] = result.z_eff_bins
    table["v12_lin_km_s"] = result.v12_template
    loss = result.extra.get("template", {}).get("trend_loss_model")
    table["trend_kept"] = np.asarray(loss["kept_fraction"]) if loss else np.ones(nb)
    table["model_uK"] = result.model_uk
    table["in_fit"] = result.in_fit
    for name in ("r_min", "r_max", "r_mid"):
        table[name].unit = "Mpc"
    table["p_uK"].unit = table["p_err_uK"].unit = table["model_uK"].unit = "uK"
    table["v12_lin_km_s"].unit = "km / s"
    table["v12_lin_km_s"].description = "linear-theory pairwise velocity times trend_kept"
    table["trend_kept"].description = "predicted fraction of the signal the redshift-trend removal keeps (1: not modelled)"
    table.meta["description"] = "mean pairwise kSZ momentum (Ferreira et al. 1999 estimator) against comoving separation"
    table.meta["tau_mean"] = float(result.fit.amplitude)
    table.meta["tau_mean_error"] = float(result.fit.error)
    table.meta["blinding"] = _blind_tag(result)
    table.write(folder / "pairwise.ecsv", format="ascii.ecsv")

    hdr = fits.Header()
    hdr["BUNIT"] = ("uK2", "covariance of p in uK^2")
    hdr["NJK"] = (result.n_jk, "jackknife regions")
    hdr["NBINS"] = nb
    hdr["BLINDED"] = (bool(_blinding(result).get("blinded")), "values scaled by a hidden blinding factor")
    hdr["COMMENT"] = f"{_covariance_method(result.config.covariance)}; bins as in pairwise.ecsv"
    sig = np.sqrt(np.diag(result.covariance))
    corr = result.covariance / np.outer(sig, sig)
    hdus = [fits.PrimaryHDU(result.covariance, header=hdr),
            fits.ImageHDU(corr, name="CORRELATION"),
            fits.ImageHDU(result.p_jk, name="JACKKNIFE_SAMPLES"),
            fits.ImageHDU(result.edges, name="EDGES_MPC")]
    fits.HDUList(hdus).writeto(folder / "covariance.fits")

    for null in result.nulls:
        nt = Table()
        nt["r_mid"] = result.r_mid
        nt["r_mid"].unit = "Mpc"
        nt["p_mean_uK"] = null.p.mean(axis=0)
        nt["p_mean_err_uK"] = null.mean_error
        for k in range(null.n_real):
            nt[f"p_real{k:03d}_uK"] = null.p[k]
        nt.meta["description"] = f"null test: {null.description}"
        nt.meta["blinding"] = _blind_tag(result)
        nt.meta.update({k: v for k, v in null.as_dict().items() if k != "description"})
        nt.write(folder / f"null_{null.kind}.ecsv", format="ascii.ecsv")


def report_sections(result) -> dict:
    """Report sections made at write time from the data in ``result.extra`` (a blinded result gets
    blinded sections), then the free-text sections a caller added (the check against a truth)."""
    from ..maps.multifreq import combination_markdown
    from ..maps.noise import noise_markdown
    from ..maps.prefilter import prefilter_markdown
    from ..stats.covdiag import diagnostics_markdown
    from ..stats.mockcalib import SECTION_TITLE as CALIBRATION_TITLE
    from ..stats.mockcalib import calibration_markdown
    from ..stats.cross import cross_markdown
    from ..stats.perchannel import channels_markdown
    from ..stats.radii import radius_report
    from ..stats.regionseeds import SECTION_TITLE, spread_markdown

    from ..stats.masstrend import mass_trend_report

    proxy = str(result.config.catalogue.proxy_column)
    builders = (("radius_fits", "Signal against aperture radius",
                 lambda fits: radius_report(fits, result.extra.get("radius_joint"))),
                ("mass_trend", "Optical depth against mass", lambda t: mass_trend_report(t, proxy_name=proxy)),
                ("region_seed_spread", SECTION_TITLE, spread_markdown),
                ("prefilter", "Map pre-filter", prefilter_markdown),
                ("multifrequency", "Several frequency maps", combination_markdown),
                ("covariance_diagnostics", "Covariance diagnostics", lambda d: diagnostics_markdown(d, result.edges)),
                ("mock_calibration", CALIBRATION_TITLE, lambda d: calibration_markdown(d, result.edges)),
                ("cross", "Cross pairs with a second catalogue", cross_markdown),
                ("channels", "Each frequency map alone", lambda info: channels_markdown(info, result.fit)),
                ("noise_weighting", "Map noise and tracer weights", noise_markdown))
    sections = {title: build(result.extra[key]) for key, title, build in builders if key in result.extra}
    return sections | result.extra.get("report_sections", {})


#: Report sections (titles of :func:`report_sections`) followed by the figures of a figure section.
_SECTION_FIGURES = {"Signal against aperture radius": "radii", "Map pre-filter": "prefilter",
                    "Per-bin errors against mock scatter": "calibration",
                    "Optical depth against mass": "masstrend"}


def _images(figures, section: str) -> list:
    """Markdown image links to the PNG copies of the figures of one section."""
    out = []
    for f in figures:
        if f.section == section:
            out += ["", f"![{f.stem}]({f.png})", "", f"*{f.caption}* ({f.stem}.pdf, {f.png})"]
    return out


def _report(result, summary: dict, figures=()) -> str:
    f = result.fit
    lines = [
        f"# pairvel report: {result.config.run.name}",
        "",
        f"**Blinding: {_blind_tag(result)}.**",
        "",
        "## Headline",
        f"- mean optical depth: {format_tau(f.amplitude, f.error)} (S/N = {f.snr:.2f})",
        f"- chi2 against zero: {f.chi2_null:.3g} for {f.n_bins} bins (PTE {f.pte_null:.3g}); "
        f"best fit: {f.chi2_min:.3g} for {f.dof} dof (PTE {f.pte_min:.3g})",
        f"- {result.n_tracers:,} tracers, {int(result.pair_counts.sum()):,} pairs, effective redshift {result.z_eff:.3f}",
        f"- model: {template_label(result)}",
        *(f"- {line.strip()}" for line in closing_lines(result)),
        *(f"- {line.strip()}" for line in summary_lines(result.extra.get("empirical_significance"), f.snr)),
        "",
        "## What tau_mean assumes",
        "",
        assumptions_markdown(summary["assumptions"]),
        "",
        "## Measured curve", "",
        "| r_min [Mpc] | r_max [Mpc] | p [uK] | error [uK] | pairs | model [uK] | fitted |",
        "|---:|---:|---:|---:|---:|---:|:---:|",
    ]
    for k in range(result.edges.size - 1):
        lines.append(f"| {result.edges[k]:g} | {result.edges[k + 1]:g} | {result.p[k]:+.3g} | {result.p_err[k]:.3g} | "
                     f"{int(result.pair_counts[k]):,} | {result.model_uk[k]:+.3g} | {'yes' if result.in_fit[k] else 'no'} |")
    lines += _images(figures, "curve")
    lines += ["", "## Null tests", ""]
    if result.nulls:
        t = result.config.nulls.pte_threshold
        lines += [f"Mean curve of each kind against zero; a kind passes when its PTE lies between {t:g} and "
                  f"{1 - t:g}. A PTE below {PTE_LOW:g} or above {PTE_HIGH:g} is flagged alike. Covariance: the "
                  f"scatter of the kind's own realisations (Hotelling's T^2; chi2 is the chi2 of equal PTE), or the "
                  f"fit's when there are too few.",
                  "",
                  "| null test | realisations | covariance | chi2 (mean curve) | dof | PTE | PTE flag | result | "
                  "realisations with PTE < 0.05 | with PTE > 0.95 |",
                  "|---|---:|---|---:|---:|---:|:---:|:---:|---:|---:|"]
        for n in result.nulls:
            lines.append(f"| {n.description} | {n.n_real} | {n.covariance_from} | {n.chi2_mean:.3g} | {n.dof} | "
                         f"{n.pte_mean:.3g} | {pte_flag(n.pte_mean).upper() or '-'} | {n.verdict} | "
                         f"{int(np.sum(n.pte < 0.05))} | {int(np.sum(n.pte > 0.95))} |")
        lines += _images(figures, "nulls")
    if result.extra.get("empirical_significance"):
        lines += ["", "## Empirical significance", "",
                  significance_markdown(result.extra["empirical_significance"], f.amplitude, f.snr)]
    else:
        lines.append("No null test was configured.")
    lines += ["", "## Covariance", "", f"{_covariance_method(result.config.covariance)}."]
    lines += _images(figures, "covariance")
    lines += _theory_report(result, figures)
    lines += ["", "## Selection", ""] + [f"- {k}: {v}" for k, v in result.selection.items()]
    lines += _images(figures, "diagnostics")
    for section, body in report_sections(result).items():
        lines += ["", f"## {section}", "", body]
        lines += _images(figures, _SECTION_FIGURES.get(section, ""))
    lines += _warnings_report(result.warnings)
    prov = result.provenance
    lines += ["", "## Provenance", "",
              f"- config: {prov.get('config_file')} (sha256 {prov.get('config_sha256')}; git commit of its folder: "
              f"{prov.get('config_git_commit') or 'none'})",
              f"- catalogue: {prov['catalogue']['path']} (sha256 {prov['catalogue']['sha256']})",
              f"- map: {prov['map']['path']} (sha256 {prov['map']['sha256']})",
              *([f"- tracer table: {prov['tracer_table']['path']} (sha256 {prov['tracer_table']['sha256']}); "
                 "catalogue and map above are the table's"] if "tracer_table" in prov else []),
              f"- seed: {prov['seed']}; started {prov['started_utc']}",
              "- versions: " + ", ".join(f"{k} {v}" for k, v in prov["versions"].items()),
              "", "Data files: pairwise.ecsv, covariance.fits, null_<kind>.ecsv, summary.json; every figure as PDF "
                  "and PNG; this report also as report.html (self-contained)"
              + ("; tracers.fits (one row per catalogue row: used or why not, region, aperture temperatures)."
                 if result.tracers is not None else "."), ""]
    return "\n".join(lines)


def _warnings_report(kept) -> list:
    """The report's list of every warning the run raised (summary.json: run_warnings)."""
    lines = ["", "## Warnings during the run", ""]
    if not kept:
        return lines + ["None: the run raised no warning."]
    lines.append(f"{len(kept)} warning{'s' if len(kept) > 1 else ''}, in the order raised:")
    lines.append("")
    for w in kept:
        lines.append(f"- [{w.stage or 'before the first stage'}; {w.source}] {w.text}")
    return lines


def write_outputs(result, out_dir, *, force: bool = False, run_log=None, claim=None) -> Path:
    """Write every output of ``result`` into ``out_dir`` atomically; return the folder.

    Parameters
    ----------
    result : RunResult
        What :func:`pairvel.pipeline.run_pipeline` returned.
    out_dir : str or Path
        The new folder.
    force : bool, default False
        Replace an existing folder that pairvel wrote.
    run_log : callable() -> str, optional
        Returns the text of ``run.log``; see :func:`write_folder_atomically`.  Default: no log file.
    claim : OutputClaim, optional
        The caller's claim on ``out_dir`` (:func:`pairvel.report.folders.claim_output_dir`);
        default: claim it here.

    Raises
    ------
    OutputError
        The folder exists (without ``force``), may not be replaced, is claimed by another command,
        or cannot be written.
    """
    check_declared(result)  # every quantity has a blinding rule, blinded or not
    summary = summary_dict(result)

    def fill(tmp: Path) -> None:
        _write_tables(result, tmp)
        _write_theory_outputs(result, tmp)
        figures = write_figures(result, tmp)
        if result.tracers is not None:
            from .tracers import TRACER_TABLE, write_tracer_table

            write_tracer_table(result.tracers, tmp / TRACER_TABLE, blinding=_blinding(result))
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2) + "\n")
        (tmp / "report.md").write_text(_report(result, summary, figures))
        (tmp / "report.html").write_text(render_html(result, summary, figures, tmp), encoding="utf-8")

    return write_folder_atomically(out_dir, fill, force=force, run_log=run_log, claim=claim)
