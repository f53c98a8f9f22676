"""Compensated top-hat aperture photometry on a sky map, full or partial sky.

For a tracer at direction n and a disc radius theta,

    T_AP = <T>_disc(theta) - <T>_annulus(theta, sqrt(2) theta),

the means taken over the pixels whose centres lie in the disc and in the annulus [common
practice].  The two regions have equal areas, so a constant cancels exactly and a linear
gradient cancels up to pixelisation.  Each pixel enters its mean with the map's usable weight
(1 = usable, 0 = masked), so masked pixels, and pixels a partial map does not hold, are left
out; the masked fraction of each region is 1 - (sum of weights) / (number of pixel centres).

This module validates, rotates the tracers into the map's frame and turns region sums into
temperatures; the sums themselves (which pixels a disc covers, by their centres or by a fraction
near the edges) come from the map's :meth:`~pairvel.maps.skymap.SkyMap.aperture_sums`, for
HEALPix a compiled walk over the pixel rings or one disc query per position.
"""

from __future__ import annotations

__all__ = ["ApertureResult", "DROP_REASONS", "measure_apertures", "random_positions_in_footprint",
           "measure_random_apertures", "point_source_fraction"]

import dataclasses
import math
import warnings
from dataclasses import dataclass

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError, MapError, PairvelWarning
from ..core.rng import as_generator
from ..core.sphere import unit_vectors
from .skymap import SkyMap

_MAX_RADIUS_ARCMIN = 600.0  # 10 degrees: beyond this a "compensated aperture" is not what anyone wants

#: Why a position's aperture is unusable, in the order they are tested: the disc or annulus holds no
#: pixel centre at some radius (pixelisation); pixels the map does not hold or holds without data
#: (NaN, UNSEEN) alone exceed the masked fraction (outside the map's footprint); otherwise pixels
#: the mask (or a weight of 0) takes out.
TOO_FEW_PIXELS, OUTSIDE_MAP, MASKED = "too few pixels in the aperture", "outside the map", "masked"
DROP_REASONS = (TOO_FEW_PIXELS, OUTSIDE_MAP, MASKED)


def point_source_fraction(radius_arcmin: float, beam_fwhm_arcmin: float) -> float:
    """What the compensated aperture returns for a beam-convolved point-like profile, over its integral.

    A profile of solid-angle integral Y seen through a Gaussian beam of FWHM ``beam_fwhm_arcmin``
    gives the aperture of disc radius theta (annulus theta..sqrt(2) theta) the value
    f Y / (pi theta^2), with the f returned here; so the aperture optical depth tau_mean of such
    tracers corresponds to a profile integral tau_mean pi theta^2 / f.

    Parameters
    ----------
    radius_arcmin : float, arcmin
        Disc radius theta.
    beam_fwhm_arcmin : float, arcmin
        Beam FWHM; 0 gives f = 1 (a point inside the disc, nothing in the annulus).

    Returns
    -------
    float in [0, 1]

    Notes
    -----
    Flat sky, sigma = FWHM / sqrt(8 ln 2), profile Y exp(-r^2 / 2 sigma^2) / (2 pi sigma^2).  Its
    integral inside radius R is Y (1 - exp(-R^2 / 2 sigma^2)).  With x = theta^2 / (2 sigma^2) the
    disc holds Y (1 - e^-x) and the annulus Y (e^-x - e^-2x) (R = sqrt(2) theta gives e^-2x).  Disc
    and annulus both have area pi theta^2, so

        T_AP = [Y (1 - e^-x) - Y (e^-x - e^-2x)] / (pi theta^2) = Y (1 - e^-x)^2 / (pi theta^2),

    i.e. f = (1 - e^-x)^2.  Pixelisation (whole pixels by their centres) is left out; it moves the
    mean over many tracers by well under a per cent once the pixel is a few times smaller than theta.
    """
    theta, fwhm = float(radius_arcmin), float(beam_fwhm_arcmin)
    if not (math.isfinite(theta) and theta > 0 and math.isfinite(fwhm) and fwhm >= 0):
        raise InputError(f"aperture radius must be > 0 and beam FWHM >= 0, both finite; got {theta!r} and {fwhm!r}")
    if fwhm == 0:
        return 1.0
    sigma = fwhm / math.sqrt(8.0 * math.log(2.0))
    return math.expm1(-theta**2 / (2.0 * sigma**2)) ** 2  # (1 - e^-x)^2


@dataclass(frozen=True, eq=False)
class ApertureResult:
    """Compensated aperture photometry of N positions at n_radii radii.

    Attributes
    ----------
    radius_arcmin : ndarray of shape (n_radii,), arcmin
        Disc radii theta; each annulus runs from theta to sqrt(2) theta.
    temperatures : ndarray of shape (n_radii, N), uK
        Disc mean minus annulus mean; NaN where the disc or annulus has no usable pixel.
    masked_fraction_disc, masked_fraction_annulus : ndarray of shape (n_radii, N)
        1 - (sum of pixel weights) / (pixel centres in the region); 1 for a region with none.
    n_pixels_disc, n_pixels_annulus : ndarray of shape (n_radii, N), int64
        Pixel centres inside each region, usable or not.
    usable : ndarray of shape (N,), bool
        Finite temperature and both masked fractions <= ``max_masked_fraction`` at every radius.
    max_masked_fraction : float
        The threshold ``usable`` was computed with.
    drop_reason : ndarray of shape (N,), str, or None
        "" where usable, else one of :data:`DROP_REASONS` (set by :func:`measure_apertures`).
    """

    radius_arcmin: np.ndarray
    temperatures: np.ndarray
    masked_fraction_disc: np.ndarray
    masked_fraction_annulus: np.ndarray
    n_pixels_disc: np.ndarray
    n_pixels_annulus: np.ndarray
    usable: np.ndarray
    max_masked_fraction: float
    drop_reason: np.ndarray | None = None

    @property
    def n_usable(self) -> int:
        return int(self.usable.sum())


def _check_positions(ra_deg, dec_deg):
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    if ra.ndim != 1 or ra.shape != dec.shape:
        raise InputError(f"ra_deg and dec_deg must be 1-D arrays of equal length; got shapes {ra.shape} and {dec.shape}")
    bad = ~(np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0))
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(f"positions must be finite with |dec| <= 90 degrees; {int(bad.sum())} are not "
                         f"(first: row {first}, ra={float(ra[first])}, dec={float(dec[first])})")
    return ra, dec


def _check_radii(radius_arcmin) -> np.ndarray:
    try:
        radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=np.float64))
    except (TypeError, ValueError):
        raise InputError(f"radius_arcmin must be a positive number or a sequence of them; got {radius_arcmin!r}") from None
    if radii.ndim != 1 or radii.size == 0 or not np.all(np.isfinite(radii)) \
            or np.any(radii <= 0) or np.any(radii > _MAX_RADIUS_ARCMIN):
        raise InputError(f"radius_arcmin must be positive and at most {_MAX_RADIUS_ARCMIN:g} arcmin "
                         f"(scalar or 1-D); got {radius_arcmin!r}")
    return radii


def _check_fraction(max_masked_fraction) -> float:
    f = max_masked_fraction
    if isinstance(f, bool) or not isinstance(f, (int, float, np.integer, np.floating)) or not 0.0 <= f <= 1.0:
        raise InputError(f"max_masked_fraction must be a number in [0, 1]; got {f!r}")
    return float(f)


_WEIGHTINGS = ("centre", "fraction", "subsample")
_METHODS = ("auto", "kernel", "direct")


def _measure(skymap: SkyMap, ra, dec, radii, max_masked_fraction, progress, *, weighting="centre", method="auto",
             level=3, scale=None) -> ApertureResult:
    """Validated inputs (positions already in the map's frame) in, ApertureResult out (see measure_apertures)."""
    vec = unit_vectors(ra, dec)
    theta = radii[:, None] * ARCMIN_RAD * (np.ones(ra.size) if scale is None else scale)[None, :]  # (R, N)
    nd, wd, sd, na, wa, sa = skymap.aperture_sums(vec, theta, math.sqrt(2.0) * theta, weighting=weighting,
                                                  method=method, subsample_level=level, progress=progress)
    with np.errstate(invalid="ignore", divide="ignore"):
        temps = np.where((wd > 0) & (wa > 0), sd / np.where(wd > 0, wd, 1.0) - sa / np.where(wa > 0, wa, 1.0), np.nan)
        frac_disc = np.clip(np.where(nd > 0, 1.0 - wd / np.where(nd > 0, nd, 1.0), 1.0), 0.0, 1.0)
        frac_ann = np.clip(np.where(na > 0, 1.0 - wa / np.where(na > 0, na, 1.0), 1.0), 0.0, 1.0)
    tol = 1e-9  # the fractions are ratios of float sums; do not let rounding flip a boundary case
    usable = np.all(np.isfinite(temps) & (frac_disc <= max_masked_fraction + tol)
                    & (frac_ann <= max_masked_fraction + tol), axis=0)
    n_disc = np.rint(nd).astype(np.int64)
    n_ann = np.rint(na).astype(np.int64)
    return ApertureResult(radii, temps, frac_disc, frac_ann, n_disc, n_ann, usable, max_masked_fraction)


def _check_scale(radius_scale, n):
    if radius_scale is None:
        return None
    scale = np.asarray(radius_scale, dtype=np.float64)
    bad = ~(np.isfinite(scale) & (scale > 0)) if scale.shape == (n,) else None
    if bad is None:
        raise InputError(f"radius_scale must be a 1-D array with one value per position ({n}); got shape {scale.shape}")
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(f"radius_scale must be finite and > 0; {int(bad.sum())} values are not "
                         f"(first: row {first}, {float(scale[first])})")
    return scale


def _check_choice(value, choices, name):
    if value not in choices:
        raise InputError(f"{name} must be one of {', '.join(choices)}; got {value!r}")
    return value


def measure_apertures(skymap: SkyMap, ra_deg, dec_deg, radius_arcmin, *, max_masked_fraction=0.1,
                      progress=None, pixel_weighting="centre", method="auto", subsample_level=3,
                      radius_scale=None) -> ApertureResult:
    """Compensated top-hat aperture temperatures at every position, for one or several radii.

    Parameters
    ----------
    skymap : SkyMap
        Map in uK_CMB with its usable weights (full or partial sky, either ordering).
    ra_deg, dec_deg : ndarray of shape (N,), degrees
        Equatorial positions; rotated into the map's frame (``skymap.coordsys``) when that is
        Galactic or ecliptic.
    radius_arcmin : float or sequence of float, arcmin
        Disc radius theta; the annulus runs from theta to sqrt(2) theta.
    max_masked_fraction : float, default 0.1
        A position is usable when at most this fraction of its disc and of its annulus is masked
        (or outside a partial map), at every radius.
    progress : callable(done, total), optional
        Called after every batch of positions.
    pixel_weighting : {"centre", "fraction", "subsample"}, default "centre"
        How a pixel counts in a region: "centre" whole pixels by their centre; "fraction" a linear
        ramp in distance one mean pixel size wide across each edge (a pixel centred on the edge
        counts half); "subsample" the fraction of its 4^subsample_level NESTED sub-pixel centres
        inside, computed for pixels near an edge (for HEALPix, NESTED sub-pixels).
    method : {"auto", "kernel", "direct"}, default "auto"
        "kernel": the map's compiled path, no Python loop over positions (centre and fraction
        only; for HEALPix a walk over the pixel rings); "direct": its numpy reference (for HEALPix
        one disc query per position).  "auto" takes the kernel unless ``pixel_weighting`` is
        "subsample".  Both give the same sums (tests compare them).
    subsample_level : int, default 3
        Sub-pixels per pixel side = 2^level for "subsample".
    radius_scale : ndarray of shape (N,), optional
        Per-position factor on every radius (e.g. a fixed physical size at each redshift, see
        :func:`pairvel.maps.radii.angular_radius_arcmin`); ``radius_arcmin`` are then the radii at scale 1.

    Returns
    -------
    ApertureResult
        ``temperatures`` of shape (n_radii, N) in uK, masked fractions, pixel counts, ``usable``.

    Notes
    -----
    A pixel belongs to the disc when the angular distance of its centre from the position is
    <= theta, to the annulus when it is in (theta, sqrt(2) theta]; distances are exact chord
    lengths of the pixel-centre unit vectors.  The disc and annulus means are weighted by the
    map's usable weights, which for a binary mask leaves masked pixels out.
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"skymap must be a pairvel SkyMap (see read_map); got {type(skymap).__name__}")
    ra, dec = _check_positions(ra_deg, dec_deg)
    radii = _check_radii(radius_arcmin)
    fmax = _check_fraction(max_masked_fraction)
    if progress is not None and not callable(progress):
        raise InputError(f"progress must be a callable(done, total) or None; got {type(progress).__name__}")
    _check_choice(pixel_weighting, _WEIGHTINGS, "pixel_weighting")
    _check_choice(method, _METHODS, "method")
    if method == "kernel" and pixel_weighting == "subsample":
        raise InputError("method 'kernel' supports pixel_weighting 'centre' and 'fraction'; use 'direct' for 'subsample'")
    if isinstance(subsample_level, bool) or not isinstance(subsample_level, (int, np.integer)) \
            or not 1 <= subsample_level <= 6:
        raise InputError(f"subsample_level must be an integer in [1, 6]; got {subsample_level!r}")
    scale = _check_scale(radius_scale, ra.size)
    smallest = radii.min() * (1.0 if scale is None else float(scale.min(initial=1.0)))
    if scale is not None and radii.max() * scale.max(initial=0.0) > _MAX_RADIUS_ARCMIN:
        raise InputError(f"radius_arcmin x radius_scale must be at most {_MAX_RADIUS_ARCMIN:g} arcmin; got up to "
                         f"{radii.max() * scale.max():g}")
    expected = math.pi * smallest ** 2 / skymap.pixel_area_arcmin2
    if expected < 3.0:
        warnings.warn(f"aperture radius {smallest:g} arcmin holds only ~{expected:.1f} pixel centres at "
                      f"{skymap.grid_label} (pixel size {skymap.pixel_size_arcmin:.2f} arcmin); the aperture "
                      f"temperature is dominated by pixelisation", PairvelWarning, stacklevel=2)
    ra, dec = skymap.from_equatorial(ra, dec)
    options = {"weighting": pixel_weighting, "method": method, "level": int(subsample_level)}
    res = _measure(skymap, ra, dec, radii, fmax, progress, **options, scale=scale)
    return dataclasses.replace(res, drop_reason=_drop_reasons(skymap, ra, dec, radii, res, options, scale))


def _drop_reasons(skymap: SkyMap, ra, dec, radii, res: ApertureResult, options: dict, scale) -> np.ndarray:
    """One of :data:`DROP_REASONS` for each unusable position of ``res`` ("" for the usable ones).

    The footprint test measures the unusable positions again with every held pixel that has a value
    at weight 1 (no mask): an aperture still too empty lies (partly) outside the map, where it has
    no pixels or only pixels without data (NaN, UNSEEN).
    """
    reason = np.full(ra.size, "", dtype=object)
    bad = np.flatnonzero(~res.usable)
    if bad.size:
        few = np.any((res.n_pixels_disc[:, bad] < 1) | (res.n_pixels_annulus[:, bad] < 1), axis=0)
        held = skymap.with_values(skymap.values, weight=np.ones(skymap.weight.shape, np.float32))  # bad values: 0
        footprint = _measure(held, ra[bad], dec[bad], radii, res.max_masked_fraction, None, **options,
                             scale=None if scale is None else scale[bad])
        reason[bad] = np.where(few, TOO_FEW_PIXELS, np.where(footprint.usable, MASKED, OUTSIDE_MAP))
    return reason.astype(str)


def _draw_usable(skymap: SkyMap, n: int, rng, radii, fmax, max_draws, weighting="centre", method="auto", scale=None,
                 exclude=None):
    if not np.any(skymap.weight > 0):
        raise MapError(f"map {skymap.path}: no usable pixels to place random apertures on", path=skymap.path)
    ra_parts, dec_parts, t_parts = [], [], []
    have, drawn, accepted = 0, 0, 0
    while have < n:
        if drawn >= max_draws:
            raise MapError(f"map {skymap.path}: only {have} of {n} random apertures of {radii.max():g} arcmin found "
                           f"with at most {fmax:.0%} masked after {drawn} draws; the usable footprint is too small "
                           f"or too fragmented for this aperture", path=skymap.path)
        rate = max((accepted + 1) / (drawn + 1), 0.01)
        k = int(min(max((n - have) / rate * 1.2 + 64, 256), 1 << 20, max_draws - drawn))
        ra, dec = skymap.random_points(k, rng)  # in the map's frame
        cand_scale = None if scale is None else scale[rng.integers(0, scale.size, k)]
        res = _measure(skymap, ra, dec, radii, fmax, None, weighting=weighting, method=method, scale=cand_scale)
        usable = res.usable
        if exclude is not None:  # refused as a tracer would be (near a masked point source)
            usable = usable & ~np.asarray(exclude(*skymap.to_equatorial(ra, dec),
                                                  np.ones(k) if cand_scale is None else cand_scale), dtype=bool)
        ok = np.flatnonzero(usable)
        drawn += k
        accepted += ok.size
        ok = ok[: n - have]
        ra_eq, dec_eq = skymap.to_equatorial(ra[ok], dec[ok])
        ra_parts.append(ra_eq)
        dec_parts.append(dec_eq)
        t_parts.append(res.temperatures[:, ok])
        have += ok.size
    return (np.concatenate(ra_parts) if ra_parts else np.zeros(0), np.concatenate(dec_parts) if dec_parts else np.zeros(0),
            np.concatenate(t_parts, axis=1) if t_parts else np.zeros((radii.size, 0)))


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 0:
        raise InputError(f"n must be a non-negative integer; got {n!r}")
    return int(n)


def random_positions_in_footprint(skymap: SkyMap, n, *, seed, radius_arcmin, max_masked_fraction,
                                  max_draws=None):
    """Random sky positions whose apertures are usable on the map, for the random-position null test.

    Positions are drawn uniformly over the area of the usable pixels (weight > 0), then kept only
    when their aperture passes the same test as a tracer's in :func:`measure_apertures`; the rest
    are redrawn.  So the accepted positions are uniform over the region where an aperture is usable.

    Parameters
    ----------
    skymap : SkyMap
    n : int
        Number of positions wanted.
    seed : None, int or numpy.random.Generator
    radius_arcmin : float or sequence of float, arcmin
        Aperture radii that must all be usable.
    max_masked_fraction : float
        As in :func:`measure_apertures`.
    max_draws : int, optional
        Give up (MapError) after this many candidates; default max(100 n, 10^5).

    Returns
    -------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    """
    ra, dec, _ = measure_random_apertures(skymap, n, radius_arcmin, seed=seed,
                                          max_masked_fraction=max_masked_fraction, max_draws=max_draws)
    return ra, dec


def measure_random_apertures(skymap: SkyMap, n, radius_arcmin, *, seed, max_masked_fraction=0.1, max_draws=None,
                             pixel_weighting="centre", method="auto", radius_scale=None, exclude=None):
    """Random usable positions (see :func:`random_positions_in_footprint`) and their aperture temperatures.

    Returns
    -------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    temperatures : ndarray of shape (n_radii, n), uK
        The same values :func:`measure_apertures` gives at those positions (with the same
        ``pixel_weighting`` and ``method``).

    Notes
    -----
    With ``radius_scale`` (any length), each candidate position takes a scale drawn at random from
    it, so the random apertures follow the tracers' radius distribution (up to the acceptance,
    which favours small apertures where the footprint is fragmented).

    ``exclude``, if given, is called as ``exclude(ra_deg, dec_deg, scale)`` on each batch of candidate
    positions (equatorial degrees, and their radius scale, 1 for fixed radii) and returns a bool array:
    True positions are refused and redrawn, as tracers screened out after the photometry would be
    (:func:`pairvel.maps.sourcemask.source_exclusion`: apertures touching a masked point source).
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"skymap must be a pairvel SkyMap (see read_map); got {type(skymap).__name__}")
    n = _check_n(n)
    radii = _check_radii(radius_arcmin)
    fmax = _check_fraction(max_masked_fraction)
    rng = as_generator(seed)
    limit = max(100 * n, 100_000) if max_draws is None else _check_n(max_draws)
    _check_choice(pixel_weighting, _WEIGHTINGS, "pixel_weighting")
    _check_choice(method, _METHODS, "method")
    scale = None if radius_scale is None else _check_scale(radius_scale, np.size(radius_scale))
    if exclude is not None and not callable(exclude):
        raise InputError(f"exclude must be a callable (ra_deg, dec_deg, scale) -> bool array; got {type(exclude).__name__}")
    return _draw_usable(skymap, n, rng, radii, fmax, limit, pixel_weighting, method, scale, exclude)
