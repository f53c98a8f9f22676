"""Map noise per tracer: the aperture noise variance from an inverse-variance or hit-count map, and
tracer weights built from it.

The noise map lies on the temperature map's grid and is read with the same
:func:`~pairvel.maps.skymap.read_map` machinery (any pixelisation that has a reader), unit-free:
an inverse-variance map holds 1/sigma_p^2 in 1/uK_CMB^2 per pixel; a hit-count map holds counts
h_p, and sigma_p^2 = s_1^2 / h_p with s_1 the noise rms of a pixel with one hit (uK).  Pixels
with ivar <= 0, no hits, NaN or missing carry no noise information.

Aperture noise variance
-----------------------
The photometry (:mod:`pairvel.maps.photometry`) measures

    T_AP = sum_p a_p u_p T_p / A - sum_p b_p u_p T_p / B,   A = sum_p a_p u_p,  B = sum_p b_p u_p,

with u_p the pixel's usable weight (mask), a_p and b_p its disc and annulus memberships (1/0 by
its centre; a ramp near the edges for ``pixel_weighting = "fraction"``).  For independent pixel
noise of variance sigma_p^2,

    Var(T_AP) = sum_p a_p^2 u_p^2 sigma_p^2 / A^2 + sum_p b_p^2 u_p^2 sigma_p^2 / B^2
                - 2 sum_p a_p b_p u_p^2 sigma_p^2 / (A B).

Through the map interface (:meth:`SkyMap.aperture_sums`, which sums a_p u_p x_p) this module
evaluates it with a_p^2 -> a_p, b_p^2 -> b_p and no cross term, i.e. sums of a_p u_p (u_p
sigma_p^2).  For centre weighting (a_p, b_p in {0, 1}, disjoint) that is exact; for fractional
memberships it can only overestimate (a^2 <= a, the dropped cross term is negative), by the share
of the variance in edge pixels: measured on white noise at nside 256 (tests/maps/test_noise.py),
by a factor ~1.6 with ~15 pixel centres per disc and ~1.25 with ~60.  The factor is nearly the
same for every tracer of one radius, so the weights' ranking holds; the sky variance estimated
below then takes more of the floor.  Any pixel used by the photometry without noise information makes
the tracer's variance infinite (weight 0 when weighting).

Weights
-------
w_i = 1 / (sigma_noise,i^2 + sigma_sky^2), normalised to mean 1 over the tracers, where
sigma_sky^2 is the aperture variance of the CMB and everything else on the sky common to all
tracers.  By default it is estimated from the data, by maximum likelihood: the trend-corrected
aperture temperatures are taken as T_i ~ N(mu, sigma_sky^2 + sigma_noise,i^2) with the noise
variances known, and sigma_sky^2 maximises

    ln L = -1/2 sum_i [ ln(sigma_sky^2 + sigma_noise,i^2) + (T_i - mu)^2 / (sigma_sky^2 + sigma_noise,i^2) ],

mu the weighted mean at that sigma_sky^2.  It is the data's own aperture variance of everything the
tracers share (primary CMB after the map's treatment and pre-filter, their kSZ and tSZ, residual
foregrounds), which a prediction from a CMB spectrum and the aperture's window would miss.  The simpler
moment estimate, Var(T) - <sigma_noise^2>, is unbiased too, but where the noise varies strongly it is the
small difference of two large numbers set by the shallowest tracers: on a striped mock whose aperture
noise spans 30-300 uK against a sky of 65 uK rms (benchmarks/noise_weighting.py settings, 1000 uK-arcmin,
depth ratio 10, 10^4 tracers; truth from the same mock without noise: 4290 uK^2) the moment estimate
gave 3660 uK^2 (three bootstrap resamples: 2300-4050), the likelihood 4300 (4250-4540): it lets the deep
tracers, where the sky stands out of the noise, carry the estimate.  The result is floored at
:data:`SKY_VARIANCE_FLOOR` of Var(T), so a noise estimate that is too high cannot give a few quiet
tracers all the weight.  When the noise is far below the sky, the weights tend to equal ones (the
unweighted estimator); when it dominates, to inverse noise variances.
"""

from __future__ import annotations

__all__ = ["NOISE_KINDS", "SKY_VARIANCE_FLOOR", "read_noise_map", "pixel_variance", "aperture_noise_variance",
           "sky_variance", "noise_weights", "noise_markdown"]

import math
import warnings

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError, MapError, PairvelWarning
from ..core.sphere import unit_vectors
from .skymap import SkyMap, read_map

NOISE_KINDS = ("ivar", "hits")
#: sigma_sky^2 is at least this fraction of the variance of the aperture temperatures (choice: with
#: it, no tracer outweighs another by more than 1/0.05 = 20 from the noise alone).
SKY_VARIANCE_FLOOR = 0.05
_NO_INFO = 1e30     # variance given to pixels without noise information (uK^2)
_INFINITE = 1e20    # an aperture variance above this came from such a pixel


def read_noise_map(path, *, kind: str, field: int = 0, ordering=None, coordsys=None) -> SkyMap:
    """Read an inverse-variance (1/uK^2) or hit-count map as it is, without unit conversion.

    The file's unit card, if any, must be absent or a temperature unit the reader accepts (it is
    not applied); values are taken as 1/uK^2 for ``kind = "ivar"`` and as counts for ``"hits"``.
    """
    if kind not in NOISE_KINDS:
        raise InputError(f"noise.kind must be one of {', '.join(NOISE_KINDS)}; got {kind!r}", key="noise.kind")
    with warnings.catch_warnings():  # the temperature-unit and rms checks of read_map do not apply to this map
        warnings.filterwarnings("ignore", message=".*(pixel rms|unit).*", category=PairvelWarning)
        noise = read_map(path, field=field, unit="uK", ordering=ordering, coordsys=coordsys, rms_check=False)
    good = noise.values[noise.weight > 0]
    if not np.any(good > 0):
        raise MapError(f"noise map {path}: no pixel has a positive {'inverse variance' if kind == 'ivar' else 'hit count'}",
                       path=str(path), key="noise.path")
    if np.any(good < 0):
        raise MapError(f"noise map {path}: {kind} values must be >= 0; {int(np.sum(good < 0))} pixels are negative "
                       f"(first value {float(good[good < 0][0]):g})", path=str(path), key="noise.path")
    return noise


def pixel_variance(noise: SkyMap, skymap: SkyMap, *, kind: str, hit_rms_uk: float | None = None) -> np.ndarray:
    """Noise variance sigma_p^2 (uK^2) at the held pixels of ``skymap``, inf where unknown.

    Parameters
    ----------
    noise : SkyMap
        From :func:`read_noise_map`, on the grid of ``skymap`` (any frame letter must match).
    skymap : SkyMap
        The temperature map.
    kind : {"ivar", "hits"}
    hit_rms_uk : float, uK
        Noise rms of a pixel with one hit (``kind = "hits"``).
    """
    where = f"noise map {noise.path}"
    if not skymap.same_grid(noise):
        raise MapError(f"{where} has {noise.grid_label} but the map has {skymap.grid_label}", path=noise.path,
                       key="noise.path")
    if noise.coordsys != skymap.coordsys:
        raise MapError(f"{where} is in frame {noise.coordsys} but the map is in frame {skymap.coordsys}",
                       path=noise.path, key="noise.path")
    values, weight = noise.values_on(skymap)
    values = np.where(weight > 0, np.nan_to_num(values.astype(np.float64), nan=0.0), 0.0)
    with np.errstate(divide="ignore"):
        if kind == "ivar":
            return np.where(values > 0, 1.0 / values, np.inf)
        if hit_rms_uk is None or not hit_rms_uk > 0:
            raise InputError(f"noise.hit_rms_uk must be > 0 for a hit-count map; got {hit_rms_uk!r}",
                             key="noise.hit_rms_uk")
        return np.where(values > 0, hit_rms_uk**2 / values, np.inf)


def aperture_noise_variance(skymap: SkyMap, variance, ra_deg, dec_deg, radius_arcmin, *, pixel_weighting="centre",
                            method="auto", radius_scale=None) -> np.ndarray:
    """Noise variance of the compensated aperture temperature at every position and radius (module docstring).

    Parameters
    ----------
    skymap : SkyMap
        The temperature map as the photometry sees it (its usable weights, mask applied).
    variance : ndarray of shape (n_held,), uK^2
        Pixel noise variance (:func:`pixel_variance`); inf where unknown.
    ra_deg, dec_deg : ndarray of shape (N,), degrees
        Equatorial positions.
    radius_arcmin : sequence of float, arcmin
        Disc radii (annulus to sqrt(2) times each).
    pixel_weighting, method : as :func:`pairvel.maps.photometry.measure_apertures`
    radius_scale : ndarray of shape (N,), optional
        Per-position factor on the radii (physical radii).

    Returns
    -------
    ndarray of shape (n_radii, N), uK^2
        inf where the aperture uses a pixel without noise information; NaN where the disc or
        annulus has no usable pixel.
    """
    variance = np.asarray(variance, dtype=np.float64)
    if variance.shape != skymap.values.shape:
        raise InputError(f"variance must have one value per held pixel ({skymap.values.size}); got shape "
                         f"{variance.shape}")
    u = skymap.weight.astype(np.float64)
    carried = np.where(u > 0, u * np.where(np.isfinite(variance), variance, _NO_INFO), 0.0)
    vmap = skymap.with_values(carried, weight=skymap.weight)
    ra, dec = skymap.from_equatorial(np.asarray(ra_deg, dtype=np.float64), np.asarray(dec_deg, dtype=np.float64))
    radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=np.float64))
    scale = np.ones(ra.size) if radius_scale is None else np.asarray(radius_scale, dtype=np.float64)
    theta = radii[:, None] * ARCMIN_RAD * scale[None, :]
    _, wd, sd, _, wa, sa = vmap.aperture_sums(unit_vectors(ra, dec), theta, math.sqrt(2.0) * theta,
                                              weighting=pixel_weighting, method=method)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where((wd > 0) & (wa > 0), sd / wd**2 + sa / wa**2, np.nan)
    return np.where(var > _INFINITE, np.inf, var)


def sky_variance(temps, noise_variance) -> float:
    """sigma_sky^2 (uK^2), the maximum-likelihood sky variance (module docstring), floored at
    SKY_VARIANCE_FLOOR Var(T).

    ``temps`` and ``noise_variance`` are per tracer; tracers with infinite noise are left out.
    """
    from scipy.optimize import minimize_scalar

    t, nv = np.asarray(temps, dtype=np.float64), np.asarray(noise_variance, dtype=np.float64)
    ok = np.isfinite(t) & np.isfinite(nv)
    if ok.sum() < 2:
        raise InputError(f"the sky variance needs at least 2 tracers with finite noise; got {int(ok.sum())}")
    t, nv = t[ok], nv[ok]
    total = float(np.var(t, ddof=1))
    floor = SKY_VARIANCE_FLOOR * total
    if total <= 0.0:
        return 0.0

    def minus_log_likelihood(log_s):
        v = np.exp(log_s) + nv
        mu = np.sum(t / v) / np.sum(1.0 / v)
        return 0.5 * float(np.sum(np.log(v) + (t - mu) ** 2 / v))

    best = minimize_scalar(minus_log_likelihood, bounds=(math.log(floor), math.log(total)), method="bounded",
                           options={"xatol": 1e-4})
    if minus_log_likelihood(math.log(floor)) <= best.fun:  # the likelihood peaks at or below the floor
        return floor
    return max(float(np.exp(best.x)), floor)


def noise_markdown(info: dict) -> str:
    """The report's lines on the noise map and the tracer weights (``extra["noise_weighting"]``)."""
    sky = "estimated from the data" if info["sky_variance_estimated"] else "set by noise.sky_variance_uk2"
    lines = [f"Noise map `{info['path']}` ({info['kind']}): median aperture noise {info['median_noise_uk']:.3g} uK, "
             f"mean noise variance {info['mean_noise_variance_uk2']:.3g} uK^2; sky variance "
             f"{info['sky_variance_uk2']:.3g} uK^2 ({sky}); {info['n_without_noise']} tracers without noise information "
             f"(tracers.fits column noise_uK)."]
    if info["weighting"]:
        lines.append(f"Tracers weighted by 1 / (noise variance + sky variance): weights span a factor "
                     f"{info['weight_max_over_min']:.3g}, effective fraction of tracers {info['effective_fraction']:.3f} "
                     f"(column noise_weight).")
    else:
        lines.append(f"Not used as weights (noise.tracer_weighting = false); they would span a factor "
                     f"{info['weight_max_over_min']:.3g} (effective fraction {info['effective_fraction']:.3f}).")
    return "\n\n".join(lines)


def noise_weights(noise_variance, sky_variance_uk2: float) -> np.ndarray:
    """w_i = 1 / (sigma_noise,i^2 + sigma_sky^2), normalised to mean 1 (0 where the noise is infinite)."""
    nv = np.asarray(noise_variance, dtype=np.float64)
    w = np.where(np.isfinite(nv), 1.0 / (nv + float(sky_variance_uk2)), 0.0)
    if not np.any(w > 0):
        raise InputError("no tracer has a finite aperture noise variance; cannot weight by the noise map")
    return w / w.mean()
