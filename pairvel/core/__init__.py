"""Shared ground floor: errors, constants, seeds, progress lines, provenance, sphere helpers.

In: nothing from the rest of pairvel (standard library and numpy only).
Out: the :class:`~pairvel.core.errors.PairvelError` hierarchy, physical constants, seed
normalisation, the progress reporter, version and checksum records, unit vectors on the sphere.
Every other subpackage may import from here; nothing here imports from them.
"""

__all__ = ["constants", "errors", "progress", "provenance", "rng", "sphere"]
