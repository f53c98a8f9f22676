"""Compiled pair kernels (numba).  Private: plain contiguous arrays in, no validation.

Cell list: objects are counting-sorted into cubic cells; every cell visits itself (j > i) and the
"forward" half of its neighbour cells, so each unordered pair is examined exactly once.  Cells have
side r_max / n_sub with neighbours within +-n_sub cells (offsets whose cells cannot hold a pair
dropped); n_sub = 1 is the classic side-r_max grid with 13 forward neighbours, and n_sub = 2-4
(chosen from the density) examine up to ~2x fewer candidate pairs for the same result.  Forward
neighbours adjacent in z are adjacent in memory, so they are visited as contiguous rows.

For each object the kernel screens the candidates of a row by squared distance in a tight loop
(vectorised), compacts the survivors into a buffer without branches, then does the estimator
arithmetic only for those.  Cells are dealt round-robin to a fixed number of chunks run with
``numba.prange``; each chunk has its own accumulators, summed in chunk order at the end, so the
result does not depend on the number of threads.
"""

from __future__ import annotations

import numba as nb
import numpy as np

N_CHUNKS = 16          # fixed, so sums are bit-identical for any thread count <= N_CHUNKS
BLOCK = 256            # candidates screened at a time
BUFFER = 16 * BLOCK    # survivors kept before the arithmetic pass (bounds per-chunk memory)
_MAX_CELLS_PER_OBJECT = 8
_MIN_MAX_CELLS = 1 << 18


def forward_offsets(n_sub: int) -> np.ndarray:
    """Forward half of the cell offsets within +-n_sub whose cells can hold a pair (side r_max/n_sub)."""
    span = range(-n_sub, n_sub + 1)
    out = []
    for dx in span:
        for dy in span:
            for dz in span:
                if (dx, dy, dz) <= (0, 0, 0):
                    continue
                # smallest distance between the two cells, in cell sides, must be below n_sub
                gap2 = sum(max(abs(o) - 1, 0) ** 2 for o in (dx, dy, dz))
                if gap2 < n_sub * n_sub:
                    out.append((dx, dy, dz))
    return np.array(out, dtype=np.int64).reshape(-1, 3)


def forward_rows(n_sub: int) -> np.ndarray:
    """The forward offsets grouped into runs along z: rows (dx, dy, dz_lo, dz_hi), (K, 4) int64.

    Cells consecutive in z are consecutive in memory, so a row is one contiguous range of objects.
    The row (0, 0, 0, n_sub), which holds the cell itself, comes last.
    """
    offs = forward_offsets(n_sub)
    rows = []
    for dx, dy in sorted({(int(a), int(b)) for a, b, _ in offs}):
        dz = sorted(int(c) for a, b, c in offs if a == dx and b == dy)
        if dz != list(range(dz[0], dz[-1] + 1)):   # never happens: the pruning is monotone in |dz|
            raise RuntimeError("forward offsets are not contiguous in z")
        if (dx, dy) != (0, 0):
            rows.append((dx, dy, dz[0], dz[-1]))
    rows.append((0, 0, 0, n_sub))
    return np.array(rows, dtype=np.int64)


@nb.njit(cache=True)
def _counting_sort(flat, n_cells):
    counts = np.zeros(n_cells + 1, dtype=np.int64)
    for c in flat:
        counts[c + 1] += 1
    for c in range(n_cells):
        counts[c + 1] += counts[c]
    start = counts.copy()
    fill = counts[:-1].copy()
    order = np.empty(flat.size, dtype=np.int64)
    for k in range(flat.size):
        c = flat[k]
        order[fill[c]] = k
        fill[c] += 1
    return order, start


def choose_n_sub(positions: np.ndarray, r_max: float) -> int:
    """Cells per r_max (1-4) from the mean number of objects in occupied cells of side r_max.

    Finer cells examine fewer candidate pairs (27 -> ~12 r_max^3 per object) but cost more
    bookkeeping; they pay once a side-r_max cell holds more than ~2 n_sub^3 objects (measured with
    benchmarks/bench_pairs.py on 2 cores: 2e4-1e6 points).
    """
    lo = positions.min(axis=0)
    span = (positions.max(axis=0) - lo) // r_max + 1
    if np.prod(span) > max(_MAX_CELLS_PER_OBJECT * positions.shape[0], _MIN_MAX_CELLS):  # float: no overflow
        return 1
    dims = span.astype(np.int64)
    idx = ((positions - lo) // r_max).astype(np.int64)
    flat = (idx[:, 0] * dims[1] + idx[:, 1]) * dims[2] + idx[:, 2]
    occupied = np.count_nonzero(np.bincount(flat, minlength=int(np.prod(dims))))
    mean_occupancy = positions.shape[0] / max(occupied, 1)
    return int(np.clip(np.floor(np.cbrt(mean_occupancy / 2.0)), 1, 4))


def build_cells(positions: np.ndarray, r_max: float, n_sub: int | None = None):
    """Sort objects into cubic cells of side r_max / n_sub.

    Returns ``order`` (N,), ``start`` (n_cells + 1,), ``dims`` (3,) and the neighbour ``rows``
    (K, 4) of :func:`forward_rows`.  ``n_sub`` None chooses it with :func:`choose_n_sub`.  The grid
    is coarsened (down to n_sub = 1, then cells wider than r_max) when it would have more than
    max(8 N, 2**18) cells, so memory stays O(N).
    """
    if n_sub is None:
        n_sub = choose_n_sub(positions, r_max)
    lo = positions.min(axis=0)
    extent = positions.max(axis=0) - lo
    limit = max(_MAX_CELLS_PER_OBJECT * positions.shape[0], _MIN_MAX_CELLS)
    while n_sub > 1 and np.prod(extent // (r_max / n_sub) + 1) > limit:
        n_sub -= 1
    side = r_max / n_sub
    if np.prod(extent // side + 1) > limit:
        side = max(r_max, float(np.cbrt(np.prod(extent + r_max) / limit)))
        while np.prod(extent // side + 1) > limit:
            side *= 1.25
    dims = (extent // side).astype(np.int64) + 1
    idx = np.minimum(((positions - lo) // side).astype(np.int64), dims - 1)
    flat = (idx[:, 0] * dims[1] + idx[:, 1]) * dims[2] + idx[:, 2]
    order, start = _counting_sort(flat, int(np.prod(dims)))
    return order, start, dims, forward_rows(n_sub)


@nb.njit(inline="always")
def _bin_of(r, edges, uniform, inv_width):
    """Index of the bin [edges[b], edges[b+1]) holding r, or -1."""
    nbins = edges.size - 1
    if r < edges[0] or r >= edges[nbins]:
        return -1
    if uniform:
        b = int((r - edges[0]) * inv_width)
        if b >= nbins:
            b = nbins - 1
        if r < edges[b]:          # rounding at an edge
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


@nb.njit(inline="always")
def _neighbour_ranges(cell, dims, start, rows, nbr_lo, nbr_hi):
    """Object ranges of the forward neighbour rows of ``cell``; return how many.

    The last range is the cell itself followed by its +z neighbours (start to be set to i + 1).
    """
    cz = cell % dims[2]
    cy = (cell // dims[2]) % dims[1]
    cx = cell // (dims[1] * dims[2])
    nn = 0
    n_rows = rows.shape[0]
    for k in range(n_rows - 1):
        jx = cx + rows[k, 0]
        jy = cy + rows[k, 1]
        if jx < 0 or jy < 0 or jx >= dims[0] or jy >= dims[1]:
            continue
        z0 = max(cz + rows[k, 2], 0)
        z1 = min(cz + rows[k, 3], dims[2] - 1)
        if z0 > z1:
            continue
        base = (jx * dims[1] + jy) * dims[2]
        if start[base + z0] < start[base + z1 + 1]:
            nbr_lo[nn] = start[base + z0]
            nbr_hi[nn] = start[base + z1 + 1]
            nn += 1
    nbr_hi[nn] = start[cell - cz + min(cz + rows[n_rows - 1, 3], dims[2] - 1) + 1]
    return nn


@nb.njit(inline="always")
def _screen(xi0, xi1, xi2, x, t0, t1, lo2, hi2, rtmp, jbuf, r2buf, nacc):
    """Append to jbuf/r2buf (from position nacc) the objects j in [t0, t1), at most BLOCK of them,
    with lo2 <= |x_i - x_j|^2 < hi2 and r > 0; return the new fill."""
    length = t1 - t0
    x0 = x[0, t0:t1]     # 1D views keep the loop simple enough to vectorise
    x1 = x[1, t0:t1]
    x2 = x[2, t0:t1]
    for q in range(length):
        d0 = xi0 - x0[q]
        d1 = xi1 - x1[q]
        d2 = xi2 - x2[q]
        rtmp[q] = d0 * d0 + d1 * d1 + d2 * d2
    for q in range(length):              # branch-free compaction
        r2 = rtmp[q]
        jbuf[nacc] = t0 + q
        r2buf[nacc] = r2
        nacc += (r2 < hi2) & (r2 >= lo2) & (r2 > 0.0)
    return nacc


@nb.njit(inline="always")
def _add_pairs(i, nacc, jbuf, r2buf, x, u, temps, w, reg, zz, edges, uniform, inv_width, n_jk, want_z,
               a_num, a_den, a_cnt, a_z, a_jnum, a_jden, a_jcnt):
    """Add the estimator terms of the screened pairs (i, jbuf[:nacc]) to one chunk's accumulators."""
    m_sets = temps.shape[1]
    xi0, xi1, xi2 = x[0, i], x[1, i], x[2, i]
    ui0, ui1, ui2 = u[0, i], u[1, i], u[2, i]
    wi = w[i]
    for q in range(nacc):
        j = jbuf[q]
        r = np.sqrt(r2buf[q])
        b = _bin_of(r, edges, uniform, inv_width)
        if b < 0:
            continue
        cc = ((xi0 - x[0, j]) * (ui0 + u[0, j]) + (xi1 - x[1, j]) * (ui1 + u[1, j])
              + (xi2 - x[2, j]) * (ui2 + u[2, j])) / (2.0 * r)
        c = cc * (wi * w[j])      # pair weight w_i w_j on the numerator's c_ij ...
        c2 = cc * c               # ... and on c_ij^2
        a_den[b] += c2
        a_cnt[b] += 1
        for m in range(m_sets):
            a_num[b, m] += (temps[i, m] - temps[j, m]) * c
        if want_z:
            a_z[b] += c2 * 0.5 * (zz[i] + zz[j])
        if n_jk > 0:
            ra, rb = reg[i], reg[j]
            a_jden[ra, b] += c2
            a_jcnt[ra, b] += 1
            for m in range(m_sets):
                a_jnum[ra, b, m] += (temps[i, m] - temps[j, m]) * c
            if rb != ra:
                a_jden[rb, b] += c2
                a_jcnt[rb, b] += 1
                for m in range(m_sets):
                    a_jnum[rb, b, m] += (temps[i, m] - temps[j, m]) * c


@nb.njit(inline="always")
def _add_velocities(i, nacc, jbuf, r2buf, x, v, edges, uniform, inv_width, a_v, a_cnt):
    """Add (v_i - v_j).rhat_ij of the screened pairs (i, jbuf[:nacc]) to one chunk's accumulators."""
    for q in range(nacc):
        j = jbuf[q]
        r = np.sqrt(r2buf[q])
        b = _bin_of(r, edges, uniform, inv_width)
        if b < 0:
            continue
        a_v[b] += ((v[0, i] - v[0, j]) * (x[0, i] - x[0, j]) + (v[1, i] - v[1, j]) * (x[1, i] - x[1, j])
                   + (v[2, i] - v[2, j]) * (x[2, i] - x[2, j])) / r
        a_cnt[b] += 1


@nb.njit(parallel=True, cache=True)
def pair_sums(x, u, temps, w, reg, zz, start, dims, rows, edges, uniform, n_jk, want_z, cell_lo, cell_hi):
    """Accumulate the estimator's sums over all pairs with edges[0] <= r < edges[-1].

    x, u : (3, N) positions and unit vectors, sorted by cell; temps : (N, M); w : (N,) weights (each
    pair counts with w_i w_j in numerator and denominator, not in the pair counts); reg : (N,) region
    labels (ignored when n_jk == 0); zz : (N,) redshifts (ignored unless want_z).
    Returns num (M, nb), den (nb,), cnt (nb,), zsum (nb,), jk_num (max(n_jk,1), M, nb),
    jk_den (max(n_jk,1), nb), jk_cnt (max(n_jk,1), nb); the jackknife arrays hold the sums over
    the pairs touching each region.
    """
    m_sets = temps.shape[1]
    nbins = edges.size - 1
    # screen slightly wide; the bin is decided from r itself
    lo2 = edges[0] * edges[0] * (1.0 - 1e-12)
    hi2 = edges[nbins] * edges[nbins] * (1.0 + 1e-12)
    inv_width = nbins / (edges[nbins] - edges[0])
    nj = max(n_jk, 1)
    n_chunks = N_CHUNKS
    # per-chunk accumulators, tracer sets innermost
    num = np.zeros((n_chunks, nbins, m_sets))
    den = np.zeros((n_chunks, nbins))
    cnt = np.zeros((n_chunks, nbins), dtype=np.int64)
    zsum = np.zeros((n_chunks, nbins))
    jk_num = np.zeros((n_chunks, nj, nbins, m_sets))
    jk_den = np.zeros((n_chunks, nj, nbins))
    jk_cnt = np.zeros((n_chunks, nj, nbins), dtype=np.int64)
    n_cells = start.size - 1
    n_rows = rows.shape[0]
    for ch in nb.prange(n_chunks):
        nbr_lo = np.empty(n_rows, dtype=np.int64)
        nbr_hi = np.empty(n_rows, dtype=np.int64)
        rtmp = np.empty(BLOCK)
        jbuf = np.empty(BUFFER, dtype=np.int64)
        r2buf = np.empty(BUFFER)
        a_num = num[ch]
        a_den = den[ch]
        a_cnt = cnt[ch]
        a_z = zsum[ch]
        a_jnum = jk_num[ch]
        a_jden = jk_den[ch]
        a_jcnt = jk_cnt[ch]
        for cell in range(cell_lo + ch, min(cell_hi, n_cells), n_chunks):
            s0, s1 = start[cell], start[cell + 1]
            if s0 == s1:
                continue
            nn = _neighbour_ranges(cell, dims, start, rows, nbr_lo, nbr_hi)
            for i in range(s0, s1):
                xi0, xi1, xi2 = x[0, i], x[1, i], x[2, i]
                nbr_lo[nn] = i + 1              # own cell (j > i) and its +z neighbours
                nacc = 0
                for kk in range(nn + 1):
                    for b0 in range(nbr_lo[kk], nbr_hi[kk], BLOCK):
                        if nacc > BUFFER - BLOCK:
                            _add_pairs(i, nacc, jbuf, r2buf, x, u, temps, w, reg, zz, edges, uniform, inv_width,
                                       n_jk, want_z, a_num, a_den, a_cnt, a_z, a_jnum, a_jden, a_jcnt)
                            nacc = 0
                        nacc = _screen(xi0, xi1, xi2, x, b0, min(b0 + BLOCK, nbr_hi[kk]), lo2, hi2,
                                       rtmp, jbuf, r2buf, nacc)
                _add_pairs(i, nacc, jbuf, r2buf, x, u, temps, w, reg, zz, edges, uniform, inv_width,
                           n_jk, want_z, a_num, a_den, a_cnt, a_z, a_jnum, a_jden, a_jcnt)
    num_t = _chunk_sum(num)
    jk_t = _chunk_sum(jk_num)
    out_num = np.empty((m_sets, nbins))
    out_jk = np.empty((nj, m_sets, nbins))
    for b in range(nbins):
        for m in range(m_sets):
            out_num[m, b] = num_t[b, m]
            for a in range(nj):
                out_jk[a, m, b] = jk_t[a, b, m]
    return (out_num, _chunk_sum(den), _chunk_sum(cnt), _chunk_sum(zsum),
            out_jk, _chunk_sum(jk_den), _chunk_sum(jk_cnt))


@nb.njit(cache=True)
def _chunk_sum(arr):
    """Sum over the leading (chunk) axis in a fixed order."""
    out = arr[0].copy()
    for ch in range(1, arr.shape[0]):
        out += arr[ch]
    return out


@nb.njit(parallel=True, cache=True)
def velocity_sums(x, v, start, dims, rows, edges, uniform):
    """Sum of (v_i - v_j).rhat_ij and pair counts per bin, same traversal as :func:`pair_sums`.

    x, v : (3, N) positions and velocities, sorted by cell.
    """
    nbins = edges.size - 1
    lo2 = edges[0] * edges[0] * (1.0 - 1e-12)
    hi2 = edges[nbins] * edges[nbins] * (1.0 + 1e-12)
    inv_width = nbins / (edges[nbins] - edges[0])
    n_chunks = N_CHUNKS
    vsum = np.zeros((n_chunks, nbins))
    cnt = np.zeros((n_chunks, nbins), dtype=np.int64)
    n_cells = start.size - 1
    n_rows = rows.shape[0]
    for ch in nb.prange(n_chunks):
        nbr_lo = np.empty(n_rows, dtype=np.int64)
        nbr_hi = np.empty(n_rows, dtype=np.int64)
        rtmp = np.empty(BLOCK)
        jbuf = np.empty(BUFFER, dtype=np.int64)
        r2buf = np.empty(BUFFER)
        a_v = vsum[ch]
        a_cnt = cnt[ch]
        for cell in range(ch, n_cells, n_chunks):
            s0, s1 = start[cell], start[cell + 1]
            if s0 == s1:
                continue
            nn = _neighbour_ranges(cell, dims, start, rows, nbr_lo, nbr_hi)
            for i in range(s0, s1):
                xi0, xi1, xi2 = x[0, i], x[1, i], x[2, i]
                nbr_lo[nn] = i + 1
                nacc = 0
                for kk in range(nn + 1):
                    for b0 in range(nbr_lo[kk], nbr_hi[kk], BLOCK):
                        if nacc > BUFFER - BLOCK:
                            _add_velocities(i, nacc, jbuf, r2buf, x, v, edges, uniform, inv_width, a_v, a_cnt)
                            nacc = 0
                        nacc = _screen(xi0, xi1, xi2, x, b0, min(b0 + BLOCK, nbr_hi[kk]), lo2, hi2,
                                       rtmp, jbuf, r2buf, nacc)
                _add_velocities(i, nacc, jbuf, r2buf, x, v, edges, uniform, inv_width, a_v, a_cnt)
    return _chunk_sum(vsum), _chunk_sum(cnt)


# ---------------------------------------------------------------------------------------------
# Per-object sums for many temperature sets (the numerator is linear in the temperatures).
#
# With c_ij oriented from j to i (c_ji = -c_ij), sum_{i<j} w_i w_j (T_i - T_j) c_ij
# = sum_i T_i w_i W_i with W_i = sum_{j != i} w_j c_ij per bin.  The sums over the pairs touching
# jackknife region k are sum_{i in k} T_i w_i W_i + sum_{i not in k} T_i w_i V_{i,k}, where V_{i,k}
# is W_i restricted to the partners j in region k.  V is sparse: an object only has partners in
# the few regions near it, so it gets one row per region present in its cell's neighbourhood
# (other than its own).  Every object visits all its neighbour cells (each pair is seen from both
# ends), so each row of W and V is written by one chunk only.
# ---------------------------------------------------------------------------------------------


def all_rows(n_sub: int) -> np.ndarray:
    """All cell offsets within +-n_sub that can hold a pair (itself included), as z-runs
    (dx, dy, dz_lo, dz_hi), (K, 4) int64."""
    fwd = forward_offsets(n_sub)
    offs = np.concatenate([fwd, -fwd, np.zeros((1, 3), dtype=np.int64)])
    rows = []
    for dx, dy in sorted({(int(a), int(b)) for a, b, _ in offs}):
        dz = sorted(int(c) for a, b, c in offs if a == dx and b == dy)
        if dz != list(range(dz[0], dz[-1] + 1)):
            raise RuntimeError("cell offsets are not contiguous in z")
        rows.append((dx, dy, dz[0], dz[-1]))
    return np.array(rows, dtype=np.int64)


@nb.njit(inline="always")
def _all_ranges(cell, dims, start, rows, nbr_lo, nbr_hi):
    """Object ranges of every neighbour row of ``cell`` (itself included); return how many."""
    cz = cell % dims[2]
    cy = (cell // dims[2]) % dims[1]
    cx = cell // (dims[1] * dims[2])
    nn = 0
    for k in range(rows.shape[0]):
        jx = cx + rows[k, 0]
        jy = cy + rows[k, 1]
        if jx < 0 or jy < 0 or jx >= dims[0] or jy >= dims[1]:
            continue
        z0 = max(cz + rows[k, 2], 0)
        z1 = min(cz + rows[k, 3], dims[2] - 1)
        if z0 > z1:
            continue
        base = (jx * dims[1] + jy) * dims[2]
        if start[base + z0] < start[base + z1 + 1]:
            nbr_lo[nn] = start[base + z0]
            nbr_hi[nn] = start[base + z1 + 1]
            nn += 1
    return nn


@nb.njit(cache=True)
def object_rows(reg, start, dims, rows, n_jk):
    """Layout of the sparse per-region rows: for each object (sorted by cell) the regions other
    than its own that occur among the objects of its cell's neighbourhood.

    Returns row_start (N + 1,) and row_reg (R,): object i owns rows row_start[i]:row_start[i+1],
    one per region in row_reg, in increasing region order.
    """
    n = reg.size
    n_cells = start.size - 1
    seen = np.zeros(max(n_jk, 1), dtype=np.bool_)
    present = np.empty(max(n_jk, 1), dtype=np.int64)
    nbr_lo = np.empty(rows.shape[0], dtype=np.int64)
    nbr_hi = np.empty(rows.shape[0], dtype=np.int64)
    cell_ptr = np.zeros(n_cells + 1, dtype=np.int64)
    cell_list = np.empty(16, dtype=np.int64)
    n_list = 0
    for cell in range(n_cells):
        if start[cell] < start[cell + 1]:
            nn = _all_ranges(cell, dims, start, rows, nbr_lo, nbr_hi)
            npres = 0
            for kk in range(nn):
                for j in range(nbr_lo[kk], nbr_hi[kk]):
                    g = reg[j]
                    if not seen[g]:
                        seen[g] = True
                        present[npres] = g
                        npres += 1
            for q in range(npres):
                seen[present[q]] = False
            present_sorted = np.sort(present[:npres])
            while n_list + npres > cell_list.size:
                grown = np.empty(2 * cell_list.size, dtype=np.int64)
                grown[:n_list] = cell_list[:n_list]
                cell_list = grown
            cell_list[n_list:n_list + npres] = present_sorted
            n_list += npres
        cell_ptr[cell + 1] = n_list
    row_start = np.zeros(n + 1, dtype=np.int64)
    for cell in range(n_cells):
        for i in range(start[cell], start[cell + 1]):
            row_start[i + 1] = row_start[i] + (cell_ptr[cell + 1] - cell_ptr[cell]) - 1
    row_reg = np.empty(row_start[n], dtype=np.int64)
    for cell in range(n_cells):
        for i in range(start[cell], start[cell + 1]):
            r = row_start[i]
            for q in range(cell_ptr[cell], cell_ptr[cell + 1]):
                if cell_list[q] != reg[i]:
                    row_reg[r] = cell_list[q]
                    r += 1
    return row_start, row_reg


@nb.njit(inline="always")
def _add_object(i, nacc, jbuf, r2buf, x, u, w, reg, edges, uniform, inv_width, slot, base, a_w, a_v):
    """Add w_j c_ij of the screened partners j of object i to its row of W and its sparse rows of V."""
    xi0, xi1, xi2 = x[0, i], x[1, i], x[2, i]
    ui0, ui1, ui2 = u[0, i], u[1, i], u[2, i]
    gi = reg[i]
    for q in range(nacc):
        j = jbuf[q]
        r = np.sqrt(r2buf[q])
        b = _bin_of(r, edges, uniform, inv_width)
        if b < 0:
            continue
        c = ((xi0 - x[0, j]) * (ui0 + u[0, j]) + (xi1 - x[1, j]) * (ui1 + u[1, j])
             + (xi2 - x[2, j]) * (ui2 + u[2, j])) / (2.0 * r) * w[j]
        a_w[i, b] += c
        gj = reg[j]
        if gj != gi:
            a_v[base + slot[gj], b] += c


@nb.njit(parallel=True, cache=True)
def object_sums(x, u, w, reg, start, dims, rows, edges, uniform, row_start, row_reg, n_jk, cell_lo, cell_hi):
    """W (N, nb): sum over partners of w_j c_ij per bin, and V (R, nb): the same restricted to the
    partners in region row_reg[r] (rows laid out by :func:`object_rows`; R may be 0 when n_jk == 0).

    x, u : (3, N) positions and unit vectors sorted by cell; rows from :func:`all_rows`.  Only the
    objects in cells [cell_lo, cell_hi) get their sums (the others stay 0).
    """
    n = x.shape[1]
    nbins = edges.size - 1
    lo2 = edges[0] * edges[0] * (1.0 - 1e-12)
    hi2 = edges[nbins] * edges[nbins] * (1.0 + 1e-12)
    inv_width = nbins / (edges[nbins] - edges[0])
    a_w = np.zeros((n, nbins))
    a_v = np.zeros((row_reg.size, nbins))
    n_cells = start.size - 1
    n_rows = rows.shape[0]
    for ch in nb.prange(N_CHUNKS):
        nbr_lo = np.empty(n_rows, dtype=np.int64)
        nbr_hi = np.empty(n_rows, dtype=np.int64)
        rtmp = np.empty(BLOCK)
        jbuf = np.empty(BUFFER, dtype=np.int64)
        r2buf = np.empty(BUFFER)
        slot = np.zeros(max(n_jk, 1), dtype=np.int64)
        for cell in range(cell_lo + ch, min(cell_hi, n_cells), N_CHUNKS):
            s0, s1 = start[cell], start[cell + 1]
            if s0 == s1:
                continue
            nn = _all_ranges(cell, dims, start, rows, nbr_lo, nbr_hi)
            for i in range(s0, s1):
                base = row_start[i]
                if n_jk > 0:
                    for q in range(row_start[i + 1] - base):
                        slot[row_reg[base + q]] = q
                xi0, xi1, xi2 = x[0, i], x[1, i], x[2, i]
                nacc = 0
                for kk in range(nn):
                    for b0 in range(nbr_lo[kk], nbr_hi[kk], BLOCK):
                        if nacc > BUFFER - BLOCK:
                            _add_object(i, nacc, jbuf, r2buf, x, u, w, reg, edges, uniform, inv_width, slot, base,
                                        a_w, a_v)
                            nacc = 0
                        nacc = _screen(xi0, xi1, xi2, x, b0, min(b0 + BLOCK, nbr_hi[kk]), lo2, hi2,
                                       rtmp, jbuf, r2buf, nacc)
                _add_object(i, nacc, jbuf, r2buf, x, u, w, reg, edges, uniform, inv_width, slot, base, a_w, a_v)
    return a_w, a_v


@nb.njit(parallel=True, cache=True)
def gather_centred(src, cols, out):
    """out[r, c] = src[r, cols[c]] - mean(src[r]) for every row r of src (rows in parallel)."""
    n = src.shape[1]
    for r in nb.prange(src.shape[0]):
        mean = 0.0
        for a in range(n):
            mean += src[r, a]
        mean /= max(n, 1)
        for c in range(cols.size):
            out[r, c] = src[r, cols[c]] - mean


@nb.njit(cache=True)
def neighbourhood_candidates(start, dims, rows):
    """Sum over objects of the objects in their cell's whole neighbourhood (itself included), i.e.
    the candidates a full visit examines; rows from :func:`all_rows`.  O(cells x rows): no pairs."""
    nbr_lo = np.empty(rows.shape[0], dtype=np.int64)
    nbr_hi = np.empty(rows.shape[0], dtype=np.int64)
    total = 0.0
    for cell in range(start.size - 1):
        own = start[cell + 1] - start[cell]
        if own == 0:
            continue
        nn = _all_ranges(cell, dims, start, rows, nbr_lo, nbr_hi)
        seen = 0
        for kk in range(nn):
            seen += nbr_hi[kk] - nbr_lo[kk]
        total += own * float(seen)
    return total
