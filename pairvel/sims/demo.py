"""The shipped demo: the invented Larkspur Cluster Survey on a Skerry Millimetre Telescope map.

``pairvel demo`` runs configs/demo.toml on demo_data/; that config names demo_data/truth.json in
``run.truth_path``, so the run compares its measurement with the mock's truth
(:mod:`pairvel.sims.truth`).  Both folders are package data: a wheel installs them as
``pairvel/configs`` and ``pairvel/demo_data`` (mapped from the repository's top-level folders in
pyproject.toml), so the config's relative path ``../demo_data/...`` holds in a checkout and in an
installed package alike.
"""

from __future__ import annotations

__all__ = ["demo_config_path"]

import importlib.resources
from pathlib import Path

from ..core.errors import InputError

#: The repository checkout this module sits in, when pairvel is imported from one without an install.
_CHECKOUT = Path(__file__).resolve().parents[2]


def demo_config_path() -> Path:
    """The demo config: package data ``pairvel.configs`` (a wheel, or an editable install), else
    configs/ of the source checkout pairvel was imported from."""
    try:
        folder = importlib.resources.files("pairvel.configs")
    except ModuleNotFoundError:  # imported from a checkout that was never installed (PYTHONPATH)
        folder = _CHECKOUT / "configs"
    path = folder / "demo.toml"
    if not isinstance(path, Path) or not path.is_file():  # a zipped install has no files to read maps from
        raise InputError(f"demo config {path} not found as a file: reinstall pairvel from a wheel or a checkout "
                         f"(`pip install pairvel-*.whl` or `pip install -e .`)", path=str(path))
    return path
