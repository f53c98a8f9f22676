"""Spectral dependence of the Sunyaev-Zel'dovich effects in thermodynamic temperature units."""

from __future__ import annotations

__all__ = ["tsz_spectrum", "tsz_relativistic_first_order", "optical_depth_from_y", "ELECTRON_REST_ENERGY_KEV"]

import numpy as np

from ..core.constants import T_CMB_K

# h and k_B, exact in the 2019 SI.
_H_J_S = 6.62607015e-34
_K_J_K = 1.380649e-23
#: Electron rest energy m_e c^2 in keV (CODATA 2022: 0.51099895069 MeV).
ELECTRON_REST_ENERGY_KEV = 510.99895069


def tsz_spectrum(freq_ghz, *, t_cmb_k: float = T_CMB_K) -> np.ndarray:
    """Thermal-SZ spectral factor in thermodynamic temperature, f(x) = x coth(x/2) - 4.

    Parameters
    ----------
    freq_ghz : float or array_like, GHz
        Observing frequencies, > 0.
    t_cmb_k : float, K, default :data:`pairvel.core.constants.T_CMB_K`
        CMB temperature in x = h nu / (k_B T_CMB).

    Returns
    -------
    ndarray of freq_ghz's shape
        dT_tSZ / (T_CMB y): negative below the null near 217.5 GHz, positive above.

    References
    ----------
    Sunyaev & Zel'dovich 1972, Comments Astrophys. Space Phys. 4, 173; Carlstrom, Holder & Reese
    2002, ARA&A 40, 643 (eq. 2).
    """
    nu = np.asarray(freq_ghz, dtype=float)
    if np.any(~np.isfinite(nu) | (nu <= 0)):
        raise ValueError(f"frequencies must be finite and > 0 GHz; got {nu.tolist()}")
    x = _H_J_S * nu * 1e9 / (_K_J_K * t_cmb_k)
    return x / np.tanh(0.5 * x) - 4.0


def tsz_relativistic_first_order(freq_ghz, te_kev, *, t_cmb_k: float = T_CMB_K) -> np.ndarray:
    """tSZ spectral factor with the first-order relativistic correction, f(x) + theta_e Y_1(x).

    Parameters
    ----------
    freq_ghz : array_like of shape (k,), GHz
    te_kev : float or array_like of shape (n,), keV
        Electron temperature; theta_e = k_B T_e / (m_e c^2).
    t_cmb_k : float, K

    Returns
    -------
    ndarray of shape (k,) for a scalar ``te_kev``, else (n, k)

    Notes
    -----
    Y_1 = -10 + 47/2 X - 42/5 X^2 + 7/10 X^3 + S^2 (-21/5 + 7/5 X), X = x coth(x/2), S = x / sinh(x/2)
    (Challinor & Lasenby 1998, ApJ 499, 1; Itoh, Kohyama & Nozawa 1998, ApJ 502, 7).  In the
    Rayleigh-Jeans limit Y_1 -> 17/5, i.e. dT/T = -2y (1 - 17/10 theta_e).  Higher orders (theta_e^2 and
    beyond) and the relativistic corrections of the kSZ are not included; at 10 keV the next order
    changes f by a few tenths of a percent near 150 GHz [from memory].
    """
    f0 = tsz_spectrum(freq_ghz, t_cmb_k=t_cmb_k)
    te = np.asarray(te_kev, dtype=float)
    if np.any(~np.isfinite(te) | (te <= 0)):
        raise ValueError(f"electron temperatures must be finite and > 0 keV; got {te.ravel()[:5].tolist()}")
    x = _H_J_S * np.asarray(freq_ghz, dtype=float) * 1e9 / (_K_J_K * t_cmb_k)
    big_x = x / np.tanh(0.5 * x)
    s2 = (x / np.sinh(0.5 * x)) ** 2
    y1 = -10.0 + 23.5 * big_x - 8.4 * big_x**2 + 0.7 * big_x**3 + s2 * (-4.2 + 1.4 * big_x)
    theta = te / ELECTRON_REST_ENERGY_KEV
    return f0 + np.multiply.outer(theta, y1)


def optical_depth_from_y(y, te_kev) -> np.ndarray:
    """Optical depth of a cluster from its Compton y in the non-relativistic limit, tau = y m_e c^2 / (k_B T_e).

    Parameters
    ----------
    y : float or array_like
        Compton y (in the same aperture as the wanted tau).
    te_kev : float or array_like, keV
        Electron temperature k_B T_e, > 0; broadcast against ``y``.

    Returns
    -------
    ndarray
        tau, of the broadcast shape.

    Notes
    -----
    y = (k_B T_e / m_e c^2) tau for an isothermal electron gas (Carlstrom, Holder & Reese 2002,
    ARA&A 40, 643, eq. 1 with a constant temperature).  Relativistic corrections to the tSZ spectrum,
    percent-level at several keV, are not applied.
    """
    te = np.asarray(te_kev, dtype=float)
    if np.any(~np.isfinite(te) | (te <= 0)):
        raise ValueError(f"electron temperatures must be finite and > 0 keV; got {te.ravel()[:5].tolist()}")
    return np.asarray(y, dtype=float) * ELECTRON_REST_ENERGY_KEV / te
