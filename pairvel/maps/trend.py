"""Redshift-trend correction of aperture temperatures.

Anything in the aperture temperatures that drifts with redshift (the thermal SZ of the tracers
themselves, dust, selection) would leak into the pairwise estimator through pairs at different
redshifts.  Each tracer has the Gaussian-kernel-weighted mean temperature of the tracers at
similar redshift subtracted [common practice]:

    T_i' = T_i - sum_j K_ij T_j / sum_j K_ij,   K_ij = exp(-(z_i - z_j)^2 / (2 sigma_z^2)),

the sums running over every tracer, i itself included.

Two exact-to-rounding evaluations, chosen by their cost (same result to ~1e-9 of the trend):

* windowed direct sum: z sorted, the kernel cut at 9 sigma_z (weights below exp(-40.5) ~ 3e-18
  of the tracer's own weight), O(N x window) - the choice when tracers are sparse in z;
* gridded sum: every tracer spread onto a grid of step sigma_z / 16 with 8-point Lagrange
  weights, the grid convolved with the sampled kernel, and the result interpolated back with the
  same weights, O(N + grid x kernel) - the choice for large N (10^6 tracers take well under a
  second).  The error is that of 8th-order interpolation of the Gaussian at 16 points per sigma,
  ~1e-10 of the kernel peak per pair.

Memory is O(N + grid), never O(N^2).
"""

from __future__ import annotations

__all__ = ["redshift_trend", "remove_redshift_trend"]

import math

import numba as nb
import numpy as np

from ..core.errors import InputError

_CUT_SIGMA = 9.0           # kernel cut, in sigma_z
_GRID_PER_SIGMA = 16       # grid points per sigma_z for the gridded sum
_MAX_GRID = 20_000_000     # grid cells x temperature sets; beyond this the direct sum is used
_GRID_COST_FACTOR = 2.0    # a gridded operation costs about this many direct ones


@nb.njit(parallel=True, cache=True)
def _direct_sorted(zs, ts, lo, hi, inv2s2):
    """Kernel means for sorted z with precomputed window bounds [lo[i], hi[i])."""
    n = zs.size
    m = ts.shape[0]
    out = np.empty((m, n))
    for i in nb.prange(n):
        wsum = 0.0
        acc = np.zeros(m)
        zi = zs[i]
        for j in range(lo[i], hi[i]):
            dz = zs[j] - zi
            w = math.exp(-dz * dz * inv2s2)
            wsum += w
            for k in range(m):
                acc[k] += w * ts[k, j]
        for k in range(m):
            out[k, i] = acc[k] / wsum
    return out


@nb.njit(cache=True)
def _lagrange8(t, out):
    """Weights of the 8-point Lagrange interpolant at nodes -3..4 for 0 <= t < 1."""
    for a in range(8):
        xa = a - 3.0
        num = 1.0
        den = 1.0
        for b in range(8):
            if b != a:
                xb = b - 3.0
                num *= t - xb
                den *= xa - xb
        out[a] = num / den


@nb.njit(cache=True)
def _gridded(z, ts, g0, h, n_grid, kern):
    """Kernel means by Lagrange spreading, grid convolution and Lagrange interpolation."""
    n = z.size
    m = ts.shape[0]
    nk = (kern.size - 1) // 2
    a_src = np.zeros((m, n_grid))
    b_src = np.zeros(n_grid)
    touched = np.zeros(n_grid, dtype=np.bool_)
    lw = np.empty(8)
    for j in range(n):
        u = (z[j] - g0) / h
        base = int(math.floor(u))
        _lagrange8(u - base, lw)
        for a in range(8):
            g = base + a - 3
            b_src[g] += lw[a]
            touched[g] = True
            for k in range(m):
                a_src[k, g] += lw[a] * ts[k, j]
    a_conv = np.zeros((m, n_grid))
    b_conv = np.zeros(n_grid)
    for s in range(n_grid):
        if not touched[s]:
            continue
        g_lo = max(0, s - nk)
        g_hi = min(n_grid, s + nk + 1)
        bs = b_src[s]
        for g in range(g_lo, g_hi):
            w = kern[g - s + nk]
            b_conv[g] += w * bs
            for k in range(m):
                a_conv[k, g] += w * a_src[k, s]
    out = np.empty((m, n))
    acc = np.empty(m)
    for i in range(n):
        u = (z[i] - g0) / h
        base = int(math.floor(u))
        _lagrange8(u - base, lw)
        den = 0.0
        for k in range(m):
            acc[k] = 0.0
        for a in range(8):
            g = base + a - 3
            den += lw[a] * b_conv[g]
            for k in range(m):
                acc[k] += lw[a] * a_conv[k, g]
        for k in range(m):
            out[k, i] = acc[k] / den
    return out


def _check(temperatures, z, sigma_z):
    t = np.asarray(temperatures, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    if z.ndim != 1:
        raise InputError(f"z must be a 1-D array; got shape {z.shape}")
    if t.ndim not in (1, 2) or t.shape[-1] != z.size:
        raise InputError(f"temperatures must have shape (N,) or (M, N) with N = len(z) = {z.size}; got {t.shape}")
    bad_z = ~np.isfinite(z)
    if bad_z.any():
        first = int(np.flatnonzero(bad_z)[0])
        raise InputError(f"z must be finite for the redshift-trend correction; {int(bad_z.sum())} values are not "
                         f"(first: row {first}, z={float(z[first])})")
    bad_t = ~np.isfinite(t)
    if bad_t.any():
        first = int(np.flatnonzero(bad_t.reshape(-1, z.size).any(axis=0))[0])
        raise InputError(f"temperatures must be finite for the redshift-trend correction; {int(bad_t.sum())} "
                         f"values are not (first: tracer {first}); drop unusable apertures first")
    if isinstance(sigma_z, bool) or not isinstance(sigma_z, (int, float, np.integer, np.floating)) \
            or not (math.isfinite(sigma_z) and sigma_z > 0):
        raise InputError(f"sigma_z must be a finite number > 0; got {sigma_z!r}")
    return t, z, float(sigma_z)


def _trend_2d(t2, z, sigma_z, method):
    """Kernel means for t2 of shape (M, N); ``method`` 'auto', 'direct' or 'grid'."""
    m, n = t2.shape
    if n == 0:
        return np.empty((m, 0))
    cut = _CUT_SIGMA * sigma_z
    order = np.argsort(z, kind="stable")
    zs = z[order]
    lo = np.searchsorted(zs, zs - cut, side="left")
    hi = np.searchsorted(zs, zs + cut, side="right")
    h = sigma_z / _GRID_PER_SIGMA
    n_grid = int(math.floor((zs[-1] - zs[0]) / h)) + 11
    nk = int(math.ceil(_CUT_SIGMA * _GRID_PER_SIGMA))
    if method == "auto":
        cost_direct = float(np.sum(hi - lo)) * (m + 1)
        cost_grid = _GRID_COST_FACTOR * (16.0 * n + min(n_grid, 8 * n) * (2 * nk + 1)) * (m + 1)
        method = "grid" if cost_grid < cost_direct and n_grid * (m + 1) <= _MAX_GRID else "direct"
    if method == "direct":
        sorted_means = _direct_sorted(zs, np.ascontiguousarray(t2[:, order]), lo.astype(np.int64),
                                      hi.astype(np.int64), 0.5 / sigma_z ** 2)
        out = np.empty_like(sorted_means)
        out[:, order] = sorted_means
        return out
    if method != "grid":
        raise ValueError(f"method must be 'auto', 'direct' or 'grid'; got {method!r}")
    g0 = zs[0] - 5.0 * h
    kern = np.exp(-0.5 * (np.arange(-nk, nk + 1) / _GRID_PER_SIGMA) ** 2)
    return _gridded(z, np.ascontiguousarray(t2), g0, h, n_grid, kern)


def redshift_trend(temperatures, z, *, sigma_z=0.01):
    """The Gaussian-kernel mean temperature at each tracer's redshift.

    Parameters
    ----------
    temperatures : ndarray of shape (N,) or (M, N), uK
        One or several temperature sets for the same tracers.
    z : ndarray of shape (N,)
        Redshifts.
    sigma_z : float, default 0.01
        Kernel width in redshift.

    Returns
    -------
    ndarray of the shape of ``temperatures``, uK
        sum_j K_ij T_j / sum_j K_ij with K_ij = exp(-(z_i - z_j)^2 / (2 sigma_z^2)), j over all
        tracers including i.
    """
    t, z, sigma_z = _check(temperatures, z, sigma_z)
    t2 = t[None, :] if t.ndim == 1 else t
    trend = _trend_2d(t2, z, sigma_z, "auto")
    return trend[0] if t.ndim == 1 else trend


def remove_redshift_trend(temperatures, z, *, sigma_z=0.01):
    """Temperatures minus their Gaussian-kernel redshift trend.

    Parameters
    ----------
    temperatures : ndarray of shape (N,) or (M, N), uK
        Aperture temperatures (finite; drop unusable apertures first).
    z : ndarray of shape (N,)
        Redshifts of the tracers.
    sigma_z : float, default 0.01
        Width of the Gaussian kernel in redshift.

    Returns
    -------
    ndarray of the shape of ``temperatures``, float64, uK
        T_i - sum_j K_ij T_j / sum_j K_ij, K_ij = exp(-(z_i - z_j)^2 / (2 sigma_z^2)), the sums
        over all tracers including i.  A constant is removed exactly, and a trend linear in z is
        removed wherever the tracers are symmetric in z about z_i within a few sigma_z.

    Examples
    --------
    >>> import numpy as np
    >>> out = remove_redshift_trend(np.full(5, 3.0), np.linspace(0.1, 0.5, 5))
    >>> bool(np.allclose(out, 0.0))
    True
    """
    t, z, sigma_z = _check(temperatures, z, sigma_z)
    t2 = t[None, :] if t.ndim == 1 else t
    out = t2 - _trend_2d(t2, z, sigma_z, "auto")
    return out[0] if t.ndim == 1 else out
