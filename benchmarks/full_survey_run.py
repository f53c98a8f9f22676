"""The full analysis of a 1.6e6-tracer synthetic survey, once, with its peak memory and stage times.

Two steps, each in its own process so that each peak RSS is its own:

    python benchmarks/full_survey_run.py mock  FOLDER [--n 1.6e6]   # the survey (about 38 tracers per deg^2)
    python benchmarks/full_survey_run.py run   FOLDER [--budget-gb 2] # pairvel run with the analysis below

The survey is `pairvel mock`'s builder (``make_mock_survey``) on the whole sky (a RA-Dec rectangle
of 41,253 deg^2), so that 1.6e6 tracers are at about 38.8 per deg^2; its density grid has 12 Mpc
cells (the builder's cell limit allows no finer grid for a whole-sky cone to z = 0.55).

The analysis: the whole-chain jackknife (50 k-means regions, the trend re-estimated without each),
1000 shuffled nulls (and the defaults' 100 within-slice shuffles and 100 random positions), 100
simulated skies giving the covariance.  ``run`` writes the run's progress lines, its peak RSS
(``ru_maxrss`` of the child process) and the wall time to stdout; copy them into a dated text file.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import time
from pathlib import Path

RUN_KEYS = """
[covariance]
estimator = "simulations"
n_sim = 100
jackknife_retrend = true

[nulls]
n_shuffle = 1000

[compute]
memory_budget_gb = {budget}
"""


def make_survey(folder: Path, n: float) -> None:
    from pairvel.sims.mock import make_mock_survey

    make_mock_survey(folder, n_tracers=int(n), ra_min=-180.0, ra_max=180.0, dec_min=-90.0, dec_max=90.0,
                     cell_mpc=12.0, progress=lambda line: print(line, flush=True))


def run_survey(folder: Path, budget: float) -> int:
    config = folder / "run_full.toml"
    config.write_text((folder / "run.toml").read_text() + RUN_KEYS.format(budget=budget))
    out = folder.parent / f"{folder.name}-out"
    cmd = [sys.executable, "-c", "import sys; from pairvel.cli import main; sys.exit(main(sys.argv[1:]))",
           "run", str(config), "--out", str(out), "--force"]
    t0 = time.perf_counter()
    rc = subprocess.call(cmd, stderr=subprocess.STDOUT)
    wall = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024 / 1e9
    print(f"exit code {rc}; wall time {wall:.0f} s; peak RSS of the run {peak:.2f} GB", flush=True)
    return rc


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("step", choices=("mock", "run"))
    ap.add_argument("folder", type=Path)
    ap.add_argument("--n", type=float, default=1.6e6, help="tracers of the survey (mock step)")
    ap.add_argument("--budget-gb", type=float, default=2.0, help="compute.memory_budget_gb of the run")
    args = ap.parse_args()
    if args.step == "mock":
        t0 = time.perf_counter()
        make_survey(args.folder, args.n)
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e9
        print(f"mock: {time.perf_counter() - t0:.0f} s, peak RSS {peak:.2f} GB")
        return 0
    return run_survey(args.folder, args.budget_gb)


if __name__ == "__main__":
    sys.exit(main())
