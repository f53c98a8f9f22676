"""Aperture sums and disc look-ups on a :class:`~pairvel.maps.car.CarGrid` (private to ``car.py``).

Two independent ways to the same (6, R, N) sums: :func:`sums_kernel` drives the compiled row walk of
``_car_kernels.py``; :func:`sums_direct` is the numpy reference, which takes every pixel of each
position's longitude-latitude bounding box (half-width asin(sin r / cos lat0) in longitude, the
whole turn when the disc reaches a pole [spherical trigonometry, analytic]) and classifies them by
their exact chord distance.  Every pixel counts with its solid angle in units of the grid's mean
pixel area, so disc and annulus means are area-weighted.
"""

from __future__ import annotations

import math

import numpy as np

from .healpix import _region_fractions

_CHUNK = 4096
_MAX_CANDIDATES = 1 << 22  # candidate pixels per numpy batch


def _column_coordinate(grid, lon_rad) -> np.ndarray:
    """Real-valued column coordinate in [0, period) of each longitude (radians)."""
    u = (np.degrees(lon_rad) - grid.lon0_deg) / grid.dlon_deg
    return np.mod(u, grid.period)


def _ranges(grid, vec, reach_rad):
    """Per position: first extended row, row count, first lattice column (unwrapped), column count."""
    ext = grid.extended_rows
    z0 = np.clip(vec[:, 2], -1.0, 1.0)
    lat0 = np.arcsin(z0)
    i_lo = np.searchsorted(ext["lat"], lat0 - reach_rad - 1e-12)
    i_hi = np.searchsorted(ext["lat"], lat0 + reach_rad + 1e-12, side="right")
    near_pole = np.abs(lat0) + reach_rad >= 0.5 * math.pi - 1e-12
    with np.errstate(invalid="ignore", divide="ignore"):
        half = np.where(near_pole, math.pi,
                        np.arcsin(np.minimum(1.0, np.sin(np.minimum(reach_rad, 0.5 * math.pi)) / np.cos(lat0))))
    hw = half / math.radians(abs(grid.dlon_deg))
    u0 = _column_coordinate(grid, np.arctan2(vec[:, 1], vec[:, 0]))
    c_lo = np.floor(u0 - hw).astype(np.int64) - 1
    n_c = np.floor(u0 + hw).astype(np.int64) + 1 - c_lo + 1
    whole = near_pole | (n_c >= grid.n_turn)
    c_lo = np.where(whole, 0, c_lo)
    n_c = np.where(whole, grid.n_turn, n_c)
    return i_lo, np.maximum(i_hi - i_lo, 0), c_lo, n_c


def candidates(grid, vec, reach_rad):
    """Pixels (real and virtual) within ``reach_rad`` (radians, one per position) of each position.

    Returns ext_row (index into ``grid.extended_rows``), column (lattice, [0, n_turn)), owner
    (position index) and the squared chord distance, each (n_candidates,).
    """
    ext = grid.extended_rows
    col_cos, col_sin = grid.lattice_columns
    reach_rad = np.asarray(reach_rad, dtype=np.float64)
    i_lo, n_r, c_lo, n_c = _ranges(grid, vec, reach_rad)
    count = n_r * n_c
    owner = np.repeat(np.arange(vec.shape[0]), count)
    k = np.arange(owner.size) - np.repeat(np.cumsum(count) - count, count)
    i = i_lo[owner] + k // n_c[owner]
    j = np.mod(c_lo[owner] + k % n_c[owner], grid.n_turn)
    s = ext["s"][i]
    d2 = (s * col_cos[j] - vec[owner, 0]) ** 2 + (s * col_sin[j] - vec[owner, 1]) ** 2 \
        + (ext["z"][i] - vec[owner, 2]) ** 2
    keep = d2 <= (2.0 * np.sin(0.5 * np.minimum(reach_rad, math.pi))) [owner] ** 2 + 1e-15
    return i[keep], j[keep], owner[keep], d2[keep]


def flat_index(grid, ext_row, column) -> np.ndarray:
    """Flat image index y nx + x of extended-row / lattice-column pairs; -1 for virtual pixels."""
    row = grid.extended_rows["row"][ext_row]
    return np.where((row >= 0) & (column < grid.nx), row * grid.nx + column, -1)


def disc_candidates(grid, vec, reach_rad, *, real_only=True):
    """Image pixels within ``reach_rad`` of each position: flat index, owner, squared chord distance."""
    i, j, owner, d2 = candidates(grid, vec, reach_rad)
    flat = flat_index(grid, i, j)
    keep = flat >= 0 if real_only else np.ones(flat.size, bool)
    return flat[keep], owner[keep], d2[keep]


def _half_ramp(grid) -> float:
    """Half-width (chord, radians) of the "fraction" ramp: half the mean pixel size."""
    return 0.5 * math.sqrt(grid.mean_area_sr)


def _edge_margin(grid) -> float:
    """A pixel whose centre is farther than this (chord) from an edge lies wholly on one side: the
    largest pixel diagonal of the grid."""
    height = np.arcsin(np.clip(grid.z_hi, -1, 1)) - np.arcsin(np.clip(grid.z_lo, -1, 1))
    return math.hypot(math.radians(abs(grid.dlon_deg)), float(np.max(np.abs(height))))


def _subsample_fractions(grid, ext_row, column, owner, vec, d2, c_in, c_out, level):
    """Fractions in disc and annulus from 4^level equal-area sub-pixel centres (uniform in longitude
    and in sin(latitude) across the pixel), computed for pixels near an edge only."""
    ext = grid.extended_rows
    edge = _edge_margin(grid)
    d = np.sqrt(d2)
    near = (np.abs(d - c_in) < edge) | (np.abs(d - c_out) < edge)
    fd = (d2 <= c_in ** 2).astype(np.float64)
    fo = (d2 <= c_out ** 2).astype(np.float64)
    n = 1 << level
    offs = (np.arange(n) + 0.5) / n
    du = np.repeat(offs - 0.5, n)          # column offsets of the n x n sub-pixels
    dz = np.tile(offs, n)                  # fractions of the row's sin(latitude) span
    idx = np.flatnonzero(near)
    per = max(1, (1 << 20) // (n * n))
    for c0 in range(0, idx.size, per):
        part = idx[c0:c0 + per]
        i, o = ext_row[part], owner[part]
        lon = np.radians(grid.lon0_deg + grid.dlon_deg * (column[part][:, None] + du[None, :]))
        z = ext["z_lo"][i][:, None] + (ext["z_hi"][i] - ext["z_lo"][i])[:, None] * dz[None, :]
        s = np.sqrt(np.maximum(0.0, 1.0 - z * z))
        cd2 = (s * np.cos(lon) - vec[o, 0][:, None]) ** 2 + (s * np.sin(lon) - vec[o, 1][:, None]) ** 2 \
            + (z - vec[o, 2][:, None]) ** 2
        fd[part] = (cd2 <= (c_in[part] ** 2)[:, None]).mean(axis=1)
        fo[part] = (cd2 <= (c_out[part] ** 2)[:, None]).mean(axis=1)
    return fd, fo - fd


def sums_direct(skymap, vec, c_in, c_out, weighting, level, progress):
    """(6, R, N) area-weighted region sums with numpy over each position's bounding box."""
    grid = skymap.grid
    ext = grid.extended_rows
    n, nr = vec.shape[0], c_in.shape[0]
    half = _half_ramp(grid)
    pad = {"centre": 0.0, "fraction": half, "subsample": _edge_margin(grid)}[weighting]
    reach_all = 2.0 * np.arcsin(np.minimum(1.0, 0.5 * (c_out.max(axis=0) + pad))) + 1e-12 if n else np.zeros(0)
    area_unit = ext["area"] / grid.mean_area_sr
    sums = np.zeros((6, nr, n))
    b0 = 0
    while b0 < n:
        b1 = _batch_end(grid, vec, reach_all, b0, n)
        i, j, owner, d2 = candidates(grid, vec[b0:b1], reach_all[b0:b1])
        flat = flat_index(grid, i, j)
        held = flat >= 0
        vals, w = skymap_lookup(skymap, flat, held)
        area = area_unit[i]
        wa = w * area
        wva = np.where(w > 0, vals, 0.0) * wa
        for r in range(nr):
            ci, co = c_in[r, b0:b1][owner], c_out[r, b0:b1][owner]
            if weighting == "subsample":
                fd, fa = _subsample_fractions(grid, i, j, owner, vec[b0:b1], d2, ci, co, level)
            else:
                fd, fa = _region_fractions(d2, ci ** 2, co ** 2, weighting, half)
            for k, f in enumerate((fd * area, fd * wa, fd * wva, fa * area, fa * wa, fa * wva)):
                sums[k, r, b0:b1] = np.bincount(owner, weights=f, minlength=b1 - b0)
        if progress is not None:
            progress(b1, n)
        b0 = b1
    return sums


def _batch_end(grid, vec, reach, b0, n) -> int:
    """End of a batch of positions from ``b0`` holding at most ~4e6 candidate pixels (at least one position)."""
    b1 = min(b0 + _CHUNK, n)
    _, n_r, _, n_c = _ranges(grid, vec[b0:b1], reach[b0:b1])
    total = np.cumsum(n_r * n_c)
    return b0 + max(1, int(np.searchsorted(total, _MAX_CANDIDATES, side="right")))


def skymap_lookup(skymap, flat, held):
    """Values and weights at flat indices (0 and weight 0 where ``held`` is False)."""
    vals, w = skymap.lookup(np.where(held, flat, 0))
    return np.where(held, vals, 0.0), np.where(held, w, np.float32(0.0)).astype(np.float64)


def sums_kernel(skymap, vec, c_in, c_out, weighting, progress):
    """(6, R, N) area-weighted region sums from the compiled row walk (no Python loop over positions)."""
    from ._car_kernels import aperture_sums

    grid = skymap.grid
    ext = grid.extended_rows
    col_cos, col_sin = grid.lattice_columns
    full = skymap.pixels is None
    held = np.zeros(0, np.int64) if full else skymap.pixels
    values = skymap.values if skymap.values.dtype in (np.float32, np.float64) else skymap.values.astype(np.float64)
    half = _half_ramp(grid) if weighting == "fraction" else 0.0
    n, nr = vec.shape[0], c_in.shape[0]
    # visit positions row by row, so neighbouring apertures read neighbouring memory
    row = np.searchsorted(ext["lat"], np.arcsin(np.clip(vec[:, 2], -1.0, 1.0)))
    col = np.floor(_column_coordinate(grid, np.arctan2(vec[:, 1], vec[:, 0]))).astype(np.int64)
    order = np.argsort(row * (grid.n_turn + 1) + col, kind="stable")
    vec_sorted = vec[order]
    area_unit = np.ascontiguousarray(ext["area"] / grid.mean_area_sr)
    sums = np.zeros((6, nr, n))
    for b0 in range(0, n, _CHUNK):
        b1 = min(b0 + _CHUNK, n)
        part = np.zeros((6, nr, b1 - b0))
        rows = order[b0:b1]
        aperture_sums(np.ascontiguousarray(vec_sorted[b0:b1]), np.ascontiguousarray(c_in[:, rows]),
                      np.ascontiguousarray(c_out[:, rows]), half, ext["lat"], ext["z"], ext["s"], area_unit,
                      ext["row"], math.radians(grid.lon0_deg), math.radians(grid.dlon_deg), grid.period,
                      grid.n_turn, grid.nx, col_cos, col_sin, held, full, values, skymap.weight, part)
        sums[:, :, rows] = part
        if progress is not None:
            progress(b1, n)
    return sums
