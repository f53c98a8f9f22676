"""Null and simulated temperature sets made in chunks, in this process or as Dask tasks.

A run's random sets (shuffles over all tracers and within redshift slices, apertures at random
sky positions, simulated skies) are each drawn from their own generator,
:func:`pairvel.core.rng.set_generator` (run seed, kind, index).  A set is therefore the same
whichever chunk makes it, in whichever order and on whichever worker, and a chunk of sets is a
task of a few small arguments: its kind's inputs (shared with the workers once), and its bounds.

A :class:`SetJob` says how one kind is made: ``task(inputs, lo, hi)`` returns sets lo..hi-1 as one
or more blocks of rows (a shuffle chunk also returns the slice means of its sets; a simulated-sky
chunk one block per aperture radius), and ``targets`` the first row of the stack where each block
goes.  :func:`make_sets` runs the jobs here one chunk at a time (memory: one chunk), or on a Dask
cluster as tasks of at most ``chunk`` sets (the memory budget of :mod:`pairvel.pairs.chunked`
per task), and hands every block to the caller's ``add(rows, values)``.
"""

from __future__ import annotations

__all__ = ["SetJob", "make_sets", "shuffle_job", "random_position_job", "simulation_job", "rotated_sets_on",
           "TASKS_PER_WORKER"]

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np

from ..core.rng import set_generator
from ..maps.photometry import measure_random_apertures
from ..maps.trend import remove_redshift_trend
from .nulltests import rotated_sets, shuffled_sets, slice_means
from .simcov import SimulationPlan, simulate_realisations

#: Tasks per worker and kind on a cluster (fewer when the budget allows bigger chunks is not worth it:
#: several tasks per worker even out their unequal speeds), each at most the memory budget's chunk.
TASKS_PER_WORKER = 4


@dataclass(frozen=True)
class SetJob:
    """One kind of sets: ``task(inputs, lo, hi)`` -> tuple of (hi - lo, N) blocks, block j for the
    stack rows ``targets[j] + lo`` .. ``targets[j] + hi``."""

    kind: str
    n_sets: int
    targets: tuple
    task: Callable
    inputs: object


def _bounds(n: int, size: int) -> list[tuple[int, int]]:
    return [(lo, min(lo + size, n)) for lo in range(0, n, max(int(size), 1))]


def _deliver(job: SetJob, lo: int, hi: int, blocks, add) -> None:
    for start, values in zip(job.targets, blocks, strict=True):
        add(slice(start + lo, start + hi), values)


def _chunk_task(task, inputs, lo, hi):
    return task(inputs, lo, hi)


def make_sets(jobs, add, *, chunk: int, runner=None, say=None) -> None:
    """Make every job's sets and hand each block to ``add(rows, values)``.

    Without a cluster (``runner`` None or local) the chunks of ``chunk`` sets are made one after
    the other, so one chunk is in memory at a time.  On a cluster every chunk is a task of at most
    ``chunk`` sets, and at least ``TASKS_PER_WORKER`` tasks per worker when a kind has the sets for
    it; each job's inputs go to the workers once.  The sets are the same either way (their own
    generators), and ``add`` receives them in job and row order.
    """
    jobs = [job for job in jobs if job.n_sets > 0]
    if runner is None or not runner.distributed:
        for job in jobs:
            for lo, hi in _bounds(job.n_sets, chunk):
                _deliver(job, lo, hi, job.task(job.inputs, lo, hi), add)
                if say is not None:
                    say(f"      {job.kind}: sets {hi}/{job.n_sets}")
        return
    calls, where = [], []
    for job in jobs:
        size = min(chunk, math.ceil(job.n_sets / (TASKS_PER_WORKER * runner.n_workers())))
        shared = runner.share(job.inputs)
        for lo, hi in _bounds(job.n_sets, size):
            calls.append((job.task, shared, lo, hi))
            where.append((job, lo, hi))
    for (job, lo, hi), blocks in zip(where, runner.run(_chunk_task, calls)):
        _deliver(job, lo, hi, blocks, add)
    if say is not None:
        say(f"      {len(calls)} tasks made {sum(job.n_sets for job in jobs)} sets of {len(jobs)} kinds")


def _retrend(sets: np.ndarray, z, sigma_z):
    """The redshift trend removed from each set (M, N), as from the data; ``sigma_z`` None: trend off."""
    if sigma_z is None or sets.shape[0] == 0:
        return sets
    return remove_redshift_trend(sets, z, sigma_z=sigma_z)


# ---------------------------------------------------------------------------------------- shuffles
@dataclass(frozen=True)
class _ShuffleInputs:
    temps: np.ndarray            # (N,) the data, trend-corrected
    z: np.ndarray
    seed: int
    sigma_z: float | None        # the trend re-applied to each set; None: trend off
    z_slice_width: float | None  # within-slice shuffles; None: over all tracers
    means_width: float | None    # also the slice means of each all-tracer shuffle (the within-slice reference)


def _shuffle_chunk(inp: _ShuffleInputs, lo: int, hi: int) -> tuple:
    kind = "shuffled" if inp.z_slice_width is None else "shuffled_in_z"
    gens = [set_generator(inp.seed, kind, k) for k in range(lo, hi)]
    sets = _retrend(shuffled_sets(inp.temps, inp.z, hi - lo, rng=gens, z_slice_width=inp.z_slice_width), inp.z,
                    inp.sigma_z)
    if inp.means_width is None:
        return (sets,)
    return sets, _retrend(slice_means(sets, inp.z, inp.means_width), inp.z, inp.sigma_z)


def shuffle_job(temps, z, n_sets: int, targets, *, seed: int, sigma_z, z_slice_width=None,
                means_width=None) -> SetJob:
    """Shuffled sets of ``temps`` (all tracers, or within slices of ``z_slice_width``), the trend
    removed again from each (``sigma_z``, None: off); with ``means_width`` each chunk also returns
    its sets' slice means (``targets``: the shuffles' first row, then the means')."""
    kind = "shuffled" if z_slice_width is None else "shuffled_in_z"
    inputs = _ShuffleInputs(np.asarray(temps, dtype=float), np.asarray(z, dtype=float), int(seed), sigma_z,
                            z_slice_width, means_width)
    return SetJob(kind, int(n_sets), tuple(targets), _shuffle_chunk, inputs)


# ---------------------------------------------------------------------------------- random positions
@dataclass(frozen=True)
class _RandomInputs:
    skymap: object
    n_tracers: int
    radius_arcmin: float
    options: dict                # max_masked_fraction, pixel_weighting, method, radius_scale
    z: np.ndarray
    seed: int
    sigma_z: float | None


def _random_chunk(inp: _RandomInputs, lo: int, hi: int) -> tuple:
    sets = np.empty((hi - lo, inp.n_tracers))
    for k in range(lo, hi):
        sets[k - lo] = measure_random_apertures(inp.skymap, inp.n_tracers, inp.radius_arcmin, **inp.options,
                                                seed=set_generator(inp.seed, "random_positions", k))[2][0]
    return (_retrend(sets, inp.z, inp.sigma_z),)


def random_position_job(skymap, z, radius_arcmin: float, n_sets: int, target: int, *, seed: int, sigma_z,
                        **options) -> SetJob:
    """Sets of apertures at random usable positions of ``skymap`` (``options``: those of
    :func:`~pairvel.maps.photometry.measure_random_apertures`), trend-corrected like the data."""
    z = np.asarray(z, dtype=float)
    inputs = _RandomInputs(skymap, z.size, float(radius_arcmin), dict(options), z, int(seed), sigma_z)
    return SetJob("random_positions", int(n_sets), (int(target),), _random_chunk, inputs)


# ------------------------------------------------------------------------------------ simulated skies
@dataclass(frozen=True)
class _SimInputs:
    plan: SimulationPlan
    z: np.ndarray
    seed: int
    sigma_z: float | None


def _simulated_chunk(inp: _SimInputs, lo: int, hi: int) -> tuple:
    skies = simulate_realisations(inp.plan, [set_generator(inp.seed, "simulated_sky", k) for k in range(lo, hi)])
    blocks = []
    for r in range(skies.shape[1]):
        t = skies[:, r]
        ok = np.isfinite(t)
        fill = np.array([row[keep].mean() for row, keep in zip(t, ok)])  # an unusable aperture: the set's mean
        blocks.append(_retrend(np.where(ok, t, fill[:, None]), inp.z, inp.sigma_z))
    return tuple(blocks)


def simulation_job(plan: SimulationPlan, z, n_sets: int, targets, *, seed: int, sigma_z) -> SetJob:
    """Simulated skies of ``plan`` (:func:`pairvel.stats.simcov.prepare_simulations`), measured at every
    radius, unusable apertures set to the set's mean, trend-corrected; ``targets``: one row per radius."""
    return SetJob("simulated_sky", int(n_sets), tuple(targets), _simulated_chunk,
                  _SimInputs(plan, np.asarray(z, dtype=float), int(seed), sigma_z))


# ------------------------------------------------------------------------------------ rotated map
def _rotation_task(shared, angles, options):
    skymap, ra, dec = shared
    return rotated_sets(skymap, ra, dec, angles, **options)


def rotated_sets_on(runner, skymap, ra_deg, dec_deg, angles_deg, **options):
    """:func:`pairvel.stats.nulltests.rotated_sets`, one task per angle on ``runner`` (same result)."""
    if runner is None or not runner.distributed or len(angles_deg) < 2:
        return rotated_sets(skymap, ra_deg, dec_deg, angles_deg, **options)
    shared = runner.share((skymap, np.asarray(ra_deg, dtype=float), np.asarray(dec_deg, dtype=float)))
    parts = runner.run(_rotation_task, [(shared, [angle], options) for angle in angles_deg])
    kept = [k for _, part in parts for k in part]
    return np.concatenate([sets for sets, _ in parts]).reshape(len(kept), np.size(ra_deg)), kept
