"""What a run records about where it came from: the package version, file checksums, library versions."""

from __future__ import annotations

__all__ = ["__version__", "file_sha256", "package_versions"]

import hashlib
import importlib.metadata
import platform

__version__ = "0.1.0"

_DEPENDENCIES = ("numpy", "scipy", "astropy", "healpy", "pandas", "scikit-learn", "numba", "matplotlib")


def file_sha256(path) -> str:
    """SHA-256 hex digest of a file, read in 1 MiB blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def package_versions() -> dict:
    """Versions of Python, pairvel and its dependencies."""
    out = {"python": platform.python_version(), "pairvel": __version__}
    for name in _DEPENDENCIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out
