"""Progress lines on stderr for the long stages of a run."""

from __future__ import annotations

import sys
import time


class Progress:
    """Prints ``[k/n] stage ...`` lines with elapsed times; silent when ``quiet``."""

    def __init__(self, n_stages: int, *, quiet: bool = False, stream=None):
        self.n_stages = n_stages
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stderr
        self._k = 0
        self._t0 = time.perf_counter()

    def say(self, text: str) -> None:
        if not self.quiet:
            print(text, file=self.stream, flush=True)

    def stage(self, name: str) -> "_Stage":
        self._k += 1
        return _Stage(self, f"[{self._k}/{self.n_stages}] {name}")

    def counter(self, label: str):
        """A ``callable(done, total)`` that prints a percentage now and then."""
        last = [-1]

        def report(done: int, total: int) -> None:
            pct = int(100 * done / max(total, 1))
            if pct // 10 != last[0] // 10 or done == total:
                last[0] = pct
                self.say(f"      {label}: {done}/{total} ({pct}%)")

        return report

    @property
    def elapsed(self) -> float:
        return time.perf_counter() - self._t0


class _Stage:
    def __init__(self, progress: Progress, label: str):
        self.progress, self.label = progress, label

    def __enter__(self):
        self.t0 = time.perf_counter()
        self.progress.say(f"{self.label} ...")
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is None:
            self.progress.say(f"{self.label}: done in {time.perf_counter() - self.t0:.1f} s")
        return False
