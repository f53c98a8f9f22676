"""Report pieces for the bias derived from a proxy and for templates beyond linear theory.

Made from ``RunResult.extra["template"]`` (the dict of :func:`pairvel.model.template.template_for_run`,
blinding rule 0: shapes and velocities, no amplitude): report lines, the side-by-side table
``templates.ecsv`` and the figure ``templates``.
"""

from __future__ import annotations

__all__ = ["SECTION", "comparison_lines", "plot_templates", "template_model_lines", "template_progress_lines",
           "write_template_table"]

from pathlib import Path

import numpy as np

from ..core.plotstyle import new_figure, save_figure

#: Figure section of the template comparison (see pairvel.report.figures.FigureFile).
SECTION = "templates"
_LABELS = {"linear": "linear theory", "jsd99": "JSD99 closed form", "table": "v12 table"}


def template_progress_lines(info: dict) -> list:
    """Progress lines for a derived bias and a template beyond linear theory (no amplitude in them)."""
    lines = []
    if "bias_from_proxy" in info:
        b = info["bias_from_proxy"]
        lo, _, hi = b["tracer_bias_min_median_max"]
        lines.append(f"      bias from {b['proxy']}: Tinker et al. 2010, pair-weighted b_eff = {b['b_eff']:.3f} "
                     f"(tracers {lo:.2f}-{hi:.2f})")
    if "compared" in info:
        c = info["compared"]
        kept = "" if c["tolerance"] is None else f"; {sum(c['within_tolerance'])} bins within {c['tolerance']:g}"
        lines.append(f"      template: {info['kind']}; compared with {', '.join(c['v12_km_s'])}{kept}")
    return lines


def template_model_lines(info: dict) -> list:
    """Markdown list items: the derived bias and the velocity model (when not linear theory)."""
    lines = []
    b = info.get("bias_from_proxy")
    if b is not None:
        lo, med, hi = b["tracer_bias_min_median_max"]
        lines.append(f"- bias from the proxy ({b['proxy']}, {b['mass_definition']}): {b['bias_function']}; "
                     f"pair-weighted b_eff = {b['b_eff']:.4f} (tracers {lo:.3f} / {med:.3f} / {hi:.3f} min / median "
                     f"/ max); weighting: {b['weighting']}")
    if info.get("velocity_model", "linear") != "linear":
        source = f" ({info['v12_table']['path']}, sha256 {info['v12_table']['sha256'][:12]}...)" \
            if "v12_table" in info else ""
        lines.append(f"- velocity model: {info['kind']}{source}")
    return lines


def comparison_lines(info: dict) -> list:
    """A markdown paragraph and table: the templates side by side (none when the run did not compare)."""
    c = info.get("compared")
    if c is None:
        return []
    tol = c["tolerance"]
    names = list(c["v12_km_s"])
    lines = ["", "Templates side by side (km/s, before any trend-loss factor; spread = (max - min) / |linear|"
              + (f"; fitted only where spread <= {tol:g}" if tol is not None else "") + "):", "",
              "| r [Mpc] | " + " | ".join(_LABELS[n] for n in names) + " | spread |" + (" within |" if tol else ""),
              "|---:|" + "---:|" * (len(names) + 1) + ("---|" if tol else "")]
    for i, r in enumerate(c["r_mid"]):
        spread = c["relative_spread"][i]
        row = f"| {r:.1f} | " + " | ".join(f"{c['v12_km_s'][n][i]:.2f}" for n in names)
        row += f" | {'-' if spread is None else f'{spread:.3f}'} |"
        if tol is not None:
            row += f" {'yes' if c['within_tolerance'][i] else 'no'} |"
        lines.append(row)
    return lines


def write_template_table(info: dict, folder: Path) -> list:
    """templates.ecsv (the templates side by side) when the run compared them; returns file names."""
    from astropy.table import Table

    c = info.get("compared")
    if c is None:
        return []
    table = Table()
    table["r_mid"] = np.asarray(c["r_mid"])
    table["r_mid"].unit = "Mpc"
    for name, curve in c["v12_km_s"].items():
        table[f"v12_{name}"] = np.asarray(curve)
        table[f"v12_{name}"].unit = "km / s"
    table["relative_spread"] = np.array([np.nan if x is None else x for x in c["relative_spread"]])
    if c["tolerance"] is not None:
        table["within_tolerance"] = np.asarray(c["within_tolerance"])
    table.meta["description"] = ("pairwise-velocity templates averaged like the estimator, before any trend-loss "
                                 f"factor; the run fitted {info.get('kind')}")
    table.meta["tolerance"] = c["tolerance"]
    table.write(folder / "templates.ecsv", format="ascii.ecsv")
    return ["templates.ecsv"]


def plot_templates(info: dict, folder: Path, stem: str = "templates") -> None:
    """The templates against separation (top) and their ratio to linear theory (bottom)."""
    c = info["compared"]
    r = np.asarray(c["r_mid"])
    fig = new_figure(width="column", height_in=4.2)
    top, bottom = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [2, 1]})
    lin = np.asarray(c["v12_km_s"]["linear"])
    for i, (name, curve) in enumerate(c["v12_km_s"].items()):
        used = name == info.get("velocity_model")
        style = {"color": f"C{i}", "lw": 2.0 if used else 1.2, "marker": "o", "ms": 3}
        top.plot(r, curve, label=_LABELS[name] + (" (fitted)" if used else ""), **style)
        with np.errstate(divide="ignore", invalid="ignore"):
            bottom.plot(r, np.asarray(curve) / lin, **style)
    if c["tolerance"] is not None:
        tol = c["tolerance"]
        bottom.axhspan(1 - tol, 1 + tol, color="0.9", lw=0, label=f"tolerance {tol:g}")
        out = ~np.asarray(c["within_tolerance"])
        if out.any():
            top.plot(r[out], lin[out], "x", color="k", ls="none", label="not fitted (templates differ)")
    top.axhline(0.0, color="0.6", lw=0.7)
    top.set_ylabel("v12 [km/s]")
    bottom.set_ylabel("ratio to linear")
    bottom.set_xlabel("comoving separation r [Mpc]")
    fig.legend(loc="outside lower center")
    save_figure(fig, folder, stem)
