"""Aperture photometry of the same positions in each frequency map separately (no combination).

For the single-cluster velocities (:mod:`pairvel.stats.clustervel`): each map of
``[multifrequency]`` is read with the options of ``[map]``, masked with ``map.mask_path`` when its
grid matches, and measured with the compensated aperture at the tracers and at random positions of
the first map (the channel covariance).  Random positions whose annulus would reach a tracer's annulus
are left out, so that the covariance holds noise and primary CMB but not the tSZ of the catalogue's own
clusters (a few percent of random apertures would otherwise catch one, and the covariance of y would
be too large).  The maps need not share a pixel grid.  Nothing is
pre-filtered and no dipole is removed (the compensated aperture removes a gradient).
"""

from __future__ import annotations

__all__ = ["ChannelApertures", "read_channel_maps", "channel_apertures", "overlap_distance_arcmin", "has_neighbour"]

import warnings
from dataclasses import dataclass

import numpy as np

from ..core.errors import ConfigError, InputError, PairvelWarning
from ..core.sphere import unit_vectors
from .multifreq import _each_map, _read_one
from .photometry import measure_apertures, measure_random_apertures
from .skymap import read_mask


@dataclass(frozen=True, eq=False)
class ChannelApertures:
    """Aperture temperatures of n positions and m random positions in k maps.

    Attributes
    ----------
    temperatures : ndarray of shape (n, k), uK
        NaN where a position is unusable in that map.
    usable : ndarray of shape (n,), bool
        Usable in every map.
    random_temperatures : ndarray of shape (m, k), uK
        Random positions usable in every map.
    """

    temperatures: np.ndarray
    usable: np.ndarray
    random_temperatures: np.ndarray


def read_channel_maps(cfg) -> list:
    """Each map of ``multifrequency.map_paths``, read with ``[map]``'s options, masked by ``map.mask_path``."""
    mc, mf = cfg.map, cfg.multifrequency
    if not mf.map_paths:
        raise ConfigError("multifrequency.map_paths must list the frequency maps of the single-cluster velocities "
                          "(at least 2, with frequencies_ghz); got none", key="multifrequency.map_paths")
    if mf.beam_fwhm_arcmin is not None and np.ptp(mf.beam_fwhm_arcmin) > 1e-6:
        warnings.warn(f"multifrequency.beam_fwhm_arcmin differ ({list(mf.beam_fwhm_arcmin)}); the apertures keep "
                      f"different fractions of a cluster's signal in each map and the tSZ/kSZ split is biased",
                      PairvelWarning, stacklevel=2)
    maps = [_read_one(p, mc, frequency_ghz=nu, bandpass_path=band) for p, nu, band in _each_map(mf)]
    if mc.mask_path is not None:
        maps = [m.with_mask(read_mask(mc.mask_path, ordering=mc.ordering, coordsys=m.coordsys)) for m in maps]
    return maps


def channel_apertures(maps, ra_deg, dec_deg, radius_arcmin, *, n_random: int, seed, max_masked_fraction=0.1,
                      pixel_weighting="centre", method="auto", radius_scale=None) -> ChannelApertures:
    """Compensated-aperture temperatures of the positions and of random positions in every map.

    Parameters
    ----------
    maps : sequence of SkyMap
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    radius_arcmin : float, arcmin
    n_random : int
        Random positions drawn in the first map's footprint; those unusable in another map are left
        out, so fewer may be returned.
    seed : None, int or Generator
    max_masked_fraction, pixel_weighting, method, radius_scale
        As in :func:`pairvel.maps.photometry.measure_apertures`.
    """
    options = dict(max_masked_fraction=max_masked_fraction, pixel_weighting=pixel_weighting, method=method)
    ra_r, dec_r, t_first = measure_random_apertures(maps[0], n_random, radius_arcmin, seed=seed,
                                                    radius_scale=radius_scale, **options)
    free = _clear_of(ra_r, dec_r, ra_deg, dec_deg, overlap_distance_arcmin(radius_arcmin, radius_scale))
    if free.sum() < 10 * len(maps):
        raise InputError(f"only {int(free.sum())} of {ra_r.size} random apertures lie clear of every cluster's "
                         f"aperture; too few for the channel covariance of {len(maps)} maps")
    ra_r, dec_r, t_first = ra_r[free], dec_r[free], t_first[:, free]
    scale_r = None
    if radius_scale is not None:  # the random positions' scales are not returned: measure them at the median
        scale_r = np.full(ra_r.size, float(np.median(radius_scale)))
        t_first = measure_apertures(maps[0], ra_r, dec_r, radius_arcmin, radius_scale=scale_r, **options)
        t_first = np.where(t_first.usable, t_first.temperatures[0], np.nan)
    else:
        t_first = t_first[0]
    cols, rand_cols = [], [t_first]
    for i, m in enumerate(maps):
        res = measure_apertures(m, ra_deg, dec_deg, radius_arcmin, radius_scale=radius_scale, **options)
        cols.append(np.where(res.usable, res.temperatures[0], np.nan))
        if i:
            rr = measure_apertures(m, ra_r, dec_r, radius_arcmin, radius_scale=scale_r, **options)
            rand_cols.append(np.where(rr.usable, rr.temperatures[0], np.nan))
    t = np.column_stack(cols)
    t_rand = np.column_stack(rand_cols)
    return ChannelApertures(temperatures=t, usable=np.all(np.isfinite(t), axis=1),
                            random_temperatures=t_rand[np.all(np.isfinite(t_rand), axis=1)])


def overlap_distance_arcmin(radius_arcmin, radius_scale=None) -> float:
    """Separation below which two compensated apertures (annulus to sqrt(2) theta) overlap: 2 sqrt(2) theta,
    with the largest ``radius_scale``."""
    return 2.0 * np.sqrt(2.0) * radius_arcmin * (1.0 if radius_scale is None else float(np.max(radius_scale)))


def has_neighbour(ra_deg, dec_deg, distance_arcmin) -> np.ndarray:
    """Whether each position has another of the positions closer than ``distance_arcmin``."""
    from scipy.spatial import cKDTree

    u = unit_vectors(ra_deg, dec_deg)
    if len(u) < 2:
        return np.zeros(len(u), dtype=bool)
    dist, _ = cKDTree(u).query(u, k=2)
    return dist[:, 1] < 2.0 * np.sin(np.radians(distance_arcmin / 60.0) / 2.0)


def _clear_of(ra_deg, dec_deg, ra_others, dec_others, distance_arcmin) -> np.ndarray:
    """Whether each position is farther than ``distance_arcmin`` from every one of the others."""
    from scipy.spatial import cKDTree

    chord = 2.0 * np.sin(np.radians(distance_arcmin / 60.0) / 2.0)
    tree = cKDTree(unit_vectors(ra_others, dec_others))
    dist, _ = tree.query(unit_vectors(ra_deg, dec_deg), k=1)
    return dist > chord
