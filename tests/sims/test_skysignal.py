"""The tracer signal of the simulated skies: kSZ from the mock's velocity field, thermal SZ, radius response."""

import math

import numpy as np
import pytest

from pairvel.core.constants import C_KM_S, T_CMB_UK
from pairvel.maps.photometry import point_source_fraction
from pairvel.model.cosmology import DEFAULT_COSMOLOGY
from pairvel.model.theory import growth_factor, growth_rate
from pairvel.pairs.geometry import comoving_positions
from pairvel.sims._fields import _grid_wavevectors, _power_at
from pairvel.sims.skysignal import tracer_signal


def _tracers(n, seed):
    rng = np.random.default_rng(seed)
    return rng.uniform(10, 20, n), rng.uniform(-5, 5, n), rng.uniform(0.10, 0.14, n)


def test_thermal_sz_mean_scatter_and_radius_response():
    """Analytic: the log-normal decrement has mean -A (10^(s g) / <10^(s g)>), log10 scatter s; with no
    beam a point-like profile gives radius theta_k (theta_0 / theta_k)^2 of the primary aperture, and
    with a beam times f(theta_k) / f(theta_0) (point_source_fraction)."""
    ra, dec, z = _tracers(4000, 1)
    out = tracer_signal(ra, dec, z, [2.0, 4.0], tau=0.0, tsz_uk=5.0, tsz_scatter_dex=0.3)(np.random.default_rng(2))
    assert out.shape == (2, 4000) and np.all(out < 0)
    # mean of 4000 log-normal draws: sd 5 sqrt(exp((0.3 ln 10)^2) - 1) / sqrt(4000) = 0.06 uK
    assert abs(out[0].mean() + 5.0) < 0.25
    np.testing.assert_allclose(np.log10(-out[0]).std(), 0.3, rtol=0.05)
    np.testing.assert_allclose(out[1], out[0] / 4.0, rtol=1e-12)
    scale = np.linspace(0.5, 1.5, 4000)
    beamed = tracer_signal(ra, dec, z, [2.0, 4.0], tau=0.0, tsz_uk=5.0, beam_fwhm_arcmin=1.5,
                           radius_scale=scale)(np.random.default_rng(2))
    f = [point_source_fraction(2.0 * scale[0], 1.5), point_source_fraction(4.0 * scale[0], 1.5)]
    np.testing.assert_allclose(beamed[1, 0] / beamed[0, 0], f[1] / f[0] / 4.0, rtol=1e-12)


@pytest.mark.filterwarnings("ignore")
def test_ksz_has_the_variance_of_the_linear_velocity_field():
    """Analytic for the field of :mod:`pairvel.sims._fields`: u_0(k) = i k delta_0(k) / k^2, so the radial
    component at a tracer has variance sum over the box's modes of P(k) / cell^3 (k.n)^2 / k^4 / n_cells
    (Nyquist planes left out), and two tracers' covariance that sum with cos(k.(x_i - x_j)); with
    v = a H f D u_0, dT = -tau T_CMB v_r / c.  120 skies at 6 tracers:
    the variance over skies scatters by sqrt(2/119) = 13% per tracer (the 6 are correlated: their
    mean about as much)."""
    ra, dec, z = _tracers(6, 3)
    tau = 1e-3
    signal = tracer_signal(ra, dec, z, [2.0], tau=tau, cell_mpc=25.0)
    rng = np.random.default_rng(4)
    draws = np.array([signal(rng)[0] for _ in range(120)])
    g = signal.grid
    kx, ky, kz, k2 = _grid_wavevectors(g["shape"], g["cell_mpc"])
    power = _power_at(np.sqrt(k2), DEFAULT_COSMOLOGY) / g["cell_mpc"] ** 3
    power[0, 0, 0] = 0.0
    for axis, n in enumerate(g["shape"]):
        if n % 2 == 0:
            power[(slice(None),) * axis + (n // 2,)] = 0.0
    pos = comoving_positions(ra, dec, z) @ g["frame"].T  # grid frame
    unit = pos / np.linalg.norm(pos, axis=1)[:, None]
    kn = [kx * n[0] + ky * n[1] + kz * n[2] for n in unit]

    def cov_u(i, j):  # <u_r,i u_r,j> = sum P (k.n_i)(k.n_j) cos(k.(x_i - x_j)) / k^4 / n_cells
        d = pos[i] - pos[j]
        return float(np.sum(power * kn[i] * kn[j] * np.cos(kx * d[0] + ky * d[1] + kz * d[2]) / k2**2) / power.size)

    vel = growth_rate(z) * growth_factor(z) * DEFAULT_COSMOLOGY.hubble_km_s_mpc(z) / (1 + z)
    ratio = [draws[:, i].var(ddof=1) / (cov_u(i, i) * (vel[i] * tau * T_CMB_UK / C_KM_S) ** 2) for i in range(ra.size)]
    assert abs(np.mean(ratio) - 1.0) < 0.25, ratio
    # the closest pair's correlation over skies: from 120 skies it scatters by (1 - r^2) / sqrt(119) ~ 0.07
    i, j = min(((a, b) for a in range(6) for b in range(a)), key=lambda ab: np.linalg.norm(pos[ab[0]] - pos[ab[1]]))
    expected = cov_u(i, j) / math.sqrt(cov_u(i, i) * cov_u(j, j))
    assert expected > 0.3 and abs(np.corrcoef(draws[:, i], draws[:, j])[0, 1] - expected) < 0.25
