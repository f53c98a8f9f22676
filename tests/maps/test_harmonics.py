"""a_lm layout and beam windows shared by every pixelisation."""

import healpy as hp
import numpy as np
import pytest

from pairvel.core.constants import ARCMIN_RAD
from pairvel.maps.harmonics import alm_ell_m, gaussian_beam


@pytest.mark.parametrize("lmax", [0, 1, 2, 7, 191, 1500])
def test_alm_layout_is_healpys(lmax):
    # computed with healpy (Alm.getlm): the layout healpy and ducc0 share
    ell, m = alm_ell_m(lmax)
    hp_ell, hp_m = hp.Alm.getlm(lmax)
    np.testing.assert_array_equal(ell, hp_ell)
    np.testing.assert_array_equal(m, hp_m)
    assert ell.size == (lmax + 1) * (lmax + 2) // 2  # analytic


@pytest.mark.parametrize("fwhm_arcmin", [0.5, 1.4, 7.0, 80.0])
def test_gaussian_beam_is_healpys_bit_for_bit(fwhm_arcmin):
    # computed with healpy (gauss_beam), bit for bit, so that swapping one for the other changes no number
    np.testing.assert_array_equal(gaussian_beam(fwhm_arcmin, 4000), hp.gauss_beam(fwhm_arcmin * ARCMIN_RAD, lmax=4000))


def test_gaussian_beam_is_the_transform_of_a_gaussian_profile():
    """Computed with scipy: the flat-sky transform of a unit-integral Gaussian of sigma s,
    int 2 pi t G(t) J0(l t) dt, equals exp(-l^2 s^2 / 2); B_l has l(l+1) for l^2, a relative
    difference exp(-l s^2 / 2) - 1, below 1e-3 here."""
    from scipy.integrate import quad
    from scipy.special import j0

    fwhm = 7.0
    s = fwhm * ARCMIN_RAD / np.sqrt(8 * np.log(2))
    beam = gaussian_beam(fwhm, 2000)
    for ell in (100, 1000, 2000):
        hankel = quad(lambda t, ell=ell: t * np.exp(-t**2 / (2 * s**2)) / s**2 * j0(ell * t), 0, 12 * s, limit=200)[0]
        assert beam[ell] == pytest.approx(hankel, rel=1e-3)
