"""Beam-shaped point sources painted on HEALPix pixels: test sources for the pre-filter response,
and the kSZ and tSZ signals of the synthetic surveys."""

from __future__ import annotations

__all__ = ["paint_beam_sources"]

import math

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.sphere import unit_vectors


def paint_beam_sources(nside, ra, dec, integral_uk_sr, fwhm_arcmin):
    """Beam-shaped sources sampled at pixel centres: (pixel indices, values in uK), overlaps summed.

    Each source is a circular Gaussian of the beam FWHM with the given solid-angle integral,
    evaluated out to 5 sigma; like the CMB from ``alm2map``, the map is point-sampled, so a
    source's pixel sum times the pixel area equals its integral only on average over positions.
    """
    import healpy as hp

    sigma = fwhm_arcmin * ARCMIN_RAD / math.sqrt(8 * math.log(2))
    peak = integral_uk_sr / (2 * np.pi * sigma**2)
    vec = unit_vectors(ra, dec)
    pix_all, val_all = [], []
    for b0 in range(0, ra.size, 4096):
        b1 = min(b0 + 4096, ra.size)
        lists = [hp.query_disc(nside, vec[k], 5 * sigma) for k in range(b0, b1)]
        lens = np.fromiter((len(p) for p in lists), dtype=np.int64, count=b1 - b0)
        pix = np.concatenate(lists)
        owner = np.repeat(np.arange(b0, b1), lens)
        pv = np.array(hp.pix2vec(nside, pix)).T
        cosd = np.clip(np.einsum("ij,ij->i", pv, vec[owner]), -1, 1)
        ang2 = 2.0 * (1.0 - cosd)  # chord^2 ~ angle^2 at these scales
        pix_all.append(pix)
        val_all.append(peak[owner] * np.exp(-ang2 / (2 * sigma**2)))
    pix = np.concatenate(pix_all)
    uniq, inv = np.unique(pix, return_inverse=True)
    return uniq, np.bincount(inv, weights=np.concatenate(val_all))
