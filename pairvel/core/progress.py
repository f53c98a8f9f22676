"""Progress lines for the long stages of a run, sent as INFO records of the ``pairvel`` logger.

Nothing is printed unless the caller sets logging up (the command line does); see
:mod:`pairvel.core` for the logging convention.
"""

from __future__ import annotations

import logging
import time

_log = logging.getLogger(__name__)


class Progress:
    """Logs ``[k/n] stage ...`` lines with elapsed times at INFO; emits nothing when ``quiet``.

    Parameters
    ----------
    n_stages : int
        Number of stages announced by :meth:`stage` (the ``n`` of ``[k/n]``).
    quiet : bool, default False
        Emit no record and print nothing (library callers that want no progress at all).
    stream : file-like, optional
        Also print each line there, as plain text; by default lines are only logged.
    """

    def __init__(self, n_stages: int, *, quiet: bool = False, stream=None):
        self.n_stages = n_stages
        self.quiet = quiet
        self.stream = stream
        self._k = 0
        self._t0 = time.perf_counter()
        self.current: str | None = None  # name of the stage running now, for messages that name it

    def say(self, text: str) -> None:
        if self.quiet:
            return
        _log.info(text)
        if self.stream is not None:
            print(text, file=self.stream, flush=True)

    def stage(self, name: str) -> "_Stage":
        self._k += 1
        return _Stage(self, f"[{self._k}/{self.n_stages}] {name}", name)

    def counter(self, label: str):
        """A ``callable(done, total)`` that logs a percentage now and then."""
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
    def __init__(self, progress: Progress, label: str, name: str):
        self.progress, self.label, self.name = progress, label, name

    def __enter__(self):
        self.t0 = time.perf_counter()
        self.progress.current = self.name
        self.progress.say(f"{self.label} ...")
        return self

    def __exit__(self, exc_type, exc, tb):
        seconds = time.perf_counter() - self.t0
        self.progress.current = None
        if exc_type is None:
            self.progress.say(f"{self.label}: done in {seconds:.1f} s")
        elif not self.progress.quiet:
            _log.debug("%s: stopped by %s after %.1f s", self.label, exc_type.__name__, seconds)
        return False
