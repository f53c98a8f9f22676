"""Start-up cost of the command line: import and parser building, before against after a change.

Each snippet runs in a fresh interpreter (``python -c``) with PYTHONPATH set to a source tree, so
two checkouts (``--before`` and ``--after``) are compared in the same session; the median of
``--repeat`` wall times is shown, alternating the trees so that machine load hits both alike.

Snippets: ``cli`` imports pairvel.cli and builds its parser (what every command pays before it
starts, ``pairvel keys`` or ``--help`` included); ``demo`` also imports what a run imports before
its first stage (the pipeline, the output writers).

Usage::

    python benchmarks/bench_imports.py --before /path/to/main --after . --repeat 5
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

SNIPPETS = {
    "cli": "import pairvel.cli as c; c._parser()",
    "demo": "import pairvel.cli as c; c._parser(); import pairvel.pipeline, pairvel.report.outputs",
}


def wall(tree: Path, code: str) -> float:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    t0 = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], env=env, check=True)
    return time.perf_counter() - t0


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--before", type=Path, required=True, help="source tree before the change")
    parser.add_argument("--after", type=Path, default=Path(__file__).resolve().parents[1])
    parser.add_argument("--repeat", type=int, default=5)
    args = parser.parse_args(argv)
    trees = {"before": args.before.resolve(), "after": args.after.resolve()}
    for name, code in SNIPPETS.items():
        times = {label: [] for label in trees}
        wall(trees["after"], code)                                   # warm the file cache
        for _ in range(args.repeat):
            for label, tree in trees.items():
                times[label].append(wall(tree, code))
        med = {label: statistics.median(v) for label, v in times.items()}
        print(f"{name:5s}: before {med['before']:.2f} s, after {med['after']:.2f} s (median of {args.repeat}; "
              f"after/before {med['after'] / med['before']:.2f})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
