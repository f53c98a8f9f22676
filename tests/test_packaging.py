"""What an installed pairvel holds, and what the repository's examples leave behind.

The wheel carries the demo (configs/ and demo_data/ mapped to ``pairvel.configs`` and
``pairvel.demo_data``), so ``pairvel demo`` runs without a checkout; the README's commands run from
the repository root leave ``git status`` clean.
"""

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import tomllib
from pathlib import Path

import pytest

from pairvel.input.config import load_config
from pairvel.sims.demo import demo_config_path

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]


def test_every_subpackage_is_listed_for_the_wheel():
    listed = set(PYPROJECT["packages"])
    on_disk = {".".join(p.relative_to(ROOT).parts) for p in (ROOT / "pairvel").rglob("*")
               if p.is_dir() and p.name != "__pycache__" and any(p.glob("*.py")) | any(p.glob("*.txt"))}
    mapped = PYPROJECT["package-dir"]
    assert listed == on_disk | {"pairvel"} | set(mapped)
    assert mapped == {"pairvel.configs": "configs", "pairvel.demo_data": "demo_data"}
    for folder in mapped.values():
        assert (ROOT / folder / "__init__.py").is_file(), folder  # regular packages: importable when installed


def test_demo_config_paths_resolve_beside_it():
    cfg = load_config(demo_config_path())
    for path in (cfg.catalogue.path, cfg.map.path, cfg.run.truth_path):
        assert path.is_file(), path
    data = {cfg.catalogue.path.resolve().parent, cfg.map.path.resolve().parent, cfg.run.truth_path.resolve().parent}
    assert data == {demo_config_path().resolve().parent.parent / "demo_data"}
    shipped = PYPROJECT["package-data"]
    for path in (cfg.catalogue.path, cfg.map.path, cfg.run.truth_path, demo_config_path()):
        package = "pairvel." + path.parent.name
        assert any(path.match(pattern) for pattern in shipped[package]), path  # in the wheel's package data


# Outputs the README's commands write into the folder they run in (the repository root, for a user
# following the quick start), and files they produce inside the tree.
README_OUTPUTS = ["pairvel-demo-20261204-101500/summary.json",   # pairvel demo
                  "pairvel-demo-20261204-101500.blinding-key.json",
                  "demo-from-python/report.md",                  # the Python example
                  "results/summary.json", "results.blinding-key.json", "results-unblinded/report.md",
                  "my_mock/truth.json", "my_mock/run.toml", "larkspur-demo/summary.json",
                  "pairvel.egg-info/PKG-INFO", "build/lib/pairvel/cli.py", ".pytest_cache/README.md",
                  "pairvel/pairs/__pycache__/_kernels.pair_sums-1.py311.nbi"]


@pytest.mark.skipif(shutil.which("git") is None or not (ROOT / ".git").exists(), reason="not a git checkout")
def test_readme_outputs_are_ignored_by_git():
    proc = subprocess.run(["git", "check-ignore", "--no-index", "--stdin"], input="\n".join(README_OUTPUTS),
                          capture_output=True, text=True, cwd=ROOT)
    assert sorted(proc.stdout.split()) == sorted(README_OUTPUTS), proc.stderr
    # and what is shipped is not ignored
    kept = subprocess.run(["git", "check-ignore", "--no-index", "configs/demo.toml", "demo_data/truth.json",
                           "pairvel/cli.py"], capture_output=True, text=True, cwd=ROOT)
    assert kept.stdout == ""


def _copy_sources(dest: Path) -> None:
    """The files a wheel is built from (no .git, venv or caches): the build leaves the checkout untouched."""
    skip = shutil.ignore_patterns("__pycache__", "*.pyc")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy2(ROOT / name, dest / name)
    for name in ("pairvel", "configs", "demo_data"):
        shutil.copytree(ROOT / name, dest / name, ignore=skip)


def _builds_wheels() -> bool:
    """Whether this environment's setuptools builds wheels by itself (from 70.1) or has ``wheel`` beside it."""
    from importlib.metadata import PackageNotFoundError, version
    from importlib.util import find_spec

    try:
        major, minor = (int(part) for part in version("setuptools").split(".")[:2])
    except (PackageNotFoundError, ValueError):
        return False
    return (major, minor) >= (70, 1) or find_spec("wheel") is not None


@pytest.mark.slow
@pytest.mark.skipif(not _builds_wheels(), reason="needs setuptools >= 70.1 (the [test] extra) to build the wheel offline")
def test_demo_runs_from_an_installed_wheel(tmp_path):
    """Build the wheel, install it alone into a fresh venv (dependencies: this interpreter's
    site-packages, appended after the venv's own, so nothing is downloaded and pairvel comes from the
    wheel), and run the whole ``pairvel demo`` from a folder outside any checkout."""
    src, dist, venv, work = (tmp_path / name for name in ("src", "dist", "venv", "work"))
    for folder in (src, work):
        folder.mkdir()
    _copy_sources(src)
    quiet = {"capture_output": True, "text": True, "check": True}
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index",
                    "-w", str(dist), str(src)], **quiet)
    wheel, = dist.glob("pairvel-*.whl")
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], **quiet)
    python = venv / "bin" / "python"
    subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps", "--no-index",
                    str(wheel)], **quiet)
    site = Path(subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                               **quiet).stdout.strip())
    (site / "zz_test_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}

    where = subprocess.run([str(python), "-c", "import pairvel, pairvel.configs; print(pairvel.__file__); "
                                               "print(pairvel.configs.__file__)"], cwd=work, env=env, **quiet)
    assert all(Path(line).is_relative_to(site) for line in where.stdout.split()), where.stdout
    demo = subprocess.run([str(venv / "bin" / "pairvel"), "demo", "--out", str(work / "demo"), "--quiet"],
                          cwd=work, env=env, capture_output=True, text=True, timeout=1200)
    assert demo.returncode == 0, demo.stderr
    assert "truth check: injected tau_mean = 2.000e-03" in demo.stdout
    provenance = json.loads((work / "demo" / "summary.json").read_text())["provenance"]
    installed = site / "pairvel"  # the installed config and data were read
    assert Path(provenance["config_file"]).resolve() == installed / "configs" / "demo.toml"
    assert Path(provenance["catalogue"]["path"]).resolve() == installed / "demo_data" / "larkspur_clusters.fits"
    assert Path(provenance["map"]["path"]).resolve() == installed / "demo_data" / "skerry_150ghz_partial.fits"
    assert sorted(p.name for p in work.iterdir()) == ["demo"]
