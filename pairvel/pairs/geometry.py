"""Comoving geometry: sky positions and redshifts to 3D comoving positions in Mpc."""

from __future__ import annotations

__all__ = ["unit_vectors", "comoving_positions"]

import numpy as np
from scipy.interpolate import CubicSpline

from ..core.sphere import unit_vectors
from ..model.cosmology import DEFAULT_COSMOLOGY, Cosmology


def comoving_positions(ra_deg, dec_deg, z, *, cosmo: Cosmology = DEFAULT_COSMOLOGY) -> np.ndarray:
    """Comoving Cartesian positions, observer at the origin.

    Parameters
    ----------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    z : ndarray of shape (n,)
        Redshifts (> 0).
    cosmo : Cosmology
        Flat LCDM; distances from :mod:`astropy.cosmology`.

    Returns
    -------
    ndarray of shape (n, 3), comoving Mpc
    """
    z = np.asarray(z, dtype=float)
    # astropy integrates per element; a cubic spline on a fine grid is ~1e-10 relative and fast.
    if z.size > 2000:
        grid = np.linspace(0.0, z.max() * 1.0001 + 1e-6, 4001)
        dist = CubicSpline(grid, cosmo.comoving_distance_mpc(grid))(z)
    else:
        dist = cosmo.comoving_distance_mpc(z)
    return unit_vectors(ra_deg, dec_deg) * dist[:, None]
