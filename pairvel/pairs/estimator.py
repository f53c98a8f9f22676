"""The Ferreira et al. (1999) mean pairwise momentum estimator over comoving-separation bins.

p_hat(r) = - sum_{i<j} (T_i - T_j) c_ij / sum_{i<j} c_ij^2,  c_ij = rhat_ij . (rhat_i + rhat_j) / 2,

summed over the pairs whose comoving separation lies in the bin [lo, hi).  One pass of the compiled
pair engine gives every bin, every temperature set and every delete-one jackknife sample.
"""

from __future__ import annotations

__all__ = ["PairwiseResult", "pairwise_momentum", "pairwise_momentum_cross", "mean_pairwise_velocity_3d"]

import logging
from dataclasses import dataclass

import numba
import numpy as np

from ..core.errors import InputError
from . import _kernels
from .pathcost import estimate_pairs, path_costs

_log = logging.getLogger(__name__)


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
    den_jk : ndarray of shape (n_jk, nbins) or None
        sum c_ij^2 over the pairs touching region k (for jackknives that split pairs otherwise).
    """

    edges: np.ndarray
    p: np.ndarray
    numerator: np.ndarray
    denominator: np.ndarray
    pair_counts: np.ndarray
    z_eff: np.ndarray | None = None
    p_jk: np.ndarray | None = None
    n_jk: int = 0
    den_jk: np.ndarray | None = None

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


def pairwise_momentum(positions, temperatures, edges, *, regions=None, redshifts=None, weights=None, n_threads=None,
                      method="auto"):
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
    weights : ndarray of shape (N,), optional
        Per-tracer weights w >= 0; each pair enters numerator and denominator with w_i w_j
        (``pair_counts`` stay plain counts).  Default: all 1.
    n_threads : int, optional
        Threads for the compiled loop (default: all numba threads).
    method : {"auto", "direct", "linear"}
        "direct" does the arithmetic of every temperature set inside the pair loop (cost grows
        with M); "linear" makes one pass that gives every tracer its per-bin pair sums and then
        forms every set's numerator, and every jackknife region's, by matrix products (cost nearly
        independent of M).  "auto" picks the one a cost model of the geometry (pairs expected
        within r_max from the cell grid, sets, bins, regions: :mod:`pairvel.pairs.pathcost`)
        finds faster.  Both give the same sums up to floating-point rounding.

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
    pos, temps2, single, edges, reg, n_jk, zz, want_z, w = _validate(positions, temperatures, edges, regions,
                                                                      redshifts, weights)
    sums = pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, weights=w, n_threads=n_threads, method=method)
    return finalise(sums, edges, single=single, n_jk=n_jk, want_z=want_z)


def _validate(positions, temperatures, edges, regions, redshifts, weights=None):
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
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=np.float64)
        if w.shape != (n,):
            raise InputError(f"weights must have shape ({n},); got {w.shape}")
        bad = ~(np.isfinite(w) & (w >= 0))
        if bad.any():
            raise InputError(f"weights must be finite and >= 0; {bad.sum()} are not (first: row {np.flatnonzero(bad)[0]})")
    return pos, temps2, single, edges, reg, n_jk, zz, want_z, w


def pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, *, weights=None, n_threads=None, method="auto",
              columns=None) -> tuple:
    """One pass of the compiled engine over validated inputs; returns the additive sums
    (num (M, nb), den, cnt, zsum, jk_num (max(n_jk,1), M, nb), jk_den, jk_cnt).

    The sums of disjoint sets of pairs add, which is what lets work units run anywhere.
    ``method`` is as in :func:`pairwise_momentum`; "auto" takes the path the cost model of
    :mod:`pairvel.pairs.pathcost` finds cheaper for this geometry and number of sets.  ``columns``
    (x0, x1) keeps only the pairs owned by the cells of columns x0 <= cx < x1 along the first axis
    of the grid of ``_kernels.build_cells(pos, edges[-1])`` (None: all); ranges that tile the
    columns give sums that add up to the whole pass.
    """
    n = pos.shape[0]
    nbins = edges.size - 1
    m_sets = temps2.shape[0]
    if method not in ("auto", "direct", "linear"):
        raise InputError(f"method must be 'auto', 'direct' or 'linear'; got {method!r}")
    if n < 2:
        nj = max(n_jk, 1)
        return (np.zeros((m_sets, nbins)), np.zeros(nbins), np.zeros(nbins, np.int64), np.zeros(nbins),
                np.zeros((nj, m_sets, nbins)), np.zeros((nj, nbins)), np.zeros((nj, nbins), np.int64))
    w = np.ones(n) if weights is None else np.asarray(weights, dtype=np.float64)
    order, start, dims, rows, xs, us = _prepare(pos, edges[-1])
    regs = np.ascontiguousarray(reg[order])
    full = _kernels.all_rows(int(rows[-1, 3]))
    linear, layout = _choose_path(method, pos, start, dims, regs, full, m_sets, nbins, n_jk, edges[-1])
    if linear:
        sums, cols = linear_geometry(pos, reg, zz, edges, n_jk, want_z, weights=w, n_threads=n_threads,
                                     n_sets=m_sets, layout=layout, columns=columns)
        num, jk_num = _numerators_from_columns(temps2, cols, n_jk)
        _, den, cnt, zsum, _, jk_den, jk_cnt = sums
        return num, den, cnt, zsum, jk_num, jk_den, jk_cnt
    cell_lo, cell_hi = _cell_range(start, dims, columns)
    previous = numba.get_num_threads()
    numba.set_num_threads(_threads(n_threads))
    _log.debug("pair pass: %d tracers, %d temperature sets, %d bins, %d threads, direct path", n, m_sets, nbins,
               numba.get_num_threads())
    try:
        return _kernels.pair_sums(xs, us, np.ascontiguousarray(temps2[:, order].T), np.ascontiguousarray(w[order]),
                                  regs, np.ascontiguousarray(zz[order]),
                                  start, dims, rows, edges, _is_uniform(edges), n_jk, want_z, cell_lo, cell_hi)
    finally:
        numba.set_num_threads(previous)


def _cell_range(start, dims, columns) -> tuple:
    """(first cell, end cell) of the grid columns x0 <= cx < x1 (all cells for None)."""
    if columns is None:
        return 0, start.size - 1
    plane = int(dims[1] * dims[2])
    return int(columns[0]) * plane, int(columns[1]) * plane


def linear_is_cheaper(pos, reg, edges, n_jk, m_sets) -> bool:
    """Whether the cost model picks the linear path for ``m_sets`` sets on these validated inputs."""
    if pos.shape[0] < 2:
        return False
    order, start, dims, rows, _, _ = _prepare(pos, edges[-1])
    full = _kernels.all_rows(int(rows[-1, 3]))
    return _choose_path("auto", pos, start, dims, np.ascontiguousarray(reg[order]), full, m_sets, edges.size - 1,
                        n_jk, edges[-1])[0]


def linear_geometry(pos, reg, zz, edges, n_jk, want_z, *, weights, n_threads=None, n_sets=0, layout=None,
                    columns=None) -> tuple:
    """The pair pass of the linear path, which needs no temperatures: (sums, columns).

    ``sums`` are the additive sums of :func:`pass_sums` for no set (den, cnt, zsum, jk_den and
    jk_cnt filled; num and jk_num with 0 sets); the second item is what
    :func:`_numerators_from_columns` turns any sets' temperatures (M, N) into their numerators with,
    so sets can come in chunks.  Inputs validated, ``weights`` an (N,) array, N >= 2; ``n_sets``
    only for the log line; ``layout`` the sparse rows when :func:`_choose_path` made them already;
    ``columns`` the grid columns of a work unit, as in :func:`pass_sums`.
    """
    n, nbins = pos.shape[0], edges.size - 1
    order, start, dims, rows, xs, us = _prepare(pos, edges[-1])
    ws = np.ascontiguousarray(weights[order])
    regs = np.ascontiguousarray(reg[order])
    full = _kernels.all_rows(int(rows[-1, 3]))
    cell_lo, cell_hi = _cell_range(start, dims, columns)
    previous = numba.get_num_threads()
    numba.set_num_threads(_threads(n_threads))
    _log.debug("pair pass: %d tracers, %d temperature sets, %d bins, %d threads, linear path", n, n_sets, nbins,
               numba.get_num_threads())
    try:
        sums = _kernels.pair_sums(xs, us, np.empty((n, 0)), ws, regs, np.ascontiguousarray(zz[order]),
                                  start, dims, rows, edges, _is_uniform(edges), n_jk, want_z, cell_lo, cell_hi)
        row_start, row_reg = layout if layout is not None else _row_layout(regs, start, dims, full, n_jk)
        w_obj, v_obj = _kernels.object_sums(xs, us, ws, regs, start, dims, full, edges, _is_uniform(edges),
                                            row_start, row_reg, n_jk, cell_lo, cell_hi)
    finally:
        numba.set_num_threads(previous)
    objects = None if columns is None else slice(start[cell_lo], start[cell_hi])
    return sums, _numerator_columns(order, ws, regs, w_obj, v_obj, row_start, row_reg, n_jk, objects=objects)


def _row_layout(regs, start, dims, full, n_jk):
    """The linear path's sparse rows (:func:`_kernels.object_rows`); none without regions."""
    if n_jk:
        return _kernels.object_rows(regs, start, dims, full, n_jk)
    return np.zeros(regs.size + 1, dtype=np.int64), np.zeros(0, dtype=np.int64)


def _choose_path(method, pos, start, dims, regs, full, m_sets, nbins, n_jk, r_max):
    """(linear?, row layout or None).  For "auto", the path the cost model finds cheaper; the
    row layout it needs is made only when the linear path could win without it."""
    if method != "auto":
        return method == "linear", None
    n_sub = int(full[:, 3].max())
    pairs = estimate_pairs(pos, start, dims, n_sub, r_max)
    if path_costs(pos.shape[0], m_sets, nbins, n_jk, pairs, 0).best == "direct":
        return False, None
    layout = _row_layout(regs, start, dims, full, n_jk)
    costs = path_costs(pos.shape[0], m_sets, nbins, n_jk, pairs, int(layout[1].size))
    _log.debug("path model: %.3g pairs expected, %d sparse rows; direct %.3g s, linear %.3g s", pairs,
               layout[1].size, costs.direct_s, costs.linear_s)
    return costs.best == "linear", layout


def _numerator_columns(order, ws, regs, w_obj, v_obj, row_start, row_reg, n_jk, *, objects=None) -> tuple:
    """What every set's numerators are products with: (cols, q, seg, nbins), made once per pass.

    Columns region by region: the region's own tracers (all of w_i W_i), then the tracers outside
    it with partners inside (their V rows for that region); ``seg`` cuts them.  ``objects`` (a
    slice in cell order) limits the columns to those objects, the only ones a work unit gave sums to.
    """
    n = order.size
    nbins = w_obj.shape[1]
    nj = max(n_jk, 1)
    reg_in = np.empty(n, dtype=np.int64)
    reg_in[order] = regs
    ww = np.empty_like(w_obj)
    ww[order] = w_obj * ws[:, None]                      # w_i W_i, input order
    owner = np.repeat(np.arange(n), np.diff(row_start))       # cell-order object of each V row
    used = np.any(v_obj != 0.0, axis=1)        # rows of regions in reach of the cell but not of the tracer
    owner, row_reg, v_obj = owner[used], row_reg[used], v_obj[used]
    row_obj = order[owner]
    vv = v_obj * ws[owner, None]
    by_region = np.argsort(reg_in, kind="stable")
    if objects is not None:  # a work unit: the other objects' W are 0
        mine = np.zeros(n, dtype=bool)
        mine[order[objects]] = True
        by_region = by_region[mine[by_region]]
    cuts = np.searchsorted(reg_in[by_region], np.arange(nj + 1))
    rows_by_region = np.argsort(row_reg, kind="stable")
    row_cuts = np.searchsorted(row_reg[rows_by_region], np.arange(nj + 1))
    cols, q_parts, seg = [], [], [0]
    for k in range(nj):
        rk = rows_by_region[row_cuts[k]:row_cuts[k + 1]]
        cols += [by_region[cuts[k]:cuts[k + 1]], row_obj[rk]]
        q_parts += [ww[by_region[cuts[k]:cuts[k + 1]]], vv[rk]]
        seg += [seg[-1] + cuts[k + 1] - cuts[k], seg[-1] + cuts[k + 1] - cuts[k] + rk.size]
    return np.concatenate(cols), np.concatenate(q_parts), np.array(seg), nbins


def _numerators_from_columns(temps2, columns, n_jk, *, block_bytes=128 * 2**20):
    """(num (M, nb), jk_num (max(n_jk, 1), M, nb)) of the sets temps2 (M, N), input order.

    Sets are taken in blocks of about ``block_bytes``; for each block the needed columns are
    gathered once, so every product is one matrix multiplication on contiguous slices.  A
    constant added to a set changes no numerator (pair differences), so each set's mean is
    removed first to keep the products well conditioned.
    """
    cols, q, seg, nbins = columns
    m_sets = temps2.shape[0]
    nj = max(n_jk, 1)
    num = np.zeros((m_sets, nbins))
    jk_num = np.zeros((nj, m_sets, nbins))
    step = max(1, min(m_sets, int(block_bytes // (8 * max(cols.size, 1)))))
    buffer = np.empty((step, cols.size))           # reused: no fresh pages per block
    for m0 in range(0, m_sets, step):
        block = np.ascontiguousarray(temps2[m0:m0 + step])
        gathered = buffer[:block.shape[0]]
        _kernels.gather_centred(block, cols, gathered)
        for k in range(nj):
            a0, a1, a2 = seg[2 * k], seg[2 * k + 1], seg[2 * k + 2]
            inside = gathered[:, a0:a1] @ q[a0:a1]
            num[m0:m0 + step] += inside
            if n_jk:
                jk_num[k, m0:m0 + step] = inside + gathered[:, a1:a2] @ q[a1:a2]
    return num, jk_num


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
                          denominator=den, pair_counts=cnt, z_eff=z_eff, p_jk=p_jk, n_jk=n_jk,
                          den_jk=jk_den[:n_jk] if n_jk else None)


def pairwise_momentum_cross(positions_a, temperatures_a, positions_b, temperatures_b, edges, *, regions_a=None,
                            regions_b=None, redshifts_a=None, redshifts_b=None, weights_a=None, weights_b=None,
                            n_threads=None, method="auto") -> PairwiseResult:
    """The estimator over cross pairs only: one member from catalogue A, the other from B.

    Same estimator as :func:`pairwise_momentum` (for example clusters against galaxies); the
    temperature sets of A and B must have the same M.  Regions (both or neither) share one label
    space; redshifts (both or neither) give the pair redshift; weights likewise (both or neither).

    Notes
    -----
    Computed from three passes of the engine, sums(A + B) - sums(A) - sums(B), which are exact in
    the pair counts and equal to a direct cross loop up to floating-point rounding.
    """
    if ((regions_a is None) != (regions_b is None) or (redshifts_a is None) != (redshifts_b is None)
            or (weights_a is None) != (weights_b is None)):
        raise InputError("regions, redshifts and weights must be given for both catalogues or for neither")
    ta = np.asarray(temperatures_a, dtype=np.float64)
    tb = np.asarray(temperatures_b, dtype=np.float64)
    if ta.ndim != tb.ndim or (ta.ndim == 2 and ta.shape[0] != tb.shape[0]):
        raise InputError(f"temperature sets of the two catalogues must match in M; got {ta.shape} and {tb.shape}")
    na = np.asarray(positions_a).shape[0]
    both = _validate(np.concatenate([np.asarray(positions_a, float), np.asarray(positions_b, float)]),
                     np.concatenate([ta, tb], axis=-1), edges,
                     None if regions_a is None else np.concatenate([regions_a, regions_b]),
                     None if redshifts_a is None else np.concatenate([redshifts_a, redshifts_b]),
                     None if weights_a is None else np.concatenate([weights_a, weights_b]))
    pos, temps2, single, edges, reg, n_jk, zz, want_z, w = both
    parts = [pass_sums(pos[sl], temps2[:, sl], reg[sl], zz[sl], edges, n_jk, want_z,
                       weights=None if w is None else w[sl], n_threads=n_threads, method=method)
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
