"""Spread one pair pass over spatial work units, in-process or on a Dask cluster.

The engine sorts the tracers into a grid of cubic cells (side r_max / n_sub) and gives each pair
to the cell of one of its members (the cell that sees the other in its forward half).  A work unit
is a slab of whole grid columns along the survey's longest axis: it sums the pairs owned by its
cells, reading their neighbours beyond the slab without summing their pairs.  The units tile the
grid, so their sums add up to the single pass, and no pair is computed twice: a slab's halo (the
r_max beyond its face) is read, not recomputed.

Every worker receives the tracer data once (positions, temperature sets, regions, redshifts,
weights: 8 (6 + M) bytes per tracer for M sets) through a broadcast ``scatter``; a task carries
only its column range, so the task graph has the same size for any number of tracers.  The data
sent back is the unit's sums (M x bins x regions).

Unit sizes come from r_max: a slab is at least r_max thick (n_sub columns), and the number of
units is a few per worker (``UNITS_PER_WORKER``), fewer when the survey is too thin for that many
slabs.  Slabs are cut at equal estimated cost (the sum over cells of the cell's count times the
count of the cells within r_max, which follows the number of pairs), not at equal tracer count, and
the costliest units are started first.  A unit costs its pairs plus an O(N) cell
sort of all tracers; the speed-up on W workers approaches min(U, W) while the pairs dominate.
"""

from __future__ import annotations

__all__ = ["UNITS_PER_WORKER", "UnitPlan", "plan_units", "unit_sums", "run_units", "pairwise_momentum_units"]

from dataclasses import dataclass

import numpy as np
from scipy.ndimage import uniform_filter

from ..core.cluster import open_runner
from ..core.errors import InputError
from . import _kernels
from .estimator import PairwiseResult, _validate, finalise, pass_sums

UNITS_PER_WORKER = 3  # enough to even out slabs of unequal cost, few enough to keep the O(N) sort per unit small


@dataclass(frozen=True)
class UnitPlan:
    """How a pass is cut: ``axes`` puts the cut axis first; unit u owns grid columns ``columns[u]``."""

    axes: tuple          # permutation of (0, 1, 2): the positions' columns, longest extent first
    columns: tuple       # ((x0, x1), ...) tiling 0..n_columns
    n_columns: int
    columns_per_r_max: int
    cost: tuple          # estimated relative cost of each unit (sums to 1)


def plan_units(positions, r_max: float, *, n_units: int | None = None, n_workers: int = 1) -> UnitPlan:
    """Slabs of whole grid columns along the longest axis, each at least r_max thick, cut at equal
    estimated cost.

    ``n_units`` None takes ``UNITS_PER_WORKER`` per worker; any request is capped by the number of
    r_max-thick slabs the survey holds (a smaller number of units is returned then).
    """
    pos = np.asarray(positions, dtype=float)
    if n_units is not None and n_units < 1:
        raise InputError(f"compute.n_units must be >= 1; got {n_units}", key="compute.n_units")
    axes = tuple(int(a) for a in np.argsort(-np.ptp(pos, axis=0), kind="stable")) if pos.shape[0] else (0, 1, 2)
    _, start, dims, rows = _kernels.build_cells(np.ascontiguousarray(pos[:, list(axes)]), r_max)
    per_r_max = int(rows[-1, 3])  # n_sub: columns per r_max (1 when the grid was coarsened)
    counts = np.diff(start).reshape(tuple(int(d) for d in dims)).astype(float)
    width = 2 * per_r_max + 1  # the cells within r_max of a cell: its pairs are about n_cell x their count
    near = uniform_filter(counts, size=width, mode="constant") * width ** 3
    cost = (counts * near).sum(axis=(1, 2))
    n_columns = int(dims[0])
    wanted = UNITS_PER_WORKER * max(int(n_workers), 1) if n_units is None else int(n_units)
    n = max(1, min(wanted, n_columns // per_r_max))
    cum = np.cumsum(cost) / max(cost.sum(), 1e-300)
    cuts = [0]
    for k in range(1, n):
        x = int(np.searchsorted(cum, k / n)) + 1      # first column past the k-th share of the cost
        x = min(max(x, cuts[-1] + per_r_max), n_columns - (n - k) * per_r_max)
        cuts.append(x)
    cuts.append(n_columns)
    columns = tuple((a, b) for a, b in zip(cuts[:-1], cuts[1:]))
    shares = tuple(float(cost[a:b].sum() / max(cost.sum(), 1e-300)) for a, b in columns)
    return UnitPlan(axes, columns, n_columns, per_r_max, shares)


def unit_sums(data, columns, edges, n_jk, want_z, n_threads, method):
    """The additive sums of the pairs owned by ``columns`` of the grid; ``data`` the shared
    (positions with the cut axis first, temperature sets, regions, redshifts, weights)."""
    pos, temps2, reg, zz, w = data
    return pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, weights=w, n_threads=n_threads, method=method,
                     columns=columns)


def run_units(runner, data, edges, n_jk, want_z, *, n_units=None, n_threads=None, method="auto", task=unit_sums):
    """``task`` (default :func:`unit_sums`) of every unit on ``runner``; returns (results in unit order, plan).

    ``data`` = validated (positions, temperature sets (M, N), regions, redshifts, weights or None),
    shared with the workers once; the costliest units are started first.
    """
    pos, temps2, reg, zz, w = data
    plan = plan_units(pos, edges[-1], n_units=n_units, n_workers=runner.n_workers())
    shared = runner.share((np.ascontiguousarray(pos[:, list(plan.axes)]), temps2, reg, zz, w))
    costly_first = np.argsort(plan.cost, kind="stable")[::-1]
    done = runner.run(task, [(shared, plan.columns[u], edges, n_jk, want_z, n_threads, method) for u in costly_first])
    parts = [None] * len(done)
    for u, part in zip(costly_first, done):
        parts[u] = part
    return parts, plan


def pairwise_momentum_units(positions, temperatures, edges, *, regions=None, redshifts=None, weights=None,
                            n_units=None, scheduler=None, n_threads=None, method="auto") -> PairwiseResult:
    """:func:`pairvel.pairs.estimator.pairwise_momentum` computed as spatial work units.

    Parameters
    ----------
    positions, temperatures, edges, regions, redshifts, weights, method
        As for :func:`pairvel.pairs.estimator.pairwise_momentum`.
    n_units : int, optional
        Default: ``UNITS_PER_WORKER`` per worker; capped by the number of r_max-thick slabs.
    scheduler : None, str, dask.distributed.Client or pairvel.core.cluster.TaskRunner
        None runs the units in this process; a scheduler address ("tcp://host:8786"), a Client
        or a runner runs them on that cluster.
    n_threads : int, optional
        Threads per unit in the compiled loop.

    Returns
    -------
    PairwiseResult
        Equal to the single-pass result up to floating-point summation order (~1e-13 relative).
    """
    pos, temps2, single, edges, reg, n_jk, zz, want_z, w = _validate(positions, temperatures, edges, regions,
                                                                      redshifts, weights)
    with open_runner(scheduler) as runner:
        parts, _ = run_units(runner, (pos, temps2, reg, zz, w), edges, n_jk, want_z, n_units=n_units,
                             n_threads=n_threads, method=method)
    total = tuple(sum(part[k] for part in parts) for k in range(7))
    return finalise(total, edges, single=single, n_jk=n_jk, want_z=want_z)
