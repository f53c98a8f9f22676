"""Validation on mocks with a known optical depth: the statistics harness, the mocks, the command,
and (slow) a reduced calibration run whose tolerances follow from the number of mocks."""

import json
import math

import numpy as np
import pytest
from astropy.table import Table

from pairvel.cli import main
from pairvel.core.errors import InputError, OutputError
from pairvel.report.outputs import OUTPUT_MARKER, write_folder_atomically
from pairvel.sims.validate import (
    MIN_MOCKS_FOR_VERDICTS,
    ValidationOptions,
    _calibration,
    _draw_catalogue,
    few_mocks_note,
    run_validation,
)
from pairvel.stats.fit import ONE_SIGMA

# --- the harness itself: it must pass calibrated fits and catch miscalibrated ones ------------------

def _gaussian_fits(n, truth, sigma, quoted, rng, offset=0.0):
    tau = truth + offset + sigma * rng.standard_normal(n)
    err = np.full(n, quoted)
    return tau, err, tau - err, tau + err


def test_harness_on_calibrated_gaussian_estimates():
    rng = np.random.default_rng(5)
    n, truth, sigma = 20000, 1e-3, 2e-4
    cal = _calibration(*_gaussian_fits(n, truth, sigma, sigma, rng), truth)
    # analytic: pulls N(0, 1), so mean 0 (se 1/sqrt(n) = 0.0071), coverage ONE_SIGMA (binomial se 0.0033),
    # ratio 1 (se ~ 1/sqrt(2n) = 0.005); 4 standard errors each
    assert abs(cal["bias_in_sigma"]) < 4 / math.sqrt(n)
    assert cal["coverage_68"] == pytest.approx(ONE_SIGMA, abs=4 * math.sqrt(ONE_SIGMA * (1 - ONE_SIGMA) / n))
    assert cal["error_ratio"] == pytest.approx(1.0, abs=4 / math.sqrt(2 * n))
    # analytic: with equal quoted errors only the scatter is uncertain, relative error 1/sqrt(2 (n - 1))
    assert cal["error_ratio_se"] / cal["error_ratio"] == pytest.approx(1 / math.sqrt(2 * (n - 1)), rel=1e-9)


def test_harness_catches_overestimated_errors_and_bias():
    rng = np.random.default_rng(6)
    n, truth, sigma = 20000, 1e-3, 2e-4
    cal = _calibration(*_gaussian_fits(n, truth, sigma, 2 * sigma, rng), truth)
    # analytic: errors doubled -> ratio 2, coverage P(|x| < 2) = 0.9545
    assert cal["error_ratio"] == pytest.approx(2.0, rel=0.02)
    assert cal["coverage_68"] == pytest.approx(0.9545, abs=0.01)
    cal = _calibration(*_gaussian_fits(n, truth, sigma, sigma, rng, offset=0.3 * sigma), truth)
    assert cal["bias_in_sigma"] == pytest.approx(0.3, abs=0.03)  # analytic: the injected offset


# --- the mocks ----------------------------------------------------------------------------------

def test_mock_catalogue_fills_the_cone_with_the_requested_number():
    opt = ValidationOptions(n_tracers=3000, ra_half_deg=10, dec_half_deg=8, z_min=0.2, z_max=0.3)
    ra, dec, z, v_r, bias_eff = _draw_catalogue(opt, np.random.default_rng(2))
    # the kept fraction is <clip(1 + b D delta, 0, 3)> = 1 up to the rare clipped cells; Poisson scatter
    # sqrt(3000) = 55, plus the field's own large-scale fluctuation of the mean density: 10%
    assert ra.size == pytest.approx(3000, rel=0.1)
    ra_wrapped = (ra + 180.0) % 360.0 - 180.0
    assert ra_wrapped.min() >= -10 and ra_wrapped.max() <= 10 and np.abs(dec).max() <= 8
    assert z.min() >= 0.2 and z.max() <= 0.3
    # linear-theory 1-D velocities of a few hundred km/s [common practice]; a zero or absurd field fails
    assert 100 < np.std(v_r) < 600
    assert 0.9 * opt.bias < bias_eff < opt.bias  # the clipping lowers the bias by a few per cent


def test_clipped_density_moments_and_stein_lemma():
    """E[f], E[f'] of the clipped density against a Monte Carlo, and Stein's lemma (Stein 1981, Ann. Stat.
    9, 1135): the slope of E[f(x) | y] regression, Cov(f(x), y) / Cov(x, y), equals E[f'(x)]."""
    from pairvel.sims.validate import _clipped_density_moments

    rng = np.random.default_rng(4)
    s, rho, n = 0.6, 0.5, 2_000_000
    x = s * rng.standard_normal(n)
    y = rho * x / s + math.sqrt(1 - rho**2) * rng.standard_normal(n)
    f = np.clip(1.0 + x, 0.0, 3.0)
    mean, slope = _clipped_density_moments(np.array([s]), 3.0)
    assert mean[0] == pytest.approx(f.mean(), abs=3e-4)
    assert slope[0] == pytest.approx(np.mean((x > -1) & (x < 2)), abs=1e-3)
    assert np.cov(f, y)[0, 1] / np.cov(x, y)[0, 1] == pytest.approx(slope[0], abs=5e-3)


def test_mocks_are_reproducible_from_the_seed():
    opt = ValidationOptions(n_mocks=2, n_tracers=400, ra_half_deg=6, dec_half_deg=6, n_regions=8,
                            r_max_mpc=120.0, bin_width_mpc=30.0)
    a = run_validation(opt)
    b = run_validation(opt)
    np.testing.assert_array_equal(a.rows["tau_hat"], b.rows["tau_hat"])  # internal regression: same seed
    c = run_validation(ValidationOptions(**{**opt.__dict__, "seed": opt.seed + 1}))
    assert not np.array_equal(a.rows["tau_hat"], c.rows["tau_hat"])


@pytest.mark.parametrize("change, match", [
    ({"n_mocks": 1}, "'n_mocks' must be an integer >= 2"),
    ({"noise_uk": -1.0}, "'noise_uk' must be finite and >= 0"),
    ({"z_min": 0.5, "z_max": 0.4}, "'z_max' must be in"),
    ({"regions": "cubes"}, "'regions' must be 'kmeans' or 'healpix'"),
    ({"nside": 1000}, "'nside' must be a power of 2"),
])
def test_bad_options(change, match):
    with pytest.raises(InputError, match=match):
        ValidationOptions(**change)


# --- outputs and command ------------------------------------------------------------------------

def test_atomic_folder_leaves_nothing_on_failure(tmp_path):
    def broken(tmp):
        (tmp / "half.txt").write_text("x")
        raise OSError(28, "No space left on device")

    with pytest.raises(OutputError, match="cannot be written"):
        write_folder_atomically(tmp_path / "out", broken)
    assert list(tmp_path.iterdir()) == []


def test_validate_command_writes_table_summary_and_figure(tmp_path, capsys):
    out = tmp_path / "val"
    argv = ["validate", str(out), "--n-mocks", "3", "--n-tracers", "400", "--n-regions", "8", "--r-max", "120",
            "--bin-width", "30", "--box-padding", "1.2", "--quiet"]  # a small box keeps the 30-degree patch fast
    assert main(argv) == 0
    captured = capsys.readouterr()
    printed = captured.out
    assert "68% coverage" in printed and "jackknife error / scatter" in printed
    # 3 mocks: a warning on stderr and in run.log, a note in the printed summary and in summary.json
    few = "only 3 mocks: the verdicts on coverage, error ratio and bias mean little with fewer than 20"
    assert f"pairvel: warning: {few}" in captured.err
    assert f"NOTE: {few}" in printed and few in (out / "run.log").read_text()
    table = Table.read(out / "mocks.ecsv")
    assert len(table) == 3 and {"tau_hat", "tau_err", "lower_68", "upper_68", "signal_tau_hat"} <= set(table.colnames)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["provenance"]["seed"] == 20261203
    assert summary["summary"]["measured"]["n_mocks"] == 3
    assert summary["summary"]["few_mocks"].startswith(few)
    assert summary["provenance"]["options"]["box_padding"] == 1.2
    assert (out / "calibration.png").stat().st_size > 1000 and (out / OUTPUT_MARKER).is_file()
    assert main(argv) == 2  # refuses to overwrite without --force
    assert "exists already" in capsys.readouterr().err
    assert main(argv + ["--force"]) == 0


def test_few_mocks_note_from_the_coverage_sampling_error():
    assert few_mocks_note(MIN_MOCKS_FOR_VERDICTS) is None and few_mocks_note(500) is None
    # analytic: binomial standard error of a 68.27% fraction over 19 mocks, sqrt(0.6827 * 0.3173 / 19) = 0.107
    assert "only 19 mocks" in few_mocks_note(19) and "sampling error of 0.11 " in few_mocks_note(19)
    assert "sampling error of 0.21 " in few_mocks_note(5)  # sqrt(0.6827 * 0.3173 / 5) = 0.208


def test_validate_command_rejects_bad_option(tmp_path, capsys):
    assert main(["validate", str(tmp_path / "v"), "--n-mocks", "1", "--quiet"]) == 2
    assert "'n_mocks' must be an integer >= 2" in capsys.readouterr().err
    assert not (tmp_path / "v").exists()


def test_validate_with_a_map(tmp_path):
    opt = ValidationOptions(n_mocks=2, n_tracers=300, with_map=True, nside=1024, ra_half_deg=5, dec_half_deg=5,
                            n_regions=8, r_max_mpc=120.0, bin_width_mpc=30.0, aperture_radius_arcmin=4.0,
                            beam_fwhm_arcmin=2.5)
    res = run_validation(opt)
    assert np.all(np.isfinite(res.rows["tau_hat"])) and np.all(res.rows["tau_err"] > 0)
    # the map keeps almost every tracer: only apertures reaching past the 0.5 degree margin are lost
    assert np.all(res.rows["n_tracers"] > 0.9 * 300 * 0.5)


# --- reduced calibration run (slow) ---------------------------------------------------------------

@pytest.mark.slow
def test_reduced_calibration_noise_dominated():
    """40 mocks, per-tracer noise dominating; tolerances from the sampling error of 40 mocks."""
    n = 40
    # box_padding 1.5 instead of the default 2.5 keeps this under ~3 minutes; it leaves the noiseless
    # amplitude ~3% low (periodic images), inside the 3-standard-error tolerance below
    # the tracer-split jackknife with the variance-weighted amplitude: the combination the 200-mock runs of
    # 2026-12-05 found calibrated at the defaults (README, "Per-bin errors"); the pair-deleting default's
    # errors are 1.1-1.5x the scatter beyond 40 Mpc, which made this bound marginal for it
    opt = ValidationOptions(n_mocks=n, n_tracers=6000, seed=777, fit_r_min_mpc=40.0, diagnostics=False,
                            box_padding=1.5, jackknife_deletes="tracers", likelihood="variance-weighted")
    summary = run_validation(opt).summary
    s = summary["measured"]
    # the noiseless kSZ curves have no noise to hide a model error: their mean amplitude must be the
    # injected one within 3 standard errors of the mean of 40 (about 7%; before the trend-loss model,
    # the exact fields and the effective bias it was 12% low)
    sig = summary["noiseless_signal"]
    assert abs(sig["tau_hat_mean"] - opt.tau_mean) < 3 * sig["tau_hat_scatter"] / math.sqrt(n)
    # bias: the mean of n pulls has standard error ~1/sqrt(n) = 0.16; allow 3 of them (0.47)
    assert abs(s["bias_in_sigma"]) < 3 / math.sqrt(n)
    # coverage: binomial standard error sqrt(p (1 - p) / n) = 0.074 at p = 0.683; allow 3 (0.46-0.90)
    assert abs(s["coverage_68"] - ONE_SIGMA) < 3 * math.sqrt(ONE_SIGMA * (1 - ONE_SIGMA) / n)
    # error ratio: the sample standard deviation of n values has relative error 1/sqrt(2 (n - 1)) = 0.11;
    # allow 3 of them (0.66-1.34)
    assert abs(s["error_ratio"] - 1.0) < 3 / math.sqrt(2 * (n - 1))


# --- the two diagnostic jackknives against direct computations -------------------------------------

def test_retrended_and_object_split_samples_match_direct_computations():
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.sims.validate import _pairs_and_object_split

    rng = np.random.default_rng(11)
    n, n_jk = 60, 4
    pos = rng.uniform(-40, 40, (n, 3)) + np.array([800.0, 0.0, 0.0])
    z = rng.uniform(0.2, 0.22, n)
    regions = np.arange(n) % n_jk
    sets = rng.normal(size=(2, n))
    retrended = rng.normal(size=(n_jk, n))
    edges = np.array([0.0, 30.0, 60.0, 90.0])
    pr, p_obj, p_re, p_split = _pairs_and_object_split(pos, sets, edges, regions, z, n_jk, retrended)
    for k in range(n_jk):
        out = regions != k
        # re-trended sample k: the estimator on the tracers outside region k alone (internal consistency)
        direct = pairwise_momentum(pos[out], retrended[k, out], edges).p
        np.testing.assert_allclose(p_re[k], direct, rtol=1e-10)
    # object-split sample k (slow numpy reference): numerator minus region k's share sum_{i in k} T_i w_i,
    # denominator minus its share of the pairs touching k
    d = pos[:, None, :] - pos[None, :, :]
    r = np.linalg.norm(d, axis=-1)
    rhat = d / np.where(r > 0, r, 1.0)[..., None]
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    c = np.einsum("ijk,ijk->ij", rhat, 0.5 * (u[:, None, :] + u[None, :, :]))
    b = np.digitize(r, edges) - 1
    for bin_ in range(edges.size - 1):
        pair = (b == bin_) & (r > 0)
        cb = np.where(pair, c, 0.0)
        w = cb.sum(axis=1)                                    # w_i = sum_j c_ij (c_ji = -c_ij)
        num = sets @ w                                         # sum_{i<j} (T_i - T_j) c_ij
        den = 0.5 * np.sum(cb**2)
        touch = np.array([0.5 * np.sum(cb[np.ix_(regions == k, regions == k)] ** 2)
                          + np.sum(cb[np.ix_(regions == k, regions != k)] ** 2) for k in range(n_jk)])
        share = touch * den / touch.sum()
        for k in range(n_jk):
            own = sets[:, regions == k] @ w[regions == k]
            np.testing.assert_allclose(p_obj[:, k, bin_], -(num - own) / (den - share[k]), rtol=1e-9)
            # tracer split, re-trended: set k's whole numerator (every pair), the same denominator share
            np.testing.assert_allclose(p_split[k, bin_], -(retrended[k] @ w) / (den - share[k]), rtol=1e-9)


def test_map_pixels_too_coarse_for_the_aperture_fail_before_the_mocks():
    """Pixel side sqrt(4 pi / 12 nside^2): 13.7 arcmin at nside 256, so a 2.1-arcmin disc holds ~0.07
    pixel centres (analytic) and no aperture is usable; nside 1024 (3.4 arcmin, ~1.2 centres) is the first
    that is not refused."""
    with pytest.raises(InputError, match=r"validation option 'nside' must be at least 1024 \(--nside\) for the "
                                         r"2\.1-arcmin aperture: pixels of 13\.7 arcmin leave ~0\.07 pixel centres"):
        ValidationOptions(with_map=True, nside=256)
    assert ValidationOptions(with_map=True, nside=1024).nside == 1024
    assert ValidationOptions(with_map=False, nside=256).nside == 256  # no map, no apertures


def test_too_few_usable_apertures_stop_at_the_first_mock(monkeypatch):
    """When the prediction lets a grid through that leaves most apertures unusable, the first mock stops
    with the same option named."""
    import pairvel.sims.validate as validate

    monkeypatch.setattr("pairvel.sims.validateopts._centres_per_disc", lambda nside, radius: 10.0)  # fool the prediction
    opt = ValidationOptions(with_map=True, nside=256, n_tracers=100)
    rng = np.random.default_rng(2)
    ra, dec = rng.uniform(-10, 10, 200), rng.uniform(-10, 10, 200)
    with pytest.raises(InputError, match=r"validation option 'nside' \(--nside\) is too coarse for the 2\.1-arcmin "
                                         r"aperture: only 0 of 200 mock tracers have a usable aperture at nside 256"):
        validate._map_temperatures(opt, ra, dec, np.zeros(200), rng)


def test_validate_command_with_too_coarse_a_map(tmp_path, capsys):
    assert main(["validate", str(tmp_path / "v"), "--map", "--nside", "256", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("pairvel: error: validation option 'nside' must be at least 1024 (--nside)")
    assert not (tmp_path / "v").exists()
