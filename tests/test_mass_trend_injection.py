"""tau against mass on mocks with a known tau_i ~ M_i^alpha (pairvel mock, ``tau_mass_slope``): the power law
fitted across proxy bins with their joint covariance returns alpha and tau_0 without bias.

The mocks paint each tracer's kSZ with a 2.5' beam and measure 4' apertures, small enough that
neighbouring tracers rarely fall into each other's apertures (with 8' apertures and a 5' beam on the
same 6000-tracer patch, seven mocks gave a mean tau_0 pull of +1.4 and a mean alpha pull of -0.9,
measured 2026-12-05: a neighbour's signal in the disc or annulus adds the sample's mean optical depth
to every bin, which would flatten the relation).  On nine mocks of this setting (seeds 3-11, measured
2026-12-05) the pulls scattered by about 2 (alpha) and 1.7 (tau_0), and the whole-sample tau_mean
pulls by 1.5.  benchmarks/mass_trend_decomposition.py (noiseless mocks, measured 2026-12-05) puts most of
that outside the chain: fitted from the tracers' true signals with no map, alpha scatters by 0.41 against
a mean jackknife error of 0.23 over ten mocks, i.e. the bins' jackknife misses much of the velocities'
sampling variance; photometry adds a flattening of -0.4 to -0.5 alpha errors (neighbours in the aperture).
The validation test below states the target and fails until the bins' errors include that variance
(README "Optical depth against mass").
"""

import importlib.util
import json
from pathlib import Path

import numpy as np
import pytest

ALPHA = 1.0
_BENCH = Path(__file__).resolve().parents[1] / "benchmarks" / "mass_trend_mocks.py"


def _bench():
    """benchmarks/mass_trend_mocks.py, whose mocks and run the README's numbers come from."""
    spec = importlib.util.spec_from_file_location("mass_trend_mocks", _BENCH)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def pulls(folder, seed):
    """(alpha pull, tau_0 pull) of one mock of the small-aperture setting; the true tau_0 is the injected law
    at the fit's pivot times the mock's measured aperture response."""
    bench = _bench()
    row = bench.one_mock(folder, seed, bench.SETTINGS["small-aperture"], ALPHA, True)
    assert "problem" not in row, row
    assert json.loads((folder / "truth.json").read_text())["tau_mass_relation"]["slope"] == ALPHA
    return row["pull_alpha"], row["pull_tau0"]


@pytest.mark.slow
def test_power_law_recovered_on_a_few_mocks(tmp_path):
    """Three mocks: each pull within 3.5 and the mean pulls within 3 / sqrt(3) of zero (unit-variance pulls;
    measured on seeds 3-5 on 2026-12-05: alpha pulls 0.88, -0.49, 2.06, tau_0 pulls -0.13, -0.61, 2.20)."""
    p = np.array([pulls(tmp_path / f"m{seed}", seed) for seed in (3, 4, 5)])
    assert np.all(np.abs(p) < 3.5), p
    assert np.all(np.abs(p.mean(axis=0)) < 3 / np.sqrt(3)), p


@pytest.mark.validation
def test_power_law_unbiased_over_many_mocks(tmp_path):
    """Sixteen mocks: mean pulls of alpha and tau_0 within 3 standard errors of zero, and their scatter
    between 0.7 and 1.4 (unit-variance pulls for calibrated errors; common practice)."""
    p = np.array([pulls(tmp_path / f"m{seed}", seed) for seed in range(100, 116)])
    mean, std = p.mean(axis=0), p.std(axis=0, ddof=1)
    assert np.all(np.abs(mean) < 3 * std / np.sqrt(len(p))), (mean, std, p)
    assert np.all((std > 0.7) & (std < 1.4)), (mean, std, p)
