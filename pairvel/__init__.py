"""pairvel: the mean pairwise kSZ momentum of a spectroscopic catalogue on a CMB temperature map.

The names below are the public face for notebooks and scripts; everything else lives in the
stage subpackages (``core``, ``model``, ``input``, ``maps``, ``pairs``, ``stats``, ``report``,
``sims``), whose private compiled kernels are not part of the API.  Names are imported on first
use, so ``import pairvel`` stays fast.

Run a config
    load_config(path) -> Config
        Read and validate a TOML config (every key declared in :mod:`pairvel.input.config`).
    run_pipeline(cfg) -> RunResult
        Run every stage and return the result in memory (nothing written).
    write_outputs(result, out_dir)
        Write a result into a new output folder (tables, FITS, JSON, figures, report).
    load_result(folder) -> RunResult
        Read an output folder back into a RunResult.

The pieces
    load_catalogue(catalogue_cfg) -> Catalogue
        Read a tracer table with the checks and cuts of a ``[catalogue]`` section.
    read_map(path, ...) -> SkyMap
        Read a temperature map in uK_CMB; the reader is chosen from the file (HEALPix today: full
        or partial sky, RING or NESTED).
    measure_apertures(skymap, ra_deg, dec_deg, radius_arcmin, ...) -> ApertureResult
        Compensated aperture photometry at every position, one or several radii.
    pairwise_momentum(positions, temperatures, edges, ...) -> PairwiseResult
        The Ferreira et al. (1999) pairwise estimator over every pair, with jackknife sums.
    comoving_positions(ra_deg, dec_deg, z, cosmo=...) -> ndarray (n, 3), Mpc
        Comoving Cartesian positions of tracers.
    binned_pairwise_velocity(edges_mpc, z, bias, cosmo=...) -> ndarray, km/s
        The linear-theory pairwise velocity v12(r) averaged over separation bins.
    Cosmology
        The flat LCDM parameters every stage uses.
    PairvelError
        Base class of every error pairvel raises for bad input.

Example
-------
>>> import pairvel
>>> cfg = pairvel.load_config("configs/demo.toml")          # doctest: +SKIP
>>> result = pairvel.run_pipeline(cfg)                      # doctest: +SKIP
>>> result.fit.amplitude, result.fit.error                  # doctest: +SKIP
"""

from __future__ import annotations

import importlib

from .core.provenance import __version__

_PUBLIC = {
    "load_config": "pairvel.input.config",
    "Config": "pairvel.input.config",
    "run_pipeline": "pairvel.pipeline",
    "RunResult": "pairvel.report.result",
    "write_outputs": "pairvel.report.outputs",
    "load_result": "pairvel.report.blinding",
    "load_catalogue": "pairvel.input.catalogue",
    "read_map": "pairvel.maps.skymap",
    "measure_apertures": "pairvel.maps.photometry",
    "pairwise_momentum": "pairvel.pairs.estimator",
    "comoving_positions": "pairvel.pairs.geometry",
    "binned_pairwise_velocity": "pairvel.model.theory",
    "Cosmology": "pairvel.model.cosmology",
    "PairvelError": "pairvel.core.errors",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'pairvel' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
