"""Peak memory of whole runs with many temperature sets: before (one stack of every set) and after
(sets made and summed in chunks, ``compute.memory_budget_gb``), and the model's figure at 1.6e6 tracers.

    python benchmarks/bench_memory.py demo               # the demo with 2000 shuffled nulls
    python benchmarks/bench_memory.py mock --n 1e5       # a `pairvel mock` survey, the full analysis
    python benchmarks/bench_memory.py demo mock          # both, then the extrapolation

Every run is its own process, which prints its peak RSS (``ru_maxrss``) when it ends.  "before" runs
the code of ``--before`` (default /work/main, the code before the chunks) on the same config;
"one chunk" runs this code with a budget large enough for every set at once.  Peak RSS includes the
interpreter, numba's compiled code and the map: the part that grows with the sets is what changes.

The mock survey has about 38 tracers per deg^2 (a RA-Dec rectangle sized for --n), and the run
the full analysis of a survey: the whole-chain jackknife (50 regions, trend re-estimated without
each), 1000 shuffled nulls, the defaults' 100 random-position and 100 within-slice nulls, and
--sims simulated skies giving the covariance.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
REPO = HERE.parent
DENSITY_PER_DEG2 = 38.0

CHILD = """
import resource, sys, time, logging
from pairvel.input.config import load_config
from pairvel.pipeline import run_pipeline
t0 = time.perf_counter()
result = run_pipeline(load_config(sys.argv[1]))
print(f"PEAK {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9:.4f} "
      f"WALL {time.perf_counter() - t0:.1f} TAU {result.fit.amplitude:.6e}")
"""


def peak_of_run(config: Path, code: Path) -> tuple[float, float, str]:
    """(peak RSS GB, wall s, amplitude) of run_pipeline on ``config`` with the package at ``code``."""
    out = subprocess.run([sys.executable, "-c", CHILD, str(config)], capture_output=True, text=True,
                         env={**os.environ, "PYTHONPATH": str(code)}, cwd=str(code))
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("PEAK ")]
    if out.returncode or not line:
        raise SystemExit(f"run of {config} with {code} failed:\n{out.stderr[-3000:]}")
    _, peak, _, wall, _, tau = line[-1].split()
    return float(peak), float(wall), tau


def write_config(base: Path, folder: Path, extra: str, budget: float | None) -> Path:
    """``base`` with its relative ``path``/``truth_path`` values made absolute, plus ``extra`` keys and the budget."""
    lines = []
    for line in base.read_text().splitlines():
        key, _, value = line.split("#")[0].partition("=")
        if key.strip() in ("path", "truth_path"):
            line = f'{key.strip()} = "{(base.parent / value.strip().strip(chr(34))).resolve()}"'
        lines.append(line)
    text = "\n".join(lines) + "\n" + extra
    if budget is not None:
        text += f"\n[compute]\nmemory_budget_gb = {budget}\n"
    path = folder / f"run_{len(list(folder.glob('run_*.toml')))}.toml"
    path.write_text(text)
    return path


RUNS = ("before", "one-chunk", "after")


def compare(label: str, base: Path, extra: str, before: Path, budget: float, folder: Path, runs=RUNS) -> dict:
    rows = {}
    setups = {"before": (before, None), "one-chunk": (REPO, 1e4), "after": (REPO, budget)}
    for name in runs:
        code, b = setups[name]
        peak, wall, tau = peak_of_run(write_config(base, folder, extra, b), code)
        rows[name] = peak
        print(f"  {label:10s} {name:10s} peak RSS {peak:6.2f} GB   ({wall:6.1f} s, loaded machine)  tau {tau}",
              flush=True)
    for other in ("before", "one-chunk"):
        if other in rows and "after" in rows:
            print(f"  {label:10s} after / {other} = {rows['after'] / rows[other]:.2f}", flush=True)
    return rows


def make_mock(folder: Path, n: float) -> Path:
    from pairvel.sims.mock import make_mock_survey

    area = n / DENSITY_PER_DEG2              # deg^2, a rectangle 2.5 times as wide as high
    height = min(math.sqrt(area / 2.5), 60.0)
    width = min(area / height, 360.0)
    make_mock_survey(folder, n_tracers=int(n), nside=1024, ra_min=-width / 2, ra_max=width / 2,
                     dec_min=-height / 2, dec_max=height / 2, cell_mpc=8.0)
    return folder / "run.toml"


def full_analysis(n_sim: int) -> str:
    return (f"\n[covariance]\nestimator = \"simulations\"\nn_sim = {n_sim}\njackknife_retrend = true\n"
            f"\n[nulls]\nn_shuffle = 1000\n")


def extrapolate(measured: dict, n: float, n_sim: int, budget: float, n_target=1.6e6, n_sim_target=100):
    """Peak at ``n_target`` tracers: the measured peak less the set terms, scaled with N, plus the set
    terms at the target: the budget, the simulated skies (held twice while trend-corrected) and the
    50 re-trended jackknife sets, 8 bytes each per tracer."""
    sets = lambda n_t, sims: budget + 8 * n_t * (2 * sims + 50) / 1e9  # noqa: E731
    rest = measured["after"] - sets(n, n_sim)
    per_tracer = rest / n
    print(f"model: {measured['after']:.2f} GB at {n:.3g} tracers = {rest:.2f} GB that scale with N "
          f"(catalogue, map, photometry, engine: {per_tracer * 1e9 / 1e3:.1f} kB per tracer, an upper bound "
          f"since the interpreter's fixed part is in it) + {sets(n, n_sim):.2f} GB of sets")
    peak = per_tracer * n_target + sets(n_target, n_sim_target)
    print(f"model at {n_target:.3g} tracers, {n_sim_target} simulated skies, 1000 shuffled nulls, whole-chain "
          f"jackknife: {peak:.1f} GB")
    if "before" in measured:
        print(f"  (before, scaled with N alone: {measured['before'] / n * n_target:.0f} GB)")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("what", nargs="+", choices=("demo", "mock"))
    ap.add_argument("--n", type=float, default=1e5, help="tracers of the mock survey")
    ap.add_argument("--sims", type=int, default=20, help="simulated skies of the mock run")
    ap.add_argument("--budget-gb", type=float, default=None, help="memory budget (default: the config default)")
    ap.add_argument("--runs", nargs="+", choices=RUNS, default=list(RUNS), help="which runs (default: all)")
    ap.add_argument("--before", type=Path, default=Path("/work/main"), help="checkout of the code before")
    args = ap.parse_args()
    from pairvel.input.config import Config

    budget = args.budget_gb if args.budget_gb is not None else Config().compute.memory_budget_gb
    print(f"bench_memory {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}; budget {budget:g} GB; "
          f"before = {args.before}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        if "demo" in args.what:
            compare("demo", REPO / "configs" / "demo.toml", "\n[nulls]\nn_shuffle = 2000\n", args.before, budget, tmp,
                    args.runs)
        if "mock" in args.what:
            t0 = time.perf_counter()
            run_toml = make_mock(tmp / "mock", args.n)
            print(f"  mock survey of {args.n:.3g} tracers made in {time.perf_counter() - t0:.0f} s", flush=True)
            measured = compare(f"mock {args.n:.0e}", run_toml, full_analysis(args.sims), args.before, budget, tmp,
                               args.runs)
            extrapolate(measured, json.loads((tmp / "mock" / "truth.json").read_text())["n_tracers"], args.sims,
                        budget)
    return 0


if __name__ == "__main__":
    sys.exit(main())
