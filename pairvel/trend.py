"""Redshift-trend correction of aperture temperatures.

Foregrounds that scale with redshift (the thermal SZ of the tracers themselves, dust) would bias
the pairwise estimator through pairs at different redshifts.  Each tracer's temperature has the
Gaussian-kernel-weighted mean of the tracers at similar redshift subtracted:

    T_i' = T_i - sum_j K_ij T_j / sum_j K_ij,   K_ij = exp(-(z_i - z_j)^2 / (2 sigma_z^2)),

the sum including i itself.  The kernel is cut at 7 sigma_z (weights below exp(-24.5) ~ 2e-11).
"""

from __future__ import annotations

__all__ = ["redshift_trend", "remove_redshift_trend"]

import numba as nb
import numpy as np

from .errors import InputError

_CUT_SIGMA = 7.0


@nb.njit(parallel=True, cache=True)
def _kernel_means(zs, ts, sigma, cut):
    n = zs.size
    m = ts.shape[0]
    out = np.zeros((m, n))
    inv = 0.5 / (sigma * sigma)
    lo_all = np.searchsorted(zs, zs - cut * sigma, side="left")
    hi_all = np.searchsorted(zs, zs + cut * sigma, side="right")
    for i in nb.prange(n):
        wsum = 0.0
        acc = np.zeros(m)
        for j in range(lo_all[i], hi_all[i]):
            dz = zs[j] - zs[i]
            w = np.exp(-dz * dz * inv)
            wsum += w
            for k in range(m):
                acc[k] += w * ts[k, j]
        for k in range(m):
            out[k, i] = acc[k] / wsum
    return out


def redshift_trend(temperatures, z, *, sigma_z=0.01):
    """The Gaussian-kernel mean temperature at each tracer's redshift, same shape as ``temperatures``.

    Parameters
    ----------
    temperatures : ndarray of shape (N,) or (M, N), uK
    z : ndarray of shape (N,)
    sigma_z : float, default 0.01
        Kernel width in redshift.
    """
    t = np.asarray(temperatures, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    single = t.ndim == 1
    t2 = t[None, :] if single else t
    if t2.ndim != 2 or t2.shape[1] != z.size or z.ndim != 1:
        raise InputError(f"temperatures must have shape (N,) or (M, N) with N = len(z) = {z.size}; got {t.shape}")
    if not (np.all(np.isfinite(t2)) and np.all(np.isfinite(z))):
        raise InputError("temperatures and redshifts must be finite for the redshift-trend correction")
    if not sigma_z > 0:
        raise InputError(f"sigma_z must be > 0; got {sigma_z}")
    order = np.argsort(z, kind="stable")
    means_sorted = _kernel_means(z[order], np.ascontiguousarray(t2[:, order]), float(sigma_z), _CUT_SIGMA)
    trend = np.empty_like(means_sorted)
    trend[:, order] = means_sorted
    return trend[0] if single else trend


def remove_redshift_trend(temperatures, z, *, sigma_z=0.01):
    """Temperatures minus their Gaussian-kernel redshift trend (see module notes)."""
    return np.asarray(temperatures, dtype=np.float64) - redshift_trend(temperatures, z, sigma_z=sigma_z)
