"""Outputs of `pairvel velocities`: the per-cluster table (ECSV and FITS), the velocity-redshift figure,
a short report (velocities.md, summary.json) and the lines printed with the table.

Everything is made from the run object that :func:`pairvel.single_cluster.measure_cluster_velocities`
returns.  These velocities are not blinded: they come from single clusters, not from the pairwise
amplitude that the blinding of ``pairvel run`` hides, and the report says so.
"""

from __future__ import annotations

__all__ = ["velocity_table", "assumptions", "caution_lines", "terminal_lines", "velocity_markdown", "write_velocity_outputs",
           "TABLE_STEM", "FIGURE_STEM"]

import json
import math

import numpy as np

from ..core.plotstyle import new_figure, plot_style, save_figure
from ..core.provenance import __version__
from ..stats.clustervel import FLAG_NAMES, flag_text

TABLE_STEM = "cluster_velocities"
FIGURE_STEM = "velocity_vs_redshift"

#: The tSZ spectrum the fit used, by single_cluster.relativistic.
SPECTRUM = {
    False: "tSZ spectrum f(x) = x coth(x/2) - 4, non-relativistic: relativistic corrections are off "
           "(single_cluster.relativistic = false); at several keV they lower |f| by a few percent, and tau with it",
    True: "tSZ spectrum with its first-order relativistic correction at each cluster's T_e, f + theta_e Y_1 "
          "(Challinor & Lasenby 1998; single_cluster.relativistic = true); higher orders and the kSZ's "
          "relativistic corrections are not applied",
}

ASSUMPTIONS = (
    "tau = y m_e c^2 / (k_B T_e) with the stated electron temperature, taken as exact (its error is not in v_err)",
    "v_los = -c dT_kSZ / (T_CMB tau), positive receding; v_err to first order in the errors of y and dT_kSZ and "
    "their correlation",
    "the tSZ and the kSZ fill the aperture alike (same profile) and every map has the same beam",
    "channel covariance from compensated apertures at random positions: each map's noise plus the primary CMB, "
    "which is the same in every map and so a noise term of dT_kSZ only; one covariance for every cluster, so "
    "where the noise varies over the footprint the errors are its average",
    "tau_err holds the noise of y only: the fraction of a cluster's signal the aperture keeps (profile, beam, "
    "pixels) scales tau and is not in tau_err; it cancels in v_los when tSZ and kSZ fill the aperture alike",
)


def assumptions(run) -> list[str]:
    """What the velocities assume, one sentence each, the spectrum first."""
    return [SPECTRUM[bool(run.config.single_cluster.relativistic)], *ASSUMPTIONS]


def _common_rms(cov) -> float:
    """rms of the part of the aperture noise common to the maps (mean off-diagonal covariance; CMB)."""
    k = cov.shape[0]
    off = cov[~np.eye(k, dtype=bool)]
    return float(math.sqrt(max(off.mean(), 0.0)))


def velocity_table(run):
    """The per-cluster :class:`astropy.table.Table` (rows in catalogue order), its assumptions in ``meta``."""
    from astropy.table import Table

    dec, vel = run.decomposition, run.velocities
    order = np.argsort(run.row, kind="stable")
    cols = {"row": run.row, "ra": run.ra, "dec": run.dec, "z": run.z}
    if run.proxy is not None:
        cols["proxy"] = run.proxy
    for j, nu in enumerate(run.frequencies_ghz):
        cols[f"t_{nu:g}ghz_uk"] = run.t_channels_uk[:, j]
    sig_y, sig_t = np.sqrt(dec.cov[:, 0, 0]), np.sqrt(dec.cov[:, 1, 1])
    cols.update({
        "y": dec.y, "y_err": sig_y, "dt_ksz_uk": dec.dt_ksz_uk, "dt_ksz_err_uk": sig_t,
        "corr_y_dt": dec.cov[:, 0, 1] / (sig_y * sig_t), "fit_chi2": dec.chi2, "fit_pte": dec.fit_pte,
        "te_kev": vel.te_kev, "tau": vel.tau, "tau_err": vel.tau_err, "tau_snr": vel.tau_snr,
        "v_los_km_s": vel.v_km_s, "v_los_err_km_s": vel.v_err_km_s, "flags": run.flags,
        "cautions": np.array(flag_text(run.flags), dtype=str),
    })
    if run.truth is not None:
        cols["v_true_km_s"] = run.truth["v_true_km_s"]
        cols["tau_true"] = run.truth["tau_true"]
    table = Table({k: np.asarray(v)[order] for k, v in cols.items()})
    for name, unit in (("ra", "deg"), ("dec", "deg"), ("dt_ksz_uk", "uK"), ("dt_ksz_err_uk", "uK"), ("te_kev", "keV"),
                       ("v_los_km_s", "km/s"), ("v_los_err_km_s", "km/s")):
        table[name].unit = unit
    table.meta.update({
        "ORIGIN": f"pairvel {__version__} (pairvel velocities)",
        "CATALOG": run.catalogue_path,
        "TE_FROM": run.te_source,
        "APERTURE": f"compensated, radius {run.config.aperture.radius_arcmin:g} arcmin",
        "FREQS": ", ".join(f"{nu:g}" for nu in run.frequencies_ghz) + " GHz",
        "FTSZ": ", ".join(f"{fi:+.5f}" for fi in run.f_tsz),
        "TCMB_K": run.config.cosmology.t_cmb_k,
        "FLAGBITS": "; ".join(f"{1 << i} {name}" for i, name in enumerate(FLAG_NAMES)),
        "comments": assumptions(run),
    })
    return table


def caution_lines(run) -> list[str]:
    """Where the method is weak for this run: counts per flag and the noise terms, one caution per line."""
    sc = run.config.single_cluster
    n = run.flags.size
    lines = []
    for i, (name, meaning) in enumerate(FLAG_NAMES.items()):
        count = int(np.count_nonzero(run.flags & (1 << i)))
        if name == "low_mass" and sc.min_proxy is None:
            continue
        if name == "poor_fit" and run.decomposition.n_channels < 3:
            lines.append("caution: with two maps the fit has no residual, so contamination (dust, radio sources) "
                         "cannot be detected; a third map makes the poor_fit check possible")
            continue
        if count:
            lines.append(f"caution: {count} of {n} clusters {name} ({meaning})")
    common = _common_rms(run.channel_cov)
    med_t = float(np.median(np.sqrt(run.decomposition.cov[:, 1, 1])))
    lines.append(f"caution: primary CMB and other signal common to the maps: {common:.3g} uK rms per aperture, "
                 f"a noise term of dT_kSZ alone (median dT_kSZ error {med_t:.3g} uK) that more maps cannot remove")
    lines.append(f"caution: T_e from {run.te_source}; a T_e off by a factor g scales tau by 1/g and v by g")
    return lines


def _pull_line(label: str, s: dict) -> str:
    if not s["n"] or not math.isfinite(s["variance"]):
        return f"{label}: too few clusters ({s['n']})"
    return (f"{label}: {s['n']} clusters, pull mean {s['mean']:+.3f} ± {s['mean_error']:.3f}, variance "
            f"{s['variance']:.3f} ± {s['variance_error']:.3f} (1 expected)")


def terminal_lines(run, *, max_rows: int = 12) -> list[str]:
    """The table's first rows (best tau S/N first) and the cautions, for the terminal."""
    vel = run.velocities
    clean = run.flags == 0
    maps = ", ".join(f"{nu:g}" for nu in run.frequencies_ghz)
    lines = [f"pairvel velocities: {run.flags.size} clusters, {int(clean.sum())} without caution flags; maps {maps} GHz",
             f"  {'row':>7} {'z':>6} {'tau':>9} {'tau S/N':>7} {'v_los [km/s]':>18}  cautions"]
    snr = np.nan_to_num(vel.tau_snr, nan=-np.inf)
    for i in np.argsort(-snr, kind="stable")[:max_rows]:
        v = f"{vel.v_km_s[i]:+.0f} ± {vel.v_err_km_s[i]:.0f}" if np.isfinite(vel.v_km_s[i]) else "-"
        lines.append(f"  {int(run.row[i]):>7} {run.z[i]:6.3f} {vel.tau[i]:9.2e} {vel.tau_snr[i]:7.1f} {v:>18}  "
                     f"{flag_text([run.flags[i]])[0]}")
    if run.flags.size > max_rows:
        lines.append(f"  ... {run.flags.size - max_rows} more in {TABLE_STEM}.ecsv")
    lines += caution_lines(run)
    if run.truth is not None:
        lines.append(_pull_line("truth check (unflagged)", run.truth["pulls_unflagged"]))
        lines.append(_pull_line("truth check (all with y > 0)", run.truth["pulls_all"]))
    return lines


def velocity_markdown(run) -> str:
    """velocities.md: what was done, the assumptions, the cautions, the truth check."""
    clean = run.flags == 0
    lines = [
        "# Single-cluster velocities", "",
        f"Single-cluster velocities: {run.flags.size} clusters of `{run.catalogue_path}` split into tSZ and kSZ over "
        f"{len(run.frequencies_ghz)} maps ({', '.join(f'{nu:g}' for nu in run.frequencies_ghz)} GHz); "
        f"{int(clean.sum())} without caution flags; table `{TABLE_STEM}.ecsv` / `.fits`, figure `{FIGURE_STEM}.png`. "
        "Not blinded (single clusters, not the pairwise amplitude).", "",
        "## Assumptions", "", *[f"- {a}" for a in assumptions(run)], f"- electron temperature: {run.te_source}", "",
        "## Cautions", "", *[f"- {c.removeprefix('caution: ')}" for c in caution_lines(run)], "",
        "## Channels", "", "| map | nu [GHz] | f_tSZ | aperture rms, noise + CMB [uK] |", "|---|---:|---:|---:|",
    ]
    for path, nu, fi, var in zip(run.map_paths, run.frequencies_ghz, run.f_tsz, np.diag(run.channel_cov)):
        lines.append(f"| {path} | {nu:g} | {fi:+.5f} | {math.sqrt(var):.3g} |")
    lines += ["", f"Channel covariance from {run.n_random} random apertures usable in every map; "
                  f"{run.n_dropped} clusters dropped (aperture unusable in some map)."]
    if run.truth is not None:
        lines += ["", "## Truth check", "", f"Against `{run.truth['path']}`:", "",
                  f"- {_pull_line('unflagged', run.truth['pulls_unflagged'])}",
                  f"- {_pull_line('all with y > 0', run.truth['pulls_all'])}"]
    return "\n".join(lines) + "\n"


def _summary(run) -> dict:
    vel = run.velocities
    clean = run.flags == 0
    out = {"pairvel_version": __version__, "n_clusters": int(run.flags.size), "n_unflagged": int(clean.sum()),
           "n_dropped": run.n_dropped, "frequencies_ghz": run.frequencies_ghz.tolist(), "f_tsz": run.f_tsz.tolist(),
           "channel_covariance_uk2": run.channel_cov.tolist(), "n_random": run.n_random,
           "common_rms_uk": _common_rms(run.channel_cov), "electron_temperature": run.te_source,
           "median_v_err_unflagged_km_s": float(np.median(vel.v_err_km_s[clean])) if clean.any() else None,
           "assumptions": assumptions(run), "cautions": caution_lines(run), "config": run.config.as_dict(),
           "seed": run.config.run.seed}
    if run.truth is not None:
        out["truth_check"] = {"path": run.truth["path"], "pulls_unflagged": run.truth["pulls_unflagged"],
                              "pulls_all": run.truth["pulls_all"]}
    return out


def _json_ready(obj):
    """``obj`` with every non-finite float replaced by None (JSON has no NaN)."""
    if isinstance(obj, dict):
        return {k: _json_ready(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_ready(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj


def velocity_figure(run, folder) -> list[str]:
    """Velocity against redshift, unflagged clusters with error bars and flagged ones in grey."""
    vel = run.velocities
    clean = (run.flags == 0) & np.isfinite(vel.v_km_s)
    other = (run.flags != 0) & np.isfinite(vel.v_km_s)
    many = clean.sum() + other.sum() > 200  # thinner marks for a crowded plot
    size, line, cap = (1.5, 0.3, 0.0) if many else (3.5, 0.7, 2.0)
    with plot_style():
        fig = new_figure(width="column", height_in=3.0)
        ax = fig.add_subplot()
        if other.any():
            ax.errorbar(run.z[other], vel.v_km_s[other], yerr=vel.v_err_km_s[other], fmt=".", color="0.7",
                        ms=size, elinewidth=line, capsize=cap, label=f"flagged ({int(other.sum())})", zorder=1)
        if clean.any():
            ax.errorbar(run.z[clean], vel.v_km_s[clean], yerr=vel.v_err_km_s[clean], fmt="o", color="C0",
                        ms=size, elinewidth=line, capsize=cap, alpha=0.8, label=f"no caution flag ({int(clean.sum())})", zorder=2)
            if run.truth is not None:
                ax.plot(run.z[clean], run.truth["v_true_km_s"][clean], "x", color="C3", ms=size + 1,
                        label="injected", zorder=3)
            lim = np.nanpercentile(np.abs(vel.v_km_s[clean]) + vel.v_err_km_s[clean], 98) * 1.1
            ax.set_ylim(-lim, lim)
        ax.axhline(0.0, color="0.4", lw=0.6)
        ax.set_xlabel("redshift z")
        ax.set_ylabel("line-of-sight velocity [km/s]")
        ax.legend(loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=3, fontsize=6, frameon=False)
        return save_figure(fig, folder, FIGURE_STEM)


def write_velocity_outputs(run, folder) -> list[str]:
    """Write the table (ECSV, FITS), the figure, velocities.md and summary.json into ``folder``."""
    table = velocity_table(run)
    table.write(folder / f"{TABLE_STEM}.ecsv", format="ascii.ecsv")
    fits_table = table.copy(copy_data=True)
    fits_table.meta.pop("comments", None)
    fits_table.meta["COMMENT"] = assumptions(run)
    fits_table.write(folder / f"{TABLE_STEM}.fits", format="fits")
    files = [f"{TABLE_STEM}.ecsv", f"{TABLE_STEM}.fits", *velocity_figure(run, folder)]
    (folder / "velocities.md").write_text(velocity_markdown(run))
    (folder / "summary.json").write_text(json.dumps(_json_ready(_summary(run)), indent=2, allow_nan=False) + "\n")
    return files + ["velocities.md", "summary.json"]
