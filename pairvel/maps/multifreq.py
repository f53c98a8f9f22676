"""Several frequency maps: the thermal-SZ-free (or minimum-variance) linear combination.

Each map i, in thermodynamic uK_CMB, holds the same CMB and kSZ (both follow the blackbody), a
thermal SZ signal f(nu_i) y T_CMB and its own noise n_i.  A combination sum_i w_i m_i keeps the CMB
and kSZ unchanged when sum_i w_i = 1 and removes the tSZ when sum_i w_i f_i = 0.  Among such weights
the one of least noise variance w^T N w is the closed form below (a constrained least-variance
combination, solved with Lagrange multipliers).

The maps are combined pixel by pixel after each is read with :func:`pairvel.maps.skymap.read_map`; they
must share one pixel grid and frame.  The result is one :class:`~pairvel.maps.skymap.SkyMap` that every
later stage uses as it would a single map.
"""

from __future__ import annotations

__all__ = ["combination_weights", "noise_cost", "combine_maps", "pixel_difference_covariance",
           "read_input_map", "read_channel_maps", "map_provenance", "combination_markdown"]

import math
import warnings

import numpy as np

from ..core.errors import ConfigError, MapError, PairvelWarning
from ..model.sz import tsz_spectrum
from .skymap import SkyMap, read_map

COMBINATIONS = ("tsz_free", "minimum_variance", "weights")
_SUM_TOLERANCE = 1e-6          # user weights must sum to 1 this closely
_MAX_NOISE_PIXELS = 500_000  # pixels sampled by the pixel-difference noise estimate (variance to ~0.2%)


def combination_weights(f_tsz, noise_cov, *, combination: str = "tsz_free", weights=None) -> np.ndarray:
    """Weights w of the maps in sum_i w_i m_i.

    Parameters
    ----------
    f_tsz : array_like of shape (k,)
        tSZ factor of each map (:func:`tsz_spectrum`).
    noise_cov : array_like of shape (k, k), uK^2 (any common scale)
        Noise covariance of the maps; only ratios matter.
    combination : {"tsz_free", "minimum_variance", "weights"}
        tsz_free: least noise with sum w = 1 and sum w f = 0; minimum_variance: least noise with
        sum w = 1 only; weights: the given ``weights`` (must sum to 1).
    weights : array_like of shape (k,), optional
        Used by ``combination="weights"``.

    Returns
    -------
    ndarray of shape (k,)

    Notes
    -----
    With constraint matrix A = [1, f] (k x m) and targets b = (1, 0) (or A = 1, b = 1), the
    minimum of w^T N w subject to A^T w = b is w = N^-1 A (A^T N^-1 A)^-1 b.
    """
    f = np.asarray(f_tsz, dtype=float)
    k = f.size
    cov = np.asarray(noise_cov, dtype=float)
    if cov.shape != (k, k):
        raise ValueError(f"noise_cov must be ({k}, {k}); got shape {cov.shape}")
    if combination == "weights":
        w = np.asarray(weights, dtype=float)
        if w.shape != (k,) or not np.all(np.isfinite(w)):
            raise ConfigError(f"multifrequency.weights must be {k} finite numbers, one per map; got {weights!r}",
                              key="multifrequency.weights")
        if abs(w.sum() - 1.0) > _SUM_TOLERANCE:
            raise ConfigError(f"multifrequency.weights must sum to 1 (to keep the CMB and kSZ amplitude); got sum "
                              f"{w.sum():.6g}", key="multifrequency.weights")
        return w
    if combination == "tsz_free":
        if k < 2:
            raise ConfigError(f"multifrequency.combination = 'tsz_free' needs at least 2 maps; got {k}",
                              key="multifrequency.map_paths")
        if np.ptp(f) <= 1e-9 * max(1.0, float(np.abs(f).max())):
            raise ConfigError(f"multifrequency.frequencies_ghz: tsz_free needs maps with different tSZ factors f; "
                              f"all have f = {f[0]:.6g} (the constraints sum w = 1 and sum w f = 0 are singular)",
                              key="multifrequency.frequencies_ghz")
        a = np.column_stack([np.ones(k), f])
        b = np.array([1.0, 0.0])
    elif combination == "minimum_variance":
        a = np.ones((k, 1))
        b = np.array([1.0])
    else:
        raise ValueError(f"combination must be one of {COMBINATIONS}; got {combination!r}")
    try:
        ninv_a = np.linalg.solve(cov, a)
        lam = np.linalg.solve(a.T @ ninv_a, b)
    except np.linalg.LinAlgError:
        raise ConfigError("multifrequency: the noise covariance of the maps is singular; the combination has no "
                          "unique solution (are two maps identical or noiseless?)",
                          key="multifrequency.noise_uk_arcmin") from None
    return ninv_a @ lam


def noise_cost(weights, noise_cov) -> float:
    """Noise rms of the combination over that of the least noisy single map,
    sqrt(w^T N w) / min_i sqrt(N_ii)."""
    w = np.asarray(weights, dtype=float)
    cov = np.asarray(noise_cov, dtype=float)
    return float(math.sqrt(w @ cov @ w) / math.sqrt(np.diag(cov).min()))


def _common_support(maps):
    """Every map's values on the first map's held pixels, and the least of their weights there."""
    first = maps[0]
    vals, wts = [], []
    for m in maps:
        v, w = m.values_on(first)
        vals.append(v)
        wts.append(w)
    return vals, np.minimum.reduce(wts)


def combine_maps(maps, weights, *, path=None) -> SkyMap:
    """Pixel-wise sum_i w_i m_i of maps of one pixel grid and frame.

    Parameters
    ----------
    maps : sequence of SkyMap
        Same grid (for HEALPix, the same nside, in any ordering) and coordsys.
    weights : array_like of shape (len(maps),)
    path : str, optional
        Label of the result for messages and provenance; default "combination of k maps".

    Returns
    -------
    SkyMap
        On the pixels the first map holds; a pixel masked, bad or missing in any map is masked in
        the result (union of the masks), with a weight equal to the least of the maps' weights.
    """
    _check_compatible(maps)
    w = np.asarray(weights, dtype=float)
    vals, weight = _common_support(maps)
    total = np.zeros(weight.size)
    for wi, v in zip(w, vals):
        total += wi * np.where(weight > 0, v, 0.0)
    total[weight == 0] = np.nan
    dtype = np.result_type(*[m.values.dtype for m in maps])
    label = path if path is not None else f"combination of {len(maps)} maps"
    return maps[0].with_values(total.astype(dtype), weight=weight, path=label)


def _check_compatible(maps):
    first = maps[0]
    for m in maps[1:]:
        if not first.same_grid(m):
            raise MapError(f"map {m.path} has {m.grid_label} but map {first.path} has {first.grid_label}; the "
                           f"frequency maps must share one pixel grid", path=m.path)
        if m.coordsys != first.coordsys:
            raise MapError(f"map {m.path} is in frame {m.coordsys} but map {first.path} is in frame "
                           f"{first.coordsys}; the frequency maps must share one frame", path=m.path, key="COORDSYS")


def pixel_difference_covariance(maps, f_tsz=None) -> tuple[np.ndarray, int]:
    """Diagonal white-noise covariance of the maps from pixel-minus-neighbour-mean differences.

    Each usable pixel p with all 8 neighbours usable in every map gives d_i(p) = m_i(p) - mean of
    m_i over the neighbours.  For white noise var(d) = (1 + 1/8) sigma_pix^2, so the covariance D
    of d divided by 9/8 and times the pixel area is in (uK arcmin)^2.  Signal is not fully smooth on
    the pixel scale, and what is left of it in d is the CMB and kSZ, the same in every map (c 1 1^T),
    and the tSZ, proportional to f (b f f^T).  Taking the noise of different maps as independent,
    the off-diagonal elements D_ij = c + b f_i f_j are fitted by least squares (c alone for two
    maps or without ``f_tsz``) and the noise variance of map i is D_ii - c - b f_i^2.  At most
    10^6 pixels (every k-th usable pixel) are used.

    Parameters
    ----------
    maps : sequence of SkyMap
    f_tsz : array_like of shape (len(maps),), optional
        tSZ factor of each map.

    Returns
    -------
    cov : ndarray of shape (k, k), diagonal, (uK arcmin)^2
    n_pixels : int
        Pixels that entered the estimate.

    Raises
    ------
    MapError
        Fewer than 100 usable pixels with usable neighbours, or a noise variance left <= 0.
    """
    _check_compatible(maps)
    vals, weight = _common_support(maps)
    first = maps[0]
    sel = np.flatnonzero(weight > 0)
    sel = sel[:: max(1, sel.size // _MAX_NOISE_PIXELS)]
    diffs = []
    nb_weight = np.ones((8, sel.size), dtype=np.float32)
    nb_vals = []
    for m in maps:
        v, w = m.neighbour_values_on(first, sel)  # weight 0 where a neighbour is missing
        nb_vals.append(v)
        nb_weight = np.minimum(nb_weight, w)
    ok = np.all(nb_weight > 0, axis=0)
    if ok.sum() < 100:
        raise MapError(f"map {first.path}: only {int(ok.sum())} usable pixels with 8 usable neighbours in every "
                       f"map; too few to measure the noise (set multifrequency.noise_uk_arcmin)", path=first.path)
    for v, nv in zip(vals, nb_vals):
        diffs.append(v[sel][ok].astype(np.float64) - nv[:, ok].astype(np.float64).mean(axis=0))
    d = np.array(diffs)
    cov = (d @ d.T / d.shape[1] - np.outer(d.mean(axis=1), d.mean(axis=1))) / (9.0 / 8.0) * first.pixel_area_arcmin2
    k = cov.shape[0]
    i, j = np.triu_indices(k, 1)
    design = np.ones((i.size, 1))
    f = None if f_tsz is None else np.asarray(f_tsz, dtype=float)
    if f is not None and i.size >= 2 and np.linalg.matrix_rank(np.column_stack([design, f[i] * f[j]])) == 2:
        design = np.column_stack([design, f[i] * f[j]])
    coef = np.linalg.lstsq(design, cov[i, j], rcond=None)[0]
    signal = coef[0] + (coef[1] * f**2 if design.shape[1] == 2 else 0.0)
    noise_var = np.diag(cov) - signal
    if np.any(noise_var <= 0):
        raise MapError(f"map {first.path}: the noise of the maps cannot be measured from pixel differences (a "
                       f"variance left <= 0 after removing the signal common to the maps); set "
                       f"multifrequency.noise_uk_arcmin", path=first.path)
    return np.diag(noise_var), int(ok.sum())


def _read_each(cfg):
    return [_read_one(p, cfg.map, frequency_ghz=nu, bandpass_path=band) for p, nu, band in _each_map(cfg.multifrequency)]


def read_channel_maps(cfg) -> list:
    """Each map of ``multifrequency.map_paths`` alone, read as for the combination (uK_CMB)."""
    return _read_each(cfg)


def _each_map(mf):
    """(path, frequency in GHz, bandpass table or None) of each map of ``[multifrequency]``."""
    return zip(mf.map_paths, mf.frequencies_ghz, mf.bandpass_paths or [None] * len(mf.map_paths))


def _read_one(path, mc, *, frequency_ghz=None, bandpass_path=None):
    """One temperature map with the options of ``[map]`` (``mc``), its unit checked on its pixel rms.

    ``frequency_ghz`` and ``bandpass_path`` are the map's in ``[multifrequency]`` (default
    ``map.frequency_ghz`` and ``map.bandpass_path``), for units other than CMB temperatures; they reach
    the reader only when set.
    """
    options = {"frequency_ghz": mc.frequency_ghz if frequency_ghz is None else frequency_ghz,
               "bandpass_path": mc.bandpass_path if bandpass_path is None else bandpass_path}
    return read_map(path, field=mc.field, unit=mc.unit, ordering=mc.ordering, coordsys=mc.coordsys,
                    rms_check=mc.rms_unit_check, **{k: v for k, v in options.items() if v is not None})


def read_input_map(cfg) -> tuple[SkyMap, dict | None]:
    """The temperature map of a run: ``map.path`` read as is, or the combination of the maps of
    ``[multifrequency]`` when ``multifrequency.map_paths`` is set.

    Parameters
    ----------
    cfg : Config
        Validated config.  ``map.field``, ``map.unit``, ``map.ordering`` and ``map.coordsys`` apply
        to every frequency map; ``map.mask_path`` is applied by the caller to the result.

    Returns
    -------
    skymap : SkyMap
        In uK_CMB.
    info : dict or None
        None for one map; otherwise the combination (weights, f_tSZ, noise cost, files; JSON-ready).
    """
    mc, mf = cfg.map, cfg.multifrequency
    if not mf.map_paths:
        return _read_one(mc.path, mc), None
    maps = _read_each(cfg)
    _check_compatible(maps)
    freqs = np.asarray(mf.frequencies_ghz, dtype=float)
    f = tsz_spectrum(freqs, t_cmb_k=cfg.cosmology.t_cmb_k)
    if mf.beam_fwhm_arcmin is not None and np.ptp(mf.beam_fwhm_arcmin) > 1e-6:
        warnings.warn(f"multifrequency.beam_fwhm_arcmin differ ({list(mf.beam_fwhm_arcmin)}); the maps are combined "
                      f"without reconvolution, so the CMB and kSZ are not kept exactly (nor the tSZ removed exactly) "
                      f"on scales near the beams", PairvelWarning, stacklevel=2)
    model = mf.noise_model
    if model == "auto":
        model = "levels" if mf.noise_uk_arcmin is not None else "pixel_differences"
    n_pix = None
    if model == "levels":
        cov = np.diag(np.square(np.asarray(mf.noise_uk_arcmin, dtype=float)))
    else:
        cov, n_pix = pixel_difference_covariance(maps, f)
    w = combination_weights(f, cov, combination=mf.combination, weights=mf.weights)
    label = f"{mf.combination} combination of " + ", ".join(str(p) for p in mf.map_paths)
    combined = combine_maps(maps, w, path=label)
    noise_each = np.sqrt(np.diag(cov))
    info = {
        "combination": mf.combination,
        "noise_model": model,
        "noise_pixels_used": n_pix,
        "t_cmb_k": cfg.cosmology.t_cmb_k,
        "maps": [{"path": str(p), "frequency_ghz": float(nu), "f_tsz": float(fi), "weight": float(wi),
                  "noise_uk_arcmin": float(s)} for p, nu, fi, wi, s in zip(mf.map_paths, freqs, f, w, noise_each)],
        "sum_weights": float(w.sum()),
        "tsz_response": float(w @ f),
        "noise_uk_arcmin": float(math.sqrt(w @ cov @ w)),
        "noise_cost": noise_cost(w, cov),
        "best_single_map": str(mf.map_paths[int(np.argmin(noise_each))]),
        "usable_pixels": int(np.count_nonzero(combined.weight > 0)),
    }
    return combined, info


def map_provenance(cfg) -> dict:
    """{"path", "sha256"} of the temperature input; for several maps both are '; '-joined lists."""
    from ..core.provenance import file_sha256

    paths = list(cfg.multifrequency.map_paths or ()) or [cfg.map.path]
    return {"path": "; ".join(str(p) for p in paths), "sha256": "; ".join(file_sha256(p) for p in paths)}


def combination_markdown(info: dict) -> str:
    """The report's table of the combination."""
    lines = [f"Combination `{info['combination']}` of {len(info['maps'])} maps (noise model "
             f"`{info['noise_model']}`): sum w = {info['sum_weights']:.6f} (CMB and kSZ kept), "
             f"sum w f_tSZ = {info['tsz_response']:+.2e} (tSZ left, relative to a unit-y cluster in T_CMB).", "",
             "| map | nu [GHz] | f_tSZ | weight | noise [uK arcmin] |", "|---|---:|---:|---:|---:|"]
    for m in info["maps"]:
        lines.append(f"| {m['path']} | {m['frequency_ghz']:g} | {m['f_tsz']:+.5f} | {m['weight']:+.4f} | "
                     f"{m['noise_uk_arcmin']:.3g} |")
    lines += ["", f"Noise of the combination: {info['noise_uk_arcmin']:.3g} uK arcmin, {info['noise_cost']:.3f} times "
                  f"that of the least noisy single map ({info['best_single_map']}); with "
                  f"covariance.estimator = simulations, set covariance.sim_white_noise_uk_arcmin to it."]
    return "\n".join(lines)


