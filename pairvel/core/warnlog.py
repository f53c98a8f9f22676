"""Every warning of a run, kept: WARNING records of the ``pairvel`` loggers and Python warnings.

:func:`collect_warnings` wraps a run.  Each warning is still shown as usual (the Python warning
goes on to the ``warnings.showwarning`` in force, the log record to the handlers in force), and is
also kept as a :class:`RunWarning` naming the stage that was running, so the results can list
every one of them however the caller set up logging.
"""

from __future__ import annotations

__all__ = ["RunWarning", "collect_warnings"]

import contextlib
import logging
import warnings
from dataclasses import dataclass

# Python warnings that the command line turns into records of this logger are kept once, as warnings.
_FROM_PYTHON_WARNINGS = "pairvel.warnings"


@dataclass(frozen=True)
class RunWarning:
    """One warning of a run.

    Attributes
    ----------
    text : str
        The message.
    source : str
        Where it came from: the logger name (``pairvel.maps.photometry``) of a log record, or the
        warning category and module (``PairvelWarning in pairvel.pipeline``) of a Python warning.
    stage : str or None
        The stage that was running (the label given to :meth:`~pairvel.core.progress.Progress.stage`).
    """

    text: str
    source: str
    stage: str | None

    def as_dict(self) -> dict:
        return {"text": self.text, "source": self.source, "stage": self.stage}


class _Keeper(logging.Handler):
    def __init__(self, kept: list, stage):
        super().__init__(logging.WARNING)
        self.kept, self.stage = kept, stage

    def emit(self, record: logging.LogRecord) -> None:
        if record.name != _FROM_PYTHON_WARNINGS:
            self.kept.append(RunWarning(record.getMessage(), record.name, self.stage()))


def _module_of(filename: str) -> str:
    parts = str(filename).replace("\\", "/").removesuffix(".py").split("/")
    if "pairvel" in parts:
        return ".".join(parts[len(parts) - 1 - parts[::-1].index("pairvel"):])
    return parts[-1]


@contextlib.contextmanager
def collect_warnings(stage=lambda: None, *, logger: str = "pairvel"):
    """Keep every warning raised or logged inside the block; yields the list they are appended to.

    Parameters
    ----------
    stage : callable() -> str or None
        Asked at each warning for the stage that is running.
    logger : str, default "pairvel"
        Logger whose WARNING (and higher) records are kept, with those of its children.

    Notes
    -----
    The warning filters in force decide what is shown and kept (a repeat of the same warning from
    the same line is shown once, as usual); the registry of warnings already shown is reset on
    entry, so a second run in one process keeps its warnings too.
    """
    kept: list[RunWarning] = []
    handler = _Keeper(kept, stage)
    log = logging.getLogger(logger)
    with warnings.catch_warnings():
        shown = warnings.showwarning

        def keep(message, category, filename, lineno, file=None, line=None):
            kept.append(RunWarning(str(message), f"{category.__name__} in {_module_of(filename)}", stage()))
            shown(message, category, filename, lineno, file, line)

        warnings.showwarning = keep
        # a filter appended last changes nothing but clears the once-per-line registries (restored on exit)
        warnings.filterwarnings("default", append=True)
        log.addHandler(handler)
        try:
            yield kept
        finally:
            log.removeHandler(handler)
