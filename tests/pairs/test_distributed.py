"""Work units in-process and on a real Dask LocalCluster equal the single pass."""

import json

import numpy as np
import pytest

from pairvel.core.cluster import ClusterError, TaskRunner, open_runner
from pairvel.pairs.distributed import pairwise_momentum_units, plan_units, run_units, unit_sums
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import unit_vectors


def survey(n=4000, seed=3):
    rng = np.random.default_rng(seed)
    pos = unit_vectors(rng.uniform(0, 40, n), rng.uniform(-15, 15, n)) * rng.uniform(700, 1200, n)[:, None]
    pos[5] = pos[6]  # duplicates straddling nothing in particular
    return pos, rng.normal(size=(3, n)), rng.integers(0, 9, n), rng.uniform(0.2, 0.4, n)


def assert_same(a, b):
    np.testing.assert_array_equal(a.pair_counts, b.pair_counts)
    for name in ("p", "numerator", "denominator", "z_eff", "p_jk"):  # summation order only: internal regression
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-12, atol=0)


@pytest.fixture
def cluster(dask_cluster):
    return dask_cluster  # tests/conftest.py: one LocalCluster for every Dask test


@pytest.mark.parametrize("n_units", [None, 2, 40])
def test_units_tile_the_grid_in_slabs_at_least_r_max_thick(n_units):
    pos, *_ = survey(3000)
    plan = plan_units(pos, 60.0, n_units=n_units, n_workers=2)
    starts, stops = np.array(plan.columns).T
    assert starts[0] == 0 and stops[-1] == plan.n_columns and np.array_equal(starts[1:], stops[:-1])
    assert np.all(stops - starts >= plan.columns_per_r_max)
    assert np.ptp(pos[:, plan.axes[0]]) == np.ptp(pos, axis=0).max()
    assert len(plan.columns) == min(6 if n_units is None else n_units, plan.n_columns // plan.columns_per_r_max)
    np.testing.assert_allclose(sum(plan.cost), 1.0, rtol=1e-12)  # analytic: shares of one total


@pytest.mark.parametrize("n_units", [1, 3, 11])
def test_in_process_units_equal_single_pass(n_units):
    pos, temps, reg, z = survey()
    edges = np.linspace(0, 80, 9)
    ref = pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z)
    assert_same(pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, n_units=n_units), ref)


def test_units_with_weights_and_many_sets_on_the_linear_path():
    pos, _, reg, z = survey()
    rng = np.random.default_rng(8)
    temps, w = rng.normal(size=(12, pos.shape[0])), rng.uniform(0.5, 2.0, pos.shape[0])
    edges = np.linspace(0, 80, 9)
    ref = pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z, weights=w, method="direct")
    got = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, weights=w, n_units=5, method="linear")
    np.testing.assert_array_equal(got.pair_counts, ref.pair_counts)
    for name in ("p", "denominator", "z_eff", "p_jk"):  # internal regression: the two paths agree to rounding
        np.testing.assert_allclose(getattr(got, name), getattr(ref, name), rtol=1e-9, atol=0)


def test_dask_local_cluster_equals_single_pass(cluster, tmp_path):
    local, client = cluster
    pos, temps, reg, z = survey()
    edges = np.linspace(5, 100, 12)
    ref = pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z)
    got = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, n_units=6, scheduler=client)
    by_address = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, scheduler=local.scheduler_address)
    (tmp_path / "sched.json").write_text(json.dumps({"address": local.scheduler_address}))  # as `dask scheduler` writes
    with open_runner(scheduler_file=tmp_path / "sched.json", worker_wait_s=30) as runner:
        assert runner.n_workers() == 2
        by_file = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, scheduler=runner)
    assert_same(got, ref)
    assert_same(by_address, ref)
    assert_same(by_file, ref)


def test_task_graph_does_not_grow_with_the_number_of_tracers(cluster):
    """The tasks carry a reference to the broadcast data and a column range, never tracer arrays."""
    from dask.sizeof import sizeof

    _, client = cluster
    runner = TaskRunner(client)
    sizes = []
    for n in (2000, 40000):
        pos, temps, reg, z = survey(n)
        shared = runner.share((pos, temps, reg, z, None))
        args = (shared, (0, 4), np.linspace(0, 80, 9), 9, True, 1, "auto")
        sizes.append(sizeof(args))
        client.cancel([shared])
    assert sizes[0] == sizes[1] < 4096  # common practice: a graph of a few hundred bytes per task


def test_a_worker_lost_in_the_middle_of_a_run_is_survived(cluster, tmp_path):
    """The first unit to start kills its worker process; the scheduler reruns it on the other worker,
    which holds the broadcast data too."""
    _, client = cluster
    marker = tmp_path / "a-worker-died"

    def unit_that_kills_its_worker_once(*args):
        import os

        if not marker.exists():
            marker.touch()
            os._exit(1)
        return unit_sums(*args)

    pos, temps, reg, z = survey(3000)
    edges = np.linspace(0, 80, 9)
    ref = pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z)
    parts, _ = run_units(TaskRunner(client, worker_wait_s=30), (pos, temps, reg, z, None), edges, 9, True,
                         n_units=3, n_threads=1, task=unit_that_kills_its_worker_once)
    assert marker.exists()
    np.testing.assert_array_equal(sum(p[2] for p in parts), ref.pair_counts)  # every pair once: analytic


def test_no_worker_at_all_is_one_clear_error():
    distributed = pytest.importorskip("dask.distributed")
    pos, temps, reg, z = survey(500)
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as local, distributed.Client(local) as client:
        with open_runner(client, worker_wait_s=1.0) as runner:
            shared = runner.share((pos, temps, reg, z, None))
            local.scale(0)
            with pytest.raises(ClusterError, match=r"workers holding this run's shared data are gone \(0 workers"):
                runner.run(unit_sums, [(shared, (0, 2), np.linspace(0, 80, 9), 9, True, 1, "auto")])
            with pytest.raises(ClusterError, match=r"no Dask worker left on the cluster for 1 s \(1 of 1 tasks unf"):
                runner.run(np.add, [(1, 2)])
            with pytest.raises(ClusterError, match=r"for 1 s \(the shared data could not be sent\); start workers"):
                runner.share(pos)
