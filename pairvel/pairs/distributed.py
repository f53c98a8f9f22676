"""Spread one pair pass over spatial work units, in-process or on a Dask cluster.

The tracers are cut into slabs of equal count along the longest axis of the survey.  Work unit u
holds its slab's tracers (primaries) and, as a halo, the tracers within r_max beyond the slab's
upper face.  Every pair closer than r_max then has exactly one unit where its lower member is a
primary and its upper member a primary or in the halo; the unit's sums are
``sums(primaries + halo) - sums(halo)``, and the sums of all units add up to the single-pass sums.

What scales: a unit costs its pairs (about N_unit x n x 4/3 pi r_max^3) plus its halo's own pairs
again; the data sent to a worker is its tracers (positions, temperature sets, region labels,
redshifts, weights: 8 (6 + M) bytes each), and the data sent back is the sums (M x bins x regions).  With
U units on W workers the speed-up approaches min(U, W) while the halo (slab thickness >> r_max)
stays small.
"""

from __future__ import annotations

__all__ = ["split_work_units", "pairwise_momentum_units"]

import numpy as np

from ..core.errors import ConfigError, InputError
from .estimator import PairwiseResult, _validate, finalise, pass_sums


def split_work_units(positions, r_max: float, n_units: int):
    """Slabs of equal count along the longest axis, with forward halos of thickness ``r_max``.

    Returns
    -------
    list of (primary_index, halo_index) int arrays
    """
    pos = np.asarray(positions, dtype=float)
    if n_units < 1:
        raise InputError(f"number of work units must be >= 1; got {n_units}")
    axis = int(np.argmax(np.ptp(pos, axis=0))) if pos.shape[0] else 0
    order = np.argsort(pos[:, axis], kind="stable")
    xs = pos[order, axis]
    bounds = np.linspace(0, order.size, n_units + 1).round().astype(int)
    units = []
    for s0, s1 in zip(bounds[:-1], bounds[1:]):
        if s1 <= s0:
            continue
        # every later tracer within r_max (a superset is harmless: halo-halo pairs are subtracted)
        hi = np.searchsorted(xs, xs[s1 - 1] + r_max, side="right")
        units.append((np.sort(order[s0:s1]), np.sort(order[s1:hi])))
    return units


def _unit_sums(pos, temps2, reg, zz, w, n_primary, edges, n_jk, want_z, n_threads, method):
    """Sums of the pairs with at least one primary (the first ``n_primary`` rows)."""
    both = pass_sums(pos, temps2, reg, zz, edges, n_jk, want_z, weights=w, n_threads=n_threads, method=method)
    if n_primary == pos.shape[0]:
        return both
    halo = slice(n_primary, None)
    only = pass_sums(pos[halo], temps2[:, halo], reg[halo], zz[halo], edges, n_jk, want_z, weights=w[halo],
                     n_threads=n_threads, method=method)
    return tuple(a - b for a, b in zip(both, only))


def _client(scheduler):
    if scheduler is None or scheduler == "":
        return None
    if hasattr(scheduler, "submit"):
        return scheduler
    try:
        from dask.distributed import Client
    except ImportError:
        raise ConfigError("compute.scheduler_address needs dask.distributed: pip install 'pairvel[dask]'",
                          key="compute.scheduler_address") from None
    try:
        return Client(scheduler, timeout="30s")
    except OSError as err:
        raise ConfigError(f"compute.scheduler_address: cannot reach the Dask scheduler at {scheduler} ({err})",
                          key="compute.scheduler_address") from None


def pairwise_momentum_units(positions, temperatures, edges, *, regions=None, redshifts=None, weights=None, n_units=8,
                            scheduler=None, n_threads=None, method="auto") -> PairwiseResult:
    """:func:`pairvel.pairs.estimator.pairwise_momentum` computed as ``n_units`` spatial work units.

    Parameters
    ----------
    positions, temperatures, edges, regions, redshifts, weights, method
        As for :func:`pairvel.pairs.estimator.pairwise_momentum`.
    n_units : int, default 8
    scheduler : None, str or dask.distributed.Client
        None runs the units in this process; a scheduler address ("tcp://host:8786") or a Client
        runs them on that cluster.
    n_threads : int, optional
        Threads per unit in the compiled loop.

    Returns
    -------
    PairwiseResult
        Equal to the single-pass result up to floating-point summation order (~1e-13 relative).
    """
    pos, temps2, single, edges, reg, n_jk, zz, want_z, w = _validate(positions, temperatures, edges, regions,
                                                                      redshifts, weights)
    w = np.ones(pos.shape[0]) if w is None else w
    units = split_work_units(pos, edges[-1], n_units)
    client = _client(scheduler)
    payloads = []
    for primary, halo in units:
        idx = np.concatenate([primary, halo])
        payloads.append((pos[idx], np.ascontiguousarray(temps2[:, idx]), reg[idx], zz[idx], w[idx], primary.size))
    if client is None:
        parts = [_unit_sums(*pl, edges, n_jk, want_z, n_threads, method) for pl in payloads]
    else:
        try:
            futures = [client.submit(_unit_sums, *pl, edges, n_jk, want_z, n_threads, method, pure=False)
                       for pl in payloads]
            parts = client.gather(futures)
        finally:
            if client is not scheduler:  # a client this call opened from an address
                client.close()
    total = tuple(sum(part[k] for part in parts) for k in range(7))
    return finalise(total, edges, single=single, n_jk=n_jk, want_z=want_z)
