"""Compiled aperture sums over a separable cylindrical pixel grid (private: no validation here).

The public wrapper is :meth:`pairvel.maps.car.CarMap.aperture_sums` (``method="kernel"``).  For each
position the kernel visits only the rows whose latitude lies within the outer radius (a pixel's
angular distance is at least its latitude difference), and on each row only the columns within
the longitude half-width where that row crosses the reach circle,

    cos(half) = (cos(reach) - sin(lat0) sin(lat)) / (cos(lat0) cos(lat))   [spherical law of cosines],

which widens as 1 / cos(lat) towards the poles; a row that the circle encloses is visited whole.
Columns wrap around the sphere on a lattice of ``n_turn`` columns (the grid's ``nx`` real ones, the
rest virtual); virtual rows and columns count in the area sums only.  Every candidate pixel centre
is then classified by its exact squared chord distance, as the numpy path does.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from ._aperture_kernels import _lookup, add_pixel, reach_of


@numba.njit(cache=True, parallel=True)
def aperture_sums(vec, c_in, c_out, half_ramp, row_lat, row_z, row_s, row_area, row_index, lon0, dlon, period,
                  n_turn, nx, col_cos, col_sin, held, full, values, weight, sums):
    """Accumulate area-weighted disc and annulus sums for every position and radius.

    vec (N, 3) unit vectors in the map frame; c_in, c_out (R, N) chord radii; half_ramp 0 for whole
    pixels, else the chord half-width of the linear edge ramp.  row_* (n_rows,): the extended rows
    sorted by latitude (radians), sin and cos of it, pixel area over the mean pixel area, and the
    grid row (-1 virtual).  lon0, dlon: longitude of column 0 and the column step (radians, signed);
    period: columns per 360 deg; n_turn: lattice columns; nx: real columns; col_cos, col_sin
    (n_turn,).  held: sorted flat indices y nx + x of a partial map's pixels (ignored when full);
    values, weight: the map's, row-major over the image when full, else aligned with held.  sums
    (6, R, N), zeroed by the caller: [disc area, disc weight x area, disc weighted sum, same for the
    annulus], areas in mean pixels.
    """
    n = vec.shape[0]
    step = abs(dlon)
    for t in numba.prange(n):
        reach2, ang_reach, cos_reach = reach_of(c_out, t, half_ramp)
        x0, y0, z0 = vec[t, 0], vec[t, 1], vec[t, 2]
        lat0 = math.asin(min(1.0, max(-1.0, z0)))
        s0 = math.sqrt(max(0.0, 1.0 - z0 * z0))
        u = (math.atan2(y0, x0) - lon0) / dlon
        u0 = u - period * math.floor(u / period)  # column coordinate of the centre, in [0, period)
        i_lo = np.searchsorted(row_lat, lat0 - ang_reach - 1e-12)
        i_hi = np.searchsorted(row_lat, lat0 + ang_reach + 1e-12, side="right")
        for i in range(i_lo, i_hi):
            z = row_z[i]
            s = row_s[i]
            a, b = 0, n_turn - 1
            denom = s0 * s
            if denom > 1e-300:
                cval = (cos_reach - z0 * z) / denom
                if cval > 1.0 + 1e-12:
                    continue
                if cval > -1.0:
                    hw = (math.acos(min(1.0, cval)) + 1e-9) / step
                    lo = int(math.ceil(u0 - hw)) - 1
                    hi = int(math.floor(u0 + hw)) + 1
                    if hi - lo + 1 < n_turn:
                        a, b = lo, hi
            grid_row = row_index[i]
            area = row_area[i]
            for x in range(a, b + 1):
                j = x % n_turn
                if j < 0:
                    j += n_turn
                dx = s * col_cos[j] - x0
                dy = s * col_sin[j] - y0
                dz = z - z0
                d2 = dx * dx + dy * dy + dz * dz
                if d2 > reach2:
                    continue
                v, w = 0.0, 0.0
                if grid_row >= 0 and j < nx:
                    v, w = _lookup(grid_row * nx + j, held, full, values, weight)
                wv = w * v if w > 0 else 0.0
                add_pixel(sums, t, c_in, c_out, half_ramp, d2, w, wv, area)
    return sums
