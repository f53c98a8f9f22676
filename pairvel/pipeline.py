"""The only module that knows the order of the stages.

config -> catalogue + sky map -> photometry -> redshift-trend correction -> geometry and regions
-> null and simulated temperature sets -> one pair pass -> covariance, template, fit -> extra fits.
:func:`run_pipeline` reads as that list; each stage below is a named function of plain data, and
the frozen :class:`~pairvel.report.result.RunResult` it returns is what the output writer turns
into files.

Every temperature set (the data, the null realisations, the extra aperture radii, the jackknife
sets re-trended without each region, the simulated skies) is a row of one stack that goes through
a single pair pass; :class:`TemperatureStack` keeps the row bookkeeping in one place.
"""

from __future__ import annotations

__all__ = ["run_pipeline", "TemperatureStack"]

import dataclasses
import datetime as _dt
import math
import platform
import warnings
from dataclasses import dataclass

import numpy as np

from .core.cluster import TaskRunner, open_runner
from .core.constants import C_KM_S, T_CMB_UK
from .core.errors import InputError, PairvelWarning, TheoryError
from .core.progress import Progress
from .core.provenance import __version__, file_sha256, git_commit, package_versions
from .core.rng import as_generator, derived_generators
from .core.warnlog import collect_warnings
from .input.catalogue import DUPLICATE, OUTSIDE_PROXY, OUTSIDE_Z, Catalogue, RemovedRows, load_catalogue
from .input.config import Config
from .maps.multifreq import map_provenance, read_channel_maps, read_input_map
from .maps.noise import aperture_noise_variance, noise_weights, pixel_variance, read_noise_map, sky_variance
from .maps.photometry import DROP_REASONS, measure_apertures
from .maps.prefilter import apply_prefilter
from .maps.radii import aperture_radii, radius_scale
from .maps.skymap import read_mask, remove_monopole_dipole
from .maps.sourcemask import CLIPPED, NEAR_SOURCE, mask_sources, read_source_list, screen_apertures, source_exclusion
from .maps.tasks import measure_apertures_in_chunks, trend_without_each_region
from .maps.trend import remove_redshift_trend
from .model.template import load_power, load_v12_table, template_for_run
from .model.trendmodel import trend_transfer
from .pairs.chunked import ChunkedPass, sets_per_chunk
from .pairs.distributed import pairwise_momentum_units
from .pairs.estimator import pairwise_momentum
from .pairs.geometry import comoving_positions
from .report.result import RunResult
from .report.templatemodels import template_progress_lines
from .report.tracers import StoredTracers, radius_suffix, read_tracer_table, tracer_table
from .sims.truth import attach_truth_check, read_truth
from .stats.covariance import (
    bootstrap_covariance,
    bootstrap_samples,
    healpix_regions,
    jackknife_covariance,
    kmeans_regions,
    region_half_sums,
    tracer_split_samples,
)
from .stats.mockcalib import read_mock_calibration
from .stats.covdiag import covariance_diagnostics
from .stats.cross import cross_pairs, load_partner
from .stats.fit import fit_amplitude
from .stats.joint import fit_velocity_scale
from .stats.perchannel import channel_results
from .stats.nulltests import NULL_KINDS, SLICE_MEANS, evaluate_null
from .stats.masstrend import fit_mass_trend
from .stats.radii import fit_radii, radius_joint
from .stats.regionseeds import summarise_spread
from .stats.significance import empirical_significance, fitted_amplitudes
from .stats.setchunks import (SetJob, make_sets, random_position_job, rotated_sets_on, shuffle_job,
                              simulation_job)
from .stats.simcov import prepare_simulations, simulation_covariance
from .stats.subsamples import fit_proxy_bins


def run_pipeline(cfg: Config, *, progress: Progress | None = None) -> RunResult:
    """Run every stage for a validated config and return the result (nothing is written).

    Parameters
    ----------
    cfg : Config
        A validated configuration (see :func:`pairvel.input.config.load_config`).
    progress : Progress, optional
        Where stage lines go; silent when None.

    Returns
    -------
    RunResult
        Its ``warnings`` keep every Python warning and ``pairvel`` WARNING record of the run, with
        the stage that raised it (each is also shown as usual).  With ``run.truth_path`` its
        ``extra["truth_check"]`` compares tau_mean with the injected one (:mod:`pairvel.sims.truth`).
    """
    progress = progress or Progress(10, quiet=True)
    truth = read_truth(cfg.run.truth_path) if cfg.run.truth_path else None  # a bad truth file fails before the work
    calib = read_mock_calibration(cfg.covariance.calibration_dir) if cfg.covariance.calibration_dir else None
    with collect_warnings(lambda: progress.current) as kept, compute_runner(cfg) as runner:
        result = run_stages(cfg, progress, runner)
        if truth is not None:
            result = attach_truth_check(result, truth, path=cfg.run.truth_path)
    if calib is not None:  # per-bin errors against a validation run's mock scatter
        result = dataclasses.replace(result, extra=result.extra | {"mock_calibration": calib})
    return dataclasses.replace(result, warnings=tuple(kept))


def run_stages(cfg: Config, progress: Progress, runner: TaskRunner | None = None) -> RunResult:
    """The stages of :func:`run_pipeline`, in order; ``runner`` (:func:`compute_runner`) is where the
    photometry, the trend re-estimates and the pair pass run (None: in this process)."""
    rng = as_generator(cfg.run.seed)
    started = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")
    power = load_power(cfg.theory, cfg.cosmology)  # read a P(k) table first: a bad file fails before the pair pass
    v12_table = load_v12_table(cfg.theory)  # so is a v12 table
    partner = load_partner(cfg)  # the second catalogue of the cross curve, likewise (None without [partner])

    cat, sky, aps, stored = measured_tracers(cfg, progress, runner)
    with progress.stage("redshift-trend correction"):
        temps = correct_trend(cfg, aps.temperatures, cat.z)
    listed, noise_columns = cat, {}
    if sky.pixel_noise_var is not None:
        with progress.stage("aperture noise from the noise map"):
            cat, noise_info, noise_columns = tracer_noise(cfg, cat, sky, aps, temps[0], progress)
    with progress.stage("geometry and jackknife regions"):
        positions, regions = geometry_and_regions(cfg, cat, rng, progress)
        retrended = retrended_sets(aps.temperatures, cat.z, regions, cfg, runner)
    edges = cfg.bins.edges()
    if runner is not None and runner.distributed:  # every set made first, one stack for the work units
        stack, pr, rotations = stacked_pair_pass(cfg, sky, cat, aps, temps, retrended, positions, regions, progress,
                                                 runner)
    else:
        stack, pr, rotations = chunked_pair_pass(cfg, sky, cat, aps, temps, retrended, positions, regions, progress)
    if not cfg.theory.proxy_bin_edges:
        retrended = np.zeros((0, len(cat)))  # only the proxy-bin fits use them again: free them
    with progress.stage("covariance, template and fit"):
        cov = covariance(cfg, pr, stack, positions, temps[0], edges, regions, cat, rng)
        model = template(cfg, pr, edges, cat, positions, power, rng, progress, v12_table=v12_table)
        fit = fit_amplitude(cov.p, model.template_uk, cov.matrix, n_samples=cov.n_samples, use=model.in_fit,
                            likelihood=cfg.theory.likelihood)
        nulls = evaluate_nulls(cfg, pr, stack, cov)
        radius_fits = fit_radii(aperture_radii(cfg.aperture), pr.p[stack.radius_rows], cov.jk_rows[stack.radius_rows],
                                model.template_uk, n_jk=cov.n_jk, in_fit=model.in_fit,
                                likelihood=cfg.theory.likelihood, sim_rows=sim_radius_curves(pr, stack, cov))
        radii_joint = radius_joint(radius_fits, cov.jk_rows[stack.radius_rows], model.template_uk, in_fit=model.in_fit,
                                   likelihood=cfg.theory.likelihood)
        spread = region_seed_spread(cfg, cat, positions, aps.temperatures, temps, cov, model, fit.error, runner)
        cross = cross_curve(cfg, sky, partner, cat, positions, aps.temperatures[0], regions, model, power, progress)
    if cfg.multifrequency.per_channel:
        with progress.stage(f"each of the {len(cfg.multifrequency.map_paths)} frequency maps alone"):
            channels = channel_curves(cfg, cat, positions, regions, model, aps.scale, progress)
    extra = extra_results(cfg, fit, model, cov, radius_fits, sky, rotations, spread, cat=cat, positions=positions,
                          temps=temps[0], regions=regions, edges=edges, power=power, progress=progress,
                          v12_table=v12_table, retrended=retrended[:cov.n_jk] if stack.n_retrend else None,
                          radii_joint=radii_joint)
    extra["empirical_significance"] = significance(fit, model, cov, pr, stack)
    if cross is not None:
        extra["cross"] = cross
    if noise_columns:
        extra["noise_weighting"] = noise_info
    if cfg.multifrequency.per_channel:
        extra["channels"] = channels
    if stored is not None and stored.blinding["blinded"]:  # temperatures blinded already: so is all made from them
        extra["blinding"] = {**stored.blinding, "from_table": stored.path}
    prov = provenance(cfg, cat, sky, started, stored)
    tracers = tracer_table(listed, regions=regions, temps_raw=aps.temperatures, temps=temps,
                           radii_arcmin=aperture_radii(cfg.aperture), meta=tracer_table_cards(cfg, prov, stored),
                           extra_columns=noise_columns)
    return RunResult(
        config=cfg, edges=edges, p=cov.p, covariance=cov.matrix, p_jk=cov.p_jk, pair_counts=pr.pair_counts,
        z_eff_bins=pr.z_eff, z_eff=model.z_eff, v12_template=model.v12, in_fit=model.in_fit, fit=fit,
        nulls=tuple(nulls), n_tracers=len(cat), selection=selection_counts(cfg, cat, aps, sky),
        provenance=prov, extra=extra, tracers=tracers,
    )


# ---------------------------------------------------------------------------------------- inputs
@dataclass(frozen=True)
class SkyInputs:
    """The map every later stage measures, and what was done to it on the way."""

    skymap: object
    combination: dict | None     # several frequency maps combined ([multifrequency]), else None
    dipole_fit: np.ndarray | None  # monopole and dipole removed (uK), else None
    prefilter: object | None     # PrefilterResult of [prefilter], else None
    sources: object | None = None  # SourceList masked in the map ([source_mask]), else None
    pixel_noise_var: np.ndarray | None = None  # [noise]: noise variance (uK^2) of each held pixel, inf where unknown


@dataclass(frozen=True)
class Apertures:
    """Aperture temperatures of the usable tracers, before the redshift-trend correction."""

    temperatures: np.ndarray  # (n_radii, N) uK, primary radius first
    scale: np.ndarray | None  # per-tracer radius factor of a physical radius, else None
    n_dropped: int            # tracers whose aperture was unusable (maps.photometry.DROP_REASONS)


def measured_tracers(cfg: Config, progress: Progress, runner: TaskRunner | None = None):
    """The used tracers, the map and their raw aperture temperatures: from catalogue + map, or from the
    tracer table of an earlier run (``restart.table_path``, then the map is None).

    Returns (cat, sky, aps, stored); ``stored`` is the table read, else None.
    """
    if cfg.restart.table_path is not None:
        with progress.stage(f"tracer table {cfg.restart.table_path}"):
            stored, cat, aps = restart_inputs(cfg, progress)
        return cat, SkyInputs(None, None, None, None), aps, stored
    with progress.stage("catalogue"):
        cat = read_catalogue(cfg, progress)
    with progress.stage("sky map"):
        sky = prepare_map(cfg, progress)
    with progress.stage(f"aperture photometry at {len(cat)} tracers"):
        cat, aps = measure_tracers(cfg, cat, sky.skymap, progress, runner, sources=sky.sources)
    return cat, sky, aps, None


def read_catalogue(cfg: Config, progress: Progress) -> Catalogue:
    cat = load_catalogue(cfg.catalogue)
    progress.say(f"      {len(cat)} tracers kept of {cat.selection['rows_read']} read")
    return cat


def prepare_map(cfg: Config, progress: Progress) -> SkyInputs:
    """Read (or combine) the map, apply the mask, remove monopole and dipole, pre-filter."""
    skymap, combination = read_input_map(cfg)  # one map, or the combination of [multifrequency]
    if skymap.plane_note:
        progress.say(f"      map {skymap.path}: read {skymap.plane_note}")
    skymap, dipole_fit, prefilter, sources = treat_map(cfg, skymap, progress)
    nc, pixel_noise_var = cfg.noise, None
    if nc.path is not None:
        noise = read_noise_map(nc.path, kind=nc.kind, field=nc.field, ordering=cfg.map.ordering, coordsys=skymap.coordsys)
        pixel_noise_var = pixel_variance(noise, skymap, kind=nc.kind, hit_rms_uk=nc.hit_rms_uk)
    return SkyInputs(skymap, combination, dipole_fit, prefilter, sources, pixel_noise_var)


def treat_map(cfg: Config, skymap, progress: Progress):
    """The mask, point-source discs, monopole/dipole removal and pre-filter every temperature map of
    the run gets; returns (map, dipole fit or None, PrefilterResult or None, SourceList or None)."""
    if cfg.map.mask_path is not None:
        skymap = skymap.with_mask(read_mask(cfg.map.mask_path, ordering=cfg.map.ordering, coordsys=skymap.coordsys))
    skymap, sources = mask_point_sources(cfg, skymap, progress)
    dipole_fit = None
    if cfg.map.remove_dipole:
        skymap, dipole_fit = remove_monopole_dipole(skymap)
        progress.say(f"      removed monopole {dipole_fit[0]:.4g} uK and dipole |d| = "
                     f"{np.linalg.norm(dipole_fit[1:]):.4g} uK over the usable pixels")
    skymap, prefilter = apply_prefilter(skymap, cfg.prefilter, radius_arcmin=cfg.aperture.radius_arcmin,
                                        seed=cfg.run.seed, progress=progress.say)
    return skymap, dipole_fit, prefilter, sources


def mask_point_sources(cfg: Config, skymap, progress: Progress):
    """The map with a disc around every source of ``[source_mask]`` masked, and the sources (None without)."""
    sm = cfg.source_mask
    if sm.path is None:
        return skymap, None
    sources = read_source_list(sm.path, ra_column=sm.ra_column, dec_column=sm.dec_column, flux_column=sm.flux_column,
                               fmt=sm.format, radius_arcmin=sm.radius_arcmin, flux_pivot_mjy=sm.flux_pivot_mjy,
                               radius_max_arcmin=sm.radius_max_arcmin)
    masked = mask_sources(skymap, sources)
    n_pixels = int(np.count_nonzero((skymap.weight > 0) & (masked.weight == 0)))
    progress.say(f"      masked {len(sources)} point sources (disc radii {sources.radius_arcmin.min():.3g}-"
                 f"{sources.radius_arcmin.max():.3g} arcmin): {n_pixels} usable pixels masked")
    return masked, sources


def measure_tracers(cfg: Config, cat: Catalogue, skymap, progress: Progress,
                    runner: TaskRunner | None = None, *, sources=None) -> tuple[Catalogue, Apertures]:
    """Aperture temperatures at every radius; tracers unusable at any radius are dropped and counted, and so
    are those whose aperture touches a masked point source (``sources``) or whose temperature is an outlier
    (``outliers.clip_sigma``).  On a Dask cluster (``runner``) the tracers are measured in chunks, with
    the same result."""
    options = photometry_options(cfg, cat.z)
    scale = options["radius_scale"]  # None for fixed angular radii
    if runner is not None and runner.distributed:
        res = measure_apertures_in_chunks(skymap, cat.ra, cat.dec, aperture_radii(cfg.aperture), **options,
                                          runner=runner)
    else:
        res = measure_apertures(skymap, cat.ra, cat.dec, aperture_radii(cfg.aperture), **options,
                                progress=progress.counter("apertures"))
    reach = np.sqrt(2.0) * max(aperture_radii(cfg.aperture)) * (1.0 if scale is None else scale)  # outer annulus
    usable, reason, screened = screen_apertures(cat.ra, cat.dec, res.temperatures, res.usable, res.drop_reason,
                                                reach_arcmin=reach, sources=sources,
                                                clip_sigma=cfg.outliers.clip_sigma)
    by_photometry = np.isin(reason, DROP_REASONS)
    n_dropped = int(by_photometry.sum())
    why = ", ".join(f"{n} {why}" for why, n in _counts(reason[by_photometry], DROP_REASONS).items() if n)
    if n_dropped:
        warnings.warn(f"{n_dropped} of {len(cat)} tracers dropped by the photometry ({why}; masked: more than "
                      f"{cfg.map.max_masked_fraction:.0%} of the disc or annulus)", PairvelWarning, stacklevel=2)
    if "near_point_source" in screened:
        progress.say(f"      {screened['near_point_source']} tracers dropped: their aperture touches a masked point source")
    if "outliers_clipped" in screened:
        progress.say(f"      {screened['outliers_clipped']} tracers clipped: aperture temperature beyond "
                     f"{screened['outlier_clip_sigma']:g} robust sigma of the median")
    if usable.sum() < 2:
        raise InputError(f"map {skymap.path}: fewer than 2 tracers have usable apertures "
                         f"({int((~usable).sum())} of {len(cat)} dropped: {why or 'none by the photometry'}"
                         f"{''.join(f', {k} {v:g}' for k, v in screened.items())})", path=skymap.path)
    return (cat.subset(usable, reason=reason),
            Apertures(res.temperatures[:, usable], None if scale is None else scale[usable], n_dropped))


def tracer_noise(cfg: Config, cat: Catalogue, sky: SkyInputs, aps: Apertures, temps, progress: Progress):
    """Each tracer's aperture noise at the primary radius (``[noise]``, :mod:`pairvel.maps.noise`); with
    ``noise.tracer_weighting`` the catalogue returned carries the noise weights (times its own), so the
    pair pass, the pair-averaged template, the trend-loss model's pair sums, every null and every
    covariance use them (the redshift-trend removal itself stays unweighted, as for
    ``catalogue.weight_column``).

    Returns (cat, info for ``extra["noise_weighting"]``, tracers.fits columns of the used tracers).
    """
    nc, ap = cfg.noise, cfg.aperture
    if sky.prefilter is not None:
        warnings.warn("noise.path: the aperture noise is that of the unfiltered map's white pixel noise; the "
                      "pre-filter changes it (the weights then only rank the tracers)", PairvelWarning, stacklevel=2)
    var = aperture_noise_variance(sky.skymap, sky.pixel_noise_var, cat.ra, cat.dec, aperture_radii(ap)[:1],
                                  pixel_weighting=ap.pixel_weighting, method=ap.method, radius_scale=aps.scale)[0]
    unknown = ~np.isfinite(var)
    if unknown.any():
        warnings.warn(f"noise.path: {int(unknown.sum())} of {len(cat)} tracers have pixels without noise "
                      f"information in their aperture (infinite noise{', weight 0' if nc.tracer_weighting else ''})",
                      PairvelWarning, stacklevel=2)
    sky_var = nc.sky_variance_uk2 if nc.sky_variance_uk2 is not None else sky_variance(temps, var)
    w = noise_weights(var, sky_var)
    finite = var[~unknown]
    info = {"path": str(nc.path), "kind": nc.kind, "weighting": nc.tracer_weighting,
            "sky_variance_uk2": float(sky_var), "sky_variance_estimated": nc.sky_variance_uk2 is None,
            "mean_noise_variance_uk2": float(finite.mean()), "median_noise_uk": float(np.sqrt(np.median(finite))),
            "n_without_noise": int(unknown.sum()), "weight_max_over_min": float(w.max() / w[w > 0].min()),
            "effective_fraction": float(w.sum() ** 2 / np.sum(w**2) / w.size)}
    progress.say(f"      median aperture noise {info['median_noise_uk']:.3g} uK; noise weights "
                 f"{'used' if nc.tracer_weighting else 'not used (noise.tracer_weighting = false)'}, "
                 f"effective fraction of tracers {info['effective_fraction']:.3f}")
    columns = {"noise_uK": np.sqrt(var)}
    if nc.tracer_weighting:
        columns["noise_weight"] = w
        cat = dataclasses.replace(cat, weight=w if cat.weight is None else cat.weight * w)
    return cat, info, columns


def photometry_options(cfg: Config, z) -> dict:
    """How the run measures an aperture (besides the radii): the keyword options of ``measure_apertures``
    that the data and the simulated skies share."""
    ap = cfg.aperture
    return {"max_masked_fraction": cfg.map.max_masked_fraction, "pixel_weighting": ap.pixel_weighting,
            "method": ap.method, "radius_scale": radius_scale(ap, z, cfg.cosmology)}


def _counts(reasons, names) -> dict:
    """How many of ``reasons`` are each of ``names`` (every name listed, in order)."""
    reasons = np.asarray(reasons, dtype=str)
    return {name: int(np.sum(reasons == name)) for name in names}


def restart_inputs(cfg: Config, progress: Progress) -> tuple[StoredTracers, Catalogue, Apertures]:
    """The used tracers of ``restart.table_path`` and their raw aperture temperatures at the configured
    radii, with the config's redshift and proxy cuts applied again to every row that reached the photometry."""
    stored = read_tracer_table(cfg.restart.table_path)
    t, radii = stored.table, aperture_radii(cfg.aperture)
    check_table_apertures(cfg, stored, radii)
    col = {name: np.asarray(t[name], dtype=np.float64) for name in ("ra_deg", "dec_deg", "z")}
    proxy = _table_column(cfg, stored, "proxy", cfg.catalogue.proxy_column)
    weight = _table_column(cfg, stored, "weight", cfg.catalogue.weight_column)
    used, reason = np.asarray(t["used"], dtype=bool).copy(), np.asarray(t["drop_reason"], dtype=str).astype(object)
    cc = cfg.catalogue
    in_z = (col["z"] >= cc.z_min) & (col["z"] < cc.z_max)
    in_proxy = np.ones(len(t), dtype=bool) if proxy is None else (proxy >= cc.proxy_min) & (proxy < cc.proxy_max)
    measured = used | np.isin(reason, DROP_REASONS)
    reason[measured & ~in_z], reason[measured & in_z & ~in_proxy] = OUTSIDE_Z, OUTSIDE_PROXY
    used &= in_z & in_proxy
    back = np.isin(reason, (OUTSIDE_Z, OUTSIDE_PROXY)) & ~measured & in_z & in_proxy
    if back.any():
        warnings.warn(f"{cfg.restart.table_path}: {int(back.sum())} rows pass this run's catalogue cuts but were cut "
                      f"before the photometry of the table's run; they have no temperatures and stay out",
                      PairvelWarning, stacklevel=2)
    if used.sum() < 2:
        raise InputError(f"tracer table {stored.path}: {int(used.sum())} rows are used after this run's cuts; "
                         f"need at least 2", path=stored.path, key="restart.table_path")
    row, gone, reason = np.asarray(t["row"], dtype=np.int64), ~used, reason.astype(str)

    def pick(values, which):
        return None if values is None else values[which]

    removed = RemovedRows(row[gone], col["ra_deg"][gone], col["dec_deg"][gone], col["z"][gone], pick(proxy, gone),
                          pick(weight, gone), reason[gone])
    cat = Catalogue(col["ra_deg"][used], col["dec_deg"][used], col["z"][used], pick(proxy, used), row[used],
                    str(stored.meta("CATFILE")), str(stored.meta("CATSHA")), table_selection(reason),
                    pick(weight, used), removed)
    temps_raw = np.array([np.asarray(t["t_raw_uK" + ("" if k == 0 else radius_suffix(r))], dtype=np.float64)[used]
                          for k, r in enumerate(radii)])
    progress.say(f"      {len(cat)} tracers used of {len(t)} rows (blinded temperatures: "
                 f"{'yes' if stored.blinding['blinded'] else 'no'}); the map is not read")
    return stored, cat, Apertures(temps_raw, radius_scale(cfg.aperture, cat.z, cfg.cosmology),
                                  int(np.isin(reason, DROP_REASONS).sum()))


def _table_column(cfg: Config, stored: StoredTracers, name: str, configured):
    """The table's proxy or weight column when the config names one (as the catalogue run would read it)."""
    if configured is None:
        return None
    if name not in stored.table.colnames:
        raise InputError(f"tracer table {stored.path}: has no '{name}' column, but catalogue.{name}_column is set "
                         f"(the table's run read none); remove catalogue.{name}_column", path=stored.path,
                         key=f"catalogue.{name}_column")
    return np.asarray(stored.table[name], dtype=np.float64)


def check_table_apertures(cfg: Config, stored: StoredTracers, radii) -> None:
    """The configured apertures must be ones the table holds, measured the same way."""
    ap, where = cfg.aperture, f"tracer table {stored.path}"
    held = ", ".join(f"{r:g}" for r in stored.radii_arcmin)
    if radii[0] != stored.radii_arcmin[0]:
        raise InputError(f"aperture.radius_arcmin = {radii[0]:g} but {where} holds the primary radius "
                         f"{stored.radii_arcmin[0]:g} arcmin; set aperture.radius_arcmin = {stored.radii_arcmin[0]:g}",
                         path=stored.path, key="aperture.radius_arcmin")
    for r in radii[1:]:
        if f"t_raw_uK{radius_suffix(r)}" not in stored.table.colnames:
            raise InputError(f"aperture.radii_arcmin: {r:g} arcmin is not in {where} (it holds {held} arcmin)",
                             path=stored.path, key="aperture.radii_arcmin")
    for key, card in (("radius_kpc", "RADKPC"), ("radius_kpc_kind", "RADKIND"), ("pixel_weighting", "PIXWT")):
        stored_value = stored.meta(card)
        if getattr(ap, key) != stored_value:
            raise InputError(f"aperture.{key} = {getattr(ap, key)!r} but {where} was measured with {stored_value!r}; "
                             f"set it to that", path=stored.path, key=f"aperture.{key}")


def table_selection(reason) -> dict:
    """The catalogue's selection counts as the loader gives them, from the reasons of a tracer table."""
    counts = _counts(reason, (OUTSIDE_Z, OUTSIDE_PROXY, DUPLICATE))
    invalid = int(np.sum(np.char.startswith(np.asarray(reason, dtype=str), "invalid ")))
    selection = {"rows_read": int(np.size(reason)), "invalid_dropped": invalid, "outside_z_range": counts[OUTSIDE_Z],
                 "outside_proxy_range": counts[OUTSIDE_PROXY], "duplicates_dropped": counts[DUPLICATE]}
    return {**selection, "kept": selection["rows_read"] - sum(v for k, v in selection.items() if k != "rows_read")}


def tracer_table_cards(cfg: Config, prov: dict, stored: StoredTracers | None) -> dict:
    """Header cards of tracers.fits: how and where the apertures were measured, how the trend was removed."""
    if stored is None:
        ap = cfg.aperture
        measured = {"MAPFILE": prov["map"]["path"], "MAPSHA": prov["map"]["sha256"], "CATFILE": prov["catalogue"]["path"],
                    "CATSHA": prov["catalogue"]["sha256"], "PIXWT": ap.pixel_weighting, "MAXMASK": cfg.map.max_masked_fraction,
                    "RADKPC": ap.radius_kpc, "RADKIND": ap.radius_kpc_kind}
        if cfg.map.mask_path is not None:
            measured.update(MASKFILE=prov["mask"]["path"], MASKSHA=prov["mask"]["sha256"])
    else:
        measured = {card: stored.meta(card) for card in ("MAPFILE", "MAPSHA", "CATFILE", "CATSHA", "PIXWT", "MAXMASK",
                                                         "RADKPC", "RADKIND", "MASKFILE", "MASKSHA")
                    if card in stored.table.meta}
        measured["FROMTAB"] = stored.path
    return {**measured, "TRENDON": cfg.trend.enabled, "SIGMAZ": cfg.trend.sigma_z}


def selection_counts(cfg: Config, cat: Catalogue, aps: Apertures, sky: SkyInputs) -> dict:
    """The catalogue's selection counts with what the map stages dropped or changed."""
    dropped = _counts([] if cat.removed is None else cat.removed.reason, DROP_REASONS)
    selection = dict(cat.selection, aperture_masked_dropped=aps.n_dropped, aperture_dropped_by_reason=dropped,
                     used=len(cat))
    screened = _counts([] if cat.removed is None else cat.removed.reason, (NEAR_SOURCE, CLIPPED))  # also from a table
    if sky.sources is not None:
        selection["point_sources_masked"] = len(sky.sources)
    if sky.sources is not None or screened[NEAR_SOURCE]:
        selection["near_point_source_dropped"] = screened[NEAR_SOURCE]
    if cfg.outliers.clip_sigma is not None:
        selection["outlier_clip_sigma"] = cfg.outliers.clip_sigma
    if cfg.outliers.clip_sigma is not None or screened[CLIPPED]:
        selection["outliers_clipped"] = screened[CLIPPED]
    if sky.dipole_fit is not None:
        selection["map_monopole_dipole_removed_uk"] = [round(float(c), 6) for c in sky.dipole_fit]
    if aps.scale is not None:
        theta = cfg.aperture.radius_arcmin * aps.scale
        selection["aperture_radius_arcmin_range"] = (f"{theta.min():.3g}-{theta.max():.3g} (median "
                                                     f"{np.median(theta):.3g}) for {cfg.aperture.radius_kpc:g} kpc "
                                                     f"{cfg.aperture.radius_kpc_kind}")
    return selection


# ------------------------------------------------------------------------ trend and geometry
def _trend(temps, z, cfg: Config):
    if not cfg.trend.enabled:
        return temps
    return remove_redshift_trend(temps, z, sigma_z=cfg.trend.sigma_z)


def correct_trend(cfg: Config, temps_raw: np.ndarray, z: np.ndarray) -> np.ndarray:
    """Each radius's temperatures (n_radii, N) with the redshift trend removed (unchanged when off)."""
    return np.array([_trend(t, z, cfg) for t in temps_raw]).reshape(temps_raw.shape)


def geometry_and_regions(cfg: Config, cat: Catalogue, rng, progress: Progress) -> tuple[np.ndarray, np.ndarray]:
    """Comoving positions (N, 3) in Mpc and the jackknife region of each tracer (N,)."""
    positions = comoving_positions(cat.ra, cat.dec, cat.z, cosmo=cfg.cosmology)
    cc = cfg.covariance
    if cc.regions == "healpix":
        regions = healpix_regions(cat.ra, cat.dec, cc.healpix_nside, min_tracers=cc.min_region_tracers)
    else:
        if cc.n_regions > len(cat):
            raise InputError(f"covariance.n_regions = {cc.n_regions} exceeds the {len(cat)} usable tracers")
        regions = kmeans_regions(cat.ra, cat.dec, cc.n_regions, seed=rng)
    progress.say(f"      {int(regions.max()) + 1} jackknife regions ({cc.regions})")
    return positions, regions


def retrended_sets(temps_raw, z, regions, cfg: Config, runner: TaskRunner | None = None) -> np.ndarray:
    """Set r n_jk + k: the temperatures of radius r with the redshift trend estimated from the
    tracers outside region k (region k's own tracers, whose pairs the jackknife sample drops, are
    set to 0).  ``temps_raw`` (n_radii, N).

    A trend estimated once from all tracers is not deleted with region k, so each delete-one sample
    would keep temperatures whose trend no longer vanishes; on mocks that inflated the jackknife
    errors of p(r) by up to ~2.8x at 300 Mpc.  Without the re-estimate (trend correction or
    ``jackknife_retrend`` off) the tracer-split jackknife (``jackknife_deletes = "tracers"``) still
    needs set k, the corrected temperatures zeroed in region k; the pair-deleting one then needs
    none: empty (0, N).  On a Dask cluster (``runner``) the regions' re-estimates are tasks.
    """
    n, n_jk = z.size, int(regions.max()) + 1
    retrend = cfg.trend.enabled and cfg.covariance.jackknife_retrend
    if not (retrend or cfg.covariance.jackknife_deletes == "tracers"):
        return np.zeros((0, n))
    if retrend and runner is not None and runner.distributed:
        return trend_without_each_region(temps_raw, z, regions, sigma_z=cfg.trend.sigma_z,
                                         runner=runner).reshape(-1, n)
    once = None if retrend else correct_trend(cfg, temps_raw, z)  # the tracer split alone: zero region k
    out = np.zeros((temps_raw.shape[0], n_jk, n))
    for k in range(n_jk):
        keep = regions != k
        if keep.sum() >= 1:
            out[:, k, keep] = (remove_redshift_trend(temps_raw[:, keep], z[keep], sigma_z=cfg.trend.sigma_z)
                               if retrend else once[:, keep])
    return out.reshape(-1, n)


# ------------------------------------------------------------------ null and simulated sets
def set_jobs(cfg: Config, sky: SkyInputs, cat: Catalogue, scale, temps, stack: "TemperatureStack") -> list[SetJob]:
    """The run's random sets as jobs of :mod:`pairvel.stats.setchunks`, their rows those of ``stack`` (a
    layout): apertures at random sky positions, shuffles over all tracers (with their slice means) and
    within redshift slices, simulated skies at every radius.  Every set is drawn from its own generator
    (``core.rng.set_generator``: run seed, kind, index), so chunks and tasks make the same sets.

    The trend correction is applied again to each set, as to the data: a shuffle mixes tracers of
    different redshifts, so without it a shuffled set keeps a residual trend the data do not have, and
    its curve scatters more at large separations.
    """
    nc, rows, seed = cfg.nulls, stack.null_rows, cfg.run.seed
    sigma_z = cfg.trend.sigma_z if cfg.trend.enabled else None

    def count(kind):  # kinds the layout does not hold are not made
        return rows[kind].stop - rows[kind].start if kind in rows else 0

    jobs = []
    if count("random_positions"):
        jobs.append(random_position_job(sky.skymap, cat.z, cfg.aperture.radius_arcmin, count("random_positions"),
                                        rows["random_positions"].start, seed=seed, sigma_z=sigma_z,
                                        max_masked_fraction=cfg.map.max_masked_fraction,
                                        pixel_weighting=cfg.aperture.pixel_weighting, method=cfg.aperture.method,
                                        radius_scale=scale,
                                        exclude=source_exclusion(sky.sources, math.sqrt(2.0) * max(aperture_radii(cfg.aperture)))))
    means = [rows[SLICE_MEANS].start] if count(SLICE_MEANS) else []  # the reference of shuffled_in_z
    if count("shuffled"):
        jobs.append(shuffle_job(temps[0], cat.z, count("shuffled"), [rows["shuffled"].start] + means, seed=seed,
                                sigma_z=sigma_z, means_width=nc.z_slice_width if means else None))
    if count("shuffled_in_z"):
        jobs.append(shuffle_job(temps[0], cat.z, count("shuffled_in_z"), [rows["shuffled_in_z"].start], seed=seed,
                                sigma_z=sigma_z, z_slice_width=nc.z_slice_width))
    n_sim = stack.sim_rows.stop - stack.sim_rows.start
    if n_sim:
        jobs.append(simulation_job(simulation_plan(cfg, sky, cat), cat.z, n_sim,
                                   [r.start for r in stack.sim_radius_rows], seed=seed, sigma_z=sigma_z))
    return jobs


def _sets_of(jobs: list[SetJob], n_rows: int, n: int) -> np.ndarray:
    """(n_rows, n): the jobs' sets made here, in one chunk per kind."""
    out = np.empty((n_rows, n))
    make_sets(jobs, out.__setitem__, chunk=max(n_rows, 1))
    return out


def random_position_sets(cfg: Config, skymap, cat: Catalogue, scale, progress: Progress, *, sources=None) -> np.ndarray:
    """(n_random, N): apertures at random usable sky positions, trend-corrected like the data (the sets
    of :func:`set_jobs`; empty with a warning without a map, as in a run from a tracer table); positions
    whose apertures would touch a masked point source (``sources``) are redrawn, as such tracers are dropped."""
    if skymap is None:
        _skipped_without_map("nulls.n_random", cfg.nulls.n_random)
        return np.zeros((0, len(cat)))
    layout = TemperatureStack.layout(1, {"random_positions": cfg.nulls.n_random}, 0, 0)
    jobs = set_jobs(cfg, SkyInputs(skymap, None, None, None, sources), cat, scale, np.zeros((1, len(cat))), layout)
    return _sets_of([dataclasses.replace(job, targets=(0,)) for job in jobs], cfg.nulls.n_random, len(cat))


def rotated_map_sets(cfg: Config, skymap, cat: Catalogue, runner: TaskRunner | None = None) -> tuple[np.ndarray, list]:
    """(n_kept, N) apertures on the map rotated in longitude, trend-corrected, and the rotations kept
    (one task per rotation on a Dask cluster)."""
    nc = cfg.nulls
    if skymap is None:
        _skipped_without_map("nulls.rotation_deg", len(nc.rotation_deg))
        return np.zeros((0, len(cat))), []
    rot, kept = rotated_sets_on(runner, skymap, cat.ra, cat.dec, nc.rotation_deg,
                                radius_arcmin=cfg.aperture.radius_arcmin, max_masked_fraction=cfg.map.max_masked_fraction,
                                min_usable_fraction=nc.rotation_min_usable)
    return correct_trend(cfg, rot, cat.z), kept


def _skipped_without_map(key: str, n: int) -> None:
    if n:
        warnings.warn(f"{key}: this null test needs the sky map, which a run from restart.table_path does not read; "
                      f"skipped", PairvelWarning, stacklevel=3)


def shuffled_null_sets(cfg: Config, temps: np.ndarray, z: np.ndarray) -> dict:
    """Shuffled temperatures (N,), over all tracers and within redshift slices, and the slice means of the
    all-tracer shuffles (the reference of the within-slice null, see ``stats.nulltests.evaluate_null``):
    the sets of :func:`set_jobs`, kind -> (count, N)."""
    nc = cfg.nulls
    counts = {"shuffled": nc.n_shuffle, "shuffled_in_z": nc.n_shuffle_z,
              **({SLICE_MEANS: nc.n_shuffle} if nc.n_shuffle_z else {})}
    layout = TemperatureStack.layout(1, counts, 0, 0)
    values = _sets_of(set_jobs(cfg, None, _ZOnly(z), None, temps[None, :], layout), layout.n_sets, z.size)
    return {kind: values[rows] for kind, rows in layout.null_rows.items()}


@dataclass(frozen=True)
class _ZOnly:
    """What :func:`set_jobs` reads of a catalogue for the shuffles alone."""

    z: np.ndarray


def _noise_cl(path) -> np.ndarray | None:
    """N_ell from an (ell, N_ell) text table, zero at multipoles it does not list."""
    if path is None:
        return None
    try:
        table = np.loadtxt(path, comments="#", ndmin=2)
    except (OSError, ValueError) as err:
        raise InputError(f"covariance.sim_noise_cl_path {path}: cannot be read as an (ell, N_ell) "
                         f"table ({err})", path=path) from None
    noise_cl = np.zeros(int(table[:, 0].max()) + 1)
    noise_cl[table[:, 0].astype(int)] = table[:, 1]
    return noise_cl


def simulation_plan(cfg: Config, sky: SkyInputs, cat: Catalogue):
    """The simulated skies' :class:`~pairvel.stats.simcov.SimulationPlan`: the configured Gaussian sky, measured
    as the data (mask, physical radius, pixel weighting, pre-filter); with ``covariance.sim_signal_tau`` or
    ``sim_signal_tsz_uk`` each sky carries a tracer signal."""
    cc = cfg.covariance
    cmb_cl = None
    if cc.sim_cmb:
        from .model.cmb import load_cmb_cl

        cmb_cl = load_cmb_cl()[1]
    pf = sky.prefilter
    return prepare_simulations(sky.skymap, cat.ra, cat.dec, aperture_radii(cfg.aperture), cmb_cl=cmb_cl,
                               beam_fwhm_arcmin=cc.sim_beam_fwhm_arcmin,
                               white_noise_uk_arcmin=cc.sim_white_noise_uk_arcmin,
                               noise_cl=_noise_cl(cc.sim_noise_cl_path), **photometry_options(cfg, cat.z),
                               n_threads=cfg.compute.n_threads,
                               transfer=None if pf is None else pf.transfer / pf.response,
                               signal=simulated_signal(cfg, cat), pixel_noise_variance=_noise_variance_map(cfg, sky))


def simulated_sets(cfg: Config, sky: SkyInputs, cat: Catalogue, progress: Progress) -> np.ndarray:
    """(n_radii, n_sim, N): the aperture temperatures of the simulated skies of :func:`set_jobs` at every
    radius, unusable apertures set to the set's mean, trend-corrected like the data."""
    n_radii, n_sim = len(aperture_radii(cfg.aperture)), cfg.covariance.n_sim
    layout = TemperatureStack.layout(n_radii, {}, 0, n_sim)
    jobs = set_jobs(cfg, sky, cat, None, np.zeros((1, len(cat))), layout)
    first = layout.sim_rows.start
    jobs = [dataclasses.replace(job, targets=tuple(t - first for t in job.targets)) for job in jobs]
    return _sets_of(jobs, n_radii * n_sim, len(cat)).reshape(n_radii, n_sim, len(cat))


def _noise_variance_map(cfg: Config, sky: SkyInputs):
    """The per-pixel noise variance of ``[noise]`` as a map for the simulated skies (``noise.in_simulations``)."""
    if not cfg.noise.in_simulations:
        return None
    return sky.skymap.with_values(sky.pixel_noise_var)  # inf (no noise information) reads as a pixel without data


def simulated_signal(cfg: Config, cat: Catalogue):
    """The callback adding a kSZ and thermal-SZ tracer signal to each simulated sky, or None when off."""
    cc = cfg.covariance
    if cc.sim_signal_tau == 0 and cc.sim_signal_tsz_uk == 0:
        return None
    from .sims.skysignal import tracer_signal

    return tracer_signal(cat.ra, cat.dec, cat.z, aperture_radii(cfg.aperture), tau=cc.sim_signal_tau,
                         tsz_uk=cc.sim_signal_tsz_uk, tsz_scatter_dex=cc.sim_signal_tsz_scatter_dex,
                         beam_fwhm_arcmin=cc.sim_beam_fwhm_arcmin, cell_mpc=cc.sim_signal_cell_mpc,
                         radius_scale=photometry_options(cfg, cat.z)["radius_scale"], cosmo=cfg.cosmology)


# ------------------------------------------------------------------------------ the pair pass
@dataclass(frozen=True)
class TemperatureStack:
    """Every temperature set of a run as rows of one (n_sets, N) array, in this order: the data
    (primary radius), the null realisations of each kind, the extra aperture radii, the jackknife
    sets re-trended without each region (radius by radius), the simulated skies (radius by radius)."""

    values: np.ndarray
    null_rows: dict     # kind -> slice of rows
    radius_rows: list   # the primary radius (row 0), then each extra radius
    retrend_start: int  # first re-trended jackknife row
    n_retrend: int
    sim_radius_rows: list  # the simulated skies' rows at each radius, primary first (empty slices without)

    @classmethod
    def build(cls, temps, null_sets: dict, retrended, sims) -> "TemperatureStack":
        """``sims`` of shape (n_radii, n_sim, N), or (0, N) without simulated skies."""
        sims = np.asarray(sims).reshape(-1, temps.shape[1])
        values = np.vstack([temps[:1]] + list(null_sets.values()) + [temps[1:], retrended, sims])
        rows = cls.layout(temps.shape[0], {kind: sets.shape[0] for kind, sets in null_sets.items()},
                          retrended.shape[0], sims.shape[0] // temps.shape[0])
        return dataclasses.replace(rows, values=values)

    @classmethod
    def layout(cls, n_radii: int, null_counts: dict, n_retrend: int, n_sim: int) -> "TemperatureStack":
        """The rows alone (``values`` None) of a stack with these numbers of sets: null kind -> count,
        the re-trended jackknife sets (all radii), the simulated skies per radius."""
        rows, null_rows = 1, {}
        for kind, count in null_counts.items():
            null_rows[kind] = slice(rows, rows + count)
            rows += count
        radius_rows = [0] + list(range(rows, rows + n_radii - 1))
        rows += n_radii - 1
        first = rows + n_retrend
        sim_radius_rows = [slice(first + r * n_sim, first + (r + 1) * n_sim) for r in range(n_radii)]
        return cls(None, null_rows, radius_rows, rows, n_retrend, sim_radius_rows)

    @property
    def sim_rows(self) -> slice:
        """The simulated skies' rows at the primary radius."""
        return self.sim_radius_rows[0]

    @property
    def n_sets(self) -> int:
        return self.sim_radius_rows[-1].stop  # the simulated skies come last (an empty slice at the end without)


def set_layout(cfg: Config, sky: SkyInputs, temps, rotated, retrended) -> TemperatureStack:
    """The rows (no values) of the run's stack: the data and extra radii, every null kind, the re-trended
    jackknife sets, the simulated skies; no random-position rows without a map (warned)."""
    nc = cfg.nulls
    n_random = nc.n_random if sky.skymap is not None else 0
    if sky.skymap is None:
        _skipped_without_map("nulls.n_random", nc.n_random)
    counts = {"random_positions": n_random, "shuffled": nc.n_shuffle, "shuffled_in_z": nc.n_shuffle_z,
              **({SLICE_MEANS: nc.n_shuffle} if nc.n_shuffle_z else {}), "rotated": rotated.shape[0]}
    n_sim = cfg.covariance.n_sim if cfg.covariance.estimator == "simulations" else 0
    return TemperatureStack.layout(temps.shape[0], counts, retrended.shape[0], n_sim)


def make_set_stages(cfg: Config, sky: SkyInputs, cat: Catalogue, aps: Apertures, temps, stack: TemperatureStack, add,
                    progress: Progress, runner: TaskRunner | None = None) -> None:
    """The jobs of :func:`set_jobs` made in three progress stages (random positions when there are any, the
    shuffles, the simulated skies when configured), chunks of ``compute.memory_budget_gb``, every set handed to
    ``add(rows, values)``; on ``runner`` as tasks (:func:`pairvel.stats.setchunks.make_sets`)."""
    nc, chunk = cfg.nulls, sets_per_chunk(len(cat), cfg.compute.memory_budget_gb)
    jobs = set_jobs(cfg, sky, cat, aps.scale, temps, stack)
    where = "as tasks" if runner is not None and runner.distributed else f"up to {chunk} sets a chunk"
    n_random = stack.null_rows["random_positions"].stop - stack.null_rows["random_positions"].start
    n_sim = stack.sim_rows.stop - stack.sim_rows.start
    groups = [(("random_positions",), f"null-test photometry: {n_random} sets of random sky positions, {where}"),
              (("shuffled", "shuffled_in_z"), f"shuffled nulls: {nc.n_shuffle} + {nc.n_shuffle_z} within redshift "
                                               f"slices, trend re-applied, {where}"),
              (("simulated_sky",), f"simulated maps: {n_sim} Gaussian skies, {where}")]
    for kinds, label in groups:
        mine = [job for job in jobs if job.kind in kinds]
        if mine or kinds[0] == "shuffled":  # the shuffle stage is always listed
            with progress.stage(label):
                make_sets(mine, add, chunk=chunk, runner=runner, say=progress.say)


def stacked_pair_pass(cfg: Config, sky: SkyInputs, cat: Catalogue, aps: Apertures, temps, retrended, positions,
                      regions, progress: Progress, runner: TaskRunner | None = None):
    """Every temperature set made (on ``runner``: the rotations, random sets and simulated skies as tasks,
    chunks of at most ``compute.memory_budget_gb``), stacked, and summed in one pair pass (as work units on
    a cluster): (stack, PairwiseResult, rotations)."""
    n, edges = len(cat), cfg.bins.edges()
    with progress.stage(f"null-test photometry: map rotated by {len(cfg.nulls.rotation_deg)} longitude angles"):
        rotated, rotations = rotated_map_sets(cfg, sky.skymap, cat, runner)
    layout = set_layout(cfg, sky, temps, rotated, retrended)
    values = np.empty((layout.n_sets, n))
    values[layout.radius_rows] = temps
    values[layout.null_rows["rotated"]] = rotated
    values[layout.retrend_start:layout.retrend_start + layout.n_retrend] = retrended
    make_set_stages(cfg, sky, cat, aps, temps, layout, values.__setitem__, progress, runner)
    stack = dataclasses.replace(layout, values=values)
    with progress.stage(f"pair pass: {n} tracers, {stack.n_sets} temperature sets, {edges.size - 1} bins"):
        pr = pair_pass(cfg, positions, stack.values, edges, regions, cat, progress, runner)
    return stack, pr, rotations


def chunked_pair_pass(cfg: Config, sky: SkyInputs, cat: Catalogue, aps: Apertures, temps, retrended, positions,
                      regions, progress: Progress):
    """The sets of :func:`stacked_pair_pass`, each made and summed a chunk at a time so that memory holds
    about ``compute.memory_budget_gb`` of them (:mod:`pairvel.pairs.chunked`); the same rows, the same
    sets (each from its own generator), the same sums.  Returns (stack rows without values, result, rotations)."""
    n, edges = len(cat), cfg.bins.edges()
    chunk = sets_per_chunk(n, cfg.compute.memory_budget_gb)
    with progress.stage(f"null-test photometry: map rotated by {len(cfg.nulls.rotation_deg)} longitude angles"):
        rotated, rotations = rotated_map_sets(cfg, sky.skymap, cat)
    stack = set_layout(cfg, sky, temps, rotated, retrended)
    with progress.stage(f"pair pass, geometry: {n} tracers, {stack.n_sets} temperature sets in chunks of up to "
                        f"{chunk}, {edges.size - 1} bins"):
        engine = ChunkedPass(positions, edges, stack.n_sets, regions=regions, redshifts=cat.z, weights=cat.weight,
                             n_threads=cfg.compute.n_threads, chunk_sets=chunk)
        engine.add(stack.radius_rows, temps)
        engine.add(stack.null_rows["rotated"], rotated)
        _add_in_chunks(engine, stack.retrend_start, retrended, chunk)
        progress.say(f"      {'linear' if engine.linear else 'direct'} path; the data, extra radii, rotated-map and "
                     f"re-trended jackknife sets summed")
    make_set_stages(cfg, sky, cat, aps, temps, stack, engine.add, progress)
    with progress.stage(f"pair pass: {n} tracers, {stack.n_sets} temperature sets, {edges.size - 1} bins"):
        pr = engine.result()
        progress.say(f"      {int(pr.pair_counts.sum()):,} pairs in {edges[0]:g}-{edges[-1]:g} Mpc")
    return stack, pr, rotations


def _add_in_chunks(engine: ChunkedPass, start: int, sets, chunk: int) -> None:
    for k in range(0, sets.shape[0], chunk):
        engine.add(slice(start + k, start + min(k + chunk, sets.shape[0])), sets[k:k + chunk])


def compute_runner(cfg: Config):
    """Context manager: the :class:`~pairvel.core.cluster.TaskRunner` of ``[compute]``, a Dask cluster when
    a scheduler is configured, else this process."""
    cc = cfg.compute
    return open_runner(cc.scheduler_address, scheduler_file=cc.scheduler_file, worker_wait_s=cc.worker_wait_s)


def pair_pass(cfg: Config, positions, values, edges, regions, cat: Catalogue, progress: Progress,
              runner: TaskRunner | None = None):
    """One pass over every pair for every temperature set, locally or as work units on a Dask cluster."""
    if runner is not None and runner.distributed:
        pr = pairwise_momentum_units(positions, values, edges, regions=regions, redshifts=cat.z,
                                     weights=cat.weight, n_units=cfg.compute.n_units,
                                     scheduler=runner, n_threads=cfg.compute.n_threads)
    else:
        pr = pairwise_momentum(positions, values, edges, regions=regions, redshifts=cat.z,
                               weights=cat.weight, n_threads=cfg.compute.n_threads)
    progress.say(f"      {int(pr.pair_counts.sum()):,} pairs in {edges[0]:g}-{edges[-1]:g} Mpc")
    return pr


# ------------------------------------------------------------------ covariance, template, fit
@dataclass(frozen=True)
class CovarianceResult:
    """The data curve, its jackknife samples and the covariance the fit uses."""

    p: np.ndarray          # (n_bins,) uK, the data curve
    p_jk: np.ndarray       # (n_jk, n_bins) the data's jackknife samples
    jk_rows: np.ndarray    # (n_sets, n_jk, n_bins) every set's jackknife samples (re-trended where run)
    jackknife: np.ndarray  # jackknife covariance
    matrix: np.ndarray     # the covariance used (jackknife, simulations or bootstrap)
    n_samples: int         # samples behind it, for the Hartlap factor
    n_jk: int
    diagnostics: dict
    from_simulations: bool


def _jackknife_rows(cfg: Config, pr, stack: TemperatureStack, n_jk: int) -> np.ndarray:
    """Each set's jackknife samples; where re-trended sets were run, sample k of radius r comes from
    the set re-trended without region k (and zero in it): its whole numerator over the denominator
    less region k's share (``jackknife_deletes = "tracers"``, :func:`tracer_split_samples`), or the
    estimator without the pairs touching k ("pairs")."""
    if not stack.n_retrend:
        return pr.p_jk
    rows = pr.p_jk.copy()
    k = np.arange(n_jk)
    for r, row_r in enumerate(stack.radius_rows):
        sets = stack.retrend_start + r * n_jk + k
        if cfg.covariance.jackknife_deletes == "tracers":
            rows[row_r] = tracer_split_samples(pr.numerator[sets], pr.denominator, pr.den_jk)
        else:
            rows[row_r] = pr.p_jk[sets, k]
    return rows


def covariance(cfg: Config, pr, stack: TemperatureStack, positions, temps, edges, regions, cat: Catalogue,
               rng) -> CovarianceResult:
    """Jackknife covariance, or the simulated-sky or region-bootstrap one when configured."""
    cc = cfg.covariance
    n_jk = int(regions.max()) + 1
    jk_rows = _jackknife_rows(cfg, pr, stack, n_jk)
    p, p_jk = pr.p[0], jk_rows[0]
    valid = np.all(np.isfinite(p_jk), axis=0) & np.isfinite(p)
    if not valid.all():
        raise InputError(f"separation bins {np.flatnonzero(~valid).tolist()} have no pairs in some jackknife "
                         f"sample; widen bins.width_mpc or reduce covariance.n_regions")
    cov_jk = jackknife_covariance(p_jk)
    cov, n_cov = cov_jk, n_jk
    n_sims = stack.sim_rows.stop - stack.sim_rows.start
    if n_sims:
        cov, n_cov = simulation_covariance(pr.p[stack.sim_rows]), n_sims
    if cc.estimator == "bootstrap":
        num_k, den_k = region_half_sums(positions, temps, edges, regions, weights=cat.weight,
                                        n_threads=cfg.compute.n_threads)
        cov = bootstrap_covariance(bootstrap_samples(num_k, den_k, cc.n_bootstrap, seed=rng))
    covs = {"jackknife": cov_jk, cc.estimator: cov}
    diag = covariance_diagnostics(covs, {name: (n_cov if name == "simulations" else n_jk) for name in covs},
                                  used=cc.estimator, n_fit_bins=int(fit_bins(cfg, edges).sum()))
    return CovarianceResult(p, p_jk, jk_rows, cov_jk, cov, n_cov, n_jk, diag, bool(n_sims))


def sim_radius_curves(pr, stack: TemperatureStack, cov: CovarianceResult):
    """(n_radii, n_sim, n_bins) curves of the simulated skies at each radius when they give the covariance."""
    return np.array([pr.p[rows] for rows in stack.sim_radius_rows]) if cov.from_simulations else None


@dataclass(frozen=True)
class TemplateResult:
    """The model curve the amplitude is fitted against."""

    v12: np.ndarray           # (n_bins,) km/s, bin- and pair-averaged, times the trend-loss factor
    template_uk: np.ndarray   # T_CMB v12 / c, uK per unit optical depth
    in_fit: np.ndarray        # (n_bins,) bool, bins inside the fit range
    z_eff: float
    trend_factor: np.ndarray  # (n_bins,) signal fraction kept by the trend removal (1 when not modelled)
    info: dict


def fit_bins(cfg: Config, edges) -> np.ndarray:
    """(n_bins,) bool: the bins whose centre lies in the fit range [fit_r_min_mpc, fit_r_max_mpc)."""
    r_mid = 0.5 * (edges[1:] + edges[:-1])
    return (r_mid >= cfg.theory.fit_r_min_mpc) & (r_mid < cfg.theory.fit_r_max_mpc)


def template(cfg: Config, pr, edges, cat: Catalogue, positions, power, rng, progress: Progress, *,
             v12_table=None) -> TemplateResult:
    """The template averaged like the estimator, times the predicted trend-removal loss.

    With theory.fit_template_tolerance the fit range also drops the bins where the templates differ by
    more than that fraction (z_eff is taken over the configured range, before that cut).
    """
    in_fit = fit_bins(cfg, edges)
    weight = pr.denominator * in_fit
    z_eff = float(np.sum(weight * pr.z_eff) / np.sum(weight))
    v12, info = template_for_run(cfg.theory, cfg.cosmology, edges, pair_counts=pr.pair_counts,
                                 z_tracers=cat.z, z_eff=z_eff, z_eff_bins=pr.z_eff, power=power,
                                 proxy=cat.proxy, weights=cat.weight, v12_table=v12_table)
    in_fit = in_fit & np.asarray(info.get("compared", {}).get("within_tolerance", True))
    if not in_fit.any():
        raise TheoryError(f"theory.fit_template_tolerance = {cfg.theory.fit_template_tolerance:g}: no bin in the fit "
                          f"range has templates that agree this well; raise it or widen the fit range")
    for line in template_progress_lines(info):
        progress.say(line)
    factor = trend_loss(positions, cat.z, edges, cfg, rng, power, info, progress, weights=cat.weight)
    v12 = v12 * factor
    return TemplateResult(v12, T_CMB_UK * v12 / C_KM_S, in_fit, z_eff, factor, info)


def trend_loss(positions, z, edges, cfg: Config, rng, power, template_info: dict, progress,
               weights=None) -> np.ndarray:
    """Per-bin fraction of the pairwise signal the redshift-trend removal keeps (1 when not modelled), its
    pairs weighted as the estimator's (``weights``: the catalogue's, noise weights included).

    Records the fraction, its Monte Carlo error and the draws in ``template_info``.
    """
    nbins = edges.size - 1
    if not (cfg.trend.enabled and cfg.theory.model_trend_loss):
        template_info["trend_loss_model"] = None
        return np.ones(nbins)
    tr = trend_transfer(positions, z, edges, cfg.trend.sigma_z, seed=rng, cosmo=cfg.cosmology,
                        wiggles=cfg.theory.wiggles, power=power, weights=weights)
    factor = tr.factor
    template_info["trend_loss_model"] = {
        "kept_fraction": [round(float(x), 5) for x in factor],
        "kept_fraction_error": [round(float(x), 5) if np.isfinite(x) else None for x in tr.error],
        "pairs_per_bin": tr.n_pairs, "shell_tracers": tr.n_shell,
        "bins_without_pairs_set_to_1": int(np.sum(~np.isfinite(tr.ratio))),
    }
    progress.say(f"      template x signal kept by the trend removal: {factor.min():.3f}-{factor.max():.3f} "
                 f"(first bin {factor[0]:.3f}, last {factor[-1]:.3f})")
    return factor


def channel_curves(cfg: Config, cat: Catalogue, positions, regions, model: TemplateResult, scale,
                   progress: Progress) -> dict:
    """Each map of ``[multifrequency]`` alone and the difference of every two (:mod:`pairvel.stats.perchannel`):
    photometry at the used tracers with the run's options and map treatment, one pair pass of all of
    them with their re-trended jackknife sets, a jackknife fit per map and a null test per difference."""
    import itertools

    mf = cfg.multifrequency
    options = {**photometry_options(cfg, cat.z), "radius_scale": scale}
    raw = []
    for path, skymap in zip(mf.map_paths, read_channel_maps(cfg)):
        skymap = treat_map(cfg, skymap, progress)[0]
        t = measure_apertures(skymap, cat.ra, cat.dec, aperture_radii(cfg.aperture)[:1], **options).temperatures[0]
        bad = ~np.isfinite(t)
        if bad.any():
            warnings.warn(f"multifrequency.per_channel: {int(bad.sum())} tracers have no usable aperture on {path}; "
                          f"they enter its curve at the mean temperature", PairvelWarning, stacklevel=2)
            t = np.where(bad, np.nanmean(t), t)
        raw.append(t)
    pairs = list(itertools.combinations(range(len(raw)), 2))
    raw = np.array(raw + [raw[a] - raw[b] for a, b in pairs])
    stack = TemperatureStack.build(correct_trend(cfg, raw, cat.z), {}, retrended_sets(raw, cat.z, regions, cfg),
                                   np.zeros((0, len(cat))))
    pr = pair_pass(cfg, positions, stack.values, cfg.bins.edges(), regions, cat, progress)
    n_jk = int(regions.max()) + 1
    jk = _jackknife_rows(cfg, pr, stack, n_jk)
    maps = [{"path": p, "frequency_ghz": nu} for p, nu in zip(mf.map_paths, mf.frequencies_ghz)]
    return channel_results(pr.p[stack.radius_rows], jk[stack.radius_rows], model.template_uk, maps=maps, pairs=pairs,
                           n_jk=n_jk, in_fit=model.in_fit, likelihood=cfg.theory.likelihood,
                           threshold=cfg.nulls.pte_threshold)


def evaluate_nulls(cfg: Config, pr, stack: TemperatureStack, cov: CovarianceResult) -> list:
    """chi2 and PTE of each kind of null test that has realisations: against the scatter of its own
    realisations, or the fit's covariance when it has too few (see :func:`pairvel.stats.nulltests.evaluate_null`)."""
    means = pr.p[stack.null_rows[SLICE_MEANS]] if SLICE_MEANS in stack.null_rows else None
    return [evaluate_null(kind, pr.p[rows], threshold=cfg.nulls.pte_threshold, covariance=cov.matrix,
                          n_samples=cov.n_samples, reference=means if kind == "shuffled_in_z" else None)
            for kind, rows in stack.null_rows.items() if rows.stop > rows.start and kind in NULL_KINDS]


def significance(fit, model: TemplateResult, cov: CovarianceResult, pr, stack: TemperatureStack) -> list[dict]:
    """The fitted amplitude among those fitted (same template, covariance and fit range) to each kind
    of null realisation and to the simulated skies (:mod:`pairvel.stats.significance`)."""
    rows = {kind: r for kind, r in stack.null_rows.items() if kind in NULL_KINDS}
    if stack.sim_rows.stop > stack.sim_rows.start:
        rows["simulated skies"] = stack.sim_rows
    amps = {name: fitted_amplitudes(pr.p[r], model.template_uk, cov.matrix, use=model.in_fit,
                                     likelihood=fit.likelihood)
            for name, r in rows.items() if r.stop > r.start}
    return empirical_significance(fit.amplitude, amps)


def region_seed_spread(cfg: Config, cat: Catalogue, positions, temps_raw, temps, cov: CovarianceResult,
                       model: TemplateResult, quoted_error: float, runner: TaskRunner | None = None) -> dict | None:
    """tau_mean refitted with the jackknife covariance of k-means regions drawn with other seeds.

    Entry 0 is the run's own regions (``cov.jackknife``); each of ``covariance.extra_region_seeds``
    more assignments gets a pair pass of the data and its re-trended jackknife sets.  None when
    the option is off or the regions are HEALPix pixels (which have no seed).
    """
    cc = cfg.covariance
    if cc.regions != "kmeans" or cc.extra_region_seeds == 0:
        return None
    th, edges, quiet = cfg.theory, cfg.bins.edges(), Progress(1, quiet=True)

    def refit(matrix, n_jk):
        return fit_amplitude(cov.p, model.template_uk, matrix, n_samples=n_jk, use=model.in_fit,
                             likelihood=th.likelihood)

    fits, skipped = [refit(cov.jackknife, cov.n_jk)], 0
    for gen in derived_generators(cfg.run.seed, "jackknife region seeds", cc.extra_region_seeds):
        regions = kmeans_regions(cat.ra, cat.dec, cc.n_regions, seed=gen)
        stack = TemperatureStack.build(temps[:1], {}, retrended_sets(temps_raw[:1], cat.z, regions, cfg, runner),
                                       np.zeros((0, len(cat))))
        pr = pair_pass(cfg, positions, stack.values, edges, regions, cat, quiet, runner)
        p_jk = _jackknife_rows(cfg, pr, stack, cc.n_regions)[0]
        if not np.all(np.isfinite(p_jk)):
            skipped += 1
            continue
        fits.append(refit(jackknife_covariance(p_jk), cc.n_regions))
    if skipped:
        warnings.warn(f"covariance.extra_region_seeds: {skipped} of {cc.extra_region_seeds} region seeds skipped, "
                      f"a jackknife sample had a bin without pairs", PairvelWarning, stacklevel=2)
    return summarise_spread([f.amplitude for f in fits], [f.error for f in fits], quoted_error=quoted_error,
                            n_regions=cc.n_regions, skipped=skipped)


def cross_curve(cfg: Config, sky: SkyInputs, partner, cat: Catalogue, positions, temps_raw, regions,
                model: TemplateResult, power, progress: Progress) -> dict | None:
    """The cross pairs of [catalogue] and [partner] (:mod:`pairvel.stats.cross`); None without a partner."""
    if partner is None:
        return None
    return cross_pairs(cfg, sky.skymap, partner, positions=positions, temps_raw=temps_raw, z=cat.z,
                       weights=cat.weight, ra=cat.ra, dec=cat.dec, regions=regions, edges=cfg.bins.edges(),
                       in_fit=model.in_fit,
                       trend_factor=model.trend_factor, power=power, progress=progress.say, sources=sky.sources)


# ---------------------------------------------------------------------------- what else is kept
def extra_results(cfg: Config, fit, model: TemplateResult, cov: CovarianceResult, radius_fits, sky: SkyInputs,
                  rotations, spread, *, radii_joint=None, **data) -> dict:
    """Everything beyond the main curve and fit: optional fits and map-stage records, as data.

    Each key needs a blinding rule (``pairvel.report.blinding.EXTRA_RULES``); report sections are
    made from these data when the outputs are written, so a blinded run gets blinded sections.
    """
    extra = {"template": model.info}
    if spread is not None:
        extra["region_seed_spread"] = spread
    if len(radius_fits) > 1:
        extra["radius_fits"] = radius_fits
    if radii_joint is not None:
        extra["radius_joint"] = radii_joint
    extra.update(extra_fits(cfg, fit, model, cov.n_samples, **data))
    if sky.prefilter is not None:  # harmonic-space filter of the map
        extra["prefilter"] = sky.prefilter.info()
        extra["prefilter_transfer"] = sky.prefilter.transfer
    if sky.combination is not None:  # several frequency maps
        extra["multifrequency"] = sky.combination
    extra.update({"covariance_diagnostics": cov.diagnostics,
                  "rotations_used": [{"angle_deg": a, "usable_fraction": f} for a, f in rotations]})
    return extra


def extra_fits(cfg: Config, fit, model: TemplateResult, n_samples: int, *, cat, positions, temps, regions, edges,
               power, progress, v12_table=None, retrended=None) -> dict:
    """Optional fits after the main one: per proxy bin (with their joint covariance and tau against
    mass), and tau_mean jointly with f sigma_8."""
    out = {}
    th = cfg.theory
    if th.proxy_bin_edges is not None:
        progress.say(f"      fits in {len(th.proxy_bin_edges) - 1} bins of {cfg.catalogue.proxy_column}")
        bins, joint = fit_proxy_bins(th.proxy_bin_edges, proxy=cat.proxy, positions=positions, temperatures=temps,
                                     redshifts=cat.z, regions=regions, edges=edges, in_fit=model.in_fit, theory_cfg=th,
                                     cosmo=cfg.cosmology, power=power, n_threads=cfg.compute.n_threads,
                                     template_factor=model.trend_factor, retrended=retrended, weights=cat.weight,
                                     tau_all=fit.amplitude, v12_table=v12_table)
        out["proxy_bins"] = bins
        if joint is not None:
            out["proxy_joint"] = joint
        if th.proxy_power_law is not None:
            out["mass_trend"] = fit_mass_trend(bins, joint, proxy=cat.proxy, proxy_scale=th.proxy_power_law,
                                               weights=cat.weight)
    if th.fit_velocity_scale:
        prior = None if th.tau_prior_mean is None else (th.tau_prior_mean, th.tau_prior_sigma)
        out["velocity_scale_fit"] = fit_velocity_scale(fit, model.info["f_sigma8_template"], n_samples=n_samples,
                                                       tau_prior=prior)
    return out


def provenance(cfg: Config, cat: Catalogue, sky: SkyInputs, started: str, stored: StoredTracers | None) -> dict:
    """Inputs with their checksums, versions, seed and start time: what a rerun needs.

    A run from a tracer table names the table, and the catalogue, map and mask its temperatures came from.
    """
    def stored_file(card):
        return {"path": stored.meta(f"{card}FILE"), "sha256": stored.meta(f"{card}SHA")}

    mask = None if cfg.map.mask_path is None else {"path": str(cfg.map.mask_path), "sha256": file_sha256(cfg.map.mask_path)}
    out = {
        "pairvel_version": __version__,
        "started_utc": started,
        "config_file": None if cfg.source is None else str(cfg.source),
        "config_sha256": None if cfg.source is None else file_sha256(cfg.source),
        "config_text": None if cfg.source is None else cfg.source.read_text(encoding="utf-8", errors="replace"),
        "config_git_commit": None if cfg.source is None else git_commit(cfg.source.resolve().parent),
        "catalogue": {"path": cat.path, "sha256": cat.sha256},
        "map": map_provenance(cfg) if stored is None else stored_file("MAP"),
        "multifrequency": sky.combination,
        "mask": mask if stored is None or stored.meta("MASKFILE") is None else stored_file("MASK"),
        "seed": cfg.run.seed,
        "versions": package_versions(),
        "platform": platform.platform(),
    }
    if stored is not None:
        out["tracer_table"] = {"path": stored.path, "sha256": file_sha256(stored.path)}
    if sky.sources is not None:
        out["point_sources"] = {"path": sky.sources.path, "sha256": sky.sources.sha256}
    bands = [cfg.map.bandpass_path] if cfg.map.bandpass_path is not None else cfg.multifrequency.bandpass_paths or []
    if bands and stored is None:
        out["bandpass"] = {"path": "; ".join(map(str, bands)), "sha256": "; ".join(file_sha256(b) for b in bands)}
    return out
