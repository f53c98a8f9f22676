"""`pairvel velocities`: line-of-sight velocities of single clusters from several frequency maps.

The stages, in order: catalogue (the cuts of ``[catalogue]``) -> each map of ``[multifrequency]``
read and masked -> compensated-aperture photometry of every cluster and of random positions in each
map (:mod:`pairvel.maps.channels`) -> channel covariance -> per-cluster tSZ/kSZ split, optical depth
and velocity (:mod:`pairvel.stats.clustervel`) -> caution flags -> with ``run.truth_path``, the pulls
against the velocities a mock injected.  Nothing here pairs clusters; the pairwise run is
``pairvel run``.
"""

from __future__ import annotations

__all__ = ["ClusterVelocityRun", "measure_cluster_velocities"]

import json
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .core.errors import ConfigError, InputError, PairvelWarning
from .core.progress import Progress
from .input.catalogue import load_catalogue, read_table_columns
from .input.config import Config
from .maps.channels import channel_apertures, has_neighbour, overlap_distance_arcmin, read_channel_maps
from .maps.radii import radius_scale
from .model.sz import tsz_relativistic_first_order, tsz_spectrum
from .stats.clustervel import (
    caution_flags,
    channel_covariance,
    decompose_channels,
    line_of_sight_velocities,
    pull_summary,
)


@dataclass(frozen=True, eq=False)
class ClusterVelocityRun:
    """What `pairvel velocities` measured; :mod:`pairvel.report.clustervel_out` writes it.

    Attributes
    ----------
    config : Config
    row : ndarray of shape (n,), int
        Row of each cluster in the catalogue file.
    ra, dec, z : ndarray of shape (n,)
    proxy : ndarray of shape (n,) or None
    t_channels_uk : ndarray of shape (n, k), uK
    decomposition, velocities : the fit (:class:`~pairvel.stats.clustervel.Decomposition`,
        :class:`~pairvel.stats.clustervel.ClusterVelocities`)
    flags : ndarray of shape (n,), int
    frequencies_ghz, f_tsz : ndarray of shape (k,)
        Frequencies and non-relativistic tSZ factors (with ``single_cluster.relativistic`` the fit used
        each cluster's first-order corrected factors).
    channel_cov : ndarray of shape (k, k), uK^2
    n_random : int
        Random positions usable in every map that went into ``channel_cov``.
    n_dropped : int
        Clusters whose aperture was unusable in some map.
    te_source : str
        Where the electron temperatures came from.
    truth : dict or None
        With ``run.truth_path`` of a mock that wrote per-cluster truth: the true velocities and the
        pull statistics.
    """

    config: Config
    row: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    proxy: np.ndarray | None
    t_channels_uk: np.ndarray
    decomposition: object
    velocities: object
    flags: np.ndarray
    frequencies_ghz: np.ndarray
    f_tsz: np.ndarray
    channel_cov: np.ndarray
    n_random: int
    n_dropped: int
    te_source: str
    truth: dict | None = None
    catalogue_path: str = ""
    map_paths: tuple = field(default_factory=tuple)


def measure_cluster_velocities(cfg: Config, *, progress: Progress | None = None) -> ClusterVelocityRun:
    """Run every stage of the module docstring for a validated config; nothing is written."""
    progress = progress or Progress(5, quiet=True)
    sc, mf = cfg.single_cluster, cfg.multifrequency
    if cfg.restart.table_path is not None:
        raise ConfigError("restart.table_path: pairvel velocities needs the catalogue and the frequency maps, not a "
                          "tracer table", key="restart.table_path")
    with progress.stage("catalogue"):
        cat = load_catalogue(cfg.catalogue)
        te, te_source = _electron_temperatures(cfg, cat)
    with progress.stage(f"frequency maps: {len(mf.map_paths or ())}"):
        maps = read_channel_maps(cfg)
    with progress.stage(f"aperture photometry of {len(cat)} clusters and {sc.n_random} random positions per map"):
        ap = cfg.aperture
        scale = radius_scale(ap, cat.z, cfg.cosmology)
        ch = channel_apertures(maps, cat.ra, cat.dec, ap.radius_arcmin, n_random=sc.n_random, seed=cfg.run.seed,
                               max_masked_fraction=cfg.map.max_masked_fraction, pixel_weighting=ap.pixel_weighting,
                               method=ap.method, radius_scale=scale)
    keep = ch.usable
    n_dropped = int((~keep).sum())
    if n_dropped:
        warnings.warn(f"{n_dropped} of {len(cat)} clusters dropped: aperture unusable in at least one map",
                      PairvelWarning, stacklevel=2)
    if not keep.any():
        raise InputError(f"no cluster of {cfg.catalogue.path} has a usable aperture in every map")
    with progress.stage("tSZ/kSZ split, optical depths and velocities"):
        freqs = np.asarray(mf.frequencies_ghz, dtype=float)
        f = tsz_spectrum(freqs, t_cmb_k=cfg.cosmology.t_cmb_k)
        f_fit = tsz_relativistic_first_order(freqs, te[keep], t_cmb_k=cfg.cosmology.t_cmb_k) if sc.relativistic else f
        cov = channel_covariance(ch.random_temperatures)
        t_cmb_uk = cfg.cosmology.t_cmb_k * 1e6
        dec = decompose_channels(ch.temperatures[keep], f_fit, cov, t_cmb_uk=t_cmb_uk)
        vel = line_of_sight_velocities(dec, te[keep], t_cmb_uk=t_cmb_uk,
                                       response_scatter=sc.tau_response_scatter)
        proxy = None if cat.proxy is None else cat.proxy[keep]
        crowded = has_neighbour(cat.ra, cat.dec, overlap_distance_arcmin(ap.radius_arcmin, scale))[keep]
        flags = caution_flags(dec, vel, min_tau_snr=sc.min_tau_snr, min_fit_pte=sc.min_fit_pte, proxy=proxy,
                              min_proxy=sc.min_proxy, neighbour=crowded)
    run = ClusterVelocityRun(
        config=cfg, row=cat.row[keep], ra=cat.ra[keep], dec=cat.dec[keep], z=cat.z[keep], proxy=proxy,
        t_channels_uk=ch.temperatures[keep], decomposition=dec, velocities=vel, flags=flags, frequencies_ghz=freqs,
        f_tsz=f, channel_cov=cov, n_random=int(ch.random_temperatures.shape[0]), n_dropped=n_dropped,
        te_source=te_source, catalogue_path=str(cfg.catalogue.path), map_paths=tuple(str(p) for p in mf.map_paths))
    if cfg.run.truth_path is not None:
        run = _with_truth(run, Path(cfg.run.truth_path))
    return run


def _electron_temperatures(cfg: Config, cat) -> tuple[np.ndarray, str]:
    """k_B T_e (keV) of every tracer of ``cat`` and a phrase saying where it came from."""
    sc = cfg.single_cluster
    if sc.temperature_column is None:
        return (np.full(len(cat), sc.electron_temperature_kev),
                f"single_cluster.electron_temperature_kev = {sc.electron_temperature_kev:g} keV for every cluster")
    key = "single_cluster.temperature_column"
    col = read_table_columns(cfg.catalogue.path, {key: sc.temperature_column}, fmt=cfg.catalogue.format)
    te = col[sc.temperature_column][cat.row]
    bad = ~(np.isfinite(te) & (te > 0))
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(f"catalogue {cfg.catalogue.path}: column '{sc.temperature_column}' ({key}) must be finite "
                         f"and > 0 keV; {int(bad.sum())} kept rows are not (first: row {int(cat.row[first])}, "
                         f"T_e={te[first]!r})", path=cfg.catalogue.path, key=key)
    return te, f"catalogue column '{sc.temperature_column}' (keV)"


def _with_truth(run: ClusterVelocityRun, truth_path: Path) -> ClusterVelocityRun:
    """``run`` with the mock's true velocities and the pulls, when the truth names a per-cluster table."""
    try:
        record = json.loads(truth_path.read_text())
    except (OSError, ValueError) as exc:
        raise InputError(f"run.truth_path {truth_path}: cannot be read as JSON ({exc})", path=truth_path) from None
    name = record.get("files", {}).get("tracer_truth") if isinstance(record, dict) else None
    if name is None:
        warnings.warn(f"run.truth_path {truth_path} names no per-cluster truth table (files.tracer_truth; "
                      f"written by `pairvel mock --electron-temperature`); no velocity check", PairvelWarning,
                      stacklevel=3)
        return run
    table = truth_path.parent / name
    cols = read_table_columns(table, {"truth v_r": "v_r_km_s", "truth tau": "tau"})
    if cols["v_r_km_s"].size <= int(run.row.max()):
        raise InputError(f"truth table {table}: has {cols['v_r_km_s'].size} rows but the catalogue has row "
                         f"{int(run.row.max())}; it belongs to another catalogue", path=table)
    v_true = cols["v_r_km_s"][run.row]
    vel = run.velocities
    clean = run.flags == 0
    truth = {"path": str(table), "v_true_km_s": v_true, "tau_true": cols["tau"][run.row],
             "pulls_unflagged": pull_summary(vel.v_km_s[clean], vel.v_err_km_s[clean], v_true[clean]),
             "pulls_all": pull_summary(vel.v_km_s, vel.v_err_km_s, v_true)}
    return ClusterVelocityRun(**{**run.__dict__, "truth": truth})
