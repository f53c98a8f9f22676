"""Spectral dependence of the Sunyaev-Zel'dovich effects in thermodynamic temperature units."""

from __future__ import annotations

__all__ = ["tsz_spectrum"]

import numpy as np

from ..core.constants import T_CMB_K

# h and k_B, exact in the 2019 SI.
_H_J_S = 6.62607015e-34
_K_J_K = 1.380649e-23


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
