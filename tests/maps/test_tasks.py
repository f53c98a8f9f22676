"""The map stages cut into tasks give what one call in this process gives (TaskRunner in-process here;
tests/test_pipeline_dask.py runs them on a real LocalCluster)."""

import dataclasses

import numpy as np

from pairvel.core.cluster import TaskRunner
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.photometry import measure_apertures
from pairvel.maps.tasks import measure_apertures_in_chunks, trend_without_each_region
from pairvel.maps.trend import remove_redshift_trend


def test_photometry_in_chunks_equals_one_call_with_drop_reasons():
    rng = np.random.default_rng(4)
    pix = np.arange(40000)  # a partial nside-128 map: some apertures fall off it
    skymap = HealpixMap(128, False, pix, rng.normal(0, 30, pix.size))
    ra, dec = rng.uniform(0, 80, 203), rng.uniform(30, 80, 203)
    scale = rng.uniform(0.8, 1.2, ra.size)
    options = {"max_masked_fraction": 0.1, "pixel_weighting": "centre", "method": "auto", "radius_scale": scale}
    one = measure_apertures(skymap, ra, dec, [60.0, 90.0], **options)
    chunked = measure_apertures_in_chunks(skymap, ra, dec, [60.0, 90.0], runner=TaskRunner(None), **options)
    assert 0 < one.usable.sum() < ra.size  # both kinds of tracer are there
    for field in dataclasses.fields(one):  # each aperture on its own: identical (analytic)
        np.testing.assert_array_equal(getattr(chunked, field.name), getattr(one, field.name), err_msg=field.name)


def test_trend_without_each_region_equals_the_loop_over_regions():
    rng = np.random.default_rng(5)
    z = rng.uniform(0.1, 0.5, 400)
    temps = rng.normal(0, 20, (2, z.size))
    regions = rng.integers(0, 7, z.size)
    got = trend_without_each_region(temps, z, regions, sigma_z=0.02, runner=TaskRunner(None))
    for k in range(7):
        keep = regions != k
        np.testing.assert_array_equal(got[:, k, keep], remove_redshift_trend(temps[:, keep], z[keep], sigma_z=0.02))
        assert not got[:, k, ~keep].any()
