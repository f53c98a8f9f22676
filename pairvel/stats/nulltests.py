"""Null tests: temperature sets that should carry no pairwise kSZ signal, and their chi-square.

Three kinds, all pushed through the same pair pass as the data (extra temperature sets):

- ``random_positions``: apertures moved to random unmasked sky positions, catalogue geometry kept;
- ``shuffled``: the data temperatures permuted among the tracers;
- ``shuffled_in_z``: permuted only among tracers in the same narrow redshift slice, which keeps
  any redshift dependence of the temperatures;
- ``rotated``: photometry on the map rotated in longitude by each configured angle (equivalently,
  apertures at the tracers' positions moved by minus that angle), which keeps the map's own
  statistics and the catalogue geometry but breaks the link between them.

Each realisation is tested against zero with its own jackknife covariance; the mean curve of a
kind against zero with the mean covariance divided by the number of realisations.  A kind passes
when the mean curve's PTE exceeds the configured threshold.
"""

from __future__ import annotations

__all__ = ["NULL_KINDS", "NullTestResult", "evaluate_null", "rotated_sets", "shuffled_sets"]

import warnings
from dataclasses import dataclass

import numpy as np

from ..core.errors import PairvelWarning
from .covariance import jackknife_covariance
from .fit import chi2_against_zero

NULL_KINDS = {
    "random_positions": "apertures at random unmasked sky positions (catalogue geometry kept)",
    "shuffled": "temperatures shuffled among the tracers",
    "shuffled_in_z": "temperatures shuffled among tracers within narrow redshift slices",
    "rotated": "map rotated in longitude before photometry",
}


@dataclass(frozen=True, eq=False)
class NullTestResult:
    """One kind of null test.

    Attributes
    ----------
    kind : str
        A key of :data:`NULL_KINDS`.
    p : ndarray of shape (n_real, nbins), uK
    chi2, pte : ndarray of shape (n_real,)
        Each realisation against zero, its own jackknife covariance, Hartlap-corrected.
    chi2_mean, pte_mean : float
        The mean curve against zero (mean jackknife covariance / n_real).
    dof : int
    threshold : float
        The mean curve passes when pte_mean > threshold.
    """

    kind: str
    p: np.ndarray
    chi2: np.ndarray
    pte: np.ndarray
    chi2_mean: float
    pte_mean: float
    dof: int
    threshold: float
    mean_error: np.ndarray

    @property
    def n_real(self) -> int:
        return self.p.shape[0]

    @property
    def passed(self) -> bool:
        return bool(self.pte_mean > self.threshold)

    @property
    def description(self) -> str:
        return NULL_KINDS[self.kind]

    def as_dict(self) -> dict:
        return {
            "kind": self.kind,
            "description": self.description,
            "n_realisations": int(self.n_real),
            "dof": int(self.dof),
            "chi2_mean_curve": float(self.chi2_mean),
            "pte_mean_curve": float(self.pte_mean),
            "pte_threshold": float(self.threshold),
            "passed": self.passed,
            "chi2_each": [float(x) for x in self.chi2],
            "pte_each": [float(x) for x in self.pte],
            "fraction_pte_below_0.05": float(np.mean(self.pte < 0.05)),
        }


def shuffled_sets(temperatures, z, n_sets: int, *, rng, z_slice_width=None) -> np.ndarray:
    """``n_sets`` permutations of ``temperatures`` (N,), all tracers or within redshift slices.

    Returns
    -------
    ndarray of shape (n_sets, N)
    """
    t = np.asarray(temperatures, dtype=float)
    out = np.empty((n_sets, t.size))
    if z_slice_width is None:
        for k in range(n_sets):
            out[k] = t[rng.permutation(t.size)]
        return out
    slices = np.floor((np.asarray(z) - np.min(z)) / z_slice_width).astype(np.int64)
    order = np.argsort(slices, kind="stable")
    bounds = np.flatnonzero(np.diff(slices[order])) + 1
    groups = np.split(order, bounds)
    for k in range(n_sets):
        for g in groups:
            out[k, g] = t[g[rng.permutation(g.size)]]
    return out


def evaluate_null(kind: str, p, p_jk, n_jk: int, *, threshold: float, covariance=None,
                  n_samples: int | None = None) -> NullTestResult:
    """chi2 and PTE of every realisation and of the mean curve of one kind of null test.

    Each realisation uses its own jackknife covariance from ``p_jk``, unless ``covariance``
    (nbins, nbins) from ``n_samples`` independent samples (e.g. simulated maps) is given; then all
    realisations use it.  The delete-one jackknife of a pair statistic tends to overestimate the
    variance (Efron & Stein 1981, Ann. Stat. 9, 586), which pushes null PTEs towards 1.
    """
    p = np.asarray(p, dtype=float)
    if covariance is None:
        covs = jackknife_covariance(p_jk)
    else:
        covs = np.broadcast_to(np.asarray(covariance, dtype=float), (p.shape[0],) + np.shape(covariance))
        n_jk = int(n_samples)
    chi2 = np.empty(p.shape[0])
    pte = np.empty(p.shape[0])
    dof = p.shape[1]
    for k in range(p.shape[0]):
        chi2[k], dof, pte[k] = chi2_against_zero(p[k], covs[k], n_samples=n_jk)
    mean_cov = covs.mean(axis=0) / p.shape[0]
    chi2_m, dof, pte_m = chi2_against_zero(p.mean(axis=0), mean_cov, n_samples=n_jk)
    return NullTestResult(kind=kind, p=p, chi2=chi2, pte=pte, chi2_mean=float(chi2_m), pte_mean=float(pte_m),
                          dof=int(dof), threshold=float(threshold), mean_error=np.sqrt(np.diag(mean_cov)))


def rotated_sets(skymap, ra_deg, dec_deg, angles_deg, *, radius_arcmin, max_masked_fraction, min_usable_fraction=0.5):
    """Aperture temperatures on the map rotated by each angle in longitude.

    Rotating the map by +phi about the polar axis and measuring at (ra, dec) is the same as
    measuring the unrotated map at (ra - phi, dec), which is what is done (no map is resampled).

    Parameters
    ----------
    skymap : SkyMap
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    angles_deg : sequence of float, degrees
    radius_arcmin : float, arcmin
    max_masked_fraction : float
        As for the data photometry.
    min_usable_fraction : float, default 0.5
        Rotations where fewer tracers than this fraction land on usable sky are skipped with a
        warning (a partial map rotated off its footprint).

    Returns
    -------
    sets : ndarray of shape (n_kept, N), uK
        Tracers whose rotated aperture is unusable get the mean of the usable ones, so they add
        pairs without signal and the set keeps the catalogue's pair geometry.
    kept : list of (angle_deg, usable_fraction)
    """
    from ..maps.photometry import measure_apertures

    ra = np.asarray(ra_deg, dtype=float)
    sets, kept = [], []
    for phi in angles_deg:
        res = measure_apertures(skymap, np.mod(ra - float(phi), 360.0), dec_deg, radius_arcmin,
                                max_masked_fraction=max_masked_fraction)
        t, ok = res.temperatures[0], res.usable
        frac = float(ok.mean())
        if frac < min_usable_fraction:
            warnings.warn(f"rotated-map null: rotation by {phi:g} deg leaves only {frac:.0%} of the tracers on usable "
                          f"sky (< {min_usable_fraction:.0%}); rotation skipped", PairvelWarning, stacklevel=2)
            continue
        sets.append(np.where(ok, t, t[ok].mean()))
        kept.append((float(phi), frac))
    return np.array(sets).reshape(len(sets), ra.size), kept
