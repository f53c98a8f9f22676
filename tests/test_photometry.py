"""Aperture photometry: analytic cases, orderings, partial maps, masks."""

import healpy as hp
import numpy as np
import pytest

from pairvel.errors import InputError, MapError
from pairvel.photometry import (aperture_temperatures, measure_apertures, measure_random_apertures,
                                random_positions_in_footprint)
from pairvel.skymap import SkyMap


def positions(n, seed=0):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-0.9, 0.9, n)))


def test_pixel_area_values():
    # [calc] SCIENCE.md (Gorski et al. 2005): area = pi / (3 nside^2) sr
    arcmin2 = (180 * 60 / np.pi) ** 2
    np.testing.assert_allclose(np.pi / (3 * 2048**2) * arcmin2, 2.95064, rtol=2e-6)
    np.testing.assert_allclose(np.pi / (3 * 4096**2) * arcmin2, 0.737660, rtol=2e-6)
    # computed with healpy
    np.testing.assert_allclose(hp.nside2pixarea(2048) * arcmin2, 2.95064, rtol=2e-6)


def test_constant_and_gradient_give_zero():
    nside = 512
    x, y, z = hp.pix2vec(nside, np.arange(hp.nside2npix(nside)))
    ra, dec = positions(200)
    const = aperture_temperatures(np.full(x.size, 7.0), ra, dec, 20.0)
    np.testing.assert_allclose(const, 0.0, atol=1e-12)  # analytic: a constant cancels exactly
    # analytic: a linear gradient cancels for equal-area disc and annulus.  With ~26 pixels in the
    # disc the pixel centroids sit off the aperture centre, leaving a residual well below the
    # gradient's change across the radius (100 uK x 20'/3438' = 0.58 uK) and averaging to zero.
    grad = aperture_temperatures(100.0 * x, ra, dec, 20.0)
    step = 100.0 * np.radians(20.0 / 60.0)
    assert np.max(np.abs(grad)) < 0.25 * step
    assert abs(np.mean(grad)) < 0.02 * step


def test_gaussian_profile_analytic_value():
    """A Gaussian blob of peak A and width s: the disc mean minus annulus mean is (analytic, flat sky)
    A [2 s^2/theta^2 (1 - e^{-theta^2/2s^2}) - 2 s^2/theta^2 (e^{-theta^2/2s^2} - e^{-theta^2/s^2})]."""
    nside, s_arcmin, theta, amp = 2048, 1.5, 3.0, 10.0
    ra0, dec0 = 40.0, 10.0
    pix = hp.query_disc(nside, hp.ang2vec(ra0, dec0, lonlat=True), np.radians(0.5))
    m = np.zeros(hp.nside2npix(nside))
    cosd = np.dot(np.array(hp.pix2vec(nside, pix)).T, hp.ang2vec(ra0, dec0, lonlat=True))
    d = np.degrees(np.arccos(np.clip(cosd, -1, 1))) * 60
    m[pix] = amp * np.exp(-d**2 / (2 * s_arcmin**2))
    a = theta**2 / (2 * s_arcmin**2)
    expect = amp * (2 * s_arcmin**2 / theta**2) * ((1 - np.exp(-a)) - (np.exp(-a) - np.exp(-2 * a)))
    rng = np.random.default_rng(1)
    # average over sub-pixel offsets of the aperture centre; the pixelised aperture scatters by a few %
    ras, decs = ra0 + rng.uniform(-0.01, 0.01, 50), dec0 + rng.uniform(-0.01, 0.01, 50)
    got = aperture_temperatures(m, ras, decs, theta)
    # the blob is displaced from each aperture centre by < 0.85'; compare the centred average loosely
    np.testing.assert_allclose(aperture_temperatures(m, [ra0], [dec0], theta)[0], expect, rtol=0.06)
    assert np.all(got < expect * 1.1) and np.all(got > 0)


def test_ring_and_nested_agree_and_shapes():
    nside = 256
    m = np.random.default_rng(2).normal(size=hp.nside2npix(nside))
    ra, dec = positions(100, 3)
    ring = aperture_temperatures(m, ra, dec, [30.0, 45.0])
    nest = aperture_temperatures(hp.reorder(m, r2n=True), ra, dec, [30.0, 45.0], nest=True)
    assert ring.shape == (2, 100)
    np.testing.assert_allclose(ring, nest, rtol=1e-12)  # analytic: same pixels, same values


def test_full_and_partial_map_agree_and_masked_pixels_excluded():
    nside = 256
    m = np.random.default_rng(4).normal(size=hp.nside2npix(nside))
    ra, dec = np.array([10.0, 12.0]), np.array([5.0, 6.0])
    held = hp.query_disc(nside, hp.ang2vec(11.0, 5.5, lonlat=True), np.radians(8))
    full = SkyMap.from_array(m)
    part = SkyMap(nside, False, np.sort(held), m[np.sort(held)], np.ones(held.size, np.float32))
    a = measure_apertures(full, ra, dec, 40.0)
    b = measure_apertures(part, ra, dec, 40.0)
    np.testing.assert_allclose(a.temperatures, b.temperatures, rtol=1e-12)
    # mask the central pixel of the first aperture: it drops out of the disc mean, fraction counted
    m2 = m.copy()
    cpix = hp.ang2pix(nside, 10.0, 5.0, lonlat=True)
    m2[cpix] = hp.UNSEEN
    c = measure_apertures(SkyMap.from_array(m2), ra, dec, 40.0, max_masked_fraction=0.0)
    assert c.masked_fraction_disc[0, 0] == pytest.approx(1.0 / a.n_pixels_disc[0, 0])
    assert not c.usable[0] and c.usable[1]


def test_outside_partial_coverage_is_unusable():
    nside = 256
    held = np.arange(1000)
    part = SkyMap(nside, False, held, np.zeros(1000), np.ones(1000, np.float32))
    res = measure_apertures(part, [200.0], [-30.0], 30.0)
    assert not res.usable[0] and np.isnan(res.temperatures[0, 0])


def test_random_positions_stay_on_usable_pixels():
    nside = 256
    held = np.sort(hp.query_disc(nside, hp.ang2vec(50, 0, lonlat=True), np.radians(10)))
    part = SkyMap(nside, False, held, np.random.default_rng(0).normal(size=held.size), np.ones(held.size, np.float32))
    ra, dec = random_positions_in_footprint(part, 2000, seed=1)
    assert np.isin(hp.ang2pix(nside, ra, dec, lonlat=True), held).all()
    ra, dec, t = measure_random_apertures(part, 300, 30.0, seed=2, max_masked_fraction=0.0)
    assert t.shape == (1, 300) and np.all(np.isfinite(t))
    with pytest.raises(MapError, match="no usable pixels"):
        random_positions_in_footprint(SkyMap(nside, False, held, np.zeros(held.size), np.zeros(held.size)), 5)


def test_bad_positions_and_radii():
    m = np.zeros(12 * 64**2)
    with pytest.raises(InputError, match=r"\|dec\| <= 90 degrees; 1 are not \(first: row 1\)"):
        aperture_temperatures(m, [0.0, 1.0], [0.0, 95.0], 10.0)
    with pytest.raises(InputError, match="aperture radii must be positive"):
        aperture_temperatures(m, [0.0], [0.0], -1.0)
