"""What a run records about where it came from: the package version, file checksums, library versions."""

from __future__ import annotations

__all__ = ["__version__", "file_sha256", "git_commit", "package_versions"]

import hashlib
import importlib.metadata
import platform
import subprocess

__version__ = "0.1.0"

_DEPENDENCIES = ("numpy", "scipy", "astropy", "healpy", "pandas", "scikit-learn", "numba", "matplotlib", "jinja2")


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


def git_commit(folder, *, timeout_s: float = 5.0) -> str | None:
    """The commit checked out in the git work tree holding ``folder``, or None.

    None when git is not installed, ``folder`` is not in a work tree (or does not exist), or git
    does not answer within ``timeout_s`` seconds: a run never depends on git.
    """
    try:
        done = subprocess.run(["git", "-C", str(folder), "rev-parse", "--verify", "HEAD"], capture_output=True,
                              text=True, timeout=timeout_s, check=False, stdin=subprocess.DEVNULL)
    except (OSError, subprocess.SubprocessError):
        return None
    commit = done.stdout.strip()
    return commit if done.returncode == 0 and len(commit) in (40, 64) and all(c in "0123456789abcdef" for c in commit) \
        else None
