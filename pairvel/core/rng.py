"""One place that turns a user's ``seed`` into a numpy Generator."""

from __future__ import annotations

import zlib

import numpy as np

from .errors import ConfigError


def _is_int_seed(seed) -> bool:
    return seed is None or (isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0)


def as_generator(seed) -> np.random.Generator:
    """Return a Generator for ``seed`` (None, a non-negative int, or a Generator, passed through)."""
    if isinstance(seed, np.random.Generator):
        return seed
    if _is_int_seed(seed):
        return np.random.default_rng(seed)
    raise ConfigError(f"seed must be None, a non-negative integer or a numpy Generator; got {seed!r}")


def derived_generators(seed, purpose: str, n: int) -> list[np.random.Generator]:
    """``n`` independent Generators for one ``purpose``, fixed by ``seed`` and the purpose's name.

    They come from ``numpy.random.SeedSequence([seed, crc32(purpose)]).spawn(n)``, so they neither
    repeat nor shift the stream of ``as_generator(seed)``; ``seed`` None gives fresh entropy.
    """
    if not _is_int_seed(seed):
        raise ConfigError(f"seed must be None or a non-negative integer; got {seed!r}")
    entropy = None if seed is None else [int(seed), zlib.crc32(purpose.encode())]
    return [np.random.default_rng(child) for child in np.random.SeedSequence(entropy).spawn(int(n))]


def set_generator(seed: int, kind: str, index: int) -> np.random.Generator:
    """The Generator of temperature set ``index`` of one ``kind`` (a null kind, simulated skies).

    The scheme: ``SeedSequence([seed, crc32(kind)], spawn_key=(index,))``, which is child ``index``
    of ``derived_generators(seed, kind, n)`` for any n > index.  A set's draws therefore depend only
    on the run seed, its kind and its index, never on which chunk or task makes it or on the sets
    made before it, so the sets can be made in any grouping, in any order, on any worker.
    """
    if seed is None or not _is_int_seed(seed):
        raise ConfigError(f"seed must be a non-negative integer; got {seed!r}")
    if not isinstance(index, (int, np.integer)) or index < 0:
        raise ConfigError(f"set index must be a non-negative integer; got {index!r}")
    entropy = [int(seed), zlib.crc32(kind.encode())]
    return np.random.default_rng(np.random.SeedSequence(entropy, spawn_key=(int(index),)))
