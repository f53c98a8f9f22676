"""Blinding: hide the amplitude of the measured curve behind a random factor kept in a key file.

A blinded run multiplies everything that carries the signal's scale - the measured curve, its
jackknife or bootstrap samples, the null-test curves, the errors (covariance by the factor squared),
the fitted amplitude and its interval, the fit and curve of every aperture radius, the fit of every
proxy bin - by one hidden factor f drawn from fresh operating-system entropy, never from the run
seed, and makes the joint tau_mean x f sigma_8 fit again from the blinded amplitude.  Every
chi-square, PTE and signal-to-noise is unchanged, so the null tests can be judged blind; only the
scale is hidden.  How each quantity of a result scales is declared once (:data:`RESULT_RULES`,
:data:`EXTRA_RULES`); report sections and figures are made from the blinded data when the outputs
are written.  The factor lives in a JSON key file outside the output folder; ``pairvel unblind``
reads a blinded folder and the key and writes a new, unblinded folder.
"""

from __future__ import annotations

__all__ = ["BLIND_RANGE", "EXTRA_RULES", "RESULT_RULES", "UndeclaredQuantityError", "apply_factor", "blind_result",
           "check_declared", "check_key_path", "default_key_path", "load_result", "read_key", "unblind_folder",
           "write_key"]

import dataclasses
import datetime as _dt
import json
import os
import secrets
import types
import warnings
from pathlib import Path

import numpy as np

from ..core.errors import InputError, OutputError

#: The hidden factor is uniform in this range (common practice: wide enough that the blinded
#: amplitude says nothing useful, narrow enough that the errors stay plausible).
BLIND_RANGE = (0.6, 1.6)

_KEY_KIND = "pairvel blinding key"


def default_key_path(out_dir) -> Path:
    """``<out_dir>.blinding-key.json`` beside (not inside) the output folder."""
    out = Path(out_dir).expanduser().resolve()
    return out.parent / f"{out.name}.blinding-key.json"


def check_key_path(path, *, out_dir) -> Path:
    """Check before a blinded run that its key file can be used; return it as an absolute Path.

    The key must lie outside the output folder ``out_dir``; an existing key must be a valid one
    (:func:`read_key`), and for a new key the folder that will hold it must exist and be writable.
    """
    path = Path(path).expanduser().resolve()
    out = Path(out_dir).expanduser().resolve()
    if path == out or out in path.parents:
        raise OutputError(f"blinding key {path}: must lie outside the output folder {out}", path=path,
                          key="blinding.key_path")
    if path.exists():
        read_key(path)
    elif not path.parent.is_dir():
        what = "is not a folder" if path.parent.exists() else "does not exist"
        raise OutputError(f"blinding key {path}: folder {path.parent} {what}", path=path, key="blinding.key_path")
    elif not os.access(path.parent, os.W_OK | os.X_OK):
        raise OutputError(f"blinding key {path}: folder {path.parent} is not writable", path=path,
                          key="blinding.key_path")
    return path


def write_key(path, *, run_name: str) -> dict:
    """Draw a new factor from OS entropy and write the key file, readable by its owner alone (0600;
    refuses to overwrite one)."""
    path = Path(path)
    if path.exists():
        raise OutputError(f"blinding key {path}: already exists; reuse it with blinding.key_path or move it away",
                          path=path)
    lo, hi = BLIND_RANGE
    factor = lo + (hi - lo) * (secrets.randbits(52) / 2.0**52)
    key = {"kind": _KEY_KIND, "key_id": secrets.token_hex(8), "factor": factor, "run_name": run_name,
           "created_utc": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds")}
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with os.fdopen(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600), "w") as fh:
            fh.write(json.dumps(key, indent=2) + "\n")
    except OSError as err:
        raise OutputError(f"blinding key {path}: cannot be written ({err.strerror or err})", path=path) from None
    return key


def read_key(path) -> dict:
    """Read and check a key file written by :func:`write_key`."""
    path = Path(path)
    try:
        key = json.loads(path.read_text())
    except (OSError, ValueError) as err:
        raise InputError(f"blinding key {path}: cannot be read as JSON ({err})", path=path) from None
    if not isinstance(key, dict) or key.get("kind") != _KEY_KIND or not isinstance(key.get("factor"), float) \
            or not np.isfinite(key["factor"]) or key["factor"] <= 0 or not isinstance(key.get("key_id"), str):
        raise InputError(f"blinding key {path}: not a pairvel blinding key (needs kind, key_id and a positive factor)",
                         path=path)
    return key


# ------------------------------------------------------------- what scales with the factor
# Every quantity a RunResult holds is declared here once, with the power of the factor f it is
# multiplied by: 1 for an amplitude, a curve or an error, 2 for a covariance, 0 for what does not
# carry the signal's scale (chi2, PTE, S/N, counts, shapes, provenance).  A dict declares the fields
# of a dataclass (or the keys of a plain dict); a callable re-derives a quantity from the scaled
# main fit.  A field or an ``extra`` key that is not declared stops blinding and the output writer
# (UndeclaredQuantityError), so a new option cannot leak its true amplitude by being forgotten.

class UndeclaredQuantityError(RuntimeError):
    """A result holds a quantity whose scaling under blinding is not declared (a programming error)."""


class _Each:
    """Rule for a dict with free keys (e.g. one entry per covariance estimator): each value by ``rule``."""

    def __init__(self, rule):
        self.rule = rule


class _Present:
    """Rule for a dict whose keys are a subset of ``rules`` (a fit that may hold only ``problem``)."""

    def __init__(self, rules: dict):
        self.rules = rules

    def __call__(self, value, scale, fit):
        unknown = sorted(set(value) - self.rules.keys())
        if unknown:
            raise UndeclaredQuantityError(f"keys {unknown} have no blinding rule; declare them in pairvel.report.blinding")
        return scale(value, {k: self.rules[k] for k in value}, fit)


def _refuse(name: str):
    def rule(value, scale, fit):
        raise UndeclaredQuantityError(f"result.extra[{name!r}] is made from the true amplitude and cannot be "
                                      f"blinded; keep data in extra and build text or comparisons at write time")
    return rule


def _velocity_scale_again(vfit, scale, fit):
    """The joint fit made again from the scaled main fit, with the configured prior on tau_mean.

    Without a prior this is the true posterior with its tau_mean axis scaled and its f sigma_8 axis
    unchanged; with a prior (stated in true units in the config) the f sigma_8 constraint it gives
    is scaled too, so neither the prior nor f sigma_8 reveals the factor.
    """
    return _joint_fit(fit, vfit.s_fid, vfit.n_samples, vfit.prior, (vfit.tau_grid.size, vfit.s_grid.size))


def _joint_fit(fit, s_fid, n_samples, prior, grid_size):
    from ..stats.joint import fit_velocity_scale

    with warnings.catch_warnings():  # the run gave the edge warning (or not) already
        warnings.simplefilter("ignore")
        return fit_velocity_scale(fit, s_fid, n_samples=n_samples, tau_prior=prior, n_tau=grid_size[0],
                                  n_s=grid_size[1])


def _tracer_temperatures(table, scale, fit):
    """Per-tracer aperture temperatures carry the signal: every temperature column (``t_*uK*``,
    ``noise_uK``) by the factor, positions, redshifts, regions and flags unchanged."""
    from .tracers import scale_temperatures

    return scale_temperatures(table, lambda values: scale.number(values, 1))


#: AmplitudeFit: the amplitude, its error and interval scale; goodness of fit does not.
FIT_RULES = {"amplitude": 1, "error": 1, "lower_68": 1, "upper_68": 1, "snr": 0, "snr_delta_chi2": 0,
             "chi2_min": 0, "chi2_null": 0, "dof": 0, "pte_min": 0, "pte_null": 0, "n_bins": 0,
             "precision_factor": 0, "likelihood": 0}

#: RunResult (``extra`` by :data:`EXTRA_RULES`).
RESULT_RULES = {
    "config": 0, "edges": 0, "p": 1, "covariance": 2, "p_jk": 1, "pair_counts": 0, "z_eff_bins": 0, "z_eff": 0,
    "v12_template": 0, "in_fit": 0, "fit": FIT_RULES, "n_tracers": 0, "selection": 0, "provenance": 0,
    "nulls": {"kind": 0, "p": 1, "chi2": 0, "pte": 0, "chi2_mean": 0, "pte_mean": 0, "dof": 0, "threshold": 0,
              "mean_error": 1, "covariance_from": 0},
    "extra": None,
    "warnings": 0,  # texts about the inputs and the method; none quotes an amplitude (test_blinding_holds reads them)
    "tracers": _tracer_temperatures,
}

#: Every key the pipeline (or the output reader) may put into ``RunResult.extra``.
EXTRA_RULES = {
    "blinding": 0,                     # replaced by the caller
    "template": 0,                     # the model's shape and how it was made
    "rotations_used": 0, "prefilter": 0, "prefilter_transfer": 0, "multifrequency": 0,
    "covariance_diagnostics": {"used": 0, "condition_number": 0, "errors": _Each(1), "n_samples": 0,
                               "hartlap_factor": 0, "n_fit_bins": 0, "too_few_samples": 0},
    "radius_fits": {"radius_arcmin": 0, "primary": 0, "fit": FIT_RULES, "p": 1, "p_err": 1, "problem": 0},
    "proxy_bins": {"proxy_min": 0, "proxy_max": 0, "proxy_median": 0, "n_tracers": 0, "n_pairs": 0,
                   "n_regions": 0, "z_mean": 0, "fit": FIT_RULES, "problem": 0},
    "radius_joint": {"radius_arcmin": 0, "tau": 1, "tau_covariance": 2, "tau_correlation": 0, "n_samples": 0,
                     "covariance": 2},
    "proxy_joint": {"bins": 0, "n_samples": 0, "tau": 1, "tau_covariance": 2, "tau_correlation": 0, "covariance": 2},
    # tau(M) = tau_0 (M/M_0)^alpha: tau_0 and the taus scale, the slope, pivot and chi2 values do not
    "mass_trend": _Present({"proxy_scale": 0, "bins": 0, "mass_geometric_mean": 0, "tau": 1, "tau_error": 1,
                            "model_tau": 1, "pivot_mass": 0, "tau_0": 1, "tau_0_error": 1, "alpha": 0,
                            "alpha_error": 0, "correlation": 0, "chi2_min": 0, "dof": 0, "pte": 0,
                            "delta_chi2_alpha0": 0, "pte_alpha0": 0, "alpha_significance": 0, "n_samples": 0,
                            "hartlap_factor": 0, "n_bins_fitted": 0, "problem": 0}),
    "velocity_scale_fit": _velocity_scale_again,
    "region_seed_spread": {"tau_mean": 1, "tau_error": 1, "tau_mean_std": 1, "quoted_error": 1,
                           "std_over_error": 0, "error_std_over_error": 0, "n_regions": 0, "n_seeds": 0,
                           "skipped": 0},
    # amplitudes fitted to null realisations and simulated skies scale like the curves they come from;
    # the counts, p-values and S/N compare them with tau_mean, which scales alike
    "empirical_significance": {"source": 0, "n": 0, "exceeded_by": 0, "p_value": 0, "p_is_bound": 0,
                               "amplitude_mean": 1, "amplitude_std": 1, "snr": 0, "amplitudes": 1},
    # cross pairs with a second catalogue ([partner]): same map, so the same factor
    "cross": {"partner": 0, "bias_1": 0, "bias_2": 0, "amplitude_meaning": 0, "edges_mpc": 0, "p": 1, "p_err": 1,
              "covariance": 2, "pair_counts": 0, "z_eff_bins": 0, "z_eff": 0, "v12_template": 0, "in_fit": 0,
              "n_jk": 0, "covariance_kind": 0, "template_z_mean": 0, "fit": FIT_RULES,
              "nulls": {"kind": 0, "description": 0, "n_realisations": 0, "dof": 0, "chi2_mean_curve": 0,
                        "pte_mean_curve": 0, "pte_threshold": 0, "passed": 0, "mean_p": 1, "mean_error": 1}},
    # the comparison with a synthetic survey's injected truth (run.truth_path, refused with blinding
    # when the config is read), and free report text: true by construction
    # [noise]: aperture noise and sky variances come from the (blinded) temperatures' scale, the weights do not
    "noise_weighting": {"path": 0, "kind": 0, "weighting": 0, "sky_variance_uk2": 2, "sky_variance_estimated": 0,
                        "mean_noise_variance_uk2": 2, "median_noise_uk": 1, "n_without_noise": 0,
                        "weight_max_over_min": 0, "effective_fraction": 0},
    # [multifrequency] per_channel: each map's curve and fit scale like the main ones, the nulls' chi2 and PTE do not
    "channels": {"maps": {"path": 0, "frequency_ghz": 0, "p": 1, "p_err": 1, "fit": FIT_RULES, "problem": 0},
                 "differences": {"maps": 0, "p": 1, "p_err": 1, "chi2": 0, "dof": 0, "pte": 0, "passed": 0,
                                 "threshold": 0, "fit": FIT_RULES, "problem": 0},
                 "n_jk": 0, "covariance": 0},
    "mock_calibration": 0,             # error / scatter of mocks (covariance.calibration_dir), no data in it
    "truth_check": _refuse("truth_check"), "plot_curves": _refuse("plot_curves"),
    "report_sections": _refuse("report_sections"),
}


def check_declared(result) -> None:
    """Raise UndeclaredQuantityError when ``result`` holds a field or extra key not declared above."""
    fields = {f.name for f in dataclasses.fields(result)}
    if fields != RESULT_RULES.keys():
        raise UndeclaredQuantityError(f"RunResult fields {sorted(fields ^ RESULT_RULES.keys())} have no blinding "
                                      f"rule; declare them in pairvel.report.blinding.RESULT_RULES")
    unknown = sorted(set(result.extra) - EXTRA_RULES.keys())
    if unknown:
        raise UndeclaredQuantityError(f"result.extra keys {unknown} have no blinding rule; declare how they scale "
                                      f"in pairvel.report.blinding.EXTRA_RULES")


class _Scale:
    """Multiply (or divide) by the factor, following a rule of the tables above."""

    def __init__(self, factor: float, divide: bool):
        self.factor, self.divide = float(factor), divide

    def number(self, x, power: int):
        if isinstance(x, list):
            return [self.number(v, power) for v in x]
        for _ in range(power):  # dividing rather than multiplying by 1/f: back to within one rounding
            x = x / self.factor if self.divide else x * self.factor
        return x

    def __call__(self, value, rule, fit=None):
        if value is None or rule == 0:
            return value
        if isinstance(value, (tuple, list)) and not isinstance(rule, int):
            return type(value)(self(v, rule, fit) for v in value)
        if isinstance(rule, int):
            return self.number(value, rule)
        if isinstance(rule, _Each):
            return {k: self(v, rule.rule, fit) for k, v in value.items()}
        if callable(rule):
            return rule(value, self, fit)
        names = [f.name for f in dataclasses.fields(value)] if dataclasses.is_dataclass(value) else list(value)
        if set(names) != rule.keys():
            raise UndeclaredQuantityError(f"{type(value).__name__} fields {sorted(set(names) ^ rule.keys())} have no "
                                          f"blinding rule; declare them in pairvel.report.blinding")
        changed = {k: self(_get(value, k), rule[k], fit) for k in names if rule[k] != 0}
        return dataclasses.replace(value, **changed) if dataclasses.is_dataclass(value) else {**value, **changed}


def _get(value, name):
    return getattr(value, name) if dataclasses.is_dataclass(value) else value[name]


def apply_factor(result, factor: float, *, blinding: dict, divide: bool = False):
    """A copy of a RunResult with every signal-scale number multiplied (or divided) by ``factor``.

    What scales, and how, is declared in :data:`RESULT_RULES` and :data:`EXTRA_RULES`; a quantity
    declared nowhere raises :class:`UndeclaredQuantityError`.  ``blinding`` (stored as
    ``extra["blinding"]``) says whether the copy is blinded.  Unblinding divides by the same factor
    rather than multiplying by its reciprocal, so each number comes back to within one rounding of
    the unblinded value; re-derived quantities (the joint fit) are made again from the restored fit.
    """
    check_declared(result)
    scale = _Scale(factor, divide)
    changed = {name: scale(getattr(result, name), rule) for name, rule in RESULT_RULES.items()
               if rule is not None and rule != 0}
    extra = {key: scale(value, EXTRA_RULES[key], changed["fit"]) for key, value in result.extra.items()
             if key != "blinding"}
    extra["blinding"] = blinding
    return dataclasses.replace(result, **changed, extra=extra)


def blind_result(result, key_path) -> tuple:
    """Blind ``result`` with the key at ``key_path`` (created when missing); returns (result, key)."""
    key_path = Path(key_path)
    key = read_key(key_path) if key_path.exists() else write_key(key_path, run_name=result.config.run.name)
    blinding = {"blinded": True, "key_id": key["key_id"], "key_file": str(key_path.resolve())}
    return apply_factor(result, key["factor"], blinding=blinding), key


def _namespace(d):
    if isinstance(d, dict):
        return types.SimpleNamespace(**{k: _namespace(v) for k, v in d.items()})
    return d


class _StoredConfig(types.SimpleNamespace):
    """The config of a finished run as read back from summary.json (attributes + as_dict)."""

    def as_dict(self) -> dict:
        return self._stored


def load_result(folder):
    """Rebuild a RunResult from a pairvel output folder (summary.json, pairwise.ecsv,
    covariance.fits, null_<kind>.ecsv, and tracers.fits when present), enough to write every output again."""
    from astropy.io import fits
    from astropy.table import Table

    from ..core.warnlog import RunWarning
    from ..stats.nulltests import NullTestResult
    from .result import RunResult
    from .tracers import TRACER_TABLE, read_tracer_table

    folder = Path(folder)
    try:
        summary = json.loads((folder / "summary.json").read_text())
        table = Table.read(folder / "pairwise.ecsv", format="ascii.ecsv")
        with fits.open(folder / "covariance.fits") as hdul:
            cov = np.array(hdul[0].data, dtype=float)
            p_jk = np.array(hdul["JACKKNIFE_SAMPLES"].data, dtype=float)
            edges = np.array(hdul["EDGES_MPC"].data, dtype=float)
        nulls = []
        for entry in summary.get("null_tests", []):
            nt = Table.read(folder / f"null_{entry['kind']}.ecsv", format="ascii.ecsv")
            p = np.array([nt[f"p_real{k:03d}_uK"] for k in range(entry["n_realisations"])], dtype=float)
            nulls.append(NullTestResult(kind=entry["kind"], p=p.reshape(entry["n_realisations"], len(nt)),
                                        chi2=np.array(entry["chi2_each"], dtype=float),
                                        pte=np.array(entry["pte_each"], dtype=float),
                                        chi2_mean=entry["chi2_mean_curve"], pte_mean=entry["pte_mean_curve"],
                                        dof=entry["dof"], threshold=entry["pte_threshold"],
                                        mean_error=np.array(nt["p_mean_err_uK"], dtype=float),
                                        covariance_from=entry.get("covariance_from", "own jackknife")))
        fit = _stored_fit(summary["fit"])
        extra = _stored_extra(summary, fit)
        tracers = read_tracer_table(folder / TRACER_TABLE).table if (folder / TRACER_TABLE).exists() else None
    except (OSError, KeyError, ValueError, TypeError) as err:
        raise InputError(f"output folder {folder}: cannot be read back as a pairvel output ({err})", path=folder) from None
    cfg = _StoredConfig(**{k: _namespace(v) for k, v in summary["config"].items()})
    cfg._stored = summary["config"]
    return RunResult(config=cfg, edges=edges, p=np.array(table["p_uK"], dtype=float), covariance=cov, p_jk=p_jk,
                     pair_counts=np.array(table["n_pairs"]), z_eff_bins=np.array(table["z_pair"], dtype=float),
                     z_eff=summary["z_eff"], v12_template=np.array(table["v12_lin_km_s"], dtype=float),
                     in_fit=np.array(table["in_fit"], dtype=bool), fit=fit, nulls=tuple(nulls),
                     n_tracers=summary["n_tracers"], selection=summary["selection"], provenance=summary["provenance"],
                     extra=extra, warnings=tuple(RunWarning(**w) for w in summary.get("run_warnings", [])),
                     tracers=tracers)


def _stored_fit(d: dict):
    from ..stats.fit import AmplitudeFit

    return AmplitudeFit(**{k: (float("nan") if v is None else v) for k, v in d.items()})


def _whole_fits(entries) -> bool:
    return entries is not None and all("fit" in d or d["problem"] for d in entries)


def _stored_extra(summary: dict, fit) -> dict:
    """``RunResult.extra`` as far as summary.json keeps it: every amplitude-carrying fit, the template,
    the map-stage records and the covariance diagnostics (report sections are rebuilt from these).

    Folders written before the per-radius, per-proxy-bin and joint fits were blinded do not store
    those fits whole (no ``fit`` entry, no ``n_samples``); they are left out rather than divided by a
    factor they never carried.
    """
    from ..stats.radii import RadiusFit
    from ..stats.subsamples import ProxyBinFit

    extra = {k: summary[k] for k in ("truth_check", "template", "prefilter", "multifrequency", "cross") if k in summary}
    if "demo_check" in summary:  # folders written before any run could name a truth file
        extra["truth_check"] = summary["demo_check"]
    if "null_rotations_used" in summary:
        extra["rotations_used"] = summary["null_rotations_used"]
    if "diagnostics" in summary.get("covariance", {}):
        extra["covariance_diagnostics"] = summary["covariance"]["diagnostics"]
    if "empirical_significance" in summary:
        extra["empirical_significance"] = summary["empirical_significance"]
    if "region_seed_spread" in summary.get("covariance", {}):
        extra["region_seed_spread"] = summary["covariance"]["region_seed_spread"]
    if "mock_calibration" in summary.get("covariance", {}):
        extra["mock_calibration"] = summary["covariance"]["mock_calibration"]
    if _whole_fits(summary.get("aperture_radii")):
        extra["radius_fits"] = [RadiusFit(d["radius_arcmin"], d["primary"], _stored_fit(d["fit"]) if "fit" in d else None,
                                          np.array(d["p_uk"], dtype=float), np.array(d["p_err_uk"], dtype=float),
                                          d["problem"]) for d in summary["aperture_radii"]]
    if _whole_fits(summary.get("proxy_bins", {}).get("bins")):
        keys = ("proxy_min", "proxy_max", "proxy_median", "n_tracers", "n_pairs", "n_regions", "z_mean")
        extra["proxy_bins"] = tuple(ProxyBinFit(*(float("nan") if d[k] is None else d[k] for k in keys),
                                                _stored_fit(d["fit"]) if "fit" in d else None, d["problem"])
                                    for d in summary["proxy_bins"]["bins"])
    for key in ("radius_joint", "proxy_joint"):  # JSON-ready dicts, stored as they are
        if key in summary.get("joint_covariances", {}):
            extra[key] = summary["joint_covariances"][key]
    if "tau_against_mass" in summary:
        extra["mass_trend"] = summary["tau_against_mass"]
    if "n_samples" in summary.get("velocity_scale_fit", {}):
        v = summary["velocity_scale_fit"]
        prior = None if v["tau_prior"] is None else (v["tau_prior"]["mean"], v["tau_prior"]["sigma"])
        extra["velocity_scale_fit"] = _joint_fit(fit, v["f_sigma8_template"], v["n_samples"], prior, v["grid_size"])
    extra["blinding"] = summary.get("blinding", {"blinded": False})
    return extra


def unblind_folder(blinded_dir, key_path, out_dir, *, run_log=None) -> Path:
    """Apply the key to a blinded output folder and write a new, unblinded folder (input untouched).

    ``run_log`` (callable() -> str, optional) adds ``run.log`` to the new folder, as in
    :func:`pairvel.report.outputs.write_outputs`.
    """
    from .outputs import write_outputs

    blinded_dir = Path(blinded_dir)
    key = read_key(key_path)
    result = load_result(blinded_dir)
    info = result.extra.get("blinding", {})
    if not info.get("blinded"):
        raise InputError(f"output folder {blinded_dir}: is not blinded (summary.json says blinded = false)",
                         path=blinded_dir)
    if info.get("key_id") != key["key_id"]:
        raise InputError(f"blinding key {key_path}: key_id {key['key_id']} does not match the folder's "
                         f"{info.get('key_id')}", path=key_path)
    unblinded = apply_factor(result, key["factor"], divide=True,
                             blinding={"blinded": False, "unblinded_from": str(blinded_dir.resolve()),
                                       "key_id": key["key_id"]})
    return write_outputs(unblinded, out_dir, run_log=run_log)
