"""The whole run on a real Dask LocalCluster gives the numbers of the run in this process."""

import numpy as np

from conftest import TINY_CONFIG
from pairvel.input.config import load_config
from pairvel.pipeline import run_pipeline


def test_run_on_a_local_cluster_equals_the_run_in_this_process(tiny_survey, dask_cluster):
    local = run_pipeline(load_config(tiny_survey / "run.toml"))
    (tiny_survey / "dask.toml").write_text(TINY_CONFIG + f'\n[compute]\nscheduler_address = '
                                                         f'"{dask_cluster[0].scheduler_address}"\nn_threads = 1\n')
    spread = run_pipeline(load_config(tiny_survey / "dask.toml"))
    assert spread.n_tracers == local.n_tracers and spread.selection == local.selection
    np.testing.assert_array_equal(spread.pair_counts, local.pair_counts)
    np.testing.assert_array_equal(spread.tracers["t_raw_uK"], local.tracers["t_raw_uK"])  # same apertures, bit for bit
    for name in ("p", "p_jk", "covariance"):  # summation order only: internal regression
        np.testing.assert_allclose(getattr(spread, name), getattr(local, name), rtol=1e-12, atol=1e-300)
    np.testing.assert_allclose(spread.fit.amplitude, local.fit.amplitude, rtol=1e-12)
    for a, b in zip(spread.nulls, local.nulls):
        np.testing.assert_allclose(a.chi2, b.chi2, rtol=1e-10)
