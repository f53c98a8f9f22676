"""The settings of `pairvel validate` (:class:`ValidationOptions`), apart from the run itself.

Kept light (numpy and the core only) because the CLI builds the ``validate`` options from these
defaults: importing :mod:`pairvel.sims.validate` there would load scipy.stats and the mocks for
every command.
"""

from __future__ import annotations

__all__ = ["MIN_MOCKS_FOR_VERDICTS", "ValidationOptions"]

import math
from dataclasses import dataclass

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError
from ..input.config import LIKELIHOODS

#: Below this many mocks the sampling error of the coverage alone (0.10 at 20) exceeds the width of its target.
MIN_MOCKS_FOR_VERDICTS = 20


@dataclass(frozen=True)
class ValidationOptions:
    """Settings of a validation run (every field is recorded in the summary).

    Attributes
    ----------
    n_mocks : int, default 100
    seed : int, default 20261203
        Master seed; mock k uses the k-th child of ``numpy.random.SeedSequence(seed)``.
    n_tracers : int, default 4000
        Expected tracers per mock (Poisson draw).
    tau_mean : float, default 1e-3
        Injected optical depth of every tracer (the truth the fit must recover).
    noise_uk : float, uK, default 20.0
        Per-tracer Gaussian noise on the aperture temperature (without a map).
    with_map : bool, default False
        Paint the kSZ onto a HEALPix map with white noise and measure apertures instead.
    noise_uk_arcmin : float, uK-arcmin, default 15.0
        Map white noise (with a map).
    nside : int, default 2048
        Map resolution (with a map).
    beam_fwhm_arcmin, aperture_radius_arcmin : float, arcmin, default 1.4, 2.1
        Source shape on the map and aperture radius (with a map).
    regions : {"kmeans", "healpix"}, default "kmeans"
    n_regions : int, default 50
        Jackknife regions (k-means); ``healpix_nside`` for HEALPix regions.
    healpix_nside : int, default 8
    trend : bool, default True
        Remove the redshift trend of the temperatures (pipeline default, sigma_z = 0.01).
    r_max_mpc, bin_width_mpc : float, Mpc, default 300, 20
        Separation bins from 0 (pipeline defaults).
    fit_r_min_mpc, fit_r_max_mpc : float, Mpc, default 0, inf
        Fit range (pipeline defaults: every bin).
    likelihood : {"hartlap", "sellentin-heavens", "hartlap-percival"}, default "hartlap"
    bias : float, default 0.4
        Linear bias of the tracer sampling; the template uses the sample's effective bias, lowered by
        the clipping of the sampling density (see :func:`_draw_catalogue`).
    ra_half_deg, dec_half_deg : float, degrees, default 15, 15
        Half sizes of the RA-Dec patch centred on RA = 0, Dec = 0.
    z_min, z_max : float, default 0.1, 0.4
    cell_mpc : float, Mpc, default 8.0
        Cell of the Gaussian field.
    exact_fields : bool, default True
        Evaluate the Gaussian fields exactly at each tracer (non-uniform FFT) instead of at the
        nearest grid node (which smooths them by the cell and lowers the close-pair signal).
    box_padding : float, default 2.5
        Side of the periodic field box over the side of the cone's bounding box.  The field is
        periodic, so each tracer also feels the images of its neighbours one box away; with 1.5
        the noiseless amplitude came out 3% low (0.970 +- 0.011 over 200 mocks), with 2.5 it is
        0.996 +- 0.011 (at 4 times the run time and ~3 GB).
    trend_model : bool, default True
        With ``trend``, multiply the template by the linear-theory signal fraction that survives
        the trend removal (:mod:`pairvel.model.trendmodel`), as the pipeline does.
    jackknife_deletes : {"pairs", "tracers"}, default "pairs"
        The jackknife of the fit, as ``covariance.jackknife_deletes`` in the pipeline: sample k drops
        region k's tracers (their partners elsewhere keep their terms) or every pair touching region
        k.  Both are computed (from the same re-trended sets) and summarised either way.
    diagnostics : bool, default True
        Also compute the object-split and re-trended jackknives (2-3 times slower).
    family : {"points", "cells"}, default "points"
        How the mocks are built: "points" sums the fields at each tracer (above); "cells" places
        tracers in the cells of a density grid with their cell's velocity, and multiplies the template
        by that construction's predicted window (:mod:`pairvel.sims.cellmock`).
    paired_exact : bool, default False
        With "cells", also sum the same Fourier modes exactly at each tracer and fit that noiseless
        curve ("exact_signal_" columns): the same tracers and field, only the velocity read differently.
    """

    n_mocks: int = 100
    seed: int = 20261203
    n_tracers: int = 4000
    tau_mean: float = 1.0e-3
    noise_uk: float = 20.0
    with_map: bool = False
    noise_uk_arcmin: float = 15.0
    nside: int = 2048
    beam_fwhm_arcmin: float = 1.4
    aperture_radius_arcmin: float = 2.1
    regions: str = "kmeans"
    n_regions: int = 50
    healpix_nside: int = 8
    trend: bool = True
    r_max_mpc: float = 300.0
    bin_width_mpc: float = 20.0
    fit_r_min_mpc: float = 0.0
    fit_r_max_mpc: float = math.inf
    likelihood: str = "hartlap"
    bias: float = 0.4
    ra_half_deg: float = 15.0
    dec_half_deg: float = 15.0
    z_min: float = 0.1
    z_max: float = 0.4
    cell_mpc: float = 8.0
    exact_fields: bool = True
    box_padding: float = 2.5
    trend_model: bool = True
    jackknife_deletes: str = "pairs"
    diagnostics: bool = True
    family: str = "points"
    paired_exact: bool = False

    def __post_init__(self):
        def need(ok, name, must):
            if not ok:
                raise InputError(f"validation option '{name}' must be {must}; got {getattr(self, name)!r}", key=name)

        def is_int(name):
            v = getattr(self, name)
            return isinstance(v, (int, np.integer)) and not isinstance(v, bool)

        need(is_int("n_mocks") and self.n_mocks >= 2, "n_mocks", "an integer >= 2")
        need(is_int("seed") and self.seed >= 0, "seed", "a non-negative integer")
        need(is_int("n_tracers") and self.n_tracers >= 100, "n_tracers", "an integer >= 100")
        need(is_int("n_regions") and self.n_regions >= 3, "n_regions", "an integer >= 3")
        need(is_int("nside") and 64 <= self.nside <= 8192 and not self.nside & (self.nside - 1), "nside",
             "a power of 2 between 64 and 8192")
        need(is_int("healpix_nside") and self.healpix_nside >= 1 and not self.healpix_nside & (self.healpix_nside - 1),
             "healpix_nside", "a power of 2")
        for name in ("tau_mean", "noise_uk", "noise_uk_arcmin", "fit_r_min_mpc"):
            need(math.isfinite(getattr(self, name)) and getattr(self, name) >= 0, name, "finite and >= 0")
        for name in ("beam_fwhm_arcmin", "aperture_radius_arcmin", "r_max_mpc", "bin_width_mpc", "bias",
                     "ra_half_deg", "dec_half_deg", "cell_mpc"):
            need(math.isfinite(getattr(self, name)) and getattr(self, name) > 0, name, "finite and > 0")
        need(math.isfinite(self.box_padding) and 1.0 <= self.box_padding <= 4.0, "box_padding", "between 1 and 4")
        need(isinstance(self.exact_fields, bool), "exact_fields", "true or false")
        need(isinstance(self.trend_model, bool), "trend_model", "true or false")
        need(isinstance(self.paired_exact, bool), "paired_exact", "true or false")
        need(self.ra_half_deg <= 60 and self.dec_half_deg <= 60, "dec_half_deg", "at most 60 (and ra_half_deg too)")
        need(0 < self.z_min < self.z_max <= 2, "z_max", f"in (z_min = {self.z_min}, 2] with z_min > 0")
        need(self.regions in ("kmeans", "healpix"), "regions", "'kmeans' or 'healpix'")
        need(self.jackknife_deletes in ("tracers", "pairs"), "jackknife_deletes", "'tracers' or 'pairs'")
        need(self.likelihood in LIKELIHOODS, "likelihood", "one of " + ", ".join(map(repr, LIKELIHOODS)))
        need(self.family in ("points", "cells"), "family", "'points' or 'cells'")
        need(self.fit_r_max_mpc > self.fit_r_min_mpc, "fit_r_max_mpc", f"> fit_r_min_mpc = {self.fit_r_min_mpc}")
        if self.with_map and _centres_per_disc(self.nside, self.aperture_radius_arcmin) < 1.0:
            fine = [n for n in (2 ** k for k in range(6, 14)) if _centres_per_disc(n, self.aperture_radius_arcmin) >= 1]
            need(False, "nside", f"{'at least ' + str(fine[0]) if fine else 'finer'} (--nside) for the "
                                 f"{self.aperture_radius_arcmin:g}-arcmin aperture: pixels of "
                                 f"{_pixel_arcmin(self.nside):.3g} arcmin leave "
                                 f"~{_centres_per_disc(self.nside, self.aperture_radius_arcmin):.2f} pixel centres "
                                 f"per disc and no aperture would be usable")

    def edges(self) -> np.ndarray:
        n = int(round(self.r_max_mpc / self.bin_width_mpc))
        return self.bin_width_mpc * np.arange(n + 1)


def _pixel_arcmin(nside: int) -> float:
    """Side of a HEALPix pixel, arcmin: sqrt(4 pi / (12 nside^2)) in arcmin."""
    return math.sqrt(4.0 * math.pi / (12 * nside ** 2)) / ARCMIN_RAD


def _centres_per_disc(nside: int, radius_arcmin: float) -> float:
    """Expected pixel centres in an aperture disc: its area over the pixel area.  Below 1 most discs (and
    annuli, of the same area) hold none, and measured on nside 512 with 2.1 arcmin no tracer was usable."""
    return math.pi * radius_arcmin ** 2 / _pixel_arcmin(nside) ** 2
