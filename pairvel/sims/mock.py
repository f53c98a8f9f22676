"""Synthetic surveys with a known kSZ signal, for the demo and for injection-recovery tests.

The invented scenario: the Larkspur Cluster Survey (a spectroscopic cluster catalogue) over a sky
patch, observed at 150 GHz by the Skerry Millimetre Telescope.  Steps:

1. A Gaussian linear density field at z = 0 on an FFT grid enclosing the light cone, drawn from
   :func:`pairvel.model.theory.linear_power`; the linear velocity from the continuity equation,
   v(k) = i a H f D delta_0(k) k / k^2, each tracer scaled to its own redshift.  The grid axes
   are turned so that the first one points at the centre of the footprint, which keeps the box
   tight around the cone wherever the patch lies on the sky.
2. Tracers Poisson-sampled from n (1 + b D(z) delta_0) (linear bias b, clipped at zero, at constant
   comoving density), uniform within their cell, with a log-mass proxy and an optical depth
   tau_i proportional to M^(2/3) with mean tau_mean.  Redshifts are cosmological (no redshift-space
   distortion, no peculiar-velocity Doppler shift), so the pipeline's comoving positions computed
   from (ra, dec, z) with the same cosmology are the tracers' true positions.
3. Each tracer is painted as a beam-shaped source: kSZ dT_i = -tau_i T_CMB v_r,i / c with solid-angle
   integral dT_i pi theta_ap^2 (so an ideal aperture of radius theta_ap returns dT_i: tau is the
   aperture optical depth), and a negative thermal-SZ term that grows with mass and redshift.
4. Map = beam-smoothed primary CMB (package C_l table) + painted sources + white noise, HEALPix
   RING, written for the footprint only as a partial-sky map.

The low default bias keeps the clipped fraction of cells small, so the sampled pairs follow the
linear-theory template with that bias (clusters in a real survey have b ~ 3; the bias is a
config key of the measurement).
"""

from __future__ import annotations

__all__ = ["MockTruth", "make_mock_survey", "SURVEY_NAME", "TELESCOPE_NAME", "extra_map_file"]

import json
import math
import os
import time
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from ..core.rng import as_generator
from ..core.constants import ARCMIN_RAD, C_KM_S, T_CMB_UK
from ..maps.sources import paint_beam_sources
from ..model.cmb import load_cmb_cl
from ..model.cosmology import DEFAULT_COSMOLOGY, Cosmology
from ..core.errors import InputError, OutputError, PairvelWarning
from ..core.sphere import unit_vectors

SURVEY_NAME = "Larkspur Cluster Survey"
TELESCOPE_NAME = "Skerry Millimetre Telescope"
CATALOGUE_FILE = "larkspur_clusters.fits"
MAP_FILE = "skerry_150ghz_partial.fits"
_DEFAULT_EDGES = np.arange(0.0, 301.0, 20.0)
_TREND_SIGMA_Z = 0.01  # the pipeline's default trend.sigma_z
_TSZ_F150 = -0.95333  # x coth(x/2) - 4 at 150 GHz, T_CMB = 2.72548 K (Carlstrom et al. 2002)
_MAX_CELLS = 50_000_000  # about 3 GB at the peak of the field synthesis


@dataclass(frozen=True)
class MockTruth:
    """What a mock survey holds; also written to truth.json (with a few descriptive extras).

    Attributes
    ----------
    n_tracers : int
        Tracers written (a Poisson draw around the requested number).
    tau_mean : float
        Mean injected aperture optical depth (see ``make_mock_survey``).
    bias : float
        Linear bias of the tracer sampling.
    seed : int or None
        The seed used (drawn from fresh entropy and recorded when None was passed; None when a
        Generator was passed).
    options : dict
        Every option of the call, the cosmology included.
    edges_mpc : list of float, Mpc
        Separation bin edges of the curves below (0-300 Mpc in 20 Mpc steps).
    v12_3d_realised_km_s : list of float, km/s
        <(v_i - v_j) . rhat_ij> over the tracers' pairs.
    v12_los_realised_km_s : list of float, km/s
        The Ferreira estimator on the tracers' true line-of-sight velocities after the pipeline's
        default redshift-trend removal: what the kSZ measurement sees, per unit tau T_CMB / c.
    v12_linear_km_s : list of float, km/s
        Linear theory at ``z_eff`` with ``bias``.
    z_eff : float
        Pair-weighted mean redshift.
    aperture_response : float
        Slope of the measured compensated-aperture temperature against the injected dT on a
        noiseless kSZ-only map (nan when no aperture could be measured).
    clipped_cell_fraction : float
        Fraction of grid cells whose biased density 1 + b D delta was negative and set to zero.
    files : dict
    timings_s : dict
    position_roundtrip_mpc : float, Mpc
        Largest distance between a tracer's true position and the one recomputed from its
        catalogue (ra, dec, z) by :func:`pairvel.pairs.geometry.comoving_positions`.
    """

    n_tracers: int
    tau_mean: float
    bias: float
    seed: int | None
    options: dict
    edges_mpc: list
    v12_3d_realised_km_s: list
    v12_los_realised_km_s: list
    v12_linear_km_s: list
    z_eff: float
    aperture_response: float
    clipped_cell_fraction: float
    files: dict = field(default_factory=dict)
    timings_s: dict = field(default_factory=dict)
    position_roundtrip_mpc: float = 0.0


def _check_options(o: dict) -> None:
    """One-line errors naming the option, what it must be and what it got."""
    def need(ok, name, must):
        if not ok:
            raise InputError(f"mock option '{name}' must be {must}; got {o[name]!r}", key=name)

    def is_num(name):
        v = o[name]
        return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) and math.isfinite(v)

    for name in ("ra_min", "ra_max", "dec_min", "dec_max", "z_min", "z_max", "tau_mean", "bias", "cell_mpc",
                 "beam_fwhm_arcmin", "noise_uk_arcmin", "aperture_radius_arcmin", "tsz_amplitude_uk"):
        need(is_num(name), name, "a finite number")
    n = o["n_tracers"]
    need(isinstance(n, (int, np.integer)) and not isinstance(n, bool) and n >= 2, "n_tracers", "an integer >= 2")
    ns = o["nside"]
    need(isinstance(ns, (int, np.integer)) and not isinstance(ns, bool) and 1 <= ns <= 2**13 and not ns & (ns - 1),
         "nside", "a power of 2 between 1 and 8192")
    need(-90 <= o["dec_min"] < 90, "dec_min", "in [-90, 90)")
    need(o["dec_min"] < o["dec_max"] <= 90, "dec_max", f"in (dec_min = {o['dec_min']}, 90]")
    need(o["ra_min"] < o["ra_max"] <= o["ra_min"] + 360, "ra_max",
         f"greater than ra_min = {o['ra_min']} and at most ra_min + 360")
    need(0 < o["z_min"] <= 3, "z_min", "in (0, 3]")
    need(o["z_min"] < o["z_max"] <= 3, "z_max", f"in (z_min = {o['z_min']}, 3]")
    for name in ("cell_mpc", "beam_fwhm_arcmin", "aperture_radius_arcmin"):
        need(o[name] > 0, name, "> 0")
    for name in ("tau_mean", "bias", "noise_uk_arcmin"):
        need(o[name] >= 0, name, ">= 0")
    need(isinstance(o["include_cmb"], (bool, np.bool_)), "include_cmb", "True or False")
    need(isinstance(o["cosmo"], Cosmology), "cosmo", "a pairvel Cosmology")
    need(o["progress"] is None or callable(o["progress"]), "progress", "None or a callable(str)")


def _patch_frame(ra_min, ra_max, dec_min, dec_max) -> np.ndarray:
    """Rotation (3, 3) whose rows are the unit vectors towards the footprint centre, east and north.

    Grid coordinates are q = frame @ x; equatorial ones x = q @ frame for row vectors.  For a patch
    centred on RA = 0, Dec = 0 the frame is exactly the identity.
    """
    ra_c = math.radians(ra_min + 0.5 * (ra_max - ra_min))
    dec_c = math.radians(0.5 * (dec_min + dec_max))
    centre = [math.cos(dec_c) * math.cos(ra_c), math.cos(dec_c) * math.sin(ra_c), math.sin(dec_c)]
    east = [-math.sin(ra_c), math.cos(ra_c), 0.0]
    north = [-math.sin(dec_c) * math.cos(ra_c), -math.sin(dec_c) * math.sin(ra_c), math.cos(dec_c)]
    return np.array([centre, east, north])


def _cone_box(ra_min, ra_max, dec_min, dec_max, d_min, d_max, margin, frame=None):
    """Bounding box, in the grid frame, of the light cone from a dense sample of its boundary."""
    ra = np.linspace(ra_min, ra_max, 41)
    dec = np.linspace(dec_min, dec_max, 41)
    rr, dd = np.meshgrid(ra, dec)
    u = unit_vectors(rr.ravel(), dd.ravel())
    if frame is not None:
        u = u @ frame.T
    pts = np.concatenate([u * d for d in np.linspace(d_min, d_max, 41)])
    return pts.min(axis=0) - margin, pts.max(axis=0) + margin


def _power_at(k, cosmo):
    """Linear P(k, z = 0) at every k > 0 of a grid, interpolated in log-log from 4096 log-spaced
    evaluations (relative error below 1e-5; evaluating the transfer function at every mode of a
    large grid costs seconds).  Zero where k = 0."""
    from ..model.theory import linear_power

    k = np.asarray(k, np.float64)
    pos = k[k > 0]
    out = np.zeros_like(k)
    if pos.size:
        nodes = np.geomspace(pos.min(), pos.max(), 4096)
        logp = np.log(linear_power(nodes, 0.0, cosmo=cosmo))
        out[k > 0] = np.exp(np.interp(np.log(pos), np.log(nodes), logp))
    return out


def _grid_wavevectors(shape, cell, *, half=False):
    """Broadcastable kx, ky, kz (1/Mpc) of an FFT grid (kz of a real FFT with ``half``) and k^2 with
    k^2 = 1 at k = 0 (so divisions by it stay finite)."""
    kx = 2 * np.pi * np.fft.fftfreq(shape[0], d=cell)[:, None, None]
    ky = 2 * np.pi * np.fft.fftfreq(shape[1], d=cell)[None, :, None]
    kz = 2 * np.pi * (np.fft.rfftfreq if half else np.fft.fftfreq)(shape[2], d=cell)[None, None, :]
    k2 = kx**2 + ky**2 + kz**2
    k2[0, 0, 0] = 1.0
    return kx, ky, kz, k2


def _gaussian_fields(shape, cell, cosmo, rng):
    """delta_0(x) and the velocity potential gradient u_0(x) = IFFT[i delta_0(k) k / k^2] (Mpc).

    The z = 0 linear velocity is a H0 f(0) u_0; at redshift z it is a H(z) f(z) D(z) u_0.
    """

    kx, ky, kz, k2 = _grid_wavevectors(shape, cell, half=True)
    white = np.fft.rfftn(rng.standard_normal(shape))
    amp = np.sqrt(_power_at(np.sqrt(k2), cosmo) / cell**3)
    amp[0, 0, 0] = 0.0
    dk = white * amp
    delta = np.fft.irfftn(dk, s=shape, axes=(0, 1, 2)).astype(np.float32)
    u = []
    for kk in (kx, ky, kz):
        u.append(np.fft.irfftn(1j * dk * kk / k2, s=shape, axes=(0, 1, 2)).astype(np.float32))
    return delta, u


def _field_variance(shape, cell, cosmo, *, drop_nyquist: bool) -> float:
    """Variance of the z = 0 grid field delta_0 of :func:`_gaussian_fields` (or, with ``drop_nyquist``,
    of :func:`_gaussian_fields_at`): the mean over the grid's modes of P(k) / cell^3, k = 0 excluded."""
    *_, k2 = _grid_wavevectors(shape, cell)
    k2[0, 0, 0] = 0.0
    power = _power_at(np.sqrt(k2), cosmo) / cell**3
    if drop_nyquist:
        for axis, n in enumerate(shape):
            if n % 2 == 0:
                power[(slice(None),) * axis + (n // 2,)] = 0.0
    return float(power.sum() / power.size)


def _gaussian_fields_at(points, lo, shape, cell, cosmo, rng, *, epsilon=1e-7):
    """delta_0 and u_0 (as in :func:`_gaussian_fields`) evaluated exactly at arbitrary points.

    The same Fourier modes as ``_gaussian_fields(shape, cell, cosmo, rng)`` (the same white-noise
    draw), summed at each point by a type-2 non-uniform FFT (``ducc0.nufft.u2nu``) instead of
    being read at the nearest grid node.  Nearest-node lookup makes the fields piecewise constant,
    which multiplies their power by the cell window prod_i sinc^2(k_i cell / 2) and lowers the
    pairwise velocity of close pairs (about 12% in the 0-20 Mpc bin with 8 Mpc cells); the band-
    limited field evaluated at the points only lacks the modes beyond the grid's Nyquist
    frequency.  The Nyquist planes of an even-sized grid are left out (their gradient has no real
counterpart).  A test checks the sum against a direct evaluation of the Fourier series.

    Parameters
    ----------
    points : ndarray of shape (N, 3), Mpc
        Positions in the grid frame.
    lo : ndarray of shape (3,), Mpc
        Position of grid node (0, 0, 0); the box is periodic with side ``shape * cell``.

    Returns
    -------
    delta : ndarray of shape (N,)
    u : ndarray of shape (N, 3), Mpc
    """
    import ducc0

    kx, ky, kz, k2 = _grid_wavevectors(shape, cell)
    dk = np.fft.fftn(rng.standard_normal(shape))
    amp = np.sqrt(_power_at(np.sqrt(k2), cosmo) / cell**3)
    amp[0, 0, 0] = 0.0
    dk *= amp
    del amp
    for axis, n in enumerate(shape):  # a Nyquist mode has no partner of opposite k: drop it so the fields stay real
        if n % 2 == 0:
            dk[(slice(None),) * axis + (n // 2,)] = 0.0
    n_cells = shape[0] * shape[1] * shape[2]
    grids = np.empty((4,) + tuple(shape), np.complex128)
    grids[0] = dk
    del dk
    inv_k2 = 1.0 / k2
    del k2
    for i, kk in enumerate((kx, ky, kz)):
        np.multiply(grids[0], inv_k2, out=grids[i + 1])
        grids[i + 1] *= 1j * kk
    del inv_k2
    coord = np.ascontiguousarray(np.asarray(points, np.float64) - np.asarray(lo, np.float64))
    values = ducc0.nufft.u2nu(grid=grids, coord=coord, forward=False, epsilon=epsilon, nthreads=os.cpu_count() or 1,
                              periodicity=[float(s * cell) for s in shape], fft_order=True)
    values = values.real / n_cells
    return values[0], values[1:].T.copy()


def _gaussian_alm(cl, lmax, rng):
    """Gaussian a_lm (healpy ordering) with power C_l, drawn from ``rng`` (no global random state)."""
    import healpy as hp

    ell, m = hp.Alm.getlm(lmax)
    amp = np.sqrt(cl[ell])
    re = rng.standard_normal(ell.size)
    im = rng.standard_normal(ell.size)
    return np.where(m == 0, amp * re, amp * (re + 1j * im) / np.sqrt(2.0)).astype(np.complex128)


def _inverse_distance(cosmo, z_max):
    """z(d) by linear interpolation on a 6001-point grid (relative error ~1e-9 in distance)."""
    zg = np.linspace(0.0, z_max * 1.2 + 0.05, 6001)
    dg = cosmo.comoving_distance_mpc(zg)
    return lambda d: np.interp(d, dg, zg)


def _footprint_pixels(nside, ra_min, ra_max, dec_min, dec_max, margin_deg):
    """RING pixels of the footprint grown by ``margin_deg`` (sorted)."""
    import healpy as hp

    th1 = np.radians(90 - min(dec_max + margin_deg, 90))
    th2 = np.radians(90 - max(dec_min - margin_deg, -90))
    pix = hp.query_strip(nside, th1, th2, inclusive=True)
    lon, _ = hp.pix2ang(nside, pix, lonlat=True)
    dra = (lon - 0.5 * (ra_min + ra_max) + 180.0) % 360.0 - 180.0
    cos_edge = math.cos(math.radians(min(max(abs(dec_min), abs(dec_max)) + margin_deg, 90.0)))
    half = 0.5 * (ra_max - ra_min) + margin_deg / max(cos_edge, 0.05)
    return np.sort(pix[np.abs(dra) <= half])


def _plain(obj):
    """JSON-ready copy: numpy scalars to Python numbers, non-finite floats to None."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, np.ndarray)):
        return [_plain(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    return obj


def extra_map_file(freq_ghz) -> str:
    """File name of the mock map at another frequency."""
    return f"skerry_{freq_ghz:g}ghz_partial.fits"


def _check_extra_frequencies(freqs, noise, default_noise) -> dict:
    """{frequency: noise level} of the extra maps, or a one-line InputError."""
    freqs = list(freqs or ())
    ok = all(isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) and math.isfinite(v)
             and 1.0 <= v <= 3000.0 and v != 150 for v in freqs) and len(set(freqs)) == len(freqs)
    if not ok:
        raise InputError(f"mock option 'extra_frequencies_ghz' must be distinct frequencies in [1, 3000] GHz other "
                         f"than 150; got {freqs!r}", key="extra_frequencies_ghz")
    noise = [default_noise] * len(freqs) if noise is None else list(noise)
    if len(noise) != len(freqs) or not all(isinstance(v, (int, float)) and math.isfinite(v) and v >= 0
                                           for v in noise):
        raise InputError(f"mock option 'extra_noise_uk_arcmin' must be one number >= 0 per extra frequency "
                         f"({len(freqs)}); got {noise!r}", key="extra_noise_uk_arcmin")
    return {float(f): float(n) for f, n in zip(freqs, noise)}


def _frequency_map(nu, foot, cmb_values, ksz, tsz, noise_uk_arcmin, nside, rng):
    """CMB + kSZ + tSZ scaled from 150 GHz to ``nu`` + white noise, on the footprint pixels."""
    import healpy as hp

    from ..model.sz import tsz_spectrum

    scale = float(tsz_spectrum(nu)) / _TSZ_F150  # the 150 GHz map's tSZ is _TSZ_F150 times the amplitude
    values = cmb_values.copy()
    for (pix, val), factor in ((ksz, 1.0), (tsz, scale)):
        idx = np.searchsorted(foot, pix)
        ok = (idx < foot.size) & (foot[np.minimum(idx, foot.size - 1)] == pix)
        np.add.at(values, idx[ok], factor * val[ok])
    sigma_pix = noise_uk_arcmin / math.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    return values + rng.normal(0.0, sigma_pix, foot.size)


def make_mock_survey(out_dir, *, n_tracers=30000, nside=2048, ra_min=-20.0, ra_max=20.0, dec_min=-10.0,
                     dec_max=10.0, z_min=0.15, z_max=0.55, tau_mean=2.0e-3, bias=0.4, cell_mpc=6.0,
                     beam_fwhm_arcmin=1.4, noise_uk_arcmin=15.0, aperture_radius_arcmin=2.1, include_cmb=True,
                     tsz_amplitude_uk=4.0, cosmo: Cosmology = DEFAULT_COSMOLOGY, seed=20261202,
                     progress=None, extra_frequencies_ghz=(), extra_noise_uk_arcmin=None) -> MockTruth:
    """Write a synthetic survey (catalogue, partial HEALPix map, truth.json) into a new folder.

    Parameters
    ----------
    out_dir : path-like
        New or empty folder; created if missing.
    n_tracers : int, default 30000
        Expected number of tracers in the light cone (the realised number is a Poisson draw).
    nside : int, default 2048
        HEALPix resolution of the map (RING ordering).
    ra_min, ra_max, dec_min, dec_max : float, degrees, default -20, 20, -10, 10
        The footprint, a RA-Dec rectangle (``ra_min`` may be negative: the patch then crosses
        RA = 0; catalogue RAs are written in [0, 360)).
    z_min, z_max : float, default 0.15, 0.55
        Redshift range of the tracers, z_min <= z < z_max.
    tau_mean : float, default 2e-3
        Mean injected aperture optical depth (definition in Notes).
    bias : float, default 0.4
        Linear bias b of the tracer sampling.
    cell_mpc : float, Mpc, default 6.0
        Cell of the FFT grid; also sets the smallest scale of the velocity field.
    beam_fwhm_arcmin : float, arcmin, default 1.4
        Gaussian beam applied to the CMB and giving the shape of the painted sources.
    noise_uk_arcmin : float, uK-arcmin, default 15.0
        White-noise level of the map.
    aperture_radius_arcmin : float, arcmin, default 2.1
        theta_ap in the definition of the injected optical depth.
    include_cmb : bool, default True
        Add the lensed primary CMB (a full-sky synthesis up to lmax = min(3 nside - 1, 8000);
        the slow step at high nside).
    tsz_amplitude_uk : float, uK, default 4.0
        Thermal-SZ aperture decrement of a 10^14.5 Msun tracer at z = 0.35 before the 150 GHz
        spectral factor f = -0.953 (the map gets f times this, scaling as M^(5/3) (1 + z)^2).
    cosmo : Cosmology, default DEFAULT_COSMOLOGY
        Power spectrum, growth, distances; the pipeline must use the same one for the written
        redshifts to map back to the true positions.
    seed : None, int or numpy Generator, default 20261202
        None draws fresh entropy, which is recorded in the truth.
    progress : callable(str), optional
        Receives one-line progress messages.
    extra_frequencies_ghz : sequence of float, GHz, default ()
        Also write a map at each of these frequencies (``skerry_<nu>ghz_partial.fits``): the same
        CMB, kSZ and beam, the tSZ scaled by f(nu) / f(150 GHz) (:func:`pairvel.model.sz.tsz_spectrum`)
        and independent white noise.  Drawn after everything else, so the 150 GHz map does not change.
    extra_noise_uk_arcmin : sequence of float, uK-arcmin, optional
        White noise of each extra map (default: ``noise_uk_arcmin`` for all).

    Returns
    -------
    MockTruth
        Also written, with descriptive extras, to ``out_dir/truth.json``.

    Raises
    ------
    OutputError
        ``out_dir`` exists and is not an empty folder.
    InputError
        An option is out of range, or the grid would be too large.

    Notes
    -----
    Files: ``larkspur_clusters.fits`` (columns ra, dec [deg], z, log_mass) and
    ``skerry_150ghz_partial.fits`` (float32, uK_CMB, footprint plus a 1 degree margin).

    Each tracer's kSZ temperature is dT_i = -tau_i T_CMB v_r,i / c (v_r > 0 receding), painted as
    a beam-shaped source whose solid-angle integral is dT_i pi theta_ap^2, so a compensated
    aperture of radius theta_ap on a noiseless map returns (1 - exp(-theta_ap^2 / 2 sigma_b^2))^2
    dT_i, i.e. dT_i up to the beam's spill beyond the disc; ``aperture_response`` reports the
    measured slope of the pixelised aperture.  tau_i is proportional to M_i^(2/3), scaled so that
    its mean over the written tracers is ``tau_mean``.
    """
    import healpy as hp
    from astropy.table import Table

    from ..pairs.estimator import mean_pairwise_velocity_3d, pairwise_momentum
    from ..pairs.geometry import comoving_positions
    from ..maps.photometry import measure_apertures
    from ..maps.healpix import HealpixMap
    from ..maps.healpix_io import write_partial_map
    from ..model.theory import binned_pairwise_velocity, growth_factor, growth_rate
    from ..maps.trend import remove_redshift_trend

    out = Path(out_dir)
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise OutputError(f"mock folder {out} exists and is not empty; choose a new folder", path=out)
    _check_options(dict(n_tracers=n_tracers, nside=nside, ra_min=ra_min, ra_max=ra_max, dec_min=dec_min,
                        dec_max=dec_max, z_min=z_min, z_max=z_max, tau_mean=tau_mean, bias=bias, cell_mpc=cell_mpc,
                        beam_fwhm_arcmin=beam_fwhm_arcmin, noise_uk_arcmin=noise_uk_arcmin,
                        aperture_radius_arcmin=aperture_radius_arcmin, include_cmb=include_cmb,
                        tsz_amplitude_uk=tsz_amplitude_uk, cosmo=cosmo, progress=progress))
    extra_noise = _check_extra_frequencies(extra_frequencies_ghz, extra_noise_uk_arcmin, noise_uk_arcmin)
    if seed is None:
        seed = int(np.random.SeedSequence().entropy)  # fresh, and recorded
    rng = as_generator(seed)
    say = progress or (lambda text: None)
    timings = {}
    t0 = time.perf_counter()

    # 1. Gaussian density and velocity fields at z = 0, on a grid turned towards the footprint
    d_min, d_max = cosmo.comoving_distance_mpc([z_min, z_max])
    frame = _patch_frame(ra_min, ra_max, dec_min, dec_max)
    lo, hi = _cone_box(ra_min, ra_max, dec_min, dec_max, d_min, d_max, cell_mpc, frame)
    shape = tuple(int(s) for s in np.ceil((hi - lo) / cell_mpc).astype(int))
    n_cells = shape[0] * shape[1] * shape[2]
    if n_cells > _MAX_CELLS:
        raise InputError(f"mock grid must have at most {_MAX_CELLS:,} cells; got {n_cells:,} "
                         f"({shape[0]}x{shape[1]}x{shape[2]} of {cell_mpc:g} Mpc): increase cell_mpc or shrink "
                         f"the footprint or redshift range", key="cell_mpc")
    say(f"mock: Gaussian field on a {shape[0]}x{shape[1]}x{shape[2]} grid of {cell_mpc:g} Mpc cells")
    delta0, u0 = _gaussian_fields(shape, cell_mpc, cosmo, rng)
    timings["fields"] = time.perf_counter() - t0

    # 2. tracers: Poisson sampling of the cone, constant comoving density
    omega = math.radians(ra_max - ra_min) * (math.sin(math.radians(dec_max)) - math.sin(math.radians(dec_min)))
    n_bar = n_tracers / (omega / 3 * (d_max**3 - d_min**3))
    centres = [lo[i] + cell_mpc * (np.arange(shape[i]) + 0.5) for i in range(3)]
    to_z = _inverse_distance(cosmo, z_max)
    zg = np.linspace(z_min, z_max, 256)
    d_grid = growth_factor(zg, cosmo=cosmo)
    yy, zz = np.meshgrid(centres[1], centres[2], indexing="ij")
    cells_x, cells_y, cells_z, counts = [], [], [], []
    clipped = total = 0
    for ix in range(shape[0]):
        x = centres[0][ix]
        dist = np.sqrt(x * x + yy**2 + zz**2)
        near = (dist > d_min - cell_mpc) & (dist < d_max + cell_mpc)
        if not near.any():
            continue
        growth = np.interp(to_z(dist[near]), zg, d_grid)
        dens = 1.0 + bias * growth * delta0[ix][near]
        clipped += int((dens < 0).sum())
        total += dens.size
        k = rng.poisson(n_bar * cell_mpc**3 * np.clip(dens, 0.0, None))
        iy, iz = np.nonzero(near)
        sel = k > 0
        cells_x.append(np.full(sel.sum(), ix))
        cells_y.append(iy[sel])
        cells_z.append(iz[sel])
        counts.append(k[sel])
    counts = np.concatenate(counts)
    cx, cy, cz = (np.repeat(np.concatenate(c), counts) for c in (cells_x, cells_y, cells_z))
    pos = np.column_stack([centres[0][cx], centres[1][cy], centres[2][cz]])
    pos += rng.uniform(-0.5 * cell_mpc, 0.5 * cell_mpc, pos.shape)
    pos = pos @ frame  # grid frame -> equatorial axes
    dist = np.linalg.norm(pos, axis=1)
    ra = np.degrees(np.arctan2(pos[:, 1], pos[:, 0]))
    dec = np.degrees(np.arcsin(pos[:, 2] / dist))
    dra = (ra - ra_min) % 360.0
    inside = (dist >= d_min) & (dist < d_max) & (dra < ra_max - ra_min) & (dec >= dec_min) & (dec < dec_max)
    pos, dist, ra, dec = pos[inside], dist[inside], ra[inside] % 360.0, dec[inside]
    cx, cy, cz = cx[inside], cy[inside], cz[inside]
    n = pos.shape[0]
    if n < 2:
        raise InputError(f"mock option 'n_tracers' must give at least 2 tracers in the cone; got {n} "
                         f"(requested {n_tracers})", key="n_tracers")
    z = to_z(dist)
    a = 1.0 / (1.0 + z)
    vel_scale = a * cosmo.hubble_km_s_mpc(z) * growth_rate(z, cosmo=cosmo) * np.interp(z, zg, d_grid)
    vel = np.column_stack([u[cx, cy, cz] for u in u0]).astype(np.float64) @ frame * vel_scale[:, None]
    del delta0, u0
    v_r = np.einsum("ij,ij->i", vel, pos) / dist
    roundtrip = float(np.max(np.linalg.norm(comoving_positions(ra, dec, z, cosmo=cosmo) - pos, axis=1)))
    # mass proxy: dN/dlog10 M ~ M^-1.5 between 10^14 and 10^15 Msun; tau ~ M^(2/3), mean tau_mean
    uu = rng.uniform(size=n)
    lo_m, hi_m = 10.0 ** (-1.5 * 14.0), 10.0 ** (-1.5 * 15.0)
    log_mass = np.log10(lo_m + uu * (hi_m - lo_m)) / -1.5
    tau = 10.0 ** (2.0 / 3.0 * (log_mass - 14.5))
    tau *= tau_mean / tau.mean()
    dt_ksz = -tau * T_CMB_UK * v_r / C_KM_S
    tsz = _TSZ_F150 * tsz_amplitude_uk * 10.0 ** (5.0 / 3.0 * (log_mass - 14.5)) * ((1 + z) / 1.35) ** 2
    timings["tracers"] = time.perf_counter() - t0 - sum(timings.values())
    say(f"mock: {n} tracers, clipped cells {clipped / max(total, 1):.2%}")

    # 3-4. the map on the footprint
    area = math.pi * (aperture_radius_arcmin * ARCMIN_RAD) ** 2
    foot = _footprint_pixels(nside, ra_min, ra_max, dec_min, dec_max, margin_deg=1.0)
    values = np.zeros(foot.size)
    if include_cmb:
        ell, cl = load_cmb_cl()
        lmax = min(3 * nside - 1, int(ell[-1]))
        alm = _gaussian_alm(cl[: lmax + 1], lmax, rng)
        hp.almxfl(alm, hp.gauss_beam(math.radians(beam_fwhm_arcmin / 60.0), lmax=lmax), inplace=True)
        say(f"mock: primary CMB at nside {nside}, lmax {lmax}")
        values += hp.alm2map(alm, nside, lmax=lmax)[foot]
        del alm
    cmb_values = values.copy() if extra_noise else None  # the blackbody part, shared by the extra frequencies
    timings["cmb"] = time.perf_counter() - t0 - sum(timings.values())
    pix_k, val_k = paint_beam_sources(nside, ra, dec, dt_ksz * area, beam_fwhm_arcmin)
    pix_t, val_t = paint_beam_sources(nside, ra, dec, tsz * area, beam_fwhm_arcmin)
    for pix, val in ((pix_k, val_k), (pix_t, val_t)):
        idx = np.searchsorted(foot, pix)
        ok = (idx < foot.size) & (foot[np.minimum(idx, foot.size - 1)] == pix)
        np.add.at(values, idx[ok], val[ok])
    sigma_pix = noise_uk_arcmin / math.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    values += rng.normal(0.0, sigma_pix, foot.size)
    extra_maps = {}
    for nu, noise_nu in extra_noise.items():  # several frequencies: drawn after the 150 GHz map
        extra_maps[nu] = _frequency_map(nu, foot, cmb_values, (pix_k, val_k), (pix_t, val_t), noise_nu, nside, rng)
    timings["map"] = time.perf_counter() - t0 - sum(timings.values())

    # truth: realised pairwise velocities, linear theory, aperture response
    edges = _DEFAULT_EDGES
    v3d, _ = mean_pairwise_velocity_3d(pos, vel, edges)
    # what the measurement sees: the Ferreira estimator on the true line-of-sight velocities, after
    # the same redshift-trend removal the pipeline applies to temperatures (default sigma_z), which
    # also removes the radial flow of any large-scale mode of the volume
    los_raw = pairwise_momentum(pos, -v_r, edges)
    los = pairwise_momentum(pos, -remove_redshift_trend(v_r, z, sigma_z=_TREND_SIGMA_Z), edges, redshifts=z)
    z_eff = float(np.nansum(los.z_eff * los.denominator) / los.denominator.sum())
    v_lin = binned_pairwise_velocity(edges, z_eff, bias, cosmo=cosmo)
    ksz_only = HealpixMap(nside, False, pix_k, val_k, np.ones(pix_k.size, np.float32))
    resp = measure_apertures(ksz_only, ra, dec, aperture_radius_arcmin, max_masked_fraction=1.0).temperatures[0]
    ok = np.isfinite(resp)
    norm = float(np.sum(dt_ksz[ok] ** 2))
    response = float(np.sum(resp[ok] * dt_ksz[ok]) / norm) if norm > 0 else math.nan
    if not math.isfinite(response):
        warnings.warn(f"mock aperture response could not be measured ({int(ok.sum())} usable apertures, "
                      f"tau_mean = {tau_mean}); truth.json records it as null", PairvelWarning, stacklevel=2)
    timings["truth"] = time.perf_counter() - t0 - sum(timings.values())

    out.mkdir(parents=True, exist_ok=True)
    table = Table({"ra": ra, "dec": dec, "z": z, "log_mass": log_mass})
    table["ra"].unit = table["dec"].unit = "deg"
    table.meta.update({"SURVEY": SURVEY_NAME, "COMMENT": "synthetic catalogue made by pairvel mock"})
    table.write(out / CATALOGUE_FILE)
    write_partial_map(out / MAP_FILE, foot, values.astype(np.float32), nside=nside, nest=False, unit="uK_CMB",
                      extra_header={"TELESCOP": TELESCOPE_NAME, "FREQ": ("150 GHz", "observing frequency"),
                                    "BEAMFWHM": (beam_fwhm_arcmin, "arcmin")})
    for nu, vals in extra_maps.items():
        write_partial_map(out / extra_map_file(nu), foot, vals.astype(np.float32), nside=nside, nest=False,
                          unit="uK_CMB", extra_header={"TELESCOP": TELESCOPE_NAME,
                                                       "FREQ": (f"{nu:g} GHz", "observing frequency"),
                                                       "BEAMFWHM": (beam_fwhm_arcmin, "arcmin")})
    options = {"n_tracers": n_tracers, "nside": nside, "ra_min": ra_min, "ra_max": ra_max, "dec_min": dec_min,
               "dec_max": dec_max, "z_min": z_min, "z_max": z_max, "tau_mean": tau_mean, "bias": bias,
               "cell_mpc": cell_mpc, "beam_fwhm_arcmin": beam_fwhm_arcmin, "noise_uk_arcmin": noise_uk_arcmin,
               "aperture_radius_arcmin": aperture_radius_arcmin, "include_cmb": include_cmb,
               "tsz_amplitude_uk": tsz_amplitude_uk, "cosmology": asdict(cosmo)}
    if extra_noise:
        options["extra_frequencies_ghz"] = {f"{nu:g}": noise_nu for nu, noise_nu in extra_noise.items()}
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = los.p / v_lin
    truth = MockTruth(
        n_tracers=int(n), tau_mean=float(tau_mean), bias=float(bias),
        seed=int(seed) if isinstance(seed, (int, np.integer)) else None,
        options=_plain(options), edges_mpc=edges.tolist(), v12_3d_realised_km_s=v3d.tolist(),
        v12_los_realised_km_s=los.p.tolist(), v12_linear_km_s=v_lin.tolist(), z_eff=z_eff,
        aperture_response=response, clipped_cell_fraction=clipped / max(total, 1),
        files={"catalogue": CATALOGUE_FILE, "map": MAP_FILE,
               **{f"map_{nu:g}ghz": extra_map_file(nu) for nu in extra_maps}}, timings_s={k: round(v, 2) for k, v in timings.items()},
        position_roundtrip_mpc=roundtrip)
    record = asdict(truth)
    record.update({
        "scenario": {"survey": SURVEY_NAME, "telescope": TELESCOPE_NAME, "frequency_ghz": 150,
                     "note": "invented names; every number here was generated by pairvel mock"},
        "tau_definition": f"mean aperture optical depth: each tracer's kSZ is a beam-shaped source whose solid-angle "
                          f"integral is dT pi theta_ap^2 with theta_ap = {aperture_radius_arcmin} arcmin",
        "realised_over_linear": ratio.tolist(),
        "v12_los_realised_no_trend_removal_km_s": los_raw.p.tolist(),
        "velocity_note": "v12_los_realised is the Ferreira estimator applied to the tracers' true line-of-sight "
                         f"velocities after the pipeline's redshift-trend removal (sigma_z = {_TREND_SIGMA_Z}), "
                         "i.e. what the kSZ measurement sees; v12_los_realised_no_trend_removal skips that removal; "
                         "v12_3d_realised is <(v_i - v_j).rhat_ij> over pairs",
        "redshift_note": "cosmological redshifts only (no redshift-space distortion); comoving positions recomputed "
                         "from (ra, dec, z) with the recorded cosmology are the true ones (position_roundtrip_mpc)",
    })
    (out / "truth.json").write_text(json.dumps(_plain(record), indent=2, allow_nan=False) + "\n")
    return truth
