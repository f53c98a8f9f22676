"""Point-source masking, tracers near masked sources, and outlier clipping (maps/sourcemask.py)."""

import math

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy.table import Table
from scipy.stats import norm

from pairvel.core.errors import ConfigError, InputError
from pairvel.input.config import config_from_dict
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.photometry import measure_apertures, measure_random_apertures
from pairvel.maps.sources import paint_beam_sources
from pairvel.maps.sourcemask import (CLIPPED, NEAR_SOURCE, SourceList, clip_outliers, mask_sources, near_sources,
                                     read_source_list, screen_apertures, source_exclusion, source_radii_arcmin)

NSIDE = 2048  # 1.72 arcmin pixels
CENTRE = (30.0, 5.0)


def patch(noise_uk=10.0, seed=0, radius_deg=1.2):
    """A partial nside-2048 map of white noise around CENTRE (invented)."""
    pix = np.sort(hp.query_disc(NSIDE, hp.ang2vec(*CENTRE, lonlat=True), np.radians(radius_deg)))
    values = np.random.default_rng(seed).normal(0.0, noise_uk, pix.size)
    return HealpixMap(NSIDE, False, pix, values)


def sources_at(ra, dec, radius):
    ra, dec = np.atleast_1d(ra).astype(float), np.atleast_1d(dec).astype(float)
    return SourceList(ra, dec, np.broadcast_to(np.asarray(radius, float), ra.shape).copy())


def test_masked_pixels_are_those_within_each_disc():
    sky = patch()
    src = sources_at([30.0, 30.3, 29.8], [5.0, 5.2, 4.7], [10.0, 4.0, 6.0])
    masked = mask_sources(sky, src)
    expected = np.unique(np.concatenate([hp.query_disc(NSIDE, hp.ang2vec(r, d, lonlat=True), np.radians(rad / 60))
                                         for r, d, rad in zip(src.ra, src.dec, src.radius_arcmin)]))
    lost = sky.pixels[(sky.weight > 0) & (masked.weight == 0)]
    np.testing.assert_array_equal(lost, expected)  # healpy.query_disc: pixel centres within each disc
    # analytic: about pi r^2 / pixel area pixels in all (10', 4', 6' discs, disjoint): 174 at 2.951 arcmin^2
    assert lost.size == pytest.approx(math.pi * (100 + 16 + 36) / hp.nside2pixarea(NSIDE, degrees=True) / 3600,
                                      rel=0.05)
    assert np.array_equal(masked.values, sky.values)  # only the weights change


def test_near_sources_uses_source_radius_plus_aperture_reach():
    src = sources_at(30.0, 5.0, 3.0)
    reach = math.sqrt(2) * 2.0  # outer annulus of a 2' disc
    offsets = np.array([5.7, 5.9, 6.0, 8.0]) / 60.0  # degrees north of the source; touching below 5.828'
    near = near_sources(np.full(4, 30.0), 5.0 + offsets, reach, src)
    assert near.tolist() == [True, False, False, False]  # analytic: 3' + 2.828' = 5.828'
    per_tracer = near_sources(np.full(4, 30.0), 5.0 + offsets, np.array([2.9, 2.8, 3.1, 5.1]), src)
    assert per_tracer.tolist() == [True, False, True, True]  # analytic: reach + 3' against 5.7, 5.9, 6.0, 8.0'


@pytest.mark.parametrize("scaled", [False, True])
def test_random_apertures_obey_the_source_screen_of_the_tracers(scaled):
    """Random null apertures on a source-masked map: with the tracers' screen (source_exclusion) none reaches
    a source's disc (analytic: separation >= disc radius + sqrt(2) x aperture radius x scale); without it,
    apertures partly over the masked discs are accepted up to max_masked_fraction."""
    src = sources_at([29.7, 30.0, 30.4, 30.1], [5.3, 4.6, 5.1, 5.6], 4.0)
    sky = mask_sources(patch(radius_deg=1.0), src)
    radius, reach = 3.0, math.sqrt(2) * 3.0
    scale = np.array([0.8, 1.0, 1.3]) if scaled else None
    seps = {}
    for label, exclude in (("screened", source_exclusion(src, reach)), ("plain", None)):
        ra, dec, t = measure_random_apertures(sky, 3000, radius, seed=4, max_masked_fraction=0.3, radius_scale=scale,
                                              exclude=exclude)
        assert ra.size == 3000 and np.all(np.isfinite(t))
        sep = np.degrees(np.arccos(np.clip(hp.ang2vec(ra, dec, lonlat=True) @ hp.ang2vec(src.ra, src.dec, lonlat=True).T,
                                           -1, 1))).min(axis=1) * 60.0
        seps[label] = sep
    # the smallest scale bounds every reach from below: screened positions lie beyond 4' + 0.8 x 4.24'
    assert seps["screened"].min() >= 4.0 + (0.8 if scaled else 1.0) * reach - 1e-6
    assert np.sum(seps["plain"] < 4.0 + reach) > 20  # without the screen, many random apertures touch a disc
    assert source_exclusion(None, reach) is None


def test_flux_rule_for_the_disc_radius():
    r = source_radii_arcmin([1.0, 10.0, 40.0, 1e6, -5.0], 2.0, 10.0, radius_max_arcmin=20.0)
    np.testing.assert_allclose(r, [2.0, 2.0, 4.0, 20.0, 2.0])  # analytic: 2' max(1, sqrt(S/10 mJy)) <= 20'


def test_bright_source_next_to_a_tracer_is_caught_by_the_mask_and_by_clipping():
    sky = patch(noise_uk=10.0, seed=1)
    g = np.linspace(-0.8, 0.8, 13)  # a 13 x 13 grid of tracers 8' apart
    ra = (CENTRE[0] + g[:, None] / math.cos(math.radians(CENTRE[1])) + 0 * g[None, :]).ravel()
    dec = (CENTRE[1] + 0 * g[:, None] + g[None, :]).ravel()
    target = 84  # the middle tracer; the source sits 2.5' east of it, in its annulus (2'-2.83')
    src_ra, src_dec = ra[target] + 2.5 / 60 / math.cos(math.radians(dec[target])), dec[target]
    pix, painted = paint_beam_sources(NSIDE, np.array([src_ra]), np.array([src_dec]), np.array([2e-3]), 1.5)
    values = sky.values.copy()
    values[np.searchsorted(sky.pixels, pix)] += painted  # the patch holds every painted pixel (sorted RING)
    with_source = sky.with_values(values)
    res = measure_apertures(with_source, ra, dec, 2.0)
    assert res.usable.all()
    # the source pulls the target's compensated aperture far below the rest (invented amplitude)
    assert res.temperatures[0, target] < np.median(res.temperatures) - 20 * np.std(np.delete(res.temperatures, target))
    reach = math.sqrt(2) * 2.0
    usable, reason, info = screen_apertures(ra, dec, res.temperatures, res.usable, res.drop_reason,
                                            reach_arcmin=reach, sources=sources_at(src_ra, src_dec, 2.0))
    assert np.flatnonzero(~usable).tolist() == [target] and reason[target] == NEAR_SOURCE  # analytic geometry
    assert info == {"near_point_source": 1}
    usable, reason, info = screen_apertures(ra, dec, res.temperatures, res.usable, res.drop_reason,
                                            reach_arcmin=reach, clip_sigma=5.0)
    assert np.flatnonzero(~usable).tolist() == [target] and reason[target] == CLIPPED
    assert info == {"outlier_clip_sigma": 5.0, "outliers_clipped": 1}


def test_clipping_counts_on_constructed_values():
    t = np.array([[-1.2, -1.0, -0.5, 0.0, 0.5, 1.0, 2.9, 3.5, -4.0]])
    # analytic: median 0, MAD 1 (|t| sorted 0 .5 .5 1 1 1.2 2.9 3.5 4), robust sigma 1.4826: k = 2 clips |t| > 2.965
    keep, info = clip_outliers(t, 2.0)
    assert np.flatnonzero(~keep).tolist() == [7, 8] and info == {"threshold_sigma": 2.0, "clipped": 2}
    # a second radius with its own outlier: median 0.3, MAD 0.8, so k = 2 clips |t - 0.3| > 2.372 [analytic]
    second = np.array([5.0, 0.0, -1.2, -1.0, -0.5, 0.5, 1.0, 1.2, 0.3])
    assert np.flatnonzero(~clip_outliers(np.vstack([t[0], second]), 2.0)[0]).tolist() == [0, 7, 8]
    # a radius whose MAD is 0 (constant values) clips nothing [analytic: no scale to judge by]
    assert np.flatnonzero(~clip_outliers(np.vstack([t[0], np.zeros(9)]), 2.0)[0]).tolist() == [7, 8]


def test_clipping_a_gaussian_removes_its_tail_fraction():
    t = np.random.default_rng(7).standard_normal((1, 200_000))
    _, info = clip_outliers(t, 3.0)
    expected = 2 * norm.sf(3.0) * t.size  # analytic: 2 (1 - Phi(3)) = 0.0027 of a Gaussian
    assert abs(info["clipped"] - expected) < 5 * math.sqrt(expected)


def test_source_list_with_flux_units(tmp_path):
    table = Table({"RA": [30.0, 31.0, 32.0], "DEC": [5.0, 5.5, 6.0], "S": [0.005, 0.04, 10.0]})
    table["S"].unit = "Jy"
    table["RA"].unit = table["DEC"].unit = "deg"
    table.write(tmp_path / "src.ecsv")
    src = read_source_list(tmp_path / "src.ecsv", ra_column="RA", dec_column="DEC", flux_column="S",
                           radius_arcmin=2.0, flux_pivot_mjy=10.0, radius_max_arcmin=30.0)
    np.testing.assert_allclose(src.radius_arcmin, [2.0, 4.0, 30.0])  # analytic: 5, 40, 1e4 mJy through the rule
    pd.DataFrame({"ra": [1.0, np.nan], "dec": [0.0, 0.0]}).to_csv(tmp_path / "bad.csv", index=False)
    with pytest.raises(InputError, match=r"source list \S*bad\.csv: column 'ra' must be finite .*first: row 1"):
        read_source_list(tmp_path / "bad.csv", radius_arcmin=2.0)
    table["S"].unit = "Mpc"
    table.write(tmp_path / "mpc.ecsv")
    with pytest.raises(InputError, match=r"source list \S*mpc\.ecsv: column 'S' \(source_mask\.flux_column\) has unit "
                                         r"'Mpc', which is not a spectral flux density"):
        read_source_list(tmp_path / "mpc.ecsv", ra_column="RA", dec_column="DEC", flux_column="S",
                         radius_arcmin=2.0, flux_pivot_mjy=10.0)


BASE = {"catalogue": {"path": "c.csv"}, "map": {"path": "m.fits"}, "theory": {"bias": 2.0}}


@pytest.mark.parametrize("extra, message", [
    ({"source_mask": {"radius_arcmin": 4.0}}, r"'source_mask\.radius_arcmin' is set but source_mask\.path is not"),
    ({"source_mask": {"path": "s.csv", "flux_column": "S"}},
     r"'source_mask\.flux_pivot_mjy' and source_mask\.flux_column go together"),
    ({"source_mask": {"path": "s.csv", "radius_arcmin": 5.0, "radius_max_arcmin": 4.0}},
     r"'source_mask\.radius_max_arcmin' must be at least source_mask\.radius_arcmin \(5\); got 4"),
    ({"outliers": {"clip_sigma": 0.5}}, r"outliers\.clip_sigma' must lie in \[1\.0, 1000\.0\]"),
    ({"map": {"path": "m.fits", "frequency_ghz": 0.2}}, r"map\.frequency_ghz' must lie in"),
])
def test_config_errors_are_one_line(extra, message):
    with pytest.raises(ConfigError, match=message) as err:
        config_from_dict({**BASE, **extra})
    assert "\n" not in str(err.value)


def test_restart_refuses_masking_and_clipping():
    restart = {"restart": {"table_path": "t.fits"}, "theory": {"bias": 2.0}}
    with pytest.raises(ConfigError, match=r"'source_mask\.path' needs the map and the photometry"):
        config_from_dict({**restart, "source_mask": {"path": "s.csv"}})
    with pytest.raises(ConfigError, match=r"'outliers\.clip_sigma' is not used when restart\.table_path is set"):
        config_from_dict({**restart, "outliers": {"clip_sigma": 5.0}})
