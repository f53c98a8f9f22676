"""Benchmark k-means jackknife regions fitted on a coordinate-hash subsample against a fit on all tracers.

Part 1 (``--n``): points uniform over a quarter sky; the time of both ways, the scatter of region
sizes (tracers per region, std / mean) and, for scale, how far two all-tracer fits with different
seeds disagree (fraction of tracers whose region differs after matching regions by nearest
centre) against how far the subsample fit is from the all-tracer fit of the same seed.

Part 2 (``--demo``): the whole pipeline on the demo config with ``extra_region_seeds`` more region
seeds, once with regions fitted on all tracers in row order (as before) and once as now (the demo's
30,600 tracers are fewer than ``FIT_MIN``: all of them, in the order of their coordinate hash); prints each way's
jackknife tau_mean error per seed, their mean and their scatter over seeds (the noise the change
must stay within).

Usage::

    python benchmarks/bench_regions.py --n 1e6 --regions 50
    python benchmarks/bench_regions.py --n 0 --demo --seeds 5
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from readme_demo_variants import demo_run

import pairvel.stats.covariance as covariance
from pairvel.core.sphere import unit_vectors


def all_tracers(fn):
    """Run ``fn`` with the k-means fit on every tracer in row order (the former behaviour)."""
    saved = covariance.fit_subsample
    covariance.fit_subsample = lambda ra, dec, size: np.arange(np.size(ra))
    try:
        return fn()
    finally:
        covariance.fit_subsample = saved


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def mismatch(ra, dec, a, b):
    """Fraction of tracers whose region differs, regions of b matched to those of a by nearest centre."""
    vec = unit_vectors(ra, dec)
    n = int(a.max()) + 1
    ca = np.array([vec[a == k].mean(axis=0) for k in range(n)])
    cb = np.array([vec[b == k].mean(axis=0) for k in range(n)])
    match = np.argmax(cb @ ca.T, axis=1)             # region of a nearest to each region of b
    return float(np.mean(match[b] != a))


def scatter(labels):
    counts = np.bincount(labels)
    return counts.std() / counts.mean()


def sky_part(n, n_regions):
    rng = np.random.default_rng(11)
    ra = rng.uniform(0.0, 180.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(0.0, 1.0, n)))
    covariance.kmeans_regions(ra[:5000], dec[:5000], n_regions, seed=1)        # imports, warm-up
    t_all, full = timed(lambda: all_tracers(lambda: covariance.kmeans_regions(ra, dec, n_regions, seed=1)))
    t_sub, sub = timed(lambda: covariance.kmeans_regions(ra, dec, n_regions, seed=1))
    other = all_tracers(lambda: covariance.kmeans_regions(ra, dec, n_regions, seed=2))
    fit = max(covariance.FIT_PER_REGION * n_regions, covariance.FIT_MIN)
    print(f"{n:,} points over a quarter sky, {n_regions} regions; subsample {min(fit, n):,} tracers")
    print(f"  fit on all tracers : {t_all:7.2f} s, region sizes scatter {scatter(full):.3f}")
    print(f"  fit on subsample   : {t_sub:7.2f} s, region sizes scatter {scatter(sub):.3f}  "
          f"({t_all / t_sub:.1f}x faster)")
    print(f"  tracers in another region: subsample vs all {mismatch(ra, dec, full, sub):.3f}; "
          f"all-tracer fits, seed 1 vs seed 2 {mismatch(ra, dec, full, other):.3f}")


def demo_part(seeds):
    def errors():
        result, seconds = demo_run(covariance={"extra_region_seeds": seeds})
        return np.array(result.extra["region_seed_spread"]["tau_error"]), seconds

    e_all, t_all = all_tracers(errors)
    e_sub, t_sub = errors()
    print(f"demo, jackknife error of tau_mean over {e_all.size} region seeds (run's own + {seeds}):")
    for name, e, t in (("all tracers", e_all, t_all), ("subsample", e_sub, t_sub)):
        print(f"  {name:11s}: " + " ".join(f"{v:.3e}" for v in e)
              + f"; mean {e.mean():.3e}, scatter over seeds {e.std(ddof=1):.3e} (run {t:.1f} s)")
    noise = np.hypot(e_all.std(ddof=1), e_sub.std(ddof=1)) / np.sqrt(e_all.size)
    print(f"  mean changes by {e_sub.mean() - e_all.mean():+.3e}; noise of that difference {noise:.3e}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=float, default=1e6, help="points of part 1 (0: skip it)")
    parser.add_argument("--regions", type=int, default=50)
    parser.add_argument("--demo", action="store_true", help="also run part 2 on the demo")
    parser.add_argument("--seeds", type=int, default=5, help="extra region seeds of part 2")
    args = parser.parse_args(argv)
    if args.n:
        sky_part(int(args.n), args.regions)
    if args.demo:
        demo_part(args.seeds)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
