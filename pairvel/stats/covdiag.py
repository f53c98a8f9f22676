"""Diagnostics of a covariance estimate: condition number, estimator comparison, too-few-samples warning."""

from __future__ import annotations

__all__ = ["covariance_diagnostics", "diagnostics_markdown", "MIN_HARTLAP"]

import warnings

import numpy as np

from ..core.errors import PairvelWarning

#: Warn when the Hartlap factor (n - p - 2)/(n - 1) falls below this: the inverse covariance then
#: needs a correction of more than 20 per cent and its noise inflates chi2 (common practice).
MIN_HARTLAP = 0.8


def covariance_diagnostics(covariances: dict, n_samples: dict, *, used: str) -> dict:
    """Condition number of the covariance used and the diagonal errors of every estimator given.

    Parameters
    ----------
    covariances : dict name -> ndarray of shape (nbins, nbins)
    n_samples : dict name -> int
        Independent samples behind each estimate (regions for jackknife and bootstrap, maps for
        simulations); estimates with too few for the number of bins raise a PairvelWarning.
    used : str
        The key of the covariance the fit uses.

    Returns
    -------
    dict with ``used``, ``condition_number``, ``errors`` (name -> list of sigma per bin),
    ``n_samples`` and ``too_few_samples`` (names that warned).
    """
    cov = np.asarray(covariances[used], dtype=float)
    nbins = cov.shape[0]
    few = []
    for name, n in n_samples.items():
        factor = (n - nbins - 2) / (n - 1) if n > 1 else -1.0
        if factor < MIN_HARTLAP:
            few.append(name)
            warnings.warn(f"covariance '{name}' comes from {n} samples for {nbins} bins (Hartlap factor "
                          f"{factor:.2f} < {MIN_HARTLAP}); use more samples or fewer bins", PairvelWarning,
                          stacklevel=2)
    return {
        "used": used,
        "condition_number": float(np.linalg.cond(cov)),
        "errors": {name: np.sqrt(np.diag(c)).tolist() for name, c in covariances.items()},
        "n_samples": {k: int(v) for k, v in n_samples.items()},
        "too_few_samples": few,
    }


def diagnostics_markdown(diag: dict, edges) -> str:
    """A report section: condition number and the diagonal errors of each estimator side by side."""
    names = list(diag["errors"])
    ref = diag["used"]
    others = [n for n in names if n != ref]
    columns = ["r_min", "r_max", *(f"σ {n} [uK]" for n in names), *(f"{n} / {ref}" for n in others)]
    lines = [f"Covariance used in the fit: {ref} ({diag['n_samples'].get(ref, '?')} samples); "
             f"condition number {diag['condition_number']:.3g}.", ""]
    if diag["too_few_samples"]:
        lines += [f"Warning: too few samples for the number of bins in: {', '.join(diag['too_few_samples'])}.", ""]
    lines += ["| " + " | ".join(columns) + " |", "|" + "---:|" * len(columns)]
    for k in range(len(edges) - 1):
        sig = [diag["errors"][n][k] for n in names]
        ratios = [diag["errors"][n][k] / diag["errors"][ref][k] for n in others]
        lines.append("| " + " | ".join([f"{edges[k]:g}", f"{edges[k + 1]:g}", *(f"{s:.3g}" for s in sig),
                                         *(f"{r:.3g}" for r in ratios)]) + " |")
    return "\n".join(lines)
