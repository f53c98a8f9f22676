"""Aperture radii: the list a run measures, and the angle of a fixed physical radius at each redshift."""

from __future__ import annotations

__all__ = ["aperture_radii", "angular_radius_arcmin", "radius_scale"]

import numpy as np


def aperture_radii(aperture_cfg) -> np.ndarray:
    """Radii to measure, arcmin: the primary ``radius_arcmin`` first, then the other listed radii ascending."""
    primary = float(aperture_cfg.radius_arcmin)
    extra = sorted({float(r) for r in (aperture_cfg.radii_arcmin or ())} - {primary})
    return np.array([primary] + extra)


def angular_radius_arcmin(radius_kpc, z, cosmo, *, kind="proper") -> np.ndarray:
    """Angle subtended by a fixed physical radius at each redshift, arcmin.

    Parameters
    ----------
    radius_kpc : float, kpc
    z : ndarray of shape (N,)
    cosmo : Cosmology
        Flat LCDM, so the transverse comoving distance is the comoving distance D_C.
    kind : {"proper", "comoving"}
        "proper": theta = R / D_A with D_A = D_C / (1 + z); "comoving": theta = R / D_C.

    Notes
    -----
    Small-angle relation in a flat universe (e.g. Hogg 1999, astro-ph/9905116, eqs. 16 and 18).
    """
    z = np.asarray(z, dtype=np.float64)
    if kind not in ("proper", "comoving"):
        raise ValueError(f"kind must be proper or comoving; got {kind!r}")
    d_c_kpc = 1e3 * np.asarray(cosmo.comoving_distance_mpc(z), dtype=np.float64)
    dist = d_c_kpc / (1.0 + z) if kind == "proper" else d_c_kpc
    return np.degrees(float(radius_kpc) / dist) * 60.0


def radius_scale(aperture_cfg, z, cosmo):
    """Per-tracer factor on every radius: None for fixed angles, else theta_phys(z_i) / radius_arcmin."""
    if aperture_cfg.radius_kpc is None:
        return None
    theta = angular_radius_arcmin(aperture_cfg.radius_kpc, z, cosmo, kind=aperture_cfg.radius_kpc_kind)
    return theta / float(aperture_cfg.radius_arcmin)
