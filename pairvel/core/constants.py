"""Physical constants and unit conventions shared by every stage.

Package defaults: comoving distances in Mpc, velocities in km/s, temperatures in thermodynamic
microkelvin (uK_CMB), angles in degrees at interfaces and radians inside.
"""

from __future__ import annotations

__all__ = ["C_KM_S", "T_CMB_K", "T_CMB_UK", "ARCMIN_RAD"]

import math

#: Speed of light in km/s (exact, SI definition).
C_KM_S = 299792.458
#: CMB monopole temperature in K (Fixsen 2009, ApJ 707, 916).
T_CMB_K = 2.72548
#: The same in microkelvin.
T_CMB_UK = T_CMB_K * 1e6
#: One arcminute in radians.
ARCMIN_RAD = math.pi / (180.0 * 60.0)
