"""How much pairwise signal the redshift-trend removal takes away, predicted from linear theory.

The trend removal (:mod:`pairvel.maps.trend`) subtracts from each tracer the kernel-weighted mean
temperature of the tracers at similar redshift, g_i = sum_k K_ik T_k.  That mean is not free of
signal: the tracers k in the redshift shell around tracer i stream towards i and towards its
pair partner j, and for a pair separated along the line of sight the shells around z_i and z_j
see different streaming.  The estimator then measures less than the linear-theory v12 - a few per
cent at 50 Mpc and tens of per cent beyond 100 Mpc for a 30 x 30 degree patch (the validation
mocks of :mod:`pairvel.sims.validate` measure it).

To first order in the correlations, a tracer k found near tracers i and j moves towards each of
them with the linear mean streaming velocity

    E[v_k | i, j] = b U(|x_i - x_k|) (x_i - x_k)/|x_i - x_k| + (same for j),
    U(s) = (1/3) a H f s xibar(s)     (half the linear pairwise infall speed, no 1 + xi factor),

the same law that gives the pair its own signal, E[T_i - T_j | pair] ~ U(r) times the line-of-
sight projections.  So, per separation bin, the expected trend-removed numerator over the expected
plain one is a ratio of sums in which b, tau, a H f and the growth cancel:

    R_b = sum_pairs c_ij (D_ij - E[g_i - g_j]) / sum_pairs c_ij D_ij,

with D_ij = U(r) [rhat_i . (x_j - x_i) - rhat_j . (x_i - x_j)] / r and E[g_i] the K-weighted
mean over the shell of the line-of-sight streaming of every tracer towards x_i and x_j (plus the
pair's own small share of its kernel sum).  The sums are Monte Carlo estimates on the run's own
geometry: pairs drawn uniformly among the catalogue's pairs in each bin, shells represented by a
random subsample of the catalogue.  The template of a run with trend removal is R_b times the
plain template.

Approximations (each small at the scales fitted, and checked by the validation mocks): the
clustering of the shell tracers around i and j (second order) and the tracers' own redshift-space
positions are ignored; the streaming law is the linear one at the matter correlation's shape (its
amplitude cancels).

Tracer weights (``weights``: catalogue weights, noise weights) enter as they enter the estimator:
each drawn pair's terms count with w_i w_j in both sums of R_b, so the kept fraction is that of the
weighted numerator.  The trend removal itself is unweighted (every tracer counts once in the kernel
mean, :mod:`pairvel.maps.trend`), and so are the shell means here.  Without weights (or with equal
ones) the draws and the result are exactly those of the unweighted model.
"""

from __future__ import annotations

__all__ = ["TrendTransfer", "trend_transfer"]

import math
from dataclasses import dataclass

import numba as nb
import numpy as np

from ..core.errors import InputError
from .cosmology import DEFAULT_COSMOLOGY, Cosmology

_S_MIN, _S_MAX = 0.5, 1000.0      # Mpc: range of the tabulated streaming law (U = 0 beyond; |U| there < 1e-3 of its peak)
_CUT_SIGMA = 6.0                  # shell kernel cut, in sigma_z (weight exp(-18) ~ 1.5e-8)


@dataclass(frozen=True)
class TrendTransfer:
    """Per-bin ratio of the trend-removed to the plain expected signal, with its Monte Carlo error.

    Attributes
    ----------
    ratio : ndarray of shape (nbins,)
        NaN in bins that drew fewer than 2 pairs.
    error : ndarray of shape (nbins,)
        Standard error from the spread of the per-pair terms (pairs drawn independently).
    n_pairs : int
        Pairs drawn per bin.
    n_shell : int
        Tracers standing for the redshift shells.
    """

    ratio: np.ndarray
    error: np.ndarray
    n_pairs: int
    n_shell: int

    @property
    def factor(self) -> np.ndarray:
        """The ratio with 1 in bins that drew fewer than 2 pairs (no prediction: the template is kept)."""
        return np.where(np.isfinite(self.ratio), self.ratio, 1.0)


def _streaming_table(cosmo: Cosmology, wiggles: bool, power):
    """log-spaced s and the shape s xibar(s) of the linear streaming speed (any normalisation)."""
    from .theory import mean_correlation

    s = np.geomspace(_S_MIN, _S_MAX, 1500)
    return s, s * mean_correlation(s, 0.0, cosmo=cosmo, wiggles=wiggles, power=power)


@nb.njit(cache=True)
def _u_over_s(s, step, table):
    """U(s)/s by linear interpolation on the uniform grid s = step * n; 0 outside [S_MIN, S_MAX)."""
    if s < _S_MIN or s >= _S_MAX:
        return 0.0
    x = s / step
    i = int(x)
    t = x - i
    return table[i] * (1.0 - t) + table[i + 1] * t


@nb.njit(parallel=True, cache=True)
def _shell_streaming(first, second, z_shell, pos_k, rhat_k, z_k, inv2s2, cut, step, table):
    """Kernel-weighted shell means of the line-of-sight streaming towards two points.

    For each m: out[0, m] = sum_k w_k rhat_k . (x - x_k) U(s)/s / sum_k w_k with x = first[m] and
    s = |x - x_k|, w_k = exp(-(z_shell[m] - z_k)^2 / 2 sigma^2); out[1, m] the same for second[m].
    ``z_k`` sorted; the kernel is cut at ``cut``.
    """
    n = first.shape[0]
    out = np.empty((2, n))
    for m in nb.prange(n):
        lo = np.searchsorted(z_k, z_shell[m] - cut)
        hi = np.searchsorted(z_k, z_shell[m] + cut)
        acc0 = 0.0
        acc1 = 0.0
        wsum = 0.0
        for k in range(lo, hi):
            dz = z_k[k] - z_shell[m]
            w = math.exp(-dz * dz * inv2s2)
            wsum += w
            px, py, pz = pos_k[k, 0], pos_k[k, 1], pos_k[k, 2]
            ex, ey, ez = rhat_k[k, 0], rhat_k[k, 1], rhat_k[k, 2]
            dx, dy, dzz = first[m, 0] - px, first[m, 1] - py, first[m, 2] - pz
            acc0 += w * _u_over_s(math.sqrt(dx * dx + dy * dy + dzz * dzz), step, table) * (dx * ex + dy * ey + dzz * ez)
            dx, dy, dzz = second[m, 0] - px, second[m, 1] - py, second[m, 2] - pz
            acc1 += w * _u_over_s(math.sqrt(dx * dx + dy * dy + dzz * dzz), step, table) * (dx * ex + dy * ey + dzz * ez)
        out[0, m] = acc0 / wsum if wsum > 0 else 0.0
        out[1, m] = acc1 / wsum if wsum > 0 else 0.0
    return out


def _kernel_sums(z_all, z_at, sigma_z):
    """sum_k exp(-(z - z_k)^2 / 2 sigma^2) over the whole catalogue at each z in z_at (histogram of step sigma/8,
    error below ~0.5%: it only normalises the pair's own small share of its kernel mean)."""
    step = sigma_z / 8.0
    lo = z_all.min() - 7 * sigma_z
    n = int(math.ceil((z_all.max() + 7 * sigma_z - lo) / step)) + 1
    hist = np.bincount(((z_all - lo) / step).astype(np.int64), minlength=n).astype(float)
    centres = lo + (np.arange(n) + 0.5) * step
    out = np.empty(z_at.size)
    for a in range(0, z_at.size, 4096):
        d = z_at[a:a + 4096, None] - centres[None, :]
        out[a:a + 4096] = np.exp(-0.5 * (d / sigma_z) ** 2) @ hist
    return out


def _draw_pairs(pos, edges, n_pairs, rng, n_sub):
    """Per bin, up to n_pairs index pairs (i, j) drawn uniformly among the pairs of a random subsample."""
    from scipy.spatial import cKDTree

    sub = np.sort(rng.choice(pos.shape[0], size=min(n_sub, pos.shape[0]), replace=False))
    pairs = cKDTree(pos[sub]).query_pairs(edges[-1], output_type="ndarray")
    r = np.linalg.norm(pos[sub[pairs[:, 0]]] - pos[sub[pairs[:, 1]]], axis=1)
    which = np.searchsorted(edges, r, side="right") - 1
    out = []
    for b in range(edges.size - 1):
        idx = np.flatnonzero((which == b) & (r >= edges[b]))
        if idx.size > n_pairs:
            idx = rng.choice(idx, size=n_pairs, replace=False)
        out.append(sub[pairs[idx]])
    return out


def trend_transfer(positions, z, edges, sigma_z, *, seed=None, n_pairs=400, n_shell=8000, n_sub=4000,
                   cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None,
                   weights=None) -> TrendTransfer:
    """Expected trend-removed signal over the plain signal per separation bin (module docstring).

    Parameters
    ----------
    positions : ndarray of shape (N, 3), comoving Mpc
        Tracer positions (observer at the origin).
    z : ndarray of shape (N,)
        Tracer redshifts, as used by the trend removal.
    edges : ndarray of shape (nbins + 1,), Mpc
    sigma_z : float
        Width of the trend kernel.
    seed : int, Generator or None
        Random draws of pairs and shell tracers.
    n_pairs : int, default 400
        Pairs drawn per bin; the Monte Carlo error falls as 1/sqrt(n_pairs).
    n_shell : int, default 8000
        Catalogue tracers standing for the redshift shells.
    n_sub : int, default 4000
        Tracers whose neighbour counts weight the pair draws.
    weights : ndarray of shape (N,), optional
        The estimator's tracer weights (>= 0); a drawn pair counts with w_i w_j.  None: all 1.

    Returns
    -------
    TrendTransfer
    """
    from ..core.rng import as_generator

    pos = np.ascontiguousarray(positions, dtype=np.float64)
    z = np.asarray(z, dtype=np.float64)
    edges = np.asarray(edges, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3 or z.shape != (pos.shape[0],):
        raise InputError(f"trend transfer needs positions (N, 3) and redshifts (N,); got {pos.shape} and {z.shape}")
    if not (math.isfinite(sigma_z) and sigma_z > 0):
        raise InputError(f"trend transfer needs sigma_z > 0; got {sigma_z!r}", key="trend.sigma_z")
    w = np.ones(z.size) if weights is None else np.asarray(weights, dtype=np.float64)
    if w.shape != z.shape or not np.all(np.isfinite(w) & (w >= 0)) or not np.any(w > 0):
        raise InputError(f"trend transfer needs finite weights >= 0 (not all 0), one per tracer ({z.size}); got "
                         f"shape {w.shape}")
    rng = as_generator(seed)
    s_tab, u_tab = _streaming_table(cosmo, wiggles, power)
    step = 0.25
    s_lin = step * np.arange(int(_S_MAX / step) + 2)
    u_over_s = np.interp(np.log(np.maximum(s_lin, _S_MIN)), np.log(s_tab), u_tab) / np.maximum(s_lin, _S_MIN)
    rhat = pos / np.linalg.norm(pos, axis=1)[:, None]

    shell = rng.choice(pos.shape[0], size=min(n_shell, pos.shape[0]), replace=False)
    shell = shell[np.argsort(z[shell], kind="stable")]
    pos_k, rhat_k, z_k = pos[shell].copy(), rhat[shell].copy(), z[shell].copy()
    inv2s2 = 1.0 / (2.0 * sigma_z**2)
    cut = _CUT_SIGMA * sigma_z

    drawn = _draw_pairs(pos, edges, n_pairs, rng, n_sub)
    nb_ = edges.size - 1
    ratio, error = np.full(nb_, np.nan), np.full(nb_, np.nan)
    for b in range(nb_):
        pairs = drawn[b]
        if pairs.shape[0] < 2:
            continue
        i, j = pairs.T
        sep = pos[j] - pos[i]
        r = np.linalg.norm(sep, axis=1)
        u_r = np.interp(np.log(np.maximum(r, _S_MIN)), np.log(s_tab), u_tab)
        a_i = u_r * np.einsum("nd,nd->n", rhat[i], sep) / r        # i streams towards j
        a_j = -u_r * np.einsum("nd,nd->n", rhat[j], sep) / r       # j streams towards i
        rhat_ij = -sep / r[:, None]
        c = np.einsum("nd,nd->n", rhat_ij, 0.5 * (rhat[i] + rhat[j]))
        two = _shell_streaming(np.concatenate([pos[i], pos[i]]), np.concatenate([pos[j], pos[j]]),
                               np.concatenate([z[i], z[j]]), pos_k, rhat_k, z_k, inv2s2, cut, step, u_over_s)
        g = np.concatenate([two[:, :i.size], two[:, i.size:]])   # (z_i; x_i), (z_i; x_j), (z_j; x_i), (z_j; x_j)
        # the pair's own share of each kernel mean: K_ii a_i + K_ij a_j (and the same for j)
        ks = _kernel_sums(z, np.concatenate([z[i], z[j]]), sigma_z).reshape(2, -1)
        w_ij = np.exp(-((z[i] - z[j]) ** 2) * inv2s2)
        own_i = (a_i + w_ij * a_j) / ks[0]
        own_j = (a_j + w_ij * a_i) / ks[1]
        pw = w[i] * w[j]
        if not np.any(pw > 0):
            continue
        pw = pw / pw.mean()
        plain = pw * c * (a_i - a_j)
        removed = pw * c * ((g[0] + g[1] + own_i) - (g[2] + g[3] + own_j))
        mean_plain = plain.mean()
        ratio[b] = 1.0 - removed.mean() / mean_plain
        # delta method on the ratio of two means over independent pairs (the weights' own mean fixed)
        t = -removed / mean_plain + (1.0 - ratio[b]) * plain / mean_plain
        error[b] = t.std(ddof=1) / math.sqrt(t.size)
    return TrendTransfer(ratio, error, int(n_pairs), int(shell.size))
