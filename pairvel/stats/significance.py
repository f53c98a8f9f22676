"""Empirical significance: where the measured amplitude falls among amplitudes fitted to curves
without signal (null realisations, simulated skies).

The analytic S/N (amplitude / error) trusts the covariance.  This count does not: it fits the same
template with the same precision matrix to every curve of a set that carries no signal, and asks
how many of those amplitudes reach the measured one in size, |A_k| >= |A|.  With c of n reaching
it, the p-value is (c + 1) / (n + 1) (the measurement counted among the draws; the usual Monte Carlo
p-value, e.g. Davison & Hinkley 1997, Bootstrap Methods and their Application, sec. 4.2 [from memory]), which is never below 1 / (n + 1): with
c = 0 it is a bound, and n says how far the count can reach.  The ratio of the amplitude to the
standard deviation of the null amplitudes is the empirical S/N.
"""

from __future__ import annotations

__all__ = ["describe", "empirical_significance", "fitted_amplitudes", "headline", "significance_markdown",
           "summary_lines"]

import numpy as np

from ..core.errors import InputError
from .fit import amplitude_weights


def fitted_amplitudes(curves, template, covariance, *, use=None, likelihood="hartlap") -> np.ndarray:
    """The amplitude of ``template`` in each of ``curves``, fitted as the measured one is.

    The same estimator as :func:`pairvel.stats.fit.fit_amplitude` with ``likelihood``
    (:func:`pairvel.stats.fit.amplitude_weights`): t^T C^-1 d / t^T C^-1 t, a Hartlap factor
    cancelling, or the diagonal's weights for "variance-weighted".

    Parameters
    ----------
    curves : ndarray of shape (n, nbins)
    template : ndarray of shape (nbins,)
    covariance : ndarray of shape (nbins, nbins)
    use : ndarray of shape (nbins,), bool, optional
        The fitted bins; default all.
    likelihood : str, default "hartlap"
        ``theory.likelihood`` of the run.

    Returns
    -------
    ndarray of shape (n,)
    """
    d = np.atleast_2d(np.asarray(curves, dtype=float))
    t = np.asarray(template, dtype=float)
    sel = np.ones(t.size, bool) if use is None else np.asarray(use, dtype=bool)
    if d.shape[1] != t.size or sel.shape != t.shape:
        raise InputError(f"curves {d.shape}, template {t.shape} and fit range {sel.shape} must share their bins")
    return d @ amplitude_weights(t, covariance, sel, likelihood=likelihood)


def empirical_significance(amplitude: float, sets: dict) -> list[dict]:
    """Where ``amplitude`` falls among the amplitudes of each set of signal-free curves.

    Parameters
    ----------
    amplitude : float
        The measured amplitude.
    sets : dict
        Name -> ndarray of shape (n,) of amplitudes fitted to signal-free curves (empty ones are
        left out).  With more than one set, a last entry "all nulls" pools every set whose name
        is not "simulated skies".

    Returns
    -------
    list of dict
        One per set: ``source``, ``n``, ``exceeded_by`` (how many |A_k| >= |amplitude|),
        ``p_value`` ((exceeded_by + 1) / (n + 1)), ``p_is_bound`` (exceeded_by == 0: the true
        p-value may be smaller), ``amplitude_mean``, ``amplitude_std`` (ddof 1), ``snr``
        (amplitude / amplitude_std) and the ``amplitudes``.
    """
    kept = {name: np.asarray(a, dtype=float) for name, a in sets.items() if np.size(a)}
    pooled = [a for name, a in kept.items() if name != "simulated skies"]
    if len(pooled) > 1:
        kept["all nulls"] = np.concatenate(pooled)
    return [_entry(name, a, float(amplitude)) for name, a in kept.items()]


def _entry(source: str, amps: np.ndarray, amplitude: float) -> dict:
    n = amps.size
    exceeded = int(np.sum(np.abs(amps) >= abs(amplitude)))
    std = float(np.std(amps, ddof=1)) if n > 1 else float("nan")
    return {"source": source, "n": int(n), "exceeded_by": exceeded, "p_value": (exceeded + 1) / (n + 1),
            "p_is_bound": exceeded == 0, "amplitude_mean": float(np.mean(amps)), "amplitude_std": std,
            "snr": amplitude / std if std > 0 else float("nan"), "amplitudes": [float(a) for a in amps]}


def describe(entry: dict) -> str:
    """One phrase: "exceeded by 0 of 300 amplitudes fitted to all nulls (p <= 1/301 = 0.0033); tau_mean / their
    std = 12.1"."""
    n, c = entry["n"], entry["exceeded_by"]
    p = f"p <= 1/{n + 1} = {entry['p_value']:.2g}" if entry["p_is_bound"] else f"p = {entry['p_value']:.2g}"
    return (f"exceeded by {c} of {n} amplitudes fitted to {entry['source']} ({p}); tau_mean / their std = "
            f"{entry['snr']:.1f}")


def headline(entries: list[dict]) -> dict | None:
    """The entry a one-line summary quotes: the pooled nulls, else the largest set; None when empty."""
    if not entries:
        return None
    pooled = [e for e in entries if e["source"] == "all nulls"]
    return pooled[0] if pooled else max(entries, key=lambda e: e["n"])


def summary_lines(entries: list[dict] | None, analytic_snr: float) -> list[str]:
    """The empirical significance in one line (terminal summary, report headline); none without entries."""
    entry = headline(entries or [])
    if entry is None:
        return []
    return [f"  empirical: tau_mean {describe(entry)} (analytic S/N {analytic_snr:.2f})"]


def significance_markdown(entries: list[dict], amplitude: float, analytic_snr: float) -> str:
    """The report's table of :func:`empirical_significance` entries."""
    lines = [f"tau_mean = {amplitude:.3e} (analytic S/N {analytic_snr:.2f}) among the amplitudes fitted with the "
             f"same template, covariance and fit range to curves without signal; 'exceeded by' counts those with "
             f"|amplitude| >= |tau_mean|, p = (exceeded by + 1) / (n + 1).", "",
             "| curves | n | exceeded by | p | mean amplitude | std of amplitudes | empirical S/N |",
             "|---|---:|---:|---:|---:|---:|---:|"]
    for e in entries:
        p = f"<= {e['p_value']:.2g}" if e["p_is_bound"] else f"{e['p_value']:.2g}"
        lines.append(f"| {e['source']} | {e['n']} | {e['exceeded_by']} | {p} | {e['amplitude_mean']:+.3e} | "
                     f"{e['amplitude_std']:.3e} | {e['snr']:.2f} |")
    return "\n".join(lines)
