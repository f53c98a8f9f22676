"""Refresh (or check) the demo output that README.md quotes, from a fresh ``pairvel demo``.

Runs ``pairvel demo --out <temporary folder>`` the way a new user would (a subprocess of this
Python, ``python -m pairvel.cli``), keeps the closing summary it prints on stdout, and rewrites the
part of README.md between the lines ``<!-- demo-output:start -->`` and ``<!-- demo-output:end -->``:
one sentence with the date and the measured wall time, then the summary in a fenced block.  Two
lines are shortened as the README has always shown them: the line naming the (temporary) output
folder is left out, and the closing line about the mock's own pairwise velocity is cut after its
first clause (``...``).

``--check`` rewrites nothing: it exits 1 when the fenced block differs from the fresh run (the
numbers are deterministic: fixed seed, canonical tracer order) and 0 when it matches; the wall
time and the date may differ from machine to machine and are not compared.  The demo takes
15-45 s on two cores (more on the first run after installing, while numba compiles and caches
its kernels); this script is therefore not part of the test suite.

Usage::

    python benchmarks/readme_demo.py            # rewrite the README block
    python benchmarks/readme_demo.py --check    # exit 1 if the README block is stale
"""

from __future__ import annotations

import argparse
import datetime as _dt
import difflib
import os
import subprocess
import sys
import tempfile
import textwrap
import time
from pathlib import Path

import pairvel

START = "<!-- demo-output:start -->"
END = "<!-- demo-output:end -->"
DEFAULT_README = Path(__file__).resolve().parents[1] / "README.md"
FENCE = "```"


def numba_cache_present() -> bool:
    """Whether numba has cached compiled pairvel kernels already (index files beside the sources or in NUMBA_CACHE_DIR)."""
    roots = [Path(pairvel.__file__).parent]
    if os.environ.get("NUMBA_CACHE_DIR"):
        roots.append(Path(os.environ["NUMBA_CACHE_DIR"]))
    return any(any(root.rglob("*.nbi")) for root in roots if root.is_dir())


def run_demo() -> tuple[list[str], float]:
    """The stdout lines of one ``pairvel demo`` into a temporary folder, and its wall time in seconds."""
    with tempfile.TemporaryDirectory(prefix="pairvel-readme-demo-") as tmp:
        out = Path(tmp) / "demo"
        t0 = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "pairvel.cli", "demo", "--out", str(out)],
                              cwd=tmp, capture_output=True, text=True, check=False)
        seconds = time.perf_counter() - t0
    if proc.returncode != 0:
        sys.stderr.write(proc.stderr)
        raise SystemExit(f"readme_demo: pairvel demo failed with exit code {proc.returncode}")
    return proc.stdout.splitlines(), seconds


def readme_lines(stdout_lines: list[str]) -> list[str]:
    """The summary as the README shows it: no output-folder line, the last line cut after its first clause."""
    lines = [line for line in stdout_lines if not line.lstrip().startswith("outputs:")]
    if not lines:
        raise SystemExit("readme_demo: pairvel demo printed nothing on stdout")
    head, sep, _ = lines[-1].partition("; ")
    if sep:
        lines[-1] = f"{head}; ..."
    return lines


def demo_section(lines: list[str], seconds: float, *, cached: bool, today: str) -> list[str]:
    """The README text between the markers: the sentence with date and wall time, then the fenced summary."""
    how = "numba's compiled kernels already cached" if cached else "including numba's one-time compilation of its kernels"
    sentence = (f"What `pairvel demo` printed on stdout on {today} ({seconds:.0f} s wall time on a {os.cpu_count()}-core "
                f"machine, {how}; the progress lines and warnings go to stderr and are not shown, nor the line naming "
                "the output folder; written by `benchmarks/readme_demo.py`):")
    return [*textwrap.wrap(sentence, width=100), "", FENCE, *lines, FENCE]


def split_readme(text: str, path: Path) -> tuple[list[str], list[str], list[str]]:
    """README lines before, between and after the markers (markers kept in before/after)."""
    lines = text.splitlines()
    try:
        i, j = lines.index(START), lines.index(END)
    except ValueError:
        raise SystemExit(f"readme_demo: {path} lacks the marker lines {START!r} and {END!r}") from None
    if j < i:
        raise SystemExit(f"readme_demo: in {path} the end marker comes before the start marker")
    return lines[:i + 1], lines[i + 1:j], lines[j:]


def fenced(section: list[str]) -> list[str]:
    """The lines of the first fenced block in ``section`` (without the fences)."""
    starts = [k for k, line in enumerate(section) if line.strip() == FENCE]
    return section[starts[0] + 1:starts[1]] if len(starts) >= 2 else []


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="compare only; exit 1 if the README block is stale")
    parser.add_argument("--readme", type=Path, default=DEFAULT_README, help="README to update (default: the repository's)")
    args = parser.parse_args(argv)
    text = args.readme.read_text(encoding="utf-8")
    before, current, after = split_readme(text, args.readme)
    cached = numba_cache_present()
    stdout_lines, seconds = run_demo()
    fresh = readme_lines(stdout_lines)
    print(f"pairvel demo: {seconds:.1f} s wall time ({'cached' if cached else 'compiling'} numba kernels)")
    if args.check:
        old = fenced(current)
        if old == fresh:
            print(f"{args.readme}: demo block matches a fresh run")
            return 0
        print(f"{args.readme}: demo block differs from a fresh run:")
        sys.stdout.writelines(difflib.unified_diff([f"{x}\n" for x in old], [f"{x}\n" for x in fresh], "README", "fresh run"))
        return 1
    section = demo_section(fresh, seconds, cached=cached, today=_dt.datetime.now(_dt.UTC).date().isoformat())
    new_text = "\n".join(before + section + after) + ("\n" if text.endswith("\n") else "")
    tmp = args.readme.with_name(f".{args.readme.name}.readme_demo.tmp")
    tmp.write_text(new_text, encoding="utf-8")
    os.replace(tmp, args.readme)  # a reader never sees half a README
    print("\n".join(fresh))
    print(f"{args.readme}: demo block {'rewritten' if new_text != text else 'unchanged'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
