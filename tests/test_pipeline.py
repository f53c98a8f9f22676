"""End-to-end injection-recovery on small mocks with known truth."""

import json

import numpy as np
import pytest

from pairvel.input.config import config_from_dict
from pairvel.pipeline import run_pipeline
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, make_mock_survey

TAU = 1.0e-2
MOCK = dict(n_tracers=6000, nside=512, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8, z_min=0.15, z_max=0.45,
            tau_mean=TAU, bias=0.4, cell_mpc=8.0, beam_fwhm_arcmin=5.0, noise_uk_arcmin=10.0,
            aperture_radius_arcmin=8.0, include_cmb=True)


def measure(folder, seed):
    cfg = config_from_dict({
        "run": {"seed": seed},
        "catalogue": {"path": str(folder / CATALOGUE_FILE)},
        "map": {"path": str(folder / MAP_FILE)},
        "aperture": {"radius_arcmin": 8.0},
        "bins": {"r_max_mpc": 200.0, "width_mpc": 20.0},
        "covariance": {"n_regions": 30},
        "theory": {"bias": 0.4},
        "nulls": {"n_random": 3},
    })
    return run_pipeline(cfg)


def test_injected_tau_is_recovered(tmp_path):
    make_mock_survey(tmp_path / "m", seed=2, **MOCK)
    res = measure(tmp_path / "m", 2)
    pull = (res.fit.amplitude - TAU) / res.fit.error
    assert res.fit.snr > 3  # the kSZ of 6000 tracers with random velocities limits S/N here to ~4-5
    assert abs(pull) < 3, pull  # a fixed seed; the slow test below checks the distribution
    assert all(n.pte_mean > 0.001 for n in res.nulls)
    assert res.n_tracers > 5000 and res.pair_counts.sum() > 1e5
    kept = np.array(res.extra["template"]["trend_loss_model"]["kept_fraction"])
    assert kept.shape == (10,) and 0.95 < kept[0] <= 1.0 and kept[-1] < kept[0]


@pytest.mark.slow
def test_recovery_is_unbiased_over_mocks(tmp_path):
    """Eight independent mocks: the mean pull is within 3/sqrt(8) of zero and the pulls scatter
    no more than the quoted errors allow (jackknife errors are expected to be, if anything, large)."""
    pulls = []
    for seed in range(8):
        make_mock_survey(tmp_path / f"m{seed}", seed=100 + seed, **MOCK)
        res = measure(tmp_path / f"m{seed}", seed)
        pulls.append((res.fit.amplitude - TAU) / res.fit.error)
    pulls = np.array(pulls)
    assert abs(pulls.mean()) < 3 / np.sqrt(8), pulls
    assert pulls.std(ddof=1) < 1.6, pulls


def test_bootstrap_estimator_and_covariance_diagnostics(tiny_survey):
    """Bootstrap covariance through the pipeline: same curve, errors of the same order as the
    jackknife's (common practice: the two agree to tens of per cent for region resampling)."""
    import warnings

    from pairvel.core.errors import PairvelWarning
    from pairvel.input.config import load_config
    from pairvel.pipeline import run_pipeline
    from pairvel.report.outputs import write_outputs

    text = (tiny_survey / "run.toml").read_text().replace("n_regions = 12",
                                                          'n_regions = 12\nestimator = "bootstrap"\nn_bootstrap = 300')
    text = text.replace("n_random = 2", "n_random = 2\nrotation_deg = [8.0, 12.0]")
    (tiny_survey / "boot.toml").write_text(text)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PairvelWarning)
        res = run_pipeline(load_config(tiny_survey / "boot.toml"))
    diag = res.extra["covariance_diagnostics"]
    assert diag["used"] == "bootstrap" and set(diag["errors"]) == {"jackknife", "bootstrap"}
    ratio = np.array(diag["errors"]["bootstrap"]) / np.array(diag["errors"]["jackknife"])
    assert np.all((ratio > 0.5) & (ratio < 2.0)), ratio
    np.testing.assert_allclose(res.p_err, diag["errors"]["bootstrap"], rtol=1e-12)
    assert diag["condition_number"] >= 1.0
    out = write_outputs(res, tiny_survey / "out_boot")
    assert (out / "correlation.png").is_file()
    summary = json.loads((out / "summary.json").read_text())
    assert summary["covariance"]["method"].startswith("bootstrap (300 replicates)")
    assert "Covariance diagnostics" in (out / "report.md").read_text()
    rotated = [n for n in summary["null_tests"] if n["kind"] == "rotated"]
    assert rotated and rotated[0]["n_realisations"] == 2 and len(rotated[0]["chi2_each"]) == 2
    assert [r["angle_deg"] for r in summary["null_rotations_used"]] == [8.0, 12.0]
    assert (out / "nulls.png").is_file() and (out / "null_rotated.ecsv").is_file()


def test_too_few_samples_warns():
    """Common practice: a Hartlap factor below 0.8 means too few samples for the bins."""
    from pairvel.core.errors import PairvelWarning
    from pairvel.stats.covdiag import covariance_diagnostics

    cov = np.diag([1.0, 2.0, 4.0, 8.0])
    with pytest.warns(PairvelWarning, match="'jackknife' comes from 10 samples for the 4 fitted bins"):
        d = covariance_diagnostics({"jackknife": cov}, {"jackknife": 10}, used="jackknife")
    np.testing.assert_allclose(d["condition_number"], 8.0, rtol=1e-12)  # analytic: max/min eigenvalue
    assert d["too_few_samples"] == ["jackknife"]


def test_quoted_hartlap_factor_is_the_one_for_the_fitted_bins():
    """A fit range of 2 of 4 bins: the diagnostics quote (n - 2 - 2)/(n - 1), the factor the fit applies."""
    from pairvel.core.errors import PairvelWarning
    from pairvel.stats.covdiag import covariance_diagnostics
    from pairvel.stats.fit import fit_amplitude

    cov = np.diag([1.0, 2.0, 4.0, 8.0])
    use = np.array([False, True, True, False])
    with pytest.warns(PairvelWarning, match=r"10 samples for the 2 fitted bins \(Hartlap factor 0\.67 < 0\.8\)"):
        d = covariance_diagnostics({"jackknife": cov}, {"jackknife": 10}, used="jackknife", n_fit_bins=int(use.sum()))
    fit = fit_amplitude(np.ones(4), np.ones(4), cov, n_samples=10, use=use)
    assert d["hartlap_factor"]["jackknife"] == fit.precision_factor == 6 / 9  # analytic: (10 - 2 - 2) / (10 - 1)
    d = covariance_diagnostics({"jackknife": cov}, {"jackknife": 30}, used="jackknife", n_fit_bins=2)
    assert d["too_few_samples"] == [] and d["hartlap_factor"]["jackknife"] == 26 / 29  # analytic, no warning


def test_jackknife_sample_is_the_whole_chain_without_the_region():
    """Sample k from the re-trended sets in one pass equals the estimator on the tracers outside
    region k with the trend estimated from them alone (the delete-one definition, computed directly)."""
    from types import SimpleNamespace

    from pairvel.maps.trend import remove_redshift_trend
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.pairs.geometry import comoving_positions
    from pairvel.pipeline import retrended_sets

    rng = np.random.default_rng(12)
    n, n_jk = 1500, 5
    ra, dec, z = rng.uniform(0, 20, n), rng.uniform(-5, 5, n), rng.uniform(0.1, 0.3, n)
    pos = comoving_positions(ra, dec, z)
    raw = rng.normal(0, 10, n) + 40 * z           # a redshift trend to remove
    regions = (ra // 4).astype(int)
    cfg = SimpleNamespace(trend=SimpleNamespace(enabled=True, sigma_z=0.01),
                          covariance=SimpleNamespace(jackknife_retrend=True))
    sets = retrended_sets(raw[None, :], z, regions, cfg)
    edges = np.linspace(0, 80, 5)
    res = pairwise_momentum(pos, sets, edges, regions=regions)
    for k in range(n_jk):
        keep = regions != k
        direct = pairwise_momentum(pos[keep], remove_redshift_trend(raw[keep], z[keep], sigma_z=0.01), edges)
        np.testing.assert_allclose(res.p_jk[k, k], direct.p, rtol=1e-9)


def test_tracer_split_jackknife_rows_of_the_pipeline():
    """jackknife_deletes = "tracers": sample k of the data is minus the whole numerator of the set re-trended
    without region k (zero in it) over the denominator less region k's share of the pairs touching it; with
    the trend off the set is the data zeroed in region k (the definition in stats.covariance)."""
    from types import SimpleNamespace

    from pairvel.maps.trend import remove_redshift_trend
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.pairs.geometry import comoving_positions
    from pairvel.pipeline import TemperatureStack, _jackknife_rows, retrended_sets

    rng = np.random.default_rng(13)
    n, n_jk = 800, 4
    ra, dec, z = rng.uniform(0, 20, n), rng.uniform(-5, 5, n), rng.uniform(0.1, 0.3, n)
    pos = comoving_positions(ra, dec, z)
    raw = rng.normal(0, 10, n) + 40 * z
    regions = (ra // 5).astype(int)
    edges = np.linspace(0, 80, 5)
    for trend in (True, False):
        cfg = SimpleNamespace(trend=SimpleNamespace(enabled=trend, sigma_z=0.01),
                              covariance=SimpleNamespace(jackknife_retrend=True, jackknife_deletes="tracers"))
        data = remove_redshift_trend(raw, z, sigma_z=0.01) if trend else raw
        stack = TemperatureStack.build(data[None, :], {}, retrended_sets(raw[None, :], z, regions, cfg),
                                       np.zeros((0, n)))
        pr = pairwise_momentum(pos, stack.values, edges, regions=regions)
        rows = _jackknife_rows(cfg, pr, stack, n_jk)[0]
        share = pr.den_jk * pr.denominator / pr.den_jk.sum(axis=0)
        for k in range(n_jk):
            keep = regions != k
            t = np.zeros(n)
            t[keep] = remove_redshift_trend(raw[keep], z[keep], sigma_z=0.01) if trend else raw[keep]
            num = pairwise_momentum(pos, t, edges).numerator
            np.testing.assert_allclose(rows[k], -num / (pr.denominator - share[k]), rtol=1e-9)
