"""tau against mass on mocks with a known tau_i ~ M_i^alpha (pairvel mock, ``tau_mass_slope``): the power law
fitted across proxy bins with their joint covariance returns alpha and tau_0 without bias.

The mocks paint each tracer's kSZ with a 2.5' beam and measure 4' apertures, small enough that
neighbouring tracers rarely fall into each other's apertures (with 8' apertures and a 5' beam on the
same 6000-tracer patch, seven mocks gave a mean tau_0 pull of +1.4 and a mean alpha pull of -0.9,
measured 2026-12-05: a neighbour's signal in the disc or annulus adds the sample's mean optical depth
to every bin, which would flatten the relation).  On nine mocks of this setting (seeds 3-11, measured
2026-12-05) the pulls scattered by about 2 (alpha) and 1.7 (tau_0), and the whole-sample tau_mean
pulls by 1.5: the validation test below states the target and fails until that is understood (README
"Optical depth against mass").
"""

import json
import warnings

import numpy as np
import pytest

from pairvel.input.config import config_from_dict
from pairvel.pipeline import run_pipeline
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, make_mock_survey

ALPHA = 1.0
PROXY_EDGES = [14.0, 14.1, 14.25, 14.45, 15.0]
MOCK = dict(n_tracers=6000, nside=1024, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8, z_min=0.15, z_max=0.45,
            tau_mean=1.0e-2, bias=0.4, cell_mpc=8.0, beam_fwhm_arcmin=2.5, noise_uk_arcmin=10.0,
            aperture_radius_arcmin=4.0, include_cmb=True, tau_mass_slope=ALPHA)


def pulls(folder, seed):
    """(alpha pull, tau_0 pull) of one mock; the true tau_0 is the injected law at the fit's pivot times the
    mock's measured aperture response."""
    truth = make_mock_survey(folder, seed=seed, **MOCK)
    cfg = config_from_dict({
        "run": {"seed": seed},
        "catalogue": {"path": str(folder / CATALOGUE_FILE), "proxy_column": "log_mass"},
        "map": {"path": str(folder / MAP_FILE)},
        "aperture": {"radius_arcmin": MOCK["aperture_radius_arcmin"]},
        "bins": {"r_max_mpc": 200.0, "width_mpc": 20.0},
        "covariance": {"n_regions": 30},
        "theory": {"bias": 0.4, "proxy_bin_edges": PROXY_EDGES, "proxy_power_law": "log10"},
        "nulls": {"n_random": 0, "n_shuffle": 0, "n_shuffle_z": 0, "rotation_deg": []},
    })
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fit = run_pipeline(cfg).extra["mass_trend"]
    assert fit["problem"] is None, fit
    rel = truth.tau_mass_relation
    assert rel["slope"] == ALPHA and json.loads((folder / "truth.json").read_text())["tau_mass_relation"] == rel
    tau_0 = rel["tau_at_pivot"] * truth.aperture_response * (fit["pivot_mass"] / 10 ** rel["log10_mass_pivot"]) ** ALPHA
    return (fit["alpha"] - ALPHA) / fit["alpha_error"], (fit["tau_0"] - tau_0) / fit["tau_0_error"]


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
