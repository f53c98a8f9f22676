"""Compiled aperture sums over HEALPix RING pixel centres (private: no validation here).

The public wrapper is :func:`pairvel.maps.photometry.measure_apertures` (``method="kernel"``).  For each
position the kernel walks the RING-scheme rings that can reach the outer radius, and on each ring
only the run of pixels whose longitude is close enough; every candidate pixel centre is then
classified by its exact squared chord distance, as the numpy path does.  The ring geometry is the
HEALPix one (Gorski et al. 2005, ApJ 622, 759, section 4): north polar cap rings i = 1..nside-1
hold 4i pixels at z = 1 - i^2 / (3 nside^2); equatorial rings i = nside..3 nside hold 4 nside
pixels at z = 4/3 - 2i / (3 nside), every other one shifted by half a pixel; the south cap
mirrors the north.
"""

from __future__ import annotations

import math

import numba
import numpy as np


@numba.njit(cache=True, inline="always")
def _ring_info(i, nside):
    """(first pixel, pixels in ring, z, phi offset in pixel units) of RING-scheme ring i (1-based)."""
    npix = 12 * nside * nside
    if i < nside:
        nr = 4 * i
        z = 1.0 - i * i / (3.0 * nside * nside)
        return 2 * i * (i - 1), nr, z, 0.5
    if i <= 3 * nside:
        ncap = 2 * nside * (nside - 1)
        z = 4.0 / 3.0 - 2.0 * i / (3.0 * nside)
        off = 0.5 if (i - nside) % 2 == 0 else 0.0
        return ncap + (i - nside) * 4 * nside, 4 * nside, z, off
    k = 4 * nside - i
    z = -(1.0 - k * k / (3.0 * nside * nside))
    return npix - 2 * k * (k + 1), 4 * k, z, 0.5


@numba.njit(cache=True, inline="always")
def _ring_of_z(z, nside):
    """Real-valued ring number of the ring at height z (monotonic in z)."""
    if z > 2.0 / 3.0:
        return nside * math.sqrt(3.0 * (1.0 - z))
    if z < -2.0 / 3.0:
        return 4.0 * nside - nside * math.sqrt(3.0 * (1.0 + z))
    return nside * (2.0 - 1.5 * z)


@numba.njit(cache=True, inline="always")
def _lookup(p, held, full, values, weight):
    if full:
        return values[p], weight[p]
    k = np.searchsorted(held, p)
    if k < held.size and held[k] == p:
        return values[k], weight[k]
    return 0.0, 0.0


@numba.njit(cache=True, inline="always")
def reach_of(c_out, t, half_ramp):
    """(squared chord, angle, cos of the angle) out to which position t's pixels can count: the largest
    outer radius plus the ramp half-width, at most the whole sphere."""
    c_reach = 0.0
    for r in range(c_out.shape[0]):
        c_reach = max(c_reach, c_out[r, t] + half_ramp)
    c_reach = min(c_reach, 2.0)
    ang_reach = 2.0 * math.asin(0.5 * c_reach)
    return c_reach * c_reach, ang_reach, math.cos(ang_reach)


@numba.njit(cache=True, inline="always")
def add_pixel(sums, t, c_in, c_out, half_ramp, d2, w, wv, area):
    """Add one pixel at squared chord distance d2 from position t to the disc and annulus sums of every
    radius, counting ``area`` (1 for equal-area pixels), its usable weight w and weighted value wv.

    Also inlined into ``_car_kernels.py``: numba's on-disk cache keys a kernel on its own file only,
    so after changing this (or :func:`reach_of`) touch that file too, or clear its ``__pycache__``."""
    d = math.sqrt(d2) if half_ramp > 0 else 0.0
    for r in range(c_in.shape[0]):
        if half_ramp > 0:
            fd = min(1.0, max(0.0, (c_in[r, t] + half_ramp - d) / (2.0 * half_ramp)))
            fo = min(1.0, max(0.0, (c_out[r, t] + half_ramp - d) / (2.0 * half_ramp)))
            fa = fo - fd
        else:
            fd = 1.0 if d2 <= c_in[r, t] * c_in[r, t] else 0.0
            fa = 1.0 if (fd == 0.0 and d2 <= c_out[r, t] * c_out[r, t]) else 0.0
        if fd > 0:
            sums[0, r, t] += fd * area
            sums[1, r, t] += fd * w * area
            sums[2, r, t] += fd * wv * area
        if fa > 0:
            sums[3, r, t] += fa * area
            sums[4, r, t] += fa * w * area
            sums[5, r, t] += fa * wv * area


@numba.njit(cache=True, parallel=True)
def aperture_sums(nside, vec, c_in, c_out, half_ramp, held, full, values, weight, sums):
    """Accumulate disc and annulus sums for every position and radius.

    vec (N, 3) unit vectors in the map frame; c_in, c_out (R, N) chord radii per radius and position; half_ramp: 0 for whole
    pixels, else the chord half-width of the linear ramp that gives a pixel near an edge a fraction
    of its weight; held: sorted RING pixel indices of a partial map (ignored when full); values,
    weight: map values and usable weights (RING order, or aligned with held).  sums (6, R, N),
    zeroed by the caller: [disc pixel count, disc weight, disc weighted sum, same for the annulus].
    """
    n = vec.shape[0]
    n_rings = 4 * nside - 1
    for t in numba.prange(n):
        reach2, ang_reach, cos_reach = reach_of(c_out, t, half_ramp)
        x0, y0, z0 = vec[t, 0], vec[t, 1], vec[t, 2]
        th0 = math.acos(min(1.0, max(-1.0, z0)))
        ph0 = math.atan2(y0, x0)
        s0 = math.sqrt(max(0.0, 1.0 - z0 * z0))
        z_hi = math.cos(max(0.0, th0 - ang_reach))
        z_lo = math.cos(min(math.pi, th0 + ang_reach))
        i_lo = max(1, int(math.floor(_ring_of_z(z_hi, nside))) - 1)
        i_hi = min(n_rings, int(math.ceil(_ring_of_z(z_lo, nside))) + 1)
        for i in range(i_lo, i_hi + 1):
            first, npr, z, off = _ring_info(i, nside)
            s = math.sqrt(max(0.0, (1.0 - z) * (1.0 + z)))
            dphi = 2.0 * math.pi / npr
            denom = s0 * s
            j_lo, j_hi = 0, npr - 1
            if denom > 1e-300:
                cval = (cos_reach - z0 * z) / denom
                if cval > 1.0 + 1e-12:
                    continue
                if cval > -1.0:
                    half = math.acos(min(1.0, cval)) + 1e-9
                    a = int(math.ceil((ph0 - half) / dphi - off))
                    b = int(math.floor((ph0 + half) / dphi - off))
                    if b - a + 1 < npr:
                        j_lo, j_hi = a, b
            for j in range(j_lo, j_hi + 1):
                jj = j % npr
                if jj < 0:
                    jj += npr
                phi = (jj + off) * dphi
                dx = s * math.cos(phi) - x0
                dy = s * math.sin(phi) - y0
                dz = z - z0
                d2 = dx * dx + dy * dy + dz * dz
                if d2 > reach2:
                    continue
                v, w = _lookup(first + jj, held, full, values, weight)
                wv = w * v if w > 0 else 0.0
                add_pixel(sums, t, c_in, c_out, half_ramp, d2, w, wv, 1.0)
    return sums
