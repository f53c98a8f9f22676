"""Benchmark the covariance and null-test paths at the issue's scale.

A. ``--null-sets`` shuffled null realisations of a ``--n``-tracer measurement: one many-set pair
   pass (data + all null sets, with jackknife regions), then chi2/PTE of every realisation.
   Sets go through the engine in chunks of ``--chunk`` to bound memory.
B. ``--sims`` simulated maps at ``--nside`` for the same tracers: Gaussian CMB (shipped C_l) with a
   Gaussian beam + white noise, synthesised only at the aperture pixels, aperture photometry, then
   one many-set pair pass over all simulated sets.

Targets (issue): A with 1000 sets for 1e5 tracers in < 5 min; B with 100 maps at nside 2048 for
1e5 tracers in < 20 min.  Run smaller counts and the script prints the per-set cost and the
linear extrapolation to the target counts (the pair pass and photometry scale linearly in sets).

Usage::

    python benchmarks/bench_covariance.py --n 1e5 --null-sets 1000 --sims 100
    python benchmarks/bench_covariance.py --n 1e5 --null-sets 100 --sims 3     # then extrapolate
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from pairvel.maps.healpix import HealpixMap
from pairvel.model.cmb import load_cmb_cl
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import comoving_positions
from pairvel.stats.covariance import kmeans_regions
from pairvel.stats.nulltests import evaluate_null, shuffled_sets
from pairvel.stats.simcov import simulate_aperture_temperatures


def catalogue(n, seed=1):
    """``n`` tracers uniform over RA 0-90, Dec -20..40 (about 5000 deg^2), z uniform in 0.1-0.6."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0, 90, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-20)), np.sin(np.radians(40)), n)))
    z = rng.uniform(0.1, 0.6, n)
    return ra, dec, z, rng


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=float, default=1e5)
    ap.add_argument("--null-sets", type=int, default=1000)
    ap.add_argument("--chunk", type=int, default=1000)
    ap.add_argument("--sims", type=int, default=100)
    ap.add_argument("--nside", type=int, default=2048)
    ap.add_argument("--radius-arcmin", type=float, default=2.1)
    ap.add_argument("--regions", type=int, default=50)
    ap.add_argument("--threads", type=int, default=2)
    a = ap.parse_args(argv)
    n = int(a.n)
    ra, dec, z, rng = catalogue(n)
    pos = comoving_positions(ra, dec, z)
    edges = np.arange(0.0, 301.0, 20.0)
    regions = kmeans_regions(ra, dec, a.regions, seed=2)
    temps = rng.normal(0, 50, n)

    if a.null_sets:
        t0 = time.perf_counter()
        sets = shuffled_sets(temps, z, a.null_sets, rng=rng)
        t_shuffle = time.perf_counter() - t0
        t0 = time.perf_counter()
        p_parts, jk_parts = [], []
        for c0 in range(0, a.null_sets, a.chunk):
            block = np.vstack([temps[None, :], sets[c0:c0 + a.chunk]]) if c0 == 0 else sets[c0:c0 + a.chunk]
            pr = pairwise_momentum(pos, block, edges, regions=regions, n_threads=a.threads)
            p_parts.append(pr.p)
            jk_parts.append(pr.p_jk)
        t_pass = time.perf_counter() - t0
        p, p_jk = np.vstack(p_parts)[1:], np.concatenate(jk_parts)[1:]
        t0 = time.perf_counter()
        res = evaluate_null("shuffled", p, threshold=0.01)  # against the realisations' own scatter
        t_eval = time.perf_counter() - t0
        total = t_shuffle + t_pass + t_eval
        per = total / a.null_sets
        print(f"A. {a.null_sets} null sets, {n:.0e} tracers, {edges.size - 1} bins, {a.regions} regions: "
              f"shuffle {t_shuffle:.1f} s, pair pass {t_pass:.1f} s, chi2 {t_eval:.1f} s, total {total:.1f} s "
              f"({per:.3f} s/set; 1000 sets -> {1000 * per / 60:.1f} min, target 5 min); "
              f"median PTE {np.median(res.pte):.2f}")

    if a.sims:
        cl = load_cmb_cl()[1]
        t0 = time.perf_counter()
        grid = HealpixMap(a.nside, False, np.zeros(0, np.int64), np.zeros(0))  # the grid alone, no pixel held
        npix = grid.aperture_support(ra, dec, np.sqrt(2.0) * a.radius_arcmin).values.size
        t_pix = time.perf_counter() - t0
        t0 = time.perf_counter()
        sims = simulate_aperture_temperatures(a.nside, ra, dec, a.radius_arcmin, a.sims, seed=3, cmb_cl=cl,
                                              beam_fwhm_arcmin=1.4, white_noise_uk_arcmin=15.0, n_threads=a.threads)
        t_sim = time.perf_counter() - t0
        sims = np.where(np.isfinite(sims), sims, 0.0)
        t0 = time.perf_counter()
        pairwise_momentum(pos, sims, edges, n_threads=a.threads)
        t_pass = time.perf_counter() - t0
        per = (t_sim + t_pass) / a.sims
        print(f"B. {a.sims} simulated maps at nside {a.nside}, {n:.0e} tracers, {npix:,} aperture pixels "
              f"(lmax {3 * a.nside - 1}): pixel list {t_pix:.1f} s, synthesis+photometry {t_sim:.1f} s, "
              f"pair pass {t_pass:.1f} s ({per:.2f} s/map; 100 maps -> {(t_pix + 100 * per) / 60:.1f} min, "
              f"target 20 min)")


if __name__ == "__main__":
    main()
