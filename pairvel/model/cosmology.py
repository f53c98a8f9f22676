"""The flat LCDM cosmology every stage shares: parameters, distances and expansion rate.

Distances and H(z) come from :mod:`astropy.cosmology`, so the theory template, the geometry
stage and the mocks all use one expansion history.
"""

from __future__ import annotations

__all__ = ["Cosmology", "DEFAULT_COSMOLOGY", "distance_convention"]

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from ..core.constants import T_CMB_K
from ..core.errors import ConfigError


@dataclass(frozen=True)
class Cosmology:
    """Flat LCDM parameters.

    Parameters
    ----------
    h : float
        H0 / (100 km/s/Mpc).
    omega_m, omega_b : float
        Total matter and baryon density parameters today (Omega_m, Omega_b).
    n_s : float
        Scalar spectral index.
    sigma_8 : float
        rms of linear density fluctuations in spheres of 8 Mpc/h at z = 0.
    t_cmb_k : float
        CMB temperature in K, used for the radiation density and the transfer function.
    n_eff : float, default 3.046
        Effective number of massless neutrino species in the radiation density.
    radiation : bool, default True
        Include radiation (photons at ``t_cmb_k`` and ``n_eff`` massless neutrinos) in E(z); False
        gives matter + Lambda distances.

    Notes
    -----
    Defaults are close to a recent CMB-based fit (values recalled from memory; see
    SCIENCE.md).  The distance convention: flat, so Omega_Lambda = 1 - Omega_m - Omega_r, with

        E(z)^2 = Omega_m (1 + z)^3 + Omega_r (1 + z)^4 + Omega_Lambda,
        Omega_r = Omega_gamma (1 + 0.2271 N_eff),  Omega_gamma h^2 = 2.4728e-5 (T_CMB / 2.7255 K)^4

    (massless neutrinos, the form astropy.cosmology.FlatLambdaCDM evaluates); with ``radiation``
    false, Omega_r = 0.  The growth factor (:mod:`pairvel.model.theory`) always uses matter + Lambda.
    """

    h: float = 0.677
    omega_m: float = 0.310
    omega_b: float = 0.049
    n_s: float = 0.965
    sigma_8: float = 0.810
    t_cmb_k: float = T_CMB_K
    n_eff: float = 3.046
    radiation: bool = True

    def __post_init__(self):
        checks = {
            "h": 0.2 <= self.h <= 1.5,
            "omega_m": 0.01 <= self.omega_m <= 1.0,
            "omega_b": 0.0 <= self.omega_b < self.omega_m,
            "n_s": 0.5 <= self.n_s <= 1.5,
            "sigma_8": 0.1 <= self.sigma_8 <= 2.0,
            "t_cmb_k": 1.0 <= self.t_cmb_k <= 4.0,
            "n_eff": 0.0 <= self.n_eff <= 10.0,
            "radiation": isinstance(self.radiation, bool),
        }
        for name, ok in checks.items():
            if not ok:
                raise ConfigError(
                    f"cosmology parameter '{name}' is out of range; got {getattr(self, name)!r}",
                    key=f"cosmology.{name}",
                )

    @cached_property
    def astropy(self):
        """The matching :class:`astropy.cosmology.FlatLambdaCDM` instance."""
        from astropy.cosmology import FlatLambdaCDM

        return FlatLambdaCDM(H0=100.0 * self.h, Om0=self.omega_m, Ob0=self.omega_b,
                             Tcmb0=self.t_cmb_k if self.radiation else 0.0, Neff=self.n_eff, m_nu=0.0)


    def comoving_distance_mpc(self, z):
        """Line-of-sight comoving distance in Mpc at redshift ``z`` (array-like)."""
        return np.asarray(self.astropy.comoving_distance(np.asarray(z, dtype=float)).value)

    def efunc(self, z):
        """E(z) = H(z) / H0."""
        return np.asarray(self.astropy.efunc(np.asarray(z, dtype=float)))

    def hubble_km_s_mpc(self, z):
        """H(z) in km/s/Mpc."""
        return 100.0 * self.h * self.efunc(z)

    def omega_m_z(self, z):
        """Matter density parameter at redshift ``z``."""
        return np.asarray(self.astropy.Om(np.asarray(z, dtype=float)))


DEFAULT_COSMOLOGY = Cosmology()


def distance_convention(cosmo) -> str:
    """One line saying what the distances and H(z) include, for reports.

    ``cosmo`` is a :class:`Cosmology` or anything with its attributes (a config read back from
    summary.json); a record without ``radiation`` or ``n_eff`` predates those keys and had the defaults.
    """
    if not getattr(cosmo, "radiation", True):
        return "flat; matter + Lambda, no radiation"
    return (f"flat; matter + Lambda + radiation (photons at {cosmo.t_cmb_k:g} K, N_eff = "
            f"{getattr(cosmo, 'n_eff', Cosmology.n_eff):g} massless neutrinos)")
