"""Harmonic methods of CarMap (filtered, synthesise, pixel_window) and what runs on them."""

import math

import healpy as hp
import numpy as np
import pytest

from pairvel.core.errors import MapError
from pairvel.maps.car import CarMap, box_wcs
from pairvel.maps.harmonics import alm_ell_m, gaussian_beam
from pairvel.maps.skymap import remove_monopole_dipole


def _alm(lmax, seed):
    rng = np.random.default_rng(seed)
    n = (lmax + 1) * (lmax + 2) // 2
    alm = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    alm[: lmax + 1] = alm[: lmax + 1].real
    return alm


def _empty(lon, lat, arcmin):
    wcs, shape = box_wcs(lon, lat, arcmin)
    return CarMap(wcs, shape, None, np.zeros(shape[0] * shape[1]))


def test_synthesis_on_a_support_equals_the_whole_image():
    whole = _empty((-10, 10), (-6, 6), 12.0)
    alm = _alm(60, 1)
    image = whole.synthesise(alm, lmax=60, n_threads=1)
    support = whole.aperture_support([3.0, -7.0], [1.0, -4.0], 60.0)
    assert 0 < support.n_held < whole.n_held
    # internal equivalence: the rows of the support only vs every row
    np.testing.assert_allclose(support.synthesise(alm, lmax=60, n_threads=1), image[support.held_pixels()], atol=1e-11)


def test_synthesis_follows_the_wcs_longitudes():
    patch = _empty((100, 160), (30, 80), 30.0)
    lmax = 8
    alm = _alm(lmax, 2)
    lon, lat = patch.pixel_lonlat(np.arange(patch.n_held))
    ref = hp.get_interp_val(hp.alm2map(alm, 1024, lmax=lmax), lon, lat, lonlat=True)
    # reference: healpy alm2map at nside 1024, interpolated (error ~1e-4 of the field for l <= 8)
    np.testing.assert_allclose(patch.synthesise(alm, lmax=lmax, n_threads=1), ref, atol=1e-3 * np.abs(ref).max())


def test_full_sky_filtered_is_exact_and_keeps_dtype():
    sky = _empty((0, 360), (-90, 90), 120.0)  # 90 x 180, rows half a pixel from the poles (Fejer-1)
    lmax = 40
    alm = _alm(lmax, 3)
    values = sky.synthesise(alm, lmax=lmax, n_threads=1).astype(np.float32)
    beam = gaussian_beam(300.0, lmax)
    out = sky.with_values(values).filtered(beam, n_iter=0)
    assert out.values.dtype == np.float32
    smooth = alm * beam[alm_ell_m(lmax)[0]]
    # analytic: a band-limited map on an exact quadrature grid; float32 rounding of the input
    np.testing.assert_allclose(out.values, sky.synthesise(smooth, lmax=lmax, n_threads=1), atol=2e-5 * np.abs(values).max())


def test_filtered_partial_map_fills_holes_with_the_mean():
    patch = _empty((-10, 10), (-5, 5), 15.0)
    values = np.full(patch.n_held, 4.0)
    weight = np.ones(patch.n_held, np.float32)
    weight[::7] = 0.0
    values[::7] = 1e6  # masked: must not count
    out = patch.with_values(values, weight=weight).filtered(np.full(101, 0.25), n_iter=1)
    # analytic: the mean fill makes the sphere constant, whose only mode is l = 0
    np.testing.assert_allclose(out.values, 1.0, atol=1e-8)


def test_pixel_window_of_square_pixels():
    patch = _empty((-5, 5), (-2, 2), 6.0)
    p = patch.pixel_window(2000)
    a = math.radians(0.1)
    # analytic small-l expansion of an a x a pixel: 1 - l^2 a^2 / 24
    assert p[0] == 1.0
    assert p[30] == pytest.approx(1 - 30 ** 2 * a * a / 24, abs=1e-6)
    assert 0.5 < p[2000] < 1.0


def test_monopole_dipole_removal_on_a_partial_car_map():
    patch = _empty((20, 80), (-30, 40), 30.0)
    vec = patch.pixel_vectors(np.arange(patch.n_held))
    values = 7.0 + vec @ np.array([3.0, -2.0, 5.0])
    cleaned, coef = remove_monopole_dipole(patch.with_values(values))
    # analytic: an exact monopole + dipole is fitted exactly
    np.testing.assert_allclose(coef, [7.0, 3.0, -2.0, 5.0], atol=1e-9)
    np.testing.assert_allclose(cleaned.values, 0.0, atol=1e-9)


def test_transforms_need_a_whole_number_of_columns_around_the_sphere():
    wcs, shape = box_wcs((-5, 5), (-2, 2), 6.0)
    wcs.wcs.cdelt[0] = -0.07  # 360 / 0.07 is not whole
    wcs.wcs.set()
    bad = CarMap(wcs, shape, None, np.zeros(shape[0] * shape[1]), path="odd.fits")
    with pytest.raises(MapError, match="map odd.fits: harmonic transforms need the longitude step"):
        bad.synthesise(_alm(4, 0), lmax=4)
