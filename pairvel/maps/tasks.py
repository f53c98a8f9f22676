"""The map stages cut into tasks for a :class:`~pairvel.core.cluster.TaskRunner`.

Aperture photometry is done in chunks of tracers, and the redshift trend re-estimated without each
jackknife region in chunks of regions.  Each tracer's aperture and each region's re-estimate do not
depend on the others, so the chunks give the same numbers as one call in this process; the map,
the temperatures and the redshifts go to the workers once (:meth:`TaskRunner.share`), and a task
carries only its chunk's bounds.
"""

from __future__ import annotations

__all__ = ["measure_apertures_in_chunks", "trend_without_each_region"]

import dataclasses

import numpy as np

from .photometry import ApertureResult, measure_apertures
from .trend import remove_redshift_trend

CHUNKS_PER_WORKER = 4


def _chunk_bounds(n: int, n_chunks: int) -> list[tuple[int, int]]:
    cuts = np.linspace(0, n, max(1, min(n_chunks, n)) + 1).round().astype(int)
    return [(int(a), int(b)) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]


def _aperture_chunk(shared, lo: int, hi: int, radii, options: dict) -> ApertureResult:
    skymap, ra, dec, scale = shared
    return measure_apertures(skymap, ra[lo:hi], dec[lo:hi], radii, **options,
                             radius_scale=None if scale is None else scale[lo:hi])


def measure_apertures_in_chunks(skymap, ra_deg, dec_deg, radius_arcmin, *, runner, radius_scale=None,
                                **options) -> ApertureResult:
    """:func:`pairvel.maps.photometry.measure_apertures` on ``runner``, ``CHUNKS_PER_WORKER`` chunks of
    tracers per worker; the same result as one call (every aperture is measured on its own)."""
    ra, dec = np.asarray(ra_deg, dtype=np.float64), np.asarray(dec_deg, dtype=np.float64)
    shared = runner.share((skymap, ra, dec, radius_scale))
    bounds = _chunk_bounds(ra.size, CHUNKS_PER_WORKER * runner.n_workers())
    parts = runner.run(_aperture_chunk, [(shared, lo, hi, radius_arcmin, options) for lo, hi in bounds])
    first = parts[0]
    per_tracer = {f.name: np.concatenate([getattr(p, f.name) for p in parts], axis=-1)
                  for f in dataclasses.fields(first) if f.name not in ("radius_arcmin", "max_masked_fraction")}
    return dataclasses.replace(first, **per_tracer)


def _trend_chunk(shared, regions_wanted, sigma_z: float) -> list[np.ndarray]:
    temps_raw, z, regions = shared
    return [remove_redshift_trend(temps_raw[:, regions != k], z[regions != k], sigma_z=sigma_z)
            if np.any(regions != k) else None for k in regions_wanted]


def trend_without_each_region(temps_raw, z, regions, *, sigma_z: float, runner) -> np.ndarray:
    """(n_radii, n_jk, N): the temperatures of each radius with the redshift trend estimated from the
    tracers outside region k, region k's own tracers set to 0; the regions in chunks on ``runner``."""
    temps_raw = np.asarray(temps_raw, dtype=np.float64)
    n_jk = int(regions.max()) + 1
    shared = runner.share((temps_raw, np.asarray(z, dtype=np.float64), regions))
    chunks = [np.arange(lo, hi) for lo, hi in _chunk_bounds(n_jk, CHUNKS_PER_WORKER * runner.n_workers())]
    parts = runner.run(_trend_chunk, [(shared, ks, sigma_z) for ks in chunks])
    out = np.zeros((temps_raw.shape[0], n_jk, z.size))
    for ks, part in zip(chunks, parts):
        for k, values in zip(ks, part):
            if values is not None:
                out[:, k, regions != k] = values
    return out
