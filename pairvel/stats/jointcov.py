"""One jackknife covariance across several curves measured on the same tracers' regions.

Curves of several aperture radii, or of several proxy bins, each have delete-one jackknife samples
p^g_k (group g, region k).  When every group's sample k deletes the same region k, the samples are
aligned and the delete-one formula applied to the stacked vector (p^1_k, p^2_k, ...) gives the
covariance of all groups together:

    C_{(g,i),(h,j)} = (n - 1)/n sum_k (p^g_{k,i} - pbar^g_i) (p^h_{k,j} - pbar^h_j),

whose diagonal blocks are each group's own jackknife covariance.  A fit across groups (tau against
radius or against the mass proxy) needs the off-diagonal blocks: curves of nested apertures, or of
tracers moving in the same large-scale flows, are correlated.

Each group's amplitude is the fit of :func:`pairvel.stats.fit.fit_amplitude` (with the run's likelihood),
linear in its curve: tau_g = w_g . p_g with w_g = Psi_g t_g / (t_g^T Psi_g t_g) over the fitted bins
(the Hartlap factor cancels in w_g).  The covariance of the amplitudes is then

    Cov(tau_g, tau_h) = w_g^T C_{gh} w_h,

the same as the jackknife covariance of the amplitudes fitted to each aligned sample with the weights
held fixed (the map is linear), and its diagonal is 1/(t^T C^-1 t), each group's fit error squared
before the Hartlap factor.
"""

from __future__ import annotations

__all__ = ["joint_jackknife_covariance", "covariance_block", "amplitude_weights", "amplitude_covariance",
           "correlation"]

import numpy as np

from ..core.errors import InputError
from .covariance import jackknife_covariance
from .fit import amplitude_weights as _fit_weights


def joint_jackknife_covariance(samples) -> np.ndarray:
    """Delete-one jackknife covariance of several groups' aligned samples, stacked group by group.

    Parameters
    ----------
    samples : ndarray of shape (n_groups, n_jk, nbins)
        Sample k of every group must delete the same region k.

    Returns
    -------
    ndarray of shape (n_groups nbins, n_groups nbins)
        Entry (g nbins + i, h nbins + j) couples bin i of group g with bin j of group h.
    """
    s = np.asarray(samples, dtype=float)
    if s.ndim != 3:
        raise InputError(f"joint jackknife samples must have shape (n_groups, n_jk, nbins); got {s.shape}")
    n_groups, n_jk, nbins = s.shape
    return jackknife_covariance(np.moveaxis(s, 0, 1).reshape(n_jk, n_groups * nbins))


def covariance_block(joint, g: int, h: int, nbins: int) -> np.ndarray:
    """The (nbins, nbins) block of ``joint`` coupling group g with group h."""
    return np.asarray(joint)[g * nbins:(g + 1) * nbins, h * nbins:(h + 1) * nbins]


def amplitude_weights(template, covariance, use, *, likelihood="hartlap") -> np.ndarray:
    """w with w . p equal to the amplitude :func:`~pairvel.stats.fit.fit_amplitude` fits with ``likelihood``
    (:func:`pairvel.stats.fit.amplitude_weights`); w is 0 outside the fitted bins ``use``."""
    return _fit_weights(template, covariance, use, likelihood=likelihood)


def amplitude_covariance(weights, joint) -> np.ndarray:
    """Cov(tau_g, tau_h) = w_g^T C_gh w_h for the amplitudes w_g . p_g of every group.

    Parameters
    ----------
    weights : ndarray of shape (n_groups, nbins)
        From :func:`amplitude_weights`, one row per group.
    joint : ndarray of shape (n_groups nbins, n_groups nbins)
        From :func:`joint_jackknife_covariance`.
    """
    w = np.asarray(weights, dtype=float)
    n_groups, nbins = w.shape
    big = np.zeros((n_groups, n_groups * nbins))
    for g in range(n_groups):
        big[g, g * nbins:(g + 1) * nbins] = w[g]
    return big @ np.asarray(joint, dtype=float) @ big.T


def correlation(covariance) -> np.ndarray:
    """The correlation matrix of a covariance (nan where a variance is not positive)."""
    c = np.asarray(covariance, dtype=float)
    d = np.sqrt(np.where(np.diag(c) > 0, np.diag(c), np.nan))
    return c / np.outer(d, d)
