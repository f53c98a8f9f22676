"""The distance convention: radiation and N_eff are config keys whose defaults keep the old distances."""

import numpy as np
import pytest
from astropy.cosmology import FlatLambdaCDM
from scipy import integrate

from pairvel.core.errors import ConfigError
from pairvel.input.config import config_from_dict
from pairvel.model.cosmology import Cosmology, distance_convention
from pairvel.pairs.geometry import comoving_positions

Z = np.array([0.1, 0.5, 1.0, 3.0])
C_KM_S = 299792.458


def test_defaults_keep_the_distances_of_before_the_keys():
    c = Cosmology()
    assert (c.n_eff, c.radiation) == (3.046, True)
    # internal regression: Cosmology() distances and E(z) printed before n_eff and radiation became keys
    np.testing.assert_allclose(c.comoving_distance_mpc(Z),
                               [432.3441852812859, 1945.9706204024076, 3395.7096060520535, 6506.647528985259],
                               rtol=1e-13)
    np.testing.assert_allclose(c.efunc(Z), [1.0500725510983482, 1.317809098776266, 1.780833845297471,
                                            4.533572116716421], rtol=1e-13)


@pytest.mark.parametrize("keys, reference", [
    ({"n_eff": 2.0}, dict(Tcmb0=2.72548, Neff=2.0)),
    ({"n_eff": 4.5, "t_cmb_k": 2.9}, dict(Tcmb0=2.9, Neff=4.5)),
    ({"radiation": False}, dict(Tcmb0=0.0)),
])
def test_comoving_distance_against_astropy(keys, reference):
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045, **keys)
    ref = FlatLambdaCDM(H0=70.0, Om0=0.3, Ob0=0.045, m_nu=0.0, **reference)
    # computed with astropy.cosmology.FlatLambdaCDM (a general-purpose library) built here from the same numbers
    np.testing.assert_allclose(c.comoving_distance_mpc(Z), ref.comoving_distance(Z).value, rtol=1e-10)


@pytest.mark.parametrize("keys", [{"n_eff": 2.0}, {"n_eff": 3.046}, {"radiation": False}])
def test_comoving_distance_against_the_formula_of_the_notes(keys):
    """The E(z) of Cosmology's notes integrated with scipy: Omega_gamma h^2 = 2.4728e-5 (T / 2.7255 K)^4
    (analytic: Stefan-Boltzmann density over the critical density, rounded to 5 digits), Omega_nu =
    0.2271 N_eff Omega_gamma (analytic: (7/8) (4/11)^(4/3) per species)."""
    c = Cosmology(h=0.7, omega_m=0.3, omega_b=0.045, **keys)
    og = 2.4728e-5 * (c.t_cmb_k / 2.7255) ** 4 / c.h**2
    om_r = og * (1 + 7 / 8 * (4 / 11) ** (4 / 3) * c.n_eff) if c.radiation else 0.0

    def inv_e(z):
        return 1.0 / np.sqrt(c.omega_m * (1 + z) ** 3 + om_r * (1 + z) ** 4 + 1 - c.omega_m - om_r)

    ref = [C_KM_S / (100 * c.h) * integrate.quad(inv_e, 0, z, epsabs=0, epsrel=1e-12)[0] for z in Z]
    np.testing.assert_allclose(c.comoving_distance_mpc(Z), ref, rtol=2e-6)  # the 5-digit constant limits this


def test_radiation_changes_distances_by_the_expected_small_amount():
    with_r, without = Cosmology(), Cosmology(radiation=False)
    ratio = with_r.comoving_distance_mpc(Z) / without.comoving_distance_mpc(Z)
    # radiation (Omega_r ~ 9e-5) lowers the distance: measured 1 - ratio = 9.4e-6 at z = 0.1, 2.3e-4 at z = 3
    assert np.all(ratio < 1) and np.all(ratio > 1 - 1e-3)
    assert np.all(np.diff(ratio) < 0)  # the effect grows with redshift


def test_keys_reach_the_geometry_and_are_checked(tmp_path):
    base = {"catalogue": {"path": "c.csv"}, "map": {"path": "m.fits"}, "theory": {"bias": 1.0}}
    cfg = config_from_dict({**base, "cosmology": {"n_eff": 2.0, "radiation": False}})
    assert cfg.cosmology.n_eff == 2.0 and cfg.cosmology.radiation is False
    assert distance_convention(cfg.cosmology) == "flat; matter + Lambda, no radiation"
    pos = comoving_positions([10.0], [5.0], [1.0], cosmo=cfg.cosmology)
    np.testing.assert_allclose(np.linalg.norm(pos), Cosmology(radiation=False).comoving_distance_mpc(1.0), rtol=1e-12)
    with pytest.raises(ConfigError, match=r"cosmology parameter 'n_eff' is out of range; got -1\.0"):
        config_from_dict({**base, "cosmology": {"n_eff": -1.0}})
    with pytest.raises(ConfigError, match=r"'cosmology\.radiation' must be true or false"):
        config_from_dict({**base, "cosmology": {"radiation": 1}})
    assert "N_eff = 3.046 massless" in distance_convention(Cosmology())
