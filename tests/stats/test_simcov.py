"""Simulated-map covariance: aperture variance of white noise, harmonic CMB path, pair-curve covariance."""

import healpy as hp
import numpy as np
import pytest

from pairvel.core.constants import ARCMIN_RAD
from pairvel.core.errors import InputError
from pairvel.stats.simcov import (
    TAIL_FRACTION,
    _spectrum,
    aperture_window,
    band_needed,
    simulate_aperture_temperatures,
    simulation_covariance,
)


def test_white_noise_aperture_variance_matches_pixel_count_formula():
    """Analytic: for white noise of pixel sigma s, T_AP = <T>_disc - <T>_annulus has variance
    s^2 (1/n_disc + 1/n_annulus), with the pixel counts of the disc and annulus at each tracer."""
    nside, radius, level = 256, 30.0, 200.0
    rng = np.random.default_rng(4)
    ra, dec = rng.uniform(0, 30, 600), rng.uniform(-15, 15, 600)
    t = simulate_aperture_temperatures(nside, ra, dec, radius, 300, seed=5, white_noise_uk_arcmin=level)
    sigma_pix = level / np.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    vec = hp.ang2vec(ra, dec, lonlat=True)
    n_in = np.array([hp.query_disc(nside, v, radius * ARCMIN_RAD).size for v in vec])
    n_out = np.array([hp.query_disc(nside, v, np.sqrt(2) * radius * ARCMIN_RAD).size for v in vec]) - n_in
    expected = sigma_pix**2 * (1.0 / n_in + 1.0 / n_out)
    ratio = t.var(axis=0, ddof=1) / expected
    # each ratio scatters by sqrt(2/299) = 8 per cent; their mean over 600 tracers by ~0.4 per cent
    np.testing.assert_allclose(ratio.mean(), 1.0, rtol=0.02)
    assert np.all(np.abs(ratio - 1) < 0.45)


def test_harmonic_path_is_seeded():
    """Internal: the same seed gives the same skies, successive realisations differ."""
    nside = 64
    lmax = 3 * nside - 1
    cl = np.full(lmax + 1, 2.0)
    rng = np.random.default_rng(1)
    ra, dec = rng.uniform(0, 360, 200), rng.uniform(-60, 60, 200)
    a = simulate_aperture_temperatures(nside, ra, dec, 90.0, 3, seed=2, cmb_cl=cl)
    b = simulate_aperture_temperatures(nside, ra, dec, 90.0, 3, seed=2, cmb_cl=cl)
    np.testing.assert_array_equal(a, b)
    assert not np.allclose(a[0], a[1])
    with pytest.raises(InputError, match="must be >= 1"):
        simulate_aperture_temperatures(nside, ra, dec, 90.0, 0)


def test_point_values_of_the_synthesis_have_the_cl_variance():
    """Analytic: var T(n) = sum_l (2l+1)/(4 pi) C_l for an isotropic Gaussian field; checked on the
    pixel values the synthesis writes (ducc0 at arbitrary positions vs this sum)."""
    import ducc0

    lmax = 100
    cl = 1.0 / (np.arange(lmax + 1) + 10.0) ** 2
    ell, m = hp.Alm.getlm(lmax)
    rng = np.random.default_rng(3)
    loc = np.column_stack([np.arccos(rng.uniform(-1, 1, 3000)), rng.uniform(0, 2 * np.pi, 3000)])
    vals = []
    for _ in range(40):
        re, im = rng.standard_normal(ell.size), rng.standard_normal(ell.size)
        amp = np.sqrt(cl[ell])
        alm = np.where(m == 0, amp * re, amp * (re + 1j * im) / np.sqrt(2.0))
        vals.append(ducc0.sht.experimental.synthesis_general(alm=alm[None, :], spin=0, lmax=lmax, loc=loc,
                                                             epsilon=1e-8)[0])
    expected = np.sum((2 * np.arange(lmax + 1) + 1) / (4 * np.pi) * cl)
    # 40 independent skies: the variance estimate scatters by ~ sqrt(2/40) / sqrt(n_eff); loose bound
    np.testing.assert_allclose(np.var(vals), expected, rtol=0.15)


def test_simulation_covariance_checks_input():
    s = np.random.default_rng(0).normal(size=(50, 3))
    np.testing.assert_allclose(simulation_covariance(s), np.cov(s, rowvar=False), rtol=1e-14)
    with pytest.raises(InputError, match="finite"):
        simulation_covariance(s[:1])


@pytest.mark.filterwarnings("ignore")
def test_pipeline_simulation_covariance_matches_shuffled_scatter_on_white_noise(tiny_survey):
    """The tiny survey's map is white noise of 30 uK per nside-256 pixel; simulations of that noise
    (level = 30 uK x pixel side) must give the errors that the scatter of temperature shuffles gives
    (analytic for white noise: shuffling keeps each aperture's variance and has no correlations,
    like independent noise; only apertures that share pixels break this, rare here).  The redshift
    trend is off: its subtraction correlates tracers at equal z, which the simulations follow and
    shuffles do not (measured: it lowers the large-r errors by up to 2x here).  Bounds: the
    standard deviation from 40 maps and from 60 shuffles each scatter by ~10 per cent."""
    from pairvel.input.config import load_config
    from pairvel.pipeline import run_pipeline

    level = 30.0 * np.sqrt(hp.nside2pixarea(256, degrees=True) * 3600.0)
    text = (tiny_survey / "run.toml").read_text().replace(
        "n_regions = 12", f'n_regions = 12\nestimator = "simulations"\nn_sim = 40\nsim_cmb = false\n'
                          f"sim_white_noise_uk_arcmin = {level}").replace("n_random = 2", "n_random = 0\nn_shuffle = 60") \
        + "\n[trend]\nenabled = false\n"
    (tiny_survey / "sims.toml").write_text(text)
    res = run_pipeline(load_config(tiny_survey / "sims.toml"))
    diag = res.extra["covariance_diagnostics"]
    assert diag["used"] == "simulations" and diag["n_samples"]["simulations"] == 40
    shuffled = next(n for n in res.nulls if n.kind == "shuffled")
    ratio = np.array(diag["errors"]["simulations"]) / shuffled.p.std(axis=0, ddof=1)
    assert np.all((ratio > 0.65) & (ratio < 1.5)), ratio
    np.testing.assert_allclose(res.p_err, diag["errors"]["simulations"], rtol=1e-12)


def test_alm_draw_has_the_requested_power():
    """Analytic: <|a_lm|^2> = C_l for every (l, m), with a_l0 real (healpy's convention)."""
    from pairvel.stats.simcov import _draw_alm

    lmax = 40
    ell, m = hp.Alm.getlm(lmax)
    cl = 1.0 + ell.astype(float)
    m0 = np.flatnonzero(m == 0)
    rng = np.random.default_rng(0)
    draws = np.array([_draw_alm(np.sqrt(cl), m0, rng) for _ in range(4000)])
    assert np.all(draws[:, m0].imag == 0)
    # |a|^2 / C_l has mean 1 and standard deviation <= sqrt(2) per draw: 4000 draws give ~2 per cent
    power = (np.abs(draws) ** 2).mean(axis=0) / cl
    np.testing.assert_allclose(power[m0], 1.0, atol=0.1)
    np.testing.assert_allclose(power[m != 0], 1.0, atol=0.1)
    # the healpy estimate of C_l from one map's a_lm: averaged over draws, the input
    np.testing.assert_allclose(np.mean([hp.alm2cl(a) for a in draws[:200]], axis=0), 1.0 + np.arange(lmax + 1),
                               rtol=0.15)


def test_ring_synthesis_equals_healpy_alm2map_at_the_pixels():
    # reference: healpy.alm2map, a full-sky synthesis (general-purpose library)
    from pairvel.maps.healpix import synthesise_pixels

    nside, lmax = 64, 150
    rng = np.random.default_rng(4)
    alm = hp.synalm(1.0 / (np.arange(lmax + 1) + 10.0) ** 2, lmax=lmax)
    pix = np.sort(rng.choice(hp.nside2npix(nside), 700, replace=False))
    full = hp.alm2map(alm, nside, lmax=lmax)
    got = synthesise_pixels(alm, nside, lmax, pix)
    np.testing.assert_allclose(got, full[pix], rtol=0, atol=1e-10 * np.abs(full).max())


def test_prefilter_transfer_scales_the_simulated_sky():
    """With a harmonic filter the whole simulated sky (CMB and white noise) goes through F_l: F_l = 1/2 halves
    every aperture temperature of the same draws."""
    from pairvel.model.cmb import load_cmb_cl

    ra, dec = np.array([10.0, 40.0, 200.0]), np.array([-5.0, 20.0, 60.0])
    kw = dict(cmb_cl=load_cmb_cl()[1], beam_fwhm_arcmin=20.0, white_noise_uk_arcmin=30.0)
    lmax = 3 * 64 - 1
    one = simulate_aperture_temperatures(64, ra, dec, 90.0, 3, seed=5, transfer=np.ones(lmax + 1), **kw)
    half = simulate_aperture_temperatures(64, ra, dec, 90.0, 3, seed=5, transfer=np.full(lmax + 1, 0.5), **kw)
    np.testing.assert_allclose(half, 0.5 * one, rtol=1e-10)
    assert np.all(np.isfinite(one)) and np.std(one) > 0


def test_multipoles_without_power_are_not_drawn():
    """Internal equivalence: a C_l table ending at l = 100 gives the same skies with lmax 100 as with a
    grid band limit of 767 (no a_lm, and no random numbers, beyond the last multipole with power)."""
    ra, dec = np.array([10.0, 11.0, 12.5]), np.array([0.0, 1.0, -2.0])
    cl = np.r_[0.0, 0.0, 1e3 / np.arange(2, 101) ** 2]
    full = simulate_aperture_temperatures(256, ra, dec, 30.0, 3, seed=8, cmb_cl=cl)
    cut = simulate_aperture_temperatures(256, ra, dec, 30.0, 3, seed=8, cmb_cl=cl, lmax=100)
    np.testing.assert_array_equal(full, cut)


def test_compensated_aperture_window_at_low_multipoles():
    """Analytic: D_l(x) = 2 J1(lx)/(lx) ~ 1 - (lx)^2/8, so W_l = 2 (D_l(t) - D_l(sqrt2 t)) ~ (l t)^2 / 4."""
    theta_arcmin = 3.0
    ell = np.array([1.0, 3.0, 10.0])
    lt = ell * theta_arcmin * ARCMIN_RAD
    np.testing.assert_allclose(aperture_window(ell, theta_arcmin), lt**2 / 4, rtol=1e-4)


def test_band_cut_and_float32_stay_within_the_tail_budget(monkeypatch):
    """The skies synthesised to band_needed in float32 against every multipole in float64 with the
    same seed: the change carries at most TAIL_FRACTION of the aperture variance (bound on the
    dropped power by construction; 2x margin for the estimate from 400 apertures)."""
    nside = 256
    lmax = 3 * nside - 1
    ell = np.arange(lmax + 1)
    cl = 1e3 / (ell + 20.0) ** 2                      # a red spectrum, then a 20-arcmin beam
    rng = np.random.default_rng(8)
    ra, dec = rng.uniform(0, 60, 400), rng.uniform(-30, 30, 400)
    kw = dict(seed=4, cmb_cl=cl, beam_fwhm_arcmin=20.0, white_noise_uk_arcmin=5.0)
    band = band_needed(_spectrum(lmax, 20.0, None, cl), 30.0, white_cl=(5.0 * ARCMIN_RAD) ** 2)
    assert 0 < band < lmax                            # the cut does something here
    cut = simulate_aperture_temperatures(nside, ra, dec, 30.0, 3, **kw)
    monkeypatch.setattr("pairvel.stats.simcov.TAIL_FRACTION", 0.0)
    monkeypatch.setattr("pairvel.stats.simcov.SYNTHESIS_DTYPE", np.complex128)
    full = simulate_aperture_temperatures(nside, ra, dec, 30.0, 3, **kw)
    ok = np.isfinite(full)
    assert np.array_equal(ok, np.isfinite(cut))
    change = np.mean((cut[ok] - full[ok]) ** 2) / np.mean(full[ok] ** 2)
    assert 0 < change < 2 * TAIL_FRACTION
