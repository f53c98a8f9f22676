"""Diagnostics of a covariance estimate: condition number, estimator comparison, too-few-samples warning."""

from __future__ import annotations

__all__ = ["covariance_diagnostics", "diagnostics_markdown", "MIN_HARTLAP"]

import warnings

import numpy as np

from ..core.errors import PairvelWarning
from .fit import hartlap_ratio

#: Warn when the Hartlap factor (n - p - 2)/(n - 1) falls below this: the inverse covariance then
#: needs a correction of more than 20 per cent and its noise inflates chi2 (common practice).
MIN_HARTLAP = 0.8


def covariance_diagnostics(covariances: dict, n_samples: dict, *, used: str, n_fit_bins: int | None = None) -> dict:
    """Condition number of the covariance used and the diagonal errors of every estimator given.

    Parameters
    ----------
    covariances : dict name -> ndarray of shape (nbins, nbins)
    n_samples : dict name -> int
        Independent samples behind each estimate (regions for jackknife and bootstrap, maps for
        simulations); estimates with too few for the number of bins raise a PairvelWarning.
    used : str
        The key of the covariance the fit uses.
    n_fit_bins : int, optional
        Bins the amplitude fit inverts the covariance for (those inside the fit range); default
        all.  The Hartlap factor quoted, warned about and returned is the one for these bins, the
        factor :func:`pairvel.stats.fit.fit_amplitude` applies.

    Returns
    -------
    dict with ``used``, ``condition_number``, ``errors`` (name -> list of sigma per bin),
    ``n_samples``, ``hartlap_factor`` (name -> (n - p - 2)/(n - 1) for p = ``n_fit_bins``),
    ``n_fit_bins`` and ``too_few_samples`` (names that warned).
    """
    cov = np.asarray(covariances[used], dtype=float)
    p = cov.shape[0] if n_fit_bins is None else int(n_fit_bins)
    factors = {name: hartlap_ratio(n, p) for name, n in n_samples.items()}
    few = [name for name, factor in factors.items() if factor < MIN_HARTLAP]
    for name in few:
        warnings.warn(f"covariance '{name}' comes from {n_samples[name]} samples for the {p} fitted bins (Hartlap "
                      f"factor {factors[name]:.2f} < {MIN_HARTLAP}); use more samples or fewer bins", PairvelWarning,
                      stacklevel=2)
    return {
        "used": used,
        "condition_number": float(np.linalg.cond(cov)),
        "errors": {name: np.sqrt(np.diag(c)).tolist() for name, c in covariances.items()},
        "n_samples": {k: int(v) for k, v in n_samples.items()},
        "hartlap_factor": factors,
        "n_fit_bins": p,
        "too_few_samples": few,
    }


def diagnostics_markdown(diag: dict, edges) -> str:
    """A report section: condition number and the diagonal errors of each estimator side by side."""
    names = list(diag["errors"])
    ref = diag["used"]
    head = "| r_min | r_max | " + " | ".join(f"σ {n} [uK]" for n in names) + " | " + \
        " | ".join(f"{n} / {ref}" for n in names if n != ref) + " |"
    rule = "|---:|---:|" + "---:|" * (2 * len(names) - 1)
    factor = diag.get("hartlap_factor", {}).get(ref)
    lines = [f"Covariance used in the fit: {ref} ({diag['n_samples'].get(ref, '?')} samples); "
             f"condition number {diag['condition_number']:.3g}"
             + (f"; Hartlap factor {factor:.4f} for the {diag['n_fit_bins']} fitted bins." if factor is not None
                else "."), ""]
    if diag["too_few_samples"]:
        lines += [f"Warning: too few samples for the number of bins in: {', '.join(diag['too_few_samples'])}.", ""]
    lines += [head, rule]
    for k in range(len(edges) - 1):
        sig = [diag["errors"][n][k] for n in names]
        ratios = [diag["errors"][n][k] / diag["errors"][ref][k] for n in names if n != ref]
        lines.append(f"| {edges[k]:g} | {edges[k + 1]:g} | " + " | ".join(f"{s:.4g}" for s in sig) + " | " +
                     " | ".join(f"{r:.3f}" for r in ratios) + " |")
    return "\n".join(lines)
