"""One place that turns a user's ``seed`` into a numpy Generator."""

from __future__ import annotations

import numpy as np

from .errors import ConfigError


def as_generator(seed) -> np.random.Generator:
    """Return a Generator for ``seed`` (None, a non-negative int, or a Generator, passed through)."""
    if isinstance(seed, np.random.Generator):
        return seed
    if seed is None or (isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0):
        return np.random.default_rng(seed)
    raise ConfigError(f"seed must be None, a non-negative integer or a numpy Generator; got {seed!r}")
