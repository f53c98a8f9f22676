"""Null tests: temperature sets that should carry no pairwise kSZ signal, and their chi-square.

Three kinds, all pushed through the same pair pass as the data (extra temperature sets):

- ``random_positions``: apertures moved to random unmasked sky positions, catalogue geometry kept;
- ``shuffled``: the data temperatures permuted among the tracers;
- ``shuffled_in_z``: permuted only among tracers in the same narrow redshift slice, which keeps
  any redshift dependence of the temperatures;
- ``rotated``: photometry on the map rotated in longitude by each configured angle (equivalently,
  apertures at the tracers' positions moved by minus that angle), which keeps the map's own
  statistics and the catalogue geometry but breaks the link between them.

Covariance (see :func:`evaluate_null`): with enough realisations (:data:`MIN_EXTRA_REALISATIONS`
more than bins) each kind is tested against the scatter of its own realisations, which are
independent draws of the null statistic, with PTEs from Hotelling's T^2 distribution so that they
allow for that covariance being estimated; with fewer (the rotated-map null) against the fit's
covariance with the Hartlap factor.  A jackknife of each realisation, plain or re-trended, is not
used: on the demo it overestimates the scatter of the null curves by 1.3-1.8 (re-trended) and up to
4 times (plain) in error beyond 100 Mpc, so its PTEs pile up near 1 (README, "Null tests").

A kind passes when its mean curve's PTE lies between the threshold and 1 - threshold: a PTE near 1
means curves closer to zero than their errors allow, which hides a failure as well as a low one.
"""

from __future__ import annotations

__all__ = ["MIN_EXTRA_REALISATIONS", "NULL_KINDS", "NullTestResult", "evaluate_null", "hotelling_pte", "rotated_sets",
           "shuffled_sets", "slice_means", "SLICE_MEANS"]

import warnings
from dataclasses import dataclass

import numpy as np

from scipy import stats

from ..core.errors import InputError, PairvelWarning
from .fit import chi2_against_zero

NULL_KINDS = {
    "random_positions": "apertures at random unmasked sky positions (catalogue geometry kept)",
    "shuffled": "temperatures shuffled among the tracers",
    "shuffled_in_z": "temperatures shuffled among tracers within narrow redshift slices",
    "rotated": "map rotated in longitude before photometry",
    "channel_difference": "one frequency map minus another ([multifrequency] per_channel): CMB and kSZ cancel",
}

#: A kind is tested against its own realisations' scatter when it has at least this many more
#: realisations than bins (the leave-one-out covariance then has n_real - 2 >= n_bins + 3 degrees of
#: freedom); otherwise against the fit's covariance.
MIN_EXTRA_REALISATIONS = 5
#: Where the covariance of a null test came from (``NullTestResult.covariance_from``).
FROM_REALISATIONS, FROM_REFERENCE, FROM_FIT = "realisations", "realisations + slice means", "fit covariance"
#: The temperature sets whose curves are the ``reference`` of ``shuffled_in_z`` (not a null kind).
SLICE_MEANS = "shuffled_slice_means"


@dataclass(frozen=True, eq=False)
class NullTestResult:
    """One kind of null test.

    Attributes
    ----------
    kind : str
        A key of :data:`NULL_KINDS`.
    p : ndarray of shape (n_real, nbins), uK
    chi2, pte : ndarray of shape (n_real,)
        Each realisation against zero.  With ``covariance_from == "realisations"`` the chi2 is
        calibrated: the chi2 with ``dof`` degrees of freedom that has the PTE of Hotelling's T^2
        against the other realisations' covariance (so a histogram of it follows the chi2 pdf).
    chi2_mean, pte_mean : float
        The mean curve against zero (the realisations' covariance / n_real, Hotelling's one-sample
        T^2, calibrated likewise; or the fit's covariance / n_real).
    dof : int
    threshold : float
        The mean curve passes when threshold < pte_mean < 1 - threshold.
    mean_error : ndarray of shape (nbins,), uK
        Error of the mean curve.
    covariance_from : str
        "realisations", "realisations + slice means" (``shuffled_in_z``, see :func:`evaluate_null`) or
        "fit covariance" (too few realisations).
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
    covariance_from: str = FROM_REALISATIONS

    @property
    def n_real(self) -> int:
        return self.p.shape[0]

    @property
    def passed(self) -> bool:
        return bool(self.threshold < self.pte_mean < 1.0 - self.threshold)

    @property
    def verdict(self) -> str:
        """"pass", or why not: "FAIL (PTE low)" / "FAIL (PTE high)"."""
        if self.passed:
            return "pass"
        return "FAIL (PTE high)" if self.pte_mean >= 1.0 - self.threshold else "FAIL (PTE low)"

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
            "verdict": self.verdict,
            "covariance_from": self.covariance_from,
            "chi2_each": [float(x) for x in self.chi2],
            "pte_each": [float(x) for x in self.pte],
            "fraction_pte_below_0.05": float(np.mean(self.pte < 0.05)),
            "fraction_pte_above_0.95": float(np.mean(self.pte > 0.95)),
        }


def shuffled_sets(temperatures, z, n_sets: int, *, rng, z_slice_width=None) -> np.ndarray:
    """``n_sets`` permutations of ``temperatures`` (N,), all tracers or within redshift slices.

    ``rng`` is one Generator for all sets, drawn in turn, or a sequence of ``n_sets`` Generators,
    set k drawn from the k-th (:func:`pairvel.core.rng.set_generator`: sets made in any grouping).

    Returns
    -------
    ndarray of shape (n_sets, N)
    """
    t = np.asarray(temperatures, dtype=float)
    rngs = list(rng) if isinstance(rng, (list, tuple)) else [rng] * n_sets
    if len(rngs) != n_sets:
        raise InputError(f"shuffled sets need one generator per set; got {len(rngs)} for {n_sets} sets")
    out = np.empty((n_sets, t.size))
    if z_slice_width is None:
        for k in range(n_sets):
            out[k] = t[rngs[k].permutation(t.size)]
        return out
    groups = _slices(z, z_slice_width)
    for k in range(n_sets):
        for g in groups:
            out[k, g] = t[g[rngs[k].permutation(g.size)]]
    return out


def _slices(z, width):
    """Index groups of the tracers in each redshift slice of ``width`` (from the lowest z)."""
    slices = np.floor((np.asarray(z) - np.min(z)) / width).astype(np.int64)
    order = np.argsort(slices, kind="stable")
    return np.split(order, np.flatnonzero(np.diff(slices[order])) + 1)


def slice_means(sets, z, width) -> np.ndarray:
    """Each set (M, N) with every tracer's value replaced by the mean of its redshift slice: what a
    set shuffled within those slices averages to over many shuffles."""
    sets = np.atleast_2d(np.asarray(sets, dtype=float))
    out = np.empty_like(sets)
    groups = _slices(z, width)
    for row, values in zip(out, sets):  # set by set: numpy's mean over a 2-D block rounds by its row count
        for g in groups:
            row[g] = values[g].mean()
    return out


def evaluate_null(kind: str, p, *, threshold: float, covariance=None, n_samples: int | None = None,
                  reference=None) -> NullTestResult:
    """chi2 and PTE of every realisation and of the mean curve of one kind of null test.

    Parameters
    ----------
    kind : str
        A key of :data:`NULL_KINDS`.
    p : ndarray of shape (n_real, nbins), uK
        The realisations' curves.
    threshold : float
        The kind passes when threshold < PTE of the mean curve < 1 - threshold.
    covariance : ndarray of shape (nbins, nbins), optional
        The fit's covariance, estimated from ``n_samples`` samples (Hartlap factor): used only when
        there are fewer than nbins + :data:`MIN_EXTRA_REALISATIONS` realisations.
    reference : ndarray of shape (n_ref, nbins), optional
        For ``shuffled_in_z``, whose realisations share a part fixed by the data (each redshift
        slice keeps its values, so the mean over its shuffles tends to the curve of the slice means,
        not to zero): the curves of the slice means of sets without signal (the all-tracer shuffles,
        :func:`slice_means`), whose scatter is the variance of that fixed part.  See the notes.

    Notes
    -----
    With enough realisations, realisation k is tested against the sample covariance S of the
    others (about their mean, m = n_real - 2 degrees of freedom): T^2 = p_k^T S^-1 p_k, and the
    mean curve against S of all of them: T^2 = n pbar^T S^-1 pbar (m = n_real - 1).  For Gaussian
    curves of mean zero, (m - q + 1) / (q m) T^2 follows F(q, m - q + 1) with q bins (Hotelling's
    T^2; Anderson 2003, An Introduction to Multivariate Statistical Analysis, sec. 5.2), which gives
    the PTE exactly; the plain chi2 distribution would make both tails too light.  A signal shared
    by the realisations (a non-zero mean) raises every T^2, so such a null fails.

    With ``reference`` (R curves, covariance S_R about their mean), realisation k is tested against
    S_k + S_R and the mean curve against S / n + S_R, with S_k the covariance of the other
    realisations and S that of all: the fixed part varies from one sky to the next like the
    reference curves, the shuffles around it like the realisations.  The PTE is Hotelling's with
    m = R - 1 (the reference dominates; approximate).
    """
    p = np.asarray(p, dtype=float)
    n_real, dof = p.shape
    if reference is not None and n_real >= dof + MIN_EXTRA_REALISATIONS \
            and np.shape(reference)[0] >= dof + MIN_EXTRA_REALISATIONS:
        s_ref = np.cov(np.asarray(reference, dtype=float), rowvar=False)
        m = np.shape(reference)[0] - 1
        pte = np.array([hotelling_pte(_quadratic(p[k], np.cov(np.delete(p, k, axis=0), rowvar=False) + s_ref, kind),
                                      dof, m) for k in range(n_real)])
        mean_cov = np.cov(p, rowvar=False) / n_real + s_ref
        pte_m = float(hotelling_pte(_quadratic(p.mean(axis=0), mean_cov, kind), dof, m))
        chi2, chi2_m = stats.chi2.isf(pte, dof), float(stats.chi2.isf(pte_m, dof))
        source = FROM_REFERENCE
    elif n_real >= dof + MIN_EXTRA_REALISATIONS:
        chi2, pte = np.empty(n_real), np.empty(n_real)
        for k in range(n_real):
            others = np.delete(p, k, axis=0)
            t2 = _quadratic(p[k], np.cov(others, rowvar=False), kind)
            pte[k] = hotelling_pte(t2, dof, n_real - 2)
        mean_cov = np.cov(p, rowvar=False) / n_real
        pte_m = hotelling_pte(_quadratic(p.mean(axis=0), mean_cov, kind), dof, n_real - 1)
        chi2, chi2_m = stats.chi2.isf(pte, dof), float(stats.chi2.isf(pte_m, dof))
        source = FROM_REALISATIONS
    else:
        if covariance is None:
            raise InputError(f"null test {kind}: {n_real} realisations are too few for their own covariance "
                             f"(need {dof + MIN_EXTRA_REALISATIONS} for {dof} bins) and no covariance was given")
        cov = np.asarray(covariance, dtype=float)
        chi2, pte = np.empty(n_real), np.empty(n_real)
        for k in range(n_real):
            chi2[k], _, pte[k] = chi2_against_zero(p[k], cov, n_samples=n_samples)
        mean_cov = cov / n_real
        chi2_m, _, pte_m = chi2_against_zero(p.mean(axis=0), mean_cov, n_samples=n_samples)
        source = FROM_FIT
    return NullTestResult(kind=kind, p=p, chi2=chi2, pte=pte, chi2_mean=float(chi2_m), pte_mean=float(pte_m),
                          dof=int(dof), threshold=float(threshold), mean_error=np.sqrt(np.diag(mean_cov)),
                          covariance_from=source)


def _quadratic(x, cov, kind) -> float:
    """x^T cov^-1 x (a covariance that cannot be inverted is an error naming the null kind)."""
    try:
        return float(x @ np.linalg.solve(cov, x))
    except np.linalg.LinAlgError:
        raise InputError(f"null test {kind}: the realisations' covariance is singular (identical "
                         f"realisations?)") from None


def hotelling_pte(t2, n_bins: int, dof: int):
    """P(T^2 > t2) for T^2 = x^T S^-1 x, x ~ N(0, Sigma) in ``n_bins`` bins independent of S, a sample
    covariance of Sigma with ``dof`` degrees of freedom: (dof - q + 1) / (q dof) T^2 ~ F(q, dof - q + 1)
    (Anderson 2003, sec. 5.2).  Needs dof >= n_bins."""
    q, m = int(n_bins), int(dof)
    if m < q:
        raise InputError(f"Hotelling's T^2 needs at least as many degrees of freedom ({m}) as bins ({q})")
    return stats.f.sf(np.asarray(t2, dtype=float) * (m - q + 1) / (q * m), q, m - q + 1)


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
