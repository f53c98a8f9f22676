"""A run checked against the truth of a synthetic survey (``run.truth_path``, the demo).

``pairvel mock`` writes a truth.json beside the survey it makes: the injected mean aperture
optical depth, the measured response of the pixelised aperture, and the pairwise velocity this one
realisation of the volume actually holds.  A run whose config names that file compares its fitted
tau_mean with the injected value (:func:`attach_truth_check`); the verdict goes into the closing
summary, summary.json (``truth_check``) and the report.
"""

from __future__ import annotations

__all__ = ["read_truth", "attach_truth_check", "TRUTH_KEY", "SECTION_TITLE"]

import dataclasses
import json
import math
from pathlib import Path

import numpy as np

from ..core.constants import C_KM_S, T_CMB_UK
from ..core.errors import InputError
from ..stats.fit import fit_amplitude

#: The config key naming the truth file, and the report section the check fills.
TRUTH_KEY = "run.truth_path"
SECTION_TITLE = "Comparison with the injected truth"


def read_truth(path) -> dict:
    """Read and check a truth.json: a JSON object whose ``tau_mean`` is a finite number.

    Raises
    ------
    InputError
        The file cannot be read, is not JSON, or has no usable ``tau_mean``; the message names the
        file and ``run.truth_path``.
    """
    path = Path(path)

    def bad(problem):
        return InputError(f"{TRUTH_KEY} {path}: {problem}", path=path, key=TRUTH_KEY)

    try:
        truth = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise bad("file not found") from None
    except (OSError, UnicodeDecodeError) as err:
        raise bad(f"cannot be read ({getattr(err, 'strerror', None) or err})") from None
    except json.JSONDecodeError as err:
        raise bad(f"is not JSON ({err})") from None
    if not isinstance(truth, dict):
        raise bad(f"must hold a JSON object (as `pairvel mock` writes it); got {type(truth).__name__}")
    tau = truth.get("tau_mean")
    if isinstance(tau, bool) or not isinstance(tau, (int, float)) or not math.isfinite(tau):
        raise bad(f"'tau_mean' must be a finite number (the injected optical depth); got {tau!r}")
    return truth


def attach_truth_check(result, truth: dict, *, path=None):
    """Return ``result`` with a comparison against a synthetic survey's truth in ``extra["truth_check"]``.

    Two fits of the same measured curve with the same covariance: against the run's template
    (what a real analysis does) and, when the truth holds the realised line-of-sight pairwise
    velocity in the run's bins, against that curve (what this realisation holds).  Their
    difference is the sample variance of the volume.

    Parameters
    ----------
    result : RunResult
    truth : dict
        As :func:`read_truth` returns it.
    path : path-like, optional
        The truth file, recorded in the check.
    """
    tau_true = float(truth["tau_mean"])
    response = truth.get("aperture_response")
    fit = result.fit
    pull = (fit.amplitude - tau_true) / fit.error
    check = {"truth_file": None if path is None else str(path), "tau_mean_injected": tau_true,
             "aperture_response": response, "tau_mean_recovered": fit.amplitude, "tau_mean_error": fit.error,
             "pull_sigma": pull, "snr": fit.snr}
    curves = {}
    realised = _realised_velocity_fit(result, truth)
    if realised is not None:
        real_fit, t_real = realised
        check["tau_mean_vs_realised_velocity"] = real_fit.amplitude
        check["tau_mean_vs_realised_velocity_error"] = real_fit.error
        check["pull_vs_realised_sigma"] = (real_fit.amplitude - tau_true) / real_fit.error
        check["realised_over_linear_v12"] = np.asarray(truth.get("realised_over_linear", []), dtype=float).tolist()
        curves["injected τ̄ × this mock's realised v12"] = tau_true * t_real
    passes = {"S/N >= 5": fit.snr >= 5.0, "tau within 2 sigma": abs(pull) <= 2.0,
              "null tests pass": all(n.passed for n in result.nulls)}
    check["passes"] = passes
    verdict = (f"truth check: injected tau_mean = {tau_true:.3e}, recovered {fit.amplitude:.3e} ± {fit.error:.3e} "
               f"({pull:+.2f} sigma); " + ", ".join(f"{k}: {'yes' if v else 'NO'}" for k, v in passes.items()))
    if realised is not None:
        verdict += (f"\n  against this mock's own realised pairwise velocity: tau_mean = "
                    f"{check['tau_mean_vs_realised_velocity']:.3e} ({check['pull_vs_realised_sigma']:+.2f} sigma); "
                    f"the difference from the template fit is sample variance of the survey volume")
    check["verdict"] = verdict
    section = verdict.replace("\n  ", "\n\n")
    if path is not None:
        section = f"Truth file: {path}.\n\n" + section
    if isinstance(response, (int, float)) and math.isfinite(response):
        section += (f"\n\nThe measured aperture response of the mock (pixelised aperture on a noiseless kSZ-only map) "
                    f"is {response:.3f}, so the expected recovered value is about {tau_true * response:.3e}.")
    extra = dict(result.extra, truth_check=check, plot_curves=curves,
                 report_sections={**result.extra.get("report_sections", {}), SECTION_TITLE: section})
    return dataclasses.replace(result, extra=extra)


def _realised_velocity_fit(result, truth: dict):
    """(fit, template in uK) against the truth's realised line-of-sight v12, or None when the truth
    has no such curve in the run's separation bins."""
    edges = np.asarray(truth.get("edges_mpc", []), dtype=float)
    v_real = np.asarray(truth.get("v12_los_realised_km_s", []), dtype=float)
    if edges.shape != result.edges.shape or not np.allclose(edges, result.edges) or v_real.size != edges.size - 1:
        return None
    loss = result.extra.get("template", {}).get("trend_loss_model")
    kept = np.asarray(loss["kept_fraction"]) if loss else 1.0   # the trend removal acts on the realised signal too
    t_real = T_CMB_UK * v_real * kept / C_KM_S
    real_fit = fit_amplitude(result.p, t_real, result.covariance, n_samples=result.n_jk, use=result.in_fit,
                             likelihood=result.fit.likelihood)
    return real_fit, t_real
