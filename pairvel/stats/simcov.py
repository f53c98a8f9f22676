"""Covariance from simulated maps: Gaussian CMB + noise + beam, synthesised only where apertures look.

A full-sky synthesis per realisation at nside 2048 costs far more than the photometry needs.  The
apertures read only the pixels within sqrt(2) theta of a tracer, so each realisation evaluates the
beam-smoothed harmonic field at exactly those pixel centres (point values: no pixel window) (``ducc0``'s
synthesis on the rings holding them), adds white pixel noise, and hands a partial map of those pixels to
the same aperture photometry, trend removal and many-set pair pass as the data.
"""

from __future__ import annotations

__all__ = ["aperture_pixels", "simulate_aperture_temperatures", "simulation_covariance", "synthesise_pixels"]

import math
import os

import numpy as np

from ..core.rng import as_generator
from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError
from ..maps.harmonics import alm_ell_m, gaussian_beam


def aperture_pixels(nside: int, ra_deg, dec_deg, radius_arcmin: float) -> np.ndarray:
    """Sorted RING pixels whose centres lie within sqrt(2) radius of any tracer (what photometry reads)."""
    import healpy as hp

    vec = hp.ang2vec(np.asarray(ra_deg, float), np.asarray(dec_deg, float), lonlat=True)
    r = math.sqrt(2.0) * float(radius_arcmin) * ARCMIN_RAD
    chunks = [np.unique(np.concatenate([hp.query_disc(nside, v, r) for v in vec[a:a + 4096]]))
              for a in range(0, len(vec), 4096)]
    return np.unique(np.concatenate(chunks)) if chunks else np.zeros(0, np.int64)


def _ring_geometry(nside: int, pixels_ring: np.ndarray):
    """The HEALPix rings holding ``pixels_ring`` as a reduced ring geometry for ducc0, and each
    pixel's index in a map over those rings only."""
    import ducc0

    info = ducc0.healpix.Healpix_Base(nside, "RING").sht_info()
    start = info["ringstart"].astype(np.int64)
    ring = np.searchsorted(start, pixels_ring, side="right") - 1
    rings, inv = np.unique(ring, return_inverse=True)
    nphi = info["nphi"][rings].astype(np.int64)
    sub_start = np.concatenate([[0], np.cumsum(nphi)[:-1]]).astype(np.int64)
    where = sub_start[inv.ravel()] + (pixels_ring - start[ring])
    geom = {"theta": np.ascontiguousarray(info["theta"][rings]), "phi0": np.ascontiguousarray(info["phi0"][rings]),
            "nphi": nphi.astype(np.uintp), "ringstart": sub_start.astype(np.uintp)}
    return geom, where


def synthesise_pixels(alm, nside: int, lmax: int, pixels_ring, *, geometry=None, n_threads=None) -> np.ndarray:
    """The band-limited field sum a_lm Y_lm at HEALPix RING pixel centres.

    The synthesis runs on the rings that hold the pixels only (``ducc0.sht.synthesis`` on a reduced
    ring geometry: a ring's FFT is cheap, and the Legendre work scales with the number of rings),
    and equals ``healpy.alm2map(alm, nside)[pixels_ring]`` to rounding.

    Parameters
    ----------
    alm : ndarray of shape (nalm,), complex (healpy layout)
    nside, lmax : int
    pixels_ring : ndarray of int
    geometry : tuple, optional
        ``_ring_geometry(nside, pixels_ring)``, when it is reused.
    n_threads : int, optional
        Default: all cores.
    """
    import ducc0

    geom, where = _ring_geometry(nside, np.asarray(pixels_ring, np.int64)) if geometry is None else geometry
    nthreads = int(n_threads or os.cpu_count() or 1)
    maps = ducc0.sht.synthesis(alm=np.asarray(alm)[None, :], lmax=int(lmax), spin=0, nthreads=nthreads, **geom)
    return maps[0][where]


def _spectrum(lmax, beam_fwhm_arcmin, noise_cl, cmb_cl):
    cl = np.zeros(lmax + 1)
    if cmb_cl is not None:
        n = min(lmax + 1, len(cmb_cl))
        cl[:n] = cmb_cl[:n]
    bl = gaussian_beam(beam_fwhm_arcmin, lmax) if beam_fwhm_arcmin else np.ones(lmax + 1)
    total = cl * bl**2
    if noise_cl is not None:
        nl = np.zeros(lmax + 1)
        n = min(lmax + 1, len(noise_cl))
        nl[:n] = noise_cl[:n]
        total += nl
    return total


def _draw_alm(amp, m0, rng) -> np.ndarray:
    """Gaussian a_lm (layout of :mod:`pairvel.maps.harmonics`) with <|a_lm|^2> = amp^2; real at ``m0`` (m = 0)."""
    alm = rng.standard_normal(2 * amp.size).view(np.complex128)      # independent (re, im) pairs
    alm *= amp / np.sqrt(2.0)
    alm[m0] = alm[m0].real * np.sqrt(2.0)                            # m = 0: real with variance amp^2
    return alm


def simulate_aperture_temperatures(nside: int, ra_deg, dec_deg, radius_arcmin: float, n_sim: int, *, seed=None,
                                   cmb_cl=None, beam_fwhm_arcmin: float = 0.0, white_noise_uk_arcmin: float = 0.0,
                                   noise_cl=None, lmax: int | None = None, max_masked_fraction: float = 0.1,
                                   n_threads: int | None = None, progress=None, transfer=None) -> np.ndarray:
    """Aperture temperatures of ``n_sim`` Gaussian sky realisations at the tracers.

    Parameters
    ----------
    nside : int
        Resolution of the data map (RING pixel centres are evaluated).
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    radius_arcmin : float, arcmin
    n_sim : int
    seed : None, int or numpy Generator
    cmb_cl : ndarray of shape (lmax_cl + 1,), uK^2, optional
        Sky C_l before the beam (e.g. :func:`pairvel.model.cmb.load_cmb_cl`); None: no CMB.
    beam_fwhm_arcmin : float, arcmin
        Gaussian beam applied to ``cmb_cl``; 0: none.
    white_noise_uk_arcmin : float, uK arcmin
        White noise, drawn per pixel with sigma = level / pixel side.
    noise_cl : ndarray, uK^2, optional
        Noise power spectrum (not beam-convolved), synthesised with the sky.
    lmax : int, optional
        Default 3 nside - 1 (the length of ``transfer`` minus one when that is given).
    transfer : ndarray of shape (lmax + 1,), optional
        Harmonic filter applied to the whole simulated sky, as the data map's pre-filter
        (:mod:`pairvel.maps.prefilter`, including its response division); the white noise is then
        synthesised in harmonic space, N_l = (level in uK rad)^2, so that it is filtered too.

    Returns
    -------
    ndarray of shape (n_sim, N), uK
        NaN for tracers whose aperture is not usable (the data's own cut is applied beforehand by
        the caller; here all pixels are present, so this happens only at map edges).
    """
    import healpy as hp

    from ..maps.photometry import measure_apertures
    from ..maps.skymap import SkyMap

    if int(n_sim) < 1:
        raise InputError(f"number of simulated maps must be >= 1; got {n_sim}")
    rng = as_generator(seed)
    if transfer is not None:
        transfer = np.asarray(transfer, dtype=float)
        lmax = transfer.size - 1
    lmax = 3 * nside - 1 if lmax is None else int(lmax)
    pix = aperture_pixels(nside, ra_deg, dec_deg, radius_arcmin)
    geometry = _ring_geometry(nside, pix)
    spec = _spectrum(lmax, beam_fwhm_arcmin, noise_cl, cmb_cl)
    sigma_pix = white_noise_uk_arcmin / math.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    if transfer is not None:
        spec = (spec + (white_noise_uk_arcmin * ARCMIN_RAD) ** 2) * transfer**2
        sigma_pix = 0.0
    harmonic = bool(np.any(spec > 0))
    ell, m = alm_ell_m(lmax)
    amp = np.sqrt(spec[ell])
    m0 = np.flatnonzero(m == 0)          # the first lmax + 1 entries
    out = np.empty((int(n_sim), len(ra_deg)))
    for k in range(int(n_sim)):
        values = np.zeros(pix.size)
        if harmonic:
            alm = _draw_alm(amp, m0, rng)
            values += synthesise_pixels(alm, nside, lmax, pix, geometry=geometry, n_threads=n_threads)
        if sigma_pix > 0:
            values += sigma_pix * rng.standard_normal(pix.size)
        sky = SkyMap(nside=nside, nest=False, pixels=pix, values=values)
        res = measure_apertures(sky, ra_deg, dec_deg, radius_arcmin, max_masked_fraction=max_masked_fraction)
        out[k] = np.where(res.usable, res.temperatures[0], np.nan)
        if progress is not None:
            progress(k + 1, int(n_sim))
    return out


def simulation_covariance(samples) -> np.ndarray:
    """Sample covariance (ddof = 1) of the curves from simulated maps, (n_sim, nbins) -> (nbins, nbins)."""
    s = np.asarray(samples, dtype=float)
    if s.ndim != 2 or s.shape[0] < 2 or not np.all(np.isfinite(s)):
        raise InputError(f"simulated curves must be a finite (n_sim >= 2, nbins) array; got shape {s.shape}")
    return np.cov(s, rowvar=False, ddof=1)
