"""Linear theory: EH98 scales and transfer function, growth, sigma_8, FFTLog xi, pairwise velocity."""

import numpy as np
import pytest
from scipy import integrate

from pairvel.core.errors import TheoryError
from pairvel.model import theory as th
from pairvel.model.cosmology import DEFAULT_COSMOLOGY, Cosmology

LCDM_03 = Cosmology(h=0.7, omega_m=0.3, omega_b=0.05)


def test_eh98_characteristic_scales():
    """[calc] SCIENCE.md from Eisenstein & Hu 1998 (ApJ 496, 605) eqs. 2-6, 26 for
    omega_m = 0.14, omega_b = 0.0224, T = 2.7255 K."""
    sc = th.eh98_scales(0.14, 0.0224, 2.7255)
    np.testing.assert_allclose(sc["z_eq"], 3370.8, rtol=2e-5)
    np.testing.assert_allclose(sc["k_eq"], 0.010249, rtol=5e-5)
    np.testing.assert_allclose(sc["z_drag"], 1020.52, rtol=5e-6)
    np.testing.assert_allclose(sc["s"], 151.72, rtol=5e-5)
    np.testing.assert_allclose(sc["s_fit"], 150.56, rtol=5e-5)


def test_eh98_no_wiggle_transfer_values():
    """[calc] SCIENCE.md: Eisenstein & Hu 1998 shape fit (eqs. 26-31), Omega_m = 0.3, Omega_b = 0.05,
    h = 0.7 at k = 0.01, 0.1, 1.0 h/Mpc."""
    k = np.array([0.01, 0.1, 1.0]) * 0.7
    np.testing.assert_allclose(th.transfer_eh98(k, cosmo=LCDM_03, wiggles=False), [0.78613, 0.13120, 0.0045532],
                               rtol=5e-5)  # quoted to 5 significant figures
    # the wiggle form oscillates about the shape fit by a few per cent on BAO scales (published: EH98 Fig. 3)
    kk = np.geomspace(0.02, 0.3, 200)
    ratio = th.transfer_eh98(kk, cosmo=LCDM_03) / th.transfer_eh98(kk, cosmo=LCDM_03, wiggles=False)
    assert 0.9 < ratio.min() < 1.0 < ratio.max() < 1.1


def test_growth_factor_and_rate():
    """[calc] SCIENCE.md for Omega_m = 0.3: D(z)/D(0) (Heath 1977 integral) and exact f; Linder (2005)
    Omega_m(z)^0.55 is 0.57% off at z = 0."""
    np.testing.assert_allclose(th.growth_factor([0.5, 1.0, 2.0], cosmo=LCDM_03), [0.773181, 0.611806, 0.421446],
                               rtol=2e-6)
    np.testing.assert_allclose(th.growth_rate([0.0, 0.5, 1.0, 2.0], cosmo=LCDM_03),
                               [0.51280, 0.74922, 0.86929, 0.95575], rtol=2e-5)
    lin = th.growth_rate(0.0, cosmo=LCDM_03, method="linder")
    np.testing.assert_allclose(lin / th.growth_rate(0.0, cosmo=LCDM_03) - 1, 0.0057, atol=3e-4)


def test_sigma8_normalisation():
    # analytic: the normalisation is defined by this integral
    np.testing.assert_allclose(th.sigma_radius(8.0 / DEFAULT_COSMOLOGY.h), DEFAULT_COSMOLOGY.sigma_8, rtol=1e-6)
    # growth scaling: sigma at z = 1 is D(1) sigma_8 (analytic)
    np.testing.assert_allclose(th.sigma_radius(8.0 / DEFAULT_COSMOLOGY.h, 1.0),
                               DEFAULT_COSMOLOGY.sigma_8 * th.growth_factor(1.0), rtol=1e-6)


def test_fftlog_xi_against_direct_quadrature():
    """xi(r) = (1/2pi^2) int k^2 P j0(kr) dk by brute-force quadrature (scipy.integrate.simpson on a
    4e5-point grid, with the same high-k damping) agrees with FFTLog."""
    r = np.array([5.0, 20.0, 60.0, 105.0, 150.0])
    kk = np.geomspace(1e-5, 60, 400000)
    pk = th.linear_power(kk) * np.exp(-((kk / 20.0) ** 2))
    direct = [integrate.simpson(kk**3 * pk * np.sinc(kk * ri / np.pi), x=np.log(kk)) / (2 * np.pi**2) for ri in r]
    np.testing.assert_allclose(th.correlation_function(r), direct, rtol=1e-3, atol=1e-6)


def test_xibar_of_power_law_and_of_xi():
    """[calc] SCIENCE.md: xi = (r0/r)^gamma gives xibar = 3 xi/(3 - gamma); gamma = 1.8, r0 = 5, r = 10
    -> 0.717936.  The same integral applied to our xi agrees with the Hankel-form xibar."""
    r0, gamma, r = 5.0, 1.8, 10.0
    val = 3 / r**3 * integrate.quad(lambda x: (r0 / x) ** gamma * x * x, 0, r)[0]
    np.testing.assert_allclose(val, 0.717936, rtol=1e-6)
    R = 60.0
    direct = 3 / R**3 * integrate.quad(lambda x: th.correlation_function(x) * x * x, 0.5, R, limit=400)[0]
    small = 3 / R**3 * th.correlation_function(0.5) * 0.5**3 / 3  # r < 0.5 Mpc, xi ~ flat there: < 1e-5
    np.testing.assert_allclose(th.mean_correlation(R), direct + small, rtol=2e-3)


def test_pairwise_velocity_sign_and_size():
    v = th.pairwise_velocity(np.array([20.0, 40.0, 100.0]), 0.3, 1.0)
    assert np.all(v < 0)
    # [mem] linear-theory v12 for matter at z ~ 0.3 is of order -100 to -300 km/s at 20-40 Mpc
    assert -400 < v[0] < -100 and -400 < v[1] < -50 and abs(v[2]) < abs(v[1])
    # analytic limit: for small b^2 xi the velocity is linear in b
    big = th.pairwise_velocity(np.array([150.0]), 0.3, 2.0) / th.pairwise_velocity(np.array([150.0]), 0.3, 1.0)
    np.testing.assert_allclose(big, 2.0, rtol=0.02)
    binned = th.binned_pairwise_velocity(np.arange(0, 301, 20), 0.3, 2.0)
    assert binned.shape == (15,) and np.all(binned < 0)


def test_bad_theory_requests():
    with pytest.raises(TheoryError, match=r"0\.5 <= r <= 2000 Mpc"):
        th.correlation_function([0.1])
    with pytest.raises(TheoryError, match="needs omega_b > 0"):
        th.transfer_eh98([0.1], cosmo=Cosmology(omega_b=0.0))
    with pytest.raises(TheoryError, match="method must be"):
        th.growth_rate(0.5, method="guess")


def test_eh98_against_colossus():
    """EH98 P(k) and xi(r) against the independent implementation in the general-purpose cosmology
    toolkit colossus (test-only; skipped when not installed)."""
    cosmology = pytest.importorskip("colossus.cosmology.cosmology")
    c = DEFAULT_COSMOLOGY
    cc = cosmology.setCosmology("pairvel-test", params={"flat": True, "H0": 100 * c.h, "Om0": c.omega_m,
                                "Ob0": c.omega_b, "sigma8": c.sigma_8, "ns": c.n_s, "Tcmb0": c.t_cmb_k,
                                "relspecies": False}, persistence="")
    k = np.geomspace(0.01, 0.3, 30)  # 1/Mpc
    theirs = cc.matterPowerSpectrum(k / c.h, z=0.0, model="eisenstein98") / c.h**3
    np.testing.assert_allclose(th.linear_power(k), theirs, rtol=0.02)
    r = np.array([10.0, 30.0, 60.0, 100.0])
    xi_theirs = cc.correlationFunction(r * c.h, z=0.0, ps_args={"model": "eisenstein98"})
    np.testing.assert_allclose(th.correlation_function(r), xi_theirs, rtol=0.03)


def test_growth_against_ode():
    """Independent method: integrate the linear growth ODE
    D'' + (2 + dlnE/dlna) D' = 1.5 Omega_m(a) D (primes: d/dln a) with scipy.integrate.solve_ivp from
    a = 1e-3 (D = a, matter domination) for flat matter + Lambda; D/D(0) and f = D'/D agree with the
    Heath-integral growth_factor and growth_rate."""
    om = LCDM_03.omega_m

    def rhs(lna, y):
        a = np.exp(lna)
        e2 = om / a**3 + 1 - om
        dlne = -1.5 * om / a**3 / e2
        return [y[1], -(2 + dlne) * y[1] + 1.5 * om / a**3 / e2 * y[0]]

    z = np.array([2.0, 1.0, 0.5, 0.0])
    a0 = 1e-3
    sol = integrate.solve_ivp(rhs, (np.log(a0), 0.0), [a0, a0], t_eval=np.log(1 / (1 + z)), rtol=1e-10, atol=1e-14)
    d, dp = sol.y
    np.testing.assert_allclose(d / d[-1], th.growth_factor(z, cosmo=LCDM_03), rtol=1e-6)
    np.testing.assert_allclose(dp / d, th.growth_rate(z, cosmo=LCDM_03), rtol=1e-6)


def test_eh98_no_wiggle_against_colossus():
    """The no-wiggle (zero-baryon shape) EH98 P(k) on 0.01-0.3 /Mpc and xi on 10-150 Mpc against the
    independent 'eisenstein98_zb' model of the general-purpose toolkit colossus (test-only): measured
    agreement 7e-5 in P(k) and 5e-3 in xi; tolerances 1e-3 and 1e-2."""
    cosmology = pytest.importorskip("colossus.cosmology.cosmology")
    c = DEFAULT_COSMOLOGY
    cc = cosmology.setCosmology("pairvel-test-nw", params={"flat": True, "H0": 100 * c.h, "Om0": c.omega_m,
                                "Ob0": c.omega_b, "sigma8": c.sigma_8, "ns": c.n_s, "Tcmb0": c.t_cmb_k,
                                "relspecies": False}, persistence="")
    k = np.geomspace(0.01, 0.3, 30)
    theirs = cc.matterPowerSpectrum(k / c.h, z=0.0, model="eisenstein98_zb") / c.h**3
    np.testing.assert_allclose(th.linear_power(k, wiggles=False), theirs, rtol=1e-3)
    r = np.array([10.0, 30.0, 60.0, 100.0, 150.0])
    xi_theirs = cc.correlationFunction(r * c.h, z=0.0, ps_args={"model": "eisenstein98_zb"})
    np.testing.assert_allclose(th.correlation_function(r, wiggles=False), xi_theirs, rtol=1e-2)
