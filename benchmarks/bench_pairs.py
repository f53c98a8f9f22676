"""Benchmark the compiled pair engine against the baseline a user would write by hand.

Points are uniform in a comoving shell 1000-2000 Mpc over a quarter of the sky; 30 uniform bins
up to r_max = 150 Mpc.  The baseline finds the pairs with ``scipy.spatial.cKDTree.query_pairs``
(``output_type='ndarray'``) and bins the estimator terms with numpy and ``np.bincount``.  It keeps
every pair in memory, so it runs on a subsample when the pair list would be large; its rate is then
quoted per pair and the full-size time is scaled by the pair count.

With gcc present, the engine is also compared with ``cell_loop.c`` (a plain single-threaded C
cell-list loop, same arithmetic and pair counts) at the C loop's fastest cell size, interleaved
rounds, median ratios and the load average printed (see :func:`compare_with_c`).

Usage::

    python benchmarks/bench_pairs.py --n 2e5          # also builds cell_loop.c with gcc -O3 -march=native
    python benchmarks/bench_pairs.py --n 1e6 --sets 3 --regions 50 --baseline-max-pairs 0
"""

from __future__ import annotations

import argparse
import ctypes
import os
import pathlib
import resource
import shutil
import subprocess
import tempfile
import time
import tracemalloc

import numba
import numpy as np
from scipy.spatial import cKDTree

from pairvel.pairs.estimator import pairwise_momentum


def shell_quarter_sky(n, *, r_in_mpc=1000.0, r_out_mpc=2000.0, seed=1):
    """``n`` points uniform in volume in a shell over RA 0-180 deg, Dec 0-90 deg (a quarter sky)."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0.0, np.pi, n)
    sin_dec = rng.uniform(0.0, 1.0, n)
    dist = np.cbrt(rng.uniform(r_in_mpc**3, r_out_mpc**3, n))
    cos_dec = np.sqrt(1.0 - sin_dec**2)
    pos = np.column_stack([cos_dec * np.cos(ra), cos_dec * np.sin(ra), sin_dec]) * dist[:, None]
    return pos, rng


def baseline(pos, temps, edges):
    """What one would write by hand: KD-tree pair list, then numpy arithmetic and bincount."""
    tree = cKDTree(pos)
    pairs = tree.query_pairs(edges[-1], output_type="ndarray")
    i, j = pairs[:, 0], pairs[:, 1]
    d = pos[i] - pos[j]
    r = np.sqrt(np.einsum("ij,ij->i", d, d))
    u = pos / np.linalg.norm(pos, axis=1)[:, None]
    keep = (r >= edges[0]) & (r < edges[-1]) & (r > 0)
    i, j, d, r = i[keep], j[keep], d[keep], r[keep]
    c = np.einsum("ij,ij->i", d, u[i] + u[j]) / (2.0 * r)
    b = np.searchsorted(edges, r, side="right") - 1
    nbins = edges.size - 1
    num = np.bincount(b, weights=(temps[i] - temps[j]) * c, minlength=nbins)
    den = np.bincount(b, weights=c * c, minlength=nbins)
    cnt = np.bincount(b, minlength=nbins)
    return -num / den, cnt


def build_c_loop(flags, directory):
    """Compile cell_loop.c with gcc into ``directory``; a function running it, or None without gcc.

    The function takes (pos, temps, edges, n_sub) and returns (seconds, p, pair counts).
    """
    gcc = shutil.which("gcc")
    if gcc is None:
        return None
    lib_path = pathlib.Path(directory) / "cell_loop.so"
    src = pathlib.Path(__file__).with_name("cell_loop.c")
    subprocess.run([gcc, *flags.split(), "-shared", "-fPIC", str(src), "-o", str(lib_path), "-lm"], check=True)
    lib = ctypes.CDLL(str(lib_path))
    dbl = np.ctypeslib.ndpointer(np.float64, flags="C_CONTIGUOUS")
    lng = np.ctypeslib.ndpointer(np.int64, flags="C_CONTIGUOUS")
    lib.cell_loop.argtypes = [ctypes.c_long, dbl, dbl, ctypes.c_double, ctypes.c_long, dbl, dbl, dbl, lng,
                              ctypes.c_long]

    def run(pos, temps, edges, n_sub):
        nbins = edges.size - 1
        num, den, cnt = np.zeros(nbins), np.zeros(nbins), np.zeros(nbins, dtype=np.int64)
        pos_c, temps_c, edges_c = np.ascontiguousarray(pos), np.ascontiguousarray(temps), np.ascontiguousarray(edges)
        t0 = time.perf_counter()
        lib.cell_loop(pos.shape[0], pos_c, temps_c, float(edges[-1]), nbins, edges_c, num, den, cnt, int(n_sub))
        return time.perf_counter() - t0, -num / den, cnt

    return run


def compare_with_c(pos, temps, edges, flags, threads, repeat):
    """The pair engine against the C loop at its fastest cell size, same points, single set, no jackknife.

    Cell sizes r_max / n_sub, n_sub = 1-4, are scanned first (best of two runs each); then the
    engine on ``threads`` threads, the engine on 1 thread and the C loop at its best n_sub run
    interleaved ``repeat`` times, and the ratios of each round are summarised by their median, so
    that load from other users of the machine falls on both sides alike.
    """
    with tempfile.TemporaryDirectory() as tmp:
        run_c = build_c_loop(flags, tmp)
        if run_c is None:
            print("C cell-list loop: skipped (no gcc)")
            return
        ours = pairwise_momentum(pos, temps, edges, n_threads=threads)
        scan = {}
        for n_sub in (1, 2, 3, 4):
            runs = [run_c(pos, temps, edges, n_sub) for _ in range(2)]
            t_c, p_c, cnt_c = min(runs, key=lambda got: got[0])
            if not np.array_equal(cnt_c, ours.pair_counts):
                raise RuntimeError(f"C loop (n_sub={n_sub}) and pair engine count different pairs")
            scan[n_sub] = t_c
            agree = np.nanmax(np.abs(p_c - ours.p) / np.abs(ours.p))
            print(f"  C loop, cells of r_max/{n_sub}: {t_c:.3f} s [same pair counts; max relative difference "
                  f"of p {agree:.1e}]")
        best_sub = min(scan, key=scan.get)
        n_pairs = int(ours.pair_counts.sum())
        rounds = []
        for _ in range(max(repeat, 1)):
            t0 = time.perf_counter()
            pairwise_momentum(pos, temps, edges, n_threads=threads)
            t_many = time.perf_counter() - t0
            t0 = time.perf_counter()
            pairwise_momentum(pos, temps, edges, n_threads=1)
            t_one = time.perf_counter() - t0
            t_c = run_c(pos, temps, edges, best_sub)[0]
            rounds.append((t_many, t_one, t_c))
        t_many, t_one, t_c = np.median(np.array(rounds), axis=0)
        r_many = np.median([c / a for a, _, c in rounds])
        r_one = np.median([c / b for _, b, c in rounds])
        print(f"C cell-list loop (gcc {flags}, 1 thread) at its fastest cells, r_max/{best_sub}; "
              f"{n_pairs:,} pairs, single set, no jackknife; medians of {len(rounds)} interleaved rounds:")
        print(f"  C loop 1 thread : {t_c:.3f} s -> {n_pairs / t_c:.3e} pairs/s")
        print(f"  pairvel 1 thread: {t_one:.3f} s -> {n_pairs / t_one:.3e} pairs/s; C time / pairvel time "
              f"{r_one:.2f}x")
        print(f"  pairvel {numba.get_num_threads() if threads is None else threads} threads: {t_many:.3f} s -> "
              f"{n_pairs / t_many:.3e} pairs/s; C time / pairvel time {r_many:.2f}x")
        print(f"  load average (1, 5, 15 min) after: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")


def peak_rss_mb():
    """Peak resident memory of this process so far, MB (Linux reports kB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=float, default=2e5, help="number of points (default 2e5)")
    parser.add_argument("--r-max", type=float, default=150.0, help="largest separation, Mpc (default 150)")
    parser.add_argument("--bins", type=int, default=30, help="number of uniform bins (default 30)")
    parser.add_argument("--sets", type=int, default=1, help="temperature sets M (default 1)")
    parser.add_argument("--regions", type=int, default=0, help="jackknife regions (default 0: none)")
    parser.add_argument("--threads", type=int, default=None, help="numba threads (default: all)")
    parser.add_argument("--repeat", type=int, default=3, help="timed repeats of the pair engine; best is shown")
    parser.add_argument("--c-flags", default="-O3 -march=native",
                        help="gcc flags for the C cell-list loop (default '-O3 -march=native'; '' skips it)")
    parser.add_argument("--c-repeat", type=int, default=5, help="interleaved rounds against the C loop (default 5)")
    parser.add_argument("--baseline-max-pairs", type=float, default=2e7,
                        help="run the baseline on a subsample with about this many pairs (0: skip it)")
    args = parser.parse_args(argv)

    n = int(args.n)
    edges = np.linspace(0.0, args.r_max, args.bins + 1)
    pos, rng = shell_quarter_sky(n)
    temps = rng.normal(0.0, 50.0, (args.sets, n)) if args.sets > 1 else rng.normal(0.0, 50.0, n)
    regions = rng.integers(0, args.regions, n) if args.regions else None
    print(f"points: {n:,} uniform in a 1000-2000 Mpc shell over a quarter sky; r_max = {args.r_max:g} Mpc, "
          f"{args.bins} bins, M = {args.sets}, jackknife regions = {args.regions}")

    t0 = time.perf_counter()
    pairwise_momentum(pos[:2000], temps[..., :2000], edges, regions=None if regions is None else regions[:2000],
                      n_threads=args.threads)
    print(f"warm-up (compile or load from cache): {time.perf_counter() - t0:.2f} s")

    best = np.inf
    for _ in range(max(args.repeat, 1)):
        t0 = time.perf_counter()
        res = pairwise_momentum(pos, temps, edges, regions=regions, n_threads=args.threads)
        best = min(best, time.perf_counter() - t0)
    n_pairs = int(res.pair_counts.sum())
    rate = n_pairs / best
    print(f"pairvel : {n_pairs:,} pairs in {best:.3f} s (best of {args.repeat}) -> {rate:.3e} pairs/s; "
          f"peak RSS so far {peak_rss_mb():.0f} MB")

    t_single = temps if temps.ndim == 1 else temps[0]
    if args.c_flags and edges[0] == 0.0:
        print(f"load average (1, 5, 15 min) before the C comparison: {' '.join(f'{v:.2f}' for v in os.getloadavg())}")
        compare_with_c(pos, t_single, edges, args.c_flags, args.threads, args.c_repeat)
    if args.baseline_max_pairs <= 0:
        return 0
    frac = min(1.0, np.sqrt(args.baseline_max_pairs / max(n_pairs, 1)))  # pairs scale as n^2
    n_sub = max(int(n * frac), 2)
    sub = rng.choice(n, n_sub, replace=False) if n_sub < n else np.arange(n)
    ours_sub = pairwise_momentum(pos[sub], t_single[sub], edges, n_threads=args.threads)
    tracemalloc.start()
    t0 = time.perf_counter()
    p_base, cnt_base = baseline(pos[sub], t_single[sub], edges)
    t_base = time.perf_counter() - t0
    _, peak_base = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    base_pairs = int(cnt_base.sum())
    base_rate = base_pairs / t_base
    agree = np.nanmax(np.abs(p_base - ours_sub.p) / np.maximum(np.abs(ours_sub.p), 1e-300))
    where = "full data" if n_sub == n else f"random subsample of {n_sub:,} points"
    print(f"baseline: {base_pairs:,} pairs ({where}) in {t_base:.3f} s -> {base_rate:.3e} pairs/s; "
          f"numpy peak allocation {peak_base / 2**20:.0f} MB")
    if n_sub < n:
        print(f"baseline scaled to the full {n_pairs:,} pairs: ~{n_pairs / base_rate:.1f} s and "
              f"~{peak_base / 2**20 * n_pairs / max(base_pairs, 1):.0f} MB")
    print(f"speed ratio (pairs/s, pairvel / baseline): {rate / base_rate:.1f}x "
          f"[baseline single set, no jackknife]; max relative difference of p: {agree:.1e}")
    print(f"peak RSS of the process: {peak_rss_mb():.0f} MB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
