"""The synthetic survey's sky on a rectangular (CAR) pixel grid: ``make_mock_survey(..., pixels="car")``.

The same content as the HEALPix mock map, on a plate-carree image of ``car_arcmin`` pixels over the
footprint plus a 1-degree margin: the beam-smoothed primary CMB synthesised from the mock's a_lm at
the pixel centres (:func:`pairvel.maps.car_sht.synthesise_grid` through
:meth:`pairvel.maps.car.CarMap.synthesise`), the kSZ and tSZ painted as beam-shaped sources at the
pixel centres (:meth:`~pairvel.maps.car.CarMap.source_map`), and white noise whose per-pixel sigma
follows each row's solid angle.  Pixels are addressed by their flat image index (row x columns +
column), so :mod:`pairvel.sims.mock` adds sources and noise to a CAR image as it does to its
HEALPix footprint pixels.

The grid: column 0 at the footprint's eastern (largest-RA) edge, RA decreasing with the column (the
usual orientation of sky images), rows centred half a pixel inside the latitude edges, 360 degrees a
whole number of columns (so harmonic transforms run on whole rings).
"""

from __future__ import annotations

__all__ = ["check_car_options", "car_footprint", "car_map_file", "car_cmb", "car_painted", "car_white_noise",
           "write_car_map"]

import functools
import math

import numpy as np

from ..core.errors import InputError

_PIXELS = ("healpix", "car")


def check_car_options(pixels, car_arcmin) -> None:
    """One-line InputError unless ``pixels`` is "healpix" or "car" and ``car_arcmin`` divides 360 deg."""
    if pixels not in _PIXELS:
        raise InputError(f"mock option 'pixels' must be one of {', '.join(_PIXELS)}; got {pixels!r}", key="pixels")
    if pixels != "car":
        return
    ok = isinstance(car_arcmin, (int, float, np.integer, np.floating)) and not isinstance(car_arcmin, bool) \
        and math.isfinite(car_arcmin) and 0.05 <= car_arcmin <= 60.0
    n_turn = 21600.0 / car_arcmin if ok else math.nan
    if not ok or abs(n_turn - round(n_turn)) > 1e-6 * n_turn:
        raise InputError(f"mock option 'car_arcmin' must be a pixel size in [0.05, 60] arcmin that divides 360 degrees "
                         f"into a whole number of columns (e.g. 0.5, 1, 1.728); got {car_arcmin!r}", key="car_arcmin")


def car_map_file(freq_ghz) -> str:
    """File name of the CAR mock map at ``freq_ghz``."""
    return f"skerry_{freq_ghz:g}ghz_car.fits"


@functools.lru_cache(maxsize=4)
def _footprint_map(ra_min, ra_max, dec_min, dec_max, car_arcmin, margin_deg):
    from ..maps.car import CarMap, box_wcs

    step = car_arcmin / 60.0
    lat_lo = max(-90.0, step * math.floor((dec_min - margin_deg) / step))
    lat_hi = min(90.0, step * math.ceil((dec_max + margin_deg) / step))
    cos_edge = math.cos(math.radians(min(max(abs(lat_lo), abs(lat_hi)), 89.0)))
    ra_margin = margin_deg / max(cos_edge, 0.05)
    span = min(360.0, step * math.ceil((ra_max - ra_min + 2 * ra_margin) / step))
    centre = 0.5 * (ra_min + ra_max)
    wcs, shape = box_wcs((centre - 0.5 * span, centre + 0.5 * span), (lat_lo, lat_hi), car_arcmin)
    return CarMap(wcs, shape, None, np.zeros(shape[0] * shape[1]))


def car_footprint(spec, margin_deg: float = 1.0):
    """The empty CAR map (every pixel, zeros) over the footprint of ``spec`` grown by ``margin_deg``.

    The longitude span and the latitude edges are whole numbers of pixels, so the column step is
    exactly ``spec.car_arcmin``.
    """
    return _footprint_map(float(spec.ra_min), float(spec.ra_max), float(spec.dec_min), float(spec.dec_max),
                          float(spec.car_arcmin), float(margin_deg))


def car_cmb(spec, alm, lmax: int) -> np.ndarray:
    """The field of ``alm`` (beam already applied) at every pixel of the CAR footprint, flat (uK)."""
    return car_footprint(spec).synthesise(alm, lmax=lmax)


def car_painted(spec, ra, dec, integral_uk_sr, fwhm_arcmin):
    """(flat pixel indices, values in uK) of beam-shaped sources on the CAR footprint: the CAR
    counterpart of :func:`pairvel.maps.sources.paint_beam_sources`."""
    values = car_footprint(spec).source_map(ra, dec, integral_uk_sr, fwhm_arcmin=fwhm_arcmin).values
    where = np.flatnonzero(values)
    return where, values[where]


def car_white_noise(spec, noise_uk_arcmin: float, rng) -> np.ndarray:
    """White noise of ``noise_uk_arcmin`` at every CAR pixel, sigma from the pixel's own solid angle."""
    return car_footprint(spec).white_noise(noise_uk_arcmin, rng)


def write_car_map(path, spec, values, *, header: dict) -> None:
    """Write flat ``values`` (uK_CMB) as the CAR footprint image, float32, with ``header`` cards
    (:func:`pairvel.maps.car_io.write_car_map`)."""
    from ..maps import car_io

    image = car_footprint(spec).with_values(np.asarray(values, dtype=np.float32))
    car_io.write_car_map(path, image, unit="uK_CMB", extra_header=header)
