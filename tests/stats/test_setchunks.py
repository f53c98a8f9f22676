"""Null and simulated sets made in chunks: the same sets for any chunk size, here or as Dask tasks."""

import numpy as np

from pairvel.core.cluster import TaskRunner
from pairvel.core.rng import set_generator
from pairvel.stats.setchunks import make_sets, shuffle_job, simulation_job
from pairvel.stats.simcov import prepare_simulations, simulate_realisations


def _jobs(n=300):
    rng = np.random.default_rng(4)
    temps, z = rng.normal(0, 20, n), rng.uniform(0.1, 0.5, n)
    plan = prepare_simulations(64, rng.uniform(0, 60, n), rng.uniform(-30, 30, n), [100.0, 150.0],
                               white_noise_uk_arcmin=600.0)
    return [shuffle_job(temps, z, 7, (0, 7), seed=11, sigma_z=0.05, means_width=0.1),
            shuffle_job(temps, z, 5, (14,), seed=11, sigma_z=0.05, z_slice_width=0.1),
            simulation_job(plan, z, 4, (19, 23), seed=11, sigma_z=None)], plan, temps


def _made(jobs, chunk, runner=None):
    out = np.full((27, jobs[0].inputs.temps.size), np.nan)
    make_sets(jobs, out.__setitem__, chunk=chunk, runner=runner)
    return out


def test_sets_do_not_depend_on_the_chunks():
    """Internal regression: chunks of 1, 3 and all sets give the same sets bit for bit (each set from
    its own generator, core.rng.set_generator), every row filled; a sky equals the one simcov draws
    from that set's generator alone, and a shuffle is a permutation of the data."""
    jobs, plan, temps = _jobs()
    whole = _made(jobs, 100)
    assert np.all(np.isfinite(whole))
    for chunk in (1, 3):
        np.testing.assert_array_equal(_made(jobs, chunk), whole)
    sky = simulate_realisations(plan, [set_generator(11, "simulated_sky", 2)])[0]
    np.testing.assert_array_equal(whole[[21, 25]], sky)  # both radii of sky 2 (no unusable aperture here)
    in_z = shuffle_job(temps, jobs[0].inputs.z, 5, (0,), seed=11, sigma_z=None, z_slice_width=0.1)
    got = np.empty((5, temps.size))
    make_sets([in_z], got.__setitem__, chunk=2)
    np.testing.assert_array_equal(np.sort(got, axis=1), np.broadcast_to(np.sort(temps), got.shape))


def test_sets_made_as_dask_tasks_equal_the_sets_made_here(dask_cluster):
    """Internal regression: the same sets on a two-worker LocalCluster, chunks dealt as tasks."""
    jobs, _, _ = _jobs()
    np.testing.assert_array_equal(_made(jobs, 2, TaskRunner(dask_cluster[1])), _made(jobs, 100))
