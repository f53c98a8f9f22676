"""The pair pass as work units on a two-worker Dask LocalCluster against the same pass in this process.

    .venv/bin/python benchmarks/bench_dask.py                     # demo catalogue, 84 sets, 50 regions
    .venv/bin/python benchmarks/bench_dask.py --sets 300 --workers 2 --repeat 3
    .venv/bin/python benchmarks/bench_dask.py --whole-run                # the demo run, local and on Dask
    .venv/bin/python benchmarks/bench_dask.py --stages                   # per-stage table and speed-up model

Prints the local time (all numba threads), the Dask time (``--workers`` workers of one thread, each
unit on one numba thread), their ratio, and per unit: its grid columns, slab thickness in r_max,
pairs summed and estimated cost share; then the bytes moved (the broadcast tracer data times the
workers, and the sums sent back).  Both timings are the best of ``--repeat`` after a warm-up run
(numba loads its cache in each worker on first use).  On a shared machine wall times move with the
load, so CPU seconds are printed too: the local process's, and each unit's own (the thread time of
its task on the worker).  The busiest worker's CPU seconds (units dealt costliest first) over the
local CPU seconds per thread is the ratio an idle machine would show; the speed-up model for W
workers is made from the same CPU seconds.

``--stages`` runs the demo config once on the cluster with a metered runner and prints, per stage
(photometry, trend re-estimates, null and simulated sets, rotations, pair pass), the tasks, the bytes
scattered to the workers and gathered back, and the CPU seconds per task (each task's own thread
time on its worker); the driver's serial part is the run's wall time outside the cluster waits.
From these it prints the Amdahl-style model t_W = S + P / W (S serial driver seconds, P the tasks'
CPU seconds) and its speed-up over one worker.

``--whole-run`` instead runs the demo config in this process and on the cluster (photometry, trend
re-estimates and pair pass as tasks) and prints both times and the largest differences.
"""

from __future__ import annotations

import argparse
import os
import time
import warnings
from pathlib import Path

import numba
import numpy as np

from pairvel.input.catalogue import load_catalogue
from pairvel.input.config import load_config
from pairvel.core.cluster import TaskRunner
from pairvel.pairs.distributed import UNITS_PER_WORKER, plan_units, run_units, unit_sums
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import comoving_positions

ROOT = Path(__file__).resolve().parents[1]


def demo_tracers():
    cfg = load_config(ROOT / "configs" / "demo.toml")
    cat = load_catalogue(cfg.catalogue)
    return comoving_positions(cat.ra, cat.dec, cat.z, cosmo=cfg.cosmology), cat.z, cfg.bins.edges()


def best_of(repeat, fn, cpu=time.process_time):
    """Best wall time of ``repeat`` calls, the CPU seconds ``cpu()`` counted during that call, and its result."""
    best, out = (np.inf, None), None
    for _ in range(repeat):
        c0, t0 = cpu(), time.perf_counter()
        out = fn()
        wall = time.perf_counter() - t0
        if wall < best[0]:
            best = (wall, np.subtract(cpu(), c0))
    return best[0], best[1], out


def timed_unit(*args):
    """:func:`unit_sums` and the CPU seconds of the thread that ran it (the unit's own work)."""
    t0 = time.thread_time()
    out = unit_sums(*args)
    return out, time.thread_time() - t0


def on_cluster(client, pos, temps, edges, reg, z, n_units):
    """The units of the pass, each timed on its worker; returns (sums, unit CPU s, plan)."""
    done, plan = run_units(TaskRunner(client), (pos, temps, reg, z, None), edges, int(reg.max()) + 1, True,
                           n_units=n_units, n_threads=1, task=timed_unit)
    return [d[0] for d in done], np.array([d[1] for d in done]), plan


def busiest(unit_cpu, n_workers):
    """CPU seconds of the busiest worker when units start costliest first on the first free worker."""
    load = np.zeros(n_workers)
    for c in sorted(unit_cpu, reverse=True):
        load[np.argmin(load)] += c
    return load.max()


def whole_run(n_workers: int) -> None:
    """The demo run in this process and on a LocalCluster: wall times, and how far the results differ."""
    import tempfile

    from dask.distributed import LocalCluster

    from pairvel.pipeline import run_pipeline

    demo = ROOT / "configs" / "demo.toml"
    t0, c0 = time.perf_counter(), time.process_time()
    local = run_pipeline(load_config(demo))
    print(f"demo run in this process: {time.perf_counter() - t0:.1f} s ({time.process_time() - c0:.1f} CPU s)")
    with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, tempfile.TemporaryDirectory() as tmp:
        text = demo.read_text().replace('"../demo_data/', f'"{ROOT}/demo_data/')
        path = Path(tmp) / "demo_on_dask.toml"
        path.write_text(f'{text}\n[compute]\nscheduler_address = "{cluster.scheduler_address}"\nn_threads = 1\n')
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            t0 = time.perf_counter()
            spread = run_pipeline(load_config(path))
            print(f"demo run on {n_workers} Dask workers: {time.perf_counter() - t0:.1f} s")
    print(f"'large graph' warnings from Dask: {sum('large graph' in str(w.message) for w in caught)}")
    print(f"pair counts identical: {np.array_equal(spread.pair_counts, local.pair_counts)}; largest relative "
          f"difference: p {np.max(np.abs(spread.p / local.p - 1)):.1e}, covariance "
          f"{np.max(np.abs(spread.covariance / local.covariance - 1)):.1e}, tau_mean "
          f"{abs(spread.fit.amplitude / local.fit.amplitude - 1):.1e}")


def _task_name(fn, args) -> str:
    """The stage a task belongs to: the set-chunk task's own function, else the task function."""
    fn = args[0] if fn.__name__ == "_chunk_task" else fn
    return fn.__name__.strip("_")


def _timed(fn, *args):
    t0 = time.thread_time()
    out = fn(*args)
    return out, time.thread_time() - t0


class MeteredRunner(TaskRunner):
    """A TaskRunner that records, per stage, tasks, bytes shared and returned, task CPU s and wall waits."""

    def __init__(self, client, **kw):
        super().__init__(client, **kw)
        self.stages, self.ref_bytes, self.waited = {}, {}, 0.0

    def share(self, value):
        ref = super().share(value)
        if self.client is not None:  # a broadcast: one copy per worker, counted with the first stage that reads it
            self.ref_bytes[ref.key] = _nbytes(value) * self.n_workers()
        return ref

    def run(self, fn, calls):
        calls = [tuple(c) for c in calls]
        t0 = time.perf_counter()
        done = super().run(_timed, [(fn, *c) for c in calls])
        self.waited += time.perf_counter() - t0
        for call, (out, cpu) in zip(calls, done):
            row = self.stages.setdefault(_task_name(fn, call), {"tasks": 0, "scattered": 0, "back": 0, "cpu": []})
            row["tasks"] += 1
            row["back"] += _nbytes(out)
            row["cpu"].append(cpu)
            row["scattered"] += sum(self.ref_bytes.pop(getattr(a, "key", None), 0) for a in call[:2])
        return [out for out, _ in done]


def _nbytes(obj, seen=None) -> int:
    """Bytes of the numpy arrays inside ``obj`` (tuples, lists, dicts, objects' attributes), each counted once."""
    seen = set() if seen is None else seen
    if id(obj) in seen or obj is None or isinstance(obj, (str, bytes, int, float, bool)):
        return 0
    seen.add(id(obj))
    if isinstance(obj, np.ndarray):
        return obj.nbytes
    if isinstance(obj, dict):
        return sum(_nbytes(v, seen) for v in obj.values())
    if isinstance(obj, (tuple, list)):
        return sum(_nbytes(v, seen) for v in obj)
    fields = getattr(obj, "__dict__", None) or {n: getattr(obj, n) for n in getattr(obj, "__slots__", ())
                                                 if hasattr(obj, n)}
    return sum(_nbytes(v, seen) for v in fields.values())


def stages(n_workers: int, n_sim: int = 0) -> None:
    """The demo run on a LocalCluster with a metered runner: the per-stage table and the Amdahl model."""
    import contextlib
    import tempfile

    from dask.distributed import Client, LocalCluster

    from pairvel import pipeline

    demo = ROOT / "configs" / "demo.toml"
    with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client, \
            tempfile.TemporaryDirectory() as tmp:
        runner = MeteredRunner(client)
        pipeline.compute_runner = lambda cfg: contextlib.nullcontext(runner)
        text = demo.read_text().replace('"../demo_data/', f'"{ROOT}/demo_data/')
        if n_sim:
            text = text.replace("[covariance]\n", f'[covariance]\nestimator = "simulations"\nn_sim = {n_sim}\n')
        path = Path(tmp) / "demo_on_dask.toml"
        path.write_text(f'{text}\n[compute]\nscheduler_address = "{cluster.scheduler_address}"\nn_threads = 1\n')
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            pipeline.run_pipeline(load_config(path))
            wall = time.perf_counter() - t0
    serial = wall - runner.waited
    parallel = sum(sum(row["cpu"]) for row in runner.stages.values())
    print(f"demo run{f' with {n_sim} simulated skies' if n_sim else ''} on {n_workers} one-thread workers: {wall:.1f} s wall, {runner.waited:.1f} s of it waiting for "
          f"tasks; serial driver part S = {serial:.1f} s")
    print("| stage | tasks | scattered (MiB, all workers) | gathered (MiB) | CPU s per task (median, max) | CPU s |")
    print("|---|---|---|---|---|---|")
    for name, row in runner.stages.items():
        cpu = np.array(row["cpu"])
        print(f"| {name} | {row['tasks']} | {row['scattered'] / 2**20:.1f} | {row['back'] / 2**20:.2f} | "
              f"{np.median(cpu):.3f}, {cpu.max():.3f} | {cpu.sum():.2f} |")
    print(f"model t_W = S + P / W with S = {serial:.1f} s, P = {parallel:.1f} CPU s (tasks only; each stage waits for "
          f"its slowest task, so the model is a bound from below):")
    for w in (1, 2, 4, 8, 16, 64):
        print(f"  W={w:3d}: {serial + parallel / w:7.1f} s, speed-up over one worker "
              f"{(serial + parallel) / (serial + parallel / w):5.2f}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sets", type=int, default=84, help="temperature sets (the demo run has 84)")
    ap.add_argument("--regions", type=int, default=50)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--units", type=int, default=None, help="work units (default: 3 per worker, r_max-capped)")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--whole-run", action="store_true", help="the demo run, in this process and on the cluster")
    ap.add_argument("--stages", action="store_true", help="the demo run on the cluster: per-stage work and data table")
    ap.add_argument("--sims", type=int, default=0, help="with --stages: simulated-sky covariance of this many skies")
    args = ap.parse_args(argv)
    if args.stages:
        return stages(args.workers, args.sims)
    if args.whole_run:
        return whole_run(args.workers)
    from dask.distributed import Client, LocalCluster

    pos, z, edges = demo_tracers()
    rng = np.random.default_rng(1)
    temps = rng.normal(0, 30, (args.sets, pos.shape[0]))
    reg = rng.integers(0, args.regions, pos.shape[0])
    print(f"{pos.shape[0]} tracers (demo catalogue), {args.sets} sets, {args.regions} regions, "
          f"r_max {edges[-1]:g} Mpc, extent {np.ptp(pos, axis=0).round(0).tolist()} Mpc")
    pairwise_momentum(pos[:500], temps[:, :500], edges, regions=reg[:500], redshifts=z[:500])  # warm-up
    t_local, cpu_local, ref = best_of(args.repeat,
                                      lambda: pairwise_momentum(pos, temps, edges, regions=reg, redshifts=z))
    with LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        on_cluster(client, pos[:500], temps[:, :500], edges, reg[:500], z[:500], None)  # warm-up
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            t_dask, _, (parts, unit_cpu, plan) = best_of(
                args.repeat, lambda: on_cluster(client, pos, temps, edges, reg, z, args.units))
    large = sum("large graph" in str(w.message) for w in caught)
    pairs = [int(p[2].sum()) for p in parts]
    assert sum(pairs) == int(ref.pair_counts.sum())
    back = sum(sum(a.nbytes for a in p) for p in parts)
    print(f"local (all numba threads): {t_local:.2f} s   Dask ({args.workers} workers x 1 thread): {t_dask:.2f} s   "
          f"ratio Dask/local {t_dask / t_local:.2f}")
    n_local = min(numba.config.NUMBA_NUM_THREADS, os.cpu_count() or 1)
    top = busiest(unit_cpu, args.workers)
    print(f"CPU seconds: local {cpu_local:.2f} on {n_local} threads; units {unit_cpu.sum():.2f} in all, busiest "
          f"worker {top:.2f}; busiest worker / (local / {n_local}) = {top / (cpu_local / n_local):.2f}, the ratio "
          f"an idle machine would show")
    print("unit  columns   thickness/r_max  pairs        share of pairs  estimated cost  CPU s")
    for u, ((a, b), n, c, t) in enumerate(zip(plan.columns, pairs, plan.cost, unit_cpu)):
        print(f"{u:4d}  {a:3d}-{b:<3d}   {(b - a) / plan.columns_per_r_max:8.2f}        {n:>11,}  "
              f"{n / sum(pairs):8.3f}        {c:8.3f}        {t:6.2f}")
    data = (np.ascontiguousarray(pos[:, list(plan.axes)]), temps, reg, z, None)
    shared_bytes = sum(a.nbytes for a in data if a is not None)
    _, t_fixed, _ = best_of(args.repeat, lambda: unit_sums(data, (0, 0), edges, args.regions, True, 1, "auto"))
    t_pairs = unit_cpu.sum() - len(parts) * t_fixed  # CPU seconds of pair work in all units
    print(f"per-unit fixed cost (cell sort of all tracers, sets reordered; no pairs): {t_fixed:.2f} CPU s; "
          f"pair work {t_pairs / sum(pairs) * 1e9:.0f} ns per pair and thread")
    print("model for W one-thread workers, 3 units per worker at equal cost (capped by the r_max-thick "
          "slabs), from the CPU seconds: t_W = (pair work + U x fixed) / W, at least the largest unit")
    for w in (1, 2, 4, 8, 16):
        cap = plan_units(pos, edges[-1], n_workers=w)
        largest = max(cap.cost) * t_pairs + t_fixed
        t_w = max((t_pairs + len(cap.columns) * t_fixed) / w, largest)
        print(f"  W={w:3d}: {len(cap.columns):3d} units (at most {UNITS_PER_WORKER * w}), "
              f"predicted {t_w:6.2f} s, speed-up over one worker {(t_pairs + t_fixed) / t_w:5.2f}")
    print(f"'large graph' warnings from Dask: {large}")
    print(f"moved: tracer data {shared_bytes / 2**20:.1f} MiB broadcast to {args.workers} workers "
          f"({args.workers * shared_bytes / 2**20:.1f} MiB); sums back {back / 2**20:.2f} MiB "
          f"({back / len(parts) / 2**20:.2f} MiB per unit)")


if __name__ == "__main__":
    main()
