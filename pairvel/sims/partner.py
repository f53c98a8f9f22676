"""The second, galaxy-like catalogue of a synthetic survey (``pairvel mock --partner-tracers N``).

The partner tracers are Poisson-sampled from the same linear density and velocity fields as the
cluster-like catalogue (:mod:`pairvel.sims.mock`), with their own linear bias, and all carry one
optical depth ``tau_mean`` and no thermal SZ.  Their kSZ is painted into the same maps, so both
catalogues carry signal, and the cross curve of the two measures

    tau_cross = (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2)

(:mod:`pairvel.stats.cross`), which truth.json records as ``partner.tau_cross``.
"""

from __future__ import annotations

__all__ = ["PARTNER_FILE", "PartnerSpec", "partner_spec", "partner_ksz", "partner_record", "write_partner"]

import math
from dataclasses import dataclass

import numpy as np

from ..core.constants import ARCMIN_RAD, C_KM_S, T_CMB_UK
from ..core.errors import InputError

PARTNER_FILE = "partner_galaxies.fits"


@dataclass(frozen=True)
class PartnerSpec:
    """Expected number, linear bias and optical depth of the partner tracers."""

    n_tracers: int
    bias: float
    tau_mean: float


def partner_spec(n_tracers, bias, tau_mean) -> PartnerSpec | None:
    """The checked partner options; None when ``n_tracers`` is 0 (no partner catalogue)."""
    if isinstance(n_tracers, bool) or not isinstance(n_tracers, (int, np.integer)) or n_tracers < 0 or n_tracers == 1:
        raise InputError(f"mock option 'partner_n_tracers' must be 0 (none) or an integer >= 2; got {n_tracers!r}",
                         key="partner_n_tracers")
    if n_tracers == 0:
        return None
    for name, value in (("partner_bias", bias), ("partner_tau_mean", tau_mean)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value < 0:
            raise InputError(f"mock option '{name}' must be a finite number >= 0; got {value!r}", key=name)
    return PartnerSpec(int(n_tracers), float(bias), float(tau_mean))


def partner_ksz(spec, tracers):
    """(pixels, values) of the partner tracers' kSZ, dT = -tau T_CMB v_r / c, painted like the clusters'
    (beam-shaped, solid-angle integral dT pi theta_ap^2)."""
    dt = -spec.partner.tau_mean * T_CMB_UK * tracers.v_r / C_KM_S
    area = math.pi * (spec.aperture_radius_arcmin * ARCMIN_RAD) ** 2
    from .mock import painter

    return painter(spec)(tracers.ra, tracers.dec, dt * area, spec.beam_fwhm_arcmin)


def partner_record(spec, *, tracers_mean_tau: float, n_written: int, clipped_fraction: float) -> dict:
    """truth.json's ``partner`` entry, with the cross amplitude the two catalogues should give."""
    p = spec.partner
    b1, b2, t1, t2 = spec.bias, p.bias, tracers_mean_tau, p.tau_mean
    return {"file": PARTNER_FILE, "n_tracers": int(n_written), "bias": b2, "tau_mean": t2,
            "clipped_cell_fraction": float(clipped_fraction),
            "tau_cross": (t1 * b2 + t2 * b1) / (b1 + b2) if b1 + b2 > 0 else None,
            "tau_cross_definition": "(tau_1 b_2 + tau_2 b_1) / (b_1 + b_2), 1: the cluster-like catalogue, 2: this "
                                    "one; what the cross curve's amplitude measures (pairvel.stats.cross)"}


def write_partner(folder, tracers) -> None:
    """Write the partner catalogue (columns ra, dec [deg], z) into ``folder``."""
    from astropy.table import Table

    table = Table({"ra": tracers.ra, "dec": tracers.dec, "z": tracers.z})
    table["ra"].unit = table["dec"].unit = "deg"
    table.meta.update({"COMMENT": "synthetic galaxy-like catalogue made by pairvel mock"})
    table.write(folder / PARTNER_FILE)
