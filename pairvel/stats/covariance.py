"""Sky regions and the covariance of the pair estimator: delete-one jackknife and region bootstrap."""

from __future__ import annotations

__all__ = ["kmeans_regions", "healpix_regions", "jackknife_covariance", "region_half_sums", "bootstrap_samples",
           "bootstrap_covariance", "tracer_split_samples"]

import numpy as np

from ..core.errors import InputError
from ..core.rng import as_generator
from ..core.sphere import unit_vectors


# k-means is fitted on at most max(FIT_PER_REGION x n_regions, FIT_MIN) tracers and every tracer
# labelled by its nearest centre.  A centre is the mean of its region's fitted points: with the
# 2000 per region of 1e5 tracers and 50 regions it sits within ~1/sqrt(2000) = 2% of the region's
# rms radius of the all-tracer centre, well inside the spread between k-means seeds, and never fewer
# than 200 per region.  A fit on 2e4 tracers (400 per region) gave visibly less even regions (size
# scatter 0.09 against 0.06) and on the demo a jackknife error of tau_mean 8% higher, 1.7x its
# spread over seeds (benchmarks/bench_regions.py, 2026-12-05); below 1e5 tracers all are fitted.
FIT_PER_REGION = 200
FIT_MIN = 100000


def _coordinate_hash(ra, dec) -> np.ndarray:
    """A 64-bit mix (splitmix64 finaliser) of each tracer's own float64 RA and Dec bits: a
    pseudo-random key that does not depend on the row a tracer sits in."""
    with np.errstate(over="ignore"):
        h = np.ascontiguousarray(ra, dtype=np.float64).view(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
        h ^= np.ascontiguousarray(dec, dtype=np.float64).view(np.uint64)
        for shift, mult in ((30, 0xBF58476D1CE4E5B9), (27, 0x94D049BB133111EB)):
            h ^= h >> np.uint64(shift)
            h *= np.uint64(mult)
        h ^= h >> np.uint64(31)
    return h


def fit_subsample(ra, dec, size: int) -> np.ndarray:
    """Indices of ``size`` tracers chosen by the hash of their coordinates, in hash order (ties by
    RA, Dec): the same tracers in the same order for any order of the rows."""
    key = _coordinate_hash(ra, dec)
    pick = np.argpartition(key, size - 1)[:size] if size < key.size else np.arange(key.size)
    return pick[np.lexsort((dec[pick], ra[pick], key[pick]))]


def kmeans_regions(ra_deg, dec_deg, n_regions=50, *, seed=None) -> np.ndarray:
    """Split tracers into ``n_regions`` compact sky regions by k-means on unit vectors.

    The centres are fitted on a subsample of at most max(``FIT_PER_REGION`` x n_regions,
    ``FIT_MIN``) tracers chosen by a hash of their own coordinates (:func:`fit_subsample`), and
    every tracer takes the region of its nearest centre; the labels do not depend on the order of
    the rows.

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
    dec = np.asarray(dec_deg, dtype=float)
    n = ra.size
    if not (2 <= int(n_regions) <= n):
        raise InputError(f"number of jackknife regions must be between 2 and the {n} tracers; got {n_regions}")
    rng = as_generator(seed)
    fit = fit_subsample(ra, dec, max(FIT_PER_REGION * int(n_regions), FIT_MIN))
    km = KMeans(n_clusters=int(n_regions), n_init=3, random_state=int(rng.integers(2**31 - 1)))
    km.fit(unit_vectors(ra[fit], dec[fit]))
    labels = km.predict(unit_vectors(ra, dec))
    used = np.unique(labels)
    if used.size != n_regions:
        raise InputError(f"k-means found only {used.size} distinct regions of the {n_regions} asked; "
                         f"reduce covariance.n_regions")
    # stable numbering: regions ordered by the longitude of their centre
    centre_lon = np.arctan2(km.cluster_centers_[:, 1], km.cluster_centers_[:, 0])
    rank = np.empty(n_regions, dtype=np.int64)
    rank[np.argsort(centre_lon, kind="stable")] = np.arange(n_regions)
    return rank[labels].astype(np.int64)


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


def tracer_split_samples(numerators, denominator, den_jk) -> np.ndarray:
    """Jackknife samples that delete region k's tracers, not every pair touching region k.

    The numerator is a sum over tracers, sum_i T_i W_i with W_i = sum_{j != i} c_ij over all partners
    (see :func:`region_half_sums`), so sample k keeps every other tracer's full term, partners in
    region k included: it is the numerator of the temperatures set to zero in region k.  Sample k's
    denominator drops region k's share of sum c^2, the pairs touching k scaled so that the shares
    of all regions add up to the whole: D_touch_k D / sum_l D_touch_l.

    Deleting every pair touching region k instead also takes the partner's term T_j c_ij of each
    pair joining k to another region, so the two ends of a cross pair leave together from two
    samples; the delete-one variance then grows with the fraction of cross pairs, that is with
    separation (on mocks 1.0-1.7 times the scatter of p(r) with 50 regions, where the tracer split
    gives 0.8-1.2; see the README's "Calibration on mocks" for what each does to tau_mean).

    Parameters
    ----------
    numerators : ndarray of shape (n_jk, nbins)
        Row k: the estimator's numerator sum (T_i - T_j) c_ij of the temperatures zeroed in region k
        (and, for the pipeline's jackknife, re-trended without region k).
    denominator : ndarray of shape (nbins,)
        sum c_ij^2 over all pairs.
    den_jk : ndarray of shape (n_jk, nbins)
        sum c_ij^2 over the pairs touching region k (:attr:`PairwiseResult.den_jk`).

    Returns
    -------
    ndarray of shape (n_jk, nbins), nan where a sample has no pairs left.
    """
    num = np.asarray(numerators, dtype=float)
    den = np.asarray(denominator, dtype=float)
    touch = np.asarray(den_jk, dtype=float)
    if num.ndim != 2 or touch.shape != num.shape or den.shape != num.shape[1:]:
        raise InputError(f"tracer-split jackknife needs numerators (n_jk, nbins), a denominator (nbins,) and pairs "
                         f"touching each region (n_jk, nbins); got {num.shape}, {den.shape} and {touch.shape}")
    with np.errstate(divide="ignore", invalid="ignore"):
        kept = den - touch * den / touch.sum(axis=0)
        return np.where(kept > 0, -num / np.where(kept > 0, kept, 1.0), np.nan)


def region_half_sums(positions, temperatures, edges, regions, *, weights=None, n_threads=None):
    """Split the estimator's numerator and denominator into one additive share per region.

    Numerator: the numerator is a sum over tracers, sum_{i<j} w_i w_j (T_i - T_j) c_ij =
    sum_i (T_i - Tbar) w_i W_i with W_i = sum_{j != i} w_j c_ij; region k's share is the part of
    its own tracers.  Denominator: a pair with both ends in region k belongs to k, a pair joining
    regions a and b gives half of its c^2 to each.  The shares add up exactly to the full sums,
    which is what a bootstrap over regions resamples (see :func:`bootstrap_samples`).

    Parameters
    ----------
    positions : ndarray of shape (N, 3), comoving Mpc
    temperatures : ndarray of shape (N,) or (M, N), uK
    edges : ndarray of shape (nbins + 1,), Mpc
    regions : ndarray of shape (N,), int
        Labels 0..n_reg-1.
    weights : ndarray of shape (N,), optional
        Per-tracer weights, as in :func:`pairvel.pairs.estimator.pairwise_momentum`.

    Returns
    -------
    num_k : ndarray of shape (n_reg, nbins) or (n_reg, M, nbins)
        Shares of sum (T_i - T_j) c_ij.
    den_k : ndarray of shape (n_reg, nbins)
        Shares of sum c_ij^2.

    Notes
    -----
    The numerator share of region k is the numerator of the temperature set (T - Tbar) 1[i in k],
    so all shares come from one many-set pass.  Splitting the numerator per tracer, not per pair,
    keeps the shares of different regions independent for uncorrelated temperatures: on white
    noise (2e4 tracers, 30 k-means regions, ten bins to 200 Mpc, 300 sets) the bootstrap variance
    is then 0.85-1.02 of the true scatter, where half-pair numerator shares gave 0.91 falling to
    0.27 with separation.
    Denominator: one pass gives, per region, the sums over the pairs *touching* it
    (S_touch_k = S_in_k + S_cross_k); separate passes over each region's own tracers give S_in_k;
    the half share is (S_touch_k + S_in_k) / 2.
    """
    from ..pairs.estimator import _validate, pairwise_momentum, pass_sums

    pos, temps2, single, edges, reg, n_reg, _, _, w = _validate(positions, temperatures, edges, regions, None, weights)
    if n_reg < 2:
        raise InputError(f"region shares need at least 2 regions; got labels {np.unique(reg).tolist()}")
    n = pos.shape[0]
    sums = pass_sums(pos, np.zeros((0, n)), reg, np.zeros(n), edges, n_reg, False, weights=w, n_threads=n_threads)
    touch_den = sums[5][:n_reg]                                        # (n_reg, nb)
    in_den = np.zeros_like(touch_den)
    for k in range(n_reg):
        sel = reg == k
        if sel.sum() >= 2:
            part = pairwise_momentum(pos[sel], np.zeros(int(sel.sum())), edges,
                                     weights=None if w is None else w[sel], n_threads=n_threads)
            in_den[k] = part.denominator
    den_k = 0.5 * (touch_den + in_den)
    onehot = (reg[None, :] == np.arange(n_reg)[:, None]).astype(float)   # (n_reg, N)
    centred = temps2 - temps2.mean(axis=1, keepdims=True)
    sets = (centred[:, None, :] * onehot[None, :, :]).reshape(-1, n)     # set (m, k) = T_m 1[k]
    shares = pairwise_momentum(pos, sets, edges, weights=w, n_threads=n_threads).numerator
    num_k = np.moveaxis(shares.reshape(temps2.shape[0], n_reg, -1), 1, 0)  # (n_reg, M, nb)
    return (num_k[:, 0] if single else num_k), den_k


def bootstrap_samples(num_k, den_k, n_boot: int, *, seed=None) -> np.ndarray:
    """Region-bootstrap replicates of the ratio estimator p = -sum num / sum den.

    Each replicate draws n_reg regions with replacement (multiplicities w ~ Multinomial(n_reg,
    1/n_reg)) and forms p* = -(w . num_k) / (w . den_k) from the region shares of
    :func:`region_half_sums`.

    Parameters
    ----------
    num_k : ndarray of shape (n_reg, nbins) or (n_reg, M, nbins)
    den_k : ndarray of shape (n_reg, nbins)
    n_boot : int
    seed : None, int or numpy Generator

    Returns
    -------
    ndarray of shape (n_boot, nbins) or (M, n_boot, nbins)

    Notes
    -----
    A pair joining two regions carries weight (w_a + w_b) / 2, the mean multiplicity of its ends;
    a pair inside one region carries w_k.  This keeps the statistic a sum over regions, so every
    replicate needs only a dot product of the shares, not a new pass over the pairs.
    """
    num = np.asarray(num_k, dtype=float)
    den = np.asarray(den_k, dtype=float)
    n_reg = den.shape[0]
    if n_reg < 2 or num.shape[0] != n_reg or num.shape[-1] != den.shape[-1]:
        raise InputError(f"bootstrap needs region shares of matching shape with >= 2 regions; "
                         f"got numerator {num.shape} and denominator {den.shape}")
    if int(n_boot) < 2:
        raise InputError(f"covariance.n_bootstrap must be >= 2; got {n_boot}")
    rng = as_generator(seed)
    w = rng.multinomial(n_reg, np.full(n_reg, 1.0 / n_reg), size=int(n_boot)).astype(float)  # (B, n_reg)
    d = w @ den                                                                            # (B, nb)
    n = np.tensordot(w, num, axes=(1, 0))                                                  # (B, [M,] nb)
    with np.errstate(divide="ignore", invalid="ignore"):
        if num.ndim == 2:
            return np.where(d > 0, -n / np.where(d > 0, d, 1.0), np.nan)
        out = np.where(d[:, None, :] > 0, -n / np.where(d > 0, d, 1.0)[:, None, :], np.nan)
        return np.moveaxis(out, 1, 0)


def bootstrap_covariance(samples) -> np.ndarray:
    """Sample covariance (ddof = 1) of bootstrap replicates, (n_boot, nbins) or (M, n_boot, nbins).

    References
    ----------
    Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 6.
    """
    s = np.asarray(samples, dtype=float)
    if s.ndim not in (2, 3) or s.shape[-2] < 2:
        raise InputError(f"bootstrap samples must have shape (n_boot >= 2, nbins) or (M, n_boot, nbins); "
                         f"got {s.shape}")
    if not np.all(np.isfinite(s)):
        bins = np.flatnonzero(~np.all(np.isfinite(s.reshape(-1, s.shape[-1])), axis=0)).tolist()
        raise InputError(f"bootstrap samples must be finite; bins {bins} are not (a replicate without pairs?)")
    n = s.shape[-2]
    dev = s - s.mean(axis=-2, keepdims=True)
    return np.einsum("...ki,...kj->...ij", dev, dev) / (n - 1)
