"""Blinding: hide the amplitude of the measured curve behind a random factor kept in a key file.

A blinded run multiplies everything that carries the signal's scale - the measured curve, its
jackknife or bootstrap samples, the null-test curves, the errors (covariance by the factor squared)
and the fitted amplitude - by one hidden factor f drawn from fresh operating-system entropy, never
from the run seed.  Every chi-square, PTE and signal-to-noise is unchanged, so the null tests can be
judged blind; only the scale is hidden.  The factor lives in a JSON key file outside the output
folder; ``pairvel unblind`` reads a blinded folder and the key and writes a new, unblinded folder.
"""

from __future__ import annotations

__all__ = ["BLIND_RANGE", "apply_factor", "blind_result", "check_key_path", "default_key_path", "load_result",
           "read_key", "unblind_folder", "write_key"]

import dataclasses
import datetime as _dt
import json
import os
import secrets
import types
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


def apply_factor(result, factor: float, *, blinding: dict, divide: bool = False):
    """A copy of a RunResult with every signal-scale number multiplied (or divided) by ``factor``.

    ``blinding`` (stored as ``extra["blinding"]``) says whether the copy is blinded.  Unblinding
    divides by the same factor rather than multiplying by its reciprocal, so each number comes
    back to within one rounding of the unblinded value.
    """
    from ..stats.covdiag import diagnostics_markdown

    f = float(factor)

    def sc(x):
        return x / f if divide else x * f

    fit = dataclasses.replace(result.fit, amplitude=sc(result.fit.amplitude), error=sc(result.fit.error))
    nulls = tuple(dataclasses.replace(n, p=sc(n.p), mean_error=sc(n.mean_error)) for n in result.nulls)
    extra = dict(result.extra)
    extra["blinding"] = blinding
    diag = extra.get("covariance_diagnostics")
    if diag is not None:
        diag = dict(diag, errors={k: [sc(e) for e in v] for k, v in diag["errors"].items()})
        extra["covariance_diagnostics"] = diag
        sections = dict(extra.get("report_sections", {}))
        sections["Covariance diagnostics"] = diagnostics_markdown(diag, result.edges)
        extra["report_sections"] = sections
    return dataclasses.replace(result, p=sc(result.p), covariance=sc(sc(result.covariance)), p_jk=sc(result.p_jk),
                               fit=fit, nulls=nulls, extra=extra)


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
    covariance.fits, null_<kind>.ecsv), enough to write every output again."""
    from astropy.io import fits
    from astropy.table import Table

    from ..stats.fit import AmplitudeFit
    from ..stats.nulltests import NullTestResult
    from .result import RunResult

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
                                        mean_error=np.array(nt["p_mean_err_uK"], dtype=float)))
    except (OSError, KeyError, ValueError) as err:
        raise InputError(f"output folder {folder}: cannot be read back as a pairvel output ({err})", path=folder) from None
    cfg = _StoredConfig(**{k: _namespace(v) for k, v in summary["config"].items()})
    cfg._stored = summary["config"]
    fit = AmplitudeFit(**{k: (float("nan") if v is None else v) for k, v in summary["fit"].items()})
    extra = {k: summary[k] for k in ("demo_check",) if k in summary}
    if "null_rotations_used" in summary:
        extra["rotations_used"] = summary["null_rotations_used"]
    if "diagnostics" in summary.get("covariance", {}):
        from ..stats.covdiag import diagnostics_markdown

        diag = summary["covariance"]["diagnostics"]
        extra["covariance_diagnostics"] = diag
        extra["report_sections"] = {"Covariance diagnostics": diagnostics_markdown(diag, edges)}
    extra["blinding"] = summary.get("blinding", {"blinded": False})
    return RunResult(config=cfg, edges=edges, p=np.array(table["p_uK"], dtype=float), covariance=cov, p_jk=p_jk,
                     pair_counts=np.array(table["n_pairs"]), z_eff_bins=np.array(table["z_pair"], dtype=float),
                     z_eff=summary["z_eff"], v12_template=np.array(table["v12_lin_km_s"], dtype=float),
                     in_fit=np.array(table["in_fit"], dtype=bool), fit=fit, nulls=tuple(nulls),
                     n_tracers=summary["n_tracers"], selection=summary["selection"], provenance=summary["provenance"],
                     extra=extra)


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
