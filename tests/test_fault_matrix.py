"""Bad-input fault matrix: every case goes through the command line and is held to the same four checks.

A case is data: a :class:`Case` names the fault, writes it into a copy of the tiny survey
(``prepare``), says how to call pairvel (``argv``, or its own ``run`` callable) and what must
come out (exit code, a pattern the one error line must match).  The four checks:

(a) the exit code;
(b) stderr holds exactly one ``pairvel: error: ...`` line (for a run stopped by a signal, exit 130
    or 143: one ``pairvel: interrupted|terminated; ...`` line), last, matching the case's pattern,
    and otherwise only ``pairvel: warning: ...`` lines (no traceback, no internal error);
(c) the case folder (inputs and the intended ``--out``) holds the same entries after the run as
    before: no output folder, no hidden partial folder, no key file;
(d) every file in the case folder has the same sha256 after the run as before.

Add a case by appending to the list of its category; a case that shows a fault in pairvel goes
into ``KNOWN_FAULTS`` (a strict xfail that only an AssertionError of the checks satisfies, so a
broken ``prepare`` still fails) until the fault is fixed.  The intended ``--out`` must lie in the
case folder, which is all that checks (c) and (d) look at.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import importlib
import io
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from unittest import mock

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from astropy.table import Table
from conftest import RESTART_CONFIG, make_tiny_survey, write_healpix

from pairvel.cli import main

CATEGORIES = ("config", "catalogue", "map", "output", "signals", "concurrency")

#: The default command: run the case folder's config into a new folder ``out`` beside it.
RUN_ARGV = ("run", "{dir}/run.toml", "--out", "{dir}/out")
#: `pairvel velocities` on the case folder's config.
VELOCITIES_ARGV = ("velocities", "{dir}/run.toml", "--out", "{dir}/out")


@dataclass(frozen=True)
class Case:
    """One bad input and what pairvel must answer.

    Attributes
    ----------
    name : str
        Short id, unique in the matrix (the pytest id is ``category-name``).
    category : str
        One of :data:`CATEGORIES`.
    prepare : callable(Path) -> None
        Writes the fault into the case folder (a fresh tiny survey: cat.csv, map.fits, run.toml).
    pattern : str
        Regular expression the error line must contain (``re.search``): the key, file or row.
    argv : tuple of str
        Arguments of :func:`pairvel.cli.main`; ``{dir}`` stands for the case folder.  ``--quiet``
        is appended.
    exit_code : int
        Expected exit code (2: a user error).
    run : callable(list of str) -> int, optional
        Called instead of :func:`pairvel.cli.main` with the formatted argv (for cases that need to
        interrupt, race or patch the call).
    """

    name: str
    category: str
    prepare: Callable[[Path], None]
    pattern: str
    argv: tuple[str, ...] = RUN_ARGV
    exit_code: int = 2
    run: Callable[[list[str]], int] | None = None

    def __post_init__(self):
        if self.category not in CATEGORIES:
            raise ValueError(f"case {self.name}: category must be one of {CATEGORIES}; got {self.category!r}")

    @property
    def id(self) -> str:
        return f"{self.category}-{self.name}"


@dataclass(frozen=True)
class Outcome:
    code: int
    stderr: str
    entries_before: tuple[str, ...]
    entries_after: tuple[str, ...]
    sha_before: dict
    sha_after: dict


def snapshot(folder: Path) -> tuple[tuple[str, ...], dict]:
    """Every entry under ``folder`` (hidden ones too, relative paths) and the sha256 of every file."""
    entries = tuple(sorted(str(p.relative_to(folder)) for p in folder.rglob("*")))
    sha = {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
           for p in folder.rglob("*") if p.is_file()}
    return entries, sha


def execute(case: Case, folder: Path) -> Outcome:
    """Prepare the case in ``folder``, run it with stderr captured, and record the folder before and after."""
    case.prepare(folder)
    argv = [a.format(dir=folder) for a in case.argv] + ["--quiet"]
    entries_before, sha_before = snapshot(folder)
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = (case.run or main)(argv)
    entries_after, sha_after = snapshot(folder)
    return Outcome(code, err.getvalue(), entries_before, entries_after, sha_before, sha_after)


def problems(case: Case, out: Outcome) -> list[str]:
    """What is wrong with an outcome, one text per broken check; empty when the case behaves."""
    found = []
    if out.code != case.exit_code:
        found.append(f"(a) exit code {out.code}, expected {case.exit_code}")
    lines = out.stderr.strip().splitlines()
    prefix = "pairvel: error: " if case.exit_code == 2 else "pairvel: "  # 130/143: interrupted, terminated
    errors = [line for line in lines if line.startswith(prefix) and not line.startswith("pairvel: warning: ")]
    others = [line for line in lines if not line.startswith(("pairvel: error: ", "pairvel: warning: "))
              and line not in errors]
    if len(errors) != 1 or others or not lines or lines[-1] != errors[0]:
        found.append(f"(b) stderr must end in exactly one error line after warnings only; got {lines}")
    elif not re.search(case.pattern, errors[0]):
        found.append(f"(b) error line does not match {case.pattern!r}: {errors[0]}")
    if out.entries_after != out.entries_before:
        added = sorted(set(out.entries_after) - set(out.entries_before))
        removed = sorted(set(out.entries_before) - set(out.entries_after))
        found.append(f"(c) folder entries changed: added {added}, removed {removed}")
    changed = sorted(k for k in out.sha_before if out.sha_after.get(k) != out.sha_before[k])
    if changed:
        found.append(f"(d) input files changed: {changed}")
    return found


# ---------------------------------------------------------------------- helpers that write faults
def config_text(folder: Path) -> str:
    return (folder / "run.toml").read_text()


def replace_in_config(old: str, new: str) -> Callable[[Path], None]:
    """Replace one piece of the config text (which must be there)."""

    def prepare(folder: Path) -> None:
        text = config_text(folder)
        if old not in text:
            raise ValueError(f"{old!r} is not in the tiny config")
        (folder / "run.toml").write_text(text.replace(old, new, 1))

    return prepare


def set_in_config(section: str, line: str) -> Callable[[Path], None]:
    """Add ``line`` to ``[section]``, creating the section at the end when the config has none."""

    def prepare(folder: Path) -> None:
        text = config_text(folder)
        header = f"[{section}]\n"
        text = text.replace(header, header + line + "\n", 1) if header in text else f"{text}\n{header}{line}\n"
        (folder / "run.toml").write_text(text)

    return prepare


def write_config(text: str | bytes) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        target = folder / "run.toml"
        target.write_bytes(text) if isinstance(text, bytes) else target.write_text(text)

    return prepare


def edit_catalogue(edit: Callable[[pd.DataFrame], pd.DataFrame | None]) -> Callable[[Path], None]:
    """Apply ``edit`` to the tiny catalogue (in place or returning a new frame) and write it back as CSV."""

    def prepare(folder: Path) -> None:
        frame = pd.read_csv(folder / "cat.csv")
        edited = edit(frame)
        (frame if edited is None else edited).to_csv(folder / "cat.csv", index=False)

    return prepare


def set_cell(column: str, row: int, value) -> Callable[[Path], None]:
    def edit(frame):
        frame[column] = frame[column].astype(object if isinstance(value, str) else float)
        frame.loc[row, column] = value
        return frame

    return edit_catalogue(edit)


def ecsv_unit(column: str, unit: str) -> Callable[[Path], None]:
    """Give ``column`` of cat.ecsv the unit ``unit``."""

    def prepare(folder: Path) -> None:
        table = Table.read(folder / "cat.ecsv", format="ascii.ecsv")
        table[column].unit = unit
        table.write(folder / "cat.ecsv", format="ascii.ecsv", overwrite=True)

    return prepare


def catalogue_as(suffix: str, edit=None, *, extra_config: str = "") -> Callable[[Path], None]:
    """Write the (edited) catalogue as cat.<suffix> and point the config at it."""

    def prepare(folder: Path) -> None:
        frame = pd.read_csv(folder / "cat.csv")
        if edit is not None:
            frame = edit(frame)
        target = folder / f"cat.{suffix}"
        if suffix == "parquet":
            frame.to_parquet(target)
        elif suffix in ("fits", "ecsv"):
            Table.from_pandas(frame).write(target, format="fits" if suffix == "fits" else "ascii.ecsv")
        else:
            frame.to_csv(target, index=False)
        (folder / "cat.csv").unlink()
        replace_in_config('path = "cat.csv"', f'path = "cat.{suffix}"{extra_config}')(folder)

    return prepare


def write_file(name: str, content: bytes | Callable[[Path], None]) -> Callable[[Path], None]:
    """Replace (or create) ``name`` in the case folder with bytes, or with what ``content(path)`` writes."""

    def prepare(folder: Path) -> None:
        target = folder / name
        if target.is_file():
            target.unlink()
        content(target) if callable(content) else target.write_bytes(content)

    return prepare


def tiny_map(folder: Path) -> tuple[np.ndarray, np.ndarray]:
    """(pixels, values) of the tiny survey's partial map."""
    with fits.open(folder / "map.fits") as hdul:
        return np.array(hdul[1].data["PIXEL"]), np.array(hdul[1].data["T"])


def edit_header(path: Path, *, header: dict | None = None, drop: tuple[str, ...] = ()) -> None:
    """Set or delete cards of the first table header of a FITS file in place."""
    with fits.open(path, mode="update") as hdul:
        hdul[1].header.update(header or {})
        for key in drop:
            del hdul[1].header[key]


def rewrite_map(*, header: dict | None = None, drop: tuple[str, ...] = (), pixels=None, values=None,
                unit: str | None = "uK_CMB") -> Callable[[Path], None]:
    """Rewrite the tiny map with header cards changed or dropped, or with other pixels or values.

    ``pixels`` and ``values`` are callables of the tiny map's (pixels, values).
    """

    def prepare(folder: Path) -> None:
        pix, val = tiny_map(folder)
        target = folder / "map.fits"
        target.unlink()
        write_healpix(target, np.asarray(val if values is None else values(pix, val), np.float32), nside=256,
                      pixels=pix if pixels is None else pixels(pix, val), unit=unit)
        edit_header(target, header=header, drop=drop)

    return prepare


def with_mask(write) -> Callable[[Path], None]:
    """Write mask.fits with ``write(path)`` and name it as map.mask_path."""

    def prepare(folder: Path) -> None:
        write(folder / "mask.fits")
        replace_in_config('path = "map.fits"', 'path = "map.fits"\nmask_path = "mask.fits"')(folder)

    return prepare


def truncate(name: str, n_bytes: int) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        (folder / name).write_bytes((folder / name).read_bytes()[:n_bytes])

    return prepare


def far_pixels(n: int) -> np.ndarray:
    """``n`` nside-256 RING pixels of a disc on the other side of the sky from every tiny-survey tracer."""
    return np.sort(hp.query_disc(256, hp.ang2vec(215.0, -2.5, lonlat=True), np.radians(30)))[:n]


def text_column_map(path: Path) -> None:
    """A full-sky nside-16 HEALPix table whose only column holds text."""
    hdu = fits.BinTableHDU.from_columns([fits.Column(name="T", format="8A", array=np.array(["warm"] * 3072))])
    hdu.header.update(PIXTYPE="HEALPIX", ORDERING="RING", NSIDE=16, TUNIT1="uK_CMB")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)


def explicit_map_without_pixel_column(path: Path) -> None:
    """INDXSCHM = 'EXPLICIT' but the table has a signal column only."""
    write_healpix(path, np.zeros(100, np.float32), nside=16)
    edit_header(path, header={"INDXSCHM": "EXPLICIT"})


def two_column_ra(path: Path) -> None:
    Table({"ra": np.full((5, 2), 30.0), "dec": np.zeros(5), "z": np.full(5, 0.1)}).write(path)


def denied(target: str, name: str) -> Callable[[list[str]], int]:
    """A ``run`` for :class:`Case`: main with ``target`` (a dotted callable) refusing files called ``name``
    with PermissionError, as a file without read permission does for anyone but root."""
    module, attr = target.rsplit(".", 1)
    original = getattr(importlib.import_module(module), attr)

    def guarded(path, *args, **kwargs):
        if Path(str(path)).name == name:
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return original(path, *args, **kwargs)

    def run(argv: list[str]) -> int:
        with mock.patch(target, guarded):
            return main(argv)

    return run


def both(*steps) -> Callable[[Path], None]:
    def prepare(folder: Path) -> None:
        for step in steps:
            step(folder)

    return prepare


def with_truth(content: bytes) -> Callable[[Path], None]:
    """A truth.json holding ``content``, named by the config's run.truth_path."""
    return both(set_in_config("run", 'truth_path = "truth.json"'), write_file("truth.json", content))


def full_sky_mask(nside: int, value: float):
    return lambda path: write_healpix(path, np.full(hp.nside2npix(nside), value, np.float32), nside=nside, unit=None)


# ---------------------------------------------------------------------- config cases
CONFIG_CASES = [
    Case("unknown-section", "config", set_in_config("apertures", "radius_arcmin = 3.0"),
         r"run\.toml: unknown section '\[apertures\]' \(did you mean '\[aperture\]'\?\)"),
    Case("unknown-key-typo", "config", replace_in_config("radius_arcmin", "radius_arcmn"),
         r"run\.toml: unknown key 'aperture\.radius_arcmn' \(did you mean 'aperture\.radius_arcmin'\?\)"),
    Case("unknown-cosmology-key", "config", set_in_config("cosmology", "omega_lambda = 0.7"),
         r"unknown key 'cosmology\.omega_lambda'"),
    Case("number-as-string", "config", replace_in_config("radius_arcmin = 12.0", 'radius_arcmin = "12"'),
         r"'aperture\.radius_arcmin' must be a number; got '12'"),
    Case("number-below-bounds", "config", replace_in_config("radius_arcmin = 12.0", "radius_arcmin = 0.0"),
         r"'aperture\.radius_arcmin' must lie in \[0\.05, 60\.0\]; got 0\.0"),
    Case("number-above-bounds", "config", set_in_config("map", "max_masked_fraction = 1.5"),
         r"'map\.max_masked_fraction' must lie in \[0\.0, 1\.0\]"),
    Case("bad-choice", "config", set_in_config("covariance", 'estimator = "bootstrapp"'),
         r"'covariance\.estimator' must be one of .*'bootstrap'.*; got 'bootstrapp'"),
    Case("ordering-lower-case", "config", set_in_config("map", 'ordering = "ring"'),
         r"'map\.ordering' must be one of 'RING', 'NESTED'; got 'ring'"),
    Case("bool-as-string", "config", set_in_config("trend", 'enabled = "yes"'),
         r"'trend\.enabled' must be true or false; got 'yes'"),
    Case("missing-catalogue-path", "config", replace_in_config('path = "cat.csv"\n', ""),
         r"run\.toml: 'catalogue\.path' is required"),
    Case("missing-map-path", "config", replace_in_config('path = "map.fits"\n', ""),
         r"run\.toml: 'map\.path' is required"),
    Case("empty-path", "config", replace_in_config('path = "cat.csv"', 'path = ""'),
         r"'catalogue\.path' must be a file path string; got ''"),
    Case("path-not-a-string", "config", replace_in_config('path = "map.fits"', "path = 3"),
         r"'map\.path' must be a file path string; got 3"),
    Case("toml-syntax-error", "config", replace_in_config("seed = 3", "seed = = 3"),
         r"run\.toml: not valid TOML \(.*line 4"),
    Case("duplicate-key", "config", replace_in_config("seed = 3", "seed = 3\nseed = 4"),
         r"run\.toml: not valid TOML \(.*line 5"),
    Case("empty-file", "config", write_config(""), r"run\.toml: holds no settings"),
    Case("config-not-found", "config", lambda folder: (folder / "run.toml").unlink(),
         r"config \S*run\.toml: file not found"),
    Case("config-is-a-folder", "config", lambda folder: (folder / "settings").mkdir(),
         r"config \S*settings: is a folder, not a TOML file",
         argv=("run", "{dir}/settings", "--out", "{dir}/out")),
    Case("parent-is-a-file", "config", lambda folder: None, r"config \S*cat\.csv/run\.toml: cannot be read "
         r"\(Not a directory\)", argv=("run", "{dir}/cat.csv/run.toml", "--out", "{dir}/out")),
    Case("permission-denied", "config", lambda folder: None,
         r"config \S*run\.toml: cannot be read \(Permission denied\)", run=denied("builtins.open", "run.toml")),
    Case("section-not-a-table", "config", write_config('aperture = 3\n' + "[catalogue]\npath = 'cat.csv'\n"),
         r"run\.toml: \[aperture\] must be a table; got 3"),
    Case("seed-not-an-int", "config", replace_in_config("seed = 3", "seed = 3.5"),
         r"'run\.seed' must be an integer; got 3\.5"),
    Case("seed-a-string", "config", replace_in_config("seed = 3", 'seed = "three"'),
         r"'run\.seed' must be an integer; got 'three'"),
    Case("negative-count", "config", replace_in_config("n_random = 2", "n_random = -1"),
         r"'nulls\.n_random' must lie in \[0, 10000\]; got -1"),
    Case("too-few-regions", "config", replace_in_config("n_regions = 12", "n_regions = 1"),
         r"'covariance\.n_regions' must lie in \[2, "),
    Case("threads-zero", "config", set_in_config("compute", "n_threads = 0"), r"'compute\.n_threads' must lie in"),
    Case("bins-one-edge", "config", set_in_config("bins", "edges_mpc = [30.0]"),
         r"'bins\.edges_mpc' must be at least two increasing values >= 0; got \[30\.0\]"),
    Case("bins-not-increasing", "config", set_in_config("bins", "edges_mpc = [0.0, 60.0, 30.0]"),
         r"'bins\.edges_mpc' must increase strictly; item 3 of 3 \(30\)"),
    Case("bins-empty-list", "config", set_in_config("bins", "edges_mpc = []"),
         r"'bins\.edges_mpc' must be a non-empty list .*got \[\]"),
    Case("bins-width-not-dividing", "config", replace_in_config("width_mpc = 30.0", "width_mpc = 35.0"),
         r"'bins\.width_mpc' must divide r_max_mpc - r_min_mpc into a whole number"),
    Case("cosmology-out-of-range", "config", set_in_config("cosmology", "omega_m = 1.5"),
         r"run\.toml: cosmology parameter 'omega_m' is out of range; got 1\.5"),
    Case("cosmology-negative-h", "config", set_in_config("cosmology", "h = -0.7"),
         r"cosmology parameter 'h' is out of range; got -0\.7"),
    Case("z-range-empty", "config", set_in_config("catalogue", "z_min = 0.3\nz_max = 0.2"),
         r"'catalogue\.z_max' must exceed catalogue\.z_min; got 0\.3 and 0\.2"),
    Case("proxy-cut-without-column", "config", replace_in_config('proxy_column = "log_mass"', "proxy_min = 14.5"),
         r"'catalogue\.proxy_column' is required when proxy_min or proxy_max is set"),
    Case("bias-missing", "config", replace_in_config("bias = 1.0\n", ""),
         r"'theory\.bias' is required: tau_mean scales as 1/b"),
    Case("fit-range-empty", "config", set_in_config("theory", "fit_r_min_mpc = 60.0\nfit_r_max_mpc = 30.0"),
         r"'theory\.fit_r_max_mpc' must exceed theory\.fit_r_min_mpc"),
    Case("prior-half-set", "config", set_in_config("theory", "fit_velocity_scale = true\ntau_prior_mean = 1e-4"),
         r"'theory\.tau_prior_sigma' and theory\.tau_prior_mean must be set together"),
    Case("bias-and-bias-from-proxy", "config", set_in_config("theory", 'bias_from_proxy = "mass"'),
         r"'theory\.bias' and theory\.bias_from_proxy are both set; keep one"),
    Case("scheduler-file-and-address", "config",
         both(set_in_config("compute", 'scheduler_address = "tcp://127.0.0.1:1"\nscheduler_file = "sched.json"'),
              write_file("sched.json", b"{}")),
         r"'compute\.scheduler_file' and compute\.scheduler_address are both set; keep one"),
    Case("scheduler-file-missing", "config", set_in_config("compute", 'scheduler_file = "sched.json"'),
         r"'compute\.scheduler_file' must be the file `dask scheduler --scheduler-file` wrote; \S*sched\.json does "
         r"not exist \(start the scheduler first\)"),
    Case("v12-table-without-unit", "config",
         both(set_in_config("theory", 'velocity_model = "table"\nv12_table_path = "v12.ecsv"'),
              write_file("v12.ecsv", b"# %ECSV 1.0\n# ---\n# datatype:\n# - {name: r, datatype: float64}\n"
                                     b"# - {name: v12, unit: km / s, datatype: float64}\n# schema: astropy-2.0\n"
                                     b"r v12\n1.0 -100.0\n2.0 -90.0\n")),
         r"v12 table \S*v12\.ecsv: column 'r' must carry a unit \(a comoving separation"),
    Case("power-law-too-few-proxy-bins", "config",
         set_in_config("theory", 'proxy_bin_edges = [14.0, 14.5, 15.0]\nproxy_power_law = "log10"'),
         r"'theory\.proxy_power_law' needs theory\.proxy_bin_edges with at least 4 edges \(3 bins\)"),
    Case("repeated-radius", "config", set_in_config("aperture", "radii_arcmin = [8.0, 8.0]"),
         r"'aperture\.radii_arcmin' must not repeat a radius"),
    Case("kernel-with-subsample", "config",
         set_in_config("aperture", 'method = "kernel"\npixel_weighting = "subsample"'),
         r"'aperture\.method' kernel supports pixel_weighting centre and fraction"),
    Case("multifrequency-without-maps", "config", set_in_config("multifrequency", "frequencies_ghz = [150.0]"),
         r"'multifrequency\.frequencies_ghz' is set but multifrequency\.map_paths is not"),
    Case("prefilter-missing-noise", "config", set_in_config("prefilter", 'kind = "matched"'),
         r"'prefilter\.noise_uk_arcmin' is required for kind = 'matched'"),
    Case("not-utf8", "config", write_config(b"\xff\xfe[run]\nseed = 3\n"), r"run\.toml: is not UTF-8 text"),
    Case("bins-nan-edge", "config", set_in_config("bins", "edges_mpc = [0.0, nan]"), r"'bins\.edges_mpc'.*item 2"),
    Case("bins-inf-edge", "config", set_in_config("bins", "edges_mpc = [0.0, inf]"), r"'bins\.edges_mpc'.*item 2"),
    Case("negative-seed", "config", replace_in_config("seed = 3", "seed = -1"), r"run\.toml: 'run\.seed'"),
    Case("truth-not-found", "config", set_in_config("run", 'truth_path = "truth.json"'),
         r"run\.truth_path \S*truth\.json: file not found"),
    Case("truth-not-json", "config", with_truth(b"tau_mean = 2e-3\n"), r"run\.truth_path \S*truth\.json: is not JSON"),
    Case("truth-without-tau", "config", with_truth(b'{"tau": 2e-3}'),
         r"run\.truth_path \S*truth\.json: 'tau_mean' must be a finite number .*; got None"),
    Case("truth-tau-nan", "config", with_truth(b'{"tau_mean": NaN}'),
         r"run\.truth_path \S*truth\.json: 'tau_mean' must be a finite number .*; got nan"),
    Case("truth-permission-denied", "config", with_truth(b'{"tau_mean": 2e-3}'),
         r"run\.truth_path \S*truth\.json: cannot be read \(Permission denied\)", run=denied("io.open", "truth.json")),
    Case("partner-key-without-path", "config", set_in_config("partner", "bias = 1.2"),
         r"'partner\.bias' is set but partner\.path is not"),
    Case("partner-without-bias", "config", set_in_config("partner", 'path = "cat.csv"'),
         r"'partner\.bias' is required with partner\.path"),
    Case("partner-z-range-empty", "config", set_in_config("partner", 'path = "cat.csv"\nbias = 1.2\nz_min = 0.3\nz_max = 0.2'),
         r"'partner\.z_max' must exceed partner\.z_min"),
    Case("truth-with-blinding", "config", both(with_truth(b'{"tau_mean": 2e-3}'), set_in_config("blinding", "enabled = true")),
         r"'run\.truth_path' cannot be used with blinding\.enabled"),
    Case("velocities-without-maps", "config", lambda folder: None,
         r"multifrequency\.map_paths must list the frequency maps", argv=VELOCITIES_ARGV),
    Case("velocities-temperature-zero", "config", set_in_config("single_cluster", "electron_temperature_kev = 0.0"),
         r"run\.toml: 'single_cluster\.electron_temperature_kev'", argv=VELOCITIES_ARGV),
]

# ---------------------------------------------------------------------- catalogue cases
CATALOGUE_CASES = [
    Case("partner-file-missing", "catalogue", set_in_config("partner", 'path = "galaxies.csv"\nbias = 1.2'),
         r"catalogue \S*galaxies\.csv: file not found"),
    Case("partner-column-missing", "catalogue",
         set_in_config("partner", 'path = "cat.csv"\nbias = 1.2\nz_column = "zspec"'),
         r"cat\.csv: column 'zspec' \(partner\.z_column\) not found"),
    Case("partner-off-the-map", "catalogue",
         both(set_in_config("partner", 'path = "far.csv"\nbias = 1.2'),
              write_file("far.csv", b"ra,dec,z\n200.0,-60.0,0.15\n201.0,-61.0,0.16\n202.0,-62.0,0.17\n")),
         r"partner catalogue \S*far\.csv: fewer than 2 tracers have usable apertures \(3 of 3 dropped\)"),
    Case("missing-ra", "catalogue", edit_catalogue(lambda f: f.drop(columns="ra")),
         r"cat\.csv: column 'ra' \(catalogue\.ra_column\) not found; columns are: dec, z, log_mass"),
    Case("missing-z", "catalogue", edit_catalogue(lambda f: f.drop(columns="z")),
         r"cat\.csv: column 'z' \(catalogue\.z_column\) not found"),
    Case("renamed-dec-column", "catalogue", set_in_config("catalogue", 'dec_column = "DEC"'),
         r"column 'DEC' \(catalogue\.dec_column\) not found"),
    Case("string-in-z", "catalogue", set_cell("z", 5, "high"),
         r"cat\.csv: column 'z' \(catalogue\.z_column\) must be numeric; got object"),
    Case("nan-in-ra", "catalogue", set_cell("ra", 23, np.nan),
         r"cat\.csv: column 'ra' must be finite and within \[-360, 360\] degrees; 1 rows are not \(first: row 23, "),
    Case("nan-in-dec", "catalogue", set_cell("dec", 4, np.nan), r"column 'dec' .*\(first: row 4, dec=nan\)"),
    Case("dec-above-90", "catalogue", set_cell("dec", 9, 90.5), r"column 'dec' must be finite and within "
         r"\[-90, 90\] degrees; 1 rows are not \(first: row 9, dec=90\.5\)"),
    Case("ra-beyond-360", "catalogue", set_cell("ra", 31, 400.0), r"column 'ra' .*\(first: row 31, ra=400\)"),
    Case("negative-z", "catalogue", set_cell("z", 12, -0.1),
         r"column 'z' must be finite and > 0; 1 rows are not \(first: row 12, z=-0\.1\) "
         r"\(set catalogue\.drop_invalid_rows = true"),
    Case("zero-z", "catalogue", set_cell("z", 0, 0.0), r"column 'z' .*\(first: row 0, z=0\)"),
    Case("nan-proxy", "catalogue", set_cell("log_mass", 100, np.nan),
         r"column 'log_mass' must be finite; 1 rows are not \(first: row 100"),
    Case("negative-weight", "catalogue",
         both(edit_catalogue(lambda f: f.assign(w=np.where(np.arange(len(f)) == 42, -2.0, 1.0))),
              set_in_config("catalogue", 'weight_column = "w"')),
         r"column 'w' must be finite and >= 0; 1 rows are not \(first: row 42, w=-2\)"),
    Case("weight-column-missing", "catalogue", set_in_config("catalogue", 'weight_column = "w"'),
         r"column 'w' \(catalogue\.weight_column\) not found"),
    Case("proxy-column-missing", "catalogue",
         both(edit_catalogue(lambda f: f.drop(columns="log_mass")), set_in_config("catalogue", "proxy_min = 14.2")),
         r"column 'log_mass' \(catalogue\.proxy_column\) not found"),
    Case("source-list-missing", "catalogue", set_in_config("source_mask", 'path = "sources.csv"'),
         r"source list \S*sources\.csv: file not found"),
    Case("source-list-nan-dec", "catalogue",
         both(write_file("sources.csv", b"ra,dec\n30.0,2.0\n31.0,nan\n"), set_in_config("source_mask", 'path = "sources.csv"')),
         r"source list \S*sources\.csv: column 'dec' must be finite .*first: row 1"),
    Case("ra-column-in-mpc", "catalogue", both(catalogue_as("ecsv"), ecsv_unit("ra", "Mpc")),
         r"catalogue \S*cat\.ecsv: column 'ra' \(catalogue\.ra_column\) has unit 'Mpc', which is not an angle"),
    Case("fits-no-rows", "catalogue", catalogue_as("fits", lambda f: f.iloc[:0]), r"cat\.fits: has no rows"),
    Case("fits-two-numbers-per-row", "catalogue", both(catalogue_as("fits"), write_file("cat.fits", two_column_ra)),
         r"cat\.fits: column 'ra' \(catalogue\.ra_column\) must be one number per row"),
    Case("infinite-z", "catalogue", set_cell("z", 3, np.inf), r"column 'z' .*\(first: row 3, z=inf\)"),
    Case("all-rows-cut-by-z", "catalogue", set_in_config("catalogue", "z_min = 0.5\nz_max = 0.9"),
         r"cat\.csv: 0 tracers left after cuts .*'outside_z_range': 600.*need at least 2"),
    Case("one-row-left-by-proxy", "catalogue",
         both(edit_catalogue(lambda f: f.assign(log_mass=np.where(np.arange(len(f)) == 0, 16.0, 14.5))),
              set_in_config("catalogue", "proxy_min = 15.5")),
         r"cat\.csv: 1 tracers left after cuts .*need at least 2"),
    Case("empty-file", "catalogue", write_file("cat.csv", b""), r"cat\.csv: cannot be read as csv"),
    Case("binary-garbage", "catalogue", write_file("cat.csv", bytes(range(256)) * 8), r"cat\.csv"),
    Case("file-not-found", "catalogue", write_file("cat.csv", lambda p: None),
         r"catalogue \S*cat\.csv: file not found"),
    Case("path-is-a-folder", "catalogue", write_file("cat.csv", lambda p: p.mkdir()),
         r"catalogue \S*cat\.csv: file not found"),
    Case("parent-is-a-file", "catalogue", replace_in_config('path = "cat.csv"', 'path = "map.fits/cat.csv"'),
         r"catalogue \S*map\.fits/cat\.csv: file not found"),
    Case("permission-denied", "catalogue", lambda folder: None,
         r"catalogue \S*cat\.csv: cannot be read as csv \(.*Permission denied", run=denied("pandas.read_csv", "cat.csv")),
    Case("unknown-suffix", "catalogue", catalogue_as("txt"),
         r"cat\.txt: cannot tell the format from the suffix; set catalogue\.format"),
    Case("format-says-fits", "catalogue", set_in_config("catalogue", 'format = "fits"'),
         r"cat\.csv: cannot be read as fits"),
    Case("fits-without-table", "catalogue",
         both(catalogue_as("fits"), write_file("cat.fits", lambda p: fits.PrimaryHDU(np.zeros((4, 4))).writeto(p))),
         r"cat\.fits: cannot be read as fits"),
    Case("fits-nan-z", "catalogue",
         catalogue_as("fits", lambda f: f.assign(z=np.where(np.arange(len(f)) == 7, np.nan, f["z"]))),
         r"cat\.fits: column 'z' .*\(first: row 7, z=nan\)"),
    Case("ecsv-missing-dec", "catalogue", catalogue_as("ecsv", lambda f: f.drop(columns="dec")),
         r"cat\.ecsv: column 'dec' \(catalogue\.dec_column\) not found"),
    Case("ecsv-truncated", "catalogue",
         both(catalogue_as("ecsv"), lambda d: (d / "cat.ecsv").write_text((d / "cat.ecsv").read_text()[:300])),
         r"cat\.ecsv: cannot be read as ecsv"),
    Case("parquet-negative-z", "catalogue",
         catalogue_as("parquet", lambda f: f.assign(z=np.where(np.arange(len(f)) == 3, -1.0, f["z"]))),
         r"cat\.parquet: column 'z' .*\(first: row 3, z=-1\)"),
    Case("parquet-string-ra", "catalogue", catalogue_as("parquet", lambda f: f.assign(ra=f["ra"].astype(str))),
         r"cat\.parquet: column 'ra' \(catalogue\.ra_column\) must be numeric"),
    Case("parquet-not-parquet", "catalogue", both(catalogue_as("parquet"), write_file("cat.parquet", b"ra,dec,z\n1,2,3\n")),
         r"cat\.parquet: cannot be read as parquet"),
    Case("duplicate-rows", "catalogue", edit_catalogue(lambda f: pd.concat([f, f.iloc[[5, 9]]])),
         r"cat\.csv: 2 rows repeat the ra, dec and z .*row 600 repeats row 5.*catalogue\.duplicate_rows"),
    Case("header-only", "catalogue", edit_catalogue(lambda f: f.iloc[:0]), r"cat\.csv: has no rows"),
]

# ---------------------------------------------------------------------- map cases
MAP_CASES = [
    Case("not-fits", "map", write_file("map.fits", b"SIMPLE but not really a FITS file\n" * 30),
         r"map \S*map\.fits cannot be read as FITS"),
    Case("not-found", "map", write_file("map.fits", lambda p: None), r"map \S*map\.fits cannot be read: no such file"),
    Case("path-is-a-folder", "map", write_file("map.fits", lambda p: p.mkdir()),
         r"map \S*map\.fits cannot be read: no such file"),
    Case("permission-denied", "map", lambda folder: None, r"map \S*map\.fits cannot be read as FITS \(.*Permission denied",
         run=denied("astropy.io.fits.open", "map.fits")),
    Case("image-not-table", "map", write_file("map.fits", lambda p: fits.PrimaryHDU(np.zeros((8, 8))).writeto(p)),
         r"map\.fits has no celestial WCS \(CTYPE1/CTYPE2"),  # an image goes to the rectangular-map reader
    Case("table-not-healpix", "map", rewrite_map(drop=("PIXTYPE", "NSIDE")),
         r"map\.fits is not a HEALPix FITS map: its table has neither PIXTYPE"),
    Case("bad-ordering", "map", rewrite_map(header={"ORDERING": "SPIRAL"}),
         r"map\.fits: ORDERING must be RING or NESTED; got 'SPIRAL'"),
    Case("no-ordering", "map", rewrite_map(drop=("ORDERING",)),
         r"map\.fits has no ORDERING keyword; set map\.ordering"),
    Case("no-nside", "map", rewrite_map(drop=("NSIDE",)), r"map\.fits has no NSIDE keyword"),
    Case("nside-not-power-of-2", "map", rewrite_map(header={"NSIDE": 200}),
         r"map\.fits: NSIDE must be a power of 2 between 1 and 2\^29; got 200"),
    Case("nside-not-a-number", "map", rewrite_map(header={"NSIDE": "big"}),
         r"map\.fits: NSIDE must be an integer power of 2; got 'big'"),
    Case("pixel-index-out-of-range", "map", rewrite_map(pixels=lambda p, v: np.append(p[:-1], 12 * 256 ** 2 + 5)),
         r"map\.fits: pixel indices must be in \[0, 786432\) at NSIDE = 256"),
    Case("pixel-index-repeated", "map", rewrite_map(pixels=lambda p, v: np.append(p[:-1], p[0])),
         r"map\.fits: pixel indices must be unique; 1 repeat \(first: pixel \d+\)"),
    Case("unknown-unit", "map", rewrite_map(unit="counts"),
         r"map \S*map\.fits unit must be a CMB temperature \(K_CMB.*got 'counts'"),
    Case("brightness-unit-without-frequency", "map", rewrite_map(unit="Jy/sr"),
         r"map \S*map\.fits unit 'Jy/sr' is not a CMB temperature.*needs the map's frequency; set map\.frequency_ghz"),
    Case("no-unit", "map", rewrite_map(unit=None), r"map\.fits names no unit .*set map\.unit"),
    Case("unknown-unit-in-config", "map", both(rewrite_map(unit=None), set_in_config("map", 'unit = "K_Planck"')),
         r"map\.fits: requested unit must be a CMB temperature \(K_CMB.*got 'K_Planck'"),
    Case("rj-unit-in-config-without-frequency", "map", both(rewrite_map(unit=None), set_in_config("map", 'unit = "K_RJ"')),
         r"map\.fits: requested unit 'K_RJ' is not a CMB temperature.*set map\.frequency_ghz"),
    Case("bad-frequency-card", "map", rewrite_map(unit="MJy/sr", header={"FREQ": "warm"}),
         r"map\.fits: header FREQ must be a frequency .*got 'warm'"),
    Case("bandpass-decreasing", "map",
         both(rewrite_map(unit="MJy/sr"), lambda folder: (folder / "band.txt").write_text("150 1\n140 1\n"),
              set_in_config("map", 'bandpass_path = "band.txt"')),
         r"bandpass \S*band\.txt: frequencies must increase strictly; row 1 \(140 GHz\)"),
    Case("bad-coordsys", "map", rewrite_map(header={"COORDSYS": "X"}),
         r"map\.fits: COORDSYS must be C \(equatorial\), G \(Galactic\) or E \(ecliptic\); got 'X'"),
    Case("field-beyond-columns", "map", set_in_config("map", "field = 3"),
         r"map\.fits: field must be in \[0, 0\] \(columns \['T'\]\); got 3"),
    Case("all-nan", "map", rewrite_map(values=lambda p, v: np.full(v.size, np.nan)),
         r"map\.fits: every pixel is UNSEEN or NaN"),
    Case("full-sky-wrong-count", "map",
         write_file("map.fits", lambda p: write_healpix(p, np.zeros(1000, np.float32), nside=16)),
         r"map\.fits: a full-sky map at NSIDE = 16 must have 3072 pixels; the file has 1000"),
    Case("truncated-in-data", "map", truncate("map.fits", 2 * 2880 + 1000),
         r"map\.fits cannot be read as a HEALPix map \(buffer is too small"),
    Case("no-overlap-with-tracers", "map", rewrite_map(pixels=lambda p, v: far_pixels(p.size)),
         r"map \S*map\.fits: fewer than 2 tracers have usable apertures \(600 of 600 dropped: 53 too few pixels in the "
         r"aperture, 547 outside the map\)"),
    Case("mask-other-nside", "map", with_mask(full_sky_mask(128, 1.0)),
         r"mask \S*mask\.fits has nside 128 but the map has nside 256"),
    Case("noise-map-other-nside", "map", both(lambda f: full_sky_mask(128, 1.0)(f / "ivar.fits"),
                                              set_in_config("noise", 'path = "ivar.fits"')),
         r"noise map \S*ivar\.fits has nside 128 but the map has nside 256"),
    Case("noise-map-negative", "map", both(lambda f: full_sky_mask(256, -1.0)(f / "ivar.fits"),
                                           set_in_config("noise", 'path = "ivar.fits"')),
         r"noise map \S*ivar\.fits: no pixel has a positive inverse variance"),
    Case("mask-value-out-of-range", "map", with_mask(full_sky_mask(256, 2.0)),
         r"mask \S*mask\.fits must hold values in \[0, 1\]; 786432 pixels do not \(first: pixel 0, value 2\)"),
    Case("mask-everything", "map", with_mask(full_sky_mask(256, 0.0)),
         r"map \S*map\.fits: fewer than 2 tracers have usable apertures \(600 of 600 dropped: 53 too few pixels in the "
         r"aperture, 547 masked\)"),
    Case("mask-not-fits", "map", with_mask(lambda p: p.write_text("1 1 1 0 0\n")),
         r"mask \S*mask\.fits cannot be read as FITS"),
    Case("nside-zero", "map", rewrite_map(header={"NSIDE": 0}), r"map\.fits: NSIDE must be a power of 2 .*; got 0"),
    Case("field-negative", "map", set_in_config("map", "field = -1"), r"map\.fits: field must be in \[0, 0\] .*got -1"),
    Case("mask-not-found", "map", replace_in_config('path = "map.fits"', 'path = "map.fits"\nmask_path = "no.fits"'),
         r"mask \S*no\.fits cannot be read: no such file"),
    Case("kelvin-labelled-uk", "map", rewrite_map(values=lambda pix, val: val * 1e-6),
         r"map\.fits: pixel rms is 3e-05 uK .*'uK_CMB'.*map\.rms_unit_check = false"),
    Case("uk-labelled-kelvin", "map", rewrite_map(values=lambda pix, val: val * 10, unit="K_CMB"),
         r"map\.fits: pixel rms is 3e\+08 uK .*'K_CMB'.*map\.rms_unit_check = false"),
    Case("text-column", "map", write_file("map.fits", text_column_map), r"map\.fits.*numeric"),
    Case("truncated-in-header", "map", truncate("map.fits", 5000), r"map\.fits cannot be read: .*truncated"),
    Case("explicit-without-pixel-column", "map", write_file("map.fits", explicit_map_without_pixel_column),
         r"map\.fits: INDXSCHM = 'EXPLICIT' .* no PIXEL column"),
]

# ---------------------------------------------------------------------- output folder cases
_EARLIER = {}


def _earlier_output_template() -> Path:
    """A real output of the tiny survey, made once per session and copied into cases that need one."""
    if "path" not in _EARLIER:
        holder = tempfile.TemporaryDirectory(prefix="pairvel-matrix-")
        _EARLIER["holder"] = holder  # removed when the session ends
        base = Path(holder.name)
        survey = base / "survey"
        survey.mkdir()
        make_tiny_survey(survey)  # the same inputs as every case folder
        with contextlib.redirect_stderr(io.StringIO()), contextlib.redirect_stdout(io.StringIO()):
            code = main(["run", str(survey / "run.toml"), "--out", str(base / "out"), "--quiet"])
        assert code == 0, "the tiny survey must run to make the earlier output"
        _EARLIER["path"] = base / "out"
    return _EARLIER["path"]


def earlier_output(edit: Callable[[Path], None] | None = None) -> Callable[[Path], None]:
    """Put a finished pairvel output at ``out`` in the case folder, then apply ``edit(out)``."""

    def prepare(folder: Path) -> None:
        shutil.copytree(_earlier_output_template(), folder / "out")
        if edit is not None:
            edit(folder / "out")

    return prepare


def _add_note(out: Path) -> None:
    (out / "notes.txt").write_text("my notes on this run\n")


def _change_summary(out: Path) -> None:
    (out / "summary.json").write_text((out / "summary.json").read_text() + " ")


def _drop_manifest(out: Path) -> None:
    (out / ".pairvel-manifest.json").unlink()


def _config_inside(out: Path) -> None:
    """A copy of the config, with absolute input paths, kept inside the earlier output."""
    text = config_text(out.parent).replace('"cat.csv"', f'"{out.parent}/cat.csv"')
    (out / "run.toml").write_text(text.replace('"map.fits"', f'"{out.parent}/map.fits"'))


def _catalogue_inside(folder: Path) -> None:
    shutil.copy(folder / "cat.csv", folder / "out" / "cat.csv")
    replace_in_config('path = "cat.csv"', 'path = "out/cat.csv"')(folder)


def user_folder(folder: Path) -> None:
    (folder / "out").mkdir()
    (folder / "out" / "thesis.tex").write_text("\\section{Results}\n")


def in_case_folder(argv: list[str]) -> int:
    """main() run from the case folder, so the default output folder ./<run.name> lies there."""
    with contextlib.chdir(Path(argv[1]).parent):
        return main(argv)


def mkdir_denied(argv: list[str]) -> int:
    """main() where creating any folder named ``out`` fails as in a folder without write permission."""
    original = os.mkdir

    def guarded(path, *args, **kwargs):
        if Path(str(path)).name == "out":
            raise PermissionError(errno.EACCES, "Permission denied", str(path))
        return original(path, *args, **kwargs)

    with mock.patch("os.mkdir", guarded):
        return main(argv)


def blinded(key_line: str = "") -> Callable[[Path], None]:
    return set_in_config("blinding", f"enabled = true\n{key_line}".rstrip())


def a_key(folder: Path) -> None:
    """A valid blinding key k.json (of another run)."""
    from pairvel.report.blinding import write_key

    write_key(folder / "k.json", run_name="another")


FORCE_ARGV = RUN_ARGV + ("--force",)
NO_OUT_ARGV = ("run", "{dir}/run.toml")

OUTPUT_CASES = [
    Case("exists-without-force", "output", earlier_output(), r"out exists already.*--force"),
    Case("user-folder-with-force", "output", user_folder, r"out exists and is not a pairvel output", argv=FORCE_ARGV),
    Case("user-folder-without-force", "output", user_folder, r"out exists already", argv=RUN_ARGV),
    Case("force-with-a-note-inside", "output", earlier_output(_add_note),
         r"out holds notes\.txt \(not written by pairvel\)", argv=FORCE_ARGV),
    Case("force-with-a-changed-output", "output", earlier_output(_change_summary),
         r"out holds summary\.json \(changed since pairvel wrote it\)", argv=FORCE_ARGV),
    Case("force-with-a-subfolder-inside", "output", earlier_output(lambda out: (out / "plots").mkdir()),
         r"out holds plots \(not written by pairvel\)", argv=FORCE_ARGV),
    Case("force-without-manifest", "output", earlier_output(_drop_manifest),
         r"without a list of its files \(\.pairvel-manifest\.json\)", argv=FORCE_ARGV),
    Case("force-config-inside", "output", earlier_output(_config_inside), r"holds the config file \S*out/run\.toml",
         argv=("run", "{dir}/out/run.toml", "--out", "{dir}/out", "--force")),
    Case("force-catalogue-inside", "output", both(earlier_output(), _catalogue_inside), r"holds catalogue\.path \S*out/cat\.csv",
         argv=FORCE_ARGV),
    Case("force-working-folder-inside", "output", earlier_output(), r"must not hold an input of the run",
         argv=("run", "{dir}/run.toml", "--out", "{dir}", "--force")),
    Case("parent-missing", "output", lambda folder: None, r"missing.*does not exist",
         argv=("run", "{dir}/run.toml", "--out", "{dir}/missing/out")),
    Case("parent-is-a-file", "output", lambda folder: None, r"parent folder \S*cat\.csv is not a folder",
         argv=("run", "{dir}/run.toml", "--out", "{dir}/cat.csv/out")),
    Case("out-is-a-file", "output", lambda folder: None, r"cat\.csv",
         argv=("run", "{dir}/run.toml", "--out", "{dir}/cat.csv", "--force")),
    Case("parent-not-writable", "output", lambda folder: None, r"out: cannot be created \(Permission denied\)", run=mkdir_denied),
    Case("run-name-dot-dot", "output", replace_in_config('name = "tiny"', 'name = ".."'), r"run\.name",
         argv=NO_OUT_ARGV + ("--force",), run=in_case_folder),
    Case("run-name-dot", "output", replace_in_config('name = "tiny"', 'name = "."'), r"run\.name",
         argv=NO_OUT_ARGV + ("--force",), run=in_case_folder),
    Case("run-name-slash", "output", replace_in_config('name = "tiny"', 'name = "a/b"'), r"run\.name",
         argv=NO_OUT_ARGV, run=in_case_folder),
    Case("run-name-backslash", "output", replace_in_config('name = "tiny"', 'name = "a\\\\b"'), r"run\.name",
         argv=NO_OUT_ARGV, run=in_case_folder),
    Case("run-name-empty", "output", replace_in_config('name = "tiny"', 'name = ""'), r"run\.name",
         argv=NO_OUT_ARGV, run=in_case_folder),
    Case("key-inside-output", "output", blinded('key_path = "out/key.json"'), r"holds blinding\.key_path \S*out/key\.json"),
    Case("key-not-a-key", "output", both(write_file("key.json", b'{"factor": "big"}'), blinded('key_path = "key.json"')),
         r"key\.json: not a pairvel blinding key"),
    Case("key-folder-missing", "output", blinded('key_path = "keys/key.json"'), r"folder \S*keys does not exist"),
    Case("unblind-not-an-output", "output", a_key, r"output folder \S+: cannot be read back as a pairvel output",
         argv=("unblind", "{dir}", "--key", "{dir}/k.json", "--out", "{dir}/out")),
    Case("unblind-bad-key", "output", both(earlier_output(), write_file("k.json", b"not json")), r"k\.json: cannot be read as JSON",
         argv=("unblind", "{dir}/out", "--key", "{dir}/k.json", "--out", "{dir}/unblinded")),
    Case("unblind-unblinded-output", "output", both(earlier_output(), a_key), r"out: is not blinded",
         argv=("unblind", "{dir}/out", "--key", "{dir}/k.json", "--out", "{dir}/unblinded")),
    Case("validate-into-existing", "output", user_folder, r"out exists already",
         argv=("validate", "{dir}/out", "--n-mocks", "2")),
    Case("mock-into-non-empty", "output", user_folder, r"out exists and is not empty",
         argv=("mock", "{dir}/out", "--n-tracers", "100", "--nside", "64")),
    Case("demo-into-existing", "output", user_folder, r"out exists already", argv=("demo", "--out", "{dir}/out")),
]


# ---------------------------------------------------------------------- runs from a tracer table
AGAIN_ARGV = ("run", "{dir}/run.toml", "--out", "{dir}/again")


def restart_config(table: str = "out/tracers.fits", **settings: str) -> Callable[[Path], None]:
    """Replace the config by one that starts from ``table``, with ``section="lines"`` added."""

    def prepare(folder: Path) -> None:
        write_config(RESTART_CONFIG.format(table=table))(folder)
        for section, lines in settings.items():
            set_in_config(section, lines)(folder)

    return prepare


def nan_temperature(out: Path) -> None:
    with fits.open(out / "tracers.fits", mode="update") as hdul:
        data = hdul["TRACERS"].data
        data["t_raw_uK"][np.flatnonzero(data["used"])[0]] = np.nan


RESTART_CASES = [
    Case("restart-with-catalogue-path", "config", set_in_config("restart", 'table_path = "out/tracers.fits"'),
         r"run\.toml: 'catalogue\.path' is not used when restart\.table_path is set"),
    Case("restart-with-prefilter", "config", restart_config(prefilter='kind = "highpass"'),
         r"'prefilter\.kind' is not used when restart\.table_path is set"),
    Case("restart-simulations", "config", restart_config(covariance='estimator = "simulations"'),
         r"'covariance\.estimator' = 'simulations' needs the sky map"),
    Case("restart-table-missing", "catalogue", restart_config(), r"tracer table \S*out/tracers\.fits: file not found",
         argv=AGAIN_ARGV),
    Case("restart-not-a-table", "catalogue", restart_config("map.fits"),
         r"tracer table \S*map\.fits: not a pairvel tracer table", argv=AGAIN_ARGV),
    Case("restart-not-fits", "catalogue", restart_config("cat.csv"),
         r"tracer table \S*cat\.csv: cannot be read as a pairvel tracer table", argv=AGAIN_ARGV),
    Case("restart-other-radius", "catalogue",
         both(earlier_output(), restart_config(), replace_in_config("radius_arcmin = 12.0", "radius_arcmin = 8.0")),
         r"aperture\.radius_arcmin = 8 but tracer table \S*tracers\.fits holds the primary radius 12 arcmin; set "
         r"aperture\.radius_arcmin = 12", argv=AGAIN_ARGV),
    Case("restart-radius-not-held", "catalogue", both(earlier_output(), restart_config(aperture="radii_arcmin = [8.0]")),
         r"aperture\.radii_arcmin: 8 arcmin is not in tracer table \S*tracers\.fits \(it holds 12 arcmin\)",
         argv=AGAIN_ARGV),
    Case("restart-other-pixel-weighting", "catalogue",
         both(earlier_output(), restart_config(aperture='pixel_weighting = "fraction"')),
         r"aperture\.pixel_weighting = 'fraction' but tracer table \S+ was measured with 'centre'", argv=AGAIN_ARGV),
    Case("restart-no-weight-column", "catalogue",
         both(earlier_output(), restart_config(catalogue='weight_column = "w"')),
         r"tracer table \S+: has no 'weight' column, but catalogue\.weight_column is set", argv=AGAIN_ARGV),
    Case("restart-nan-temperature", "catalogue", both(earlier_output(nan_temperature), restart_config()),
         r"tracers\.fits: column 't_raw_uK' must be finite where used is true; 1 rows are not \(first: table row \d+, "
         r"catalogue row \d+\)", argv=AGAIN_ARGV),
]


# ---------------------------------------------------------------------- signals and concurrency
ROOT = Path(__file__).resolve().parents[1]


slow = set_in_config("nulls", "n_shuffle = 2000")  # a tiny run long enough to be interrupted


def _slow_run(folder: Path, argv: list[str]) -> subprocess.Popen:
    """``pairvel <argv>`` in a subprocess (the case's config made :data:`slow`); returns once it holds
    its output folder (the claim file is there)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen([sys.executable, "-m", "pairvel.cli", *argv], cwd=folder, env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 120
    while not (folder / "out" / ".pairvel-claim").is_file():
        if proc.poll() is not None or time.monotonic() > deadline:
            proc.kill()
            raise RuntimeError(f"the slow run never claimed its output: {proc.communicate()}")
        time.sleep(0.02)
    return proc


def signalled(sig: int, *, after_s: float = 0.0) -> Callable[[list[str]], int]:
    """A ``run``: pairvel in a subprocess, sent ``sig`` ``after_s`` seconds after it claimed its output;
    its stderr is passed on and its exit code returned."""

    def run(argv: list[str]) -> int:
        folder = Path(argv[1]).parent
        proc = _slow_run(folder, argv)
        time.sleep(after_s)
        proc.send_signal(sig)
        _, err = proc.communicate(timeout=120)
        sys.stderr.write(err)
        return proc.returncode

    return run


def while_another_runs(argv: list[str]) -> int:
    """A second command into the output path a running pairvel holds; the first is then stopped with
    SIGTERM (and must clean up), so only the second command's answer is judged.  Should the first
    run finish before the signal arrives, its complete output is removed here: the case's pattern
    ("claimed by another pairvel command", not "exists already") still proves the second command
    met the first run's claim."""
    folder = Path(argv[1]).parent
    first = _slow_run(folder, ["run", str(folder / "run.toml"), "--out", str(folder / "out"), "--quiet"])
    try:
        code = main(argv)
    finally:
        first.send_signal(signal.SIGTERM)
        first.communicate(timeout=120)
    if first.returncode == 0:  # it finished before the signal (a loaded machine): its output is its own
        shutil.rmtree(folder / "out")
    elif first.returncode != 143:
        raise AssertionError(f"the first run ended with {first.returncode}, neither 0 nor 143")
    return code  # the second command's pattern ('claimed by') shows the first still held the path


def claimed_by(*, host: str | None = None, pid: int | None = None) -> Callable[[Path], None]:
    """``out`` held by the claim record of another command (this test process, or another host)."""

    def prepare(folder: Path) -> None:
        (folder / "out").mkdir()
        record = {"kind": "pairvel output claim", "role": "target", "token": "matrix", "created": True,
                  "pid": pid or os.getpid(), "host": host or socket.gethostname(), "process_start": None,
                  "started_utc": "2026-12-04T00:00:00+00:00", "command": "pairvel run other.toml"}
        (folder / "out" / ".pairvel-claim").write_text(json.dumps(record))

    return prepare


SIGNAL_CASES = [
    Case("sigterm-at-claim", "signals", slow, r"pairvel: terminated; no output written",
         exit_code=143, run=signalled(signal.SIGTERM)),
    Case("sigterm-during-work", "signals", slow, r"pairvel: terminated; no output written",
         exit_code=143, run=signalled(signal.SIGTERM, after_s=2.0)),
    Case("sigint-during-work", "signals", slow, r"pairvel: interrupted; no output written",
         exit_code=130, run=signalled(signal.SIGINT, after_s=1.0)),
    Case("sigterm-blinded-run", "signals", both(slow, blinded()), r"pairvel: terminated; no output written",
         exit_code=143, run=signalled(signal.SIGTERM, after_s=1.0)),
    Case("sigterm-force-over-earlier", "signals", both(slow, earlier_output()), r"pairvel: terminated; no output written",
         argv=FORCE_ARGV, exit_code=143, run=signalled(signal.SIGTERM, after_s=1.0)),
]

CONCURRENCY_CASES = [
    Case("second-run-same-out", "concurrency", slow, r"out.*claimed by another pairvel command",
         run=while_another_runs),
    Case("second-run-same-out-force", "concurrency", slow, r"out.*claimed by another pairvel command",
         argv=FORCE_ARGV, run=while_another_runs),
    Case("validate-into-running-out", "concurrency", slow, r"claimed by another pairvel command",
         argv=("validate", "{dir}/out", "--n-mocks", "2"), run=while_another_runs),
    Case("mock-into-running-out", "concurrency", slow, r"claimed by another pairvel command",
         argv=("mock", "{dir}/out", "--n-tracers", "100", "--nside", "64"), run=while_another_runs),
    Case("claim-of-a-live-process", "concurrency", claimed_by(), r"claimed by another pairvel command"),
    Case("claim-of-a-live-process-force", "concurrency", claimed_by(), r"claimed by another pairvel command",
         argv=FORCE_ARGV),
    Case("claim-from-another-host", "concurrency", claimed_by(host="elsewhere.invalid", pid=1),
         r"claimed by another pairvel command"),
]


def fault(case: Case, reason: str):
    """A case pairvel fails today: a strict xfail, so fixing the fault turns it into a failure to move."""
    return pytest.param(case, id=case.id, marks=pytest.mark.xfail(strict=True, raises=AssertionError, reason=reason))


KNOWN_FAULTS = []  # every fault found so far is fixed; add new ones here with fault(...)


def _param(case: Case):
    return pytest.param(case, id=case.id)


ALL_CASES = [_param(c) for c in CONFIG_CASES + CATALOGUE_CASES + MAP_CASES + OUTPUT_CASES + RESTART_CASES
             + SIGNAL_CASES + CONCURRENCY_CASES] + KNOWN_FAULTS


def test_case_ids_are_unique():
    ids = [p.id for p in ALL_CASES]
    assert len(ids) == len(set(ids)), sorted(i for i in ids if ids.count(i) > 1)


@pytest.mark.parametrize("case", ALL_CASES)
def test_bad_input(case, tiny_survey):
    assert problems(case, execute(case, tiny_survey)) == []


# ---------------------------------------------------------------------- the harness catches each broken check
def _fake_run(*, code=2, lines=("pairvel: error: config run.toml: unknown key 'x'",), touch=None, append=None):
    """A stand-in for pairvel.cli.main that misbehaves in one chosen way."""

    def run(argv):
        folder = Path(argv[1]).parent
        for line in lines:
            print(line, file=sys.stderr)
        if touch:
            (folder / touch).mkdir()
        if append:
            with open(folder / append, "a") as fh:
                fh.write("extra\n")
        return code

    return run


@pytest.mark.parametrize("fake, broken", [
    (_fake_run(), None),
    (_fake_run(code=0), "(a)"),
    (_fake_run(code=1), "(a)"),
    (_fake_run(lines=()), "(b)"),
    (_fake_run(lines=("pairvel: error: one", "pairvel: error: two")), "(b)"),
    (_fake_run(lines=("Traceback (most recent call last):", "pairvel: error: config run.toml: unknown key 'x'")), "(b)"),
    (_fake_run(lines=("pairvel: error: config run.toml: unknown key 'x'", "pairvel: warning: late")), "(b)"),
    (_fake_run(lines=("pairvel: internal error: KeyError: 'x'",)), "(b)"),
    (_fake_run(lines=("pairvel: error: config run.toml: unknown key 'y'",)), "(b)"),
    (_fake_run(touch=".out-partial"), "(c)"),
    (_fake_run(append="cat.csv"), "(d)"),
], ids=["behaves", "exit-0", "exit-1", "no-line", "two-lines", "traceback", "error-not-last", "internal",
        "wrong-key", "leftover-folder", "input-changed"])
def test_harness_reports_each_broken_check(fake, broken, tmp_path):
    case = Case("fake", "config", write_file("cat.csv", b"ra,dec,z\n1,2,0.1\n"), r"unknown key 'x'", run=fake)
    found = problems(case, execute(case, tmp_path))
    if broken is None:
        assert found == []
    else:
        assert [p[:3] for p in found] == [broken], found


def test_the_output_cases_refuse_for_their_fault_alone(tiny_survey, capsys):
    """Control for the --force cases: the same earlier output, untouched, is replaced (exit 0), and
    the same slow config runs to the end when nothing interrupts it."""
    earlier_output()(tiny_survey)
    old = json.loads((tiny_survey / "out" / "summary.json").read_text())["provenance"]["started_utc"]
    assert main([a.format(dir=tiny_survey) for a in FORCE_ARGV] + ["--quiet"]) == 0
    new = json.loads((tiny_survey / "out" / "summary.json").read_text())["provenance"]["started_utc"]
    assert (tiny_survey / "out" / ".pairvel-output").is_file() and new >= old
    assert not [p for p in tiny_survey.iterdir() if p.name.startswith(".")]
