"""Several frequency maps: the tSZ spectrum, the constrained weights, the pixel-wise combination,
its config checks and a small end-to-end run on mock maps with strong tSZ (invented data)."""

import json
import math
import warnings

import healpy as hp
import numpy as np
import pytest
import scipy.constants
import scipy.linalg
import scipy.optimize
from conftest import write_healpix

from pairvel.cli import _parser
from pairvel.core.constants import T_CMB_K
from pairvel.core.errors import ConfigError, InputError, MapError, PairvelWarning
from pairvel.input.config import config_from_dict
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.multifreq import combination_weights, combine_maps, noise_cost, pixel_difference_covariance, read_input_map
from pairvel.maps.skymap import read_map
from pairvel.model.cmb import load_cmb_cl
from pairvel.model.sz import tsz_spectrum
from pairvel.pipeline import run_pipeline
from pairvel.report.outputs import write_outputs
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, _gaussian_alm, extra_map_file, make_mock_survey


# ---------------------------------------------------------------------- the tSZ spectrum
def test_tsz_null_near_217_ghz():
    nu0 = scipy.optimize.brentq(tsz_spectrum, 200.0, 240.0, xtol=1e-10)
    assert abs(nu0 - 217.5) < 0.1  # the tSZ null near 217-218 GHz [common practice]
    x0 = scipy.constants.h * nu0 * 1e9 / (scipy.constants.k * T_CMB_K)
    assert x0 == pytest.approx(3.830016, abs=2e-6)  # x coth(x/2) = 4 root, SCIENCE.md [calc]
    assert tsz_spectrum(150.0) < 0 < tsz_spectrum(260.0)  # decrement below the null, increment above


def test_tsz_spectrum_published_values():
    # SCIENCE.md check values (Carlstrom, Holder & Reese 2002, ARA&A 40, 643, eq. 2, evaluated) assume
    # T_CMB = 2.7255 K; they reproduce to 1e-5 with that temperature and to 5e-5 with the package's 2.72548 K
    checks = {150.0: -0.95333, 98.0: -1.52670, 220.0: 0.03830}
    for nu, f in checks.items():
        assert tsz_spectrum(nu, t_cmb_k=2.7255) == pytest.approx(f, abs=1e-5)
        assert tsz_spectrum(nu) == pytest.approx(f, abs=5e-5)
    # Rayleigh-Jeans limit dT/T = -2 y (Sunyaev & Zel'dovich 1972) [pub]
    assert tsz_spectrum(0.1) == pytest.approx(-2.0, abs=1e-6)
    # the same formula written with scipy's constants [computed with scipy]
    nu = np.array([30.0, 90.0, 353.0, 545.0])
    x = scipy.constants.h * nu * 1e9 / (scipy.constants.k * T_CMB_K)
    np.testing.assert_allclose(tsz_spectrum(nu), x * np.cosh(x / 2) / np.sinh(x / 2) - 4, rtol=1e-12)
    with pytest.raises(ValueError, match="> 0 GHz"):
        tsz_spectrum([150.0, -90.0])


# ---------------------------------------------------------------------- weights
@pytest.mark.parametrize("freqs", [(90.0, 150.0), (150.0, 220.0), (90.0, 150.0, 220.0), (30.0, 90.0, 150.0, 280.0)])
def test_tsz_free_weights_meet_both_constraints_and_minimise_noise(freqs):
    rng = np.random.default_rng(len(freqs))
    f = tsz_spectrum(freqs)
    a = rng.normal(size=(len(f), len(f)))
    cov = a @ a.T + np.diag(rng.uniform(1, 10, len(f)))  # a correlated noise covariance
    w = combination_weights(f, cov)
    assert abs(w.sum() - 1) < 1e-12 and abs(w @ f) < 1e-12  # the two constraints [analytic]
    # brute force: the constrained minimum over w = w0 + (null space of [1, f]) a, by least squares
    cons = np.vstack([np.ones_like(f), f])
    w0 = np.linalg.lstsq(cons, [1.0, 0.0], rcond=None)[0]
    basis = scipy.linalg.null_space(cons)
    if basis.shape[1]:
        chol = np.linalg.cholesky(cov).T
        coef = np.linalg.lstsq(chol @ basis, -chol @ w0, rcond=None)[0]
        w0 = w0 + basis @ coef
    np.testing.assert_allclose(w, w0, rtol=1e-8, atol=1e-10)  # computed with scipy/numpy least squares


def test_minimum_variance_is_inverse_variance_and_noise_cost():
    sig = np.array([8.0, 6.0, 25.0])
    w = combination_weights(tsz_spectrum([90, 150, 220]), np.diag(sig**2), combination="minimum_variance")
    np.testing.assert_allclose(w, sig**-2 / np.sum(sig**-2), rtol=1e-12)  # inverse-variance weights [analytic]
    # its noise is 1/sqrt(sum 1/sigma^2) [analytic]: cost relative to the 6 uK-arcmin map
    assert noise_cost(w, np.diag(sig**2)) == pytest.approx(np.sum(sig**-2) ** -0.5 / 6.0, rel=1e-12)
    w = combination_weights(tsz_spectrum([90, 150]), np.eye(2), combination="weights", weights=[0.25, 0.75])
    np.testing.assert_array_equal(w, [0.25, 0.75])
    with pytest.raises(ConfigError, match="must sum to 1"):
        combination_weights(tsz_spectrum([90, 150]), np.eye(2), combination="weights", weights=[0.5, 0.6])
    with pytest.raises(ConfigError, match="different tSZ factors"):
        combination_weights(tsz_spectrum([150, 150]), np.eye(2))
    with pytest.raises(ConfigError, match="at least 2 maps"):
        combination_weights(tsz_spectrum([150]), np.eye(1))


# ---------------------------------------------------------------------- the combined map
NSIDE = 64


def _sky(seed, freqs, noise_uk_arcmin):
    """CMB, a y-like cluster map and noise at each frequency: full-sky RING arrays in uK."""
    rng = np.random.default_rng(seed)
    cl = load_cmb_cl()[1][: 3 * NSIDE]
    cmb = hp.alm2map(_gaussian_alm(cl, 3 * NSIDE - 1, rng), NSIDE)
    clusters = np.zeros(hp.nside2npix(NSIDE))
    clusters[rng.choice(clusters.size, 300, replace=False)] = -rng.uniform(50, 400, 300)  # tSZ at f = -1 units
    pix_sigma = np.asarray(noise_uk_arcmin) / hp.nside2resol(NSIDE, arcmin=True)
    maps = [cmb - clusters * f + rng.normal(0, s, cmb.size) for f, s in zip(tsz_spectrum(freqs), pix_sigma)]
    return cmb, clusters, maps


def test_combination_removes_tsz_and_keeps_cmb_exactly():
    freqs, noise = (90.0, 150.0, 220.0), (0.0, 0.0, 0.0)
    cmb, clusters, maps = _sky(4, freqs, noise)
    f = tsz_spectrum(freqs)
    w = combination_weights(f, np.diag([9.0, 4.0, 36.0]))
    out = combine_maps([HealpixMap.from_array(m) for m in maps], w)
    np.testing.assert_allclose(out.values, cmb, rtol=0, atol=1e-10 * np.abs(cmb).max())  # noiseless: CMB only
    # with noise: the residual carries no cluster template, while the single 150 GHz map carries f(150) of it
    cmb, clusters, maps = _sky(5, freqs, (40.0, 30.0, 90.0))
    out = combine_maps([HealpixMap.from_array(m) for m in maps], w)
    resid = out.values - cmb
    slope = resid @ clusters / (clusters @ clusters)
    slope_err = resid.std() / math.sqrt(clusters @ clusters)
    assert abs(slope) < 4 * slope_err, (slope, slope_err)
    single = (maps[1] - cmb) @ clusters / (clusters @ clusters)
    assert single == pytest.approx(-f[1], abs=4 * slope_err)


def test_noise_cost_matches_monte_carlo_rms():
    nside, rng = 256, np.random.default_rng(9)
    sig = np.array([12.0, 7.0, 30.0])  # per-pixel noise, uK
    f = tsz_spectrum([90.0, 150.0, 220.0])
    w = combination_weights(f, np.diag(sig**2))
    maps = [HealpixMap.from_array(rng.normal(0, s, hp.nside2npix(nside))) for s in sig]
    rms = combine_maps(maps, w).values.std()
    # predicted sqrt(w^T N w), 786k pixels: statistical error 0.08% [analytic]
    assert rms / sig.min() == pytest.approx(noise_cost(w, np.diag(sig**2)), rel=0.01)


def test_pixel_difference_noise_estimate_recovers_white_noise_levels():
    nside, rng = 256, np.random.default_rng(2)
    cl = load_cmb_cl()[1][: 3 * nside]
    alm = hp.almxfl(_gaussian_alm(cl, 3 * nside - 1, rng), hp.gauss_beam(math.radians(1.0), lmax=3 * nside - 1))
    cmb = hp.alm2map(alm, nside)  # smoothed by a 1 degree beam, but not smooth enough to vanish in the differences
    clusters = np.zeros(cmb.size)
    clusters[rng.choice(cmb.size, 3000, replace=False)] = rng.uniform(20, 200, 3000)  # single-pixel tSZ sources
    freqs = (90.0, 150.0, 220.0)
    f = tsz_spectrum(freqs)
    levels = np.array([60.0, 40.0, 150.0])  # uK-arcmin
    pix_sigma = levels / hp.nside2resol(nside, arcmin=True)
    maps = [HealpixMap.from_array(cmb + fi * clusters + rng.normal(0, s, cmb.size)) for fi, s in zip(f, pix_sigma)]
    cov, n = pixel_difference_covariance(maps, f)
    # every pixel but 24: the 3 pixels at each of the 8 points where three base faces meet have 7 neighbours
    # (HEALPix grid, Gorski et al. 2005, ApJ 622, 759)
    assert n == hp.nside2npix(nside) - 24
    np.testing.assert_allclose(np.sqrt(np.diag(cov)), levels, rtol=0.03)  # the injected levels [analytic]
    assert np.count_nonzero(cov - np.diag(np.diag(cov))) == 0
    # without the tSZ term only the common part is removed and the 90 GHz level comes out far too high
    only_common = np.sqrt(np.diag(pixel_difference_covariance(maps)[0]))
    assert only_common[0] > 1.1 * levels[0]


def test_ring_nested_partial_and_masks():
    rng = np.random.default_rng(3)
    npix = hp.nside2npix(16)
    a, b = rng.normal(0, 50, npix), rng.normal(0, 50, npix)
    w = np.array([0.3, 0.7])
    ring = combine_maps([HealpixMap.from_array(a), HealpixMap.from_array(b)], w)
    b_nest = HealpixMap.from_array(hp.reorder(b, r2n=True), nest=True)
    mixed = combine_maps([HealpixMap.from_array(a), b_nest], w)
    np.testing.assert_allclose(mixed.values, ring.values, rtol=1e-12)  # RING vs NESTED input
    # a partial second map and a masked pixel in the first: union of the masks
    keep = np.arange(100, 900)
    a[5] = hp.UNSEEN
    part = combine_maps([HealpixMap.from_array(a), HealpixMap(16, False, keep, b[keep])], w)
    usable = part.weight > 0
    expected = np.zeros(npix, bool)
    expected[keep] = True
    expected[5] = False
    np.testing.assert_array_equal(usable, expected)
    np.testing.assert_allclose(part.values[usable], (0.3 * a + 0.7 * b)[usable], rtol=1e-12)
    with pytest.raises(MapError, match="nside 32 but map"):
        combine_maps([HealpixMap.from_array(a), HealpixMap.from_array(np.zeros(hp.nside2npix(32)))], w)


# ---------------------------------------------------------------------- config
def _cfg(tmp_path, **mf):
    data = {"catalogue": {"path": "cat.csv"}, "map": {"coordsys": "C"}, "multifrequency": mf, "theory": {"bias": 1.0}}
    if "map_paths" not in mf:
        data["map"]["path"] = "map.fits"
    return config_from_dict(data, source=tmp_path / "run.toml")


@pytest.mark.parametrize("mf, match", [
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90.0]), "frequencies_ghz' must have one value per map"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], noise_uk_arcmin=[5.0]),
     "noise_uk_arcmin' must have one value per map"),
    (dict(map_paths=["a.fits"], frequencies_ghz=[150]), "at least 2 maps for combination = 'tsz_free'"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[150, 150]), "different tSZ factors"),
    (dict(map_paths=["a.fits", "b.fits"]), "frequencies_ghz' is required"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, -150]), r"must lie in \[1.0, 3000.0\]"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], beam_fwhm_arcmin=[2.0, 1.4]),
     "allow_beam_mismatch"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], combination="weights"), "weights' is required"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], noise_model="levels"),
     "noise_uk_arcmin' is required"),
    (dict(frequencies_ghz=[90, 150]), "map_paths is not"),
    (dict(map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], combination="ilc"), "must be one of"),
])
def test_config_errors(tmp_path, mf, match):
    with pytest.raises(ConfigError, match=match):
        _cfg(tmp_path, **mf)


def test_config_both_paths_and_missing_map(tmp_path):
    with pytest.raises(ConfigError, match="'map.path' and multifrequency.map_paths are both set"):
        config_from_dict({"catalogue": {"path": "c.csv"}, "map": {"path": "m.fits"}, "theory": {"bias": 1.0},
                          "multifrequency": {"map_paths": ["a.fits", "b.fits"], "frequencies_ghz": [90, 150]}})
    with pytest.raises(ConfigError, match="'map.path' is required"):
        config_from_dict({"catalogue": {"path": "c.csv"}})


def test_read_input_map_errors_and_beam_warning(tmp_path):
    rng = np.random.default_rng(1)
    for name, nside in (("a.fits", 16), ("b.fits", 16), ("c.fits", 32)):
        write_healpix(tmp_path / name, rng.normal(0, 50, hp.nside2npix(nside)).astype(np.float32), nside=nside)
    cfg = _cfg(tmp_path, map_paths=["a.fits", "c.fits"], frequencies_ghz=[90, 150], noise_uk_arcmin=[5, 5])
    with pytest.raises(MapError, match="c.fits has nside 32 but map .*a.fits has nside 16"):
        read_input_map(cfg)
    cfg = _cfg(tmp_path, map_paths=["a.fits", "missing.fits"], frequencies_ghz=[90, 150], noise_uk_arcmin=[5, 5])
    with pytest.raises(MapError, match="missing.fits"):
        read_input_map(cfg)
    cfg = _cfg(tmp_path, map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], noise_uk_arcmin=[5, 5],
               beam_fwhm_arcmin=[2.0, 1.4], allow_beam_mismatch=True)
    with pytest.warns(PairvelWarning, match="without reconvolution"):
        skymap, info = read_input_map(cfg)
    assert info["sum_weights"] == pytest.approx(1, abs=1e-12) and abs(info["tsz_response"]) < 1e-12
    cfg = _cfg(tmp_path, map_paths=["a.fits", "b.fits"], frequencies_ghz=[90, 150], combination="minimum_variance")
    skymap, info = read_input_map(cfg)  # no noise levels: measured from the maps (independent 50 uK pixel noise)
    assert info["noise_model"] == "pixel_differences" and info["noise_pixels_used"] == hp.nside2npix(16) - 24
    np.testing.assert_allclose([m["weight"] for m in info["maps"]], 0.5, atol=0.1)


# ---------------------------------------------------------------------- end to end on mock maps
TAU = 1.0e-2
MOCK = dict(n_tracers=6000, nside=256, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8, z_min=0.15, z_max=0.45,
            tau_mean=TAU, bias=0.4, cell_mpc=8.0, beam_fwhm_arcmin=10.0, noise_uk_arcmin=3.0,
            aperture_radius_arcmin=15.0, include_cmb=False, tsz_amplitude_uk=300.0)


def _run(cfg):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PairvelWarning)
        return run_pipeline(config_from_dict(cfg))


def test_end_to_end_tsz_free_recovers_tau(tmp_path):
    """Three mock maps with strong tSZ: the tsz_free combination measures the tau of the same survey
    without tSZ, consistent with the injected one; the 150 GHz map alone scatters far more."""
    m, clean = tmp_path / "m", tmp_path / "clean"
    make_mock_survey(m, seed=4, extra_frequencies_ghz=(90.0, 220.0), **MOCK)
    base = {"run": {"seed": 2}, "aperture": {"radius_arcmin": 15.0}, "bins": {"r_max_mpc": 200.0, "width_mpc": 20.0},
            "covariance": {"n_regions": 30}, "theory": {"bias": 0.4},
            "nulls": {"n_random": 0, "n_shuffle": 2, "n_shuffle_z": 0, "rotation_deg": [90.0]}}
    cat = {"catalogue": {"path": str(m / CATALOGUE_FILE)}}
    paths = [str(m / extra_map_file(90.0)), str(m / MAP_FILE), str(m / extra_map_file(220.0))]
    res = _run({**base, **cat, "multifrequency": {"map_paths": paths, "frequencies_ghz": [90, 150, 220],
                                                  "noise_uk_arcmin": [3.0, 3.0, 3.0]}})
    pull = (res.fit.amplitude - TAU) / res.fit.error
    assert abs(pull) < 3, (res.fit.amplitude, res.fit.error)
    info = res.extra["multifrequency"]
    assert abs(info["tsz_response"]) < 1e-12 and info["sum_weights"] == pytest.approx(1, abs=1e-12)
    # the same survey (same seed) without tSZ, at the combination's noise level: the same tau to a small
    # fraction of the error (internal regression: only the noise realisation differs)
    make_mock_survey(clean, seed=4, **{**MOCK, "tsz_amplitude_uk": 0.0, "noise_uk_arcmin": info["noise_uk_arcmin"]})
    ref = _run({**base, **cat, "map": {"path": str(clean / MAP_FILE)}})
    assert abs(res.fit.amplitude - ref.fit.amplitude) < 0.2 * res.fit.error
    single = _run({**base, **cat, "map": {"path": str(m / MAP_FILE)}})
    assert single.fit.error > 2 * res.fit.error  # the tSZ scatter of the 150 GHz map (measured ratio ~3)
    out = write_outputs(res, tmp_path / "out")
    summary = json.loads((out / "summary.json").read_text())
    assert [mm["frequency_ghz"] for mm in summary["multifrequency"]["maps"]] == [90.0, 150.0, 220.0]
    assert summary["multifrequency"]["noise_cost"] == pytest.approx(info["noise_cost"])
    report = (out / "report.md").read_text()
    assert "## Several frequency maps" in report and "| 220 | +0.03832 |" in report


def test_mock_extra_frequencies_scale_the_tsz_only(tmp_path):
    tiny = dict(n_tracers=600, nside=64, ra_min=30, ra_max=45, dec_min=20, dec_max=30, z_min=0.1, z_max=0.3,
                cell_mpc=16.0, beam_fwhm_arcmin=40.0, aperture_radius_arcmin=60.0, include_cmb=True,
                noise_uk_arcmin=0.0, tsz_amplitude_uk=50.0)
    truth = make_mock_survey(tmp_path / "a", seed=6, extra_frequencies_ghz=(90.0, 220.0), **tiny)
    make_mock_survey(tmp_path / "b", seed=6, **tiny)
    m150 = read_map(tmp_path / "a" / MAP_FILE).values.astype(float)
    np.testing.assert_array_equal(m150, read_map(tmp_path / "b" / MAP_FILE).values)  # 150 GHz map unchanged
    m90, m220 = (read_map(tmp_path / "a" / extra_map_file(nu)).values.astype(float) for nu in (90.0, 220.0))
    assert truth.files["map_90ghz"] == extra_map_file(90.0)
    # noiseless: the maps differ only by the tSZ, f(nu) times one cluster map (the mock's 150 GHz factor is
    # SCIENCE.md's -0.95333), so the differences are proportional [analytic]
    r90, r220 = (tsz_spectrum(nu) / -0.95333 - 1 for nu in (90.0, 220.0))
    np.testing.assert_allclose(m90 - m150, (m220 - m150) * r90 / r220, atol=2e-4 * np.abs(m90 - m150).max())
    assert np.abs(m90 - m150).max() > 1.0  # the tSZ is there
    with pytest.raises(InputError, match="extra_frequencies_ghz"):
        make_mock_survey(tmp_path / "c", extra_frequencies_ghz=(90.0, 90.0), **tiny)
    assert not (tmp_path / "c").exists()


def test_cli_mock_accepts_extra_frequencies():
    args = _parser().parse_args(["mock", "out", "--extra-frequency", "90", "--extra-frequency", "220"])
    assert args.extra_frequency == [90.0, 220.0]
