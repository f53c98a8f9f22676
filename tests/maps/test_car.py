"""Rectangular-pixel (cylindrical WCS) maps: grid geometry, aperture sums, positions, and agreement
with HEALPix on the same analytic sky."""

import math

import healpy as hp
import numpy as np
import pytest
from astropy.wcs import WCS

from pairvel.core.constants import ARCMIN_RAD
from pairvel.core.errors import MapError
from pairvel.maps.car import CarMap, box_wcs
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.photometry import MASKED, OUTSIDE_MAP, measure_apertures, point_source_fraction
from pairvel.maps.sources import paint_beam_sources


def car_wcs(ctype=("RA---CAR", "DEC--CAR"), crval=(0.0, 0.0), cdelt=(-1.0, 1.0), crpix=(180.5, 90.5), pv=None):
    w = WCS(naxis=2)
    w.wcs.ctype = list(ctype)
    w.wcs.crval = list(crval)
    w.wcs.cdelt = list(cdelt)
    w.wcs.crpix = list(crpix)
    if pv:
        w.wcs.set_pv(pv)
    return w


# ---------------------------------------------------------------------- geometry
def test_pixel_areas_of_full_sky_grids_sum_to_4pi():
    # analytic: the rows' sin(latitude) edges run from -1 to 1 and the columns cover 2 pi
    half_offset = CarMap.from_image(np.zeros((180, 360)), car_wcs())               # rows centred at -89.5..89.5
    on_poles = CarMap.from_image(np.zeros((181, 360)), car_wcs(crpix=(180.5, 91.0)))  # rows centred on the poles
    w_cea, shape_cea = box_wcs((0, 360), (-90, 90), 60.0, projection="CEA")
    cea = CarMap.from_image(np.zeros(shape_cea), w_cea)
    for m in (half_offset, on_poles, cea):
        assert m.grid.wraps
        assert np.sum(m.grid.row_area_sr) * m.grid.nx == pytest.approx(4 * math.pi, rel=1e-12)
        assert m.usable_fraction() == pytest.approx(1.0, rel=1e-12)
    # one pixel, analytic: |dlon| |sin(lat_hi) - sin(lat_lo)|, here the row 30..31 deg
    assert half_offset.grid.row_area_sr[120] == pytest.approx(
        math.radians(1.0) * (math.sin(math.radians(31)) - math.sin(math.radians(30))), rel=1e-12)
    # the polar rows of the pole-centred grid are half rows: 89.5..90 deg
    assert on_poles.grid.row_area_sr[-1] == pytest.approx(math.radians(1.0) * (1 - math.sin(math.radians(89.5))),
                                                          rel=1e-9)
    # CEA pixels are equal-area (Calabretta & Greisen 2002, section 5.2.2)
    assert np.ptp(cea.grid.row_area_sr) < 1e-12


@pytest.mark.parametrize("kwargs, key", [
    ({"crval": (0.0, 30.0)}, "CRVAL2"),                                    # oblique CAR
    ({"ctype": ("RA---TAN", "DEC--TAN"), "crpix": (10, 10)}, "CTYPE1"),   # not cylindrical
    ({"ctype": ("DEC--CAR", "RA---CAR")}, "CTYPE1"),                      # rows along longitude
    ({"cdelt": (-1.0, 1.0), "crpix": (180.5, 140.0)}, "CRPIX2"),           # rows beyond a pole
])
def test_grids_that_are_not_separable_cylinders_are_refused(kwargs, key):
    with pytest.raises(MapError) as err:
        CarMap.from_image(np.zeros((180, 360)), car_wcs(**kwargs))
    assert err.value.key == key


def test_columns_beyond_native_longitude_180_continue_the_turn():
    # reference pixel in the first column, RA falling to the right: WCSLIB places columns 0..180 only
    corner = CarMap.from_image(np.zeros((180, 360)), car_wcs(crpix=(1.0, 90.5)))
    centred = CarMap.from_image(np.zeros((180, 360)), car_wcs(crval=(180.0, 0.0), crpix=(181.0, 90.5)))
    assert corner.grid.wraps and corner.same_grid(centred)
    assert np.allclose(corner.pixel_lonlat([359])[0], 1.0)  # column 359 at RA -359 = 1 deg


def test_mercator_rows_follow_the_projection():
    # MER: y = ln tan(45 deg + lat / 2) in degrees of arc (Calabretta & Greisen 2002, eq. 84)
    m = CarMap.from_image(np.zeros((100, 360)), car_wcs(ctype=("GLON-MER", "GLAT-MER"), crpix=(180.5, 50.5)))
    y = np.arange(100) + 1 - 50.5
    assert np.allclose(m.grid.lat_deg, np.degrees(2 * np.arctan(np.exp(np.radians(y))) - math.pi / 2), atol=1e-9)
    assert m.coordsys == "G"


# ---------------------------------------------------------------------- aperture sums
def _noisy_box(rng, *, hole=True):
    w, shape = box_wcs((-12, 10), (-8, 9), 1.0)   # crosses RA 0
    img = rng.normal(0, 50, shape)
    if hole:
        img[300:330, 400:460] = np.nan
    return CarMap.from_image(img, w)


def test_kernel_and_numpy_reference_give_the_same_sums():
    rng = np.random.default_rng(4)
    m = _noisy_box(rng)
    n = 250
    ra = np.mod(rng.uniform(-14, 12, n), 360)
    dec = rng.uniform(-10, 11, n)
    scale = rng.uniform(0.7, 1.4, n)  # per-tracer radii, as from a physical radius
    theta = np.array([3.0, 5.0])[:, None] * ARCMIN_RAD * scale[None, :]
    vec = hp.ang2vec(ra, dec, lonlat=True)
    for weighting in ("centre", "fraction"):
        a = m.aperture_sums(vec, theta, math.sqrt(2) * theta, weighting=weighting, method="kernel")
        b = m.aperture_sums(vec, theta, math.sqrt(2) * theta, weighting=weighting, method="direct")
        assert np.allclose(a, b, rtol=1e-10, atol=1e-9), weighting
    # a CEA grid with a column step that does not divide 360 deg, and a map holding only some pixels
    w, shape = box_wcs((20, 31), (50, 62), 0.7, projection="CEA")
    cea = CarMap.from_image(rng.normal(size=shape), w)
    lon, lat = rng.uniform(19, 32, 60), rng.uniform(49, 63, 60)
    support = cea.aperture_support(lon[:30], lat[:30], 6.0)
    held = cea.with_values(cea.values).values_on(support)[0]
    part = support.with_values(held)
    theta = np.full((1, 60), 3.0 * ARCMIN_RAD)
    vec = hp.ang2vec(lon, lat, lonlat=True)
    for m_ in (cea, part):
        a = m_.aperture_sums(vec, theta, math.sqrt(2) * theta, method="kernel")
        b = m_.aperture_sums(vec, theta, math.sqrt(2) * theta, method="direct")
        assert np.allclose(a, b, rtol=1e-10, atol=1e-9)
    assert not np.allclose(cea.aperture_sums(vec, theta, math.sqrt(2) * theta)[1],
                           part.aperture_sums(vec, theta, math.sqrt(2) * theta)[1])  # the support holds fewer
    # full-sky grid: across the longitude seam and around a pole
    w, shape = box_wcs((0, 360), (-90, 90), 20.0)
    sky = CarMap.from_image(rng.normal(size=shape), w)
    lon = np.concatenate([rng.uniform(-0.5, 0.5, 40) % 360, rng.uniform(0, 360, 40)])
    lat = np.concatenate([rng.uniform(-80, 80, 40), rng.uniform(88.5, 90, 40)])
    theta = np.full((1, 80), 40.0 * ARCMIN_RAD)
    vec = hp.ang2vec(lon, lat, lonlat=True)
    a = sky.aperture_sums(vec, theta, math.sqrt(2) * theta, method="kernel")
    b = sky.aperture_sums(vec, theta, math.sqrt(2) * theta, method="direct")
    assert np.allclose(a, b, rtol=1e-10, atol=1e-9)


def test_region_areas_are_the_cap_areas():
    # analytic: a cap of radius t has solid angle 2 pi (1 - cos t); the first and fourth sums are the
    # disc and annulus areas in mean pixels.  Sub-pixel weighting gets them to a few 1e-3 even at
    # the pole, where CAR pixels are slivers; whole pixels to the edge term (~ perimeter x pixel).
    w, shape = box_wcs((0, 360), (-90, 90), 6.0)
    sky = CarMap.from_image(np.zeros(shape), w)
    lon, lat = np.array([10.0, 100.0, 200.0]), np.array([0.0, 60.0, 89.9])
    t = 1.5 * math.pi / 180
    theta = np.full((1, 3), t)
    vec = hp.ang2vec(lon, lat, lonlat=True)
    cap = 2 * math.pi * (1 - math.cos(t))
    cap2 = 2 * math.pi * (1 - math.cos(math.sqrt(2) * t))
    for weighting, tol in (("subsample", 0.004), ("fraction", 0.02), ("centre", 0.05)):
        s = sky.aperture_sums(vec, theta, math.sqrt(2) * theta, weighting=weighting, method="direct",
                              subsample_level=4) * sky.pixel_area_sr
        assert np.allclose(s[0, 0], cap, rtol=tol), weighting
        assert np.allclose(s[3, 0], cap2 - cap, rtol=tol), weighting


def test_constant_map_cancels_and_apertures_off_the_map_are_dropped():
    rng = np.random.default_rng(5)
    m = _noisy_box(rng)
    m = CarMap(m.wcs, m.shape, None, np.where(m.weight > 0, 7.0, np.nan))  # 7 uK everywhere but the NaN hole
    inside = (np.array([0.5, 5.0, 355.0]), np.array([0.0, -5.0, 5.0]))
    off = (np.array([11.5, 30.0]), np.array([0.0, 0.0]))       # half off the east edge; far outside
    hole = (np.array([2.83]), np.array([-2.75]))  # the NaN patch: rows 300-330 (lat -8 + y/60), columns 400-460 (lon 10 - x/60)
    ra = np.concatenate([inside[0], off[0], hole[0]])
    dec = np.concatenate([inside[1], off[1], hole[1]])
    res = measure_apertures(m, ra, dec, [2.0, 3.0])
    assert np.allclose(res.temperatures[:, :3], 0.0, atol=1e-9)
    assert list(res.drop_reason) == ["", "", "", OUTSIDE_MAP, OUTSIDE_MAP, OUTSIDE_MAP]
    # a zero-weight (masked) patch is "masked", not "outside"
    weight = np.ones(m.values.size, np.float32)
    weight[np.abs(m.pixel_lonlat(np.arange(m.values.size))[1] - 5.0) < 0.2] = 0.0
    res = measure_apertures(m.with_values(m.values, weight=weight), [5.0], [5.0], 2.0)
    assert list(res.drop_reason) == [MASKED]


def test_galactic_grid_sees_tracers_given_in_equatorial_coordinates():
    w, shape = box_wcs((100, 104), (-2, 2), 0.25, frame="G")
    grid = CarMap.from_image(np.zeros(shape), w)
    ra, dec = grid.to_equatorial(np.array([101.0, 102.5]), np.array([0.5, -1.0]))
    fwhm, theta = 1.5, 2.0
    amp = 50.0 * math.pi * (theta * ARCMIN_RAD) ** 2
    sky = grid.source_map([101.0, 102.5], [0.5, -1.0], np.full(2, amp), fwhm_arcmin=fwhm)
    res = measure_apertures(sky, ra, dec, theta, pixel_weighting="subsample")
    deltas = grid.source_map([101.0, 102.5, 150.0], [0.5, -1.0, 0.0], [3.0, 4.0, 5.0])  # the last off the grid
    assert np.flatnonzero(deltas.values).tolist() == sorted(grid.grid.pixel_of([101.0, 102.5], [0.5, -1.0]).tolist())
    assert deltas.values.sum() == 7.0
    # analytic: T_AP = f Y / (pi theta^2) (photometry.point_source_fraction), to the sampling of the beam
    assert np.allclose(res.temperatures[0], 50.0 * point_source_fraction(theta, fwhm), rtol=0.01)


# ---------------------------------------------------------------------- positions, noise, supports
def test_random_points_are_uniform_on_the_sphere_within_usable_pixels():
    rng = np.random.default_rng(6)
    w, shape = box_wcs((0, 360), (-90, 90), 120.0)
    img = np.zeros(shape)
    img[:, :45] = np.nan                          # a quarter of the longitudes missing
    m = CarMap.from_image(img, w)
    lon, lat = m.random_points(200_000, rng)
    z = np.sin(np.radians(lat))
    # uniform on the sphere: sin(lat) uniform in [-1, 1] [analytic]; binomial 5-sigma tolerances
    for lo, hi in ((-1.0, -0.9), (-0.2, 0.2), (0.95, 1.0)):
        p = (hi - lo) / 2
        assert abs(np.mean((z > lo) & (z <= hi)) - p) < 5 * math.sqrt(p * (1 - p) / z.size)
    assert np.all(m.weight[m.grid.pixel_of(lon, lat)] > 0)
    assert m.usable_fraction() == pytest.approx(0.75, rel=1e-12)


def test_white_noise_follows_each_pixels_area():
    rng = np.random.default_rng(7)
    w, shape = box_wcs((0, 360), (-90, 90), 60.0)
    m = CarMap.from_image(np.zeros(shape), w)
    noise = m.white_noise(30.0, rng).reshape(shape)
    area_arcmin2 = m.grid.row_area_sr / ARCMIN_RAD ** 2
    ratio = noise.std(axis=1) * np.sqrt(area_arcmin2) / 30.0  # 1 in every row, to sampling (360 pixels a row)
    assert np.all(np.abs(ratio - 1) < 5 / math.sqrt(2 * 360))


def test_aperture_support_holds_exactly_the_pixels_within_the_radius():
    w, shape = box_wcs((-5, 5), (-5, 5), 6.0)
    m = CarMap.from_image(np.zeros(shape), w)
    lon, lat = np.array([0.5, 359.0]), np.array([1.0, -4.8])
    support = m.aperture_support(lon, lat, 40.0)
    every = np.arange(m.values.size)
    v = m.pixel_vectors(every)
    near = np.zeros(every.size, bool)
    for p in hp.ang2vec(lon, lat, lonlat=True):
        near |= np.sum((v - p) ** 2, axis=1) <= (2 * math.sin(20.0 * ARCMIN_RAD)) ** 2
    assert np.array_equal(support.held_pixels(), every[near])
    assert support.same_grid(m) and not support.same_grid(CarMap.from_image(np.zeros((10, 10)), box_wcs((0, 1), (0, 1), 6.0)[0]))


def test_neighbours_wrap_around_a_full_turn():
    w, shape = box_wcs((0, 360), (-90, 90), 300.0)   # 36 rows x 72 columns
    m = CarMap.from_image(np.arange(shape[0] * shape[1], dtype=float).reshape(shape), w)
    values, weight = m.neighbour_values_on(m, np.array([10 * 72 + 0, 0 * 72 + 5]))
    assert set(values[:, 0]) == {9 * 72 + 71, 9 * 72, 9 * 72 + 1, 10 * 72 + 71, 10 * 72 + 1, 11 * 72 + 71, 11 * 72,
                                 11 * 72 + 1}
    assert np.sum(weight[:, 1] > 0) == 5            # the first row has no row below it


# ---------------------------------------------------------------------- agreement with HEALPix
def test_aperture_temperatures_agree_with_healpix_on_the_same_sky():
    """A beam-convolved source field (FWHM 1.5') on a 0.22' CAR grid and at nside 8192 (0.43').

    Tolerances: the mean over 64 sources agrees with the analytic f Y / (pi theta^2) to 0.5%
    (measured 0.07% on CAR, 0.03% on HEALPix, 2026-12-05); per source the two grids differ by the
    pixel-edge term of whole pixels, which is dominated by HEALPix's coarser pixels (~29 of them
    along the 2' disc edge): an rms of 2.3% of the signal measured, asserted < 5%; with sub-pixel
    weighting it falls to 0.1%, asserted < 0.5%.
    """
    rng = np.random.default_rng(2)
    gx, gy = np.meshgrid(np.arange(8), np.arange(8))
    n = gx.size
    dec = 39.2 + 0.2 * gy.ravel() + rng.uniform(-0.02, 0.02, n)
    ra = 30.2 + 0.15 * gx.ravel() / np.cos(np.radians(dec)) + rng.uniform(-0.02, 0.02, n)
    fwhm, theta = 1.5, 2.0
    amp = 100.0 * math.pi * (theta * ARCMIN_RAD) ** 2  # uK sr: T_AP = 100 f uK
    w, shape = box_wcs((30, 32), (39, 41), 0.25)
    car = CarMap.from_image(np.zeros(shape), w).source_map(ra, dec, np.full(n, amp), fwhm_arcmin=fwhm)
    nside = 8192
    pix, val = paint_beam_sources(nside, ra, dec, np.full(n, amp), fwhm)
    foot = np.unique(np.concatenate([hp.query_disc(nside, v, math.radians(0.3))
                                     for v in hp.ang2vec(ra, dec, lonlat=True)]))
    values = np.zeros(foot.size)
    values[np.searchsorted(foot, pix)] = val
    hpx = HealpixMap(nside, False, foot, values)
    expected = 100.0 * point_source_fraction(theta, fwhm)
    for weighting, per_source in (("centre", 0.05), ("subsample", 0.005)):
        a = measure_apertures(car, ra, dec, theta, pixel_weighting=weighting).temperatures[0]
        b = measure_apertures(hpx, ra, dec, theta, pixel_weighting=weighting).temperatures[0]
        assert abs(a.mean() / expected - 1) < 0.005 and abs(b.mean() / expected - 1) < 0.005, weighting
        assert np.sqrt(np.mean((a - b) ** 2)) < per_source * expected, weighting


def test_monopole_and_dipole_are_removed_from_a_partial_car_map():
    from pairvel.maps.skymap import remove_monopole_dipole

    w, shape = box_wcs((-60, 80), (-50, 40), 60.0)
    m = CarMap.from_image(np.zeros(shape), w)
    v = m.pixel_vectors(np.arange(m.values.size))
    truth = np.array([3.0, 2.0, -1.5, 0.5])  # analytic: T = a0 + a . n is fitted exactly
    sky = m.with_values(truth[0] + v @ truth[1:])
    cleaned, coef = remove_monopole_dipole(sky)
    assert np.allclose(coef, truth, atol=1e-10) and np.max(np.abs(cleaned.values)) < 1e-10
