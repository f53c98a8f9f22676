"""Shared ground floor: errors, constants, seeds, progress lines, provenance, sphere helpers.

In: nothing from the rest of pairvel (standard library and numpy only).
Out: the :class:`~pairvel.core.errors.PairvelError` hierarchy, physical constants, seed
normalisation, the progress reporter, the keeper of a run's warnings, version and checksum records, unit vectors on the sphere,
the style of every figure (plotstyle; matplotlib imported only when a figure is drawn), and where
tasks run (cluster: this process, or Dask when a scheduler is configured; dask imported only then).
Every other subpackage may import from here; nothing here imports from them.

Messages go through the standard :mod:`logging` module, to the ``pairvel`` logger or its children
(``logging.getLogger(__name__)`` in each module).  The library never configures handlers or
levels: the ``NullHandler`` below keeps it silent until an application (the command line, a
notebook) sets logging up.
"""

import logging

logging.getLogger("pairvel").addHandler(logging.NullHandler())

__all__ = ["cluster", "constants", "errors", "plotstyle", "progress", "provenance", "rng", "sphere", "warnlog"]
