"""Benchmark many temperature sets in one pass: M sets against one set, direct and linear paths,
and the cost model that picks between them (``method="auto"``, pairvel/pairs/pathcost.py).

Two geometries, each with 50 k-means jackknife regions on the sky as the pipeline makes them:

- ``sparse``: uniform in a 1000-2000 Mpc shell over a quarter sky (bench_pairs.py), r_max 150 Mpc,
  30 bins, 1e5 points;
- ``demo``: the demo catalogue's tracers (demo_data/, its redshift cuts 0.15-0.55), r_max 300 Mpc,
  15 bins (the pipeline defaults).

For every M of the sweep both paths are timed in the same run, with the model's prediction and
pick beside them.  ``--calibrate`` also times the shared pass alone and fits the model's constants
(least squares over both geometries) for pathcost.py.  With ``--sets`` the sparse geometry also
times M sets on the linear path against one set.

Usage::

    python benchmarks/bench_many_sets.py --geometry both --sweep 1,16,84,200
    python benchmarks/bench_many_sets.py --geometry both --calibrate
    python benchmarks/bench_many_sets.py --geometry sparse --n 1e5 --sets 1000
"""

from __future__ import annotations

import argparse
import pathlib
import resource
import time

import numpy as np
from bench_pairs import shell_quarter_sky

from pairvel.pairs import _kernels
from pairvel.pairs.estimator import _prepare, pairwise_momentum, pass_sums
from pairvel.pairs.pathcost import estimate_pairs, path_costs
from pairvel.stats.covariance import kmeans_regions


def best_time(fn, repeat):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def demo_catalogue(n=None, *, seed=2):
    """The demo catalogue's tracers with 0.15 <= z <= 0.55 (its config's cuts), comoving Mpc."""
    from astropy.table import Table

    from pairvel.pairs.geometry import comoving_positions

    path = pathlib.Path(__file__).resolve().parents[1] / "demo_data" / "larkspur_clusters.fits"
    t = Table.read(path)
    keep = (t["z"] >= 0.15) & (t["z"] <= 0.55)
    pos = comoving_positions(np.asarray(t["ra"][keep]), np.asarray(t["dec"][keep]), np.asarray(t["z"][keep]))
    return pos, np.random.default_rng(seed)


GEOMETRIES = {"sparse": (shell_quarter_sky, 1e5, 150.0, 30), "demo": (demo_catalogue, None, 300.0, 15)}


def setting(name, n, n_regions):
    make, n_default, r_max, nbins = GEOMETRIES[name]
    pos, rng = make(int(n or n_default) if n_default else None)
    ra = np.degrees(np.arctan2(pos[:, 1], pos[:, 0]))
    dec = np.degrees(np.arcsin(pos[:, 2] / np.linalg.norm(pos, axis=1)))
    regions = kmeans_regions(ra, dec, n_regions, seed=1)      # compact sky regions, as the pipeline uses
    return pos, rng, regions, np.linspace(0.0, r_max, nbins + 1)


def geometry_counts(pos, regions, edges):
    """(estimated pairs, sparse rows) as the model sees them before the pass."""
    order, start, dims, rows, _, _ = _prepare(pos, edges[-1])
    n_sub = int(rows[-1, 3])
    full = _kernels.all_rows(n_sub)
    n_jk = int(regions.max()) + 1
    _, row_reg = _kernels.object_rows(regions[order].astype(np.int64), start, dims, full, n_jk)
    return estimate_pairs(pos, start, dims, n_sub, edges[-1]), int(row_reg.size)


def sweep(name, args):
    pos, rng, regions, edges = setting(name, args.n if name == "sparse" else None, args.regions)
    n, nbins, n_jk = pos.shape[0], edges.size - 1, args.regions
    ms = [int(v) for v in args.sweep.split(",")]
    temps = rng.normal(0.0, 50.0, (max(ms), n))
    for method in ("direct", "linear"):                                 # compile
        pairwise_momentum(pos[:2000], temps[:2, :2000], edges, regions=regions[:2000], method=method)
    est_pairs, n_rows = geometry_counts(pos, regions, edges)
    one = pairwise_momentum(pos, temps[0], edges, regions=regions, method="direct")
    pairs = float(one.pair_counts.sum())
    print(f"{name}: {n:,} points, r_max {edges[-1]:.0f} Mpc, {nbins} bins, {n_jk} regions; "
          f"{pairs:,.0f} pairs (model's estimate {est_pairs:,.0f}, {est_pairs / pairs:.2f}x), "
          f"{n_rows / n:.2f} sparse rows per object")
    z = np.zeros(n)
    t_shared, _ = best_time(lambda: pass_sums(pos, np.empty((0, n)), regions.astype(np.int64), z, edges, n_jk,
                                              False, method="direct"), args.repeat)
    print(f"  shared pass alone (no sets): {t_shared:.3f} s")
    rows = []
    for m in ms:
        td, a = best_time(lambda m=m: pairwise_momentum(pos, temps[:m], edges, regions=regions, method="direct"),
                          args.repeat)
        tl, b = best_time(lambda m=m: pairwise_momentum(pos, temps[:m], edges, regions=regions, method="linear"),
                          args.repeat)
        if not np.array_equal(a.pair_counts, b.pair_counts):
            raise RuntimeError("the two paths disagree in pair counts")
        model = path_costs(n, m, nbins, n_jk, est_pairs, n_rows)
        faster = "linear" if tl < td else "direct"
        print(f"  M = {m:4d}: direct {td:7.3f} s, linear {tl:7.3f} s (linear/direct {tl / td:4.2f}); "
              f"model: direct +{model.direct_s:6.3f} s, linear +{model.linear_s:6.3f} s -> picks {model.best}"
              f" ({'right' if model.best == faster else 'WRONG'}: {faster} is faster)")
        rows.append((m, pairs, n + n_rows, nbins, n_jk, td - t_shared, tl - t_shared))
    return rows


def calibrate(rows):
    """Least-squares constants of pathcost.py from (M, pairs, rows, bins, n_jk, direct extra, linear extra)."""
    r = np.array(rows, dtype=float)
    m, pairs, obj_rows, nbins, n_jk, d_extra, l_extra = r.T
    x_direct = pairs * m * np.where(n_jk > 0, 2, 1)
    pair_set = float(np.sum(x_direct * d_extra) / np.sum(x_direct**2))
    design = np.column_stack([pairs, obj_rows * nbins * m])
    (pair_object, row_set), *_ = np.linalg.lstsq(design, l_extra, rcond=None)
    print(f"fitted: PAIR_SET_S = {pair_set:.2e}, PAIR_OBJECT_S = {pair_object:.2e}, ROW_SET_S = {row_set:.2e}")


def many_sets(args):
    pos, rng, regions, edges = setting("sparse", args.n, args.regions)
    temps = rng.normal(0.0, 50.0, (args.sets, pos.shape[0]))
    t_one, one = best_time(lambda: pairwise_momentum(pos, temps[0], edges, regions=regions), args.repeat)
    t_many, many = best_time(lambda: pairwise_momentum(pos, temps, edges, regions=regions, method="linear"),
                             args.repeat)
    check = pairwise_momentum(pos, temps[:3], edges, regions=regions, method="direct")
    diff = np.max(np.abs(many.p[:3] - check.p) / np.abs(check.p))
    print(f"one set: {t_one:.3f} s; M = {args.sets} sets (linear path): {t_many:.3f} s = {t_many / t_one:.1f}x "
          f"one set (repeated passes: {args.sets}x); p_jk shape {many.p_jk.shape}")
    print(f"max relative difference of p, linear vs direct (first 3 sets): {diff:.1e}")


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--geometry", choices=("sparse", "demo", "both"), default="both")
    parser.add_argument("--n", type=float, default=1e5, help="points of the sparse geometry (default 1e5)")
    parser.add_argument("--sets", type=int, default=0, help="also time this many sets against one (sparse)")
    parser.add_argument("--regions", type=int, default=50, help="jackknife regions (default 50)")
    parser.add_argument("--repeat", type=int, default=2, help="timed repeats; best is shown")
    parser.add_argument("--sweep", default="1,16,84,200", help="M values timed on both paths")
    parser.add_argument("--calibrate", action="store_true", help="fit the cost model's constants")
    args = parser.parse_args(argv)
    names = ("demo", "sparse") if args.geometry == "both" else (args.geometry,)
    rows = [row for name in names for row in sweep(name, args)]
    if args.calibrate:
        calibrate(rows)
    if args.sets:
        many_sets(args)
    print(f"peak RSS of the process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
