"""The whole run on a real Dask LocalCluster gives the numbers of the run in this process."""

import numpy as np

from conftest import TINY_CONFIG
from pairvel.input.config import load_config
from pairvel.pipeline import run_pipeline


#: every kind of null set and simulated skies, so that all of them are made as tasks on the cluster
SETS = (TINY_CONFIG.replace("n_regions = 12", 'n_regions = 12\nestimator = "simulations"\nn_sim = 8')
        .replace("n_random = 2", "n_random = 3\nn_shuffle = 20\nn_shuffle_z = 6\nrotation_deg = [8.0, 12.0]"))


def test_run_on_a_local_cluster_equals_the_run_in_this_process(tiny_survey, dask_cluster):
    """Internal regression: the same run in this process (sets made and summed in chunks) and on a two-worker
    cluster (the random sets, rotations and simulated skies made as tasks, the pair pass as work units)."""
    (tiny_survey / "sets.toml").write_text(SETS)
    local = run_pipeline(load_config(tiny_survey / "sets.toml"))
    (tiny_survey / "dask.toml").write_text(SETS + f'\n[compute]\nscheduler_address = '
                                                  f'"{dask_cluster[0].scheduler_address}"\nn_threads = 1\n')
    spread = run_pipeline(load_config(tiny_survey / "dask.toml"))
    assert {n.kind: n.n_real for n in spread.nulls} == {"random_positions": 3, "shuffled": 20, "shuffled_in_z": 6,
                                                        "rotated": 2}
    assert spread.n_tracers == local.n_tracers and spread.selection == local.selection
    np.testing.assert_array_equal(spread.pair_counts, local.pair_counts)
    np.testing.assert_array_equal(spread.tracers["t_raw_uK"], local.tracers["t_raw_uK"])  # same apertures, bit for bit
    for name in ("p", "p_jk", "covariance"):  # summation order only: internal regression
        np.testing.assert_allclose(getattr(spread, name), getattr(local, name), rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(spread.fit.amplitude, local.fit.amplitude, rtol=1e-12)
    assert [n.kind for n in spread.nulls] == [n.kind for n in local.nulls]
    for a, b in zip(spread.nulls, local.nulls):  # each set from its own generator: the same sets, chunks or tasks
        np.testing.assert_allclose(a.p, b.p, rtol=1e-12, atol=1e-12 * np.abs(local.p).max())
        np.testing.assert_allclose(a.chi2, b.chi2, rtol=1e-10)
