"""Aperture methods: compiled kernel vs direct, sub-pixel weightings against an analytic profile, map frames,
and bad inputs."""

import healpy as hp
import numpy as np
import pytest

from pairvel.core.errors import InputError, MapError
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.healpix_io import read_map, read_mask, write_partial_map
from pairvel.maps.photometry import measure_apertures, measure_random_apertures

ARCMIN = np.radians(1.0 / 60.0)


def gaussian_aperture(theta, sigma):
    """Analytic compensated aperture of A exp(-r^2 / 2 sigma^2), A = 1, flat sky [analytic]:
    disc mean (2 s^2/t^2)(1 - e^{-t^2/2s^2}) minus annulus mean (2 s^2/t^2)(e^{-t^2/2s^2} - e^{-t^2/s^2})."""
    u = np.exp(-theta ** 2 / (2 * sigma ** 2))
    return 2 * sigma ** 2 / theta ** 2 * (1 - u) ** 2


def random_cap(n, seed, dec_range=(-80.0, 85.0)):
    rng = np.random.default_rng(seed)
    s0, s1 = np.sin(np.radians(dec_range))
    return rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(s0, s1, n)))


@pytest.mark.parametrize("weighting", ["centre", "fraction"])
@pytest.mark.parametrize("nest", [False, True])
def test_kernel_matches_direct_on_masked_partial_map(weighting, nest):
    nside = 128
    rng = np.random.default_rng(3)
    # a partial map over a cap reaching the north pole, with a random binary mask: edges, holes, the pole
    pix = np.sort(hp.query_disc(nside, hp.ang2vec(40.0, 70.0, lonlat=True), np.radians(35.0), nest=nest))
    sm = HealpixMap(nside, nest, pix, rng.normal(0, 50, pix.size), (rng.random(pix.size) > 0.1).astype(np.float32))
    ra, dec = random_cap(3000, 4, dec_range=(30.0, 90.0))
    ra[:3], dec[:3] = [0.0, 123.0, 359.99], [90.0, 89.9, 36.0]
    radii = [30.0, 55.0, 110.0]
    a = measure_apertures(sm, ra, dec, radii, max_masked_fraction=0.5, pixel_weighting=weighting, method="kernel")
    b = measure_apertures(sm, ra, dec, radii, max_masked_fraction=0.5, pixel_weighting=weighting, method="direct")
    # internal equivalence: the same pixel sums from two independent pixel searches
    np.testing.assert_array_equal(np.isnan(a.temperatures), np.isnan(b.temperatures))
    np.testing.assert_allclose(a.temperatures, b.temperatures, rtol=1e-9, atol=1e-9, equal_nan=True)
    np.testing.assert_allclose(a.masked_fraction_disc, b.masked_fraction_disc, atol=1e-12)
    np.testing.assert_allclose(a.masked_fraction_annulus, b.masked_fraction_annulus, atol=1e-12)
    np.testing.assert_array_equal(a.usable, b.usable)
    assert 0 < a.n_usable < ra.size


def test_constant_and_gradient_give_zero_for_every_weighting():
    nside = 256
    vec = np.array(hp.pix2vec(nside, np.arange(12 * nside ** 2)))
    ra, dec = random_cap(200, 5)
    for name, m in (("constant", np.full(vec.shape[1], 7.0)), ("gradient", 3.0 * vec[0] - 2.0 * vec[2])):
        sm = HealpixMap.from_array(m)
        for weighting in ("centre", "fraction", "subsample"):
            t = measure_apertures(sm, ra, dec, 40.0, pixel_weighting=weighting, subsample_level=2).temperatures[0]
            # analytic: a constant cancels exactly; a gradient cancels up to pixelisation. Scale: the change of
            # the gradient across one radius, |g| theta = sqrt(13) * 40 arcmin ~ 0.042; whole pixels leave up to
            # ~20% of it (pixel 13.7'), the fractional weightings under 5% (internal regression, measured)
            g_theta = np.sqrt(13.0) * 40.0 * ARCMIN
            tol = 1e-9 if name == "constant" else (0.25 if weighting == "centre" else 0.05) * g_theta
            assert np.max(np.abs(t)) < tol, (name, weighting)


def painted_gaussians(nside, ra, dec, sigma_arcmin):
    """Partial map holding resolved Gaussian profiles (peak 1) evaluated at pixel centres around each object."""
    reach = 7.0 * sigma_arcmin * ARCMIN
    lists = [hp.query_disc(nside, hp.ang2vec(r, d, lonlat=True), reach) for r, d in zip(ra, dec)]
    pix = np.unique(np.concatenate(lists))
    values = np.zeros(pix.size)
    pvec = np.array(hp.pix2vec(nside, pix)).T
    for r, d, p in zip(ra, dec, lists):
        idx = np.searchsorted(pix, p)
        ang = np.arccos(np.clip(pvec[idx] @ hp.ang2vec(r, d, lonlat=True), -1, 1))
        values[idx] += np.exp(-ang ** 2 / (2 * (sigma_arcmin * ARCMIN) ** 2))
    return HealpixMap(nside, False, pix, values)


def subpixel_table(n_side_grid=14, seed=8):
    """Bias and scatter of each weighting against the analytic aperture of a resolved Gaussian profile
    (sigma = 1 arcmin, nside 4096), for objects at random sub-pixel offsets."""
    rng = np.random.default_rng(seed)
    g = np.arange(n_side_grid)
    ra = (30.0 + 0.4 * g[:, None] + np.zeros(n_side_grid)[None, :]).ravel() + rng.uniform(-0.05, 0.05, g.size ** 2)
    dec = (10.0 + 0.4 * g[None, :] + np.zeros(n_side_grid)[:, None]).ravel() + rng.uniform(-0.05, 0.05, g.size ** 2)
    sm = painted_gaussians(4096, ra, dec, 1.0)
    radii = np.array([1.5, 2.1, 2.5, 3.0])
    exact = gaussian_aperture(radii, 1.0)
    table = {}
    for weighting in ("centre", "fraction", "subsample"):
        t = measure_apertures(sm, ra, dec, radii, max_masked_fraction=0.0, pixel_weighting=weighting,
                              subsample_level=3).temperatures
        rel = t / exact[:, None] - 1.0
        table[weighting] = (rel.mean(axis=1), rel.std(axis=1))
    return radii, table


@pytest.mark.slow
def test_subpixel_weightings_against_analytic_gaussian_aperture():
    radii, table = subpixel_table()
    for weighting, (bias, scatter) in table.items():
        print(weighting, " ".join(f"theta={r:.1f}': bias {b:+.4f} scatter {s:.4f}" for r, b, s in zip(radii, bias, scatter)))
    k = int(np.flatnonzero(radii == 2.1)[0])
    # analytic reference (gaussian_aperture); the issue's target, mean within 3% at theta = 2.1', is met by
    # whole pixels, which sample the point-sampled profile without bias on average
    assert abs(table["centre"][0][k]) < 0.03
    # the fractional weightings spread each pixel's centre value over its area, so they measure the profile
    # smoothed by the pixel: a Gaussian of variance sigma^2 + s^2/12, s^2 the pixel area [analytic, same
    # conserved-flux Gaussian]; their bias must be that smoothing and no more
    s2 = (np.degrees(np.sqrt(4 * np.pi / (12 * 4096 ** 2))) * 60) ** 2
    sig_eff = np.sqrt(1.0 + s2 / 12.0)
    smoothed = gaussian_aperture(radii, sig_eff) / sig_eff ** 2 / gaussian_aperture(radii, 1.0) - 1.0
    assert smoothed[k] == pytest.approx(-0.033, abs=0.002)  # analytic, the number quoted in README
    np.testing.assert_allclose(table["subsample"][0], smoothed, atol=0.005)
    np.testing.assert_allclose(table["fraction"][0], smoothed, atol=0.012)
    # and they must scatter far less than whole pixels (that is their purpose): measured 0.2-0.4% vs 4%
    assert table["subsample"][1][k] < 0.2 * table["centre"][1][k]
    assert table["fraction"][1][k] < 0.2 * table["centre"][1][k]


def blob_sky(nside, frame, ra_b, dec_b, sigma_deg):
    """Full-sky map in ``frame`` of Gaussian blobs (peak 100) centred at equatorial (ra_b, dec_b): each pixel
    centre is rotated to equatorial coordinates with healpy.Rotator and the sky evaluated there exactly."""
    vec = np.array(hp.pix2vec(nside, np.arange(12 * nside ** 2)))
    if frame != "C":
        vec = hp.Rotator(coord=[frame, "C"])(vec)
    out = np.zeros(vec.shape[1])
    for r, d in zip(ra_b, dec_b):
        cosang = hp.ang2vec(r, d, lonlat=True) @ vec
        near = cosang > np.cos(np.radians(6 * sigma_deg))
        out[near] += 100.0 * np.exp(-np.arccos(np.clip(cosang[near], -1, 1)) ** 2 / (2 * np.radians(sigma_deg) ** 2))
    return out


@pytest.mark.parametrize("frame", ["G", "E"])
def test_rotated_map_gives_the_same_apertures_at_the_same_objects(tmp_path, frame):
    nside = 256
    ra_b, dec_b = random_cap(150, 11)
    ra, dec = ra_b + np.random.default_rng(2).normal(0, 0.3, ra_b.size), dec_b  # objects near the blobs
    eq = blob_sky(nside, "C", ra_b, dec_b, 0.5)
    path = write_partial_map(tmp_path / "rot.fits", np.arange(eq.size), blob_sky(nside, frame, ra_b, dec_b, 0.5),
                             nside=nside, coordsys=frame)
    sm_rot = read_map(path)
    assert sm_rot.coordsys == frame
    t_eq = measure_apertures(HealpixMap.from_array(eq), ra, dec, 60.0, pixel_weighting="fraction").temperatures[0]
    t_rot = measure_apertures(sm_rot, ra, dec, 60.0, pixel_weighting="fraction").temperatures[0]
    unrotated = HealpixMap(nside, False, None, sm_rot.values, coordsys="C")
    t_wrong = measure_apertures(unrotated, ra, dec, 60.0, pixel_weighting="fraction").temperatures[0]
    rms = np.std(t_eq)
    # analytic: the same sky sampled exactly on two pixel grids (pixel 13.7', blobs sigma 30', aperture 60');
    # the residual is pixelisation only, a few % of the signal rms (measured 3.5% and 3.7%)
    assert np.std(t_rot - t_eq) < 0.05 * rms
    # and ignoring the frame is wrong by the whole signal (the test can fail)
    assert np.std(t_wrong - t_eq) > 0.5 * rms


def test_frame_from_config_when_header_has_none(tmp_path):
    v = np.zeros(12 * 16 ** 2, np.float32)
    path = tmp_path / "nocoord.fits"
    hp.write_map(path, v, column_units="uK_CMB", dtype=np.float32)  # healpy writes no COORDSYS without coord=
    assert read_map(path, coordsys="G").coordsys == "G"
    with pytest.raises(MapError, match="requested coordsys must be C .*; got 'Q1'"):
        read_map(path, coordsys="Q1")


def test_mask_in_another_frame_is_refused(tmp_path):
    nside = 16
    m = HealpixMap(nside, False, None, np.zeros(12 * nside ** 2), coordsys="G")
    mask_path = write_partial_map(tmp_path / "mask.fits", np.arange(12 * nside ** 2), np.ones(12 * nside ** 2),
                                  nside=nside, coordsys="C")
    with pytest.raises(MapError, match=r"mask .*mask\.fits is in frame C but the map is in frame G"):
        m.with_mask(read_mask(mask_path, nside=nside))


def test_random_positions_come_back_equatorial_for_a_galactic_map():
    nside = 64
    # Galactic map whose usable part is the northern Galactic cap b > 30 deg
    theta, _ = hp.pix2ang(nside, np.arange(12 * nside ** 2))
    sm = HealpixMap(nside, False, None, np.zeros(12 * nside ** 2), (theta < np.radians(60)).astype(np.float32), coordsys="G")
    ra, dec, _ = measure_random_apertures(sm, 300, 30.0, seed=1, max_masked_fraction=0.0)
    _, b = hp.Rotator(coord=["C", "G"])(ra, dec, lonlat=True)
    assert np.all(b > 29.0)  # analytic: every accepted aperture lies in the usable cap (in Galactic latitude)


def test_tracers_outside_partial_coverage_are_counted_not_usable():
    nside = 64
    pix = np.sort(hp.query_disc(nside, hp.ang2vec(0.0, 0.0, lonlat=True), np.radians(10.0)))
    sm = HealpixMap(nside, False, pix, np.zeros(pix.size))
    ra = np.array([0.0, 1.0, 90.0, 180.0, 9.9])
    dec = np.array([0.0, 2.0, 0.0, -40.0, 0.0])
    res = measure_apertures(sm, ra, dec, 60.0)
    np.testing.assert_array_equal(res.usable, [True, True, False, False, False])
    assert res.masked_fraction_disc[0, 2] == 1.0 and np.isnan(res.temperatures[0, 2])


def test_bad_method_choices():
    sm = HealpixMap.from_array(np.zeros(12 * 16 ** 2))
    with pytest.raises(InputError, match="pixel_weighting must be one of centre, fraction, subsample; got 'area'"):
        measure_apertures(sm, [1.0], [1.0], 300.0, pixel_weighting="area")
    with pytest.raises(InputError, match="method 'kernel' supports pixel_weighting 'centre' and 'fraction'"):
        measure_apertures(sm, [1.0], [1.0], 300.0, pixel_weighting="subsample", method="kernel")
    with pytest.raises(InputError, match=r"subsample_level must be an integer in \[1, 6\]; got 0"):
        measure_apertures(sm, [1.0], [1.0], 300.0, pixel_weighting="subsample", subsample_level=0)


@pytest.mark.parametrize("declared, values, warns", [("uK_CMB", 1e-4, True), ("K_CMB", 100.0, True),
                                                      ("K_CMB", 1e-4, False), ("mK_CMB", 0.1, False)])
def test_wrong_looking_unit_warns(tmp_path, declared, values, warns):
    import warnings as _w

    from pairvel.core.errors import PairvelWarning

    v = (np.random.default_rng(1).normal(0, 1, 12 * 16 ** 2) * values).astype(np.float32)
    path = write_partial_map(tmp_path / "m.fits", np.arange(v.size), v, nside=16, unit=declared)
    with _w.catch_warnings(record=True) as caught:
        _w.simplefilter("always")
        read_map(path)
    msgs = [str(w.message) for w in caught if issubclass(w.category, PairvelWarning)]
    # common practice: CMB maps have an rms between ~1 uK and a few mK
    assert any("outside the 0.01-100000 uK of CMB maps" in m for m in msgs) == warns, msgs


def test_monopole_dipole_removal_matches_healpy_on_a_masked_map():
    from pairvel.maps.skymap import remove_monopole_dipole

    nside = 32
    rng = np.random.default_rng(4)
    x, y, z = hp.pix2vec(nside, np.arange(12 * nside ** 2))
    m = 40.0 + 3000.0 * x - 1200.0 * y + 500.0 * z + rng.normal(0, 80, x.size)
    m[np.abs(z) < 0.3] = hp.UNSEEN  # a Galactic-plane-like cut
    full = HealpixMap.from_array(m)
    cleaned, coef = remove_monopole_dipole(full)
    _, mono, dip = hp.remove_dipole(m, fitval=True, verbose=False) if "verbose" in hp.remove_dipole.__code__.co_varnames \
        else hp.remove_dipole(m, fitval=True)
    # computed with healpy.remove_dipole (the same weighted least-squares model over unmasked pixels)
    np.testing.assert_allclose(coef, [mono, *dip], rtol=1e-6, atol=1e-6)
    good = cleaned.weight > 0
    assert abs(np.mean(cleaned.values[good])) < 1.0 and np.all(cleaned.weight[~good] == 0)
    # partial map of the usable pixels gives the same fit (internal equivalence)
    pix = np.flatnonzero(good)
    _, coef_partial = remove_monopole_dipole(HealpixMap(nside, False, pix, m[pix]))
    np.testing.assert_allclose(coef_partial, coef, rtol=1e-10)
