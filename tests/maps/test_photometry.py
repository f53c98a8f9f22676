"""Compensated aperture photometry: analytic cases, a healpy brute force, orderings, partial maps, masks."""

import healpy as hp
import numpy as np
import pytest

from pairvel.core.errors import InputError, MapError, PairvelWarning
from pairvel.maps.healpix import HealpixMap, aperture_temperatures
from pairvel.maps.photometry import measure_apertures, measure_random_apertures, random_positions_in_footprint

ARCMIN = np.radians(1.0 / 60.0)


def sky_positions(n, seed=0, max_abs_sin_dec=0.9):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-max_abs_sin_dec, max_abs_sin_dec, n)))


def patch_map(nside, ra0, dec0, radius_deg, func, *, nest=False):
    """Partial map of a cap, values func(unit vectors of the pixel centres)."""
    pix = hp.query_disc(nside, hp.ang2vec(ra0, dec0, lonlat=True), np.radians(radius_deg), nest=nest)
    pix = np.sort(pix)
    vec = np.array(hp.pix2vec(nside, pix, nest=nest)).T
    return HealpixMap(nside, nest, pix, func(vec))


def brute_force(m, ra, dec, theta_arcmin, nest=False):
    """Disc mean minus annulus mean with two healpy.query_disc calls per position (reference)."""
    nside = hp.npix2nside(m.size)
    out, f_disc, f_ann = [], [], []
    for r, d in zip(ra, dec):
        v = hp.ang2vec(r, d, lonlat=True)
        disc = hp.query_disc(nside, v, theta_arcmin * ARCMIN, nest=nest)
        outer = hp.query_disc(nside, v, np.sqrt(2) * theta_arcmin * ARCMIN, nest=nest)
        ann = np.setdiff1d(outer, disc)
        good_d = disc[m[disc] != hp.UNSEEN]
        good_a = ann[m[ann] != hp.UNSEEN]
        out.append(m[good_d].mean() - m[good_a].mean())
        f_disc.append(1 - good_d.size / disc.size)
        f_ann.append(1 - good_a.size / ann.size)
    return np.array(out), np.array(f_disc), np.array(f_ann)


def test_pixel_area_of_skymap():
    for nside, ref in ((2048, 2.95064), (4096, 0.737660)):
        sm = HealpixMap(nside, False, np.array([0, 1]), np.zeros(2))
        # [calc] SCIENCE.md: pi / (3 nside^2) sr (Gorski et al. 2005, ApJ 622, 759)
        assert sm.pixel_area_arcmin2 == pytest.approx(ref, rel=2e-6)
        # computed with healpy
        assert sm.pixel_area_arcmin2 == pytest.approx(hp.nside2pixarea(nside, degrees=True) * 3600, rel=1e-12)


def test_matches_healpy_brute_force_with_masked_pixels():
    nside = 256
    m = np.random.default_rng(1).normal(size=hp.nside2npix(nside))
    ra, dec = sky_positions(60, 2)
    hole = np.random.default_rng(3).random(m.size) < 0.15
    m[hole] = hp.UNSEEN
    res = measure_apertures(HealpixMap.from_array(m), ra, dec, 40.0, max_masked_fraction=1.0)
    ref, f_disc, f_ann = brute_force(m, ra, dec, 40.0)  # computed with healpy.query_disc
    np.testing.assert_allclose(res.temperatures[0], ref, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(res.masked_fraction_disc[0], f_disc, rtol=1e-12)
    np.testing.assert_allclose(res.masked_fraction_annulus[0], f_ann, rtol=1e-12)
    assert 0.05 < f_disc.mean() < 0.25  # the test exercises masking


def test_constant_map_gives_zero_full_and_partial():
    ra, dec = sky_positions(200, 4)
    # analytic: a constant cancels between two means
    np.testing.assert_allclose(aperture_temperatures(np.full(12 * 256**2, 7.0), ra, dec, 20.0), 0.0, atol=1e-12)
    part = patch_map(1024, 80.0, 10.0, 2.0, lambda v: np.full(len(v), -3.5, dtype=np.float32))
    res = measure_apertures(part, 80 + np.linspace(-1, 1, 20), 10 + np.linspace(-1, 1, 20), [5.0, 10.0])
    np.testing.assert_allclose(res.temperatures, 0.0, atol=1e-12)
    assert res.usable.all()


def test_linear_gradient_gives_zero_up_to_pixelisation():
    """T = 100 + 1000 z (z the Cartesian axis) near the equator: a linear gradient across the aperture.

    analytic: equal-area disc and annulus cancel a linear gradient (the spherical correction is
    z_t (1 - cos sqrt2 theta)/2 ~ 0 at z_t ~ 0).  What is left is pixelisation: the pixel-centre
    centroids of disc and annulus sit off the aperture centre by a fraction of a pixel, a scatter that
    averages to zero.  Tolerances below are in units of the change across one radius, 1000 theta.
    """
    theta = 3.0
    step = 1000 * theta * ARCMIN
    rng = np.random.default_rng(5)
    ra, dec = 30 + rng.uniform(-0.5, 0.5, 300), rng.uniform(-0.5, 0.5, 300)
    sm = patch_map(8192, 30.0, 0.0, 1.0, lambda v: 100 + 1000 * v[:, 2])
    t = measure_apertures(sm, ra, dec, theta).temperatures[0]
    assert np.max(np.abs(t)) < 0.1 * step  # pixel 0.43', ~150 pixel centres per disc
    assert abs(np.mean(t)) < 0.005 * step
    # the same field at nside 2048 scatters more but still averages to zero
    t2 = measure_apertures(patch_map(2048, 30.0, 0.0, 1.0, lambda v: 100 + 1000 * v[:, 2]), ra, dec, theta)
    assert abs(np.mean(t2.temperatures[0])) < 0.03 * step


@pytest.mark.parametrize("nside, rtol_each, rtol_mean", [(2048, 0.25, 0.02), (8192, 0.03, 0.005)])
def test_gaussian_profile_matches_flat_sky_value(nside, rtol_each, rtol_mean):
    """A Gaussian A exp(-r^2 / 2 s^2) centred on each tracer, s = 1.5', theta = 3'.

    analytic (flat sky): disc mean (2 s^2/theta^2)(1 - e^-a), annulus mean (2 s^2/theta^2)(e^-a - e^-2a),
    a = theta^2 / (2 s^2), so T_AP = A (2 s^2/theta^2)(1 - e^-a)^2 = 0.373823 A.  The pixelised
    aperture scatters around it (about 15% at nside 2048 where the disc holds ~10 pixel centres).
    """
    s, theta, amp = 1.5, 3.0, 10.0
    a = theta**2 / (2 * s**2)
    expect = amp * (2 * s**2 / theta**2) * (1 - np.exp(-a)) ** 2
    assert expect == pytest.approx(3.738225, rel=1e-6)  # analytic value of the formula above
    rng = np.random.default_rng(6)
    ra = np.repeat(20.0 + np.arange(8), 8) + rng.uniform(-0.1, 0.1, 64)
    dec = np.tile(-4.0 + np.arange(8), 8) + rng.uniform(-0.1, 0.1, 64)
    vt = hp.ang2vec(ra, dec, lonlat=True)
    pix, val = [], []
    for k in range(ra.size):  # blobs 1 degree apart do not overlap
        p = hp.query_disc(nside, vt[k], np.radians(0.2))
        d = 2 * np.arcsin(np.linalg.norm(np.array(hp.pix2vec(nside, p)).T - vt[k], axis=1) / 2) / ARCMIN
        pix.append(p)
        val.append(amp * np.exp(-(d**2) / (2 * s**2)))
    pix, val = np.concatenate(pix), np.concatenate(val)
    order = np.argsort(pix)
    t = measure_apertures(HealpixMap(nside, False, pix[order], val[order]), ra, dec, theta).temperatures[0]
    np.testing.assert_allclose(t, expect, rtol=rtol_each)
    assert np.mean(t) == pytest.approx(expect, rel=rtol_mean)


def test_ring_and_nested_agree_and_output_shapes():
    nside = 256
    m = np.random.default_rng(7).normal(size=hp.nside2npix(nside))
    ra, dec = sky_positions(100, 8)
    ring = aperture_temperatures(m, ra, dec, [30.0, 45.0])
    nest = aperture_temperatures(hp.reorder(m, r2n=True), ra, dec, [30.0, 45.0], nest=True)
    assert ring.shape == (2, 100) and aperture_temperatures(m, ra, dec, 30.0).shape == (100,)
    np.testing.assert_allclose(ring, nest, rtol=1e-12, atol=1e-14)  # analytic: same pixels, same values
    np.testing.assert_allclose(aperture_temperatures(m, ra, dec, 45.0), ring[1], rtol=1e-12, atol=1e-14)
    part = patch_map(nside, 100.0, 30.0, 5.0, lambda v: v[:, 0] + np.sin(40 * v[:, 1]))
    r0 = measure_apertures(part, [99.0, 101.0], [29.0, 31.0], 30.0)
    r1 = measure_apertures(part.reordered(nest=True), [99.0, 101.0], [29.0, 31.0], 30.0)
    np.testing.assert_allclose(r0.temperatures, r1.temperatures, rtol=1e-12)  # analytic: same pixels


def test_full_and_partial_and_float32_maps_agree():
    nside = 512
    m = np.random.default_rng(9).normal(size=hp.nside2npix(nside))
    ra, dec = np.array([10.0, 12.0, 11.0]), np.array([5.0, 6.0, 4.0])
    held = np.sort(hp.query_disc(nside, hp.ang2vec(11.0, 5.5, lonlat=True), np.radians(4)))
    a = measure_apertures(HealpixMap.from_array(m), ra, dec, [10.0, 25.0])
    b = measure_apertures(HealpixMap(nside, False, held, m[held]), ra, dec, [10.0, 25.0])
    c = measure_apertures(HealpixMap(nside, False, held, m[held].astype(np.float32)), ra, dec, [10.0, 25.0])
    np.testing.assert_allclose(a.temperatures, b.temperatures, rtol=1e-12)  # analytic: same pixels
    np.testing.assert_allclose(c.temperatures, a.temperatures, atol=1e-6)  # float32 rounding of O(1) values
    np.testing.assert_array_equal(a.n_pixels_disc, b.n_pixels_disc)
    assert b.usable.all() and np.all(b.masked_fraction_disc == 0)


def test_mask_exclusion_fractions_and_usability():
    nside = 256
    m = np.random.default_rng(10).normal(size=hp.nside2npix(nside))
    ra, dec = np.array([10.0, 40.0]), np.array([5.0, -20.0])
    clean = measure_apertures(HealpixMap.from_array(m), ra, dec, 40.0)
    cpix = hp.ang2pix(nside, 10.0, 5.0, lonlat=True)  # the centre pixel of the first disc
    weight = np.ones(m.size, np.float32)
    weight[cpix] = 0.0
    masked = measure_apertures(HealpixMap(nside, False, None, m, weight), ra, dec, 40.0, max_masked_fraction=0.0)
    n_disc = clean.n_pixels_disc[0, 0]
    # analytic: one of n_disc pixels masked
    assert masked.masked_fraction_disc[0, 0] == pytest.approx(1.0 / n_disc, rel=1e-12)
    assert masked.masked_fraction_annulus[0, 0] == 0.0
    assert not masked.usable[0] and masked.usable[1]
    # the masked pixel simply drops out of the disc mean (analytic)
    v = hp.ang2vec(10.0, 5.0, lonlat=True)
    disc = hp.query_disc(nside, v, 40 * ARCMIN)
    ann = np.setdiff1d(hp.query_disc(nside, v, np.sqrt(2) * 40 * ARCMIN), disc)
    expect = m[disc[disc != cpix]].mean() - m[ann].mean()
    assert masked.temperatures[0, 0] == pytest.approx(expect, rel=1e-12)
    np.testing.assert_allclose(masked.temperatures[0, 1], clean.temperatures[0, 1], rtol=1e-14)
    # a looser threshold accepts it
    assert measure_apertures(HealpixMap(nside, False, None, m, weight), ra, dec, 40.0).usable.all()


def test_outside_a_partial_map_is_unusable():
    part = HealpixMap(256, False, np.arange(1000), np.zeros(1000))
    res = measure_apertures(part, [200.0], [-30.0], 30.0, max_masked_fraction=1.0)
    assert not res.usable[0] and np.isnan(res.temperatures[0, 0])
    assert res.masked_fraction_disc[0, 0] == 1.0 and res.n_pixels_disc[0, 0] > 0


def test_progress_is_called_to_completion():
    calls = []
    ra, dec = sky_positions(5000, 11)
    measure_apertures(HealpixMap.from_array(np.zeros(12 * 64**2)), ra, dec, 120.0, progress=lambda d, t: calls.append((d, t)))
    assert calls == [(4096, 5000), (5000, 5000)]


def test_random_positions_are_usable_uniform_and_reproducible():
    nside = 256
    sm = patch_map(nside, 50.0, 0.0, 10.0, lambda v: np.random.default_rng(0).normal(size=len(v)))
    ra, dec = random_positions_in_footprint(sm, 4000, seed=1, radius_arcmin=30.0, max_masked_fraction=0.0)
    assert ra.shape == dec.shape == (4000,)
    res = measure_apertures(sm, ra, dec, 30.0, max_masked_fraction=0.0)
    assert res.usable.all()
    # the apertures (outer radius 42') fit inside the 10-degree cap of pixel centres: centres within
    # 10 deg - 42' + half a pixel (0.11 deg at nside 256), and they do reach that edge
    sep = np.degrees(np.arccos(np.clip(hp.ang2vec(ra, dec, lonlat=True) @ hp.ang2vec(50.0, 0.0, lonlat=True), -1, 1)))
    assert 9.0 < sep.max() < 10.0 - 0.7 + 0.25
    # uniform over the allowed cap of radius R ~ 9.4 deg (analytic: cap area fraction), binomial sd 0.008
    r_cap = 9.4
    inner = (1 - np.cos(np.radians(5.0))) / (1 - np.cos(np.radians(r_cap)))
    assert np.mean(sep < 5.0) == pytest.approx(inner, abs=0.03)
    assert abs(np.mean(np.sin(np.radians(ra - 50.0)) > 0) - 0.5) < 0.04
    again = random_positions_in_footprint(sm, 4000, seed=1, radius_arcmin=30.0, max_masked_fraction=0.0)
    np.testing.assert_array_equal(again[0], ra)  # internal regression: same seed, same draws
    ra2, dec2, t = measure_random_apertures(sm, 50, 30.0, seed=2, max_masked_fraction=0.0)
    assert t.shape == (1, 50) and np.all(np.isfinite(t))
    np.testing.assert_allclose(t[0], measure_apertures(sm, ra2, dec2, 30.0).temperatures[0], rtol=1e-12)


def test_random_positions_errors():
    sm = HealpixMap(256, False, np.arange(100), np.zeros(100), np.zeros(100, np.float32))
    with pytest.raises(MapError, match="no usable pixels to place random apertures on"):
        random_positions_in_footprint(sm, 5, seed=0, radius_arcmin=30.0, max_masked_fraction=0.1)
    tiny = patch_map(256, 0.0, 0.0, 0.3, lambda v: np.zeros(len(v)))
    with pytest.raises(MapError, match=r"only 0 of 5 random apertures of 60 arcmin .* too small"):
        random_positions_in_footprint(tiny, 5, seed=0, radius_arcmin=60.0, max_masked_fraction=0.1, max_draws=2000)


def test_bad_positions_radii_and_small_aperture_warning():
    m = np.zeros(12 * 64**2)
    with pytest.raises(InputError, match=r"\|dec\| <= 90 degrees; 1 are not \(first: row 1, ra=1.0, dec=95.0\)"):
        aperture_temperatures(m, [0.0, 1.0], [0.0, 95.0], 10.0)
    with pytest.raises(InputError, match=r"radius_arcmin must be positive and at most 600 arcmin .*; got -1.0"):
        aperture_temperatures(m, [0.0], [0.0], -1.0)
    with pytest.raises(InputError, match=r"ra_deg and dec_deg must be 1-D arrays of equal length"):
        aperture_temperatures(m, [0.0, 1.0], [0.0], 10.0)
    with pytest.raises(InputError, match=r"max_masked_fraction must be a number in \[0, 1\]; got 1.5"):
        measure_apertures(HealpixMap.from_array(m), [0.0], [0.0], 100.0, max_masked_fraction=1.5)
    with pytest.raises(MapError, match=r"hpx_map must be a 1-D full-sky HEALPix array"):
        aperture_temperatures(np.zeros(1000), [0.0], [0.0], 10.0)
    with pytest.warns(PairvelWarning, match=r"aperture radius 10 arcmin holds only ~0.1 pixel centres at nside 64"):
        measure_apertures(HealpixMap.from_array(m), [0.0], [0.0], 10.0)


@pytest.mark.parametrize("weighting", ["centre", "fraction"])
def test_drop_reasons_tell_pixelisation_footprint_and_mask_apart(weighting):
    """Analytic cases on a partial nside-64 map (pixels ~55 arcmin) with one masked pixel block."""
    m = patch_map(64, 40.0, 0.0, 12.0, lambda v: np.zeros(len(v)))
    lon, lat = hp.pix2ang(64, m.pixels, lonlat=True)
    weight = np.where(np.hypot(lon - 35.0, lat) < 3.0, 0.0, 1.0).astype(np.float32)  # a 3-degree hole
    m = m.with_values(m.values, weight=weight)
    ra = np.array([44.0, 35.0, 70.0, 40.5, 40.0])
    dec = np.array([0.0, 0.0, 0.0, 11.5, 0.0])
    res = measure_apertures(m, ra, dec, [90.0], max_masked_fraction=0.1, pixel_weighting=weighting)
    # inside and clear; in the hole; 30 degrees away from a 12-degree patch; astride the patch edge
    assert list(res.drop_reason[:4]) == ["", "masked", "outside the map", "outside the map"]
    assert np.array_equal(res.usable, res.drop_reason == "")
    with pytest.warns(PairvelWarning, match="pixelisation"):  # 5 arcmin on 55 arcmin pixels: discs are empty
        tiny = measure_apertures(m, ra, dec, [90.0, 5.0], max_masked_fraction=0.1, pixel_weighting=weighting)
    empty = (tiny.n_pixels_disc[1] == 0) & ~tiny.usable  # with "fraction", edge pixels can still fill a disc
    assert set(tiny.drop_reason[empty]) == {"too few pixels in the aperture"} and (empty.sum() >= 4 or weighting != "centre")


@pytest.mark.parametrize("theta, fwhm", [(2.1, 1.4), (3.0, 3.0), (12.0, 15.0), (1.0, 6.0)])
def test_point_source_fraction_against_numerical_integration(theta, fwhm):
    """f of point_source_fraction against the disc and annulus integrals of the beam Gaussian done
    numerically with scipy over x, y (a general-purpose library; no use of the radial formula)."""
    from scipy import integrate

    from pairvel.maps.photometry import point_source_fraction

    s = fwhm / np.sqrt(8 * np.log(2))

    def inside(radius):  # integral of the unit-integral Gaussian over |x| < radius, in Cartesian x, y
        gauss = lambda y, x: np.exp(-(x * x + y * y) / (2 * s * s)) / (2 * np.pi * s * s)  # noqa: E731
        half = lambda x: np.sqrt(max(radius * radius - x * x, 0.0))  # noqa: E731
        return integrate.dblquad(gauss, -radius, radius, lambda x: -half(x), half, epsabs=1e-13, epsrel=1e-11)[0]

    disc, outer = inside(theta), inside(np.sqrt(2) * theta)
    area = np.pi * theta**2  # disc and annulus have the same area
    numerical = (disc / area - (outer - disc) / area) * area  # T_AP times pi theta^2 for a unit integral
    assert point_source_fraction(theta, fwhm) == pytest.approx(numerical, rel=1e-7)


def test_point_source_fraction_limits_and_errors():
    from pairvel.maps.photometry import point_source_fraction

    assert point_source_fraction(2.0, 0.0) == 1.0  # analytic: a point inside the disc
    assert point_source_fraction(2.1, 1.4) == pytest.approx(0.99610, abs=1e-5)  # analytic (1 - e^-6.24)^2
    assert point_source_fraction(1.0, 60.0) < 1e-4  # a beam far wider than the aperture: almost nothing left
    with pytest.raises(InputError, match="beam FWHM >= 0"):
        point_source_fraction(2.0, -1.0)
