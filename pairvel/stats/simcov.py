"""Covariance from simulated maps: Gaussian CMB + noise + beam, synthesised only where apertures look.

A full-sky synthesis per realisation at nside 2048 costs far more than the photometry needs.  The
apertures read only the pixels within sqrt(2) theta of a tracer, so each realisation evaluates the
beam-smoothed harmonic field at exactly those pixel centres of the data map's grid (point values: no
pixel window; :meth:`~pairvel.maps.skymap.SkyMap.aperture_support` and
:meth:`~pairvel.maps.skymap.SkyMap.synthesise`, for HEALPix ``ducc0``'s synthesis on the rings holding
them; only up to the multipole beyond which the apertures see less than ``TAIL_FRACTION`` of their
variance, in float32: :func:`band_needed`), adds white pixel noise, gives it the data map's usable weights (mask and holes) and hands
that partial map to the same aperture photometry (radii, per-tracer physical radius, pixel
weighting), trend removal and many-set pair pass as the data.  A tracer signal (kSZ, thermal SZ)
can be added to each realisation by a callback, which the synthetic-sky code provides.
"""

from __future__ import annotations

__all__ = ["simulate_aperture_temperatures", "simulation_covariance", "band_needed", "aperture_window",
           "SimulationPlan", "prepare_simulations", "simulate_realisations"]

import math
from dataclasses import dataclass

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError
from ..core.rng import as_generator
from ..maps.harmonics import alm_ell_m, gaussian_beam
from ..maps.photometry import measure_apertures
from ..maps.skymap import SkyMap


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


# Multipoles above the band the apertures see are not synthesised: the synthesis stops at the lowest
# l whose tail (CMB x beam, harmonic noise) carries less than TAIL_FRACTION of the aperture variance.
# 1e-3 of the variance moves each bin's simulated error by <= 0.05%, 1/100 of its own noise even for
# 1000 skies (sqrt(1 / (2 n_sim)) = 2.2%); benchmarks/bench_simsky.py compares with the full band.
TAIL_FRACTION = 1e-3
# the sky is synthesised in float32 (ducc0 complex64 a_lm): relative rounding ~1e-6 of the field,
# far inside the same budget
SYNTHESIS_DTYPE = np.complex64


def aperture_window(ell, radius_arcmin: float) -> np.ndarray:
    """Harmonic window of a compensated aperture (disc of radius theta minus the annulus to
    sqrt(2) theta, equal areas): W_l = 2 (D_l(theta) - D_l(sqrt(2) theta)) with the flat-sky disc
    mean D_l(x) = 2 J1(l x) / (l x) [analytic, e.g. the Fourier transform of a top hat]."""
    from scipy.special import j1

    ell = np.maximum(np.asarray(ell, dtype=float), 1e-12)

    def disc(x):
        return 2.0 * j1(ell * x) / (ell * x)

    theta = radius_arcmin * ARCMIN_RAD
    return 2.0 * (disc(theta) - disc(math.sqrt(2.0) * theta))


def band_needed(spec, radius_arcmin: float, *, white_cl: float = 0.0, tail: float = TAIL_FRACTION) -> int:
    """Lowest lmax whose dropped tail of ``spec`` (uK^2) holds less than ``tail`` of the aperture
    variance sum (2l + 1) / 4 pi (C_l + white_cl) W_l^2 of the smallest aperture ``radius_arcmin``."""
    ell = np.arange(spec.size)
    w2 = aperture_window(ell, radius_arcmin) ** 2 * (2 * ell + 1) / (4 * math.pi)
    total = np.sum((spec + white_cl) * w2)
    above = np.cumsum((spec * w2)[::-1])[::-1]                 # above[l]: the part from l on
    if total <= 0:
        return spec.size - 1
    keep = np.flatnonzero(above >= tail * total)
    return int(keep[-1]) if keep.size else 0


def _draw_alm(amp, m0, rng) -> np.ndarray:
    """Gaussian a_lm (layout of :mod:`pairvel.maps.harmonics`) with <|a_lm|^2> = amp^2; real at ``m0`` (m = 0)."""
    alm = rng.standard_normal(2 * amp.size).view(np.complex128)      # independent (re, im) pairs
    alm *= amp / np.sqrt(2.0)
    alm[m0] = alm[m0].real * np.sqrt(2.0)                            # m = 0: real with variance amp^2
    return alm


def _grid_of(sky) -> SkyMap:
    """The data map itself, or for an integer the HEALPix grid of that nside (RING, equatorial), empty."""
    if isinstance(sky, SkyMap):
        return sky
    if isinstance(sky, bool) or not isinstance(sky, (int, np.integer)):
        raise InputError(f"sky must be the data SkyMap (or a HEALPix nside); got {type(sky).__name__}")
    from ..maps.healpix import HealpixMap  # an nside alone, as the pipeline and older callers pass it

    return HealpixMap(int(sky), False, np.zeros(0, np.int64), np.zeros(0))


def simulate_aperture_temperatures(sky, ra_deg, dec_deg, radius_arcmin, n_sim: int, *, seed=None,
                                   cmb_cl=None, beam_fwhm_arcmin: float = 0.0, white_noise_uk_arcmin: float = 0.0,
                                   noise_cl=None, lmax: int | None = None, max_masked_fraction: float = 0.1,
                                   n_threads: int | None = None, progress=None, transfer=None,
                                   pixel_weighting: str = "centre", method: str = "auto", radius_scale=None,
                                   signal=None, pixel_noise_variance=None) -> np.ndarray:
    """Aperture temperatures of ``n_sim`` Gaussian sky realisations at the tracers.

    Each realisation is a partial map on the data map's grid holding the pixels the apertures read,
    with the data map's usable weights there (its mask and holes; 0 where the data map holds no
    pixel), measured by :func:`~pairvel.maps.photometry.measure_apertures` with the same radii,
    per-tracer radius scale, pixel weighting and method as the data.  On a map whose values were
    the simulated ones, the data's photometry would return the same temperatures.

    Parameters
    ----------
    sky : SkyMap or int
        The data map: the simulated skies are evaluated at the centres of its grid's pixels (held
        or not), in its frame, and carry its weights.  An int is taken as a HEALPix nside (RING
        grid, equatorial frame, no mask).
    ra_deg, dec_deg : ndarray of shape (N,), degrees
        Equatorial positions of the tracers.
    radius_arcmin : float or sequence of float, arcmin
        Disc radius (radii) at radius scale 1, as for ``measure_apertures``.
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
        Default the grid's band limit, 3 nside - 1 for HEALPix (the length of ``transfer`` minus
        one when that is given); lowered to the last multipole with power (8000 for the package's
        C_l table without a noise spectrum).  The a_lm are drawn to that lmax (the same random
        stream for any band), but synthesised only to :func:`band_needed` for the smallest aperture.
    max_masked_fraction, pixel_weighting, method, radius_scale
        As for :func:`~pairvel.maps.photometry.measure_apertures` (the data's photometry options).
    transfer : ndarray of shape (lmax + 1,), optional
        Harmonic filter applied to the whole simulated sky, as the data map's pre-filter
        (:mod:`pairvel.maps.prefilter`, including its response division); the white noise is then
        synthesised in harmonic space, N_l = (level in uK rad)^2, so that it is filtered too.
    signal : callable(rng) -> ndarray of shape (n_radii, N), uK, optional
        Aperture temperatures of a tracer signal added to each realisation, drawn from the same
        generator after its sky (e.g. :func:`pairvel.sims.skysignal.tracer_signal`).
    pixel_noise_variance : SkyMap, optional
        Noise variance of each pixel (uK^2) on the data map's grid, e.g. from an inverse-variance map
        (:mod:`pairvel.maps.noise`): white noise of that variance is added to each realisation
        (unfiltered, after any ``transfer``); pixels it does not hold get none.

    Returns
    -------
    ndarray of shape (n_sim, N) for one radius, (n_sim, n_radii, N) for a sequence, uK
        NaN for tracers whose aperture is not usable (with the data's weights, those the data's
        photometry drops too).
    """
    if int(n_sim) < 1:
        raise InputError(f"number of simulated maps must be >= 1; got {n_sim}")
    plan = prepare_simulations(sky, ra_deg, dec_deg, radius_arcmin, cmb_cl=cmb_cl, beam_fwhm_arcmin=beam_fwhm_arcmin,
                               white_noise_uk_arcmin=white_noise_uk_arcmin, noise_cl=noise_cl, lmax=lmax,
                               max_masked_fraction=max_masked_fraction, n_threads=n_threads, transfer=transfer,
                               pixel_weighting=pixel_weighting, method=method, radius_scale=radius_scale,
                               signal=signal, pixel_noise_variance=pixel_noise_variance)
    rng = as_generator(seed)
    draws = _Draws(plan)
    out = np.empty((int(n_sim), plan.radii.size, plan.ra_deg.size))
    for k in range(int(n_sim)):
        out[k] = _realisation(plan, draws, rng)
        if progress is not None:
            progress(k + 1, int(n_sim))
    return out[:, 0] if np.ndim(radius_arcmin) == 0 else out


@dataclass(frozen=True)
class SimulationPlan:
    """What every realisation of :func:`simulate_aperture_temperatures` shares (made once by
    :func:`prepare_simulations`; small enough to send to Dask workers: the support map and a spectrum)."""

    support: SkyMap            # the pixels the apertures read, with the data's usable weights
    ra_deg: np.ndarray
    dec_deg: np.ndarray
    radii: np.ndarray          # arcmin at radius scale 1
    spec: np.ndarray           # (lmax + 1,) uK^2 drawn; empty without a harmonic part
    band: int                  # multipoles synthesised
    white_noise_uk_arcmin: float
    pixel_noise: bool          # white noise per pixel (no transfer)
    noise_sigma: np.ndarray | None  # per-pixel noise sigma of the support (pixel_noise_variance)
    photometry: dict           # max_masked_fraction, pixel_weighting, method, radius_scale
    n_threads: int | None
    signal: object             # callable(rng) -> (n_radii, N), or None


def prepare_simulations(sky, ra_deg, dec_deg, radius_arcmin, *, cmb_cl=None, beam_fwhm_arcmin: float = 0.0,
                        white_noise_uk_arcmin: float = 0.0, noise_cl=None, lmax: int | None = None,
                        max_masked_fraction: float = 0.1, n_threads: int | None = None, transfer=None,
                        pixel_weighting: str = "centre", method: str = "auto", radius_scale=None, signal=None,
                        pixel_noise_variance=None) -> SimulationPlan:
    """The :class:`SimulationPlan` of :func:`simulate_aperture_temperatures` (same parameters)."""
    grid = _grid_of(sky)
    if transfer is not None:
        transfer = np.asarray(transfer, dtype=float)
        lmax = transfer.size - 1
    lmax = grid.band_limit if lmax is None else int(lmax)
    radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=float))
    support = _support(grid, sky, ra_deg, dec_deg, radii, radius_scale, pixel_weighting)
    spec = _spectrum(lmax, beam_fwhm_arcmin, noise_cl, cmb_cl)
    noise_sigma = None
    if pixel_noise_variance is not None:  # per-pixel white noise of a noise map, on the pixels the apertures read
        pv, pw = pixel_noise_variance.values_on(support)
        noise_sigma = np.sqrt(np.where(pw > 0, np.nan_to_num(pv.astype(np.float64)), 0.0))
    pixel_noise = white_noise_uk_arcmin > 0 and transfer is None
    if transfer is not None:
        spec = (spec + (white_noise_uk_arcmin * ARCMIN_RAD) ** 2) * transfer**2
    harmonic = bool(np.any(spec > 0))
    # no a_lm beyond the last multipole with power: the package C_l table ends at l = 8000, while a
    # fine grid's band limit (e.g. 21599 for 0.5' CAR pixels) would make a_lm arrays of several GB
    spec = spec[: int(np.flatnonzero(spec > 0)[-1]) + 1] if harmonic else np.zeros(0)
    smallest = float(radii.min() * (1.0 if radius_scale is None else np.min(radius_scale)))
    band = band_needed(spec, smallest, white_cl=(white_noise_uk_arcmin * ARCMIN_RAD) ** 2 if pixel_noise else 0.0) \
        if harmonic else 0
    options = dict(max_masked_fraction=max_masked_fraction, pixel_weighting=pixel_weighting, method=method,
                   radius_scale=radius_scale)
    return SimulationPlan(support, np.asarray(ra_deg, dtype=float), np.asarray(dec_deg, dtype=float), radii, spec,
                          band, float(white_noise_uk_arcmin), pixel_noise, noise_sigma, options, n_threads, signal)


class _Draws:
    """The a_lm amplitudes of a plan: drawn to the spectrum's lmax (the same stream for any band),
    synthesised to the band (made once per process, not sent with the plan: O(lmax^2) numbers)."""

    def __init__(self, plan: SimulationPlan):
        lmax = max(plan.spec.size - 1, 0)
        ell, m = alm_ell_m(lmax)
        self.amp = np.sqrt(plan.spec[ell]) if plan.spec.size else np.zeros(0)
        self.m0 = np.flatnonzero(m == 0)          # the first lmax + 1 entries
        self.in_band = ell <= plan.band           # the a_lm of l <= band, in the layout of that band


def _realisation(plan: SimulationPlan, draws: _Draws, rng) -> np.ndarray:
    """(n_radii, N) aperture temperatures of one simulated sky drawn from ``rng`` (NaN where unusable)."""
    support = plan.support
    values = np.zeros(support.values.size)
    if plan.spec.size:
        alm = _draw_alm(draws.amp, draws.m0, rng)[draws.in_band].astype(SYNTHESIS_DTYPE)    # the full draw
        values += support.synthesise(alm, lmax=plan.band, n_threads=plan.n_threads)
    if plan.pixel_noise:
        values += support.white_noise(plan.white_noise_uk_arcmin, rng)
    if plan.noise_sigma is not None:
        values += plan.noise_sigma * rng.standard_normal(values.size)
    res = measure_apertures(support.with_values(values), plan.ra_deg, plan.dec_deg, plan.radii, **plan.photometry)
    out = np.where(res.usable, res.temperatures, np.nan)
    if plan.signal is not None:
        out += plan.signal(rng)
    return out


def simulate_realisations(plan: SimulationPlan, generators) -> np.ndarray:
    """(len(generators), n_radii, N): one simulated sky per Generator, each drawn from its own
    (the sets of :func:`simulate_aperture_temperatures` when they all share one)."""
    draws = _Draws(plan)
    out = np.empty((len(generators), plan.radii.size, plan.ra_deg.size))
    for k, rng in enumerate(generators):
        out[k] = _realisation(plan, draws, rng)
    return out


def _support(grid: SkyMap, sky, ra_deg, dec_deg, radii, radius_scale, pixel_weighting) -> SkyMap:
    """The pixels of ``grid`` that the apertures read, with the data map's usable weights (1 for an nside).

    An aperture reads the pixels whose centres lie within sqrt(2) theta of its tracer ("centre"
    weighting), and a little beyond for the weightings that count pixels across the outer edge
    ("fraction": half a pixel; "subsample": pixels within about two pixel radii of the edge).
    """
    lon, lat = grid.from_equatorial(np.asarray(ra_deg, float), np.asarray(dec_deg, float))
    scale = 1.0 if radius_scale is None else np.asarray(radius_scale, dtype=float)
    pad = 0.0 if pixel_weighting == "centre" else 3.0 * grid.pixel_size_arcmin
    support = grid.aperture_support(lon, lat, math.sqrt(2.0) * float(radii.max()) * scale + pad)
    if not isinstance(sky, SkyMap):
        return support
    return support.with_values(support.values, weight=sky.values_on(support)[1])


def simulation_covariance(samples) -> np.ndarray:
    """Sample covariance (ddof = 1) of the curves from simulated maps, (n_sim, nbins) -> (nbins, nbins)."""
    s = np.asarray(samples, dtype=float)
    if s.ndim != 2 or s.shape[0] < 2 or not np.all(np.isfinite(s)):
        raise InputError(f"simulated curves must be a finite (n_sim >= 2, nbins) array; got shape {s.shape}")
    return np.cov(s, rowvar=False, ddof=1)
