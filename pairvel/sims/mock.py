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
   RING, written for the footprint only as a partial-sky map; or, with ``pixels="car"``, the same
   content on a plate-carree image (:mod:`pairvel.sims.mock_car`).

The low default bias keeps the clipped fraction of cells small, so the sampled pairs follow the
linear-theory template with that bias (clusters in a real survey have b ~ 3; the bias is a
config key of the measurement).
"""

from __future__ import annotations

__all__ = ["MockTruth", "make_mock_survey", "SURVEY_NAME", "TELESCOPE_NAME", "extra_map_file"]

import dataclasses
import functools
import json
import math
import time
import warnings
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from ..core.constants import ARCMIN_RAD, C_KM_S, T_CMB_UK
from ..core.errors import InputError, PairvelWarning
from ..core.rng import as_generator
from ..maps.sources import paint_beam_sources
from ..model.cmb import load_cmb_cl
from ..model.cosmology import DEFAULT_COSMOLOGY, Cosmology
from ..model.sz import ELECTRON_REST_ENERGY_KEV
from ..report.folders import claim_output_dir
from ._fields import _cone_box, _gaussian_fields, _patch_frame
from .mock_car import car_cmb, car_footprint, car_map_file, car_painted, car_white_noise, check_car_options, write_car_map
from .depth import check_depth_ratio, ivar_file, noise_scale, write_ivar_map
from .mockconfig import RUN_CONFIG_FILE, mock_run_config
from .partner import PartnerSpec, partner_ksz, partner_record, partner_spec, write_partner

SURVEY_NAME = "Larkspur Cluster Survey"
TELESCOPE_NAME = "Skerry Millimetre Telescope"
CATALOGUE_FILE = "larkspur_clusters.fits"
MAP_FILE = "skerry_150ghz_partial.fits"
TRACER_TRUTH_FILE = "tracer_truth.fits"  # only with electron_temperature_kev
_DEFAULT_EDGES = np.arange(0.0, 301.0, 20.0)
_TREND_SIGMA_Z = 0.01  # the pipeline's default trend.sigma_z
_TSZ_F150 = -0.95333  # x coth(x/2) - 4 at 150 GHz, T_CMB = 2.72548 K (Carlstrom et al. 2002)
_LOG_MASS_PIVOT = 14.5  # log10 Msun of the injected tau(M) normalisation
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
    tau_mass_relation : dict
        The injected tau_i = tau_at_pivot (M_i / 10^log10_mass_pivot)^slope.
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
    tau_mass_relation: dict = field(default_factory=dict)


def _check_options(o: dict) -> None:
    """One-line errors naming the option, what it must be and what it got."""
    def need(ok, name, must):
        if not ok:
            raise InputError(f"mock option '{name}' must be {must}; got {o[name]!r}", key=name)

    def is_num(name):
        v = o[name]
        return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool) and math.isfinite(v)

    for name in ("ra_min", "ra_max", "dec_min", "dec_max", "z_min", "z_max", "tau_mean", "bias", "cell_mpc",
                 "beam_fwhm_arcmin", "noise_uk_arcmin", "aperture_radius_arcmin", "tsz_amplitude_uk",
                 "tau_mass_slope"):
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


def _add_to_footprint(values, foot, pix, val) -> None:
    """Add ``val`` at the HEALPix pixels ``pix`` to ``values``, held on the sorted pixels ``foot``, in
    place: repeated pixels add up, pixels outside ``foot`` (beyond the map's margin) are left out."""
    idx = np.searchsorted(foot, pix)
    ok = (idx < foot.size) & (foot[np.minimum(idx, foot.size - 1)] == pix)
    np.add.at(values, idx[ok], val[ok])


def _white_noise(noise_uk_arcmin, nside, size, rng) -> np.ndarray:
    """``size`` pixel values of white noise with ``noise_uk_arcmin`` uK-arcmin at ``nside``, from ``rng``."""
    import healpy as hp

    sigma_pix = noise_uk_arcmin / math.sqrt(hp.nside2pixarea(nside, degrees=True) * 3600.0)
    return rng.normal(0.0, sigma_pix, size)


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


def make_mock_survey(out_dir, *, n_tracers=30000, nside=2048, ra_min=-20.0, ra_max=20.0, dec_min=-10.0,
                     dec_max=10.0, z_min=0.15, z_max=0.55, tau_mean=2.0e-3, bias=0.4, cell_mpc=6.0,
                     beam_fwhm_arcmin=1.4, noise_uk_arcmin=15.0, aperture_radius_arcmin=2.1, include_cmb=True,
                     tsz_amplitude_uk=4.0, cosmo: Cosmology = DEFAULT_COSMOLOGY, seed=20261202,
                     progress=None, extra_frequencies_ghz=(), extra_noise_uk_arcmin=None,
                     electron_temperature_kev=None, partner_n_tracers=0, partner_bias=0.3,
                     partner_tau_mean=5.0e-4,
                     tau_mass_slope=2.0 / 3.0, pixels="healpix", car_arcmin=0.5, depth_ratio=1.0) -> MockTruth:
    """Write a synthetic survey (catalogue, partial HEALPix map, truth.json, run.toml) into a new folder.

    Parameters
    ----------
    out_dir : path-like
        New or empty folder; claimed before the work and filled all or nothing, as every output
        folder (:mod:`pairvel.report.folders`).
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
    electron_temperature_kev : float, keV, optional
        Give every tracer the Compton y of an isothermal gas at this temperature, y = tau k_B T_e /
        (m_e c^2) (non-relativistic), instead of the mass scaling of ``tsz_amplitude_uk`` (then unused),
        and write the per-tracer truth ``tracer_truth.fits`` (catalogue rows in order: tau, y, v_r_km_s,
        dt_ksz_uk), for the single-cluster velocities (`pairvel velocities`).
    partner_n_tracers : int, default 0
        Also write a second, galaxy-like catalogue (``partner_galaxies.fits``) of about this many
        tracers, Poisson-sampled from the same density and velocity fields with ``partner_bias``,
        each with optical depth ``partner_tau_mean`` (no tSZ); its kSZ is painted into the same
        maps and run.toml gets a ``[partner]`` section (:mod:`pairvel.sims.partner`).  0: none (and
        nothing else changes).
    depth_ratio : float, default 1
        Noise rms varies by this factor between deep and shallow stripes in RA (:mod:`pairvel.sims.depth`;
        geometric mean ``noise_uk_arcmin``); above 1 an inverse-variance map is written beside each map.
    tau_mass_slope : float, default 2/3
        alpha of the injected tau_i proportional to M_i^alpha (truth.json ``tau_mass_relation`` gives
        the normalisation at M = 10^14.5 Msun).
    pixels : {"healpix", "car"}, default "healpix"
        "car": write the maps as plate-carree FITS images (``skerry_<nu>ghz_car.fits``) of
        ``car_arcmin`` pixels instead (:mod:`pairvel.sims.mock_car`).  ``nside`` then only sets the
        CMB's band limit, min(3 nside - 1, 8000), so a HEALPix and a CAR mock of one seed and nside
        hold the same tracers and the same CMB a_lm.
    car_arcmin : float, arcmin, default 0.5
        Pixel size of the CAR maps; 360 degrees must be a whole number of pixels.

    Returns
    -------
    MockTruth
        Also written, with descriptive extras, to ``out_dir/truth.json``.

    Raises
    ------
    OutputError
        ``out_dir`` exists and is not an empty folder, is claimed by another command, or cannot be
        written.
    InputError
        An option is out of range, or the grid would be too large.

    Notes
    -----
    Files: ``larkspur_clusters.fits`` (columns ra, dec [deg], z, log_mass),
    ``skerry_150ghz_partial.fits`` (float32, uK_CMB, footprint plus a 1 degree margin), and
    ``run.toml``, a config that ``pairvel run`` measures as it is, with the mock's bias, cosmology
    and aperture, checked against truth.json (:mod:`pairvel.sims.mockconfig`).

    Each tracer's kSZ temperature is dT_i = -tau_i T_CMB v_r,i / c (v_r > 0 receding), painted as
    a beam-shaped source whose solid-angle integral is dT_i pi theta_ap^2, so a compensated
    aperture of radius theta_ap on a noiseless map returns (1 - exp(-theta_ap^2 / 2 sigma_b^2))^2
    dT_i, i.e. dT_i up to the beam's spill beyond the disc; ``aperture_response`` reports the
    measured slope of the pixelised aperture.  tau_i is proportional to M_i^(2/3), scaled so that
    its mean over the written tracers is ``tau_mean`` (``tau_mass_slope`` sets the power).
    """
    out = Path(out_dir)
    options = dict(n_tracers=n_tracers, nside=nside, ra_min=ra_min, ra_max=ra_max, dec_min=dec_min, dec_max=dec_max,
                   z_min=z_min, z_max=z_max, tau_mean=tau_mean, bias=bias, cell_mpc=cell_mpc,
                   beam_fwhm_arcmin=beam_fwhm_arcmin, noise_uk_arcmin=noise_uk_arcmin,
                   aperture_radius_arcmin=aperture_radius_arcmin, include_cmb=include_cmb,
                   tsz_amplitude_uk=tsz_amplitude_uk, cosmo=cosmo, tau_mass_slope=tau_mass_slope)
    _check_options({**options, "progress": progress})
    check_car_options(pixels, car_arcmin)
    extra_noise = _check_extra_frequencies(extra_frequencies_ghz, extra_noise_uk_arcmin, noise_uk_arcmin)
    _check_electron_temperature(electron_temperature_kev)
    spec = _MockSpec(**options, extra_noise=extra_noise, electron_temperature_kev=electron_temperature_kev,
                     depth_ratio=_depth_for(pixels, depth_ratio),
                     partner=partner_spec(partner_n_tracers, partner_bias, partner_tau_mean), pixels=pixels,
                     car_arcmin=float(car_arcmin) if pixels == "car" else None)
    with claim_output_dir(out, replace_empty=True) as claim:  # before the work; released if it fails
        if seed is None:
            seed = int(np.random.SeedSequence().entropy)  # fresh, and recorded
        rng = as_generator(seed)  # the stages draw from it in the order they run, which fixes every output
        say = progress or (lambda text: None)
        timings, t0 = {}, time.perf_counter()

        cone = _cone_grid(spec)
        say(f"mock: Gaussian field on a {'x'.join(map(str, cone.shape))} grid of {cell_mpc:g} Mpc cells")
        delta0, u0 = _gaussian_fields(cone.shape, cell_mpc, cosmo, rng)
        _lap(timings, "fields", t0)
        cells, clipped_fraction = _poisson_cells(cone, delta0, spec, rng)
        tracers = _tracers_in_cone(cone, cells, u0, spec, rng)
        amplitudes = _sz_amplitudes(tracers, spec, rng)
        partner = _partner_tracers(cone, delta0, u0, spec, rng)
        del delta0, u0
        _lap(timings, "tracers", t0)
        say(f"mock: {tracers.z.size} tracers, clipped cells {clipped_fraction:.2%}")

        foot = _footprint_pixels(nside, ra_min, ra_max, dec_min, dec_max, margin_deg=1.0) if pixels == "healpix" \
            else np.arange(car_footprint(spec).n_held)
        cmb = _cmb_on_footprint(spec, foot, rng, say)
        _lap(timings, "cmb", t0)
        ksz, tsz = _painted_sources(spec, tracers, amplitudes)
        both = ksz if partner is None else tuple(map(np.concatenate, zip(ksz, partner_ksz(spec, partner[0]))))
        maps = _sky_maps(spec, foot, cmb, both, tsz, rng)
        _lap(timings, "map", t0)

        curves = _pairwise_truth(tracers, spec)
        response = _aperture_response(spec, tracers, ksz, amplitudes.dt_ksz_uk)
        _lap(timings, "truth", t0)

        files = _survey_files(maps, pixels, with_ivar=spec.depth_ratio != 1.0)
        if electron_temperature_kev is not None:
            files["tracer_truth"] = TRACER_TRUTH_FILE
        truth = MockTruth(
            n_tracers=int(tracers.z.size), tau_mean=float(tau_mean), bias=float(bias),
            seed=int(seed) if isinstance(seed, (int, np.integer)) else None, options=_options_record(spec),
            edges_mpc=curves.edges_mpc.tolist(), v12_3d_realised_km_s=curves.v12_3d.tolist(),
            v12_los_realised_km_s=curves.v12_los.tolist(), v12_linear_km_s=curves.v12_linear.tolist(),
            z_eff=curves.z_eff, aperture_response=response, clipped_cell_fraction=clipped_fraction, files=files,
            timings_s={k: round(v, 2) for k, v in timings.items()}, position_roundtrip_mpc=tracers.roundtrip_mpc,
            tau_mass_relation={"slope": float(tau_mass_slope), "log10_mass_pivot": _LOG_MASS_PIVOT,
                               "tau_at_pivot": amplitudes.tau_at_pivot})
        record = _truth_record(truth, spec, curves)
        if partner is not None:
            record["partner"] = partner_record(spec, tracers_mean_tau=spec.tau_mean, n_written=partner[0].z.size,
                                               clipped_fraction=partner[1])

        def fill(folder: Path) -> None:
            _write_survey(folder, spec, tracers, amplitudes.log_mass, foot, maps)
            if partner is not None:
                write_partner(folder, partner[0])
            if electron_temperature_kev is not None:
                _write_tracer_truth(folder, tracers, amplitudes)
            (folder / "truth.json").write_text(json.dumps(record, indent=2, allow_nan=False) + "\n")
            (folder / RUN_CONFIG_FILE).write_text(mock_run_config(record, folder_name=claim.path.name,
                                                                  trend_sigma_z=_TREND_SIGMA_Z))

        claim.write(fill)
    return truth


def _partner_tracers(cone, delta0, u0, spec, rng):
    """(tracers, clipped cell fraction) of the second catalogue, drawn from the same fields with its own
    bias and number; None when the mock has none (nothing is drawn)."""
    if spec.partner is None:
        return None
    sub = dataclasses.replace(spec, n_tracers=spec.partner.n_tracers, bias=spec.partner.bias)
    cells, clipped = _poisson_cells(cone, delta0, sub, rng)
    return _tracers_in_cone(cone, cells, u0, sub, rng), clipped


def _lap(timings: dict, name: str, t0: float) -> None:
    """Record under ``name`` the seconds since ``t0`` that no earlier entry of ``timings`` holds."""
    timings[name] = time.perf_counter() - t0 - sum(timings.values())


# ---------------------------------------------------------------------------------------------
# the stages of make_mock_survey, in the order it runs them

@dataclass(frozen=True)
class _MockSpec:
    """The checked options of :func:`make_mock_survey` (same names, units and meaning), with the extra
    maps as ``extra_noise``: {frequency in GHz: white noise in uK-arcmin}, in the order drawn."""

    n_tracers: int
    nside: int
    ra_min: float
    ra_max: float
    dec_min: float
    dec_max: float
    z_min: float
    z_max: float
    tau_mean: float
    bias: float
    cell_mpc: float
    beam_fwhm_arcmin: float
    noise_uk_arcmin: float
    aperture_radius_arcmin: float
    include_cmb: bool
    tsz_amplitude_uk: float
    cosmo: Cosmology
    tau_mass_slope: float
    extra_noise: dict
    electron_temperature_kev: float | None = None
    partner: PartnerSpec | None = None
    pixels: str = "healpix"
    car_arcmin: float | None = None
    depth_ratio: float = 1.0


@dataclass(frozen=True, eq=False)
class _Cone:
    """The light cone and the FFT grid around it, whose axes are turned by ``frame`` (:func:`_patch_frame`).

    ``lo`` (Mpc, grid frame) is the outer corner of cell (0, 0, 0); ``d_min`` and ``d_max`` (Mpc) are the
    comoving distances of z_min and z_max; ``growth`` is the growth factor D at ``z_grid``, 256 redshifts
    from z_min to z_max (D varies slowly: interpolated), and ``rate`` the growth rate f there (a cubic
    spline through it is within about 1e-12 relative of the exact f, which costs one quadrature per redshift).
    """

    frame: np.ndarray
    lo: np.ndarray
    shape: tuple
    cell_mpc: float
    d_min: float
    d_max: float
    z_grid: np.ndarray
    growth: np.ndarray
    rate: np.ndarray

    def centres(self, axis: int) -> np.ndarray:
        """Grid-frame coordinate (Mpc) of the cell centres along ``axis``."""
        return self.lo[axis] + self.cell_mpc * (np.arange(self.shape[axis]) + 0.5)


def _cone_grid(spec: _MockSpec) -> _Cone:
    """The grid enclosing the light cone with one cell of margin, or an InputError naming ``cell_mpc``
    when it would have more than ``_MAX_CELLS`` cells."""
    from ..model.theory import growth_factor, growth_rate

    d_min, d_max = spec.cosmo.comoving_distance_mpc([spec.z_min, spec.z_max])
    frame = _patch_frame(spec.ra_min, spec.ra_max, spec.dec_min, spec.dec_max)
    lo, hi = _cone_box(spec.ra_min, spec.ra_max, spec.dec_min, spec.dec_max, d_min, d_max, spec.cell_mpc, frame)
    shape = tuple(int(s) for s in np.ceil((hi - lo) / spec.cell_mpc).astype(int))
    n_cells = shape[0] * shape[1] * shape[2]
    if n_cells > _MAX_CELLS:
        raise InputError(f"mock grid must have at most {_MAX_CELLS:,} cells; got {n_cells:,} "
                         f"({shape[0]}x{shape[1]}x{shape[2]} of {spec.cell_mpc:g} Mpc): increase cell_mpc or "
                         f"shrink the footprint or redshift range", key="cell_mpc")
    z_grid = np.linspace(spec.z_min, spec.z_max, 256)
    return _Cone(frame, lo, shape, spec.cell_mpc, d_min, d_max, z_grid, growth_factor(z_grid, cosmo=spec.cosmo),
                 growth_rate(z_grid, cosmo=spec.cosmo))


def _poisson_cells(cone: _Cone, delta0, spec: _MockSpec, rng):
    """Poisson numbers of tracers in the cells near the cone, drawn slab by slab along the first axis.

    The mean count of a cell is n cell^3 max(1 + b D(z) delta_0, 0), with n the constant comoving
    density that puts ``n_tracers`` in the cone and z the redshift of the cell centre.

    Returns
    -------
    cells : ndarray of shape (n, 3), int
        Grid index of each tracer's cell (a cell drawing k tracers appears k times).
    clipped_fraction : float
        Fraction of the cells near the cone whose 1 + b D delta_0 was negative (set to zero).
    """
    sin_dec = math.sin(math.radians(spec.dec_max)) - math.sin(math.radians(spec.dec_min))
    omega = math.radians(spec.ra_max - spec.ra_min) * sin_dec
    n_bar = spec.n_tracers / (omega / 3 * (cone.d_max**3 - cone.d_min**3))
    to_z = _inverse_distance(spec.cosmo, spec.z_max)
    x = cone.centres(0)
    yy, zz = np.meshgrid(cone.centres(1), cone.centres(2), indexing="ij")
    found, counts = [], []
    clipped = total = 0
    for ix in range(cone.shape[0]):
        dist = np.sqrt(x[ix] * x[ix] + yy**2 + zz**2)
        near = (dist > cone.d_min - cone.cell_mpc) & (dist < cone.d_max + cone.cell_mpc)
        if not near.any():
            continue
        growth = np.interp(to_z(dist[near]), cone.z_grid, cone.growth)
        dens = 1.0 + spec.bias * growth * delta0[ix][near]
        clipped += int((dens < 0).sum())
        total += dens.size
        k = rng.poisson(n_bar * cone.cell_mpc**3 * np.clip(dens, 0.0, None))
        iy, iz = np.nonzero(near)
        sel = k > 0
        found.append(np.column_stack([np.full(sel.sum(), ix), iy[sel], iz[sel]]))
        counts.append(k[sel])
    return np.repeat(np.concatenate(found), np.concatenate(counts), axis=0), clipped / max(total, 1)


@dataclass(frozen=True, eq=False)
class _Tracers:
    """Tracers in the cone: ``ra``, ``dec`` (degrees, RA in [0, 360)) and ``z`` of shape (n,), comoving
    ``pos`` (Mpc) and ``vel`` (km/s) of shape (n, 3) in equatorial axes, ``v_r`` (km/s, > 0 receding),
    and ``roundtrip_mpc``, the largest distance between ``pos`` and the position recomputed from
    (ra, dec, z)."""

    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    v_r: np.ndarray
    roundtrip_mpc: float


def _tracers_in_cone(cone: _Cone, cells, u0, spec: _MockSpec, rng) -> _Tracers:
    """Each tracer uniform within its cell, kept when inside the cone, with the linear velocity of its
    cell at its own redshift, v = a H f D u_0; an InputError when fewer than two are left."""
    from scipy.interpolate import CubicSpline

    from ..pairs.geometry import comoving_positions

    pos = np.column_stack([cone.centres(i)[cells[:, i]] for i in range(3)])
    pos += rng.uniform(-0.5 * cone.cell_mpc, 0.5 * cone.cell_mpc, pos.shape)
    pos = pos @ cone.frame  # grid frame -> equatorial axes
    dist = np.linalg.norm(pos, axis=1)
    ra = np.degrees(np.arctan2(pos[:, 1], pos[:, 0]))
    dec = np.degrees(np.arcsin(pos[:, 2] / dist))
    dra = (ra - spec.ra_min) % 360.0
    inside = ((dist >= cone.d_min) & (dist < cone.d_max) & (dra < spec.ra_max - spec.ra_min)
              & (dec >= spec.dec_min) & (dec < spec.dec_max))
    pos, dist, ra, dec, cells = pos[inside], dist[inside], ra[inside] % 360.0, dec[inside], cells[inside]
    if pos.shape[0] < 2:
        raise InputError(f"mock option 'n_tracers' must give at least 2 tracers in the cone; got {pos.shape[0]} "
                         f"(requested {spec.n_tracers})", key="n_tracers")
    z = _inverse_distance(spec.cosmo, spec.z_max)(dist)
    growth = np.interp(z, cone.z_grid, cone.growth)
    vel_scale = 1.0 / (1.0 + z) * spec.cosmo.hubble_km_s_mpc(z) * CubicSpline(cone.z_grid, cone.rate)(z) * growth
    vel = np.column_stack([u[tuple(cells.T)] for u in u0]).astype(np.float64) @ cone.frame * vel_scale[:, None]
    v_r = np.einsum("ij,ij->i", vel, pos) / dist
    roundtrip = float(np.max(np.linalg.norm(comoving_positions(ra, dec, z, cosmo=spec.cosmo) - pos, axis=1)))
    return _Tracers(ra, dec, z, pos, vel, v_r, roundtrip)


@dataclass(frozen=True, eq=False)
class _Amplitudes:
    """Per tracer: ``log_mass`` (log10 Msun), the kSZ ``dt_ksz_uk`` and the 150 GHz tSZ ``tsz_uk``, both
    aperture temperatures in uK; ``tau_at_pivot`` is the optical depth of a 10^14.5 Msun tracer."""

    log_mass: np.ndarray
    dt_ksz_uk: np.ndarray
    tsz_uk: np.ndarray
    tau: np.ndarray
    tau_at_pivot: float


def _sz_amplitudes(tracers: _Tracers, spec: _MockSpec, rng) -> _Amplitudes:
    """A mass proxy with dN/dlog10 M ~ M^-1.5 between 10^14 and 10^15 Msun; tau ~ M^alpha (alpha =
    ``tau_mass_slope``, default 2/3) with mean ``tau_mean``, dT_kSZ = -tau T_CMB v_r / c; the tSZ f(150 GHz) A (M / 10^14.5)^(5/3) ((1 + z) / 1.35)^2, or
    f(150 GHz) T_CMB y with y = tau k_B T_e / (m_e c^2) when ``spec.electron_temperature_kev`` is set."""
    uu = rng.uniform(size=tracers.z.size)
    lo_m, hi_m = 10.0 ** (-1.5 * 14.0), 10.0 ** (-1.5 * 15.0)
    log_mass = np.log10(lo_m + uu * (hi_m - lo_m)) / -1.5
    tau = 10.0 ** (spec.tau_mass_slope * (log_mass - _LOG_MASS_PIVOT))
    tau_at_pivot = spec.tau_mean / tau.mean()
    tau *= tau_at_pivot
    dt_ksz = -tau * T_CMB_UK * tracers.v_r / C_KM_S
    tsz = (_TSZ_F150 * spec.tsz_amplitude_uk * 10.0 ** (5.0 / 3.0 * (log_mass - 14.5))
           * ((1 + tracers.z) / 1.35) ** 2)
    if spec.electron_temperature_kev is not None:
        tsz = _TSZ_F150 * T_CMB_UK * tau * spec.electron_temperature_kev / ELECTRON_REST_ENERGY_KEV
    return _Amplitudes(log_mass, dt_ksz, tsz, tau, float(tau_at_pivot))


def _cmb_on_footprint(spec: _MockSpec, foot, rng, say) -> np.ndarray:
    """The beam-smoothed primary CMB (uK) at the footprint pixels ``foot``; zeros without ``include_cmb``."""
    import healpy as hp

    values = np.zeros(foot.size)
    if spec.include_cmb:
        ell, cl = load_cmb_cl()
        lmax = min(3 * spec.nside - 1, int(ell[-1]))
        alm = _gaussian_alm(cl[: lmax + 1], lmax, rng)
        hp.almxfl(alm, hp.gauss_beam(math.radians(spec.beam_fwhm_arcmin / 60.0), lmax=lmax), inplace=True)
        if spec.pixels == "car":
            say(f"mock: primary CMB on {spec.car_arcmin:g}-arcmin CAR pixels, lmax {lmax}")
            return values + car_cmb(spec, alm, lmax)
        say(f"mock: primary CMB at nside {spec.nside}, lmax {lmax}")
        values += hp.alm2map(alm, spec.nside, lmax=lmax)[foot]
    return values


def _painted_sources(spec: _MockSpec, tracers: _Tracers, amplitudes: _Amplitudes):
    """(pixels, values) of the kSZ and of the 150 GHz tSZ painted as beam-shaped sources whose solid-angle
    integral is the aperture temperature times pi theta_ap^2."""
    area = math.pi * (spec.aperture_radius_arcmin * ARCMIN_RAD) ** 2
    return tuple(painter(spec)(tracers.ra, tracers.dec, amp * area, spec.beam_fwhm_arcmin)
                 for amp in (amplitudes.dt_ksz_uk, amplitudes.tsz_uk))


def painter(spec: _MockSpec):
    """paint(ra, dec, integral_uk_sr, fwhm_arcmin) -> (pixels, values) on the mock's pixelisation."""
    if spec.pixels == "car":
        return functools.partial(car_painted, spec)
    return functools.partial(paint_beam_sources, spec.nside)


def _sky_maps(spec: _MockSpec, foot, cmb, ksz, tsz, rng) -> dict:
    """{frequency in GHz: values at ``foot``} for 150 GHz, then each extra frequency, in that drawing order
    (so the extra maps leave the 150 GHz one unchanged): CMB + kSZ + tSZ(nu) + white noise."""
    from ..model.sz import tsz_spectrum

    depth = 1.0 if spec.pixels == "car" else noise_scale(spec.nside, foot, spec.ra_min, spec.ra_max, spec.depth_ratio)
    maps = {150.0: _frequency_map(foot, cmb, ksz, tsz, 1.0, spec.noise_uk_arcmin, spec, rng, depth)}
    for nu, noise_nu in spec.extra_noise.items():
        scale = float(tsz_spectrum(nu)) / _TSZ_F150  # the 150 GHz tSZ is _TSZ_F150 times the amplitude
        maps[nu] = _frequency_map(foot, cmb, ksz, tsz, scale, noise_nu, spec, rng, depth)
    return maps


def _frequency_map(foot, cmb_values, ksz, tsz, tsz_scale, noise_uk_arcmin, spec, rng, depth=1.0):
    """CMB + kSZ + ``tsz_scale`` times the 150 GHz tSZ + white noise (rms times ``depth``), on the footprint pixels."""
    values = cmb_values.copy()
    for (pix, val), factor in ((ksz, 1.0), (tsz, tsz_scale)):
        _add_to_footprint(values, foot, pix, factor * val)
    if spec.pixels == "car":
        return values + car_white_noise(spec, noise_uk_arcmin, rng)
    return values + _white_noise(noise_uk_arcmin, spec.nside, foot.size, rng) * depth


@dataclass(frozen=True, eq=False)
class _PairwiseTruth:
    """Pairwise velocity curves (km/s) over the separation bins ``edges_mpc`` (see :class:`MockTruth`):
    ``v12_los`` after the redshift-trend removal, ``v12_los_no_trend`` without it."""

    edges_mpc: np.ndarray
    v12_3d: np.ndarray
    v12_los: np.ndarray
    v12_los_no_trend: np.ndarray
    v12_linear: np.ndarray
    z_eff: float


def _pairwise_truth(tracers: _Tracers, spec: _MockSpec) -> _PairwiseTruth:
    """Realised pairwise velocities of the tracers, and linear theory at their pair-weighted redshift.

    What the measurement sees is the Ferreira estimator on the true line-of-sight velocities after the
    same redshift-trend removal the pipeline applies to temperatures (default sigma_z), which also
    removes the radial flow of any large-scale mode of the volume.
    """
    from ..maps.trend import remove_redshift_trend
    from ..model.theory import binned_pairwise_velocity
    from ..pairs.estimator import mean_pairwise_velocity_3d, pairwise_momentum

    edges, pos, z, v_r = _DEFAULT_EDGES, tracers.pos, tracers.z, tracers.v_r
    v3d, _ = mean_pairwise_velocity_3d(pos, tracers.vel, edges)
    los_raw = pairwise_momentum(pos, -v_r, edges)
    los = pairwise_momentum(pos, -remove_redshift_trend(v_r, z, sigma_z=_TREND_SIGMA_Z), edges, redshifts=z)
    z_eff = float(np.nansum(los.z_eff * los.denominator) / los.denominator.sum())
    v_lin = binned_pairwise_velocity(edges, z_eff, spec.bias, cosmo=spec.cosmo)
    return _PairwiseTruth(edges, v3d, los.p, los_raw.p, v_lin, z_eff)


def _aperture_response(spec: _MockSpec, tracers: _Tracers, ksz, dt_ksz_uk) -> float:
    """Slope of the compensated-aperture temperatures against ``dt_ksz_uk`` on the noiseless map of the
    painted kSZ sources ``ksz`` (pixels, values); nan, with a warning, when it cannot be measured."""
    from ..maps.healpix import HealpixMap
    from ..maps.photometry import measure_apertures

    pix, val = ksz
    if spec.pixels == "car":
        ksz_only = car_footprint(spec).with_values(np.bincount(pix, val, minlength=car_footprint(spec).n_held))
    else:
        ksz_only = HealpixMap(spec.nside, False, pix, val, np.ones(pix.size, np.float32))
    resp = measure_apertures(ksz_only, tracers.ra, tracers.dec, spec.aperture_radius_arcmin,
                             max_masked_fraction=1.0).temperatures[0]
    ok = np.isfinite(resp)
    norm = float(np.sum(dt_ksz_uk[ok] ** 2))
    response = float(np.sum(resp[ok] * dt_ksz_uk[ok]) / norm) if norm > 0 else math.nan
    if not math.isfinite(response):  # stacklevel 3: the line that called make_mock_survey
        warnings.warn(f"mock aperture response could not be measured ({int(ok.sum())} usable apertures, "
                      f"tau_mean = {spec.tau_mean}); truth.json records it as null", PairvelWarning, stacklevel=3)
    return response


def _map_file(nu, pixels="healpix") -> tuple:
    """(key in the truth's ``files``, file name) of the map at ``nu`` GHz."""
    if pixels == "car":
        return ("map", car_map_file(nu)) if nu == 150 else (f"map_{nu:g}ghz", car_map_file(nu))
    return ("map", MAP_FILE) if nu == 150 else (f"map_{nu:g}ghz", extra_map_file(nu))


def _survey_files(maps: dict, pixels="healpix", *, with_ivar=False) -> dict:
    """The truth's ``files`` entry: the catalogue and one map per frequency of ``maps`` (and its
    inverse-variance map, key ``ivar`` or ``ivar_<nu>ghz``, ``with_ivar``)."""
    named = [_map_file(nu, pixels) for nu in maps]
    files = {"catalogue": CATALOGUE_FILE, **dict(named)}
    if with_ivar:
        files.update({key.replace("map", "ivar", 1): ivar_file(name) for key, name in named})
    return files


def _depth_for(pixels, depth_ratio) -> float:
    """The checked depth ratio; striped depth is painted on HEALPix skies only."""
    ratio = check_depth_ratio(depth_ratio)
    if pixels == "car" and ratio != 1.0:
        raise InputError("pairvel mock: --depth-ratio is available for HEALPix skies only; drop it or --pixels car")
    return ratio


def _write_survey(folder: Path, spec: _MockSpec, tracers: _Tracers, log_mass, foot, maps: dict) -> None:
    """Write the catalogue and one partial map per frequency into ``folder``."""
    from astropy.table import Table

    from ..maps.healpix_io import write_partial_map

    table = Table({"ra": tracers.ra, "dec": tracers.dec, "z": tracers.z, "log_mass": log_mass})
    table["ra"].unit = table["dec"].unit = "deg"
    table.meta.update({"SURVEY": SURVEY_NAME, "COMMENT": "synthetic catalogue made by pairvel mock"})
    table.write(folder / CATALOGUE_FILE)
    for nu, values in maps.items():
        if spec.pixels == "car":
            write_car_map(folder / car_map_file(nu), spec, values, header={
                "TELESCOP": TELESCOPE_NAME, "FREQ": (f"{nu:g} GHz", "observing frequency"),
                "BEAMFWHM": (spec.beam_fwhm_arcmin, "arcmin")})
            continue
        write_partial_map(folder / _map_file(nu)[1], foot, values.astype(np.float32), nside=spec.nside, nest=False,
                          unit="uK_CMB", extra_header={"TELESCOP": TELESCOPE_NAME,
                                                       "FREQ": (f"{nu:g} GHz", "observing frequency"),
                                                       "BEAMFWHM": (spec.beam_fwhm_arcmin, "arcmin")})
        if spec.depth_ratio != 1.0:
            noise = spec.noise_uk_arcmin if nu == 150 else spec.extra_noise[nu]
            write_ivar_map(folder / ivar_file(_map_file(nu)[1]), foot, noise,
                           noise_scale(spec.nside, foot, spec.ra_min, spec.ra_max, spec.depth_ratio), spec.nside)


def _check_electron_temperature(te_kev) -> None:
    if te_kev is not None and not (isinstance(te_kev, (int, float)) and not isinstance(te_kev, bool)
                                   and math.isfinite(te_kev) and 0 < te_kev <= 100):
        raise InputError(f"mock option 'electron_temperature_kev' must be a number in (0, 100] keV; got {te_kev!r}",
                         key="electron_temperature_kev")


def _write_tracer_truth(folder: Path, tracers: _Tracers, amplitudes: _Amplitudes) -> None:
    """Per-tracer truth in catalogue row order: optical depth, Compton y, velocity, kSZ temperature."""
    from astropy.table import Table

    table = Table({"tau": amplitudes.tau, "y": amplitudes.tsz_uk / (_TSZ_F150 * T_CMB_UK),
                   "v_r_km_s": tracers.v_r, "dt_ksz_uk": amplitudes.dt_ksz_uk})
    table["v_r_km_s"].unit = "km/s"
    table["dt_ksz_uk"].unit = "uK"
    table.meta["COMMENT"] = ["synthetic per-tracer truth made by pairvel mock; rows as in the catalogue",
                             "tau and y are aperture values (before the beam's spill beyond the disc)"]
    table.write(folder / TRACER_TRUTH_FILE)


def _options_record(spec: _MockSpec) -> dict:
    """Every option of the call, JSON-ready: the cosmology as a dict, the extra maps by frequency."""
    options = asdict(spec)
    extra_noise = options.pop("extra_noise")
    if options["electron_temperature_kev"] is None:  # the record of a mock without it stays as it was
        options.pop("electron_temperature_kev")
    if options["depth_ratio"] == 1.0:  # likewise
        options.pop("depth_ratio")
    options["cosmology"] = options.pop("cosmo")
    if options.get("partner") is None:
        options.pop("partner")
    if options["pixels"] == "healpix":  # the record of a HEALPix mock stays as it was
        options.pop("pixels")
        options.pop("car_arcmin")
    if extra_noise:
        options["extra_frequencies_ghz"] = {f"{nu:g}": noise_nu for nu, noise_nu in extra_noise.items()}
    return _plain(options)


def _truth_record(truth: MockTruth, spec: _MockSpec, curves: _PairwiseTruth) -> dict:
    """truth.json's content: ``truth`` with the scenario, the definitions and the curves' ratio."""
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = curves.v12_los / curves.v12_linear
    record = asdict(truth)
    record.update({
        "scenario": {"survey": SURVEY_NAME, "telescope": TELESCOPE_NAME, "frequency_ghz": 150,
                     "note": "invented names; every number here was generated by pairvel mock"},
        "tau_definition": f"mean aperture optical depth: each tracer's kSZ is a beam-shaped source whose solid-angle "
                          f"integral is dT pi theta_ap^2 with theta_ap = {spec.aperture_radius_arcmin} arcmin",
        "realised_over_linear": ratio.tolist(),
        "v12_los_realised_no_trend_removal_km_s": curves.v12_los_no_trend.tolist(),
        "velocity_note": "v12_los_realised is the Ferreira estimator applied to the tracers' true line-of-sight "
                         f"velocities after the pipeline's redshift-trend removal (sigma_z = {_TREND_SIGMA_Z}), "
                         "i.e. what the kSZ measurement sees; v12_los_realised_no_trend_removal skips that removal; "
                         "v12_3d_realised is <(v_i - v_j).rhat_ij> over pairs",
        "redshift_note": "cosmological redshifts only (no redshift-space distortion); comoving positions recomputed "
                         "from (ra, dec, z) with the recorded cosmology are the true ones (position_roundtrip_mpc)",
    })
    return _plain(record)
