"""Which engine path, direct or linear, is faster for a given pass: a cost model of the geometry.

Both paths first make one pass over the pairs for the denominators and counts (same cost).  Then

- direct: the numerator of every set, and of every jackknife region touched, inside that pass:
  ``PAIR_SET_S`` seconds per pair and set, twice with jackknife regions (the region sums);
- linear: a second visit of every pair from both ends for the per-object sums (``PAIR_OBJECT_S``
  per pair), then matrix products over every object's row and its sparse rows of other regions
  nearby: ``ROW_SET_S`` per row, bin and set.

The pairs within r_max are estimated before the pass from the cell grid (the candidates in each
cell's neighbourhood times the sphere's share of the neighbourhood volume), the sparse rows from
the regions present in each cell's neighbourhood (:func:`_kernels.object_rows`, which the linear
path needs anyway).  The constants are the least-squares fit printed by
``benchmarks/bench_many_sets.py --calibrate`` (2 threads; only their ratios matter for the choice).
"""

from __future__ import annotations

__all__ = ["PathCosts", "estimate_pairs", "path_costs"]

import math
from dataclasses import dataclass

import numpy as np

from . import _kernels

# seconds per unit, 2 threads, fitted 2026-12-05 09:00-09:12 UTC by `benchmarks/bench_many_sets.py
# --geometry both --calibrate --sweep 1,16,84,200` (demo catalogue at r_max 300 Mpc and the sparse
# shell at 150 Mpc).  The machine was shared (load average ~20 on 2 cores), so the absolute values
# are inflated; the choice depends only on their ratios, which all three shared the load for.
PAIR_SET_S = 2.1e-9        # direct: one pair, one set (the jackknife region sums count as a second)
PAIR_OBJECT_S = 3.1e-7     # linear: the per-object visit of one pair (both ends)
ROW_SET_S = 4.4e-9         # linear: one object row, one bin, one set (gather and product)


@dataclass(frozen=True)
class PathCosts:
    """Modelled extra seconds of each path beyond the shared pass, and what they came from."""

    direct_s: float
    linear_s: float
    pairs: float
    rows: int

    @property
    def best(self) -> str:
        return "linear" if self.linear_s < self.direct_s else "direct"


def _cell_side(pos, dims, r_max, n_sub) -> float:
    extent = pos.max(axis=0) - pos.min(axis=0)
    side = r_max / n_sub
    if np.array_equal((extent // side).astype(np.int64) + 1, dims):
        return side
    return float(np.max(extent / np.maximum(dims - 1, 1)))     # a coarsened grid (very sparse volumes)


def estimate_pairs(pos, start, dims, n_sub: int, r_max: float) -> float:
    """Expected pairs closer than r_max from the counts in the cell grid of :func:`_kernels.build_cells`
    (``n_sub`` cells per r_max, as in its neighbour rows).

    Every object is assumed to see the density of its cell's neighbourhood, uniform within it:
    pairs = (candidates - N) / 2 x (4/3 pi r_max^3) / (neighbourhood volume).
    """
    side = _cell_side(pos, dims, r_max, n_sub)
    rows = _kernels.all_rows(n_sub)
    cells = int(np.sum(rows[:, 3] - rows[:, 2] + 1))
    candidates = _kernels.neighbourhood_candidates(start, dims, rows)
    share = min(1.0, (4.0 / 3.0) * math.pi * r_max**3 / (cells * side**3))
    return 0.5 * max(candidates - pos.shape[0], 0.0) * share


def path_costs(n: int, m_sets: int, nbins: int, n_jk: int, pairs: float, rows: int) -> PathCosts:
    """Modelled extra cost of each path for ``n`` objects, ``m_sets`` sets, ``pairs`` within r_max
    and ``rows`` sparse region rows (0 without regions)."""
    direct = PAIR_SET_S * pairs * m_sets * (2 if n_jk else 1)
    linear = PAIR_OBJECT_S * pairs + ROW_SET_S * (n + rows) * nbins * m_sets
    return PathCosts(direct_s=direct, linear_s=linear, pairs=pairs, rows=rows)
