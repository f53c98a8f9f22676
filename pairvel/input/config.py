"""Run configuration: one TOML file validated into frozen, typed dataclasses.

Every key is declared once, here, with its type, default and a one-line description (the field
``metadata["doc"]``); configs/README.md lists them and a test keeps the two in step.  Unknown keys
and wrong types are errors naming the file and the dotted key.  Relative paths resolve against
the folder of the config file.  The file is read as data (:mod:`tomllib`); nothing in it runs.
"""

from __future__ import annotations

__all__ = [
    "RunConfig",
    "CatalogueConfig",
    "MapConfig",
    "ApertureConfig",
    "TrendConfig",
    "BinsConfig",
    "CovarianceConfig",
    "TheoryConfig",
    "NullConfig",
    "ComputeConfig",
    "BlindingConfig",
    "Config",
    "load_config",
    "config_from_dict",
    "iter_config_keys",
    "MultifrequencyConfig",
    "PrefilterConfig",
    "RestartConfig",
    "PartnerConfig",
    "SingleClusterConfig",
    "SourceMaskConfig",
    "OutlierConfig",
    "NoiseConfig",
    "is_folder_name",
]

import dataclasses
import difflib
import math
import tomllib
import types
import typing
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.errors import ConfigError
from ..model.cosmology import Cosmology
from ..model.sz import tsz_spectrum

#: likelihoods of the amplitude fit (theory.likelihood; implemented in stats.fit)
LIKELIHOODS = ("hartlap", "sellentin-heavens", "hartlap-percival", "variance-weighted")


def _key(default, doc, **extra):
    """A config field with a default and its documentation line.

    ``extra`` may hold ``bounds=(lo, hi)`` (inclusive, checked for a number and for every item of a
    list), ``choices=(...)``, ``increasing=True`` (a list of edges: strictly increasing) and
    ``may_be_empty=True`` (an empty list is accepted; the doc says what it means).  Lists are
    otherwise non-empty, and their items finite.
    """
    return field(default=default, metadata={"doc": doc, **extra})


def is_folder_name(name) -> bool:
    """Whether ``name`` can be ``run.name``, the default output folder's name: a non-empty string,
    not ``.`` or ``..``, without ``/``, ``\\`` or NUL (so the folder is a new one in the working folder)."""
    return isinstance(name, str) and name not in ("", ".", "..") and not any(c in name for c in "/\\\0")


@dataclass(frozen=True)
class RunConfig:
    name: str = _key("pairvel-run", "label written into every output, and the default output folder ./<name>: "
                                    "a plain folder name (not '.' or '..', no '/', '\\' or NUL)")
    seed: int = _key(20261202, "seed of every random step (regions, null positions); recorded in outputs",
                     bounds=(0, 2**63 - 1))
    truth_path: Path | None = _key(None, "truth.json of a synthetic survey (as `pairvel mock` writes it): compare the "
                                         "fitted tau_mean with the injected one and report the verdict (not with "
                                         "blinding)")


@dataclass(frozen=True)
class CatalogueConfig:
    path: Path | None = _key(None, "tracer catalogue: FITS, ECSV, CSV or Parquet table (required)")
    format: str = _key("auto", "auto (from the file suffix), fits, ecsv, csv or parquet",
                       choices=("auto", "fits", "ecsv", "csv", "parquet"))
    ra_column: str = _key("ra", "column with right ascension: degrees, or converted to degrees from the angle unit the "
                                "file gives it (FITS TUNITn, ECSV or astropy-written Parquet: rad, arcmin, arcsec, "
                                "hourangle); a column without a unit is degrees")
    dec_column: str = _key("dec", "column with declination: degrees, or converted from its angle unit as ra_column")
    z_column: str = _key("z", "column with spectroscopic redshift")
    proxy_column: str | None = _key(None, "optional column with a mass or luminosity proxy (used by proxy cuts)")
    weight_column: str | None = _key(None, "optional column of per-tracer weights w >= 0; pairs are weighted by "
                                           "w_i w_j in the estimator")
    z_min: float = _key(0.0, "keep tracers with z >= z_min")
    z_max: float = _key(math.inf, "keep tracers with z < z_max")
    proxy_min: float = _key(-math.inf, "keep tracers with proxy >= proxy_min (needs proxy_column)")
    proxy_max: float = _key(math.inf, "keep tracers with proxy < proxy_max (needs proxy_column)")
    drop_invalid_rows: bool = _key(False, "drop rows with NaN or out-of-range ra/dec/z (counted) instead of stopping")
    duplicate_rows: str = _key("error", "rows (after the cuts) whose ra, dec and z equal another row's exactly: error "
                                        "(stop, naming them), warn (keep them, with a warning) or drop (keep one of "
                                        "each group, the lowest proxy then weight, and count the rest)",
                               choices=("error", "warn", "drop"))


@dataclass(frozen=True)
class MapConfig:
    path: Path | None = _key(None, "temperature map, FITS: HEALPix (full or partial sky) or an image with a "
                                       "cylindrical WCS (CAR, CEA, MER; required)")
    field: int = _key(0, "which map column (0-based) to read; for an image cube, the Stokes parameter (0 = I) on a "
                          "STOKES axis, else the plane")
    unit: str | None = _key(None, "map unit when the header has none: K_CMB, mK_CMB, uK_CMB; K_RJ, mK_RJ, uK_RJ "
                                  "(Rayleigh-Jeans); or a surface brightness such as MJy/sr or Jy/sr (these two "
                                  "need the frequency or a bandpass)")
    frequency_ghz: float | None = _key(None, "frequency of map.path in GHz, for Rayleigh-Jeans and surface-brightness "
                                             "units (wins over a FREQ or RESTFRQ header card; with "
                                             "[multifrequency], multifrequency.frequencies_ghz is used instead)",
                                       bounds=(1.0, 3000.0))
    bandpass_path: Path | None = _key(None, "bandpass of map.path (text: nu [GHz] and transmission per row; or ECSV): "
                                            "converts Rayleigh-Jeans and surface-brightness units band-weighted "
                                            "instead of at one frequency (README, 'Map units')")
    ordering: str | None = _key(None, "RING or NESTED when the header has no ORDERING",
                                choices=(None, "RING", "NESTED"))
    coordsys: str | None = _key(None, "frame of the map when the header has no COORDSYS: C (equatorial), G (Galactic) "
                                      "or E (ecliptic); tracer positions are rotated into it",
                                choices=(None, "C", "G", "E"))
    mask_path: Path | None = _key(None, "optional mask (1 = use, 0 = masked) on the map's pixel grid (HEALPix nside, "
                                            "or the image's WCS grid)")
    remove_dipole: bool = _key(False, "fit and subtract a monopole and dipole over the usable (unmasked) pixels before "
                                      "photometry")
    max_masked_fraction: float = _key(0.1, "drop tracers whose disc or annulus is more than this fraction masked",
                                      bounds=(0.0, 1.0))
    # Plausible CMB temperature maps have a pixel rms of 1 uK (filtered) to 3e4 uK (noisy pixels,
    # foregrounds); a factor 10^3 beyond either end is a unit label wrong by 10^6 (maps.skymap).
    rms_unit_check: bool = _key(True, "stop when a map's pixel rms (uK after the unit conversion, over its pixels "
                                      "with data) is below 1e-3 or above 3e7 uK, a factor 10^3 beyond the 1 uK-30 mK "
                                      "of any plausible CMB temperature map: a unit label wrong by 10^6 (K vs uK); "
                                      "applies to every map read; false: only warn")


@dataclass(frozen=True)
class NoiseConfig:
    path: Path | None = _key(None, "optional inverse-variance (1/uK_CMB^2 per pixel) or hit-count map on the temperature "
                                   "map's grid and frame, read unit-free: gives each tracer's aperture noise (tracers.fits "
                                   "column noise_uK)")
    kind: str = _key("ivar", "what noise.path holds: ivar (inverse variance per pixel, 1/uK^2) or hits (hit counts; "
                             "pixel variance hit_rms_uk^2 / hits)", choices=("ivar", "hits"))
    field: int = _key(0, "which column (0-based) of noise.path to read", bounds=(0, 1000))
    hit_rms_uk: float | None = _key(None, "noise rms of a pixel with one hit, uK (required with kind = hits)",
                                    bounds=(1e-9, 1e9))
    tracer_weighting: bool = _key(False, "weight each tracer by 1 / (aperture noise variance + sky variance), times any "
                                         "catalogue.weight_column; the pair-averaged template, the nulls and every "
                                         "covariance use the same weights (the redshift-trend removal stays unweighted)")
    sky_variance_uk2: float | None = _key(None, "aperture variance of the CMB and other sky signal common to all "
                                                "tracers, uK^2 (unset: the variance of the aperture temperatures less "
                                                "their mean noise variance, at least 5% of the former)",
                                          bounds=(0.0, 1e12))
    in_simulations: bool = _key(False, "with covariance.estimator = simulations: add white noise drawn from the noise "
                                       "map's per-pixel variance to every simulated sky (on top of "
                                       "covariance.sim_white_noise_uk_arcmin)")


@dataclass(frozen=True)
class ApertureConfig:
    radius_arcmin: float = _key(2.1, "compensated aperture: disc radius theta, annulus theta..sqrt(2) theta",
                                bounds=(0.05, 60.0))
    radii_arcmin: tuple[float, ...] | None = _key(None, "more disc radii measured in the same run (e.g. [1.0, 1.5, 2.0, "
                                                        "2.5, 3.0, 3.5]); tau_mean is fitted per radius, the main "
                                                        "result stays radius_arcmin; a tracer is kept only when usable at "
                                                        "every radius", bounds=(0.05, 60.0))
    radius_kpc: float | None = _key(None, "fixed physical disc radius in kpc, shrinking with each tracer's redshift; "
                                          "radius_arcmin and radii_arcmin then only set the ratios of the radii",
                                    bounds=(1.0, 1e5))
    radius_kpc_kind: str = _key("proper", "radius_kpc is proper or comoving", choices=("proper", "comoving"))
    pixel_weighting: str = _key("centre", "how pixels count in disc and annulus: centre (whole pixels by their centre), "
                                "fraction (linear ramp one pixel wide across each edge) or subsample (sub-pixel centres)",
                                choices=("centre", "fraction", "subsample"))
    method: str = _key("auto", "photometry path: kernel (compiled, no Python loop over tracers), direct (one disc "
                       "query per tracer) or auto (kernel unless subsample)", choices=("auto", "kernel", "direct"))
    beam_fwhm_arcmin: float | None = _key(None, "Gaussian beam FWHM of the map, arcmin; only states what tau_mean "
                                                "means for point-like tracers (the fraction of a beam-convolved point "
                                                "source the aperture keeps) in the outputs; unset: "
                                                "prefilter.beam_fwhm_arcmin when set, else not stated",
                                          bounds=(0.0, 600.0))


@dataclass(frozen=True)
class TrendConfig:
    enabled: bool = _key(True, "subtract the Gaussian-kernel redshift trend of the aperture temperatures")
    sigma_z: float = _key(0.01, "width of the redshift kernel", bounds=(1e-5, 1.0))


@dataclass(frozen=True)
class BinsConfig:
    r_min_mpc: float = _key(0.0, "lowest comoving separation, Mpc", bounds=(0.0, 1e4))
    r_max_mpc: float = _key(300.0, "highest comoving separation, Mpc", bounds=(0.0, 1e4))
    width_mpc: float = _key(20.0, "bin width, Mpc", bounds=(1e-3, 1e4))
    edges_mpc: tuple[float, ...] | None = _key(None, "explicit bin edges in Mpc, at least two, finite and strictly "
                                                     "increasing (overrides the three above)",
                                               bounds=(0.0, 1e4), increasing=True)

    def edges(self) -> np.ndarray:
        """The separation bin edges in Mpc, (nbins + 1,)."""
        if self.edges_mpc is not None:
            return np.asarray(self.edges_mpc, dtype=float)
        n = int(round((self.r_max_mpc - self.r_min_mpc) / self.width_mpc))
        return self.r_min_mpc + self.width_mpc * np.arange(n + 1)


@dataclass(frozen=True)
class CovarianceConfig:
    regions: str = _key("kmeans", "how the sky is cut into jackknife regions: kmeans or healpix",
                        choices=("kmeans", "healpix"))
    n_regions: int = _key(50, "number of k-means sky regions for the delete-one jackknife", bounds=(2, 100000))
    healpix_nside: int = _key(8, "HEALPix nside of the pixel regions when regions = healpix", bounds=(1, 8192))
    min_region_tracers: int = _key(20, "pixel regions with fewer tracers merge into the nearest pixel region",
                                   bounds=(1, 10**9))
    estimator: str = _key("jackknife", "covariance of the data curve: jackknife (delete one region), bootstrap "
                                       "(regions drawn with replacement) or simulations (Gaussian sky maps)",
                          choices=("jackknife", "bootstrap", "simulations"))
    jackknife_retrend: bool = _key(True, "re-estimate the redshift trend without region k for jackknife sample k "
                                         "(the whole chain deleted-one; false: trend from all tracers, which "
                                         "inflates large-separation errors)")
    jackknife_deletes: str = _key("pairs", "what jackknife sample k leaves out: pairs (every pair touching region "
                                           "k: per-bin errors 1.0-1.5x the mock scatter, chi2 about 0.6 of its dof, "
                                           "tau_mean's error calibrated) or tracers (region k's tracers, their "
                                           "partners keep their terms: per-bin errors and chi2 calibrated; tau "
                                           "calibrated at the validate defaults with likelihood = variance-weighted)",
                                  choices=("tracers", "pairs"))
    extra_region_seeds: int = _key(0, "with k-means regions: assign the regions again with this many other seeds "
                                      "(derived from run.seed), refit tau_mean with each one's jackknife covariance "
                                      "and report the spread of tau_mean against its quoted error (0: off)",
                                   bounds=(0, 1000))
    calibration_dir: Path | None = _key(None, "optional folder written by `pairvel validate`: the report shows its "
                                              "per-bin jackknife error over the scatter of p(r) across its mocks")
    n_bootstrap: int = _key(1000, "bootstrap replicates when estimator = bootstrap", bounds=(2, 10**7))
    n_sim: int = _key(100, "simulated maps when estimator = simulations", bounds=(2, 10**6))
    sim_cmb: bool = _key(True, "simulated maps include the CMB from the shipped lensed TT C_l table")
    sim_beam_fwhm_arcmin: float = _key(0.0, "Gaussian beam FWHM of the simulated CMB, arcmin (0: none)",
                                       bounds=(0.0, 600.0))
    sim_white_noise_uk_arcmin: float = _key(0.0, "white noise of the simulated maps, uK arcmin", bounds=(0.0, 1e6))
    sim_noise_cl_path: Path | None = _key(None, "optional text table (ell, N_ell in uK^2) of map noise for the "
                                                "simulations, added after the beam")
    sim_signal_tau: float = _key(0.0, "optical depth of a kSZ signal carried by every simulated map: the tracers' "
                                      "radial velocities drawn afresh per map from a Gaussian linear velocity "
                                      "field (0: no kSZ)", bounds=(0.0, 1.0))
    sim_signal_tsz_uk: float = _key(0.0, "mean thermal-SZ aperture decrement of every tracer in the simulated "
                                         "maps, uK (0: none)", bounds=(0.0, 1e4))
    sim_signal_tsz_scatter_dex: float = _key(0.2, "log-normal scatter of the simulated thermal SZ from tracer to "
                                                  "tracer and map to map, dex", bounds=(0.0, 2.0))
    sim_signal_cell_mpc: float = _key(10.0, "cell of the velocity field of the simulated kSZ signal, comoving Mpc",
                                      bounds=(1.0, 200.0))


@dataclass(frozen=True)
class TheoryConfig:
    bias: float | None = _key(None, "linear bias b of the tracers in the pairwise-velocity template (required: "
                                    "tau_mean scales as 1/b, so no value is assumed)", bounds=(0.01, 20.0))
    wiggles: bool = _key(True, "Eisenstein & Hu transfer function with baryon wiggles (false: no-wiggle form)")
    fit_r_min_mpc: float = _key(0.0, "fit only bins whose centre is >= this separation, Mpc", bounds=(0.0, 1e4))
    fit_r_max_mpc: float = _key(math.inf, "fit only bins whose centre is < this separation, Mpc", bounds=(0.0, math.inf))
    power_table_path: Path | None = _key(None, "linear P(k) table to use instead of Eisenstein & Hu: two text columns "
                                               "k [1/Mpc], P [Mpc^3], or ECSV with columns k, pk")
    power_table_z: float = _key(0.0, "redshift of the P(k) table (scaled to other redshifts with D(z))", bounds=(0.0, 20.0))
    power_table_renormalise: bool = _key(False, "rescale the P(k) table to cosmology.sigma_8 (false: keep its amplitude)")
    growth_rate: str = _key("exact", "growth rate f(z): exact flat-LCDM value, or linder for Omega_m(z)^0.55",
                            choices=("exact", "linder"))
    redshift_weighting: str = _key("pair_distribution", "redshifts the template averages over: pair_distribution "
                                   "((dN/dz)^2 / (dV/dz) of the catalogue) or effective (one pair-weighted z_eff)",
                                   choices=("pair_distribution", "effective"))
    separation_weighting: str = _key("pair_counts", "weighting of r inside each bin: pair_counts (measured) or volume",
                                     choices=("pair_counts", "volume"))
    photoz_sigma: float = _key(0.0, "photometric-redshift error sigma_z0 of the tracers, error sigma_z0 (1 + z); "
                               "0 for spectroscopic redshifts", bounds=(0.0, 0.5))
    photoz_model: str = _key("convolution", "photo-z damping: convolution (line-of-sight smearing of the pair "
                             "separation) or exponential (1 - exp(-r^2 / 2 sigma_r^2))",
                             choices=("convolution", "exponential"))
    model_trend_loss: bool = _key(True, "with trend.enabled, multiply the template by the linear-theory fraction of "
                                        "the pairwise signal that survives the redshift-trend removal, computed on "
                                        "the run's own geometry (false: the plain template, biased low by the loss)")
    likelihood: str = _key("hartlap", "likelihood of the amplitude fit: hartlap (Gaussian, Hartlap-corrected precision), "
                           "sellentin-heavens (marginalised over the jackknife covariance) or hartlap-percival (Gaussian, error "
                           "widened by sqrt(m1) of Percival et al. 2014 for the covariance's own noise) or variance-weighted (bins weighted "
                           "by 1 / their variance, error sqrt(w^T C w) from the whole covariance: no noisy inverse in "
                           "tau_mean; chi2 values as hartlap)",
                           choices=LIKELIHOODS)
    proxy_bin_edges: tuple[float, ...] | None = _key(None, "also fit tau_mean in bins [lo, hi) of the proxy column "
                                                    "with these edges, at least two, finite and strictly increasing "
                                                    "(needs catalogue.proxy_column)", increasing=True)
    proxy_power_law: str | None = _key(None, "also fit tau = tau_0 (M/M_0)^alpha across the proxy bins with their joint "
                                             "covariance: log10 (M = 10^proxy) or linear (M = proxy); needs "
                                             "proxy_bin_edges with at least 3 bins", choices=(None, "log10", "linear"))
    fit_velocity_scale: bool = _key(False, "also fit tau_mean and the velocity amplitude f sigma_8 jointly "
                                           "(degenerate; see tau_prior_mean)")
    tau_prior_mean: float | None = _key(None, "mean of a Gaussian prior on tau_mean for the joint fit")
    tau_prior_sigma: float | None = _key(None, "width of that prior (set both or neither)", bounds=(1e-12, math.inf))
    # bias from a mass proxy (model/halobias.py) and templates beyond linear theory (model/nonlinear.py)
    bias_from_proxy: str | None = _key(None, "derive the bias from catalogue.proxy_column instead of theory.bias: "
                                             "mass (halo mass M_Delta in Msun) or luminosity (mass from the power law "
                                             "below), through the Tinker et al. 2010 bias averaged as pairs weight it",
                                       choices=(None, "mass", "luminosity"))
    proxy_is_log10: bool = _key(False, "the proxy column holds log10 of the mass or luminosity")
    halo_overdensity: float = _key(200.0, "Delta of the proxy's mass definition, relative to the mean matter "
                                          "density (200: M200m)", bounds=(200.0, 3200.0))
    luminosity_pivot: float | None = _key(None, "pivot L_p of M = M_p (L / L_p)^slope, in the proxy's units",
                                          bounds=(1e-300, math.inf))
    mass_at_luminosity_pivot_msun: float | None = _key(None, "M_p of that power law, Msun", bounds=(1e9, 1e17))
    mass_luminosity_slope: float | None = _key(None, "slope of that power law", bounds=(-10.0, 10.0))
    velocity_model: str = _key("linear", "v12 model of the template: linear, jsd99 (Juszkiewicz et al. 1999 "
                                         "closed form) or table (theory.v12_table_path)",
                               choices=("linear", "jsd99", "table"))
    v12_table_path: Path | None = _key(None, "v12(r[, z]) table for velocity_model = table: ECSV or FITS, columns r "
                                             "(length unit), v12 (velocity unit), optional z")
    fit_template_tolerance: float | None = _key(None, "fit only bins where the linear, jsd99 (and table) templates "
                                                      "agree within this fraction of the linear one, on top of "
                                                      "fit_r_min_mpc / fit_r_max_mpc", bounds=(1e-4, 10.0))


@dataclass(frozen=True)
class NullConfig:
    n_random: int = _key(100, "realisations of the null test with apertures at random unmasked sky positions",
                         bounds=(0, 10000))
    n_shuffle: int = _key(100, "realisations of the null test with temperatures shuffled among tracers",
                          bounds=(0, 10000))
    n_shuffle_z: int = _key(100, "realisations with temperatures shuffled within redshift slices", bounds=(0, 10000))
    z_slice_width: float = _key(0.02, "width of the redshift slices for the within-slice shuffle", bounds=(1e-4, 1.0))
    pte_threshold: float = _key(0.01, "a null test passes when the PTE of its mean curve lies between this and 1 "
                                      "minus this", bounds=(0.0, 0.5))
    rotation_deg: tuple[float, ...] = _key((), "longitude rotations of the map (degrees) for the rotated-map null "
                                               "(opt-in: empty, the default, runs none; a partial map turned off its "
                                               "footprint cannot run it)",
                                           bounds=(-360.0, 360.0), may_be_empty=True)
    rotation_min_usable: float = _key(0.5, "skip a rotation when fewer tracers than this fraction land on usable sky",
                                      bounds=(0.0, 1.0))


@dataclass(frozen=True)
class BlindingConfig:
    enabled: bool = _key(False, "multiply the curve, errors and amplitude by a hidden factor kept in a key file")
    key_path: Path | None = _key(None, "blinding key JSON (reused when it exists); default: "
                                       "<output folder>.blinding-key.json beside the output folder")


@dataclass(frozen=True)
class ComputeConfig:
    n_threads: int | None = _key(None, "threads for the pair engine (default: all cores)", bounds=(1, 4096))
    memory_budget_gb: float = _key(0.25, "memory for the temperature sets in flight (GB): null, jackknife and simulated "
                                         "sets are made and summed in chunks of about this size, so the run's peak "
                                         "memory does not grow with the number of sets (without a scheduler); with one, the "
                                         "most sets a set-making task holds",
                                   bounds=(1e-6, 10000.0))
    scheduler_address: str | None = _key(None, "Dask scheduler address (e.g. tcp://head-node:8786) to run the "
                                               "photometry, trend re-estimates, null and simulated sets and pair pass on; "
                                               "unset: run in this process")
    scheduler_file: Path | None = _key(None, "scheduler file written by `dask scheduler --scheduler-file` (instead "
                                             "of scheduler_address)")
    n_units: int | None = _key(None, "spatial work units of the pair pass on a scheduler; unset: 3 per worker, "
                                     "capped so that every slab is at least r_max thick", bounds=(1, 100000))
    worker_wait_s: float = _key(120.0, "seconds a run on a scheduler waits with no worker before it fails",
                                bounds=(1.0, 86400.0))


@dataclass(frozen=True)
class MultifrequencyConfig:
    map_paths: tuple[Path, ...] | None = _key(None, "several HEALPix maps (uK_CMB after reading) of one nside combined "
                                                    "pixel-wise into the temperature input, replacing map.path; "
                                                    "map.field/unit/ordering/coordsys apply to each, map.mask_path "
                                                    "to the combination")
    frequencies_ghz: tuple[float, ...] | None = _key(None, "observing frequency of each map, GHz (required with "
                                                          "map_paths)", bounds=(1.0, 3000.0))
    noise_uk_arcmin: tuple[float, ...] | None = _key(None, "white-noise level of each map, uK arcmin (noise_model "
                                                          "levels)", bounds=(1e-6, 1e6))
    bandpass_paths: tuple[Path, ...] | None = _key(None, "bandpass table of each map (as map.bandpass_path): converts "
                                                        "Rayleigh-Jeans and surface-brightness units band-weighted; the "
                                                        "tSZ factors stay at frequencies_ghz")
    beam_fwhm_arcmin: tuple[float, ...] | None = _key(None, "beam FWHM of each map, arcmin; unequal beams are refused "
                                                           "unless allow_beam_mismatch (unset: assumed equal)",
                                                      bounds=(0.0, 600.0))
    allow_beam_mismatch: bool = _key(False, "combine maps of different beam_fwhm_arcmin anyway, with a warning (no "
                                            "reconvolution)")
    combination: str = _key("tsz_free", "tsz_free (sum w = 1, sum w f_tSZ = 0, least noise), minimum_variance "
                                        "(sum w = 1, least noise) or weights (the list below)",
                            choices=("tsz_free", "minimum_variance", "weights"))
    weights: tuple[float, ...] | None = _key(None, "weight of each map when combination = weights; must sum to 1")
    per_channel: bool = _key(False, "also measure each map alone (same tracers, weights, regions, template and "
                                    "jackknife covariance) and fit its tau_mean, and test the difference of every "
                                    "two maps against zero as a null test (channels.ecsv, report)")
    noise_model: str = _key("auto", "noise covariance of the maps, diagonal: levels (from noise_uk_arcmin), "
                                    "pixel_differences (measured from pixel-minus-neighbour-mean differences, less "
                                    "the CMB and tSZ common to the maps) or auto (levels when noise_uk_arcmin is set)",
                            choices=("auto", "levels", "pixel_differences"))


@dataclass(frozen=True)
class PrefilterConfig:
    kind: str = _key("none", "harmonic-space filter of the map before the photometry: none, highpass (cosine "
                             "taper in ell), matched (B_l / (C_l B_l^2 + N_l)) or wiener (the map minus its Wiener "
                             "estimate of the primary CMB, N_l / (C_l B_l^2 + N_l))",
                     choices=("none", "highpass", "matched", "wiener"))
    highpass_ell: float = _key(300.0, "highpass: F_l = 1 from this multipole up", bounds=(2.0, 1e5))
    highpass_width: float = _key(100.0, "highpass: width of the cosine taper below highpass_ell (F_l = 0 below "
                                        "highpass_ell - highpass_width)", bounds=(0.0, 1e5))
    beam_fwhm_arcmin: float | None = _key(None, "Gaussian beam FWHM of the map, arcmin (or beam_path): required by "
                                                "matched/wiener, shapes the test sources of normalise = injected",
                                          bounds=(0.0, 600.0))
    beam_path: Path | None = _key(None, "beam table of the map, two text columns ell (from 0) and B_l")
    cl_path: Path | None = _key(None, "matched/wiener: CMB C_l table, two text columns ell and C_l in uK^2 before "
                                      "the beam (default: the lensed CMB spectrum pairvel ships)")
    noise_uk_arcmin: float | None = _key(None, "matched/wiener: white-noise level of the map, uK arcmin",
                                         bounds=(1e-6, 1e6))
    lmax: int | None = _key(None, "largest multipole of the filtering (default 3 nside - 1, at most 16384)",
                            bounds=(16, 16384))
    normalise: str = _key("injected", "divide the filtered map by the aperture response to a beam-shaped source: "
                                      "injected (measured on painted sources), aperture (analytic) or none",
                          choices=("injected", "aperture", "none"))


@dataclass(frozen=True)
class RestartConfig:
    table_path: Path | None = _key(None, "start from the tracers.fits of an earlier run instead of catalogue + map: its "
                                         "used rows and aperture temperatures (the trend removal is redone); "
                                         "[catalogue] then takes only cuts, proxy_column and weight_column, [map], "
                                         "[multifrequency] and [prefilter] stay unset, simulated skies are refused "
                                         "and the random-position and rotated-map nulls skipped")


@dataclass(frozen=True)
class PartnerConfig(CatalogueConfig):
    """A second catalogue paired against the first (only pairs with one member in each); the
    catalogue keys mean what they mean under [catalogue], for this file."""

    path: Path | None = _key(None, "second tracer catalogue (FITS, ECSV, CSV or Parquet) paired against [catalogue]: "
                                   "the cross curve uses only pairs with one member in each (unset: no cross curve)")
    radius_arcmin: float | None = _key(None, "compensated-aperture disc radius for these tracers, arcmin (unset: "
                                             "aperture.radius_arcmin); with aperture.radius_kpc, its ratio to "
                                             "aperture.radius_arcmin scales the physical radius", bounds=(0.05, 60.0))
    bias: float | None = _key(None, "linear bias of these tracers, needed with partner.path: the cross template uses "
                                    "(b_1 + b_2) / 2 and b_1 b_2 (README, 'Clusters against galaxies')",
                              bounds=(0.01, 20.0))


@dataclass(frozen=True)
class SingleClusterConfig:
    electron_temperature_kev: float = _key(5.0, "`pairvel velocities`: electron temperature k_B T_e (keV) that turns "
                                                "each cluster's Compton y into its optical depth, tau = y m_e c^2 / "
                                                "(k_B T_e); relativistic tSZ corrections only with relativistic = true",
                                           bounds=(0.01, 100.0))
    temperature_column: str | None = _key(None, "`pairvel velocities`: catalogue column of each cluster's k_B T_e in "
                                                "keV, used instead of electron_temperature_kev")
    min_tau_snr: float = _key(3.0, "`pairvel velocities`: flag clusters whose tau S/N is below this (their velocity "
                                   "error is first-order only and the velocity biased)", bounds=(0.0, 1e4))
    min_fit_pte: float = _key(0.01, "`pairvel velocities`: flag clusters whose channel residuals have a chi2 PTE "
                                    "below this (three maps or more; contamination likely)", bounds=(0.0, 1.0))
    min_proxy: float | None = _key(None, "`pairvel velocities`: flag clusters whose mass proxy "
                                         "(catalogue.proxy_column) is below this (low mass)")
    n_random: int = _key(3000, "`pairvel velocities`: random apertures per map for the channel covariance (noise "
                               "and primary CMB)", bounds=(100, 10_000_000))
    relativistic: bool = _key(False, "`pairvel velocities`: fit the tSZ with its first-order relativistic correction "
                                     "at each cluster's T_e (Challinor & Lasenby 1998); false: the non-relativistic "
                                     "spectrum")
    tau_response_scatter: float = _key(0.0, "`pairvel velocities`: fractional rms scatter of the aperture's "
                                            "response to a cluster's own signal, added in quadrature to each "
                                            "tau error as scatter x tau (the velocities do not carry it)",
                                       bounds=(0.0, 1.0))


@dataclass(frozen=True)
class SourceMaskConfig:
    path: Path | None = _key(None, "point-source list, FITS, ECSV, CSV or Parquet (equatorial positions, optional "
                                   "flux): a disc around each source is masked in the map, and tracers whose aperture "
                                   "(outer annulus radius at the largest radius) touches a disc are dropped and "
                                   "counted (unset: no sources masked)")
    format: str = _key("auto", "auto (from the file suffix), fits, ecsv, csv or parquet",
                       choices=("auto", "fits", "ecsv", "csv", "parquet"))
    ra_column: str = _key("ra", "column with the sources' right ascension (degrees, or converted from its angle unit)")
    dec_column: str = _key("dec", "column with the sources' declination (degrees, or converted from its angle unit)")
    flux_column: str | None = _key(None, "column of source flux densities (mJy, or converted from the column's unit); "
                                         "used with flux_pivot_mjy")
    radius_arcmin: float = _key(3.0, "radius of each masked disc, arcmin; with flux_pivot_mjy, that of sources up to "
                                     "the pivot flux", bounds=(0.05, 600.0))
    flux_pivot_mjy: float | None = _key(None, "with flux_column: radius = radius_arcmin * max(1, sqrt(flux / "
                                              "flux_pivot_mjy)), at most radius_max_arcmin", bounds=(1e-9, 1e12))
    radius_max_arcmin: float = _key(30.0, "largest disc radius the flux rule may give, arcmin", bounds=(0.05, 600.0))


@dataclass(frozen=True)
class OutlierConfig:
    clip_sigma: float | None = _key(None, "drop tracers whose aperture temperature, at any radius and before the "
                                          "redshift-trend removal, lies more than this many robust sigma (1.4826 x "
                                          "median absolute deviation) from the median; one pass, counted in the "
                                          "selection (unset: no clipping)", bounds=(1.0, 1e3))


#: Catalogue keys a run started from a tracer table still uses (cuts on the table's rows, and which
#: of its proxy and weight columns to use); the other catalogue keys describe a file it does not read.
RESTART_CATALOGUE_KEYS = ("proxy_column", "weight_column", "z_min", "z_max", "proxy_min", "proxy_max")


@dataclass(frozen=True)
class Config:
    """A whole run configuration; ``source`` is the file it came from (None when built in code)."""

    run: RunConfig = field(default_factory=RunConfig)
    catalogue: CatalogueConfig = field(default_factory=CatalogueConfig)
    map: MapConfig = field(default_factory=MapConfig)
    noise: NoiseConfig = field(default_factory=NoiseConfig)
    aperture: ApertureConfig = field(default_factory=ApertureConfig)
    trend: TrendConfig = field(default_factory=TrendConfig)
    bins: BinsConfig = field(default_factory=BinsConfig)
    covariance: CovarianceConfig = field(default_factory=CovarianceConfig)
    theory: TheoryConfig = field(default_factory=TheoryConfig)
    cosmology: Cosmology = field(default_factory=Cosmology)
    nulls: NullConfig = field(default_factory=NullConfig)
    compute: ComputeConfig = field(default_factory=ComputeConfig)
    blinding: BlindingConfig = field(default_factory=BlindingConfig)
    multifrequency: MultifrequencyConfig = field(default_factory=MultifrequencyConfig)
    prefilter: PrefilterConfig = field(default_factory=PrefilterConfig)
    restart: RestartConfig = field(default_factory=RestartConfig)
    partner: PartnerConfig = field(default_factory=PartnerConfig)
    single_cluster: SingleClusterConfig = field(default_factory=SingleClusterConfig)
    source_mask: SourceMaskConfig = field(default_factory=SourceMaskConfig)
    outliers: OutlierConfig = field(default_factory=OutlierConfig)
    source: Path | None = None

    def as_dict(self) -> dict:
        """Plain JSON-able dict of every setting (paths as strings, infinities as strings)."""

        def plain(v):
            if isinstance(v, Path):
                return str(v)
            if isinstance(v, float) and not math.isfinite(v):
                return str(v)
            if isinstance(v, tuple):
                return [plain(x) for x in v]
            return v

        out = {}
        for sec in dataclasses.fields(self):
            if sec.name == "source":
                continue
            obj = getattr(self, sec.name)
            out[sec.name] = {f.name: plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
        return out

    def named_paths(self) -> dict:
        """Every path the config names, by dotted key (``key[i]`` in a list), and the config file itself."""
        out = {} if self.source is None else {"the config file": self.source}
        for sec in dataclasses.fields(self):
            obj = getattr(self, sec.name)
            for f in dataclasses.fields(obj) if dataclasses.is_dataclass(obj) else ():
                value = getattr(obj, f.name)
                for i, v in enumerate(value if isinstance(value, tuple) else (value,)):
                    if isinstance(v, Path):
                        out[f"{sec.name}.{f.name}" + (f"[{i}]" if isinstance(value, tuple) else "")] = v
        return out


_COSMOLOGY_DOCS = {
    "h": "H0 / (100 km/s/Mpc)",
    "omega_m": "matter density parameter today (flat LCDM)",
    "omega_b": "baryon density parameter today",
    "n_s": "scalar spectral index of the primordial power spectrum",
    "sigma_8": "rms linear density contrast in 8 Mpc/h spheres at z = 0 (normalises P(k))",
    "t_cmb_k": "CMB temperature in K (sets the photon density of the radiation term)",
    "n_eff": "effective number of massless neutrino species in the radiation density",
    "radiation": "include radiation (photons at t_cmb_k, n_eff massless neutrinos) in the distances and H(z); "
                 "false: matter + Lambda only",
}

_SECTIONS = {f.name: f for f in dataclasses.fields(Config) if f.name != "source"}


def _section_type(name):
    return typing.get_type_hints(Config)[name]


def iter_config_keys():
    """Yield (dotted key, type text, default, doc) for every documented key, in declaration order."""
    for sec_name in _SECTIONS:
        cls = _section_type(sec_name)
        hints = typing.get_type_hints(cls)
        for f in dataclasses.fields(cls):
            doc = f.metadata.get("doc") or _COSMOLOGY_DOCS[f.name]
            typ = _type_text(hints[f.name])
            if typ.startswith("list"):  # say whether [] is accepted (its meaning is in the doc)
                typ = f"{typ} (may be empty)" if f.metadata.get("may_be_empty") else f"non-empty {typ}"
            yield f"{sec_name}.{f.name}", typ, f.default, doc


def _type_text(tp) -> str:
    args = typing.get_args(tp)
    if typing.get_origin(tp) in (typing.Union, types.UnionType):
        inner = [a for a in args if a is not type(None)]
        return _type_text(inner[0]) + " (optional)"
    if typing.get_origin(tp) is tuple:
        return f"list of {_type_text(args[0])}"
    return {Path: "path"}.get(tp, getattr(tp, "__name__", str(tp)))


def _coerce(value, tp, where: str, base_dir: Path):
    """Check ``value`` from TOML against annotation ``tp``; return the typed value."""
    origin = typing.get_origin(tp)
    if origin in (typing.Union, types.UnionType):
        inner = [a for a in typing.get_args(tp) if a is not type(None)][0]
        return _coerce(value, inner, where, base_dir)
    if origin is tuple:
        item = typing.get_args(tp)[0]
        if not isinstance(value, list):
            raise ConfigError(f"{where} must be a list of {_type_text(item)}s; got {value!r}")
        return tuple(_coerce(v, item, f"{where} item {k + 1} of {len(value)}", base_dir) for k, v in enumerate(value))
    if tp is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"{where} must be true or false; got {value!r}")
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"{where} must be an integer; got {value!r}")
        return value
    if tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ConfigError(f"{where} must be a number; got {value!r}")
        if math.isnan(value):
            raise ConfigError(f"{where} must be a number, not nan")
        return float(value)
    if tp is str:
        if not isinstance(value, str):
            raise ConfigError(f"{where} must be a string; got {value!r}")
        return value
    if tp is Path:
        if not isinstance(value, str) or not value:
            raise ConfigError(f"{where} must be a file path string; got {value!r}")
        p = Path(value).expanduser()
        return p if p.is_absolute() else (base_dir / p)
    raise TypeError(f"unsupported config type {tp!r}")  # a bug in the schema, not user input


def _build_section(cls, table, sec_name: str, where_file: str, base_dir: Path):
    if not isinstance(table, dict):
        raise ConfigError(f"config {where_file}: [{sec_name}] must be a table; got {table!r}", key=sec_name)
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    kwargs = {}
    for key, value in table.items():
        dotted = f"{sec_name}.{key}"
        if key not in fields:
            hint = difflib.get_close_matches(key, list(fields), n=1)
            extra = f" (did you mean '{sec_name}.{hint[0]}'?)" if hint else ""
            raise ConfigError(f"config {where_file}: unknown key '{dotted}'{extra}", path=where_file, key=dotted)
        where = f"config {where_file}: '{dotted}'"
        try:
            typed = _coerce(value, hints[key], where, base_dir)
        except ConfigError as err:
            raise ConfigError(str(err), path=where_file, key=dotted) from None
        problem = _value_problem(typed, fields[key])
        if problem:
            raise ConfigError(f"{where} {problem}", path=where_file, key=dotted)
        kwargs[key] = typed
    try:
        return cls(**kwargs)
    except ConfigError as err:  # Cosmology validates itself
        raise ConfigError(f"config {where_file}: {err}", path=where_file, key=err.key) from None


def _value_problem(typed, fld) -> str | None:
    """What is wrong with a typed value against its field's declaration (choices, bounds, list rules), or None.

    A number may be infinite only where the key's default is or its bounds reach infinity; list
    items are always finite.
    """
    meta = fld.metadata
    if "choices" in meta and typed not in meta["choices"]:
        return f"must be one of {', '.join(repr(c) for c in meta['choices'] if c is not None)}; got {typed!r}"
    declared = meta.get("bounds")
    lo, hi = declared or (-math.inf, math.inf)
    if isinstance(typed, float) and math.isinf(typed):
        if typed != fld.default and not (declared and math.isinf(declared[typed > 0])):
            return f"must be finite; got {typed!r}"
    if isinstance(typed, (int, float)) and not isinstance(typed, bool):
        return None if lo <= typed <= hi else f"must lie in [{lo}, {hi}]; got {typed!r}"
    if not isinstance(typed, tuple):
        return None
    if not typed and not meta.get("may_be_empty"):
        return "must be a non-empty list (leave the key out for none); got []"
    numbers = [v for v in typed if isinstance(v, float)]
    n = len(typed)
    for k, v in enumerate(numbers):
        if not math.isfinite(v):
            return f"must hold finite numbers; item {k + 1} of {n} is {v!r}"
        if not lo <= v <= hi:
            return f"must lie in [{lo}, {hi}]; item {k + 1} of {n} is {v!r}"
        if meta.get("increasing") and k and v <= numbers[k - 1]:
            return (f"must increase strictly; item {k + 1} of {n} ({v:g}) is not above item {k} "
                    f"({numbers[k - 1]:g})")
    return None


def config_from_dict(data: dict, *, source: Path | None = None, needs_bias: bool = True) -> Config:
    """Validate a parsed TOML mapping into a :class:`Config`.

    Parameters
    ----------
    data : dict
        The parsed TOML document.
    source : Path, optional
        The file it came from; relative paths resolve against its folder (else the working folder).
    needs_bias : bool, default True
        False for commands that fit no pairwise template (`pairvel velocities`): ``theory.bias`` may
        then be left out.
    """
    where_file = str(source) if source is not None else "<dict>"
    base_dir = source.parent.resolve() if source is not None else Path.cwd()
    sections = {}
    for sec_name, table in data.items():
        if sec_name not in _SECTIONS:
            hint = difflib.get_close_matches(sec_name, list(_SECTIONS), n=1)
            extra = f" (did you mean '[{hint[0]}]'?)" if hint else ""
            raise ConfigError(f"config {where_file}: unknown section '[{sec_name}]'{extra}", path=where_file, key=sec_name)
        sections[sec_name] = _build_section(_section_type(sec_name), table, sec_name, where_file, base_dir)
    cfg = Config(**sections, source=source)
    _check_consistency(cfg, where_file, needs_bias=needs_bias)
    return cfg


def _check_bias_and_velocity_model(cfg: Config, bad, needs_bias: bool = True) -> None:
    th = cfg.theory
    if needs_bias and th.bias_from_proxy is None and th.bias is None:
        bad("theory.bias", "is required: tau_mean scales as 1/b, so no value is assumed; give the linear bias of the "
                           "tracers under [theory], or derive it from masses with theory.bias_from_proxy")
    if th.bias_from_proxy is not None and th.bias is not None:
        bad("theory.bias", "and theory.bias_from_proxy are both set; keep one")
    if th.bias_from_proxy is not None and cfg.catalogue.proxy_column is None:
        bad("catalogue.proxy_column", "is required when theory.bias_from_proxy is set")
    power_law = (th.luminosity_pivot, th.mass_at_luminosity_pivot_msun, th.mass_luminosity_slope)
    if th.bias_from_proxy == "luminosity" and None in power_law:
        bad("theory.mass_luminosity_slope", "luminosity_pivot and mass_at_luminosity_pivot_msun are all required "
                                            "with theory.bias_from_proxy = 'luminosity'")
    if th.bias_from_proxy != "luminosity" and any(v is not None for v in power_law):
        bad("theory.luminosity_pivot", "and the mass-luminosity keys are used only with "
                                       "theory.bias_from_proxy = 'luminosity'")
    if (th.velocity_model == "table") != (th.v12_table_path is not None):
        bad("theory.v12_table_path", "is required with theory.velocity_model = 'table', and used only with it")
    if th.velocity_model == "table" and th.photoz_sigma > 0:
        bad("theory.photoz_sigma", "cannot damp a v12 table (its own r range); put the damping into the table")


def _check_consistency(cfg: Config, where_file: str, *, needs_bias: bool = True) -> None:
    def bad(key, msg):
        raise ConfigError(f"config {where_file}: '{key}' {msg}", path=where_file, key=key)

    if not is_folder_name(cfg.run.name):
        bad("run.name", f"must be a plain folder name (not empty, '.' or '..'; no '/', '\\' or NUL character); "
                        f"got {cfg.run.name!r}")
    if cfg.run.truth_path is not None and cfg.blinding.enabled:
        bad("run.truth_path", "cannot be used with blinding.enabled: comparing with a known truth reveals the "
                              "amplitude; remove one of them")
    if cfg.restart.table_path is not None:
        _check_restart(cfg, bad)
    elif cfg.catalogue.path is None:
        bad("catalogue.path", "is required (or restart.table_path)")
    elif cfg.map.path is None and not cfg.multifrequency.map_paths:
        bad("map.path", "is required (or multifrequency.map_paths)")
    _check_bias_and_velocity_model(cfg, bad, needs_bias)
    if not cfg.catalogue.z_min < cfg.catalogue.z_max:
        bad("catalogue.z_max", f"must exceed catalogue.z_min; got {cfg.catalogue.z_min} and {cfg.catalogue.z_max}")
    if not cfg.catalogue.proxy_min < cfg.catalogue.proxy_max:
        bad("catalogue.proxy_max", "must exceed catalogue.proxy_min")
    proxy_cut = math.isfinite(cfg.catalogue.proxy_min) or math.isfinite(cfg.catalogue.proxy_max)
    if proxy_cut and cfg.catalogue.proxy_column is None:
        bad("catalogue.proxy_column", "is required when proxy_min or proxy_max is set")
    b = cfg.bins
    if b.edges_mpc is not None:
        e = np.asarray(b.edges_mpc)
        if e.size < 2 or np.any(np.diff(e) <= 0) or e[0] < 0:
            bad("bins.edges_mpc", f"must be at least two increasing values >= 0; got {list(b.edges_mpc)}")
    else:
        n = (b.r_max_mpc - b.r_min_mpc) / b.width_mpc
        if n < 1 or abs(n - round(n)) > 1e-9:
            bad("bins.width_mpc", f"must divide r_max_mpc - r_min_mpc into a whole number (>= 1) of bins; "
                                  f"got {b.width_mpc} for {b.r_min_mpc}..{b.r_max_mpc}")
    if not cfg.theory.fit_r_min_mpc < cfg.theory.fit_r_max_mpc:
        bad("theory.fit_r_max_mpc", "must exceed theory.fit_r_min_mpc")
    th = cfg.theory
    if th.proxy_bin_edges is not None:
        pe = np.asarray(th.proxy_bin_edges)
        if pe.size < 2 or np.any(np.diff(pe) <= 0) or not np.all(np.isfinite(pe)):
            bad("theory.proxy_bin_edges", f"must be at least two finite, increasing values; got {list(pe)}")
        if cfg.catalogue.proxy_column is None:
            bad("catalogue.proxy_column", "is required when theory.proxy_bin_edges is set")
    if th.proxy_power_law is not None and (th.proxy_bin_edges is None or len(th.proxy_bin_edges) < 4):
        bad("theory.proxy_power_law", "needs theory.proxy_bin_edges with at least 4 edges (3 bins)")
    if (th.tau_prior_mean is None) != (th.tau_prior_sigma is None):
        bad("theory.tau_prior_sigma", "and theory.tau_prior_mean must be set together")
    if th.power_table_path is None and (th.power_table_renormalise or th.power_table_z != 0):
        bad("theory.power_table_path", "is required when power_table_z or power_table_renormalise is set")
    ap = cfg.aperture
    if ap.method == "kernel" and ap.pixel_weighting == "subsample":
        bad("aperture.method", "kernel supports pixel_weighting centre and fraction; use direct or auto for subsample")
    if ap.radii_arcmin is not None and len(set(ap.radii_arcmin)) != len(ap.radii_arcmin):
        bad("aperture.radii_arcmin", f"must not repeat a radius; got {list(ap.radii_arcmin)}")
    if th.tau_prior_mean is not None and not th.fit_velocity_scale:
        bad("theory.tau_prior_mean", "is used only by the joint fit; set theory.fit_velocity_scale = true")

    _check_multifrequency(cfg, bad)
    _check_noise(cfg, bad)
    _check_partner(cfg, bad)
    _check_source_mask(cfg, bad)
    pf = cfg.prefilter
    if pf.kind in ("matched", "wiener"):
        if pf.noise_uk_arcmin is None:
            bad("prefilter.noise_uk_arcmin", f"is required for kind = '{pf.kind}'")
        if pf.beam_fwhm_arcmin is None and pf.beam_path is None:
            bad("prefilter.beam_fwhm_arcmin", f"or prefilter.beam_path is required for kind = '{pf.kind}'")
    if None not in (ap.beam_fwhm_arcmin, pf.beam_fwhm_arcmin) and ap.beam_fwhm_arcmin != pf.beam_fwhm_arcmin:
        bad("aperture.beam_fwhm_arcmin", f"and prefilter.beam_fwhm_arcmin describe the same map beam; got "
                                         f"{ap.beam_fwhm_arcmin:g} and {pf.beam_fwhm_arcmin:g}")
    if pf.beam_fwhm_arcmin is not None and pf.beam_path is not None:
        bad("prefilter.beam_path", "and prefilter.beam_fwhm_arcmin are both set; keep one")
    if cfg.compute.scheduler_address and cfg.compute.scheduler_file is not None:
        bad("compute.scheduler_file", "and compute.scheduler_address are both set; keep one")
    if cfg.compute.scheduler_file is not None and not Path(cfg.compute.scheduler_file).is_file():
        bad("compute.scheduler_file", f"must be the file `dask scheduler --scheduler-file` wrote; "
                                      f"{cfg.compute.scheduler_file} does not exist (start the scheduler first)")
    if pf.kind == "highpass" and pf.highpass_width > pf.highpass_ell:
        bad("prefilter.highpass_width", f"must not exceed highpass_ell ({pf.highpass_ell:g})")


def _check_restart(cfg, bad) -> None:
    """A run started from a tracer table reads no catalogue file and no map: keys that only describe
    those must stay unset, and simulated skies cannot be made."""
    for sec_name in ("catalogue", "map", "multifrequency", "prefilter"):
        section = getattr(cfg, sec_name)
        for f in dataclasses.fields(section):
            if sec_name == "catalogue" and f.name in RESTART_CATALOGUE_KEYS:
                continue
            if getattr(section, f.name) != f.default:
                bad(f"{sec_name}.{f.name}", "is not used when restart.table_path is set (the tracers and their "
                                            "aperture temperatures come from the table); remove it")
    if cfg.covariance.estimator == "simulations":
        bad("covariance.estimator", "= 'simulations' needs the sky map, which a run from restart.table_path does not "
                                    "read; use jackknife or bootstrap")


def _refuse_keys_without_path(section, sec_name: str, what: str, bad) -> None:
    """``bad`` for the first key of ``section`` set away from its default while its ``path`` is unset."""
    for f in dataclasses.fields(section):
        if getattr(section, f.name) != f.default:
            bad(f"{sec_name}.{f.name}", f"is set but {sec_name}.path is not ({what})")


def _check_source_mask(cfg, bad) -> None:
    """Cross-key checks of ``[source_mask]`` and ``[outliers]``."""
    sm = cfg.source_mask
    if sm.path is None:
        _refuse_keys_without_path(sm, "source_mask", "the point-source list", bad)
    if (sm.flux_column is None) != (sm.flux_pivot_mjy is None):
        bad("source_mask.flux_pivot_mjy", "and source_mask.flux_column go together (the flux rule of the disc "
                                          "radius); set both or neither")
    if sm.radius_max_arcmin < sm.radius_arcmin:
        bad("source_mask.radius_max_arcmin", f"must be at least source_mask.radius_arcmin ({sm.radius_arcmin:g}); "
                                             f"got {sm.radius_max_arcmin:g}")
    if cfg.restart.table_path is not None:
        if sm.path is not None:
            bad("source_mask.path", "needs the map and the photometry, which a run from restart.table_path does not "
                                    "redo (the table's run decided which tracers it used); remove one of them")
        if cfg.outliers.clip_sigma is not None:
            bad("outliers.clip_sigma", "is not used when restart.table_path is set (the table's run clipped its "
                                       "tracers already, or not); remove it")


def _check_noise(cfg, bad) -> None:
    """Cross-key checks of ``[noise]``: every key but path needs path; hits need hit_rms_uk."""
    nc = cfg.noise
    if nc.path is None:
        _refuse_keys_without_path(nc, "noise", "the inverse-variance or hit-count map", bad)
        return
    if cfg.restart.table_path is not None:
        bad("noise.path", "needs the map's grid, which a run from restart.table_path does not read; remove one of them")
    if (nc.kind == "hits") != (nc.hit_rms_uk is not None):
        bad("noise.hit_rms_uk", "is required with noise.kind = 'hits', and used only with it")
    if nc.in_simulations and cfg.covariance.estimator != "simulations":
        bad("noise.in_simulations", "is used only with covariance.estimator = 'simulations'")


def _check_partner(cfg, bad) -> None:
    """Cross-key checks of ``[partner]``, the second catalogue of the cross curve."""
    pc = cfg.partner
    if pc.path is None:
        _refuse_keys_without_path(pc, "partner", "the second catalogue of the cross curve", bad)
        return
    if pc.bias is None:
        bad("partner.bias", "is required with partner.path: the cross template needs the linear bias of both "
                            "catalogues, so no value is assumed")
    if cfg.restart.table_path is not None:
        bad("partner.path", "needs the sky map for the second catalogue's photometry, which a run from "
                            "restart.table_path does not read; remove one of them")
    if not pc.z_min < pc.z_max:
        bad("partner.z_max", f"must exceed partner.z_min; got {pc.z_min} and {pc.z_max}")
    if not pc.proxy_min < pc.proxy_max:
        bad("partner.proxy_max", "must exceed partner.proxy_min")
    if (math.isfinite(pc.proxy_min) or math.isfinite(pc.proxy_max)) and pc.proxy_column is None:
        bad("partner.proxy_column", "is required when partner.proxy_min or partner.proxy_max is set")


def load_config(path, *, needs_bias: bool = True) -> Config:
    """Read and validate a TOML config file (``needs_bias``: as in :func:`config_from_dict`).

    Raises
    ------
    ConfigError
        The file is missing or unreadable, is not valid TOML, has an unknown key or a value of the
        wrong type or range.  The message names the file and the dotted key.
    """
    path = Path(path)
    data = _read_toml(path)
    if not data:
        raise ConfigError(f"config {path}: holds no settings (an empty file or only comments); see configs/README.md",
                          path=path)
    return config_from_dict(data, source=path.resolve(), needs_bias=needs_bias)


def _read_toml(path) -> dict:
    """The parsed TOML document in ``path``; every reason it cannot be read is a ConfigError naming the file."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"config {path}: file not found", path=path) from None
    except IsADirectoryError:
        raise ConfigError(f"config {path}: is a folder, not a TOML file", path=path) from None
    except OSError as err:
        raise ConfigError(f"config {path}: cannot be read ({err.strerror or err})", path=path) from None
    except UnicodeDecodeError as err:
        raise ConfigError(f"config {path}: is not UTF-8 text (byte {err.object[err.start:err.start + 1]!r} at "
                          f"offset {err.start}); TOML files must be UTF-8", path=path) from None
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"config {path}: not valid TOML ({err})", path=path) from None


def _check_multifrequency(cfg, bad) -> None:
    """Cross-key checks of ``[multifrequency]``; ``bad(key, message)`` raises the ConfigError."""
    mf = cfg.multifrequency
    if not mf.map_paths:
        for key in ("frequencies_ghz", "noise_uk_arcmin", "beam_fwhm_arcmin", "weights", "bandpass_paths", "per_channel"):
            if getattr(mf, key) not in (None, False):
                bad(f"multifrequency.{key}", "is set but multifrequency.map_paths is not")
        return
    k = len(mf.map_paths)
    for key in ("frequency_ghz", "bandpass_path"):
        if getattr(cfg.map, key) is not None:
            bad(f"map.{key}", "describes map.path; with multifrequency.map_paths give each map's "
                              "multifrequency.frequencies_ghz and bandpass_paths")
    if cfg.map.path is not None:
        bad("map.path", "and multifrequency.map_paths are both set; keep one (map_paths replaces map.path)")
    if mf.frequencies_ghz is None:
        bad("multifrequency.frequencies_ghz", f"is required with multifrequency.map_paths (one per map, {k})")
    for key in ("frequencies_ghz", "noise_uk_arcmin", "beam_fwhm_arcmin", "weights", "bandpass_paths"):
        val = getattr(mf, key)
        if val is not None and len(val) != k:
            bad(f"multifrequency.{key}", f"must have one value per map in multifrequency.map_paths ({k}); "
                                         f"got {len(val)}")
    if mf.combination == "tsz_free" and k < 2:
        bad("multifrequency.map_paths", f"must list at least 2 maps for combination = 'tsz_free'; got {k}")
    if mf.combination == "weights" and mf.weights is None:
        bad("multifrequency.weights", "is required when combination = 'weights'")
    if mf.combination != "weights" and mf.weights is not None:
        bad("multifrequency.weights", f"is used only with combination = 'weights'; got '{mf.combination}'")
    if mf.noise_model == "levels" and mf.noise_uk_arcmin is None:
        bad("multifrequency.noise_uk_arcmin", "is required when noise_model = 'levels'")
    if mf.combination == "tsz_free":
        f = tsz_spectrum(mf.frequencies_ghz, t_cmb_k=cfg.cosmology.t_cmb_k)
        if np.ptp(f) <= 1e-9 * max(1.0, float(np.abs(f).max())):
            bad("multifrequency.frequencies_ghz", f"must give maps with different tSZ factors for tsz_free (the "
                                                  f"constraints are singular); got {list(mf.frequencies_ghz)}")
    if (mf.beam_fwhm_arcmin is not None and np.ptp(mf.beam_fwhm_arcmin) > 1e-6 and not mf.allow_beam_mismatch):
        bad("multifrequency.beam_fwhm_arcmin", f"must be equal for a pixel-wise combination; got "
                                               f"{list(mf.beam_fwhm_arcmin)} (set allow_beam_mismatch = true to "
                                               f"combine anyway, or smooth the maps to one beam first)")
