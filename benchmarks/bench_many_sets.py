"""Benchmark many temperature sets in one pass: M sets against one set, direct and linear paths.

Same geometry as bench_pairs.py (uniform in a 1000-2000 Mpc shell over a quarter sky, r_max =
150 Mpc, 30 bins), with k-means jackknife regions on the sky as the pipeline makes them.  The
target: M = 1000 sets at N = 1e5 cost at most 10x one set (repeated passes would cost 1000x).
The sweep over smaller M shows where the linear path overtakes the direct one
(``LINEAR_MIN_SETS`` in pairvel/estimator.py).

Usage::

    python benchmarks/bench_many_sets.py --n 1e5 --sets 1000 --regions 50
"""

from __future__ import annotations

import argparse
import resource
import time

import numpy as np
from bench_pairs import shell_quarter_sky

from pairvel.pairs.estimator import LINEAR_MIN_SETS, pairwise_momentum
from pairvel.stats.covariance import kmeans_regions


def best_time(fn, repeat):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=float, default=1e5, help="number of points (default 1e5)")
    parser.add_argument("--sets", type=int, default=1000, help="temperature sets M (default 1000)")
    parser.add_argument("--regions", type=int, default=50, help="jackknife regions (default 50)")
    parser.add_argument("--repeat", type=int, default=2, help="timed repeats; best is shown")
    parser.add_argument("--sweep", default="1,2,4,8,16,32", help="small M values timed on both paths")
    args = parser.parse_args(argv)

    n = int(args.n)
    edges = np.linspace(0.0, 150.0, 31)
    pos, rng = shell_quarter_sky(n)
    ra = np.degrees(np.arctan2(pos[:, 1], pos[:, 0]))
    dec = np.degrees(np.arcsin(pos[:, 2] / np.linalg.norm(pos, axis=1)))
    regions = kmeans_regions(ra, dec, args.regions, seed=1)      # compact sky regions, as the pipeline uses
    temps = rng.normal(0.0, 50.0, (args.sets, n))
    print(f"points: {n:,} in a 1000-2000 Mpc shell over a quarter sky; r_max 150 Mpc, 30 bins, "
          f"{args.regions} jackknife regions")
    pairwise_momentum(pos[:2000], temps[:2, :2000], edges, regions=regions[:2000], method="direct")   # compile
    pairwise_momentum(pos[:2000], temps[:2, :2000], edges, regions=regions[:2000], method="linear")

    t_one, one = best_time(lambda: pairwise_momentum(pos, temps[0], edges, regions=regions), args.repeat)
    print(f"one set (direct path)        : {t_one:.3f} s, {int(one.pair_counts.sum()):,} pairs")
    print(f"sweep (auto takes the linear path from M = {LINEAR_MIN_SETS}):")
    for m in (int(v) for v in args.sweep.split(",")):
        td, _ = best_time(lambda m=m: pairwise_momentum(pos, temps[:m], edges, regions=regions, method="direct"),
                          args.repeat)
        tl, _ = best_time(lambda m=m: pairwise_momentum(pos, temps[:m], edges, regions=regions, method="linear"),
                          args.repeat)
        print(f"  M = {m:4d}: direct {td:7.3f} s ({td / t_one:5.1f}x one set)   linear {tl:7.3f} s "
              f"({tl / t_one:5.1f}x one set)")
    t_many, many = best_time(lambda: pairwise_momentum(pos, temps, edges, regions=regions, method="linear"),
                             args.repeat)
    check = pairwise_momentum(pos, temps[:3], edges, regions=regions, method="direct")
    diff = np.max(np.abs(many.p[:3] - check.p) / np.abs(check.p))
    print(f"M = {args.sets} sets (linear path): {t_many:.3f} s = {t_many / t_one:.1f}x one set "
          f"(repeated passes: {args.sets}x); p_jk shape {many.p_jk.shape}")
    print(f"max relative difference of p, linear vs direct (first 3 sets): {diff:.1e}")
    print(f"peak RSS of the process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
