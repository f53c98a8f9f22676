"""Single-cluster tSZ/kSZ split, optical depth and velocity (pairvel.stats.clustervel, pairvel.model.sz)."""

import numpy as np
import pytest

from pairvel.core.constants import C_KM_S, T_CMB_UK
from pairvel.core.errors import InputError
from pairvel.model.sz import ELECTRON_REST_ENERGY_KEV, optical_depth_from_y, tsz_spectrum
from pairvel.stats.clustervel import (
    FLAG_NAMES,
    caution_flags,
    channel_covariance,
    decompose_channels,
    flag_text,
    line_of_sight_velocities,
    pull_summary,
)

FREQS = [90.0, 150.0, 220.0]
NOISE = np.array([4.0, 3.0, 8.0])  # uK per aperture, invented
CMB_RMS = 10.0                     # uK per aperture, invented


def _channel_cov():
    return np.diag(NOISE**2) + CMB_RMS**2


def _sky(n, rng, *, te_kev=6.0, tau_range=(4e-3, 9e-3)):
    """Channel temperatures of n clusters with known tau, v: kSZ + tSZ + common CMB + channel noise."""
    f = tsz_spectrum(FREQS)
    tau = rng.uniform(*tau_range, n)
    v = rng.normal(0.0, 400.0, n)
    y = tau * te_kev / ELECTRON_REST_ENERGY_KEV
    dt = -tau * T_CMB_UK * v / C_KM_S
    t = dt[:, None] + T_CMB_UK * f * y[:, None] + rng.normal(0, CMB_RMS, (n, 1)) + rng.normal(0, 1, (n, 3)) * NOISE
    return t, f, tau, v, y, dt


def test_electron_rest_energy_matches_codata():
    from astropy import constants as const
    from astropy import units as u

    from scipy.constants import physical_constants

    # CODATA 2022 "electron mass energy equivalent in MeV" through scipy.constants (general-purpose library)
    value, unit, _ = physical_constants["electron mass energy equivalent in MeV"]
    assert unit == "MeV"
    np.testing.assert_allclose(ELECTRON_REST_ENERGY_KEV, value * 1e3, rtol=1e-12)
    # m_e c^2 from astropy's CODATA constants (general-purpose library); m_e is given to 11 digits
    np.testing.assert_allclose(ELECTRON_REST_ENERGY_KEV, (const.m_e * const.c**2).to_value(u.keV), rtol=1e-8)


def test_tsz_spectrum_is_the_sunyaev_zeldovich_1972_form_with_codata_constants():
    from astropy import constants as const

    # f(x) = x coth(x/2) - 4, x = h nu / (k T_CMB): Sunyaev & Zel'dovich 1972 (Comments Astrophys. Space Phys. 4,
    # 173), in thermodynamic units as Carlstrom, Holder & Reese 2002 eq. 2; h and k_B from astropy (CODATA)
    nu = np.array(FREQS) * 1e9
    x = const.h.value * nu / (const.k_B.value * 2.72548)
    np.testing.assert_allclose(tsz_spectrum(FREQS), x / np.tanh(x / 2) - 4, rtol=1e-12)
    # SCIENCE.md [calc]: f(150 GHz) = -0.95331 at T_CMB = 2.72548 K
    np.testing.assert_allclose(tsz_spectrum(150.0), -0.95331, atol=1e-5)


def test_optical_depth_from_y_nonrelativistic():
    # tau = y m_e c^2 / (k T_e) (Carlstrom et al. 2002, eq. 1 for isothermal gas) [analytic]
    np.testing.assert_allclose(optical_depth_from_y(1e-5, 5.0), 1e-5 * 510.99895069 / 5.0, rtol=1e-12)
    with pytest.raises(ValueError, match="electron temperatures must be finite and > 0"):
        optical_depth_from_y(1e-5, 0.0)


def test_noiseless_channels_give_exact_parts():
    rng = np.random.default_rng(1)
    f = tsz_spectrum(FREQS)
    y = rng.uniform(1e-6, 1e-4, 20)
    dt = rng.normal(0, 30, 20)
    t = dt[:, None] + T_CMB_UK * f * y[:, None]
    dec = decompose_channels(t, f, _channel_cov())
    # analytic: the model is exact, so the least-squares solution is the truth with zero residual
    np.testing.assert_allclose(dec.y, y, rtol=1e-9)
    np.testing.assert_allclose(dec.dt_ksz_uk, dt, atol=1e-9)
    np.testing.assert_allclose(dec.chi2, 0.0, atol=1e-12)


def test_common_mode_leaves_estimate_and_adds_its_variance_to_the_ksz_part_only():
    rng = np.random.default_rng(2)
    f = tsz_spectrum(FREQS)
    t = rng.normal(0, 20, (5, 3))
    without = decompose_channels(t, f, np.diag(NOISE**2))
    with_cmb = decompose_channels(t, f, np.diag(NOISE**2) + CMB_RMS**2)
    # analytic: a covariance term along a design column (the all-ones kSZ column) does not change the GLS
    # estimate and adds its variance to that column's coefficient alone
    np.testing.assert_allclose(with_cmb.y, without.y, rtol=1e-9)
    np.testing.assert_allclose(with_cmb.dt_ksz_uk, without.dt_ksz_uk, rtol=1e-9, atol=1e-9)
    np.testing.assert_allclose(with_cmb.cov[:, 1, 1] - without.cov[:, 1, 1], CMB_RMS**2, rtol=1e-9)
    np.testing.assert_allclose(with_cmb.cov[:, 0, :], without.cov[:, 0, :], rtol=1e-9, atol=1e-20)


def test_velocity_of_the_science_check_value():
    # SCIENCE.md [calc]: tau = 1e-4, v_r = +300 km/s gives dT = -0.2727 uK (dT/T_CMB = -tau v_r / c,
    # Birkinshaw 1999); here y is chosen so that tau = 1e-4 at k T_e = 5 keV
    te = 5.0
    y = 1e-4 * te / ELECTRON_REST_ENERGY_KEV
    dt = -1e-4 * T_CMB_UK * 300.0 / C_KM_S
    np.testing.assert_allclose(dt, -0.2727, atol=5e-5)
    f = tsz_spectrum(FREQS)
    dec = decompose_channels((dt + T_CMB_UK * f * y)[None, :], f, _channel_cov())
    vel = line_of_sight_velocities(dec, te)
    np.testing.assert_allclose(vel.tau, 1e-4, rtol=1e-9)
    np.testing.assert_allclose(vel.v_km_s, 300.0, rtol=1e-9)


def test_velocity_error_matches_monte_carlo_at_high_snr():
    # the first-order (delta-method) error against the scatter of v over draws of (y, dT) from their joint
    # Gaussian [analytic expectation; Monte Carlo with numpy]
    rng = np.random.default_rng(3)
    f = tsz_spectrum(FREQS)
    t, *_ = _sky(1, rng, tau_range=(8e-3, 8e-3))
    dec = decompose_channels(t, f, _channel_cov())
    vel = line_of_sight_velocities(dec, 6.0)
    draws = rng.multivariate_normal([dec.y[0], dec.dt_ksz_uk[0]], dec.cov[0], size=200_000)
    k = C_KM_S / T_CMB_UK * 6.0 / ELECTRON_REST_ENERGY_KEV
    v = -k * draws[:, 1] / draws[:, 0]
    assert abs(dec.cov[0, 0, 1]) > 0  # the y error and the correlation both enter
    np.testing.assert_allclose(vel.v_err_km_s[0], v.std(), rtol=0.02)


def test_velocity_pulls_have_unit_variance():
    rng = np.random.default_rng(4)
    t, f, tau, v, *_ = _sky(4000, rng)
    # channel covariance from random apertures (common CMB plus channel noise), as the command measures it
    rand = rng.normal(0, CMB_RMS, (20000, 1)) + rng.normal(0, 1, (20000, 3)) * NOISE
    cov = channel_covariance(rand)
    dec = decompose_channels(t, f, cov)
    vel = line_of_sight_velocities(dec, 6.0)
    s = pull_summary(vel.v_km_s, vel.v_err_km_s, v)
    # unit variance and zero mean within 4 sampling errors (sqrt(2/(m-1)) and 1/sqrt(m), analytic) plus 2%
    # for the covariance estimated from 20000 random apertures
    assert s["n"] == 4000
    assert abs(s["variance"] - 1) < 4 * s["variance_error"] + 0.02
    assert abs(s["mean"]) < 4 * s["mean_error"]
    np.testing.assert_allclose(np.median(vel.tau / tau), 1.0, atol=0.01)


def test_wrong_temperature_scales_velocities():
    rng = np.random.default_rng(5)
    t, f, *_ = _sky(50, rng)
    dec = decompose_channels(t, f, _channel_cov())
    # analytic: v proportional to T_e at fixed y and dT
    np.testing.assert_allclose(line_of_sight_velocities(dec, 12.0).v_km_s,
                               2 * line_of_sight_velocities(dec, 6.0).v_km_s, rtol=1e-12)


def test_flags():
    rng = np.random.default_rng(6)
    t, f, *_ = _sky(6, rng)
    t[0] -= T_CMB_UK * f * 1e-3     # y pushed below zero
    t[1] = t[1] * 1e-3 + [0, 0, 0]  # almost no signal: tau S/N ~ 0
    t[2, 2] += 200.0                # one channel off the two-component model: contamination
    dec = decompose_channels(t, f, _channel_cov())
    vel = line_of_sight_velocities(dec, 6.0)
    proxy = np.array([15, 15, 15, 13.9, 15, 15.0])
    near = np.array([0, 0, 0, 0, 1, 0], dtype=bool)
    flags = caution_flags(dec, vel, min_tau_snr=3.0, min_fit_pte=0.01, proxy=proxy, min_proxy=14.0, neighbour=near)
    text = flag_text(flags)
    assert "nonpositive_y" in text[0] and "low_tau_snr" in text[0] and np.isnan(vel.v_km_s[0])
    assert text[1] == "low_tau_snr"
    assert "poor_fit" in text[2]
    assert text[3] == "low_mass"
    assert text[4] == "neighbour"
    assert text[5] == ""
    assert list(FLAG_NAMES) == ["low_tau_snr", "nonpositive_y", "poor_fit", "low_mass", "neighbour"]


def test_bad_inputs():
    f = tsz_spectrum(FREQS)
    with pytest.raises(InputError, match="must have different tSZ factors"):
        decompose_channels(np.zeros((2, 2)), [0.5, 0.5], np.eye(2))
    with pytest.raises(InputError, match=r"must be \(n, k\) with k = 3"):
        decompose_channels(np.zeros((2, 2)), f, np.eye(3))
    with pytest.raises(InputError, match="m >= 10 k positions"):
        channel_covariance(np.zeros((5, 3)))
    with pytest.raises(InputError, match="singular"):
        decompose_channels(np.zeros((2, 3)), f, np.zeros((3, 3)))


def test_relativistic_correction_rayleigh_jeans_limit_and_shapes():
    from pairvel.model.sz import tsz_relativistic_first_order

    te = 8.0
    theta = te / ELECTRON_REST_ENERGY_KEV
    # Rayleigh-Jeans limit dT/T = -2y (1 - 17/10 theta_e): Challinor & Lasenby 1998 (ApJ 499, 1) first order
    # [from memory; Y_1 -> 17/5 follows from the formula analytically]
    f_rel = tsz_relativistic_first_order([0.5], te)
    np.testing.assert_allclose((f_rel - tsz_spectrum([0.5])) / theta, 17 / 5, rtol=1e-4)
    assert tsz_relativistic_first_order(FREQS, te).shape == (3,)
    assert tsz_relativistic_first_order(FREQS, [5.0, 8.0]).shape == (2, 3)
    # the correction lowers the decrement at 150 GHz (by about 3.7% at 5 keV [calc, this formula])
    ratio = tsz_relativistic_first_order([150.0], 5.0) / tsz_spectrum([150.0])
    np.testing.assert_allclose(ratio, 0.9634, atol=5e-4)


def test_relativistic_fit_removes_the_tau_bias_of_hot_clusters():
    from pairvel.model.sz import tsz_relativistic_first_order

    rng = np.random.default_rng(7)
    n, te = 3000, 10.0
    f_rel = tsz_relativistic_first_order(FREQS, te)
    tau = rng.uniform(5e-3, 9e-3, n)
    v = rng.normal(0.0, 400.0, n)
    y = tau * te / ELECTRON_REST_ENERGY_KEV
    t = (-tau * T_CMB_UK * v / C_KM_S)[:, None] + T_CMB_UK * f_rel * y[:, None] + rng.normal(0, 1, (n, 3)) * NOISE
    cov = np.diag(NOISE**2)
    plain = line_of_sight_velocities(decompose_channels(t, tsz_spectrum(FREQS), cov), te)
    rel = line_of_sight_velocities(decompose_channels(t, np.broadcast_to(f_rel, (n, 3)), cov), te)
    # analytic expectation: the relativistic sky fitted with the same spectrum gives tau back; the non-relativistic
    # fit underestimates it (and overestimates |v|) by several percent at 10 keV
    np.testing.assert_allclose(np.median(rel.tau / tau), 1.0, atol=3e-3)
    assert np.median(plain.tau / tau) < 0.95
    s = pull_summary(rel.v_km_s, rel.v_err_km_s, v)
    assert abs(s["variance"] - 1) < 4 * s["variance_error"]


def test_response_scatter_enters_tau_error_only():
    # each cluster's signal (y and dT_kSZ alike) scaled by a response R_i = 1 + 0.08 g_i: with the scatter 0.08
    # stated, the tau pulls have unit variance (analytic: var = noise^2 + (s tau)^2; Monte Carlo with numpy),
    # without it they are too wide; v and its error do not change (the response cancels in dT / y)
    rng = np.random.default_rng(17)
    n, s = 4000, 0.08
    f = tsz_spectrum(FREQS)
    _, _, tau, v, y, dt = _sky(n, rng, tau_range=(8e-3, 1.2e-2))
    resp = 1.0 + s * rng.normal(size=n)
    t = resp[:, None] * (dt[:, None] + T_CMB_UK * f * y[:, None]) + rng.normal(0, 1, (n, 3)) * NOISE
    dec = decompose_channels(t, f, np.diag(NOISE**2))
    plain, with_s = line_of_sight_velocities(dec, 6.0), line_of_sight_velocities(dec, 6.0, response_scatter=s)
    np.testing.assert_allclose(with_s.tau_err, np.hypot(plain.tau_err, s * plain.tau), rtol=1e-12)
    np.testing.assert_array_equal(with_s.v_km_s, plain.v_km_s)
    np.testing.assert_array_equal(with_s.v_err_km_s, plain.v_err_km_s)
    var_with = np.var((with_s.tau - tau) / with_s.tau_err, ddof=1)
    var_plain = np.var((plain.tau - tau) / plain.tau_err, ddof=1)
    assert abs(var_with - 1.0) < 4 * np.sqrt(2 / (n - 1)) + 0.03, var_with  # sampling error of a variance (analytic)
    assert var_plain > 1.3, var_plain
