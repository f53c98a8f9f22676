"""Directions on the sphere shared by the map and pair stages."""

from __future__ import annotations

__all__ = ["unit_vectors"]

import numpy as np


def unit_vectors(ra_deg, dec_deg) -> np.ndarray:
    """Unit vectors (n, 3) in equatorial Cartesian axes for RA, Dec in degrees."""
    ra = np.radians(np.asarray(ra_deg, dtype=float))
    dec = np.radians(np.asarray(dec_deg, dtype=float))
    cos_dec = np.cos(dec)
    return np.column_stack([cos_dec * np.cos(ra), cos_dec * np.sin(ra), np.sin(dec)])
