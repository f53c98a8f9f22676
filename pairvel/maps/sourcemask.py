"""Point sources masked in the map, tracers near them dropped, and aperture-temperature outliers clipped.

A point-source list (positions, optionally fluxes) names discs to leave out of the map: every pixel
whose centre lies within a source's radius gets weight 0 (:func:`mask_sources`, through
:meth:`~pairvel.maps.skymap.SkyMap.aperture_support`, so it works on any pixelisation).  A tracer
whose compensated aperture touches such a disc, i.e. whose centre lies closer to a source than the
source's radius plus the tracer's outer annulus radius (sqrt(2) times its largest disc radius), is
dropped (:func:`near_sources`): an aperture that only grazes a disc keeps most of its pixels and
would pass the masked-fraction test of the photometry, yet a bright source's beam wings reach
beyond any disc.

Radius rule.  Without fluxes every source gets ``radius_arcmin``.  With fluxes S and a pivot S0,

    r = min(r_max, r0 * max(1, sqrt(S / S0))),

so sources up to S0 get the fixed disc r0 and brighter ones a disc growing as sqrt(S): the area
masked grows in proportion to the flux, and r_max bounds it.  (For a Gaussian beam alone the radius
where a source falls below a fixed level grows only as sqrt(ln S); the sqrt(S) rule is deliberately
more generous, for the extended beam wings and sidelobes of bright sources.)

Outlier clipping.  Aperture temperatures T far from the bulk (an unmasked source, a map artefact)
are dropped when |T - median| > k * 1.4826 MAD at any radius, one pass, with k the threshold in
robust sigma; 1.4826 MAD is the standard deviation of a Gaussian [analytic: 1 / Phi^-1(3/4)].
"""

from __future__ import annotations

__all__ = ["SourceList", "read_source_list", "source_radii_arcmin", "mask_sources", "near_sources", "source_exclusion",
           "clip_outliers", "screen_apertures", "NEAR_SOURCE", "CLIPPED", "MAD_TO_SIGMA"]

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.errors import InputError
from ..core.provenance import file_sha256
from ..core.sphere import unit_vectors
from ..input.catalogue import read_table_columns
from .photometry import MASKED
from .skymap import SkyMap

#: Drop reasons of the tracers this module removes (beside :data:`pairvel.maps.photometry.DROP_REASONS`).
NEAR_SOURCE, CLIPPED = "aperture touches a masked point source", "aperture temperature outlier"
#: sigma of a Gaussian over its median absolute deviation, 1 / Phi^-1(3/4) [analytic].
MAD_TO_SIGMA = 1.482602218505602


@dataclass(frozen=True, eq=False)
class SourceList:
    """Point sources to mask: equatorial positions (degrees) and the radius of each disc (arcmin)."""

    ra: np.ndarray
    dec: np.ndarray
    radius_arcmin: np.ndarray
    path: str | None = None
    sha256: str | None = None

    def __len__(self) -> int:
        return self.ra.size


def source_radii_arcmin(flux_mjy, radius_arcmin: float, flux_pivot_mjy: float, *, radius_max_arcmin=None) -> np.ndarray:
    """Disc radius of each source from its flux by the rule of the module docstring, arcmin.

    Parameters
    ----------
    flux_mjy : ndarray of shape (n,), mJy
        Fluxes (negative ones count as 0).
    radius_arcmin : float
        r0, the radius of a source of flux up to the pivot.
    flux_pivot_mjy : float
        S0, mJy.
    radius_max_arcmin : float, optional
        r_max (default: no bound).
    """
    growth = np.sqrt(np.maximum(np.asarray(flux_mjy, dtype=float), 0.0) / float(flux_pivot_mjy))
    r = float(radius_arcmin) * np.maximum(1.0, growth)
    return r if radius_max_arcmin is None else np.minimum(r, float(radius_max_arcmin))


def read_source_list(path, *, ra_column="ra", dec_column="dec", flux_column=None, fmt="auto",
                     radius_arcmin: float, flux_pivot_mjy=None, radius_max_arcmin=None,
                     section="source_mask") -> SourceList:
    """Read a point-source list (FITS, ECSV, CSV or Parquet) and give each source its disc radius.

    Positions are equatorial degrees and fluxes mJy, each converted from the unit the file gives
    the column (as for the catalogue; CSV columns have none).  With ``flux_column`` and
    ``flux_pivot_mjy`` the radius follows the flux (:func:`source_radii_arcmin`), otherwise every
    source gets ``radius_arcmin``.  A non-finite position or flux is an error naming the row.
    """
    keys = {f"{section}.ra_column": ra_column, f"{section}.dec_column": dec_column}
    units = {f"{section}.ra_column": "deg", f"{section}.dec_column": "deg"}
    if flux_column is not None:
        keys[f"{section}.flux_column"] = flux_column
        units[f"{section}.flux_column"] = "mJy"
    data = read_table_columns(path, keys, fmt=fmt, section=section, what="source list", units=units)
    ra, dec = data[ra_column], data[dec_column]
    flux = None if flux_column is None else data[flux_column]
    checks = [(ra_column, ra, np.isfinite(ra)), (dec_column, dec, np.isfinite(dec) & (np.abs(dec) <= 90.0))]
    if flux is not None:
        checks.append((flux_column, flux, np.isfinite(flux)))
    for name, values, ok in checks:
        if not ok.all():
            first = int(np.flatnonzero(~ok)[0])
            raise InputError(f"source list {path}: column '{name}' must be finite (dec within [-90, 90]); "
                             f"{int((~ok).sum())} rows are not (first: row {first}, {name}={values[first]:.6g})",
                             path=path, key=name, row=first)
    if flux is None or flux_pivot_mjy is None:
        radii = np.full(ra.size, float(radius_arcmin))
    else:
        radii = source_radii_arcmin(flux, radius_arcmin, flux_pivot_mjy, radius_max_arcmin=radius_max_arcmin)
    return SourceList(np.mod(ra, 360.0), dec, radii, str(path), file_sha256(Path(path)))


def mask_sources(skymap: SkyMap, sources: SourceList) -> SkyMap:
    """``skymap`` with weight 0 on every pixel whose centre lies within a source's disc."""
    if not len(sources):
        return skymap
    lon, lat = skymap.from_equatorial(sources.ra, sources.dec)
    support = skymap.aperture_support(lon, lat, sources.radius_arcmin)
    _, inside = support.values_on(skymap)
    weight = np.where(inside > 0, np.float32(0.0), skymap.weight).astype(skymap.weight.dtype)
    return skymap.with_values(skymap.values, weight=weight)


def near_sources(ra_deg, dec_deg, reach_arcmin, sources: SourceList) -> np.ndarray:
    """Whether each position lies closer to a source than the source's radius plus its own ``reach``.

    Parameters
    ----------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    reach_arcmin : float or ndarray of shape (n,), arcmin
        How far each tracer's aperture reaches (its outer annulus radius).
    sources : SourceList

    Returns
    -------
    ndarray of shape (n,), bool
    """
    from scipy.spatial import cKDTree

    n = np.size(ra_deg)
    if not len(sources) or n == 0:
        return np.zeros(n, dtype=bool)
    reach = np.broadcast_to(np.asarray(reach_arcmin, dtype=float), (n,))
    tracers = unit_vectors(ra_deg, dec_deg)
    src = unit_vectors(sources.ra, sources.dec)
    limit_rad = np.radians((reach + sources.radius_arcmin.max()) / 60.0)
    chord = 2.0 * np.sin(np.minimum(limit_rad, np.pi) / 2.0)
    candidates = cKDTree(src).query_ball_point(tracers, chord)
    lengths = np.fromiter((len(c) for c in candidates), dtype=np.int64, count=n)
    if not lengths.any():
        return np.zeros(n, dtype=bool)
    t_idx = np.repeat(np.arange(n), lengths)
    s_idx = np.concatenate([np.asarray(c, dtype=np.int64) for c in candidates if c])
    cos_sep = np.clip(np.einsum("ij,ij->i", tracers[t_idx], src[s_idx]), -1.0, 1.0)
    touches = np.degrees(np.arccos(cos_sep)) * 60.0 < reach[t_idx] + sources.radius_arcmin[s_idx]
    out = np.zeros(n, dtype=bool)
    out[t_idx[touches]] = True
    return out


def source_exclusion(sources: SourceList | None, reach_arcmin: float):
    """The ``exclude`` test of :func:`pairvel.maps.photometry.measure_random_apertures` that refuses random
    apertures as :func:`screen_apertures` refuses tracers: those reaching within a source's disc, the reach
    ``reach_arcmin`` (the outer annulus radius of the largest aperture) times each position's radius
    scale.  None without sources."""
    if sources is None or not len(sources):
        return None

    def near(ra_deg, dec_deg, scale):
        return near_sources(ra_deg, dec_deg, float(reach_arcmin) * np.asarray(scale, dtype=float), sources)

    return near


def clip_outliers(temperatures, threshold_sigma: float) -> tuple[np.ndarray, dict]:
    """Which tracers to keep: |T - median| <= k 1.4826 MAD at every radius (one pass; a radius whose MAD is 0
    clips nothing).

    Parameters
    ----------
    temperatures : ndarray of shape (n_radii, n), uK
        Aperture temperatures before the redshift-trend removal.
    threshold_sigma : float
        k, in robust sigma.

    Returns
    -------
    keep : ndarray of shape (n,), bool
    info : dict
        ``threshold_sigma`` and ``clipped`` (how many tracers are dropped); no temperatures, so that
        nothing here scales with a blinding factor.
    """
    t = np.atleast_2d(np.asarray(temperatures, dtype=np.float64))
    if not (np.isfinite(threshold_sigma) and threshold_sigma > 0):
        raise ValueError(f"threshold_sigma must be a positive number; got {threshold_sigma!r}")
    median = np.median(t, axis=1, keepdims=True)
    sigma = MAD_TO_SIGMA * np.median(np.abs(t - median), axis=1, keepdims=True)
    keep = np.all((np.abs(t - median) <= threshold_sigma * sigma) | (sigma == 0), axis=0)  # MAD 0: no scale, no clip
    return keep, {"threshold_sigma": float(threshold_sigma), "clipped": int((~keep).sum())}


def screen_apertures(ra_deg, dec_deg, temperatures, usable, drop_reason, *, reach_arcmin, sources=None,
                     clip_sigma=None, masked_reason=MASKED) -> tuple[np.ndarray, np.ndarray, dict]:
    """After the photometry: drop the tracers near a masked source, then clip the outliers of the rest.

    Parameters
    ----------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    temperatures : ndarray of shape (n_radii, n), uK
        Aperture temperatures (meaningful where ``usable``).
    usable : ndarray of shape (n,), bool
        The photometry's verdict.
    drop_reason : ndarray of shape (n,), str
        The photometry's reasons ("" where usable).
    reach_arcmin : float or ndarray of shape (n,), arcmin
        Outer annulus radius of each tracer at its largest radius.
    sources : SourceList, optional
    clip_sigma : float, optional
        Threshold of :func:`clip_outliers` (None: no clipping).
    masked_reason : str
        The photometry's reason for a too-masked aperture: a tracer near a source that the
        photometry dropped for it is counted as near a source instead.

    Returns
    -------
    usable : ndarray of shape (n,), bool
    reason : ndarray of shape (n,), str
        :data:`NEAR_SOURCE` or :data:`CLIPPED` for the tracers dropped here, else as given.
    info : dict
        ``near_point_source`` (count), and with clipping ``outlier_clip_sigma`` and ``outliers_clipped``.
    """
    usable = np.asarray(usable, dtype=bool).copy()
    reason = np.asarray(drop_reason, dtype=object).copy()
    info = {}
    if sources is not None:
        near = near_sources(ra_deg, dec_deg, reach_arcmin, sources) & (usable | (reason == masked_reason))
        reason[near] = NEAR_SOURCE
        usable &= ~near
        info["near_point_source"] = int(near.sum())
    if clip_sigma is not None:
        idx = np.flatnonzero(usable)
        keep, clip = clip_outliers(np.asarray(temperatures)[:, idx], clip_sigma) if idx.size else \
            (np.ones(0, bool), {"threshold_sigma": float(clip_sigma), "clipped": 0})
        reason[idx[~keep]] = CLIPPED
        usable[idx[~keep]] = False
        info["outlier_clip_sigma"], info["outliers_clipped"] = clip["threshold_sigma"], clip["clipped"]
    return usable, reason.astype(str), info
