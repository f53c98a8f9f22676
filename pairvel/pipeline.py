"""The only module that knows the order of the stages.

config -> catalogue + sky map -> photometry -> redshift-trend correction -> geometry -> pairs ->
estimate -> covariance -> fit -> null test.  Each stage is a plain function of plain data; this
module wires them together and collects a frozen :class:`RunResult` that the output writer turns
into files.
"""

from __future__ import annotations

__all__ = ["RunResult", "run_pipeline", "package_versions"]

import datetime as _dt
import platform
import warnings

import numpy as np

from .core.provenance import __version__
from .core.progress import Progress
from .core.rng import as_generator
from .core.provenance import file_sha256, package_versions
from .input.catalogue import Catalogue, load_catalogue
from .input.config import Config
from .report.result import RunResult
from .core.constants import C_KM_S, T_CMB_UK
from .stats.covariance import (bootstrap_covariance, bootstrap_samples, healpix_regions, jackknife_covariance,
                         kmeans_regions, region_half_sums)
from .core.errors import InputError, PairvelWarning
from .stats.covdiag import covariance_diagnostics, diagnostics_markdown
from .stats.simcov import simulate_aperture_temperatures, simulation_covariance
from .pairs.distributed import pairwise_momentum_units
from .pairs.estimator import pairwise_momentum
from .stats.fit import fit_amplitude
from .pairs.geometry import comoving_positions
from .stats.nulltests import evaluate_null, rotated_sets, shuffled_sets
from .maps.photometry import measure_apertures, measure_random_apertures
from .maps.skymap import read_mask, remove_monopole_dipole
from .stats.joint import fit_velocity_scale
from .maps.prefilter import apply_prefilter, prefilter_markdown
from .maps.multifreq import combination_markdown, map_provenance, read_input_map
from .maps.radii import aperture_radii, radius_scale
from .stats.radii import fit_radii, radius_report
from .stats.subsamples import fit_proxy_bins
from .model.template import load_power, template_for_run
from .model.trendmodel import trend_transfer
from .maps.trend import remove_redshift_trend

def _measure(skymap, ra, dec, cfg: Config, progress: Progress, label: str, scale=None):
    """Aperture temperatures (n_radii, N), primary radius first, and which tracers are usable at every radius."""
    ap = cfg.aperture
    res = measure_apertures(skymap, ra, dec, aperture_radii(ap), max_masked_fraction=cfg.map.max_masked_fraction,
                            progress=progress.counter(label), pixel_weighting=ap.pixel_weighting, method=ap.method,
                            radius_scale=scale)
    return res.temperatures, res.usable


def _trend(temps, z, cfg: Config):
    if not cfg.trend.enabled:
        return temps
    return remove_redshift_trend(temps, z, sigma_z=cfg.trend.sigma_z)


def _retrended_sets(temps_raw, z, regions, n_jk, cfg: Config) -> np.ndarray:
    """Set r n_jk + k: the temperatures of radius r with the redshift trend estimated from the
    tracers outside region k (region k's own tracers, whose pairs the jackknife sample drops, are
    set to 0).  ``temps_raw`` (n_radii, N).

    A trend estimated once from all tracers is not deleted with region k, so each delete-one sample
    would keep temperatures whose trend no longer vanishes; on mocks that inflated the jackknife
    errors of p(r) by up to ~2.8x at 300 Mpc.  Empty (0, N) when the trend correction or this
    option is off.
    """
    n = z.size
    if not (cfg.trend.enabled and cfg.covariance.jackknife_retrend):
        return np.zeros((0, n))
    out = np.zeros((temps_raw.shape[0], n_jk, n))
    for k in range(n_jk):
        keep = regions != k
        if keep.sum() >= 1:
            out[:, k, keep] = remove_redshift_trend(temps_raw[:, keep], z[keep], sigma_z=cfg.trend.sigma_z)
    return out.reshape(-1, n)


def _retrend(sets, z, cfg: Config):
    """The redshift-trend correction applied again to each shuffled set, as it was to the data:
    a shuffle mixes tracers of different redshifts, so without it a shuffled set keeps a residual
    trend the data do not have, and its curve scatters more at large separations."""
    return np.array([_trend(t, z, cfg) for t in sets]).reshape(sets.shape)


def _trend_loss(positions, z, edges, cfg: Config, rng, power, template_info: dict, progress) -> np.ndarray:
    """Per-bin fraction of the pairwise signal the redshift-trend removal keeps (1 when not modelled).

    Records the fraction, its Monte Carlo error and the draws in ``template_info``.
    """
    nbins = edges.size - 1
    if not (cfg.trend.enabled and cfg.theory.model_trend_loss):
        template_info["trend_loss_model"] = None
        return np.ones(nbins)
    tr = trend_transfer(positions, z, edges, cfg.trend.sigma_z, seed=rng, cosmo=cfg.cosmology,
                        wiggles=cfg.theory.wiggles, power=power)
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


def _extra_fits(cfg: Config, fit, template_info, n_jk, *, cat, positions, temps, regions, edges, in_fit, power,
                progress, trend_factor=None) -> dict:
    """Optional fits after the main one: per proxy bin, and tau_mean jointly with f sigma_8."""
    out = {}
    th = cfg.theory
    if th.proxy_bin_edges is not None:
        progress.say(f"      fits in {len(th.proxy_bin_edges) - 1} bins of {cfg.catalogue.proxy_column}")
        out["proxy_bins"] = fit_proxy_bins(th.proxy_bin_edges, proxy=cat.proxy, positions=positions,
                                           temperatures=temps, redshifts=cat.z, regions=regions, edges=edges,
                                           in_fit=in_fit, theory_cfg=th, cosmo=cfg.cosmology, power=power,
                                           n_threads=cfg.compute.n_threads, template_factor=trend_factor)
    if th.fit_velocity_scale:
        prior = None if th.tau_prior_mean is None else (th.tau_prior_mean, th.tau_prior_sigma)
        out["velocity_scale_fit"] = fit_velocity_scale(fit, template_info["f_sigma8_template"], n_samples=n_jk,
                                                       tau_prior=prior)
    return out


def _simulated_sets(skymap, cat, cfg: Config, rng, progress, prefilter=None) -> np.ndarray:
    """Aperture temperatures of the configured Gaussian sky simulations, trend-corrected like the data."""
    cc = cfg.covariance
    cmb_cl = noise_cl = None
    if cc.sim_cmb:
        from .model.cmb import load_cmb_cl

        cmb_cl = load_cmb_cl()[1]
    if cc.sim_noise_cl_path is not None:
        try:
            table = np.loadtxt(cc.sim_noise_cl_path, comments="#", ndmin=2)
        except (OSError, ValueError) as err:
            raise InputError(f"covariance.sim_noise_cl_path {cc.sim_noise_cl_path}: cannot be read as an (ell, N_ell) "
                             f"table ({err})", path=cc.sim_noise_cl_path) from None
        noise_cl = np.zeros(int(table[:, 0].max()) + 1)
        noise_cl[table[:, 0].astype(int)] = table[:, 1]
    sims = simulate_aperture_temperatures(skymap.nside, cat.ra, cat.dec, cfg.aperture.radius_arcmin, cc.n_sim,
                                          seed=rng, cmb_cl=cmb_cl, beam_fwhm_arcmin=cc.sim_beam_fwhm_arcmin,
                                          white_noise_uk_arcmin=cc.sim_white_noise_uk_arcmin, noise_cl=noise_cl,
                                          max_masked_fraction=cfg.map.max_masked_fraction,
                                          n_threads=cfg.compute.n_threads,
                                          progress=progress.counter("simulated maps"),
                                          transfer=None if prefilter is None else prefilter.transfer / prefilter.response)
    out = np.empty_like(sims)
    for k, t in enumerate(sims):
        ok = np.isfinite(t)
        out[k] = _trend(np.where(ok, t, t[ok].mean()), cat.z, cfg)
    return out


def run_pipeline(cfg: Config, *, progress: Progress | None = None) -> RunResult:
    """Run every stage for a validated config and return the result (nothing is written).

    Parameters
    ----------
    cfg : Config
        A validated configuration (see :func:`pairvel.input.config.load_config`).
    progress : Progress, optional
        Where stage lines go; silent when None.
    """
    progress = progress or Progress(10, quiet=True)
    rng = as_generator(cfg.run.seed)
    started = _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")

    power = load_power(cfg.theory, cfg.cosmology)  # read a P(k) table first: a bad file fails before the pair pass
    with progress.stage("catalogue"):
        cat: Catalogue = load_catalogue(cfg.catalogue)
        progress.say(f"      {len(cat)} tracers kept of {cat.selection['rows_read']} read")
    with progress.stage("sky map"):
        skymap, combination_info = read_input_map(cfg)  # one map, or the combination of [multifrequency]
        if cfg.map.mask_path is not None:
            mask = read_mask(cfg.map.mask_path, nside=skymap.nside,
                             nest=None if cfg.map.ordering is None else cfg.map.ordering == "NESTED",
                             coordsys=skymap.coordsys)
            skymap = skymap.with_mask(mask)
        dipole_fit = None
        if cfg.map.remove_dipole:
            skymap, dipole_fit = remove_monopole_dipole(skymap)
            progress.say(f"      removed monopole {dipole_fit[0]:.4g} uK and dipole |d| = "
                         f"{np.linalg.norm(dipole_fit[1:]):.4g} uK over the usable pixels")
        skymap, prefilter = apply_prefilter(skymap, cfg.prefilter, radius_arcmin=cfg.aperture.radius_arcmin,
                                            seed=cfg.run.seed, progress=progress.say)
    with progress.stage(f"aperture photometry at {len(cat)} tracers"):
        scale = radius_scale(cfg.aperture, cat.z, cfg.cosmology)  # None for fixed angular radii
        temps_radii, usable = _measure(skymap, cat.ra, cat.dec, cfg, progress, "apertures", scale)
        n_masked = int((~usable).sum())
        if n_masked:
            warnings.warn(f"{n_masked} of {len(cat)} tracers dropped: aperture more than "
                          f"{cfg.map.max_masked_fraction:.0%} masked or outside the map", PairvelWarning, stacklevel=2)
        if usable.sum() < 2:
            raise InputError(f"map {skymap.path}: fewer than 2 tracers have usable apertures "
                             f"({n_masked} of {len(cat)} masked or outside the map)", path=skymap.path)
        cat = cat.subset(usable)
        temps_radii = temps_radii[:, usable]
        temps = temps_radii[0]
        scale = None if scale is None else scale[usable]
    selection = dict(cat.selection, aperture_masked_dropped=n_masked, used=len(cat))
    if dipole_fit is not None:
        selection["map_monopole_dipole_removed_uk"] = [round(float(c), 6) for c in dipole_fit]
    if scale is not None:
        theta = cfg.aperture.radius_arcmin * scale
        selection["aperture_radius_arcmin_range"] = (f"{theta.min():.3g}-{theta.max():.3g} (median {np.median(theta):.3g}) "
                                                     f"for {cfg.aperture.radius_kpc:g} kpc {cfg.aperture.radius_kpc_kind}")

    with progress.stage("redshift-trend correction"):
        temps_raw = temps_radii          # (n_radii, N), before the trend correction
        temps = _trend(temps, cat.z, cfg)
        radius_sets = np.array([_trend(t, cat.z, cfg) for t in temps_radii[1:]]).reshape(-1, len(cat))
    with progress.stage("geometry and jackknife regions"):
        positions = comoving_positions(cat.ra, cat.dec, cat.z, cosmo=cfg.cosmology)
        cc = cfg.covariance
        if cc.regions == "healpix":
            regions = healpix_regions(cat.ra, cat.dec, cc.healpix_nside, min_tracers=cc.min_region_tracers)
        else:
            if cc.n_regions > len(cat):
                raise InputError(f"covariance.n_regions = {cc.n_regions} exceeds the {len(cat)} usable tracers")
            regions = kmeans_regions(cat.ra, cat.dec, cc.n_regions, seed=rng)
        n_jk = int(regions.max()) + 1
        progress.say(f"      {n_jk} jackknife regions ({cc.regions})")
        retrended = _retrended_sets(temps_raw, cat.z, regions, n_jk, cfg)

    n_null = cfg.nulls.n_random
    with progress.stage(f"null-test photometry: {n_null} sets of random sky positions"):
        null_sets = []
        for k in range(n_null):
            _, _, t_r = measure_random_apertures(skymap, len(cat), cfg.aperture.radius_arcmin, seed=rng,
                                                 max_masked_fraction=cfg.map.max_masked_fraction,
                                                 pixel_weighting=cfg.aperture.pixel_weighting, method=cfg.aperture.method,
                                                 radius_scale=scale)
            null_sets.append(_trend(t_r[0], cat.z, cfg))
            progress.say(f"      null set {k + 1}/{n_null}")

    nc = cfg.nulls
    with progress.stage(f"null-test photometry: map rotated by {len(nc.rotation_deg)} longitude angles"):
        rot, rot_kept = rotated_sets(skymap, cat.ra, cat.dec, nc.rotation_deg, radius_arcmin=cfg.aperture.radius_arcmin,
                                     max_masked_fraction=cfg.map.max_masked_fraction,
                                     min_usable_fraction=nc.rotation_min_usable)
        rot = np.array([_trend(t, cat.z, cfg) for t in rot]).reshape(rot.shape)
    null_sets = {"random_positions": np.array(null_sets).reshape(n_null, len(cat)),
                 "shuffled": _retrend(shuffled_sets(temps, cat.z, nc.n_shuffle, rng=rng), cat.z, cfg),
                 "shuffled_in_z": _retrend(shuffled_sets(temps, cat.z, nc.n_shuffle_z, rng=rng,
                                                         z_slice_width=nc.z_slice_width), cat.z, cfg),
                 "rotated": rot}
    sims = np.zeros((0, len(cat)))
    if cc.estimator == "simulations":
        with progress.stage(f"simulated maps: {cc.n_sim} Gaussian skies at nside {skymap.nside}"):
            sims = _simulated_sets(skymap, cat, cfg, rng, progress, prefilter)
    # rows: data, null realisations, extra aperture radii, re-trended jackknife sets, simulated maps (last)
    rt0 = 1 + sum(v.shape[0] for v in null_sets.values()) + radius_sets.shape[0]
    stacked = np.vstack([temps[None, :]] + list(null_sets.values()) + [radius_sets, retrended, sims])
    edges = cfg.bins.edges()
    with progress.stage(f"pair pass: {len(cat)} tracers, {stacked.shape[0]} temperature sets, {edges.size - 1} bins"):
        if cfg.compute.scheduler_address:
            pr = pairwise_momentum_units(positions, stacked, edges, regions=regions, redshifts=cat.z,
                                         weights=cat.weight, n_units=cfg.compute.n_units,
                                         scheduler=cfg.compute.scheduler_address, n_threads=cfg.compute.n_threads)
        else:
            pr = pairwise_momentum(positions, stacked, edges, regions=regions, redshifts=cat.z,
                                   weights=cat.weight, n_threads=cfg.compute.n_threads)
        progress.say(f"      {int(pr.pair_counts.sum()):,} pairs in {edges[0]:g}-{edges[-1]:g} Mpc")

    with progress.stage("covariance, template and fit"):
        p, p_jk = pr.p[0], pr.p_jk[0]
        jk_rows = pr.p_jk
        if retrended.shape[0]:   # sample k: the set re-trended without region k, minus the pairs touching k
            jk_rows = pr.p_jk.copy()
            for r, row_r in enumerate([0] + list(range(rt0 - radius_sets.shape[0], rt0))):
                jk_rows[row_r] = pr.p_jk[rt0 + r * n_jk + np.arange(n_jk), np.arange(n_jk)]
            p_jk = jk_rows[0]
        valid = np.all(np.isfinite(p_jk), axis=0) & np.isfinite(p)
        if not valid.all():
            raise InputError(f"separation bins {np.flatnonzero(~valid).tolist()} have no pairs in some jackknife "
                             f"sample; widen bins.width_mpc or reduce covariance.n_regions")
        cov_jk = jackknife_covariance(p_jk)
        cov, p_boot = cov_jk, None
        n_cov = n_jk
        if sims.shape[0]:
            cov = simulation_covariance(pr.p[stacked.shape[0] - sims.shape[0]:])
            n_cov = sims.shape[0]
        if cc.estimator == "bootstrap":
            num_k, den_k = region_half_sums(positions, temps, edges, regions, weights=cat.weight,
                                            n_threads=cfg.compute.n_threads)
            p_boot = bootstrap_samples(num_k, den_k, cc.n_bootstrap, seed=rng)
            cov = bootstrap_covariance(p_boot)
        r_mid = 0.5 * (edges[1:] + edges[:-1])
        in_fit = (r_mid >= cfg.theory.fit_r_min_mpc) & (r_mid < cfg.theory.fit_r_max_mpc)
        weight = pr.denominator * in_fit
        z_eff = float(np.sum(weight * pr.z_eff) / np.sum(weight))
        v12, template_info = template_for_run(cfg.theory, cfg.cosmology, edges, pair_counts=pr.pair_counts,
                                              z_tracers=cat.z, z_eff=z_eff, z_eff_bins=pr.z_eff, power=power)
        trend_factor = _trend_loss(positions, cat.z, edges, cfg, rng, power, template_info, progress)
        v12 = v12 * trend_factor
        template = T_CMB_UK * v12 / C_KM_S
        fit = fit_amplitude(p, template, cov, n_samples=n_cov, use=in_fit, likelihood=cfg.theory.likelihood)
        covs = {"jackknife": cov_jk, cc.estimator: cov}
        diag = covariance_diagnostics(covs, {name: (n_cov if name == "simulations" else n_jk) for name in covs},
                                      used=cc.estimator)
        nulls, row = [], 1
        for kind, sets in null_sets.items():
            if sets.shape[0]:
                rows = slice(row, row + sets.shape[0])
                nulls.append(evaluate_null(kind, pr.p[rows], pr.p_jk[rows], n_jk, threshold=nc.pte_threshold,
                                           **({"covariance": cov, "n_samples": n_cov} if sims.shape[0] else {})))
                row += sets.shape[0]
        radius_rows = [0] + list(range(row, row + radius_sets.shape[0]))  # the extra radii are the last rows
        radius_fits = fit_radii(aperture_radii(cfg.aperture), pr.p[radius_rows], jk_rows[radius_rows], template,
                                n_jk=n_jk, in_fit=in_fit, likelihood=cfg.theory.likelihood)

    extra = {"template": template_info}
    if len(radius_fits) > 1:
        extra["radius_fits"] = radius_fits
        extra["report_sections"] = {"Signal against aperture radius": radius_report(radius_fits)}
    extra.update(_extra_fits(cfg, fit, template_info, n_cov, cat=cat, positions=positions, temps=temps,
                             regions=regions, edges=edges, in_fit=in_fit, power=power, progress=progress,
                             trend_factor=trend_factor))
    if prefilter is not None:  # harmonic-space filter of the map
        extra["prefilter"] = prefilter.info()
        extra["prefilter_transfer"] = prefilter.transfer
        extra["report_sections"] = {**extra.get("report_sections", {}),
                                    "Map pre-filter": prefilter_markdown(extra["prefilter"])}
    if combination_info is not None:  # several frequency maps
        extra["multifrequency"] = combination_info
        extra["report_sections"] = {**extra.get("report_sections", {}),
                                    "Several frequency maps": combination_markdown(combination_info)}
    extra.update({"covariance_diagnostics": diag,
                  "rotations_used": [{"angle_deg": a, "usable_fraction": f} for a, f in rot_kept],
                  "report_sections": {**extra.get("report_sections", {}),
                                      "Covariance diagnostics": diagnostics_markdown(diag, edges)}})
    provenance = {
        "pairvel_version": __version__,
        "started_utc": started,
        "config_file": None if cfg.source is None else str(cfg.source),
        "config_sha256": None if cfg.source is None else file_sha256(cfg.source),
        "catalogue": {"path": cat.path, "sha256": cat.sha256},
        "map": map_provenance(cfg),
        "multifrequency": combination_info,
        "mask": None if cfg.map.mask_path is None else {"path": str(cfg.map.mask_path),
                                                         "sha256": file_sha256(cfg.map.mask_path)},
        "seed": cfg.run.seed,
        "versions": package_versions(),
        "platform": platform.platform(),
    }
    return RunResult(
        config=cfg, edges=edges, p=p, covariance=cov, p_jk=p_jk, pair_counts=pr.pair_counts,
        z_eff_bins=pr.z_eff, z_eff=z_eff, v12_template=v12, in_fit=in_fit, fit=fit, nulls=tuple(nulls),
        n_tracers=len(cat), selection=selection, provenance=provenance, extra=extra,
    )
