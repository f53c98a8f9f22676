"""Work units in-process and on a real Dask LocalCluster equal the single pass."""

import numpy as np
import pytest

from pairvel.pairs.distributed import pairwise_momentum_units, split_work_units
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import unit_vectors


def survey(n=4000, seed=3):
    rng = np.random.default_rng(seed)
    pos = unit_vectors(rng.uniform(0, 40, n), rng.uniform(-15, 15, n)) * rng.uniform(700, 1200, n)[:, None]
    pos[5] = pos[6]  # duplicates straddling nothing in particular
    return pos, rng.normal(size=(3, n)), rng.integers(0, 9, n), rng.uniform(0.2, 0.4, n)


def assert_same(a, b):
    np.testing.assert_array_equal(a.pair_counts, b.pair_counts)
    for name in ("p", "numerator", "denominator", "z_eff", "p_jk"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=1e-12, atol=0)


def test_units_cover_every_pair_once():
    pos, *_ = survey(500)
    units = split_work_units(pos, 60.0, 7)
    primaries = np.concatenate([p for p, _ in units])
    assert np.array_equal(np.sort(primaries), np.arange(500))
    for primary, halo in units:
        assert not np.intersect1d(primary, halo).size


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
    for name in ("p", "denominator", "z_eff", "p_jk"):
        np.testing.assert_allclose(getattr(got, name), getattr(ref, name), rtol=1e-9, atol=0)


def test_dask_local_cluster_equals_single_pass():
    distributed = pytest.importorskip("dask.distributed")
    pos, temps, reg, z = survey()
    edges = np.linspace(5, 100, 12)
    ref = pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        got = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, n_units=6, scheduler=client)
        by_address = pairwise_momentum_units(pos, temps, edges, regions=reg, redshifts=z, n_units=4,
                                             scheduler=cluster.scheduler_address)
    assert_same(got, ref)
    assert_same(by_address, ref)
