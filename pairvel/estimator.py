"""The Ferreira et al. (1999) mean pairwise momentum estimator over comoving-separation bins.

p_hat(r) = - sum_{i<j} (T_i - T_j) c_ij / sum_{i<j} c_ij^2,  c_ij = rhat_ij . (rhat_i + rhat_j) / 2,

summed over the pairs whose comoving separation lies in the bin [lo, hi).  One pass of the compiled
pair engine gives every bin, every temperature set and every delete-one jackknife sample.
"""

from __future__ import annotations

__all__ = ["PairwiseResult", "pairwise_momentum", "pairwise_momentum_cross", "mean_pairwise_velocity_3d"]

from dataclasses import dataclass

import numba
import numpy as np

from . import _kernels
from .errors import InputError


@dataclass(frozen=True)
class PairwiseResult:
    """Output of :func:`pairwise_momentum`.

    Attributes
    ----------
    edges : ndarray of shape (nbins + 1,), Mpc
    p : ndarray of shape (nbins,) or (M, nbins), uK
        The estimator; nan in bins without pairs.
    numerator : ndarray, same shape as ``p``
        sum (T_i - T_j) c_ij.
    denominator : ndarray of shape (nbins,)
        sum c_ij^2.
    pair_counts : ndarray of shape (nbins,), int64
    z_eff : ndarray of shape (nbins,) or None
        Mean pair redshift (z_i + z_j)/2 weighted by c_ij^2, when redshifts were given.
    p_jk : ndarray of shape (n_jk, nbins) or (M, n_jk, nbins), or None
        Delete-one jackknife samples: the estimator without the pairs touching region k.
    n_jk : int
    """

    edges: np.ndarray
    p: np.ndarray
    numerator: np.ndarray
    denominator: np.ndarray
    pair_counts: np.ndarray
    z_eff: np.ndarray | None = None
    p_jk: np.ndarray | None = None
    n_jk: int = 0

    @property
    def r_mid(self) -> np.ndarray:
        """Bin centres, Mpc."""
        return 0.5 * (self.edges[1:] + self.edges[:-1])


def _ratio(num, den):
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(den > 0, -num / np.where(den > 0, den, 1.0), np.nan)


def _check_edges(edges) -> np.ndarray:
    edges = np.asarray(edges, dtype=np.float64)
    if edges.ndim != 1 or edges.size < 2 or not np.all(np.isfinite(edges)) or edges[0] < 0 \
            or np.any(np.diff(edges) <= 0):
        raise InputError(f"separation edges must be at least two finite, increasing values >= 0 Mpc; got {edges!r}")
    return edges


def _check_positions(positions) -> np.ndarray:
    pos = np.asarray(positions, dtype=np.float64)
    if pos.ndim != 2 or pos.shape[1] != 3:
        raise InputError(f"positions must have shape (N, 3) in comoving Mpc; got shape {pos.shape}")
    bad = ~np.all(np.isfinite(pos), axis=1)
    if bad.any():
        raise InputError(f"positions must be finite; {bad.sum()} rows are not (first: row {np.flatnonzero(bad)[0]})")
    return pos


def _prepare(pos, r_max):
    """Cell-sorted positions and unit vectors, shape (3, N), plus the cell index arrays."""
    order, start, dims, offsets = _kernels.build_cells(pos, r_max)
    xs = pos[order]
    norm = np.linalg.norm(xs, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        us = np.where(norm[:, None] > 0, xs / norm[:, None], 0.0)
    return order, start, dims, offsets, np.ascontiguousarray(xs.T), np.ascontiguousarray(us.T)


def _is_uniform(edges) -> bool:
    return bool(np.allclose(np.diff(edges), edges[1] - edges[0], rtol=1e-12, atol=0.0))


def _threads(n_threads) -> int:
    if n_threads is None:
        return numba.config.NUMBA_NUM_THREADS
    if int(n_threads) < 1:
        raise InputError(f"n_threads must be >= 1; got {n_threads}")
    return min(int(n_threads), numba.config.NUMBA_NUM_THREADS)


def pairwise_momentum(positions, temperatures, edges, *, regions=None, redshifts=None, n_threads=None):
    """Mean pairwise kSZ momentum in comoving-separation bins (Ferreira et al. 1999).

    Parameters
    ----------
    positions : ndarray of shape (N, 3), comoving Mpc
        Observer at the origin.
    temperatures : ndarray of shape (N,) or (M, N), uK
        One or M temperature sets; all go through the same pass over pairs.
    edges : ndarray of shape (nbins + 1,), Mpc
        Increasing bin edges; bins are [lo, hi).
    regions : ndarray of shape (N,), int, optional
        Jackknife region labels 0..n_jk-1; enables ``p_jk``.
    redshifts : ndarray of shape (N,), optional
        Enables the pair-weighted mean redshift per bin.
    n_threads : int, optional
        Threads for the compiled loop (default: all numba threads).

    Returns
    -------
    PairwiseResult

    Notes
    -----
    p_hat = - sum (T_i - T_j) c_ij / sum c_ij^2 with c_ij = rhat_ij.(rhat_i + rhat_j)/2 and
    r_ij = r_i - r_j; coincident points are never a pair.  Memory is O(N + 16 M bins n_jk): no list
    of pairs is ever built.  The sums do not depend on ``n_threads`` (fixed work chunks).

    References
    ----------
    Ferreira, Juszkiewicz, Feldman, Davis & Jaffe 1999, ApJ 515, L1.
    """
    pos, temps2, single, edges, reg, n_jk, zz, want_z = _validate(positions, temperatures, edges, regions, redshifts)
    sums = pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, n_threads=n_threads)
    return finalise(sums, edges, single=single, n_jk=n_jk, want_z=want_z)


def _validate(positions, temperatures, edges, regions, redshifts):
    """Check the inputs of :func:`pairwise_momentum`; return them as float64/int64 arrays."""
    pos = _check_positions(positions)
    n = pos.shape[0]
    temps = np.asarray(temperatures, dtype=np.float64)
    single = temps.ndim == 1
    temps2 = temps[None, :] if single else temps
    if temps2.ndim != 2 or temps2.shape[1] != n:
        raise InputError(f"temperatures must have shape ({n},) or (M, {n}) to match positions; got {temps.shape}")
    if not np.all(np.isfinite(temps2)):
        bad = np.flatnonzero(~np.all(np.isfinite(temps2), axis=0))
        raise InputError(f"temperatures must be finite; {bad.size} tracers are not (first: row {bad[0]})")
    edges = _check_edges(edges)
    n_jk = 0
    reg = np.zeros(n, dtype=np.int64)
    if regions is not None:
        reg = np.asarray(regions)
        if reg.shape != (n,) or reg.dtype.kind not in "iu" or (n and reg.min() < 0):
            raise InputError(f"regions must be non-negative integer labels of shape ({n},); got {reg.dtype} {reg.shape}")
        reg = reg.astype(np.int64)
        n_jk = int(reg.max()) + 1 if n else 0
    want_z = redshifts is not None
    zz = np.zeros(n) if not want_z else np.asarray(redshifts, dtype=np.float64)
    if zz.shape != (n,):
        raise InputError(f"redshifts must have shape ({n},); got {zz.shape}")
    return pos, temps2, single, edges, reg, n_jk, zz, want_z


def pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, *, n_threads=None) -> tuple:
    """One pass of the compiled engine over validated inputs; returns the additive sums
    (num (M, nb), den, cnt, zsum, jk_num (max(n_jk,1), M, nb), jk_den, jk_cnt).

    The sums of disjoint sets of pairs add, which is what lets work units run anywhere.
    """
    n = pos.shape[0]
    nbins = edges.size - 1
    m_sets = temps2.shape[0]
    if n < 2:
        nj = max(n_jk, 1)
        return (np.zeros((m_sets, nbins)), np.zeros(nbins), np.zeros(nbins, np.int64), np.zeros(nbins),
                np.zeros((nj, m_sets, nbins)), np.zeros((nj, nbins)), np.zeros((nj, nbins), np.int64))
    order, start, dims, offsets, xs, us = _prepare(pos, edges[-1])
    ts = np.ascontiguousarray(temps2[:, order].T)      # (N, M): one tracer's sets side by side
    previous = numba.get_num_threads()
    numba.set_num_threads(_threads(n_threads))
    try:
        return _kernels.pair_sums(xs, us, ts, np.ascontiguousarray(reg[order]), np.ascontiguousarray(zz[order]),
                                  start, dims, offsets, edges, _is_uniform(edges), n_jk, want_z)
    finally:
        numba.set_num_threads(previous)


def finalise(sums, edges, *, single: bool, n_jk: int, want_z: bool) -> PairwiseResult:
    """Turn the additive sums of :func:`pass_sums` into a :class:`PairwiseResult`."""
    num, den, cnt, zsum, jk_num, jk_den, _jk_cnt = sums
    p = _ratio(num, den[None, :])
    z_eff = None
    if want_z:
        with np.errstate(divide="ignore", invalid="ignore"):
            z_eff = np.where(den > 0, zsum / np.where(den > 0, den, 1.0), np.nan)
    p_jk = None
    if n_jk:
        # jackknife k: all pairs minus the pairs touching region k
        num_k = num[None, :, :] - jk_num[:n_jk]            # (n_jk, M, nb)
        den_k = den[None, :] - jk_den[:n_jk]                # (n_jk, nb)
        p_jk = np.moveaxis(_ratio(num_k, den_k[:, None, :]), 0, 1)  # (M, n_jk, nb)
        if single:
            p_jk = p_jk[0]
    return PairwiseResult(edges=edges, p=p[0] if single else p, numerator=num[0] if single else num,
                          denominator=den, pair_counts=cnt, z_eff=z_eff, p_jk=p_jk, n_jk=n_jk)


def pairwise_momentum_cross(positions_a, temperatures_a, positions_b, temperatures_b, edges, *, regions_a=None,
                            regions_b=None, redshifts_a=None, redshifts_b=None, n_threads=None) -> PairwiseResult:
    """The estimator over cross pairs only: one member from catalogue A, the other from B.

    Same estimator as :func:`pairwise_momentum` (for example clusters against galaxies); the
    temperature sets of A and B must have the same M.  Regions (both or neither) share one label
    space; redshifts (both or neither) give the pair redshift.

    Notes
    -----
    Computed from three passes of the engine, sums(A + B) - sums(A) - sums(B), which are exact in
    the pair counts and equal to a direct cross loop up to floating-point rounding.
    """
    if (regions_a is None) != (regions_b is None) or (redshifts_a is None) != (redshifts_b is None):
        raise InputError("regions and redshifts must be given for both catalogues or for neither")
    ta = np.asarray(temperatures_a, dtype=np.float64)
    tb = np.asarray(temperatures_b, dtype=np.float64)
    if ta.ndim != tb.ndim or (ta.ndim == 2 and ta.shape[0] != tb.shape[0]):
        raise InputError(f"temperature sets of the two catalogues must match in M; got {ta.shape} and {tb.shape}")
    na = np.asarray(positions_a).shape[0]
    both = _validate(np.concatenate([np.asarray(positions_a, float), np.asarray(positions_b, float)]),
                     np.concatenate([ta, tb], axis=-1), edges,
                     None if regions_a is None else np.concatenate([regions_a, regions_b]),
                     None if redshifts_a is None else np.concatenate([redshifts_a, redshifts_b]))
    pos, temps2, single, edges, reg, n_jk, zz, want_z = both
    parts = [pass_sums(pos[sl], temps2[:, sl], reg[sl], zz[sl], edges, n_jk, want_z, n_threads=n_threads)
             for sl in (slice(None), slice(None, na), slice(na, None))]
    total = tuple(x - y - w for x, y, w in zip(*parts))
    return finalise(total, edges, single=single, n_jk=n_jk, want_z=want_z)


def mean_pairwise_velocity_3d(positions, velocities, edges, *, n_threads=None):
    """Mean 3D pairwise velocity <(v_i - v_j) . rhat_ij> per separation bin, km/s (negative = approaching).

    Parameters
    ----------
    positions : ndarray of shape (N, 3), comoving Mpc
    velocities : ndarray of shape (N, 3), km/s
    edges : ndarray of shape (nbins + 1,), Mpc

    Returns
    -------
    v12 : ndarray of shape (nbins,), km/s (nan in empty bins)
    pair_counts : ndarray of shape (nbins,), int64
    """
    pos = _check_positions(positions)
    vel = np.asarray(velocities, dtype=np.float64)
    if vel.shape != pos.shape or not np.all(np.isfinite(vel)):
        raise InputError(f"velocities must be finite with shape {pos.shape}; got {vel.shape}")
    edges = _check_edges(edges)
    nbins = edges.size - 1
    if pos.shape[0] < 2:
        return np.full(nbins, np.nan), np.zeros(nbins, dtype=np.int64)
    order, start, dims, offsets, xs, _ = _prepare(pos, edges[-1])
    previous = numba.get_num_threads()
    numba.set_num_threads(_threads(n_threads))
    try:
        vsum, cnt = _kernels.velocity_sums(xs, np.ascontiguousarray(vel[order].T), start, dims, offsets, edges,
                                           _is_uniform(edges))
    finally:
        numba.set_num_threads(previous)
    with np.errstate(divide="ignore", invalid="ignore"):
        v12 = np.where(cnt > 0, vsum / np.maximum(cnt, 1), np.nan)
    return v12, cnt
