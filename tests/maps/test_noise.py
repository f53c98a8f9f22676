"""Aperture noise variance from an inverse-variance map, against Monte Carlo white noise; tracer weights."""

import healpy as hp
import numpy as np
import pytest

from pairvel.core.errors import InputError, MapError
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.noise import (SKY_VARIANCE_FLOOR, aperture_noise_variance, noise_weights, pixel_variance,
                                read_noise_map, sky_variance)
from pairvel.maps.photometry import measure_apertures

NSIDE = 256
RADIUS_ARCMIN = 30.0  # about 15 pixel centres in the disc and in the annulus at nside 256


def _ivar_map(seed=1):
    """An inverse variance (1/uK^2) that varies by ~20 in sigma^2 with declination and by 10 from pixel to pixel."""
    rng = np.random.default_rng(seed)
    npix = hp.nside2npix(NSIDE)
    _, dec = hp.pix2ang(NSIDE, np.arange(npix), lonlat=True)
    sigma = 10.0 * (1.0 + 3.5 * np.sin(np.radians(dec)) ** 2) * np.sqrt(rng.uniform(0.3, 3.0, npix))
    return 1.0 / sigma**2


def _tracers():
    """Centres of the nside-16 pixels away from the poles: 3.7 degrees apart, so the apertures never overlap."""
    ra, dec = hp.pix2ang(16, np.arange(hp.nside2npix(16)), lonlat=True)
    keep = np.abs(dec) < 80
    return ra[keep], dec[keep]


@pytest.mark.parametrize("weighting", ["centre", "fraction"])
def test_aperture_noise_variance_matches_monte_carlo(weighting):
    ivar = _ivar_map()
    sky = HealpixMap.from_array(np.zeros(ivar.size))
    var = pixel_variance(HealpixMap.from_array(ivar), sky, kind="ivar")
    ra, dec = _tracers()
    predicted = aperture_noise_variance(sky, var, ra, dec, [RADIUS_ARCMIN], pixel_weighting=weighting)[0]
    rng = np.random.default_rng(7)
    z = []
    for _ in range(4):  # white noise of that ivar, measured by the photometry itself
        noisy = sky.with_values(rng.standard_normal(ivar.size) / np.sqrt(ivar))
        t = measure_apertures(noisy, ra, dec, RADIUS_ARCMIN, pixel_weighting=weighting).temperatures[0]
        z.append(t / np.sqrt(predicted))
    z = np.array(z)
    quiet = predicted < np.median(predicted)
    assert predicted[~quiet].mean() > 5 * predicted[quiet].mean()  # the test spans a wide range of depth
    for part in (quiet, ~quiet):
        zz = z[:, part].ravel()  # ~5900 independent apertures: var(z) known to sqrt(2/5900) = 1.8%
        if weighting == "centre":
            # analytic: exact for whole pixels; 4 sigma of the Monte Carlo scatter
            assert np.var(zz) == pytest.approx(1.0, abs=0.075)
        else:
            # analytic: an upper bound for fractional memberships (a^2 <= a, cross term dropped); with ~15
            # pixels per disc the ramp's edge pixels are a large share, and the bound overestimates by
            # ~1/0.64 (internal regression, measured 2026-12-05)
            assert 0.55 < np.var(zz) < 1.0 + 0.075


def test_holes_give_infinite_variance_and_zero_weight():
    ivar = _ivar_map()
    ra, dec = _tracers()
    vec = hp.ang2vec(ra[0], dec[0], lonlat=True)
    ivar[hp.query_disc(NSIDE, vec, np.radians(RADIUS_ARCMIN / 60) * 0.5)] = 0.0  # a hole inside the first disc
    sky = HealpixMap.from_array(np.zeros(ivar.size))
    var = pixel_variance(HealpixMap.from_array(ivar), sky, kind="ivar")
    nv = aperture_noise_variance(sky, var, ra[:3], dec[:3], [RADIUS_ARCMIN])[0]
    assert np.isinf(nv[0]) and np.all(np.isfinite(nv[1:]))
    w = noise_weights(nv, 1.0)
    assert w[0] == 0.0 and w[1:].mean() == pytest.approx(1.5)  # analytic: mean 1 over all three


def test_hits_give_rms_squared_over_hits():
    hits = np.full(hp.nside2npix(16), 4.0)
    sky = HealpixMap.from_array(np.zeros(hits.size))
    var = pixel_variance(HealpixMap.from_array(hits), sky, kind="hits", hit_rms_uk=30.0)
    assert var == pytest.approx(np.full(hits.size, 225.0), rel=1e-12)  # analytic: 30^2 / 4
    with pytest.raises(InputError, match="noise.hit_rms_uk"):
        pixel_variance(HealpixMap.from_array(hits), sky, kind="hits")


def test_sky_variance_and_weights():
    rng = np.random.default_rng(3)
    noise_var = rng.uniform(1.0, 50.0, 20000)
    t = rng.normal(0.0, np.sqrt(100.0 + noise_var))
    assert sky_variance(t, noise_var) == pytest.approx(100.0, rel=0.05)  # analytic: the injected sky variance
    assert sky_variance(np.zeros(3) + [0, 1, 2], [10.0, 10.0, 10.0]) == pytest.approx(SKY_VARIANCE_FLOOR)  # floor
    w = noise_weights(noise_var, 100.0)
    assert w.mean() == pytest.approx(1.0, rel=1e-12)
    assert w[np.argmin(noise_var)] / w[np.argmax(noise_var)] == pytest.approx(150.0 / 101.0, rel=0.01)


def test_sky_variance_likelihood_beats_the_moment_estimate_under_strongly_varying_noise():
    # noise variance spanning 1-20 times the sky's, as on striped-depth maps: the likelihood estimate
    # stays unbiased and scatters far less than Var(T) - <noise variance> (injected truth: 100 uK^2)
    rng = np.random.default_rng(11)
    ml, moment = [], []
    for _ in range(20):
        noise_var = 100.0 * 20.0 ** rng.uniform(0.0, 1.0, 5000)  # floor 5% of Var T ~ 37, below the truth
        t = 7.0 + rng.normal(0.0, np.sqrt(100.0 + noise_var))
        ml.append(sky_variance(t, noise_var))
        moment.append(np.var(t, ddof=1) - noise_var.mean())
    assert np.mean(ml) == pytest.approx(100.0, abs=3 * np.std(ml) / np.sqrt(20))  # unbiased within 3 standard errors
    assert np.std(ml) < 0.5 * np.std(moment)


def test_read_noise_map_checks_values_and_grid(tmp_path):
    ivar = np.full(hp.nside2npix(16), 0.5)
    ivar[3] = -1.0
    hp.write_map(str(tmp_path / "bad.fits"), ivar, coord="C")
    with pytest.raises(MapError, match="must be >= 0; 1 pixels"):
        read_noise_map(tmp_path / "bad.fits", kind="ivar")
    ivar[3] = 0.5
    hp.write_map(str(tmp_path / "ok.fits"), ivar, coord="C")
    noise = read_noise_map(tmp_path / "ok.fits", kind="ivar")
    with pytest.raises(MapError, match="has nside 16 but the map has nside 32"):
        pixel_variance(noise, HealpixMap.from_array(np.zeros(hp.nside2npix(32))), kind="ivar")


def test_simulated_skies_draw_the_noise_map():
    """noise.in_simulations: simulated skies of white noise alone carry the noise map's aperture variance."""
    from pairvel.stats.simcov import simulate_aperture_temperatures

    ivar = _ivar_map()
    sky = HealpixMap.from_array(np.zeros(ivar.size))
    var = pixel_variance(HealpixMap.from_array(ivar), sky, kind="ivar")
    ra, dec = _tracers()
    ra, dec = ra[::6], dec[::6]
    sims = simulate_aperture_temperatures(sky, ra, dec, RADIUS_ARCMIN, 60, seed=5, pixel_noise_variance=sky.with_values(var))
    predicted = aperture_noise_variance(sky, var, ra, dec, [RADIUS_ARCMIN])[0]
    z2 = (sims**2 / predicted).ravel()  # 60 x ~500 draws: mean known to sqrt(2 / 30000) = 0.8%
    assert z2.mean() == pytest.approx(1.0, abs=0.035)  # analytic: exact for centre weighting; ~4 sigma
