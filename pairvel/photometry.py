"""Compensated top-hat aperture photometry on HEALPix maps.

T_AP = (mean of the pixels whose centres lie within theta) - (mean of the pixels in the annulus
theta..sqrt(2) theta); the two regions have equal areas, so a constant and a linear gradient cancel
[common practice].  Masked pixels are left out of both means; each tracer reports the masked
fraction of its disc and annulus.
"""

from __future__ import annotations

__all__ = ["ApertureResult", "aperture_temperatures", "measure_apertures", "random_positions_in_footprint",
           "measure_random_apertures"]

from dataclasses import dataclass

import numpy as np

from ._rng import as_generator
from .constants import ARCMIN_RAD
from .errors import InputError, MapError
from .geometry import unit_vectors
from .skymap import SkyMap

_BATCH = 4096


@dataclass(frozen=True)
class ApertureResult:
    """Aperture photometry at N positions for n_radii radii.

    Attributes
    ----------
    temperatures : ndarray of shape (n_radii, N), uK
        Compensated aperture temperature; nan where the disc or annulus has no usable pixel.
    masked_fraction_disc, masked_fraction_annulus : ndarray of shape (n_radii, N)
    n_pixels_disc : ndarray of shape (n_radii, N), int
        Pixels (usable or not) with centres inside the disc.
    usable : ndarray of shape (N,), bool
        Both masked fractions <= max_masked_fraction at every radius, and a finite temperature.
    radius_arcmin : ndarray of shape (n_radii,)
    """

    temperatures: np.ndarray
    masked_fraction_disc: np.ndarray
    masked_fraction_annulus: np.ndarray
    n_pixels_disc: np.ndarray
    usable: np.ndarray
    radius_arcmin: np.ndarray


def _check_positions(ra_deg, dec_deg):
    ra = np.asarray(ra_deg, dtype=float)
    dec = np.asarray(dec_deg, dtype=float)
    if ra.shape != dec.shape or ra.ndim != 1:
        raise InputError(f"ra and dec must be 1-D arrays of equal length; got shapes {ra.shape} and {dec.shape}")
    bad = ~(np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90))
    if bad.any():
        raise InputError(f"positions must be finite with |dec| <= 90 degrees; {bad.sum()} are not "
                         f"(first: row {np.flatnonzero(bad)[0]})")
    return ra, dec


def _check_radii(radius_arcmin):
    radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=float))
    if radii.ndim != 1 or not np.all(np.isfinite(radii)) or np.any(radii <= 0):
        raise InputError(f"aperture radii must be positive numbers of arcmin; got {radius_arcmin!r}")
    return radii


def measure_apertures(skymap: SkyMap, ra_deg, dec_deg, radius_arcmin, *, max_masked_fraction=0.1,
                      progress=None) -> ApertureResult:
    """Compensated aperture temperatures at every position, for one or several radii.

    Parameters
    ----------
    skymap : SkyMap
        Map in uK with its usable-pixel weight.
    ra_deg, dec_deg : ndarray of shape (N,), degrees
        Positions in the map's coordinate frame.
    radius_arcmin : float or sequence of float
        Disc radius theta; the annulus runs from theta to sqrt(2) theta.
    max_masked_fraction : float, default 0.1
        A position is usable when at most this fraction of its disc and of its annulus is masked.
    progress : callable(done, total), optional

    Returns
    -------
    ApertureResult
    """
    import healpy as hp

    ra, dec = _check_positions(ra_deg, dec_deg)
    radii = _check_radii(radius_arcmin)
    n, nr = ra.size, radii.size
    vec = unit_vectors(ra, dec)
    cos_in = np.cos(radii * ARCMIN_RAD)
    cos_out = np.cos(np.sqrt(2.0) * radii * ARCMIN_RAD)
    r_query = np.sqrt(2.0) * radii.max() * ARCMIN_RAD
    temps = np.full((nr, n), np.nan)
    f_disc = np.ones((nr, n))
    f_ann = np.ones((nr, n))
    n_disc = np.zeros((nr, n), dtype=np.int64)
    for b0 in range(0, n, _BATCH):
        b1 = min(b0 + _BATCH, n)
        lists = [hp.query_disc(skymap.nside, vec[k], r_query, inclusive=False, nest=skymap.nest)
                 for k in range(b0, b1)]
        lens = np.fromiter((len(p) for p in lists), dtype=np.int64, count=b1 - b0)
        pix = np.concatenate(lists) if lists else np.zeros(0, np.int64)
        owner = np.repeat(np.arange(b1 - b0), lens)
        pv = np.array(hp.pix2vec(skymap.nside, pix, nest=skymap.nest))
        cosd = np.einsum("ij,ji->i", vec[b0:b1][owner], pv)
        vals, w = skymap.lookup(pix)
        ok = w > 0
        vals = np.where(ok, vals, 0.0).astype(np.float64)
        m = b1 - b0
        for r in range(nr):
            for region, sel in (("disc", cosd >= cos_in[r]), ("annulus", (cosd < cos_in[r]) & (cosd >= cos_out[r]))):
                total = np.bincount(owner, weights=sel, minlength=m)
                good = np.bincount(owner, weights=sel & ok, minlength=m)
                s = np.bincount(owner, weights=vals * (sel & ok), minlength=m)
                with np.errstate(invalid="ignore", divide="ignore"):
                    mean = np.where(good > 0, s / np.maximum(good, 1), np.nan)
                    frac = np.where(total > 0, 1.0 - good / np.maximum(total, 1), 1.0)
                if region == "disc":
                    disc_mean = mean
                    f_disc[r, b0:b1] = frac
                    n_disc[r, b0:b1] = total
                else:
                    temps[r, b0:b1] = disc_mean - mean
                    f_ann[r, b0:b1] = frac
        if progress is not None:
            progress(b1, n)
    usable = np.all(np.isfinite(temps) & (f_disc <= max_masked_fraction) & (f_ann <= max_masked_fraction), axis=0)
    return ApertureResult(temps, f_disc, f_ann, n_disc, usable, radii)


def aperture_temperatures(hpx_map, ra_deg, dec_deg, radius_arcmin, *, nest=False):
    """Compensated top-hat aperture temperatures on a full-sky HEALPix array.

    Parameters
    ----------
    hpx_map : ndarray of shape (12 nside^2,), uK
        UNSEEN and NaN pixels are left out of the means.
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    radius_arcmin : float or sequence of float
        Disc radius theta (annulus theta..sqrt(2) theta).
    nest : bool, default False
        Ordering of ``hpx_map``.

    Returns
    -------
    ndarray of shape (N,) for one radius, (n_radii, N) for several, uK; nan where the disc or
    annulus holds no usable pixel.

    Examples
    --------
    >>> import numpy as np
    >>> m = np.full(12 * 256**2, 5.0)
    >>> float(aperture_temperatures(m, [10.0], [20.0], 30.0)[0])
    0.0
    """
    res = measure_apertures(SkyMap.from_array(hpx_map, nest=nest), ra_deg, dec_deg, radius_arcmin,
                            max_masked_fraction=1.0)
    return res.temperatures[0] if np.ndim(radius_arcmin) == 0 else res.temperatures


def random_positions_in_footprint(skymap: SkyMap, n: int, *, seed=None):
    """``n`` positions uniform over the usable pixels of ``skymap`` (ra, dec in degrees).

    A usable pixel is drawn at random, then a point uniform within it (rejection in a small cap
    around its centre), so positions are not tied to pixel centres.
    """
    import healpy as hp

    rng = as_generator(seed)
    usable = skymap.usable_pixels()
    if usable.size == 0:
        raise MapError(f"map {skymap.path}: no usable pixels to place random apertures on")
    ra_out = np.empty(0)
    dec_out = np.empty(0)
    cap = 1.5 * hp.nside2resol(skymap.nside)
    while ra_out.size < n:
        k = max(2 * (n - ra_out.size), 64)
        pix = usable[rng.integers(0, usable.size, k)]
        theta_c, phi_c = hp.pix2ang(skymap.nside, pix, nest=skymap.nest)
        # uniform in a cap of radius `cap` around the pixel centre, keep points that land in the pixel
        cos_r = 1.0 - rng.uniform(0, 1, k) * (1.0 - np.cos(cap))
        sin_r = np.sqrt(1.0 - cos_r**2)
        az = rng.uniform(0, 2 * np.pi, k)
        centre = np.column_stack([np.sin(theta_c) * np.cos(phi_c), np.sin(theta_c) * np.sin(phi_c), np.cos(theta_c)])
        east = np.column_stack([-np.sin(phi_c), np.cos(phi_c), np.zeros(k)])
        north = np.cross(centre, east)
        v = centre * cos_r[:, None] + sin_r[:, None] * (np.cos(az)[:, None] * east + np.sin(az)[:, None] * north)
        keep = hp.vec2pix(skymap.nside, v[:, 0], v[:, 1], v[:, 2], nest=skymap.nest) == pix
        ra, dec = hp.vec2ang(v[keep], lonlat=True)
        ra_out = np.concatenate([ra_out, ra])
        dec_out = np.concatenate([dec_out, dec])
    return ra_out[:n], dec_out[:n]


def measure_random_apertures(skymap: SkyMap, n: int, radius_arcmin, *, seed=None, max_masked_fraction=0.1,
                             max_rounds=50):
    """Aperture temperatures at ``n`` random positions whose apertures are usable.

    Positions are drawn with :func:`random_positions_in_footprint`; those whose disc or annulus is
    too masked (near the edge of the footprint or a mask hole) are redrawn.

    Returns
    -------
    ra, dec : ndarray of shape (n,), degrees
    temperatures : ndarray of shape (n_radii, n), uK
    """
    rng = as_generator(seed)
    radii = _check_radii(radius_arcmin)
    ra_all, dec_all, t_all = [], [], []
    have = 0
    for _ in range(max_rounds):
        want = n - have
        ra, dec = random_positions_in_footprint(skymap, int(want * 1.2) + 16, seed=rng)
        res = measure_apertures(skymap, ra, dec, radii, max_masked_fraction=max_masked_fraction)
        ok = np.flatnonzero(res.usable)[:want]
        ra_all.append(ra[ok]); dec_all.append(dec[ok]); t_all.append(res.temperatures[:, ok])
        have += ok.size
        if have >= n:
            return np.concatenate(ra_all), np.concatenate(dec_all), np.concatenate(t_all, axis=1)
    raise MapError(f"map {skymap.path}: could not place {n} random apertures of {radii.max():g} arcmin with at most "
                   f"{max_masked_fraction:.0%} masked after {max_rounds} rounds; is the footprint too small?")
