"""Several frequency maps, each alone: its pairwise curve and tau_mean, and the difference of two
maps as a null test.

With ``[multifrequency]`` the run measures the combined map; with ``multifrequency.per_channel``
it also measures the same tracers on each map alone (same mask, monopole/dipole removal and
pre-filter as the combination, same radius, weights, regions and template), and with
``multifrequency.difference_null`` the aperture temperatures of map a minus map b for every pair
a < b.  Every set goes through one pair pass with its re-trended jackknife sets, so each curve has
its own delete-one jackknife covariance, built exactly as the main run builds its own (the
simulated-sky and bootstrap covariances are not repeated per map).

CMB and kSZ follow the blackbody and cancel in a difference; what stays is the noise of both maps
and the thermal SZ (f_a - f_b) y T_CMB.  The difference curve is tested against zero with its
jackknife covariance (:func:`pairvel.stats.nulltests.evaluate_null`, Hartlap-corrected): a tSZ
residual that survives the redshift-trend removal, or any other map-dependent contamination, makes
it fail, and makes the channels' tau_mean disagree.
"""

from __future__ import annotations

__all__ = ["channel_results", "channels_markdown", "write_channel_table", "CHANNEL_TABLE"]

import dataclasses
from pathlib import Path

import numpy as np

from .covariance import jackknife_covariance
from .fit import fit_amplitude
from .nulltests import evaluate_null

CHANNEL_TABLE = "channels.ecsv"
DIFFERENCE_KIND = "channel_difference"


def channel_results(p_rows, jk_rows, template_uk, *, maps: list, pairs: list, n_jk: int, in_fit, likelihood: str,
                    threshold: float) -> dict:
    """Per-map fits and difference nulls from curves and jackknife samples of one pair pass.

    Parameters
    ----------
    p_rows : ndarray of shape (k + len(pairs), nbins), uK
        The curve of each map, then of each difference (map a minus map b).
    jk_rows : ndarray of shape (k + len(pairs), n_jk, nbins), uK
        Their delete-one jackknife samples.
    template_uk : ndarray of shape (nbins,), uK per unit tau
    maps : list of dict
        One per map: ``path`` and ``frequency_ghz``.
    pairs : list of (int, int)
        Indices (a, b) into ``maps`` of each difference.
    n_jk : int
    in_fit : ndarray of shape (nbins,), bool
    likelihood : str
        As ``theory.likelihood``.
    threshold : float
        ``nulls.pte_threshold``.

    Returns
    -------
    dict
        ``maps``: each map's entry with ``p``, ``p_err`` and ``fit`` (the fit's fields; None and a
        ``problem`` when a bin lacks pairs in some jackknife sample); ``differences``: for each pair
        ``maps`` (a, b), ``p``, ``p_err``, ``chi2``, ``dof``, ``pte``, ``passed``, ``threshold`` and
        ``fit``, the template fitted to the difference curve (tau_a - tau_b with its own error);
        ``covariance``: how the errors were made.
    """
    k = len(maps)
    out_maps = []
    for i, m in enumerate(maps):
        p, cov, problem = _curve(p_rows[i], jk_rows[i])
        fit = None if problem else dataclasses.asdict(fit_amplitude(p, template_uk, cov, n_samples=n_jk, use=in_fit,
                                                                   likelihood=likelihood))
        out_maps.append({"path": str(m["path"]), "frequency_ghz": float(m["frequency_ghz"]), "p": p,
                         "p_err": np.sqrt(np.diag(cov)) if cov is not None else np.full(p.shape, np.nan),
                         "fit": fit, "problem": problem})
    diffs = []
    for j, (a, b) in enumerate(pairs):
        p, cov, problem = _curve(p_rows[k + j], jk_rows[k + j])
        entry = {"maps": [int(a), int(b)], "p": p, "p_err": np.full(p.shape, np.nan), "chi2": np.nan, "dof": 0,
                 "pte": np.nan, "passed": False, "threshold": float(threshold), "fit": None, "problem": problem}
        if not problem:
            null = evaluate_null(DIFFERENCE_KIND, p[None, :], threshold=threshold, covariance=cov, n_samples=n_jk)
            fit = fit_amplitude(p, template_uk, cov, n_samples=n_jk, use=in_fit, likelihood=likelihood)
            entry.update(p_err=np.sqrt(np.diag(cov)), chi2=float(null.chi2_mean), dof=int(null.dof),
                         pte=float(null.pte_mean), passed=bool(null.passed), fit=dataclasses.asdict(fit))
        diffs.append(entry)
    return {"maps": out_maps, "differences": diffs, "n_jk": int(n_jk),
            "covariance": "delete-one jackknife of each curve (re-trended as the main run's)"}


def _curve(p, p_jk):
    p, p_jk = np.asarray(p, dtype=float), np.asarray(p_jk, dtype=float)
    if not (np.all(np.isfinite(p)) and np.all(np.isfinite(p_jk))):
        return p, None, "a separation bin has no pairs in some jackknife sample"
    return p, jackknife_covariance(p_jk), None


def _label(m: dict) -> str:
    return f"{m['frequency_ghz']:g} GHz"


def channels_markdown(info: dict, main_fit=None) -> str:
    """Report section: tau_mean of each map beside the combined one, and the difference nulls."""
    lines = ["Each map alone, on the same tracers, regions, weights and template as the combination "
             f"(errors: {info['covariance']}, {info['n_jk']} regions).", "",
             "| map | tau_mean | error | S/N | chi2 / dof |", "|---|---:|---:|---:|---:|"]
    for m in info["maps"]:
        f = m["fit"]
        if f is None:
            lines.append(f"| {_label(m)} ({m['path']}) | - | - | - | {m['problem']} |")
            continue
        lines.append(f"| {_label(m)} ({m['path']}) | {f['amplitude']:.4g} | {f['error']:.3g} | {f['snr']:.2f} | "
                     f"{f['chi2_min']:.1f} / {f['dof']} |")
    if main_fit is not None:
        lines.append(f"| combination | {main_fit.amplitude:.4g} | {main_fit.error:.3g} | {main_fit.snr:.2f} | "
                     f"{main_fit.chi2_min:.1f} / {main_fit.dof} |")
    if info["differences"]:
        lines += ["", "Differences of two maps (CMB and kSZ cancel; noise and tSZ remain), each curve against zero "
                      "with its own jackknife covariance:", "",
                  "| difference | chi2 / dof | PTE | verdict | tau difference |", "|---|---:|---:|---|---:|"]
        for d in info["differences"]:
            a, b = (info["maps"][i] for i in d["maps"])
            verdict = d["problem"] or ("pass" if d["passed"] else f"FAIL (outside {d['threshold']:g}..{1 - d['threshold']:g})")
            tau = "-" if d["fit"] is None else f"{d['fit']['amplitude']:.3g} ± {d['fit']['error']:.3g}"
            lines.append(f"| {_label(a)} - {_label(b)} | {d['chi2']:.1f} / {d['dof']} | {d['pte']:.3g} | {verdict} | "
                         f"{tau} |")
    return "\n".join(lines)


def write_channel_table(info: dict, edges, folder) -> str:
    """channels.ecsv: one row per separation bin, the curve and error of each map and difference; the
    fits and null verdicts in the table's metadata.  Returns the file name."""
    from astropy.table import Table

    edges = np.asarray(edges, dtype=float)
    table = Table({"r_lo_mpc": edges[:-1], "r_hi_mpc": edges[1:]})
    meta_maps, meta_diffs = [], []
    for m in info["maps"]:
        tag = f"{m['frequency_ghz']:g}ghz"
        table[f"p_{tag}_uK"], table[f"p_err_{tag}_uK"] = m["p"], m["p_err"]
        meta_maps.append({"path": m["path"], "frequency_ghz": m["frequency_ghz"], "fit": m["fit"],
                          "problem": m["problem"]})
    for d in info["differences"]:
        a, b = (info["maps"][i]["frequency_ghz"] for i in d["maps"])
        tag = f"{a:g}ghz_minus_{b:g}ghz"
        table[f"p_{tag}_uK"], table[f"p_err_{tag}_uK"] = d["p"], d["p_err"]
        meta_diffs.append({k: d[k] for k in ("maps", "chi2", "dof", "pte", "passed", "threshold", "fit", "problem")})
    table.meta.update({"description": "pairwise curve of each frequency map alone and of map differences",
                       "covariance": info["covariance"], "maps": meta_maps, "differences": meta_diffs})
    table.write(Path(folder) / CHANNEL_TABLE, format="ascii.ecsv")
    return CHANNEL_TABLE
