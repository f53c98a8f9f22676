"""Harmonic transforms on rectangular (CAR) grids: pairvel.maps.car_sht."""

import math

import healpy as hp
import numpy as np
import pytest
from scipy.special import sph_harm_y

from pairvel.core.errors import MapError
from pairvel.maps.car_sht import (analyse_grid, filtered_grid, grid_pixel_window, pixel_solid_angles,
                                  rectangular_pixel_window, synthesise_pixels,
                                  ring_grid, synthesise_grid)
from pairvel.maps.harmonics import alm_ell_m, gaussian_beam


def _random_alm(lmax, seed):
    rng = np.random.default_rng(seed)
    n = (lmax + 1) * (lmax + 2) // 2
    alm = rng.standard_normal(n) + 1j * rng.standard_normal(n)
    alm[: lmax + 1] = alm[: lmax + 1].real  # m = 0 real
    return alm


def _partial_grid():
    """Dec -30..30 in 1-degree rows (Dec growing with the row), 40 columns from RA 20 deg leftwards."""
    dec = np.arange(-30.0, 30.5, 1.0)
    return ring_grid(np.radians(90.0 - dec), 40, -math.radians(1.0), math.radians(20.0))


@pytest.mark.parametrize("ell,m", [(0, 0), (1, 1), (7, 3), (20, 20), (31, 12)])
def test_single_mode_synthesis_matches_scipy(ell, m):
    grid = _partial_grid()
    lmax = 32
    alm = np.zeros((lmax + 1) * (lmax + 2) // 2, complex)
    ls, ms = alm_ell_m(lmax)
    k = int(np.flatnonzero((ls == ell) & (ms == m))[0])
    alm[k] = 0.3 + 0.7j if m else 0.8
    got = synthesise_grid(alm, grid, lmax=lmax, n_threads=1)
    phi = grid.phi0_rad + np.arange(grid.n_lon) * grid.dlon_rad
    theta, phi = np.meshgrid(grid.theta_rad, phi, indexing="ij")
    # reference: scipy's Y_lm; a real field holds a_lm Y_lm + conj(a_lm Y_lm) for m > 0
    y = alm[k] * sph_harm_y(ell, m, theta, phi)
    want = (2.0 * y.real) if m else y.real
    np.testing.assert_allclose(got, want, rtol=0, atol=1e-10)


@pytest.mark.parametrize("kind", ["F1", "CC"])
def test_analysis_exact_on_full_clenshaw_curtis_and_fejer_grids(kind):
    lmax, n = 40, 48
    theta = (np.arange(n) + 0.5) * math.pi / n if kind == "F1" else np.linspace(math.pi, 0.0, n + 1)  # CC rows reversed
    grid = ring_grid(theta, 96, -2 * math.pi / 96, 0.4)
    alm = _random_alm(lmax, 1)
    back = analyse_grid(synthesise_grid(alm, grid, lmax=lmax, n_threads=1), grid, lmax=lmax, n_threads=1)
    # exact quadrature (ducc0 analysis_2d): rounding only [analytic]
    np.testing.assert_allclose(back, alm, rtol=0, atol=1e-10)


def test_analysis_with_jacobi_iterations_on_an_irregular_full_grid():
    # rows neither CC nor F1 (offset 0.3 of a spacing), so the solid-angle quadrature is approximate
    lmax, n = 50, 128
    grid = ring_grid((np.arange(n) + 0.3) * math.pi / n, 2 * n, 2 * math.pi / (2 * n), 0.0)
    alm = _random_alm(lmax, 2)
    image = synthesise_grid(alm, grid, lmax=lmax, n_threads=1)
    err = [np.abs(analyse_grid(image, grid, lmax=lmax, n_iter=k, n_threads=1) - alm).max() / np.abs(alm).max()
           for k in (0, 3)]
    # Riemann-sum quadrature, error O((l dtheta)^2) ~ 1e-3 here [analytic estimate; measured 8.5e-4];
    # three Jacobi iterations shrink it geometrically [measured 2.3e-8 on 2026-12-05]
    assert err[0] < 5e-3
    assert err[1] < 1e-6


@pytest.mark.parametrize("theta", [np.linspace(0.0, math.pi, 31), (np.arange(30) + 0.5) * math.pi / 30])
def test_solid_angles_tile_the_sphere(theta):
    grid = ring_grid(theta, 60, 2 * math.pi / 60, 0.0)
    # analytic: equally spaced rows whose end rows lie on or half a spacing from the poles cover 4 pi
    assert float(np.sum(pixel_solid_angles(grid)) * grid.n_lon) == pytest.approx(4 * math.pi, rel=1e-12)


def test_filtered_full_sky_matches_healpy_smoothing():
    nside, lmax = 32, 60
    alm = _random_alm(lmax, 3)
    # CC grid with a row on the equator and columns on the pixel centres of HEALPix's equatorial ring
    grid = ring_grid(np.linspace(0.0, math.pi, 2 * lmax + 3), 4 * nside, 2 * math.pi / (4 * nside),
                     math.pi / (4 * nside))
    image = synthesise_grid(alm, grid, lmax=lmax, n_threads=1)
    beam = gaussian_beam(120.0, lmax)
    got = filtered_grid(image, np.ones(image.shape, bool), grid, beam, n_threads=1)
    # reference: healpy.smoothalm + alm2map on the same a_lm, on the equatorial ring (RING order: after
    # the polar cap's 2 nside (nside - 1) pixels and nside rings of 4 nside)
    smooth = hp.alm2map(hp.smoothalm(alm, fwhm=math.radians(2.0), inplace=False), nside, lmax=lmax)
    first = 2 * nside * (nside - 1) + nside * 4 * nside
    ring = smooth[first: first + 4 * nside]
    theta, phi = hp.pix2ang(nside, np.arange(first, first + 4 * nside))
    np.testing.assert_allclose(theta, math.pi / 2, atol=1e-12)
    np.testing.assert_allclose(phi, grid.phi0_rad + np.arange(grid.n_lon) * grid.dlon_rad, atol=1e-12)
    np.testing.assert_allclose(got[lmax + 1], ring, rtol=0, atol=1e-8 * np.abs(ring).max())


def test_filtered_constant_map_with_holes_is_the_constant_times_f0():
    grid = _partial_grid()
    values = np.full((grid.n_lat, grid.n_lon), 7.0)
    usable = np.ones(values.shape, bool)
    usable[10:20, 5:9] = False
    values[~usable] = np.nan
    transfer = np.linspace(0.5, 0.0, 41)
    # analytic: the mean fill makes the sphere constant, whose only mode is l = 0
    np.testing.assert_allclose(filtered_grid(values, usable, grid, transfer, n_iter=1, n_threads=1), 3.5, atol=1e-10)


def test_ring_grid_needs_a_whole_number_of_columns():
    with pytest.raises(MapError, match="whole number of columns"):
        ring_grid([1.0], 10, math.radians(0.7), 0.0)
    with pytest.raises(MapError, match="between 1 and 360 columns"):
        ring_grid([1.0], 400, math.radians(1.0), 0.0)


def test_rectangular_pixel_window():
    a, b = 0.004, 0.002
    p = rectangular_pixel_window(a, b, 3000)
    assert p[0] == 1.0
    # analytic small-l expansion: p_l = 1 - l^2 (a^2 + b^2) / 48 + O(l^4)
    assert p[20] == pytest.approx(1 - 20 ** 2 * (a * a + b * b) / 48, abs=1e-7)
    # independent reference: the mean over the pixel of plane waves at wavenumber l, sampled at
    # 64 x 64 points, squared and averaged over 180 orientations and both phases [numerical, analytic definition]
    ell = 1000
    u = (np.arange(64) + 0.5) / 64 - 0.5
    x, y = np.meshgrid(u * a, u * b, indexing="ij")
    power = []
    for psi in (np.arange(180) + 0.5) * math.pi / 180:
        phase = ell * (x * math.cos(psi) + y * math.sin(psi))
        power.append(np.mean(np.cos(phase)) ** 2 + np.mean(np.sin(phase)) ** 2)
    assert p[ell] == pytest.approx(math.sqrt(np.mean(power)), rel=1e-3)



def _spherical_pixel_window(dec_deg, side_deg, ells, n=10):
    """Direct window of one CAR pixel on the sphere [numerical, from the definition]: p_l^2 is the pixel-averaged
    P_l(cos gamma) over pairs of points in the pixel (Gauss-Legendre nodes, uniform in longitude and sin(dec))."""
    from scipy.special import eval_legendre

    x, w = np.polynomial.legendre.leggauss(n)
    s0, s1 = (math.sin(math.radians(dec_deg + h * side_deg / 2)) for h in (-1, 1))
    sin_dec, lon = np.meshgrid(0.5 * (s1 - s0) * x + 0.5 * (s1 + s0), 0.5 * math.radians(side_deg) * x, indexing="ij")
    c = np.sqrt(1 - sin_dec**2).ravel()
    v = np.stack([c * np.cos(lon.ravel()), c * np.sin(lon.ravel()), sin_dec.ravel()], axis=1)
    cos_g = np.clip(v @ v.T, -1, 1)
    pair_w = np.outer(np.outer(w, w).ravel(), np.outer(w, w).ravel())
    pair_w /= pair_w.sum()
    return np.array([math.sqrt(np.sum(pair_w * eval_legendre(int(l), cos_g))) for l in ells])


@pytest.mark.parametrize("dec_deg", [0.0, 40.0, 70.0])
def test_flat_sky_window_of_a_car_pixel_matches_the_spherical_one(dec_deg):
    # a 0.5' CAR pixel is a 0.5' x 0.5' cos(dec) rectangle to well within 1e-4 up to l = 21600 (measured: < 3e-5)
    side = 0.5 / 60
    ells = np.array([3000, 10000, 21600])
    flat = rectangular_pixel_window(math.radians(side), math.radians(side) * math.cos(math.radians(dec_deg)),
                                    int(ells.max()))[ells]
    np.testing.assert_allclose(flat, _spherical_pixel_window(dec_deg, side, ells), rtol=1e-4)


def test_synthesis_at_listed_pixels_matches_the_whole_grid():
    grid = _partial_grid()
    alm = _random_alm(30, 4)
    whole = synthesise_grid(alm, grid, lmax=30, n_threads=1).ravel()
    flat = np.array([5, 41, 42, 900, grid.n_lat * grid.n_lon - 1])
    # internal equivalence: a few rows only vs every row
    np.testing.assert_allclose(synthesise_pixels(alm, grid, flat, lmax=30, n_threads=1), whole[flat], atol=1e-12)


def test_grid_pixel_window_of_an_equatorial_square_grid():
    step = math.radians(0.5)
    grid = ring_grid(math.pi / 2 + step * np.arange(-2, 3), 10, step, 0.0)
    # near the equator the pixels are squares of side step (areas |dlon| (cos lo - cos hi) ~ step^2)
    np.testing.assert_allclose(grid_pixel_window(grid, 500), rectangular_pixel_window(step, step, 500), rtol=1e-4)


def test_transforms_in_blocks_of_rings_give_the_same_result(monkeypatch):
    import pairvel.maps.car_sht as car_sht

    grid = _partial_grid()
    alm = _random_alm(30, 5)
    image = synthesise_grid(alm, grid, lmax=30, n_threads=1)
    back = analyse_grid(image, grid, lmax=30, n_iter=2, n_threads=1)
    monkeypatch.setattr(car_sht, "_RING_VALUES_PER_BLOCK", 1000)  # 2 rings of 360 per block
    # internal equivalence: block-wise sums of the same linear maps
    np.testing.assert_allclose(synthesise_grid(alm, grid, lmax=30, n_threads=1), image, atol=1e-12)
    np.testing.assert_allclose(analyse_grid(image, grid, lmax=30, n_iter=2, n_threads=1), back, atol=1e-10)


@pytest.mark.parametrize("n_iter,tol", [(0, 1e-5), (3, 1e-3)])
def test_filtered_patch_matches_the_same_patch_on_the_full_sphere(n_iter, tol):
    # a 20 x 20 deg patch of a 0.5-deg Fejer-1 grid, filtered alone (caps beyond it at the mean) and
    # as part of the full-sky grid (exact quadrature) with the rest of the sphere at the mean
    step = math.radians(0.5)
    theta = (np.arange(360) + 0.5) * step
    full = ring_grid(theta, 720, step, 0.0)
    rows, cols = slice(140, 180), slice(100, 140)
    patch = ring_grid(theta[rows], 40, step, 100 * step)
    values = np.random.default_rng(6).normal(5.0, 1.0, (40, 40))
    image = np.zeros((360, 720))
    image[rows, cols] = values
    usable = np.zeros(image.shape, bool)
    usable[rows, cols] = True
    beam = gaussian_beam(180.0, 200)
    ref = filtered_grid(image, usable, full, beam, n_iter=0, n_threads=1)[rows, cols]
    got = filtered_grid(values, np.ones(values.shape, bool), patch, beam, n_iter=n_iter, n_threads=1)
    # internal equivalence: the same quadrature (n_iter 0: measured 3e-6 of the signal); the iterated
    # least-squares a_lm differ from it by the aliasing of the patch's edges (measured 3e-4)
    np.testing.assert_allclose(got, ref, rtol=0, atol=tol * np.abs(ref - 5.0).max())
