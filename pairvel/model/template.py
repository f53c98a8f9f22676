"""The template the measured curve is fitted with: v12 averaged the way the estimator averages pairs.

The estimator's expectation in a separation bin is the c_ij^2-weighted mean of the pairs' line-of-sight
relative velocities.  Because c_ij^2 averaged over orientations does not depend on r or z, that is the
pair-count-weighted mean of v12(r, z) over the pairs in the bin.  This module builds it from two
ingredients the run already has:

- **separation within a bin**: the measured pair counts per bin.  The pair density is modelled as
  dN/dr = r^2 g(r), with g (the survey window times 1 + xi) interpolated linearly between bin
  centres from g_b = N_b / int_bin r^2 dr, so a bin's internal weighting follows the measured counts
  rather than plain volume;
- **redshift of the pairs**: for separations much smaller than the survey depth the number of pairs
  at mean redshift z is n(z)^2 dV/dz per unit separation volume, with n = (dN/dz)/(dV/dz), i.e.
  proportional to (dN/dz)^2 / (dV/dz).  dN/dz is a histogram of the catalogue redshifts, so this
  costs one histogram (no extra pass over pairs).  Its mean is reported beside the per-bin
  pair-weighted z_eff measured by the pair engine as a consistency check.

Photometric-redshift errors sigma_z (1 + z) move each tracer along the line of sight by a Gaussian
of width sigma_x = c sigma_z (1 + z) / H(z), so a pair's line-of-sight separation carries an error
of width sigma_p = sqrt(2) sigma_x.  Two damping models are offered:

- ``"convolution"`` (derived here; distant observer, pairs uniform apart from the velocity signal,
  so given the observed separation vector the true one differs by delta ~ N(0, sigma_p^2) along
  the line of sight; c_ij is computed from the observed positions):

      v12_obs(r) = (3/2) int_{-1}^{1} dmu mu  int ddelta G(delta; sigma_p) v12(r_t) mu_t,
      r_t = sqrt(r^2 (1 - mu^2) + (r mu - delta)^2),  mu_t = (r mu - delta) / r_t;

- ``"exponential"``: the form of Keisler & Schmidt (2013, ApJL 765, L32),
  v12_obs = v12 [1 - exp(-r^2 / (2 sigma_r^2))], here with sigma_r = sigma_p (the error of the
  pair difference; see the note in SCIENCE.md).

Both return v12 unchanged as sigma_z -> 0 (tests/model/test_template.py).
"""

from __future__ import annotations

__all__ = ["PHOTOZ_MODELS", "VELOCITY_MODEL_NAMES", "bin_averaged_velocity", "load_power", "load_v12_table",
           "los_error_mpc", "pair_redshift_distribution", "photoz_damped_velocity", "template_for_run", "velocity_model"]

import numpy as np

from ..core.constants import C_KM_S
from ..core.errors import TheoryError
from .cosmology import DEFAULT_COSMOLOGY, Cosmology
from .theory import growth_rate, pairwise_velocity, sigma_radius

PHOTOZ_MODELS = ("convolution", "exponential")
_R_GRID = np.geomspace(0.5, 2000.0, 500)


def los_error_mpc(z, sigma_z0: float, *, cosmo: Cosmology = DEFAULT_COSMOLOGY):
    """Comoving line-of-sight position error of one tracer, c sigma_z0 (1 + z) / H(z), Mpc."""
    z = np.asarray(z, dtype=float)
    return C_KM_S * sigma_z0 * (1 + z) / cosmo.hubble_km_s_mpc(z)


def pair_redshift_distribution(z, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, n_nodes: int = 16, z_partner=None,
                               weights=None):
    """Redshift distribution of the pairs of a catalogue, (dN/dz)^2 / (dV/dz), on ``n_nodes`` nodes.

    Parameters
    ----------
    z : ndarray of shape (n,)
        Tracer redshifts.
    n_nodes : int, default 16
        Histogram bins between the lowest and highest redshift.
    z_partner : ndarray of shape (m,), optional
        Redshifts of a second catalogue: the distribution of the cross pairs, (dN_1/dz)(dN_2/dz) / (dV/dz),
        on bins spanning both.
    weights : ndarray of shape (n,), optional
        The estimator's tracer weights w_i (pairs weigh w_i w_j): dN/dz becomes sum w_i per unit z.
        The nodes kept are those holding tracers, as without weights.

    Returns
    -------
    z_nodes, weights : ndarray of shape (m,)
        Bin centres with non-zero weight and weights summing to 1.
    """
    z = np.asarray(z, dtype=float)
    z2 = z if z_partner is None else np.asarray(z_partner, dtype=float)
    both = np.concatenate([z, z2])
    if z.size < 2 or not np.all(np.isfinite(both)):
        raise TheoryError(f"the pair redshift distribution needs >= 2 finite redshifts; got {z.size}")
    lo, hi = float(both.min()), float(both.max())
    if hi - lo < 1e-6:
        return np.array([lo]), np.array([1.0])
    counts, e = np.histogram(z, bins=n_nodes, range=(lo, hi))
    counts2 = counts if z_partner is None else np.histogram(z2, bins=n_nodes, range=(lo, hi))[0]
    summed = counts if weights is None else np.histogram(z, bins=n_nodes, range=(lo, hi),
                                                         weights=np.asarray(weights, dtype=float))[0]
    zc = 0.5 * (e[1:] + e[:-1])
    chi = cosmo.comoving_distance_mpc(zc)
    dvdz = chi**2 / cosmo.hubble_km_s_mpc(zc)  # up to constants that cancel
    dndz = summed / np.diff(e)
    w = dndz * (dndz if z_partner is None else counts2 / np.diff(e)) / dvdz
    keep = counts * counts2 > 0
    if not np.sum(w[keep]) > 0:
        raise TheoryError("the tracer weights sum to zero in every redshift shell; cannot weight the pair redshifts")
    return zc[keep], w[keep] / w[keep].sum()


def _damp_convolution(r, v_grid, sigma_p):
    """The line-of-sight convolution of the module notes, for v12 tabulated on _R_GRID."""
    xh, wh = np.polynomial.hermite_e.hermegauss(64)  # weight exp(-x^2 / 2)
    wh = wh / np.sqrt(2 * np.pi)
    xm, wm = np.polynomial.legendre.leggauss(48)
    mu, d = xm[:, None, None], sigma_p * xh[None, None, :]
    rr = np.asarray(r, dtype=float)[None, :, None]
    par = rr * mu - d
    rt = np.sqrt(rr * rr * (1 - mu * mu) + par * par)
    mut = par / np.maximum(rt, 1e-12)
    vt = np.where(rt < _R_GRID[0], v_grid[0] * rt / _R_GRID[0],
                  np.interp(np.log(np.clip(rt, _R_GRID[0], None)), np.log(_R_GRID), v_grid, right=0.0))
    return 1.5 * np.einsum("m,mrd,d->r", wm, mu * vt * mut, wh)


def photoz_damped_velocity(r_mpc, z, sigma_z0: float, bias=1.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY,
                           model: str = "convolution", velocity=pairwise_velocity, **template_kw):
    """v12(r, z) as the estimator sees it when redshifts carry errors sigma_z0 (1 + z), km/s.

    Parameters
    ----------
    r_mpc : array-like, comoving Mpc (observed separation)
    z : float
    sigma_z0 : float
        Photometric-redshift error at z = 0 (the error is sigma_z0 (1 + z)); 0 gives v12 itself.
    model : {"convolution", "exponential"}
        See the module notes.
    velocity : callable, default :func:`pairvel.model.theory.pairwise_velocity`
        The undamped v12(r, z, bias, cosmo=..., **template_kw) (see :func:`velocity_model`).
    **template_kw
        Passed to ``velocity`` (wiggles, power, growth).
    """
    if model not in PHOTOZ_MODELS:
        raise TheoryError(f"photo-z damping model must be one of {PHOTOZ_MODELS}; got {model!r}")
    if not (np.isfinite(sigma_z0) and sigma_z0 >= 0):
        raise TheoryError(f"photo-z error sigma_z0 must be finite and >= 0; got {sigma_z0!r}")
    r = np.asarray(r_mpc, dtype=float)
    if sigma_z0 == 0:
        return velocity(r, z, bias, cosmo=cosmo, **template_kw)
    sigma_p = np.sqrt(2.0) * float(los_error_mpc(z, sigma_z0, cosmo=cosmo))
    if model == "exponential":
        v = velocity(r, z, bias, cosmo=cosmo, **template_kw)
        return v * -np.expm1(-(r**2) / (2 * sigma_p**2))
    v_grid = velocity(_R_GRID, z, bias, cosmo=cosmo, **template_kw)
    return _damp_convolution(np.atleast_1d(r), v_grid, sigma_p).reshape(r.shape)


def _separation_weights(edges, pair_counts):
    """g_b per bin (pair density over r^2) and a function g(r) interpolating it; None: volume weights."""
    if pair_counts is None:
        return None
    n = np.asarray(pair_counts, dtype=float)
    if n.shape != (edges.size - 1,) or np.any(~np.isfinite(n)) or np.any(n < 0):
        raise TheoryError(f"pair counts must be {edges.size - 1} finite values >= 0; got shape {n.shape}")
    filled = n > 0
    if not filled.any():
        return None
    g = n[filled] / ((edges[1:] ** 3 - edges[:-1] ** 3)[filled] / 3)
    mid = 0.5 * (edges[1:] + edges[:-1])[filled]
    return lambda r: np.interp(r, mid, g)  # bins without pairs take g from their neighbours


def bin_averaged_velocity(edges_mpc, z_nodes, z_weights, bias=1.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY,
                          pair_counts=None, sigma_z0: float = 0.0, photoz_model: str = "convolution",
                          n_sub: int = 16, velocity=pairwise_velocity, **template_kw):
    """Template v12 per separation bin, averaged over r within each bin and over the pair redshifts, km/s.

    Parameters
    ----------
    edges_mpc : ndarray of shape (nbins + 1,), Mpc
    z_nodes, z_weights : ndarray of shape (m,)
        Redshifts of the pairs and their weights (e.g. from :func:`pair_redshift_distribution`, or a
        single effective redshift with weight 1).
    bias : float, ndarray of shape (m,) or (float, float)
        Linear bias, one value or one per redshift node (e.g. from
        :func:`pairvel.model.halobias.pair_weighted_bias`), or the biases (b_1, b_2) of the two
        catalogues of a cross curve.
    pair_counts : ndarray of shape (nbins,), optional
        Measured pairs per bin; sets the weighting inside each bin (see the module notes).  None falls
        back to volume (r^2) weighting; a bin without pairs takes g(r) from its neighbours.
    sigma_z0 : float, default 0
        Photometric-redshift error sigma_z0 (1 + z); 0 for spectroscopic redshifts.
    photoz_model : {"convolution", "exponential"}
    n_sub : int, default 16
        Gauss-Legendre nodes per bin.
    velocity : callable, default :func:`pairvel.model.theory.pairwise_velocity`
        The v12 model (see :func:`velocity_model`).
    **template_kw
        wiggles, power, growth for ``velocity``.
    """
    edges = np.asarray(edges_mpc, dtype=float)
    zn = np.atleast_1d(np.asarray(z_nodes, dtype=float))
    zw = np.atleast_1d(np.asarray(z_weights, dtype=float))
    if zn.shape != zw.shape or zn.size == 0 or np.any(zw < 0) or not zw.sum() > 0:
        raise TheoryError(f"redshift nodes and weights must be equal-length, weights >= 0 with a positive sum; "
                          f"got {zn.shape} and {zw.shape}")
    if isinstance(bias, tuple):  # (b_1, b_2) of a cross curve: the same pair of biases at every node
        b_nodes = [bias] * zn.size
    else:
        b_nodes = np.broadcast_to(np.asarray(bias, dtype=float), zn.shape)
    g = _separation_weights(edges, pair_counts)
    x, w = np.polynomial.legendre.leggauss(n_sub)
    lo = np.maximum(edges[:-1], 0.5)
    hi = edges[1:]
    r = 0.5 * (hi - lo)[:, None] * x[None, :] + 0.5 * (hi + lo)[:, None]
    wr = w[None, :] * r * r * (1.0 if g is None else g(r))
    wr = wr / wr.sum(axis=1, keepdims=True)
    out = np.zeros(edges.size - 1)
    for zi, wi, bi in zip(zn, zw / zw.sum(), b_nodes):
        v = photoz_damped_velocity(r.ravel(), zi, sigma_z0, bi, cosmo=cosmo, model=photoz_model, velocity=velocity,
                                   **template_kw)
        out += wi * np.sum(wr * v.reshape(r.shape), axis=1)
    return out


def load_power(theory_cfg, cosmo: Cosmology):
    """The tabulated P(k) a config names (``theory.power_table_path``), or None for Eisenstein & Hu."""
    if theory_cfg.power_table_path is None:
        return None
    from .power import read_power_table

    return read_power_table(theory_cfg.power_table_path, z=theory_cfg.power_table_z,
                            renormalise=theory_cfg.power_table_renormalise, n_s=cosmo.n_s, h=cosmo.h)


def load_v12_table(theory_cfg):
    """The v12(r, z) table a config names (``theory.v12_table_path``), or None."""
    if theory_cfg.v12_table_path is None:
        return None
    from .nonlinear import read_v12_table

    return read_v12_table(theory_cfg.v12_table_path)


def velocity_model(kind: str, table=None):
    """The v12(r, z, bias, cosmo=..., **template_kw) function of ``theory.velocity_model``.

    "linear": :func:`pairvel.model.theory.pairwise_velocity`; "jsd99":
    :func:`pairvel.model.nonlinear.jsd99_velocity`; "table": the :class:`~pairvel.model.nonlinear.V12Table`
    ``table`` (bias and the P(k) settings do not enter it).
    """
    from .nonlinear import jsd99_velocity

    if kind == "linear":
        return pairwise_velocity
    if kind == "jsd99":
        return jsd99_velocity
    if kind == "table" and table is not None:
        return lambda r, z, bias, cosmo=None, **_: table(r, z)
    raise TheoryError(f"velocity model must be linear, jsd99 or table (with a table); got {kind!r}")


VELOCITY_MODEL_NAMES = {"linear": "linear theory",
                        "jsd99": "Juszkiewicz et al. 1999 closed form",
                        "table": "user v12(r, z) table"}


def template_for_run(theory_cfg, cosmo: Cosmology, edges, *, pair_counts, z_tracers, z_eff: float,
                     z_eff_bins=None, power=None, proxy=None, weights=None, v12_table=None, bias=None,
                     z_partner=None):
    """v12 per bin for a run's [theory] settings, and a dict describing how it was built.

    Parameters
    ----------
    theory_cfg : pairvel.input.config.TheoryConfig
    edges : ndarray of shape (nbins + 1,), Mpc
    pair_counts : ndarray of shape (nbins,)
    z_tracers : ndarray of shape (n,)
        Redshifts of the tracers used (for the pair redshift distribution).
    z_eff : float
        Pair-weighted effective redshift over the fitted bins.
    z_eff_bins : ndarray of shape (nbins,), optional
        Measured pair-weighted mean redshift per bin (reported beside the model's).
    power : TabulatedPower, optional
        From :func:`load_power`.
    proxy, weights : ndarray of shape (n,), optional
        The tracers' proxy column (for ``theory.bias_from_proxy``) and the estimator's tracer weights
        (pairs weigh w_i w_j: the pair redshift distribution and the pair-weighted bias use them).
    v12_table : V12Table, optional
        From :func:`load_v12_table`, for ``theory.velocity_model = "table"`` (and the comparison).
    bias : (float, float), optional
        The biases (b_1, b_2) of two catalogues, for the template of their cross pairs (default:
        ``theory_cfg.bias`` for the pairs of one catalogue).
    z_partner : ndarray of shape (m,), optional
        Redshifts of the second catalogue, for the cross pairs' redshift distribution.
    """
    tc = theory_cfg
    if tc.bias is None and tc.bias_from_proxy is None:  # load_config refuses such a config; this catches one in code
        raise TheoryError("theory.bias is required: tau_mean scales as 1/b, so no value is assumed")
    if tc.redshift_weighting == "pair_distribution":
        z_nodes, z_w = pair_redshift_distribution(z_tracers, cosmo=cosmo, z_partner=z_partner, weights=weights)
    else:
        z_nodes, z_w = np.array([z_eff]), np.array([1.0])
    if bias is None:
        bias, bias_info = _run_bias(tc, cosmo, z_tracers, z_w, proxy=proxy, weights=weights, power=power)
    else:  # the two given biases of a cross curve
        bias_info = None
    counts = pair_counts if tc.separation_weighting == "pair_counts" else None
    kw = {"wiggles": tc.wiggles, "power": power, "growth": tc.growth_rate}

    def average(kind):
        return bin_averaged_velocity(edges, z_nodes, z_w, bias, cosmo=cosmo, pair_counts=counts,
                                     sigma_z0=tc.photoz_sigma, photoz_model=tc.photoz_model,
                                     velocity=velocity_model(kind, v12_table), **kw)

    v12 = average(tc.velocity_model)
    z_mean = float(np.sum(z_nodes * z_w))
    info = {
        "kind": f"{VELOCITY_MODEL_NAMES[tc.velocity_model]} mean pairwise velocity",
        "velocity_model": tc.velocity_model,
        "power_spectrum": ("Eisenstein & Hu 1998 " + ("with" if tc.wiggles else "without") + " baryon wiggles"
                           if power is None else f"table {power.source} (sha256 {power.sha256}) at z = {power.z:g}"
                           + (", renormalised to sigma_8" if power.renormalise else ", own amplitude")),
        "growth_rate": "exact flat LCDM" if tc.growth_rate == "exact" else "Omega_m(z)^0.55 (Linder 2005)",
        "redshift_weighting": tc.redshift_weighting,
        "z_nodes": z_nodes.tolist(), "z_weights": z_w.tolist(), "z_mean_model": z_mean,
        "separation_weighting": "measured pair counts" if counts is not None else "volume (r^2)",
        "photoz_sigma_z0": tc.photoz_sigma,
        "photoz_model": tc.photoz_model if tc.photoz_sigma > 0 else None,
    }
    if v12_table is not None:
        info["v12_table"] = {"path": v12_table.source, "sha256": v12_table.sha256}
    if bias_info is not None:
        info["bias_from_proxy"] = bias_info
    if tc.velocity_model != "linear" or tc.fit_template_tolerance is not None:
        info["compared"] = _compare_models(average, v12, edges, tc, v12_table)
    if tc.photoz_sigma > 0:
        info["photoz_los_error_mpc_at_z_mean"] = float(np.sqrt(2.0) * los_error_mpc(z_mean, tc.photoz_sigma,
                                                                                      cosmo=cosmo))
    if z_eff_bins is not None:
        zb = np.asarray(z_eff_bins, dtype=float)
        info["z_eff_bins_measured_minus_model_max"] = float(np.nanmax(np.abs(zb - z_mean))) if zb.size else None
    # f sigma_8 at the mean pair redshift: the velocity scale the template assumes (for the 2-parameter fit)
    info["f_sigma8_template"] = _f_sigma8(z_mean, tc, cosmo, power)
    info["f_sigma8_at_z_eff"] = _f_sigma8(z_eff, tc, cosmo, power)
    return v12, info


def _run_bias(tc, cosmo: Cosmology, z_tracers, z_w, *, proxy, weights, power):
    """theory.bias, or the pair-weighted Tinker et al. 2010 bias per redshift node (or one b_eff for the
    effective-redshift weighting) with a dict describing it; see :mod:`pairvel.model.halobias`."""
    if tc.bias_from_proxy is None:
        return tc.bias, None
    from .halobias import masses_from_proxy, pair_weighted_bias, tracer_bias

    if proxy is None:
        raise TheoryError("theory.bias_from_proxy needs the tracers' proxy column (catalogue.proxy_column)")
    mass = masses_from_proxy(proxy, kind=tc.bias_from_proxy, log10=tc.proxy_is_log10, pivot=tc.luminosity_pivot,
                             mass_at_pivot=tc.mass_at_luminosity_pivot_msun, slope=tc.mass_luminosity_slope)
    z = np.asarray(z_tracers, dtype=float)
    b_i = tracer_bias(mass, z, delta=tc.halo_overdensity, cosmo=cosmo, wiggles=tc.wiggles, power=power)
    b_shell = pair_weighted_bias(b_i, z, weights=weights)  # the shells of pair_redshift_distribution
    by_shell = tc.redshift_weighting == "pair_distribution"
    share = z_w if by_shell else pair_redshift_distribution(z, cosmo=cosmo, weights=weights)[1]
    b_eff = float(np.sum(share * b_shell))
    bias = b_shell if by_shell else b_eff
    info = {"b_eff": b_eff, "b_per_redshift_node": np.atleast_1d(bias).tolist(),
            "tracer_bias_min_median_max": [float(np.min(b_i)), float(np.median(b_i)), float(np.max(b_i))],
            "mass_msun_min_median_max": [float(np.min(mass)), float(np.median(mass)), float(np.max(mass))],
            "bias_function": "Tinker et al. 2010 (ApJ 724, 878), nu = 1.686 / sigma(M, z) from the run's linear P(k)",
            "mass_definition": f"M{tc.halo_overdensity:g}m in Msun (mass within {tc.halo_overdensity:g} x the mean "
                               f"matter density)",
            "proxy": (("log10 " if tc.proxy_is_log10 else "") + tc.bias_from_proxy
                      + ("" if tc.bias_from_proxy == "mass" else
                         f"; M = {tc.mass_at_luminosity_pivot_msun:g} Msun (L / {tc.luminosity_pivot:g})^"
                         f"{tc.mass_luminosity_slope:g}")),
            "weighting": "per redshift shell, the pair-weighted (w_i w_j) mean of b_i: (b_i + b_j)/2 in the "
                         "numerator and b_i b_j in the denominator of v12 both give it; b_eff = shells weighted "
                         "by their share of pairs"}
    return bias, info


def _compare_models(average, v12, edges, tc, v12_table) -> dict:
    """The binned templates side by side (before any trend-loss factor), their largest relative
    spread per bin, (max - min) / |linear|, and the bins within theory.fit_template_tolerance."""
    curves = {"linear": average("linear") if tc.velocity_model != "linear" else v12}
    for kind in ("jsd99", "table"):
        if kind == tc.velocity_model:
            curves[kind] = v12
        elif kind == "jsd99" or v12_table is not None:
            curves[kind] = average(kind)
    stack = np.array(list(curves.values()))
    with np.errstate(divide="ignore", invalid="ignore"):
        spread = (stack.max(axis=0) - stack.min(axis=0)) / np.abs(curves["linear"])
    out = {"r_mid": (0.5 * (edges[1:] + edges[:-1])).tolist(),
           "v12_km_s": {k: np.asarray(v).tolist() for k, v in curves.items()},
           "relative_spread": [float(x) if np.isfinite(x) else None for x in spread],
           "tolerance": tc.fit_template_tolerance}
    if tc.fit_template_tolerance is not None:
        out["within_tolerance"] = [bool(x <= tc.fit_template_tolerance) for x in spread]
    return out


def _f_sigma8(z: float, theory_cfg, cosmo: Cosmology, power) -> float:
    """f(z) sigma_8(z) of the run's linear power spectrum and growth-rate setting."""
    sigma8_z = sigma_radius(8.0 / cosmo.h, z, cosmo=cosmo, wiggles=theory_cfg.wiggles, power=power)
    return float(growth_rate(z, cosmo=cosmo, method=theory_cfg.growth_rate) * sigma8_z)
