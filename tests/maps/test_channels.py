"""Per-map photometry helpers of the single-cluster velocities (pairvel.maps.channels)."""

import numpy as np

from pairvel.maps.channels import _clear_of, has_neighbour, overlap_distance_arcmin


def test_overlap_distance_is_twice_the_annulus_radius():
    # analytic: two compensated apertures (annulus out to sqrt(2) theta) touch at 2 sqrt(2) theta
    np.testing.assert_allclose(overlap_distance_arcmin(2.0), 4 * np.sqrt(2), rtol=1e-12)
    np.testing.assert_allclose(overlap_distance_arcmin(2.0, np.array([0.5, 1.5])), 6 * np.sqrt(2), rtol=1e-12)


def test_neighbours_and_clear_positions():
    # three positions on the equator at 0, 5 and 30 arcmin: the first two are 5 arcmin apart [analytic]
    ra = np.array([10.0, 10.0 + 5 / 60, 10.5])
    dec = np.zeros(3)
    np.testing.assert_array_equal(has_neighbour(ra, dec, 6.0), [True, True, False])
    np.testing.assert_array_equal(has_neighbour(ra, dec, 4.0), [False, False, False])
    assert has_neighbour(ra[:1], dec[:1], 6.0).tolist() == [False]
    # random positions 3 and 20 arcmin north of the first one
    np.testing.assert_array_equal(_clear_of(np.full(2, 10.0), np.array([3, 20]) / 60, ra, dec, 6.0), [False, True])
