"""Spherical-harmonic conventions shared by every pixelisation: the a_lm layout and beam windows.

a_lm arrays hold m >= 0 only, in the triangular m-major layout that healpy and ducc0 both use:
for m = 0, 1, ..., lmax, the multipoles l = m..lmax in turn, so the first lmax + 1 entries are
the real-valued m = 0 coefficients.  :meth:`pairvel.maps.skymap.SkyMap.synthesise` takes this layout.
"""

from __future__ import annotations

__all__ = ["alm_ell_m", "gaussian_beam"]

import numpy as np

from ..core.constants import ARCMIN_RAD


def alm_ell_m(lmax: int) -> tuple[np.ndarray, np.ndarray]:
    """Multipole l and order m of every a_lm entry, each of shape ((lmax + 1)(lmax + 2) / 2,), int64.

    Examples
    --------
    >>> [a.tolist() for a in alm_ell_m(2)]
    [[0, 1, 2, 1, 2, 2], [0, 0, 0, 1, 1, 2]]
    """
    lmax = int(lmax)
    m = np.repeat(np.arange(lmax + 1), np.arange(lmax + 1, 0, -1))
    start = np.concatenate([[0], np.cumsum(np.arange(lmax + 1, 1, -1))])  # first entry of each m
    ell = np.arange(m.size) - start[m] + m
    return ell.astype(np.int64), m.astype(np.int64)


def gaussian_beam(fwhm_arcmin: float, lmax: int) -> np.ndarray:
    """Window B_l = exp(-l (l + 1) sigma^2 / 2) of a circular Gaussian beam, l = 0..lmax.

    sigma = FWHM / sqrt(8 ln 2) in radians [analytic, flat-sky limit of the Legendre transform of a
    Gaussian; the same expression as ``healpy.gauss_beam``].
    """
    sigma = fwhm_arcmin * ARCMIN_RAD / np.sqrt(8.0 * np.log(2.0))
    ell = np.arange(lmax + 1)
    return np.exp(-0.5 * ell * (ell + 1) * sigma ** 2)
