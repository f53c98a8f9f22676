"""Jackknife regions on the sky and the delete-one jackknife covariance."""

from __future__ import annotations

__all__ = ["kmeans_regions", "healpix_regions", "jackknife_covariance"]

import numpy as np

from ._rng import as_generator
from .errors import InputError
from .geometry import unit_vectors


def kmeans_regions(ra_deg, dec_deg, n_regions=50, *, seed=None) -> np.ndarray:
    """Split tracers into ``n_regions`` compact sky regions by k-means on unit vectors.

    Parameters
    ----------
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    n_regions : int, default 50
    seed : None, int or numpy Generator

    Returns
    -------
    ndarray of shape (N,), int64
        Labels 0..n_regions-1, every label used, numbered by increasing mean RA of the region.
    """
    from sklearn.cluster import KMeans

    ra = np.asarray(ra_deg, dtype=float)
    n = ra.size
    if not (2 <= int(n_regions) <= n):
        raise InputError(f"number of jackknife regions must be between 2 and the {n} tracers; got {n_regions}")
    rng = as_generator(seed)
    vec = unit_vectors(ra, dec_deg)
    km = KMeans(n_clusters=int(n_regions), n_init=3, random_state=int(rng.integers(2**31 - 1)))
    labels = km.fit_predict(vec)
    used = np.unique(labels)
    if used.size != n_regions:
        raise InputError(f"k-means found only {used.size} distinct regions of the {n_regions} asked; "
                         f"reduce covariance.n_regions")
    # stable numbering: regions ordered by the longitude of their centre
    centre_lon = np.arctan2(km.cluster_centers_[:, 1], km.cluster_centers_[:, 0])
    rank = np.empty(n_regions, dtype=np.int64)
    rank[np.argsort(centre_lon, kind="stable")] = np.arange(n_regions)
    return rank[labels]


def healpix_regions(ra_deg, dec_deg, nside: int, *, min_tracers: int = 1) -> np.ndarray:
    """Jackknife regions from HEALPix pixels of resolution ``nside`` (RING), numbered 0..n-1.

    Pixels holding fewer than ``min_tracers`` tracers are merged into the neighbouring occupied
    pixel with the nearest centre, so no region is nearly empty.

    Returns
    -------
    ndarray of shape (N,), int64
    """
    import healpy as hp

    if nside < 1 or nside & (nside - 1):
        raise InputError(f"covariance.healpix_nside must be a power of 2; got {nside}")
    pix = hp.ang2pix(nside, np.asarray(ra_deg, dtype=float), np.asarray(dec_deg, dtype=float), lonlat=True)
    occupied, counts = np.unique(pix, return_counts=True)
    big = occupied[counts >= min_tracers]
    if big.size < 2:
        raise InputError(f"only {big.size} HEALPix pixels at nside {nside} hold >= {min_tracers} tracers; "
                         f"lower covariance.healpix_nside")
    small = occupied[counts < min_tracers]
    if small.size:
        cen_big = np.array(hp.pix2vec(nside, big)).T
        cen_small = np.array(hp.pix2vec(nside, small)).T
        nearest = big[np.argmax(cen_small @ cen_big.T, axis=1)]
        pix = pix.copy()
        for s_pix, target in zip(small, nearest):
            pix[pix == s_pix] = target
    _, labels = np.unique(pix, return_inverse=True)
    return labels.astype(np.int64)


def jackknife_covariance(samples) -> np.ndarray:
    """Delete-one jackknife covariance C = (N-1)/N sum_k (p_k - pbar)(p_k - pbar)^T.

    Parameters
    ----------
    samples : ndarray of shape (n_jk, nbins) or (M, n_jk, nbins)

    Returns
    -------
    ndarray of shape (nbins, nbins) or (M, nbins, nbins)

    References
    ----------
    Norberg, Baugh, Gaztanaga & Croton 2009, MNRAS 396, 19.
    """
    s = np.asarray(samples, dtype=float)
    if s.ndim not in (2, 3) or s.shape[-2] < 2:
        raise InputError(f"jackknife samples must have shape (n_jk >= 2, nbins) or (M, n_jk, nbins); got {s.shape}")
    if not np.all(np.isfinite(s)):
        bins = np.flatnonzero(~np.all(np.isfinite(s.reshape(-1, s.shape[-1])), axis=0)).tolist()
        raise InputError(f"jackknife samples must be finite; bins {bins} are not (empty bins?)")
    n = s.shape[-2]
    dev = s - s.mean(axis=-2, keepdims=True)
    return (n - 1) / n * np.einsum("...ki,...kj->...ij", dev, dev)
