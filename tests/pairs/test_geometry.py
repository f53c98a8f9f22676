"""Comoving geometry against astropy (computed with the general-purpose library astropy)."""

import numpy as np
from astropy.cosmology import FlatLambdaCDM

from pairvel.model.cosmology import Cosmology
from pairvel.pairs.geometry import comoving_positions, unit_vectors


def test_distances_match_astropy_both_code_paths():
    rng = np.random.default_rng(3)
    cosmo = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045)
    ref = FlatLambdaCDM(H0=70, Om0=0.3, Ob0=0.045, Tcmb0=cosmo.t_cmb_k, Neff=3.046, m_nu=0.0)
    for n in (100, 5000):  # direct path and the spline path
        z = rng.uniform(0.01, 1.5, n)
        ra, dec = rng.uniform(0, 360, n), rng.uniform(-90, 90, n)
        pos = comoving_positions(ra, dec, z, cosmo=cosmo)
        # computed with astropy.cosmology: comoving distance
        np.testing.assert_allclose(np.linalg.norm(pos, axis=1), ref.comoving_distance(z).value, rtol=1e-8)


def test_unit_vectors_axes_analytic():
    u = unit_vectors([0, 90, 0, 123], [0, 0, 90, -90])
    np.testing.assert_allclose(u, [[1, 0, 0], [0, 1, 0], [0, 0, 1], [0, 0, -1]], atol=1e-15)  # analytic


def test_distance_at_z_half_default_cosmology_known_value():
    # computed with astropy.cosmology.FlatLambdaCDM for h=0.677, Om=0.31 (internal regression of the default)
    pos = comoving_positions([10.0], [20.0], [0.5])
    ref = FlatLambdaCDM(H0=67.7, Om0=0.31, Ob0=0.049, Tcmb0=2.72548, Neff=3.046, m_nu=0.0).comoving_distance(0.5).value
    np.testing.assert_allclose(np.linalg.norm(pos), ref, rtol=1e-10)
