"""Command line: ``pairvel run | demo | mock | validate | velocities | keys``.

A thin layer over the library.  Every :class:`~pairvel.core.errors.PairvelError` becomes one line on
stderr and exit code 2 (``--debug`` shows the traceback); nothing is left half-written.  Commands
that write a folder claim it before their work (:mod:`pairvel.report.folders`).  SIGTERM, what batch
schedulers send at the time limit, unwinds like Ctrl-C: the claim is released, nothing is left, and
the exit code is 143 (130 for Ctrl-C).

Logging is set up here and nowhere else: for one call of :func:`main` the ``pairvel`` logger sends
its records to stderr (bare progress lines, ``pairvel: warning: ...``; ``--quiet`` keeps warnings
only, ``--verbose`` adds DEBUG records) and into an in-memory ``run.log`` (INFO and above, with
UTC timestamps) that the output writer puts into the new folder before renaming it into place.
Python warnings raised meanwhile become records of ``pairvel.warnings``.
"""

from __future__ import annotations

__all__ = ["main"]

import argparse
import contextlib
import datetime as _dt
import functools
import io
import logging
import os
import platform
import select
import shlex
import signal
import sys
import threading
import time
import traceback
import warnings
from pathlib import Path

from .core.errors import PairvelError
from .core.provenance import __version__

EXIT_OK, EXIT_INTERNAL, EXIT_USER = 0, 1, 2
EXIT_INTERRUPTED, EXIT_TERMINATED = 128 + signal.SIGINT, 128 + signal.SIGTERM

#: Line format of run.log: UTC time, level, message.
_RUN_LOG_FORMAT = "%(asctime)s.%(msecs)03dZ %(levelname)-7s %(message)s"

_log = logging.getLogger("pairvel.cli")  # not __name__: that is "__main__" under python -m
_warnings_log = logging.getLogger("pairvel.warnings")


def _parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog="pairvel",
        description="Mean pairwise kSZ momentum of a spectroscopic catalogue on a HEALPix CMB map.",
    )
    top.add_argument("--version", action="version", version=f"pairvel {__version__}")
    sub = top.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def common(p):
        loudness = p.add_mutually_exclusive_group()
        loudness.add_argument("--quiet", action="store_true",
                              help="no progress lines on stderr, only warnings, errors and the closing summary")
        loudness.add_argument("--verbose", action="store_true", help="also show debug messages on stderr")
        p.add_argument("--debug", action="store_true", help="show the full traceback of an error")

    run = sub.add_parser("run", help="measure, fit and null-test from a TOML config",
                         description="Run the whole measurement described by CONFIG and write a new output folder.")
    run.add_argument("config", help="TOML config file (see configs/README.md)")
    run.add_argument("--out", help="new output folder (default: ./<run.name>)")
    run.add_argument("--force", action="store_true", help="replace an earlier pairvel output that holds only its own, unchanged files")
    common(run)

    demo = sub.add_parser("demo", help="run configs/demo.toml on the shipped synthetic survey and compare with its truth",
                          description="Run the invented demo survey shipped in demo_data/ and check the result "
                                      "against the injected optical depth.")
    demo.add_argument("--out", help="new output folder (default: ./pairvel-demo-<timestamp>)")
    demo.add_argument("--force", action="store_true", help="replace an earlier pairvel output that holds only its own, unchanged files")
    common(demo)

    mock = sub.add_parser("mock", help="write a synthetic survey (catalogue, HEALPix or CAR map, truth.json, run.toml)",
                          description="Generate a self-consistent synthetic survey with a known kSZ signal.")
    mock.add_argument("out", help="new folder for the mock files")
    mock.add_argument("--n-tracers", type=int, default=30000, help="number of tracers (default 30000)")
    mock.add_argument("--nside", type=int, default=2048, help="HEALPix nside of the map (default 2048)")
    mock.add_argument("--tau-mean", type=float, default=None, help="injected mean aperture optical depth")
    mock.add_argument("--seed", type=int, default=20261202, help="random seed (default 20261202)")
    mock.add_argument("--tau-mass-slope", type=float, default=None, metavar="ALPHA",
                      help="inject tau proportional to M^ALPHA (default 2/3)")
    mock.add_argument("--extra-frequency", type=float, action="append", default=[], metavar="GHZ",
                      help="also write a map at this frequency (same CMB and kSZ, tSZ scaled from 150 GHz, own "
                           "noise); repeat for several")
    mock.add_argument("--depth-ratio", type=float, default=1.0, metavar="R",
                      help="let the noise rms vary by the factor R between deep and shallow stripes in RA and write "
                           "an inverse-variance map beside each map (default 1: uniform depth, no such map)")
    mock.add_argument("--partner-tracers", type=int, default=0, metavar="N",
                      help="also write a galaxy-like second catalogue of about N tracers with kSZ of its own, for the "
                           "cross curve (README 'Clusters against galaxies'; default 0: none)")
    mock.add_argument("--partner-bias", type=float, default=0.3, help="linear bias of that catalogue (default 0.3)")
    mock.add_argument("--partner-tau-mean", type=float, default=5e-4,
                      help="optical depth of each of its tracers (default 5e-4)")
    mock.add_argument("--electron-temperature", type=float, default=None, metavar="KEV",
                      help="give every tracer the tSZ of gas at this temperature (y = tau kT_e / m_e c^2) and write "
                           "per-tracer truth, for `pairvel velocities`")
    mock.add_argument("--pixels", choices=("healpix", "car"), default="healpix",
                      help="pixelisation of the maps: partial HEALPix (default) or a plate-carree (CAR) FITS image; "
                           "with car, --nside only sets the CMB's band limit")
    mock.add_argument("--car-arcmin", type=float, default=0.5, metavar="ARCMIN",
                      help="pixel size of the CAR maps (default 0.5; 360 degrees must be a whole number of pixels)")
    common(mock)

    vel = sub.add_parser("velocities", help="line-of-sight velocities of single clusters from several frequency maps",
                         description="Split each cluster's aperture temperatures in the maps of [multifrequency] into "
                                     "tSZ and kSZ, turn y into tau under [single_cluster]'s electron temperature and "
                                     "write the velocities, their errors and cautions (no pair pass).")
    vel.add_argument("config", help="TOML config with [catalogue], [multifrequency] and optionally [single_cluster]")
    vel.add_argument("--out", help="new output folder (default: ./<run.name>-velocities)")
    vel.add_argument("--force", action="store_true", help="replace an earlier pairvel output that holds only its own, unchanged files")
    common(vel)

    unblind = sub.add_parser("unblind", help="apply a blinding key to a blinded output folder, writing a new folder",
                             description="Read a blinded pairvel output folder and its key file and write the "
                                         "unblinded outputs into a new folder; the blinded folder is not changed.")
    unblind.add_argument("folder", help="blinded pairvel output folder")
    unblind.add_argument("--key", required=True, help="blinding key JSON written by the blinded run")
    unblind.add_argument("--out", help="new output folder (default: <folder>-unblinded)")
    common(unblind)

    _add_validate_parser(sub, common)

    keys = sub.add_parser("keys", help="list every config key with its type, default and meaning")
    keys.add_argument("--markdown", action="store_true", help="print a Markdown table")
    return top


def _closing_summary(result, out: Path) -> str:
    from .report.assumptions import closing_lines
    from .report.figures import pte_flag
    from .stats.significance import summary_lines

    f = result.fit
    lines = [
        f"pairvel: {result.n_tracers:,} tracers, {int(result.pair_counts.sum()):,} pairs, z_eff = {result.z_eff:.3f}",
        f"  tau_mean = {f.amplitude:.3e} ± {f.error:.3e}   S/N = {f.snr:.2f} "
        f"(sqrt(chi2_null - chi2_min) = {f.snr_delta_chi2:.2f})",
        f"  chi2 vs zero = {f.chi2_null:.1f} / {f.n_bins} bins (PTE {f.pte_null:.2g}); "
        f"best fit chi2 = {f.chi2_min:.1f} / {f.dof} dof (PTE {f.pte_min:.2g})",
        *closing_lines(result),
    ]
    spread = result.extra.get("region_seed_spread")
    if spread is not None:
        lines.append(f"  tau_mean over {spread['n_seeds']} region seeds: std {spread['std_over_error']:.2f} of its error "
                     f"(range {min(spread['tau_mean']):.3e} to {max(spread['tau_mean']):.3e})")
    if "cross" in result.extra:  # pairs with a second catalogue ([partner])
        from .stats.cross import cross_summary_line

        lines.append(cross_summary_line(result.extra["cross"]))
    if "mass_trend" in result.extra:
        from .stats.masstrend import mass_trend_line

        lines += [line for line in (mass_trend_line(result.extra["mass_trend"]),) if line]
    for n in result.nulls:
        flag = {"low": ": LOW, below 0.01", "high": ": HIGH, above 0.99"}.get(pte_flag(n.pte_mean), "")
        lines.append(f"  null {n.kind} ({n.n_real} sets): chi2 of mean curve = {n.chi2_mean:.1f} / {n.dof} "
                     f"(PTE {n.pte_mean:.2g}{flag}): {n.verdict}")
    lines += summary_lines(result.extra.get("empirical_significance"), f.snr)
    if result.extra.get("blinding", {}).get("blinded"):
        lines.append("  BLINDED: curve, errors and tau_mean are scaled by a hidden factor (pairvel unblind)")
    lines.append(f"  outputs: {out}")
    return "\n".join(lines)


def _cmd_run(args, config_path: Path, default_out: Path, run_log) -> int:
    from .core.progress import Progress
    from .input.config import load_config
    from .pipeline import run_pipeline
    from .report.folders import claim_output_dir
    from .report.outputs import write_outputs

    cfg = load_config(config_path)
    with claim_output_dir(args.out if args.out else default_out, force=args.force,
                          protect=cfg.named_paths()) as claim:  # before the work; released if it fails
        out = claim.path
        key_path = _usable_key_path(cfg, out)
        _log.debug("config %s; output folder %s", cfg.source, out)
        _log.debug("pair engine threads: %s", cfg.compute.n_threads or "all cores")
        progress = Progress(12)  # never quiet: --quiet raises the stderr level, run.log keeps every line
        result = run_pipeline(cfg, progress=progress)
        if cfg.blinding.enabled and not result.extra.get("blinding", {}).get("blinded"):  # not blinded by its input
            from .report.blinding import blind_result

            if not key_path.exists():
                claim.remove_on_failure(key_path)
            result, _ = blind_result(result, key_path)
            progress.say(f"      outputs blinded; key kept in {key_path}")
        with progress.stage("writing outputs"):
            write_outputs(result, out, run_log=run_log, claim=claim)
    print(_closing_summary(result, out))
    if "truth_check" in result.extra:  # run.truth_path (the demo sets it)
        print(result.extra["truth_check"]["verdict"])
    progress.say(f"finished in {progress.elapsed:.0f} s")
    return EXIT_OK


def _usable_key_path(cfg, out: Path):
    """The blinding key path of a blinded run, checked before the work (None when not blinded)."""
    if not cfg.blinding.enabled:
        return None
    from .report.blinding import check_key_path, default_key_path

    return check_key_path(cfg.blinding.key_path or default_key_path(out), out_dir=out)


def _cmd_unblind(args, run_log) -> int:
    from .report.blinding import unblind_folder

    folder = Path(args.folder).expanduser().resolve()
    _log.info("unblinding %s with the key in %s", folder, args.key)
    out = unblind_folder(folder, args.key, args.out if args.out else folder.parent / f"{folder.name}-unblinded",
                         run_log=run_log)
    print(f"pairvel: unblinded outputs written to {out} ({folder} unchanged)")
    return EXIT_OK


def _cmd_keys(args) -> int:
    from .input.config import iter_config_keys

    def shown(key, default, doc):
        return "(required)" if default is None and ("(required)" in doc or "(required:" in doc) else repr(default)

    rows = [(key, typ, shown(key, default, doc), doc) for key, typ, default, doc in iter_config_keys()]
    if args.markdown:
        print("| key | type | default | meaning |\n|---|---|---|---|")
        for row in rows:
            print("| `{}` | {} | {} | {} |".format(*row))
    else:
        print("Config keys by [section]: key, type, default, meaning (--markdown: one Markdown table)\n")
        print("\n".join(_keys_table(rows)))
    return EXIT_OK


#: Width of `pairvel keys` (every line fits) and the widest type and default columns (wrapped beyond).
_KEYS_WIDTH, _KEYS_TYPE_MAX, _KEYS_DEFAULT_MAX = 100, 16, 19


def _keys_table(rows) -> list[str]:
    """The config keys as a plain-text table: a ``[section]`` line, then key, type, default and
    meaning in columns, each cell wrapped within its column so that no line exceeds _KEYS_WIDTH."""
    import itertools
    import textwrap

    lines = []
    for section, group in itertools.groupby(rows, key=lambda row: row[0].split(".", 1)[0]):
        cells = [(key.split(".", 1)[1], typ, default, doc) for key, typ, default, doc in group]
        widths = [max(len(c[0]) for c in cells),
                  min(_KEYS_TYPE_MAX, max(len(c[1]) for c in cells)),
                  min(_KEYS_DEFAULT_MAX, max(len(c[2]) for c in cells))]
        widths.append(_KEYS_WIDTH - 2 - sum(w + 2 for w in widths))
        lines += [""] * bool(lines) + [f"[{section}]"]
        for row in cells:
            wrapped = [textwrap.wrap(text, width, break_on_hyphens=False) or [""] for text, width in zip(row, widths)]
            for parts in itertools.zip_longest(*wrapped, fillvalue=""):
                lines.append(("  " + "  ".join(f"{p:{w}s}" for p, w in zip(parts, widths))).rstrip())
    return lines


def _cmd_mock(args) -> int:
    from .sims.mock import make_mock_survey
    from .sims.mockconfig import RUN_CONFIG_FILE

    options = {"n_tracers": args.n_tracers, "nside": args.nside, "seed": args.seed}
    if args.tau_mean is not None:
        options["tau_mean"] = args.tau_mean
    if args.tau_mass_slope is not None:
        options["tau_mass_slope"] = args.tau_mass_slope
    if args.extra_frequency:
        options["extra_frequencies_ghz"] = args.extra_frequency
    if args.partner_tracers:
        options.update(partner_n_tracers=args.partner_tracers, partner_bias=args.partner_bias,
                       partner_tau_mean=args.partner_tau_mean)
    if args.electron_temperature is not None:
        options["electron_temperature_kev"] = args.electron_temperature
    if args.pixels == "car":
        options.update(pixels="car", car_arcmin=args.car_arcmin)
    if args.depth_ratio != 1.0:
        options["depth_ratio"] = args.depth_ratio
    truth = make_mock_survey(args.out, **options, progress=_log.info)
    print(f"pairvel: synthetic survey written to {args.out} ({truth.n_tracers:,} tracers, "
          f"tau_mean = {truth.tau_mean:.3e})")
    config = shlex.quote(str(Path(args.out) / RUN_CONFIG_FILE))
    if args.extra_frequency and "tracer_truth" in truth.files:  # run.toml holds [multifrequency] already
        print("  maps: " + ", ".join(v for k, v in truth.files.items() if k.startswith("map")) +
              f" (in run.toml's [multifrequency]); single-cluster velocities: pairvel velocities {config}")
    elif args.extra_frequency:
        print("  maps: " + ", ".join(v for k, v in truth.files.items() if k.startswith("map")) +
              " (combine them with a [multifrequency] section; see README 'Several frequency maps')")
    print(f"  run it with: pairvel run {config}\n"
          f"    (the mock's bias, cosmology and aperture; the run compares tau_mean with truth.json)")
    return EXIT_OK


def _cmd_velocities(args, run_log) -> int:
    from .core.progress import Progress
    from .input.config import load_config
    from .report.clustervel_out import terminal_lines, write_velocity_outputs
    from .report.folders import claim_output_dir
    from .single_cluster import measure_cluster_velocities

    cfg = load_config(args.config, needs_bias=False)  # no pairwise template: theory.bias is not used
    default_out = Path.cwd() / f"{cfg.run.name}-velocities"
    with claim_output_dir(args.out if args.out else default_out, force=args.force,
                          protect=cfg.named_paths()) as claim:  # before the work; released if it fails
        progress = Progress(5)
        run = measure_cluster_velocities(cfg, progress=progress)
        with progress.stage("writing outputs"):
            claim.write(lambda folder: write_velocity_outputs(run, folder), run_log=run_log)
    print("\n".join(terminal_lines(run)))
    print(f"  outputs in {claim.path}")
    return EXIT_OK


def _add_validate_parser(sub, common) -> None:
    from .sims.validateopts import MIN_MOCKS_FOR_VERDICTS, ValidationOptions
    from .input.config import LIKELIHOODS

    d = ValidationOptions()
    val = sub.add_parser("validate", help="calibrate tau_mean and its error bars on many mocks with a known truth",
                         description="Make many cheap mock light cones with linear-theory velocities and a known "
                                     "optical depth, push each through the pipeline's estimator, jackknife and fit, "
                                     "and report the bias, the 68% coverage and the jackknife error / scatter ratio.")
    val.add_argument("out", help="new output folder (mocks.ecsv, summary.json, calibration.png)")
    val.add_argument("--n-mocks", type=int, default=d.n_mocks, help=f"number of mocks (default {d.n_mocks}; with fewer than "
                                                                    f"{MIN_MOCKS_FOR_VERDICTS} the verdicts mean little)")
    val.add_argument("--seed", type=int, default=d.seed, help=f"master seed (default {d.seed})")
    val.add_argument("--n-tracers", type=int, default=d.n_tracers, help=f"tracers per mock (default {d.n_tracers})")
    val.add_argument("--tau-mean", type=float, default=d.tau_mean, help=f"injected optical depth (default {d.tau_mean:g})")
    val.add_argument("--noise-uk", type=float, default=d.noise_uk,
                     help=f"per-tracer temperature noise in uK, without a map (default {d.noise_uk:g})")
    val.add_argument("--map", action="store_true", help="paint the kSZ onto a HEALPix map with white noise and "
                                                         "measure apertures instead of adding per-tracer noise")
    val.add_argument("--noise-uk-arcmin", type=float, default=d.noise_uk_arcmin,
                     help=f"map white noise, uK-arcmin (default {d.noise_uk_arcmin:g})")
    val.add_argument("--nside", type=int, default=d.nside, help=f"map nside (default {d.nside})")
    val.add_argument("--regions", choices=("kmeans", "healpix"), default=d.regions,
                     help=f"jackknife regions (default {d.regions})")
    val.add_argument("--n-regions", type=int, default=d.n_regions,
                     help=f"k-means jackknife regions (default {d.n_regions})")
    val.add_argument("--healpix-nside", type=int, default=d.healpix_nside,
                     help=f"nside of HEALPix jackknife regions (default {d.healpix_nside})")
    val.add_argument("--r-max", type=float, default=d.r_max_mpc,
                     help=f"largest separation, Mpc; bins start at 0 (default {d.r_max_mpc:g})")
    val.add_argument("--bin-width", type=float, default=d.bin_width_mpc,
                     help=f"separation bin width, Mpc (default {d.bin_width_mpc:g})")
    val.add_argument("--no-trend", action="store_true", help="skip the redshift-trend removal")
    val.add_argument("--fit-r-min", type=float, default=d.fit_r_min_mpc, help="fit bins with centre >= this, Mpc")
    val.add_argument("--fit-r-max", type=float, default=d.fit_r_max_mpc, help="fit bins with centre < this, Mpc")
    val.add_argument("--likelihood", choices=LIKELIHOODS, default=d.likelihood,
                     help=f"likelihood of the amplitude fit (default {d.likelihood})")
    val.add_argument("--cell-mpc", type=float, default=d.cell_mpc,
                     help=f"cell of the mocks' Gaussian field, Mpc (default {d.cell_mpc:g})")
    val.add_argument("--grid-fields", action="store_true",
                     help="read the mocks' fields at the nearest grid node instead of summing them at each tracer "
                          "(faster, smooths the close-pair signal)")
    val.add_argument("--box-padding", type=float, default=d.box_padding,
                     help=f"periodic field box over the cone's bounding box, per side (default {d.box_padding:g})")
    val.add_argument("--no-trend-model", action="store_true",
                     help="fit the plain template, without the predicted signal loss of the trend removal")
    val.add_argument("--jackknife-deletes", choices=("tracers", "pairs"), default=d.jackknife_deletes,
                     help=f"jackknife sample k drops region k's tracers or every pair touching it, as "
                          f"covariance.jackknife_deletes (default {d.jackknife_deletes}; both are summarised)")
    val.add_argument("--family", choices=("points", "cells"), default=d.family,
                     help="mock construction: fields summed at each tracer (points, default) or tracers placed in "
                          "grid cells with their cell's velocity, fitted with the grid's predicted window (cells)")
    val.add_argument("--paired-exact", action="store_true",
                     help="with --family cells, also fit the noiseless curve of the same modes summed exactly at "
                          "each tracer (same tracers and field, only the velocity read differently)")
    val.add_argument("--no-diagnostics", action="store_true",
                     help="skip the object-split and re-trended jackknife diagnostics (2-3 times faster)")
    val.add_argument("--force", action="store_true", help="replace an earlier pairvel output that holds only its own, unchanged files")
    common(val)


def _cmd_validate(args, run_log) -> int:
    from .report.folders import claim_output_dir
    from .sims.validate import ValidationOptions, format_summary, run_validation, write_validation

    opt = ValidationOptions(n_mocks=args.n_mocks, seed=args.seed, n_tracers=args.n_tracers, tau_mean=args.tau_mean,
                            noise_uk=args.noise_uk, with_map=args.map, noise_uk_arcmin=args.noise_uk_arcmin,
                            nside=args.nside, regions=args.regions, n_regions=args.n_regions,
                            healpix_nside=args.healpix_nside, trend=not args.no_trend, r_max_mpc=args.r_max,
                            bin_width_mpc=args.bin_width, fit_r_min_mpc=args.fit_r_min,
                            fit_r_max_mpc=args.fit_r_max, likelihood=args.likelihood, cell_mpc=args.cell_mpc,
                            exact_fields=not args.grid_fields, box_padding=args.box_padding,
                            trend_model=not args.no_trend_model, jackknife_deletes=args.jackknife_deletes,
                            diagnostics=not args.no_diagnostics,
                            family=args.family, paired_exact=args.paired_exact)
    with claim_output_dir(args.out, force=args.force) as claim:  # fail before the mocks, not after
        _log.debug("output folder %s", claim.path)
        result = run_validation(opt, progress=_log.info)
        out = write_validation(result, claim.path, run_log=run_log, claim=claim)
    print(format_summary(result))
    print(f"  outputs: {out}")
    return EXIT_OK


class _TerminalFormatter(logging.Formatter):
    """stderr lines as pairvel has always printed them: the bare message for DEBUG and INFO,
    ``pairvel: warning: ...`` (``error``, ``critical``) above."""

    def format(self, record: logging.LogRecord) -> str:
        text = super().format(record)
        return f"pairvel: {record.levelname.lower()}: {text}" if record.levelno >= logging.WARNING else text


@contextlib.contextmanager
def _command_logging(command_line: str, *, quiet: bool, verbose: bool):
    """Route the ``pairvel`` records to stderr and to an in-memory run log for one command.

    Yields a callable returning the run log so far (a ``#`` header line, then INFO and above
    with UTC timestamps and level names, whatever ``quiet``).  Every handler is removed and the
    logger's level restored on exit, so :func:`main` can be called many times in one process.
    """
    logger = logging.getLogger("pairvel")
    terminal = logging.StreamHandler(sys.stderr)
    terminal.setLevel(logging.WARNING if quiet else logging.DEBUG if verbose else logging.INFO)
    terminal.setFormatter(_TerminalFormatter())
    buffer = io.StringIO(f"# pairvel {__version__}, Python {platform.python_version()}: {command_line}\n")
    buffer.seek(0, io.SEEK_END)
    captured = logging.StreamHandler(buffer)
    captured.setLevel(logging.INFO)
    stamped = logging.Formatter(_RUN_LOG_FORMAT, datefmt="%Y-%m-%dT%H:%M:%S")
    stamped.converter = time.gmtime
    captured.setFormatter(stamped)
    saved_level = logger.level
    logger.setLevel(logging.DEBUG if verbose else logging.INFO)
    logger.addHandler(terminal)
    logger.addHandler(captured)
    try:
        yield buffer.getvalue
    finally:
        logger.removeHandler(captured)
        logger.removeHandler(terminal)
        logger.setLevel(saved_level)


def _log_warning(message, category, filename, lineno, file=None, line=None, *, debug: bool = False):
    """``warnings.showwarning`` for the command line: one WARNING record of ``pairvel.warnings``.

    The record holds the message alone; with ``--debug`` it also names the file, line and category.
    """
    if debug:
        _warnings_log.warning("%s", warnings.formatwarning(message, category, filename, lineno, line).rstrip())
    else:
        _warnings_log.warning("%s", message)


class _Terminated(KeyboardInterrupt):
    """SIGTERM, raised wherever the program is, so that it unwinds like Ctrl-C."""


@contextlib.contextmanager
def _sigterm_unwinds():
    """Turn SIGTERM into :class:`_Terminated` for one command (main thread only; restored on exit)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def on_sigterm(signum, frame):
        signal.signal(signal.SIGTERM, signal.SIG_IGN)  # a second SIGTERM must not break off the clean-up
        raise _Terminated()

    previous = signal.signal(signal.SIGTERM, on_sigterm)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def _dispatch(args, run_log) -> int:
    if args.command == "run":
        return _cmd_run(args, Path(args.config), Path.cwd() / _run_name(args.config), run_log)
    if args.command == "demo":
        from .sims.demo import demo_config_path

        stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
        return _cmd_run(args, demo_config_path(), Path.cwd() / f"pairvel-demo-{stamp}", run_log)
    if args.command == "mock":
        return _cmd_mock(args)
    if args.command == "unblind":
        return _cmd_unblind(args, run_log)
    if args.command == "validate":
        return _cmd_validate(args, run_log)
    if args.command == "velocities":
        return _cmd_velocities(args, run_log)
    return _cmd_keys(args)


def main(argv=None) -> int:
    """Entry point; returns the exit code (0 success, 2 bad input or config, 1 internal error)."""
    argv = sys.argv[1:] if argv is None else list(argv)
    args = _parser().parse_args(argv)
    debug = getattr(args, "debug", False)
    logging_setup = _command_logging(shlex.join(["pairvel", *argv]), quiet=getattr(args, "quiet", False),
                                     verbose=getattr(args, "verbose", False))
    with logging_setup as run_log, warnings.catch_warnings(), _sigterm_unwinds():
        warnings.showwarning = functools.partial(_log_warning, debug=debug)
        _log.debug("pairvel %s on Python %s; working folder %s", __version__, platform.python_version(), Path.cwd())
        try:
            code = _dispatch(args, run_log)
            sys.stdout.flush()  # buffered output meets a closed pipe here
            return code
        except PairvelError as err:
            if debug:
                traceback.print_exc()
            print(f"pairvel: error: {err}", file=sys.stderr)
            return EXIT_USER
        except KeyboardInterrupt as err:
            how = "terminated" if isinstance(err, _Terminated) else "interrupted"
            written = getattr(err, "output_written", None)  # set when the outputs were in place already
            print(f"pairvel: {how}; " + (f"outputs complete in {written}" if written else "no output written"),
                  file=sys.stderr)
            return EXIT_TERMINATED if isinstance(err, _Terminated) else EXIT_INTERRUPTED
        except Exception as err:  # a bug: say so in one line, traceback with --debug
            if isinstance(err, BrokenPipeError) and _stdout_closed():  # the reader stopped early: not a fault
                _discard_stdout()
                return EXIT_OK
            if debug:
                traceback.print_exc()
            print(f"pairvel: internal error: {type(err).__name__}: {err} (rerun with --debug and report it)",
                  file=sys.stderr)
            return EXIT_INTERNAL


def _stdout_closed() -> bool:
    """True when nobody reads standard output any more (``pairvel keys | head``), or when that cannot be told."""
    try:
        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(event & select.POLLERR for _, event in poller.poll(0))
    except (AttributeError, OSError, ValueError):  # no poll() on this platform, or stdout is no file
        return True


def _discard_stdout() -> None:
    """Point stdout at the null device, so that Python's flush at exit finds no closed pipe.

    What the Python documentation recommends for SIGPIPE (library/signal, "Note on SIGPIPE"): a
    reader that stops early (``| head``) is not an error, and nothing more is reported.
    """
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (AttributeError, OSError, ValueError):  # stdout is no file (an in-process caller's buffer)
        pass


def _run_name(config_path) -> str:
    """Default output folder name: the config's run.name, read leniently (the full check comes later
    and refuses a name that :func:`~pairvel.input.config.is_folder_name` rejects)."""
    import tomllib

    from .input.config import is_folder_name

    try:
        with open(config_path, "rb") as fh:
            name = tomllib.load(fh).get("run", {}).get("name", "pairvel-run")
        return name if is_folder_name(name) else "pairvel-run"
    except (OSError, ValueError, AttributeError):  # ValueError: not UTF-8 or not TOML; load_config says which
        return "pairvel-run"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
