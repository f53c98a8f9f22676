"""Per-bin error calibration from a ``pairvel validate`` folder, for a run's report.

``covariance.calibration_dir`` names a folder written by ``pairvel validate``; its summary.json
holds, per separation bin, the mean jackknife error of p(r) over the scatter of p(r) across the
mocks (with its sampling error), the mean best-fit chi2 over its dof and the uniformity of the
best-fit PTEs.  The run's report then shows those numbers beside its own bins: a ratio above one
means the run's error bars in that bin are larger than the mocks' scatter says they should be.
The numbers are properties of the mocks, not of the data, so blinding leaves them as they are.
"""

from __future__ import annotations

__all__ = ["read_mock_calibration", "calibration_markdown", "plot_mock_calibration", "SECTION_TITLE"]

import json
import math
from pathlib import Path

import numpy as np

from ..core.errors import InputError

SECTION_TITLE = "Per-bin errors against mock scatter"

_KEY = "covariance.calibration_dir"


def read_mock_calibration(folder) -> dict:
    """The per-bin calibration of a ``pairvel validate`` folder (or its summary.json) as plain data.

    Returns
    -------
    dict with ``folder``, ``n_mocks``, ``seed``, ``jackknife`` (what the validation's jackknife
    deleted), ``edges_mpc``, ``ratio`` and ``ratio_se`` (per bin; ``ratio_se`` None for folders
    written before it was kept), ``chi2_over_dof``, ``dof``, ``pte_ks_p`` (None when not kept),
    ``coverage_68`` and ``variants`` (every jackknife variant's per-bin ratios by name).
    """
    path = Path(folder)
    file = path / "summary.json" if path.is_dir() else path
    try:
        record = json.loads(file.read_text())
    except (OSError, ValueError) as err:
        raise InputError(f"{_KEY} {path}: cannot read a pairvel validate summary.json ({err})", key=_KEY) from None
    try:
        s = record["summary"]
        edges = [float(e) for e in record["edges_mpc"]]
        ratio = [float(v) for v in s["per_bin_jk_error_over_scatter"]]
        n_mocks, dof, chi2_mean = int(s["measured"]["n_mocks"]), int(s["dof"]), float(s["chi2_min_mean"])
        coverage = float(s["measured"]["coverage_68"])
    except (KeyError, TypeError, ValueError) as err:
        raise InputError(f"{_KEY} {file}: not a pairvel validate summary (missing or bad entry {err})",
                         key=_KEY) from None
    if len(edges) != len(ratio) + 1:
        raise InputError(f"{_KEY} {file}: {len(ratio)} per-bin ratios for {len(edges) - 1} bins", key=_KEY)
    options = record.get("provenance", {}).get("options", {})
    variants = {name: v["per_bin_error_over_scatter"] for name, v in s.get("jackknife_variants", {}).items()}
    return {"folder": str(path), "n_mocks": n_mocks, "seed": options.get("seed"),
            "jackknife": options.get("jackknife_deletes", "pairs"), "edges_mpc": edges, "ratio": ratio,
            "ratio_se": s.get("per_bin_jk_error_over_scatter_se"), "chi2_over_dof": chi2_mean / dof, "dof": dof,
            "pte_ks_p": s.get("best_fit_pte_ks_p"), "coverage_68": coverage, "variants": variants}


def _same_bins(calib: dict, edges) -> bool:
    e = np.asarray(edges, dtype=float)
    c = np.asarray(calib["edges_mpc"], dtype=float)
    return e.shape == c.shape and np.allclose(e, c)


def calibration_markdown(calib: dict, edges) -> str:
    """Report text: one row per validation bin (error / scatter with its sampling error) and the fit quality."""
    se = calib["ratio_se"] or [math.nan] * len(calib["ratio"])
    ks = "not kept" if calib["pte_ks_p"] is None else f"{calib['pte_ks_p']:.3g}"
    lines = [f"From `pairvel validate` in {calib['folder']}: {calib['n_mocks']} mocks (seed {calib['seed']}), "
             f"jackknife deleting {calib['jackknife']}. Mean best-fit chi2 / dof {calib['chi2_over_dof']:.2f} "
             f"({calib['dof']} dof), best-fit PTEs against uniform KS p = {ks}, 68% coverage of tau "
             f"{calib['coverage_68']:.2f}. A ratio above 1 means the jackknife error of that bin is larger than "
             f"the scatter of p(r) across the mocks (targets 0.9-1.1).", ""]
    if not _same_bins(calib, edges):
        lines += ["**The validation's bins differ from this run's**: the ratios describe the validation's "
                  "configuration, not this run's bins.", ""]
    lines += ["| r_min [Mpc] | r_max [Mpc] | jackknife error / mock scatter | sampling error |", "|---:|---:|---:|---:|"]
    e = calib["edges_mpc"]
    for k, (r, s) in enumerate(zip(calib["ratio"], se)):
        lines.append(f"| {e[k]:g} | {e[k + 1]:g} | {r:.2f} | {'-' if not math.isfinite(s) else f'{s:.2f}'} |")
    return "\n".join(lines)


def plot_mock_calibration(calib: dict, folder, stem: str) -> None:
    """Error / scatter per bin with its sampling error, every jackknife variant kept, and the 0.9-1.1 band."""
    from ..core.plotstyle import new_figure, save_figure

    e = np.asarray(calib["edges_mpc"], dtype=float)
    r_mid = 0.5 * (e[1:] + e[:-1])
    fig = new_figure(width="column", height_in=2.8)
    ax = fig.subplots()
    ax.axhspan(0.9, 1.1, color="0.88", label="target 0.9-1.1")
    ax.axhline(1.0, color="0.5", lw=0.7)
    for k, (name, ratio) in enumerate(v for v in calib["variants"].items() if v[0] != "pipeline"):
        ax.plot(r_mid, ratio, "-", color=f"C{k + 1}", lw=0.8, alpha=0.7, label=f"jackknife variant: {name}")
    se = calib["ratio_se"]
    ax.errorbar(r_mid, calib["ratio"], yerr=None if se is None else se, fmt="o", color="C0", ms=3,
                label=f"used ({calib['jackknife']})")
    ax.set_xlabel("r [Mpc]")
    ax.set_ylabel("jackknife error / mock scatter")
    ax.set_title(f"{calib['n_mocks']} validation mocks")
    ax.legend(loc="best", fontsize="small")
    save_figure(fig, folder, stem)
