"""Null tests and the several-frequency combination on rectangular-pixel (CAR) maps: rotated-map and
random-position nulls (screened against point sources) and a two-map tSZ-free combination."""

import math
import warnings

import numpy as np
import pytest

from pairvel.core.errors import MapError, PairvelWarning
from pairvel.maps.car import CarMap, box_wcs
from pairvel.maps.multifreq import combination_weights, combine_maps
from pairvel.maps.photometry import measure_apertures, measure_random_apertures
from pairvel.maps.sourcemask import SourceList, mask_sources, source_exclusion
from pairvel.stats.nulltests import rotated_sets

RADIUS = 6.0  # arcmin


def _car_sky(ra, dec, *, amp_uk=50.0, sigma_arcmin=3.0, pixel_arcmin=3.0):
    """A partial CAR map (lon 0-60, lat -10-10 deg) of Gaussian blobs at the tracers (invented)."""
    w, shape = box_wcs((0.0, 60.0), (-10.0, 10.0), pixel_arcmin)
    m = CarMap.from_image(np.zeros(shape), w)
    v = m.pixel_vectors(np.arange(m.values.size))
    values = np.zeros(m.values.size)
    for a, d in zip(np.radians(ra), np.radians(dec)):
        t = np.array([math.cos(d) * math.cos(a), math.cos(d) * math.sin(a), math.sin(d)])
        sep = np.degrees(np.arccos(np.clip(v @ t, -1, 1))) * 60.0
        near = sep < 5 * sigma_arcmin
        values[near] += amp_uk * np.exp(-0.5 * (sep[near] / sigma_arcmin) ** 2)
    return m.with_values(values)


def _tracers(n=25, seed=1):
    rng = np.random.default_rng(seed)
    return rng.uniform(5.0, 25.0, n), rng.uniform(-7.0, 7.0, n)


def test_rotated_null_on_a_car_map_loses_the_signal_and_skips_rotations_off_the_map():
    ra, dec = _tracers()
    sky = _car_sky(ra, dec)
    data = measure_apertures(sky, ra, dec, RADIUS).temperatures[0]
    assert np.all(data > 5.0)  # every tracer sits on its blob
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", PairvelWarning)
        sets, kept = rotated_sets(sky, ra, dec, [30.0, -30.0], radius_arcmin=RADIUS, max_masked_fraction=0.1)
    # +30 deg moves the apertures to lon -25..-5, off the partial map: skipped with a warning
    assert [k[0] for k in kept] == [-30.0] and any("rotation by 30" in str(w.message) for w in caught)
    assert sets.shape == (1, ra.size) and np.max(np.abs(sets[0])) < 1e-6 * np.max(data)  # blank sky there


def test_random_position_null_on_a_car_map_avoids_masked_sources():
    ra, dec = _tracers()
    src = SourceList(np.array([15.0, 20.0, 30.0]), np.array([0.0, 3.0, -2.0]), np.full(3, 8.0))
    sky = mask_sources(_car_sky(ra, dec), src)
    reach = math.sqrt(2) * RADIUS
    r_ra, r_dec, t = measure_random_apertures(sky, 2000, RADIUS, seed=3, max_masked_fraction=0.3,
                                              exclude=source_exclusion(src, reach))
    assert np.all(np.isfinite(t)) and np.all((r_ra >= 0) & (r_ra <= 60) & (np.abs(r_dec) <= 10))
    cos = np.cos(np.radians(r_dec))[:, None] * np.cos(np.radians(src.dec))[None, :] * \
        np.cos(np.radians(r_ra[:, None] - src.ra[None, :])) + np.sin(np.radians(r_dec))[:, None] * \
        np.sin(np.radians(src.dec))[None, :]
    sep = np.degrees(np.arccos(np.clip(cos, -1, 1))) * 60.0
    assert sep.min() >= 8.0 + reach - 1e-6  # analytic: disc radius + outer annulus radius


def test_two_car_maps_combine_without_their_tsz_and_grids_must_match():
    ra, dec = _tracers()
    cmb = _car_sky(ra, dec, amp_uk=30.0)
    tsz = _car_sky(ra[:10], dec[:10], amp_uk=-80.0, sigma_arcmin=2.0)
    f = np.array([-1.5, -1.0])  # invented spectral factors of the two channels
    maps = [cmb.with_values(cmb.values + fi * tsz.values, path=f"ch{k}") for k, fi in enumerate(f)]
    w = combination_weights(f, np.diag([1.0, 2.0]))
    assert w.sum() == pytest.approx(1.0, abs=1e-12) and w @ f == pytest.approx(0.0, abs=1e-12)
    combined = combine_maps(maps, w)
    np.testing.assert_allclose(combined.values, cmb.values, atol=1e-9)  # analytic: sum w = 1, sum w f = 0
    wc, shape = box_wcs((0.0, 60.0), (-10.0, 10.0), 4.0)
    with pytest.raises(MapError, match="share one pixel grid"):
        combine_maps([maps[0], CarMap.from_image(np.zeros(shape), wc)], [0.5, 0.5])
