"""Exception and warning classes raised by pairvel.

Every error a user can meet is a :class:`PairvelError` whose message is one line naming the
file, key or row at fault, what was expected and what was found.  The command line turns these
into a single line on stderr and exit code 2; ``--debug`` shows the traceback.
"""

from __future__ import annotations

__all__ = [
    "PairvelError",
    "ConfigError",
    "InputError",
    "CatalogueError",
    "MapError",
    "TheoryError",
    "OutputError",
    "PairvelWarning",
]


class PairvelError(Exception):
    """Base class of every error pairvel raises on purpose.

    Parameters
    ----------
    message : str
        One line: the thing at fault, what it must be, what it got.
    path : str, optional
        File the problem was found in.
    key : str, optional
        Config key or column name at fault.
    row : int, optional
        First offending row (0-based) in a table.
    """

    def __init__(self, message: str, *, path=None, key=None, row=None):
        super().__init__(message)
        self.path = None if path is None else str(path)
        self.key = key
        self.row = row


class ConfigError(PairvelError):
    """A config file is unreadable, has an unknown key, or a value of the wrong type or range."""


class InputError(PairvelError):
    """An input file cannot be read or holds data of the wrong shape or kind."""


class CatalogueError(InputError):
    """A tracer catalogue has missing columns or bad values."""


class MapError(InputError):
    """A HEALPix map or mask is unreadable or inconsistent (ordering, nside, units, coverage)."""


class TheoryError(PairvelError):
    """A theory calculation cannot be done accurately with the settings given."""


class OutputError(PairvelError):
    """An output folder exists already or cannot be written."""


class PairvelWarning(UserWarning):
    """A fallback or a suspicious input that pairvel handled but the user should know about."""
