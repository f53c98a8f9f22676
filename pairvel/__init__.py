"""pairvel: the mean pairwise kSZ momentum of a spectroscopic catalogue on a HEALPix CMB map."""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["__version__"]
