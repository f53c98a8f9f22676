"""Clusters against galaxies: the pairwise curve of the cross pairs of two catalogues.

In: the run's catalogue (comoving positions, raw and trend-corrected aperture temperatures,
weights, jackknife regions), the sky map, the ``[partner]`` settings of a second catalogue and the
run's template pieces.  Out: ``RunResult.extra["cross"]``, a plain dict (curve, jackknife
covariance, template, fit, shuffled nulls) that summary.json keeps and the report shows.

Steps: the second catalogue is read with its own cuts and measured on the same map with its own
aperture; the redshift trend is removed per catalogue; each of its tracers joins the jackknife
region of the first catalogue whose centre is nearest (one set of regions for both); every
temperature set (data, shuffles within each catalogue, the sets re-trended without each region)
goes through one cross pass of the engine (:func:`pairvel.pairs.estimator.pairwise_momentum_cross`,
only pairs with one member in each catalogue).

What the fitted amplitude is
----------------------------
With T = -tau T_CMB v_r / c in both catalogues (tau_1 for catalogue 1, tau_2 for 2), a cross pair
contributes (T_1 - T_2) c_12.  In linear theory the mean velocity of a member of catalogue 1
towards its partner is set by the density of catalogue 2 around it, so it is b_2 u(r), and that of
the member of 2 is b_1 u(r) (u: the infall of a unit-bias pair member).  The estimator therefore
measures T_CMB / c times -(tau_1 b_2 + tau_2 b_1) u, while the cross template is
v12 = -(b_1 + b_2) u (:func:`pairvel.model.theory.pairwise_velocity` with both biases).  The
fitted amplitude is

    tau_cross = (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2),

each catalogue's optical depth weighted by the *other* catalogue's bias; equal biases give
(tau_1 + tau_2) / 2, and a sample without signal (tau_2 = 0) gives tau_1 b_2 / (b_1 + b_2).
"""

from __future__ import annotations

__all__ = ["cross_pairs", "cross_markdown", "cross_summary_line", "load_partner", "partner_regions", "amplitude_meaning"]

import warnings

import numpy as np

from ..core.constants import C_KM_S, T_CMB_UK
from ..core.errors import InputError, PairvelWarning
from ..core.rng import derived_generators
from ..core.sphere import unit_vectors
from ..input.catalogue import load_catalogue
from ..maps.photometry import DROP_REASONS, measure_apertures
from ..maps.radii import radius_scale
from ..maps.sourcemask import screen_apertures
from ..maps.trend import remove_redshift_trend
from ..model.template import template_for_run
from ..pairs.estimator import pairwise_momentum_cross
from ..pairs.geometry import comoving_positions
from .covariance import jackknife_covariance
from .fit import fit_amplitude
from .nulltests import evaluate_null, shuffled_sets

_NULL_KINDS = ("shuffled", "shuffled_in_z")


def amplitude_meaning(bias_1: float, bias_2: float) -> str:
    """One line saying what the cross fit's amplitude is, with the two biases."""
    return (f"tau_cross = (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2) with b_1 = {bias_1:g} ([theory] bias) and "
            f"b_2 = {bias_2:g} (partner.bias): each catalogue's mean optical depth weighted by the other's bias "
            f"(equal biases: the mean of the two)")


def partner_regions(ra_deg, dec_deg, ref_ra_deg, ref_dec_deg, ref_regions) -> np.ndarray:
    """The jackknife region of each tracer of a second catalogue: that of the first catalogue whose
    centre (mean unit vector of its tracers) is nearest in 3-d distance.

    For k-means regions this is the k-means assignment rule itself; for HEALPix-pixel regions it
    follows the regions' centres rather than the pixel edges.
    """
    ref = unit_vectors(ref_ra_deg, ref_dec_deg)
    labels = np.asarray(ref_regions, dtype=np.int64)
    n_jk = int(labels.max()) + 1
    centres = np.zeros((n_jk, 3))
    np.add.at(centres, labels, ref)
    centres /= np.bincount(labels, minlength=n_jk)[:, None]
    u = unit_vectors(ra_deg, dec_deg)
    dist2 = (centres**2).sum(axis=1)[None, :] - 2.0 * u @ centres.T  # |u - c|^2 - 1
    return np.argmin(dist2, axis=1).astype(np.int64)


def _trend(cfg, temps, z):
    return remove_redshift_trend(temps, z, sigma_z=cfg.trend.sigma_z) if cfg.trend.enabled else temps


def _side_sets(cfg, temps_raw, z, regions, n_jk: int, rng) -> tuple[np.ndarray, dict, int]:
    """One catalogue's temperature sets for the cross pass, rows: the data, the shuffles over all
    tracers and within redshift slices (trend removed again, as for the run's own nulls), then the
    data re-trended without each region k (region k's tracers set to 0) when the run re-trends.

    Returns (sets, null row slices by kind, first re-trended row or -1).
    """
    nc = cfg.nulls
    data = _trend(cfg, temps_raw, z)
    nulls = {"shuffled": shuffled_sets(data, z, nc.n_shuffle, rng=rng),
             "shuffled_in_z": shuffled_sets(data, z, nc.n_shuffle_z, rng=rng, z_slice_width=nc.z_slice_width)}
    rows, null_rows, sets = 1, {}, [data[None, :]]
    for kind in _NULL_KINDS:
        shuffled = np.array([_trend(cfg, t, z) for t in nulls[kind]]).reshape(-1, z.size)
        null_rows[kind] = slice(rows, rows + shuffled.shape[0])
        rows += shuffled.shape[0]
        sets.append(shuffled)
    retrend_start = -1
    if cfg.trend.enabled and cfg.covariance.jackknife_retrend:
        retrend_start = rows
        again = np.zeros((n_jk, z.size))
        for k in range(n_jk):
            keep = regions != k
            if keep.any():
                again[k, keep] = remove_redshift_trend(temps_raw[keep], z[keep], sigma_z=cfg.trend.sigma_z)
        sets.append(again)
    return np.vstack(sets), null_rows, retrend_start


def load_partner(cfg):
    """The ``[partner]`` catalogue read and cut (a bad file stops the run before any pair work), or None."""
    return None if cfg.partner.path is None else load_catalogue(cfg.partner, section="partner")


def partner_tracers(cfg, cat, skymap, progress=None, *, sources=None):
    """The second catalogue measured: (used tracers, raw aperture temperatures (N,), selection dict, radius).

    Tracers near a masked point source (``sources``) and, with ``outliers.clip_sigma``, outliers among
    these tracers are dropped as for the run's catalogue (:func:`pairvel.maps.sourcemask.screen_apertures`).
    """
    pc = cfg.partner
    radius = cfg.aperture.radius_arcmin if pc.radius_arcmin is None else pc.radius_arcmin
    scale = radius_scale(cfg.aperture, cat.z, cfg.cosmology)  # a physical radius shrinks with z here too
    res = measure_apertures(skymap, cat.ra, cat.dec, radius, max_masked_fraction=cfg.map.max_masked_fraction,
                            pixel_weighting=cfg.aperture.pixel_weighting, method=cfg.aperture.method,
                            radius_scale=scale)
    reach = np.sqrt(2.0) * radius * (1.0 if scale is None else scale)
    usable, reason, screened = screen_apertures(cat.ra, cat.dec, res.temperatures, res.usable, res.drop_reason,
                                                reach_arcmin=reach, sources=sources,
                                                clip_sigma=cfg.outliers.clip_sigma)
    n_dropped = int(np.isin(reason, DROP_REASONS).sum())
    if n_dropped:
        warnings.warn(f"partner catalogue {pc.path}: {n_dropped} of {len(cat)} tracers dropped by the photometry "
                      f"(aperture unusable)", PairvelWarning, stacklevel=2)
    if usable.sum() < 2:
        raise InputError(f"partner catalogue {pc.path}: fewer than 2 tracers have usable apertures ({n_dropped} of "
                         f"{len(cat)} dropped)", path=pc.path, key="partner.path")
    if progress is not None:
        progress(f"      partner catalogue: {int(usable.sum())} tracers used of {cat.selection['rows_read']} read")
    selection = dict(cat.selection, aperture_dropped=n_dropped, **screened, used=int(usable.sum()))
    return cat.subset(usable, reason=reason), res.temperatures[0, usable], selection, radius


def cross_pairs(cfg, skymap, partner, *, positions, temps_raw, z, weights, ra, dec, regions, edges, in_fit, trend_factor,
                power, progress=None, sources=None) -> dict:
    """The cross curve of the run's catalogue (1) against ``[partner]`` (2), its covariance, fit and nulls.

    Parameters
    ----------
    cfg : Config
    skymap : SkyMap
        The map the run measured (after mask, dipole removal and pre-filter).
    partner : Catalogue
        The second catalogue from :func:`load_partner`.
    positions : ndarray of shape (N, 3), Mpc
    temps_raw : ndarray of shape (N,), uK
        Catalogue 1's primary-radius aperture temperatures before the trend removal.
    z, weights, ra, dec, regions : ndarray of shape (N,)
        Catalogue 1's redshifts, weights (or None), positions in degrees and jackknife regions.
    edges : ndarray of shape (nbins + 1,), Mpc
    in_fit : ndarray of shape (nbins,), bool
    trend_factor : ndarray of shape (nbins,)
        The run's predicted fraction of the signal kept by the trend removal, applied to the cross
        template too (the two catalogues share the survey volume and the trend kernel; an approximation).
    power : TabulatedPower or None
    sources : SourceList, optional
        The point sources masked in the map: partner tracers near them are dropped too.

    Returns
    -------
    dict
        JSON-ready; every key has a blinding rule in ``pairvel.report.blinding.EXTRA_RULES["cross"]``.
    """
    pc = cfg.partner
    cat2, temps2_raw, selection, radius = partner_tracers(cfg, partner, skymap, progress, sources=sources)
    pos2 = comoving_positions(cat2.ra, cat2.dec, cat2.z, cosmo=cfg.cosmology)
    regions2 = partner_regions(cat2.ra, cat2.dec, ra, dec, regions)
    n_jk = int(regions.max()) + 1
    rng1, rng2 = derived_generators(cfg.run.seed, "cross-pair shuffles", 2)  # the run's own stream is untouched
    sets1, null_rows, retrend = _side_sets(cfg, temps_raw, z, regions, n_jk, rng1)
    sets2, _, _ = _side_sets(cfg, temps2_raw, cat2.z, regions2, n_jk, rng2)
    pr = pairwise_momentum_cross(positions, sets1, pos2, sets2, edges, regions_a=regions, regions_b=regions2,
                                 redshifts_a=z, redshifts_b=cat2.z, **_both_weights(weights, cat2.weight, len(z),
                                                                                    len(cat2.z)),
                                 n_threads=cfg.compute.n_threads)
    k = np.arange(n_jk)
    p_jk = pr.p_jk[retrend + k, k] if retrend >= 0 else pr.p_jk[0]
    p = pr.p[0]
    if not (np.all(np.isfinite(p_jk)) and np.all(np.isfinite(p))):
        raise InputError("the cross pairs of [catalogue] and [partner] leave a separation bin without pairs in some "
                         "jackknife sample; widen bins.width_mpc or reduce covariance.n_regions", key="partner.path")
    cov = jackknife_covariance(p_jk)
    weight = pr.denominator * in_fit
    z_eff = float(np.sum(weight * pr.z_eff) / np.sum(weight))
    biases = (float(cfg.theory.bias), float(pc.bias))
    v12, info = template_for_run(cfg.theory, cfg.cosmology, edges, pair_counts=pr.pair_counts, z_tracers=z,
                                 z_eff=z_eff, z_eff_bins=pr.z_eff, power=power, bias=biases, z_partner=cat2.z)
    v12 = v12 * trend_factor
    template_uk = T_CMB_UK * v12 / C_KM_S
    fit = fit_amplitude(p, template_uk, cov, n_samples=n_jk, use=in_fit, likelihood=cfg.theory.likelihood)
    nulls = [_null_dict(evaluate_null(kind, pr.p[rows], threshold=cfg.nulls.pte_threshold,
                                             covariance=cov, n_samples=n_jk))
             for kind, rows in null_rows.items() if rows.stop > rows.start]
    return {
        "partner": {"path": str(cat2.path), "sha256": cat2.sha256, "radius_arcmin": float(radius),
                    "selection": selection, "n_regions_holding": int(np.unique(regions2).size)},
        "bias_1": biases[0], "bias_2": biases[1], "amplitude_meaning": amplitude_meaning(*biases),
        "edges_mpc": [float(e) for e in edges], "p": p.tolist(), "p_err": np.sqrt(np.diag(cov)).tolist(),
        "covariance": cov.tolist(), "pair_counts": [int(c) for c in pr.pair_counts],
        "z_eff_bins": [None if not np.isfinite(x) else float(x) for x in pr.z_eff], "z_eff": z_eff,
        "v12_template": v12.tolist(), "in_fit": [bool(x) for x in in_fit], "n_jk": n_jk,
        "covariance_kind": "delete-one jackknife" + (", re-trended without each region" if retrend >= 0 else ""),
        "template_z_mean": info["z_mean_model"], "fit": fit.as_dict(), "nulls": nulls,
    }


def _both_weights(w1, w2, n1: int, n2: int) -> dict:
    """Weights for the cross pass, which takes both or neither: a catalogue without weights gets 1s
    when the other has some."""
    if w1 is None and w2 is None:
        return {}
    return {"weights_a": np.ones(n1) if w1 is None else w1, "weights_b": np.ones(n2) if w2 is None else w2}


def _null_dict(null) -> dict:
    return {"kind": null.kind, "description": f"{null.description}, each catalogue on its own",
            "n_realisations": int(null.n_real), "dof": int(null.dof), "chi2_mean_curve": float(null.chi2_mean),
            "pte_mean_curve": float(null.pte_mean), "pte_threshold": float(null.threshold), "passed": null.passed,
            "mean_p": null.p.mean(axis=0).tolist(), "mean_error": null.mean_error.tolist()}


def cross_summary_line(cross: dict) -> str:
    """The terminal line of the cross fit, with its nulls."""
    f = cross["fit"]
    nulls = ", ".join(f"{n['kind']} {'pass' if n['passed'] else 'FAIL'}" for n in cross["nulls"]) or "none"
    return (f"  cross pairs with {cross['partner']['path'].rsplit('/', 1)[-1]}: tau_cross = {f['amplitude']:.3e} ± "
            f"{f['error']:.3e}   S/N = {f['snr']:.2f}; (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2); nulls: {nulls}")


def cross_markdown(cross: dict) -> str:
    """Report section (markdown) of the cross curve: what was paired, the fit, what its amplitude means, nulls, the curve."""
    f, pt = cross["fit"], cross["partner"]
    sel = pt["selection"]
    lines = [f"Second catalogue `{pt['path']}`: {sel['used']} tracers used of {sel['rows_read']} read, aperture "
             f"{pt['radius_arcmin']:g} arcmin; only pairs with one member in each catalogue. Covariance: "
             f"{cross['covariance_kind']} ({cross['n_jk']} regions shared by both catalogues).",
             "",
             f"- cross amplitude: {f['amplitude']:.4g} +- {f['error']:.3g} (S/N {f['snr']:.2f}; chi2 {f['chi2_min']:.2f}"
             f" for {f['dof']} dof, PTE {f['pte_min']:.3f}) at z_eff = {cross['z_eff']:.3f}",
             f"- what it is: {cross['amplitude_meaning']}",
             "- template: v12 with (b_1 + b_2) / 2 in front of xibar and b_1 b_2 in place of b^2 in the denominator",
             ""]
    for n in cross["nulls"]:
        lines.append(f"- null ({n['description']}, {n['n_realisations']} sets): mean-curve chi2 "
                     f"{n['chi2_mean_curve']:.2f} / {n['dof']}, PTE {n['pte_mean_curve']:.3f} "
                     f"({'pass' if n['passed'] else 'FAIL'})")
    lines += ["", "| r (Mpc) | pairs | p (uK) | error (uK) | template x amplitude (uK) | in fit |", "|---|---|---|---|---|---|"]
    e, amp = cross["edges_mpc"], f["amplitude"]
    for b, (p, err, v, n, use) in enumerate(zip(cross["p"], cross["p_err"], cross["v12_template"],
                                                 cross["pair_counts"], cross["in_fit"])):
        model = amp * T_CMB_UK * v / C_KM_S
        lines.append(f"| {e[b]:g}-{e[b + 1]:g} | {n} | {p:.4g} | {err:.3g} | {model:.4g} | {'yes' if use else 'no'} |")
    return "\n".join(lines)
