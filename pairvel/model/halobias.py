"""Linear bias of the tracers from a mass (or luminosity) proxy: Tinker et al. (2010) and pair weighting.

Mass definition: M_Delta, the mass inside the sphere whose mean density is Delta times the *mean*
matter density at the halo's redshift (Delta = 200 by default, i.e. M200m), in Msun (not Msun/h,
like every length in pairvel is Mpc, not Mpc/h).  The peak height is nu = delta_c / sigma(R_L, z)
with the Lagrangian radius R_L = (3 M / (4 pi rho_m0))^(1/3) (comoving Mpc) and sigma the rms of
the run's own linear P(k) in top-hat spheres (:func:`pairvel.model.theory.sigma_radius`, so a P(k)
table given in the config is used here too).  The bias fitting function is Tinker et al. (2010,
ApJ 724, 878, eq. 6 and Table 2):

    b(nu) = 1 - A nu^a / (nu^a + delta_c^a) + B nu^b + C nu^c,   y = log10 Delta,
    A = 1 + 0.24 y exp(-(4/y)^4),  a = 0.44 y - 0.88,  B = 0.183,  b = 1.5,
    C = 0.019 + 0.107 y + 0.19 exp(-(4/y)^4),  c = 2.4,  delta_c = 1.686,

fitted for 200 <= Delta <= 3200.

**How pairs weight the bias** (:func:`pair_weighted_bias`).  In the template (see
:mod:`pairvel.model.theory`) the bias enters as b xibar in the numerator and b^2 xi in the
denominator.  A pair of tracers with biases b_i and b_j has a mean relative velocity with
(b_i + b_j)/2 in the numerator and b_i b_j in the denominator; the estimator weights the pair by
w_i w_j (times c_ij^2, which does not depend on the tracers' masses).  If, within a thin redshift
shell, which tracers form pairs does not depend on their masses, the w_i w_j-weighted mean of
(b_i + b_j)/2 over the shell's pairs is the w-weighted mean bias of the shell's tracers, and the
mean of b_i b_j is its square: so each shell k of the template's pair-redshift distribution
(:func:`pairvel.model.template.pair_redshift_distribution`) gets the weighted mean bias b_k of
its tracers, each evaluated at its own redshift and mass.  The single number reported,
b_eff = sum_k P_k b_k, weights the shells by their share P_k of the pairs.
"""

from __future__ import annotations

__all__ = ["DELTA_C", "RHO_CRIT_H2_MSUN_MPC3", "lagrangian_radius_mpc", "masses_from_proxy", "pair_weighted_bias",
           "peak_height", "tinker10_bias", "tracer_bias"]

import numpy as np

from ..core.errors import TheoryError
from .cosmology import DEFAULT_COSMOLOGY, Cosmology
from .theory import growth_factor, sigma_radius

#: Critical density today over h^2, Msun / Mpc^3: 3 (100 km/s/Mpc)^2 / (8 pi G) with
#: G = 4.30091e-9 Mpc (km/s)^2 / Msun (IAU nominal solar mass parameter; computed, 2.77537e11).
RHO_CRIT_H2_MSUN_MPC3 = 3.0 * 100.0**2 / (8.0 * np.pi * 4.30091727e-9)
#: Linear collapse threshold used by Tinker et al. (2010).
DELTA_C = 1.686
_MASS_RANGE = (1e9, 1e17)  # Msun: beyond it the proxy is surely not a halo mass in Msun


def tinker10_bias(nu, delta: float = 200.0):
    """Tinker et al. (2010) halo bias b(nu) for halos of overdensity ``delta`` x mean density.

    Parameters
    ----------
    nu : array-like
        Peak height delta_c / sigma(M, z).
    delta : float, default 200
        Overdensity relative to the mean matter density, 200 <= delta <= 3200.
    """
    if not 200.0 <= delta <= 3200.0:
        raise TheoryError(f"the Tinker et al. 2010 bias is fitted for 200 <= Delta <= 3200 (mean density); "
                          f"got {delta:g}")
    nu = np.asarray(nu, dtype=float)
    y = np.log10(delta)
    e = np.exp(-((4.0 / y) ** 4))
    big_a, a = 1.0 + 0.24 * y * e, 0.44 * y - 0.88
    big_b, b = 0.183, 1.5
    big_c, c = 0.019 + 0.107 * y + 0.19 * e, 2.4
    return 1.0 - big_a * nu**a / (nu**a + DELTA_C**a) + big_b * nu**b + big_c * nu**c


def lagrangian_radius_mpc(mass_msun, *, cosmo: Cosmology = DEFAULT_COSMOLOGY):
    """Comoving radius of the sphere that holds ``mass_msun`` at the mean matter density, Mpc."""
    rho_m0 = cosmo.omega_m * RHO_CRIT_H2_MSUN_MPC3 * cosmo.h**2
    return (3.0 * np.asarray(mass_msun, dtype=float) / (4.0 * np.pi * rho_m0)) ** (1.0 / 3.0)


def peak_height(mass_msun, z, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None,
                n_grid: int = 48):
    """nu = delta_c / sigma(R_L(M), z) for masses in Msun and redshifts z (broadcast together).

    sigma(R) at z = 0 is computed on ``n_grid`` log-spaced masses spanning the input and
    interpolated in log-log (smooth to far below 1e-4 at 48 nodes per 2 decades or more); the
    redshift enters through the growth factor D(z).
    """
    m, zz = np.broadcast_arrays(np.asarray(mass_msun, dtype=float), np.asarray(z, dtype=float))
    lo, hi = float(m.min()), float(m.max())
    grid = np.geomspace(lo / 1.01, hi * 1.01, n_grid)
    sig0 = sigma_radius(lagrangian_radius_mpc(grid, cosmo=cosmo), 0.0, cosmo=cosmo, wiggles=wiggles, power=power)
    sigma = np.exp(np.interp(np.log(m), np.log(grid), np.log(sig0)))
    z_grid = np.linspace(float(zz.min()), float(zz.max()) + 1e-6, 64)  # D(z) is smooth: linear interpolation
    d = np.interp(zz, z_grid, growth_factor(z_grid, cosmo=cosmo))     # on 64 nodes is good to < 1e-4
    return DELTA_C / (sigma * d)


def tracer_bias(mass_msun, z, *, delta: float = 200.0, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True,
                power=None):
    """Tinker et al. (2010) bias of halos of mass M_Delta (Msun, Delta x mean density) at redshift z."""
    m = np.asarray(mass_msun, dtype=float)
    if m.size == 0 or not np.all(np.isfinite(m)) or m.min() < _MASS_RANGE[0] or m.max() > _MASS_RANGE[1]:
        where = "" if m.size == 0 else f"; got [{np.nanmin(m):.3g}, {np.nanmax(m):.3g}]"
        raise TheoryError(f"halo masses for the bias must be finite and within [{_MASS_RANGE[0]:g}, "
                          f"{_MASS_RANGE[1]:g}] Msun{where}")
    nu = peak_height(m, z, cosmo=cosmo, wiggles=wiggles, power=power)
    return tinker10_bias(nu, delta)


def masses_from_proxy(proxy, *, kind: str, log10: bool, pivot: float | None = None, mass_at_pivot: float | None = None,
                      slope: float | None = None):
    """Halo masses in Msun from a proxy column.

    ``kind`` "mass": the proxy is M_Delta in Msun (or log10 of it when ``log10``).  ``kind``
    "luminosity": M = mass_at_pivot (L / pivot)^slope, with L the proxy (or 10^proxy when ``log10``)
    in the units of ``pivot``.
    """
    x = np.asarray(proxy, dtype=float)
    if log10:
        x = 10.0**x
    if kind == "mass":
        return x
    if kind != "luminosity":
        raise TheoryError(f"bias proxy kind must be 'mass' or 'luminosity'; got {kind!r}")
    if np.any(x <= 0):
        raise TheoryError("a luminosity proxy must be > 0 for the mass-luminosity power law")
    return mass_at_pivot * (x / pivot) ** slope


def pair_weighted_bias(bias, z, *, weights=None, n_nodes: int = 16):
    """Mean bias per redshift shell, weighted as pairs weight it (see the module notes).

    Parameters
    ----------
    bias, z : ndarray of shape (n,)
        Per-tracer bias and redshift.
    weights : ndarray of shape (n,), optional
        Per-tracer pair weights w_i (pairs weigh w_i w_j); None for equal weights.
    n_nodes : int, default 16
        Shells between the lowest and highest redshift, binned exactly as
        :func:`pairvel.model.template.pair_redshift_distribution` bins them.

    Returns
    -------
    ndarray of shape (m,)
        w-weighted mean bias of each shell that holds tracers (the shells that function keeps), or
        one value when all redshifts are equal.
    """
    b, z = np.asarray(bias, dtype=float), np.asarray(z, dtype=float)
    w = np.ones_like(b) if weights is None else np.asarray(weights, dtype=float)
    lo, hi = float(z.min()), float(z.max())
    if hi - lo < 1e-6:
        return np.array([np.sum(w * b) / np.sum(w)])
    counts, _ = np.histogram(z, bins=n_nodes, range=(lo, hi))
    num, _ = np.histogram(z, bins=n_nodes, range=(lo, hi), weights=w * b)
    den, _ = np.histogram(z, bins=n_nodes, range=(lo, hi), weights=w)
    keep = counts > 0
    if np.any(den[keep] <= 0):
        raise TheoryError("tracer weights must have a positive sum in every redshift shell holding tracers, "
                          "for the pair-weighted bias")
    return num[keep] / den[keep]
