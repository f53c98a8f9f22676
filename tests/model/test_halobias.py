"""Tinker et al. (2010) halo bias from a mass proxy and its pair weighting (pairvel.model.halobias)."""

import numpy as np
import pytest

from pairvel.core.errors import TheoryError
from pairvel.model import halobias as hb
from pairvel.model.cosmology import DEFAULT_COSMOLOGY as COSMO
from pairvel.model.template import bin_averaged_velocity, pair_redshift_distribution


@pytest.fixture(scope="module")
def colossus_cosmology():
    """colossus set to pairvel's default cosmology; radiation off, as in pairvel's growth factor."""
    cosmology = pytest.importorskip("colossus.cosmology.cosmology")
    return cosmology.setCosmology("pairvel-default", {
        "flat": True, "H0": 100 * COSMO.h, "Om0": COSMO.omega_m, "Ob0": COSMO.omega_b, "sigma8": COSMO.sigma_8,
        "ns": COSMO.n_s, "Tcmb0": COSMO.t_cmb_k, "relspecies": False})


@pytest.mark.parametrize("delta", [200.0, 800.0, 3200.0])
def test_bias_function_of_peak_height_matches_colossus(colossus_cosmology, delta):
    from colossus.lss import bias

    nu = np.linspace(0.3, 5.0, 25)
    ours = hb.tinker10_bias(nu, delta)
    # computed with colossus (lss.bias.modelTinker10, the same published fit); colossus takes
    # delta_c = 1.68647 where Tinker et al. 2010 write 1.686, a 3e-4 difference in delta_c
    theirs = bias.modelTinker10(nu, 0.0, f"{delta:g}m")
    np.testing.assert_allclose(ours, theirs, rtol=1e-3)


def test_halo_bias_of_mass_and_redshift_matches_colossus_to_one_percent(colossus_cosmology):
    from colossus.lss import bias

    mass_msun = np.geomspace(1e12, 3e15, 9)
    for z in (0.0, 0.3, 0.7, 1.0, 2.0):
        ours = hb.tracer_bias(mass_msun, np.full(mass_msun.shape, z), cosmo=COSMO)
        # computed with colossus (lss.bias.haloBias, model 'tinker10', M200m in Msun/h); colossus builds
        # sigma(M) from its own Eisenstein & Hu 1998 P(k), pairvel from model/theory.py
        theirs = bias.haloBias(mass_msun * COSMO.h, model="tinker10", z=z, mdef="200m")
        np.testing.assert_allclose(ours, theirs, rtol=0.01, err_msg=f"z = {z}")


def test_bias_limits_and_mass_scale():
    # analytic: b -> 1 as nu -> 0 (every term but the first vanishes for a > 0 at Delta = 200)
    assert hb.tinker10_bias(1e-60) == pytest.approx(1.0, abs=1e-3)  # nu^a falls slowly: a = 0.13
    # Tinker et al. 2010, Table 2 / eq. 6: the fit is given for 200 <= Delta <= 3200 only
    with pytest.raises(TheoryError, match="200 <= Delta <= 3200"):
        hb.tinker10_bias(1.0, 100.0)
    b = hb.tracer_bias(np.geomspace(1e12, 1e15, 6), 0.5)
    assert np.all(np.diff(b) > 0)  # analytic: more massive halos are rarer peaks and more biased
    with pytest.raises(TheoryError, match=r"within \[1e\+09, 1e\+17\] Msun"):
        hb.tracer_bias(np.array([14.5]), 0.3)  # a log10 mass given as a mass


def test_lagrangian_radius_from_astropy_mean_density():
    import astropy.units as u

    rho_m0 = (COSMO.astropy.critical_density0 * COSMO.omega_m).to_value(u.Msun / u.Mpc**3)
    # computed with astropy: M = (4 pi / 3) rho_m0 R^3
    np.testing.assert_allclose(hb.lagrangian_radius_mpc(1e14), (3e14 / (4 * np.pi * rho_m0)) ** (1 / 3), rtol=1e-4)


def test_masses_from_a_luminosity_power_law():
    # analytic: M = M_p (L / L_p)^slope, and the log10 form gives the same masses
    m = hb.masses_from_proxy([2e10, 4e10], kind="luminosity", log10=False, pivot=2e10, mass_at_pivot=1e14, slope=1.5)
    np.testing.assert_allclose(m, [1e14, 1e14 * 2**1.5], rtol=1e-12)
    m_log = hb.masses_from_proxy(np.log10([2e10, 4e10]), kind="luminosity", log10=True, pivot=2e10,
                                 mass_at_pivot=1e14, slope=1.5)
    np.testing.assert_allclose(m_log, m, rtol=1e-12)
    with pytest.raises(TheoryError, match="must be > 0"):
        hb.masses_from_proxy([-1.0], kind="luminosity", log10=False, pivot=1.0, mass_at_pivot=1e14, slope=1.0)


def test_pair_weighted_bias_is_the_pair_average_in_each_shell():
    rng = np.random.default_rng(4)
    n = 1500
    z = rng.uniform(0.1, 0.5, n)
    b = 1.0 + 2.0 * rng.random(n) + 3.0 * z  # bias that also runs with redshift
    w = rng.uniform(0.5, 2.0, n)
    shells = hb.pair_weighted_bias(b, z, weights=w, n_nodes=4)
    edges = np.linspace(z.min(), z.max(), 5)
    for k in range(4):
        sel = (z >= edges[k]) & ((z < edges[k + 1]) if k < 3 else (z <= edges[k + 1]))
        bi, wi = b[sel], w[sel]
        ww = np.outer(wi, wi)
        np.fill_diagonal(ww, 0.0)  # pairs i != j only
        # analytic (the module notes): the w_i w_j mean of (b_i + b_j)/2 over pairs, and the square root of
        # the w_i w_j mean of b_i b_j, equal the w-weighted mean to O(1/N) (N ~ 400 per shell here)
        mean_sum = np.sum(ww * 0.5 * (bi[:, None] + bi[None, :])) / ww.sum()
        mean_prod = np.sum(ww * bi[:, None] * bi[None, :]) / ww.sum()
        assert shells[k] == pytest.approx(mean_sum, rel=5e-3)
        assert shells[k] == pytest.approx(np.sqrt(mean_prod), rel=5e-3)
    # one value per node of the template's pair redshift distribution (same histogram)
    assert hb.pair_weighted_bias(b, z).size == pair_redshift_distribution(z)[0].size


def test_template_with_one_bias_per_redshift_node_is_their_weighted_sum():
    edges = np.array([5.0, 25.0, 45.0])
    zn, zw, bn = np.array([0.2, 0.4]), np.array([0.3, 0.7]), np.array([1.5, 2.5])
    both = bin_averaged_velocity(edges, zn, zw, bn)
    # analytic: the redshift average is linear in the per-node curves
    parts = sum(w * bin_averaged_velocity(edges, [z], [1.0], b) for z, w, b in zip(zn, zw, bn))
    np.testing.assert_allclose(both, parts, rtol=1e-12)
