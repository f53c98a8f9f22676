"""Per-bin error calibration on mocks (`-m validation`: 11 minutes on the shared 2-core machine, 2026-12-05).

Targets of the per-bin calibration: jackknife error / scatter of p(r) within 0.9-1.1 in every bin,
mean best-fit chi2 within 10% of its dof, best-fit PTEs uniform (KS p > 0.01), 68% coverage of tau
0.63-0.73.  With a reduced number of mocks each target is widened by 3 sampling errors of that
number (common practice).  Measured 2026-12-05 (README, "Calibration on mocks"): the tracer-split
jackknife meets the per-bin, chi2 and PTE targets but not tau's coverage (0.53-0.57); the default
pair-deleting one meets tau's coverage but not the per-bin targets.  This test holds each to what
it meets, and the cause of the per-bin excess: the pair-deleting jackknife's errors are larger than
the tracer split's where most pairs join two regions.
"""

import math

import numpy as np
import pytest

from pairvel.sims.validate import ValidationOptions, run_validation

ONE_SIGMA = 0.6827  # probability inside +-1 sigma of a Gaussian (analytic)


@pytest.mark.validation
def test_per_bin_errors_match_the_mock_scatter():
    n = 60
    opt = ValidationOptions(n_mocks=n, seed=31337, box_padding=1.5, diagnostics=False)
    s = run_validation(opt).summary
    v = s["jackknife_variants"]["tracers"]
    ratio, se = np.array(v["per_bin_error_over_scatter"]), np.array(v["per_bin_error_over_scatter_se"])
    assert np.all((ratio > 0.9 - 3 * se) & (ratio < 1.1 + 3 * se)), (ratio, se)
    assert abs(v["chi2_min_mean_over_dof"] - 1.0) < 0.1 + 3 * v["chi2_min_mean_over_dof_se"]
    assert v["pte_ks_p"] > 0.01
    # tau coverage of the default (pair-deleting) jackknife: target 0.63-0.73 widened by 3 binomial errors
    assert abs(s["measured"]["coverage_68"] - ONE_SIGMA) < 0.05 + 3 * math.sqrt(ONE_SIGMA * (1 - ONE_SIGMA) / n)
    # the cause: beyond 100 Mpc nearly every pair joins two of the 50 regions (~4 deg: ~30-110 Mpc across over 0.1 < z < 0.4)
    pairs = np.array(s["jackknife_variants"]["pairs"]["per_bin_error_over_scatter"])
    assert np.mean(pairs[5:] / ratio[5:]) > 1.1, pairs / ratio
