"""Compiled pair kernels (numba).  Private: plain contiguous arrays in, no validation.

Cell list of side >= r_max; each cell visits itself and its 13 forward neighbours so every pair
is seen once; cells are split into chunks processed in parallel, each chunk with its own
accumulators, summed at the end.
"""

from __future__ import annotations

import numba as nb
import numpy as np

# The 13 forward neighbour offsets of a cell: half of the 26 neighbours, so each pair of cells is
# visited once; index 13 stands for the cell itself.
_FORWARD = np.array([(dx, dy, dz) for dx in (-1, 0, 1) for dy in (-1, 0, 1) for dz in (-1, 0, 1)
                     if (dx, dy, dz) > (0, 0, 0)], dtype=np.int64)


@nb.njit(inline="always")
def _neighbour(cell, k, dims):
    """Flat index of forward neighbour k (0..12) of ``cell``, the cell itself for k == 13, -1 if outside."""
    if k == 13:
        return cell
    cz = cell % dims[2]
    cy = (cell // dims[2]) % dims[1]
    cx = cell // (dims[1] * dims[2])
    jx, jy, jz = cx + _FORWARD[k, 0], cy + _FORWARD[k, 1], cz + _FORWARD[k, 2]
    if jx < 0 or jy < 0 or jz < 0 or jx >= dims[0] or jy >= dims[1] or jz >= dims[2]:
        return -1
    return (jx * dims[1] + jy) * dims[2] + jz


def build_cells(positions: np.ndarray, cell_size: float):
    """Sort objects into cubic cells; return (order, cell_start, dims, origin)."""
    lo = positions.min(axis=0)
    dims = np.maximum(((positions.max(axis=0) - lo) // cell_size).astype(np.int64) + 1, 1)
    idx = np.minimum(((positions - lo) // cell_size).astype(np.int64), dims - 1)
    flat = (idx[:, 0] * dims[1] + idx[:, 1]) * dims[2] + idx[:, 2]
    order = np.argsort(flat, kind="stable")
    counts = np.bincount(flat, minlength=int(np.prod(dims)))
    start = np.zeros(counts.size + 1, dtype=np.int64)
    np.cumsum(counts, out=start[1:])
    return order, start, dims


@nb.njit(inline="always")
def _bin_of(r, edges, uniform, inv_width):
    nbins = edges.size - 1
    if r < edges[0] or r >= edges[nbins]:
        return -1
    if uniform:
        b = int((r - edges[0]) * inv_width)
        if b >= nbins:
            b = nbins - 1
        # guard rounding at edges
        if r < edges[b]:
            b -= 1
        elif r >= edges[b + 1]:
            b += 1
        return b
    lo, hi = 0, nbins
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if r >= edges[mid]:
            lo = mid
        else:
            hi = mid
    return lo


@nb.njit(parallel=True, cache=True)
def pair_sums(x, u, temps, reg, zz, start, dims, edges, uniform, n_jk, n_chunks, want_z):
    """Accumulate the estimator's sums over all pairs with edges[0] <= r < edges[-1].

    x, u : (N, 3) positions and unit vectors, sorted by cell; temps : (M, N); reg : (N,) region
    labels (ignored when n_jk == 0); zz : (N,) redshifts (ignored unless want_z).
    Returns num (M, nb), den (nb,), cnt (nb,), zsum (nb,), jk_num (n_jk, M, nb), jk_den (n_jk, nb),
    jk_cnt (n_jk, nb): the jackknife arrays hold the sums of the pairs that touch each region.
    """
    m_sets = temps.shape[0]
    nbins = edges.size - 1
    r_lo2 = edges[0] * edges[0]
    r_hi2 = edges[nbins] * edges[nbins]
    inv_width = nbins / (edges[nbins] - edges[0])
    nj = max(n_jk, 1)
    num = np.zeros((n_chunks, m_sets, nbins))
    den = np.zeros((n_chunks, nbins))
    cnt = np.zeros((n_chunks, nbins), dtype=np.int64)
    zsum = np.zeros((n_chunks, nbins))
    jk_num = np.zeros((n_chunks, nj, m_sets, nbins))
    jk_den = np.zeros((n_chunks, nj, nbins))
    jk_cnt = np.zeros((n_chunks, nj, nbins), dtype=np.int64)
    n_cells = dims[0] * dims[1] * dims[2]
    for ch in nb.prange(n_chunks):
        for cell in range(ch, n_cells, n_chunks):
            s0, s1 = start[cell], start[cell + 1]
            if s0 == s1:
                continue
            for k in range(14):
                nbr = _neighbour(cell, k, dims)
                if nbr < 0:
                    continue
                t0, t1 = start[nbr], start[nbr + 1]
                for i in range(s0, s1):
                    for j in range(i + 1 if k == 13 else t0, t1):
                        d0 = x[i, 0] - x[j, 0]
                        d1 = x[i, 1] - x[j, 1]
                        d2 = x[i, 2] - x[j, 2]
                        r2 = d0 * d0 + d1 * d1 + d2 * d2
                        if r2 >= r_hi2 or r2 < r_lo2 or r2 == 0.0:
                            continue
                        r = np.sqrt(r2)
                        b = _bin_of(r, edges, uniform, inv_width)
                        if b < 0:
                            continue
                        c = (d0 * (u[i, 0] + u[j, 0]) + d1 * (u[i, 1] + u[j, 1]) + d2 * (u[i, 2] + u[j, 2])) / (2.0 * r)
                        c2 = c * c
                        den[ch, b] += c2
                        cnt[ch, b] += 1
                        for m in range(m_sets):
                            num[ch, m, b] += (temps[m, i] - temps[m, j]) * c
                        if want_z:
                            zsum[ch, b] += c2 * 0.5 * (zz[i] + zz[j])
                        if n_jk > 0:
                            a = reg[i]
                            jk_den[ch, a, b] += c2
                            jk_cnt[ch, a, b] += 1
                            for m in range(m_sets):
                                jk_num[ch, a, m, b] += (temps[m, i] - temps[m, j]) * c
                            a2 = reg[j]
                            if a2 != a:
                                jk_den[ch, a2, b] += c2
                                jk_cnt[ch, a2, b] += 1
                                for m in range(m_sets):
                                    jk_num[ch, a2, m, b] += (temps[m, i] - temps[m, j]) * c
    return (num.sum(axis=0), den.sum(axis=0), cnt.sum(axis=0), zsum.sum(axis=0),
            jk_num.sum(axis=0), jk_den.sum(axis=0), jk_cnt.sum(axis=0))


@nb.njit(parallel=True, cache=True)
def velocity_sums(x, v, start, dims, edges, uniform, n_chunks):
    """Sum of (v_i - v_j).rhat_ij and pair counts per bin, same traversal as :func:`pair_sums`."""
    nbins = edges.size - 1
    r_lo2 = edges[0] * edges[0]
    r_hi2 = edges[nbins] * edges[nbins]
    inv_width = nbins / (edges[nbins] - edges[0])
    vsum = np.zeros((n_chunks, nbins))
    cnt = np.zeros((n_chunks, nbins), dtype=np.int64)
    n_cells = dims[0] * dims[1] * dims[2]
    for ch in nb.prange(n_chunks):
        for cell in range(ch, n_cells, n_chunks):
            s0, s1 = start[cell], start[cell + 1]
            if s0 == s1:
                continue
            for k in range(14):
                nbr = _neighbour(cell, k, dims)
                if nbr < 0:
                    continue
                t0, t1 = start[nbr], start[nbr + 1]
                for i in range(s0, s1):
                    for j in range(i + 1 if k == 13 else t0, t1):
                        d0 = x[i, 0] - x[j, 0]
                        d1 = x[i, 1] - x[j, 1]
                        d2 = x[i, 2] - x[j, 2]
                        r2 = d0 * d0 + d1 * d1 + d2 * d2
                        if r2 >= r_hi2 or r2 < r_lo2 or r2 == 0.0:
                            continue
                        r = np.sqrt(r2)
                        b = _bin_of(r, edges, uniform, inv_width)
                        if b < 0:
                            continue
                        vsum[ch, b] += ((v[i, 0] - v[j, 0]) * d0 + (v[i, 1] - v[j, 1]) * d1
                                        + (v[i, 2] - v[j, 2]) * d2) / r
                        cnt[ch, b] += 1
    return vsum.sum(axis=0), cnt.sum(axis=0)
