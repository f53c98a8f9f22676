"""Mock maps whose depth varies across the footprint, with the inverse-variance map beside them.

Used by :func:`pairvel.sims.mock.make_mock_survey` (option ``depth_ratio``): the white-noise
level of every frequency map follows one smooth pattern of stripes in right ascension, as a scan
strategy leaves them, the level ``noise_uk_arcmin`` times

    ratio^(u - 1/2),    u = (1 + sin(2 pi (ra - ra_min) / STRIPE_PERIOD_DEG)) / 2 in [0, 1],

so the noise rms swings by the factor ``ratio`` between deep and shallow stripes every
STRIPE_PERIOD_DEG / 2 degrees, and its geometric mean is ``noise_uk_arcmin``.  Stripes narrower than
the footprint keep deep and shallow tracers mixed through the survey volume, so weighting by depth
does not trade noise for the sample variance of a smaller effective volume.  The inverse variance of each written map
(1/uK_CMB^2 per pixel, the exact variance the noise was drawn with) is written as a second partial
map on the same pixels, for ``[noise] path`` of a run.
"""

from __future__ import annotations

__all__ = ["DEPTH_RATIO_MAX", "check_depth_ratio", "noise_scale", "ivar_file", "write_ivar_map"]

import math
from pathlib import Path

import numpy as np

from ..core.errors import InputError

DEPTH_RATIO_MAX = 100.0
STRIPE_PERIOD_DEG = 6.0


def check_depth_ratio(ratio) -> float:
    """``ratio`` as a float in [1, DEPTH_RATIO_MAX], or a one-line InputError."""
    if isinstance(ratio, bool) or not isinstance(ratio, (int, float)) or not 1.0 <= ratio <= DEPTH_RATIO_MAX:
        raise InputError(f"mock option 'depth_ratio' must be a number in [1, {DEPTH_RATIO_MAX:g}]; got {ratio!r}",
                         key="depth_ratio")
    return float(ratio)


def noise_scale(nside: int, pixels, ra_min: float, ra_max: float, ratio: float) -> np.ndarray:
    """Factor on the noise rms of each RING pixel of ``pixels``: ratio^(u - 1/2) (module docstring); ``ra_max``
    is kept for the record (the stripes run from ``ra_min``)."""
    import healpy as hp

    if ratio == 1.0:
        return np.ones(np.size(pixels))
    ra, _ = hp.pix2ang(nside, np.asarray(pixels), lonlat=True)
    ra = (ra - ra_min + 180.0) % 360.0 - 180.0 + ra_min  # unwrap across RA = 0 around the box
    u = 0.5 * (1.0 + np.sin(2.0 * np.pi * (ra - ra_min) / STRIPE_PERIOD_DEG))
    return ratio ** (u - 0.5)


def ivar_file(map_file: str) -> str:
    """Name of the inverse-variance map written beside ``map_file``."""
    stem = map_file[:-len(".fits")] if map_file.endswith(".fits") else map_file
    return f"{stem}_ivar.fits"


def write_ivar_map(path, pixels, noise_uk_arcmin: float, scale, nside: int) -> Path:
    """Write the inverse variance 1 / sigma_pix^2 (1/uK^2) of the noise drawn with per-pixel rms
    ``noise_uk_arcmin * scale / pixel side`` as a partial HEALPix map (RING, no unit card)."""
    import healpy as hp
    from astropy.io import fits

    from ..maps.healpix_io import write_partial_map

    sigma_pix = noise_uk_arcmin * np.asarray(scale) / math.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    ivar = np.where(sigma_pix > 0, 1.0 / np.maximum(sigma_pix, 1e-300) ** 2, 0.0)
    path = write_partial_map(path, pixels, ivar, nside=nside, nest=False, unit="uK_CMB")
    with fits.open(path, mode="update") as hdul:  # the values are 1/uK^2, not a temperature: no unit card
        hdr = hdul[1].header
        hdr.remove("TUNIT2", ignore_missing=True)
        hdr["CONTENT"] = ("inverse variance", "per pixel, 1/uK_CMB^2")
    return Path(path)
