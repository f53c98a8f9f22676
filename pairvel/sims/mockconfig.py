"""The ready-to-run config that ``pairvel mock`` writes beside a synthetic survey (run.toml).

It is made from the survey's truth record alone (what truth.json holds), so it states every
assumption the mock was made with that the measurement must share: the tracer bias, the
cosmology (the written redshifts map back to the true positions only with it), the aperture
radius that defines the injected optical depth, the redshift range, the separation bins and the
trend-removal kernel of the realised pairwise velocity.  ``run.truth_path`` points at truth.json,
so the run compares its tau_mean with the injected one.
"""

from __future__ import annotations

__all__ = ["RUN_CONFIG_FILE", "mock_run_config"]

import json
import math

from ..core.provenance import __version__
from ..input.config import is_folder_name

RUN_CONFIG_FILE = "run.toml"


def _toml(value) -> str:
    """A TOML literal of a string, bool, number or list of them."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)  # a JSON string is a TOML basic string (escapes included)
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ("inf" if value > 0 else "-inf")
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    raise TypeError(f"no TOML literal for {value!r}")  # a bug in the caller, not user input


def mock_run_config(record: dict, *, folder_name: str, trend_sigma_z: float) -> str:
    """The text of run.toml for the survey whose truth record (truth.json content) is ``record``.

    Parameters
    ----------
    record : dict
        The truth record: ``options`` (the call's options with ``cosmology``), ``files``,
        ``edges_mpc``, ``seed``, ``bias``, ``tau_mean``.
    folder_name : str
        Name of the survey folder; the run is named ``<folder_name>-run`` when that is a plain
        folder name.
    trend_sigma_z : float
        Redshift kernel of the trend removal that the realised pairwise velocity in the truth used.
    """
    o, files = record["options"], record["files"]
    name = f"{folder_name}-run" if is_folder_name(f"{folder_name}-run") else "pairvel-mock-run"
    extra = [(float(key[len("map_"):-len("ghz")]), name) for key, name in files.items() if key.startswith("map_")]
    sections = {
        "run": {"name": name, "seed": record["seed"] if record.get("seed") is not None else 20261202,
                "truth_path": "truth.json"},
        "catalogue": {"path": files["catalogue"], "ra_column": "ra", "dec_column": "dec", "z_column": "z",
                      "proxy_column": "log_mass", "z_min": float(o["z_min"]), "z_max": float(o["z_max"])},
        "map": {"path": files["map"]},
        "aperture": {"radius_arcmin": float(o["aperture_radius_arcmin"]), "beam_fwhm_arcmin": float(o["beam_fwhm_arcmin"])},
        "trend": {"enabled": True, "sigma_z": float(trend_sigma_z)},
        "bins": {"edges_mpc": [float(e) for e in record["edges_mpc"]]},
        "theory": {"bias": float(record["bias"])},
        "cosmology": dict(o["cosmology"]),  # every parameter as the mock recorded it (numbers and switches)
    }
    if "ivar" in files:  # a map of varying depth: its inverse variance gives each tracer's aperture noise
        sections["noise"] = {"path": files["ivar"], "kind": "ivar", "tracer_weighting": False}
    if "partner" in record:  # a second, galaxy-like catalogue: the cross curve (README 'Clusters against galaxies')
        sections["partner"] = {"path": record["partner"]["file"], "z_min": float(o["z_min"]),
                               "z_max": float(o["z_max"]), "bias": float(record["partner"]["bias"])}
    single_cluster = bool(extra) and o.get("electron_temperature_kev") is not None
    if single_cluster:  # every map: combined without tSZ by `pairvel run`, split per cluster by `pairvel velocities`
        del sections["map"]
        sections["multifrequency"] = _multifrequency_keys(record, extra)
        sections["single_cluster"] = {"electron_temperature_kev": float(o["electron_temperature_kev"])}
    lines = [
        f"# Ready-to-run config written by pairvel {__version__} (`pairvel mock`) beside the synthetic survey it",
        f"# made: {record['n_tracers']} tracers, {_pixels_label(o)}, injected tau_mean = {record['tau_mean']:g}, "
        f"seed {record.get('seed')}.",
        "# Paths are relative to this file. Run it with:  pairvel run <this folder>/run.toml --out <new folder>",
        "# The keys below repeat the assumptions the mock was made with (bias, cosmology, aperture and",
        "# beam, redshift range, bins, trend kernel); run.truth_path makes the run compare tau_mean with",
        "# the injected value.",
    ]
    for section, keys in sections.items():
        lines += ["", f"[{section}]"] + [f"{key} = {_toml(value)}" for key, value in keys.items()]
    if single_cluster:
        lines += ["", "# [multifrequency]: the tSZ-free combination of every map for `pairvel run`; the same maps",
                  "# give `pairvel velocities` its channels (README, 'Single-cluster velocities')."]
    elif extra:
        mf = _multifrequency_keys(record, extra)
        lines += ["", "# The other maps of this survey (same CMB and kSZ, tSZ scaled, own noise). To combine them,",
                  "# delete [map] path above and uncomment (README, 'Several frequency maps'):",
                  "# [multifrequency]", *(f"# {key} = {_toml(value)}" for key, value in mf.items())]
    return "\n".join(lines) + "\n"


def _multifrequency_keys(record: dict, extra: list) -> dict:
    """[multifrequency] keys of every map of the survey (150 GHz first, then ``extra``: (GHz, file))."""
    o = record["options"]
    maps = [record["files"]["map"], *(name for _, name in extra)]
    return {"map_paths": maps, "frequencies_ghz": [150.0, *(nu for nu, _ in extra)],
            "noise_uk_arcmin": [float(o["noise_uk_arcmin"]), *(float(o["extra_frequencies_ghz"][f"{nu:g}"])
                                                               for nu, _ in extra)],
            "beam_fwhm_arcmin": [float(o["beam_fwhm_arcmin"])] * len(maps)}


def _pixels_label(options) -> str:
    """The map's pixelisation in a few words: ``nside 2048`` or ``0.5-arcmin CAR pixels``."""
    if options.get("pixels") == "car":
        return f"{options['car_arcmin']:g}-arcmin CAR pixels"
    return f"nside {options['nside']}"
