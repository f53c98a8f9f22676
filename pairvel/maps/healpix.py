"""HEALPix maps (Gorski et al. 2005, ApJ 622, 759): the first implementation of the sky-map interface.

A :class:`HealpixMap` holds either every pixel of the sphere (``pixels is None``, values in pixel
order) or only the pixels a partial map lists (``pixels`` sorted, int64), in RING or NESTED order,
so a few hundred square degrees at nside 2048 stay a few hundred thousand values.  UNSEEN and NaN
pixels get weight 0.  Files are read and written by :mod:`pairvel.maps.healpix_io`.

The geometry behind :class:`~pairvel.maps.skymap.SkyMap`'s methods, all HEALPix-specific:

* aperture sums: the compiled walk over the RING pixel rings (``_aperture_kernels.py``), or one
  ``healpy.query_disc`` per position plus numpy ("direct"); sub-pixels are NESTED children;
* random points: a random usable pixel, then a random one of its 4^10 NESTED children (equal areas);
* harmonic transforms: ``healpy.map2alm`` / ``alm2map`` on the full RING sphere for filtering, and
  ``ducc0.sht.synthesis`` on only the rings holding the held pixels for simulated skies;
* frames: ``healpy.Rotator``.
"""

from __future__ import annotations

__all__ = ["HealpixMap", "aperture_temperatures", "synthesise_pixels"]

import functools
import math
import os
from dataclasses import dataclass, field

import healpy as hp
import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import MapError
from .skymap import SkyMap, frame_letter

UNSEEN = hp.UNSEEN
_MAX_NSIDE = 1 << 29
_CHUNK = 4096               # positions per vectorised batch (and per progress call)
_SUBPIXEL_LEVELS = 10       # random points: uniform over 4^10 sub-pixels of the chosen pixel


def is_power_of_two(n: int) -> bool:
    """True for 1, 2, 4, ..., 2^29 (the nsides HEALPix allows)."""
    return 1 <= n <= _MAX_NSIDE and (n & (n - 1)) == 0


def bad_pixels(values: np.ndarray) -> np.ndarray:
    """True where a value is NaN, infinite or healpy's UNSEEN sentinel."""
    return ~np.isfinite(values) | (np.abs(values - UNSEEN) <= 1e-5 * abs(UNSEEN))


# ---------------------------------------------------------------------- validation of the fields
def _checked_frame(coordsys, what, path) -> str:
    frame = frame_letter(coordsys)
    if frame is None:
        raise MapError(f"{what}: coordsys must be C (equatorial), G (Galactic) or E (ecliptic); got "
                       f"{coordsys!r}", path=path, key="COORDSYS")
    return frame


def _checked_nside(nside, what, path) -> int:
    if isinstance(nside, bool) or not isinstance(nside, (int, np.integer)) or not is_power_of_two(int(nside)):
        raise MapError(f"{what}: nside must be a power of 2 between 1 and 2^29; got {nside!r}", path=path)
    return int(nside)


def _checked_values(values, what, path) -> np.ndarray:
    values = np.asarray(values)
    if values.ndim != 1 or values.dtype.kind not in "fiu":
        raise MapError(f"{what}: values must be a 1-D numeric array; got shape {values.shape} "
                       f"of {values.dtype}", path=path)
    return values if values.dtype.kind == "f" else values.astype(np.float64)


def _checked_pixels(pixels, n_values, nside, what, path) -> np.ndarray | None:
    npix = 12 * nside ** 2
    if pixels is None:
        if n_values != npix:
            raise MapError(f"{what}: a full-sky map at nside {nside} must have {npix} values; got {n_values}",
                           path=path)
        return None
    pixels = np.asarray(pixels)
    if pixels.ndim != 1 or pixels.dtype.kind not in "iu" or pixels.size != n_values:
        raise MapError(f"{what}: pixels must be a 1-D integer array as long as values ({n_values}); "
                       f"got shape {pixels.shape} of {pixels.dtype}", path=path)
    pixels = pixels.astype(np.int64, copy=False)
    if pixels.size and (pixels[0] < 0 or pixels[-1] >= npix or np.any(np.diff(pixels) <= 0)):
        raise MapError(f"{what}: pixels must be sorted, unique and in [0, {npix}) at nside "
                       f"{nside}; got range [{pixels.min()}, {pixels.max()}]", path=path)
    return pixels


def _checked_weight(weight, values, what, path) -> np.ndarray:
    """float32 weights in [0, 1], 0 at bad values; the caller's array is never modified."""
    bad = bad_pixels(values)
    if weight is None:
        weight = np.ones(values.size, dtype=np.float32)
    else:
        weight = np.asarray(weight)
        if weight.shape != values.shape:
            raise MapError(f"{what}: weight must have the shape of values {values.shape}; got {weight.shape}",
                           path=path)
        if weight.dtype != np.float32 or bad.any():
            weight = weight.astype(np.float32)  # a copy: the caller's array is left alone
        with np.errstate(invalid="ignore"):
            out_of_range = ~((weight >= 0) & (weight <= 1))
        if out_of_range.any():
            first = int(np.flatnonzero(out_of_range)[0])
            raise MapError(f"{what}: weight must lie in [0, 1]; {int(out_of_range.sum())} pixels do not "
                           f"(first: index {first}, weight={float(weight[first])})", path=path)
    if bad.any():
        weight[bad] = 0.0
    return weight


@dataclass(frozen=True, eq=False)
class HealpixMap(SkyMap):
    """A HEALPix map in uK_CMB (or a mask) on the full sphere or on the pixels a partial map holds.

    Parameters
    ----------
    nside : int
        HEALPix resolution, a power of 2.
    nest : bool
        True for NESTED pixel indices, False for RING.
    pixels : ndarray of shape (n_held,), int64, or None
        Sorted, unique pixel indices held (a partial map); None for a full-sky map, whose values
        are in pixel order.
    values : ndarray of shape (n_held,) or (12 nside^2,), uK_CMB
        Temperatures (float32 stays float32).  For a mask from :func:`~pairvel.maps.healpix_io.read_mask`,
        the mask values.
    weight : ndarray of the same shape, float32, optional
        Usable weight in [0, 1] (1 = usable, 0 = masked).  Default 1.  Pixels whose value is NaN,
        infinite or UNSEEN get weight 0 whatever is passed.
    path : str, optional
        File the map was read from, for messages and provenance.
    coordsys : str, default "C"
        Frame of the pixel grid: "C" equatorial, "G" Galactic or "E" ecliptic.

    Notes
    -----
    Photometry uses the weight as a per-pixel weight in its means, which for a binary mask is
    the same as leaving masked pixels out.  The arrays are not copied; do not modify them.
    """

    nside: int
    nest: bool
    pixels: np.ndarray | None
    values: np.ndarray
    weight: np.ndarray | None = None
    path: str | None = field(default=None)
    coordsys: str = "C"

    def __post_init__(self):
        what = "sky map" if self.path is None else f"map {self.path}"
        nside = _checked_nside(self.nside, what, self.path)
        values = _checked_values(self.values, what, self.path)
        object.__setattr__(self, "coordsys", _checked_frame(self.coordsys, what, self.path))
        object.__setattr__(self, "nside", nside)
        object.__setattr__(self, "nest", bool(self.nest))
        object.__setattr__(self, "pixels", _checked_pixels(self.pixels, values.size, nside, what, self.path))
        object.__setattr__(self, "weight", _checked_weight(self.weight, values, what, self.path))
        object.__setattr__(self, "values", values)

    @classmethod
    def from_array(cls, hpx_map, *, nest=False, path=None, coordsys="C") -> "HealpixMap":
        """Wrap a full-sky HEALPix array in uK (not copied); UNSEEN and NaN pixels get weight 0."""
        values = np.asarray(hpx_map)
        if values.ndim != 1 or not hp.isnpixok(values.size):
            raise MapError(f"hpx_map must be a 1-D full-sky HEALPix array of 12 nside^2 values; got shape "
                           f"{values.shape}", path=path)
        return cls(hp.npix2nside(values.size), bool(nest), None, values, path=path, coordsys=coordsys)

    # ------------------------------------------------------------------ HEALPix properties and look-ups
    @property
    def npix(self) -> int:
        """Pixels on the whole sphere, 12 nside^2."""
        return 12 * self.nside ** 2

    @property
    def is_partial(self) -> bool:
        return self.pixels is not None

    @property
    def n_held(self) -> int:
        """Number of pixels held (npix for a full-sky map)."""
        return int(self.values.size)

    @property
    def ordering(self) -> str:
        return "NESTED" if self.nest else "RING"

    def held_pixels(self) -> np.ndarray:
        """Indices (in this map's ordering) of the pixels held, (n_held,) int64."""
        return np.arange(self.npix, dtype=np.int64) if self.pixels is None else self.pixels

    def usable_pixels(self) -> np.ndarray:
        """Indices of the held pixels with weight > 0, (n_usable,) int64, sorted."""
        keep = self.weight > 0
        return np.flatnonzero(keep).astype(np.int64) if self.pixels is None else self.pixels[keep]

    def lookup(self, pix) -> tuple[np.ndarray, np.ndarray]:
        """Values and weights at pixel indices given in this map's ordering.

        Parameters
        ----------
        pix : array_like of int, any shape
            Pixel indices in [0, npix).

        Returns
        -------
        values : ndarray of pix's shape, the map's float dtype
            NaN where the map does not hold the pixel; meaningless where the weight is 0.
        weight : ndarray of pix's shape, float32
            0 for masked, bad and not-held pixels.
        """
        pix = np.asarray(pix, dtype=np.int64)
        if self.pixels is None:
            return self.values[pix], self.weight[pix]
        if self.pixels.size == 0:
            return np.full(pix.shape, np.nan, dtype=self.values.dtype), np.zeros(pix.shape, dtype=np.float32)
        idx = np.searchsorted(self.pixels, pix)
        np.minimum(idx, self.pixels.size - 1, out=idx)
        found = self.pixels[idx] == pix
        values = np.where(found, self.values[idx], np.nan).astype(self.values.dtype, copy=False)
        weight = np.where(found, self.weight[idx], np.float32(0.0))
        return values, weight

    def reordered(self, *, nest: bool) -> "HealpixMap":
        """The same map with pixel indices in the other ordering (self when already in ``nest``)."""
        if bool(nest) == self.nest:
            return self
        if self.pixels is None:
            new_index = np.arange(self.npix, dtype=np.int64)
            idx = hp.nest2ring(self.nside, new_index) if nest else hp.ring2nest(self.nside, new_index)  # old index
            return HealpixMap(self.nside, bool(nest), None, self.values[idx], self.weight[idx], path=self.path,
                              coordsys=self.coordsys)
        convert = hp.ring2nest if nest else hp.nest2ring
        new = convert(self.nside, self.pixels)
        order = np.argsort(new, kind="stable")
        return HealpixMap(self.nside, bool(nest), new[order], self.values[order], self.weight[order], path=self.path,
                          coordsys=self.coordsys)

    @functools.cached_property
    def _ring_copy(self) -> "HealpixMap":
        return self.reordered(nest=False)

    def _ring(self) -> "HealpixMap":
        """This map in RING order (the ring walk wants it); a NESTED map's copy is made once and kept."""
        return self._ring_copy if self.nest else self

    @functools.cached_property
    def _usable(self) -> np.ndarray:
        return self.usable_pixels()

    def _pixels_at(self, index) -> np.ndarray:
        """Pixel indices (this map's ordering) of held pixels ``index``."""
        index = np.asarray(index, dtype=np.int64)
        return index if self.pixels is None else self.pixels[index]

    def _ring_pixels_at(self, index) -> np.ndarray:
        pix = self._pixels_at(index)
        return hp.nest2ring(self.nside, pix) if self.nest else pix

    # ------------------------------------------------------------------ SkyMap: the grid
    @property
    def grid_label(self) -> str:
        return f"nside {self.nside}"

    @property
    def pixel_area_sr(self) -> float:
        """pi / (3 nside^2) sr, every pixel's."""
        return math.pi / (3.0 * self.nside ** 2)

    @property
    def band_limit(self) -> int:
        return 3 * self.nside - 1

    def same_grid(self, other) -> bool:
        return isinstance(other, HealpixMap) and other.nside == self.nside

    def usable_fraction(self) -> float:
        """Sum of the weights / (12 nside^2)."""
        return float(np.sum(self.weight, dtype=np.float64) / self.npix)

    def with_values(self, values, *, weight=None, path=None) -> "HealpixMap":
        return HealpixMap(self.nside, self.nest, self.pixels, values, self.weight if weight is None else weight,
                          path=self.path if path is None else path, coordsys=self.coordsys)

    def values_on(self, grid) -> tuple[np.ndarray, np.ndarray]:
        if grid is self:
            return self.values, self.weight
        self._check_grid(grid)
        mine = self.reordered(nest=grid.nest)
        if grid.pixels is None and mine.pixels is None:
            return mine.values, mine.weight  # full sky in the same ordering: no copy
        return mine.lookup(grid.held_pixels())

    def neighbour_values_on(self, grid, index) -> tuple[np.ndarray, np.ndarray]:
        self._check_grid(grid)
        nb = hp.get_all_neighbours(grid.nside, grid._pixels_at(index), nest=grid.nest)  # (8, n), -1 where none
        values, weight = self.reordered(nest=grid.nest).lookup(np.where(nb >= 0, nb, 0))
        return values, np.where(nb >= 0, weight, np.float32(0.0))

    # ------------------------------------------------------------------ SkyMap: positions
    def from_equatorial(self, ra_deg, dec_deg):
        return _rotated(ra_deg, dec_deg, ["C", self.coordsys])

    def to_equatorial(self, lon_deg, lat_deg):
        return _rotated(lon_deg, lat_deg, [self.coordsys, "C"])

    def pixel_vectors(self, index) -> np.ndarray:
        return np.column_stack(hp.pix2vec(self.nside, self._pixels_at(index), nest=self.nest))

    def pixel_lonlat(self, index):
        theta, phi = hp.pix2ang(self.nside, self._ring_pixels_at(index))
        return np.degrees(phi), 90.0 - np.degrees(theta)

    def random_points(self, n, rng):
        """A random usable pixel, then a random one of its NESTED children 2^10 times smaller in size."""
        usable = self._usable
        if usable.size == 0:
            raise MapError(f"map {self.path}: no usable pixel to draw random points in", path=self.path)
        levels = min(_SUBPIXEL_LEVELS, 29 - int(round(math.log2(self.nside))))
        pix = usable[rng.integers(0, usable.size, n)]
        nest_pix = pix if self.nest else hp.ring2nest(self.nside, pix)
        # HEALPix pixels have equal areas, and so do the 4^levels NESTED children of each one: a random
        # child centre is uniform within the pixel to 1/2^levels of its size.
        child = nest_pix * (4 ** levels) + rng.integers(0, 4 ** levels, n)
        return hp.pix2ang(self.nside * 2 ** levels, child, nest=True, lonlat=True)

    # ------------------------------------------------------------------ SkyMap: aperture photometry
    def aperture_sums(self, vectors, radius_rad, outer_radius_rad, *, weighting="centre", method="auto",
                      subsample_level=3, progress=None) -> np.ndarray:
        c2_in, c2_out = _chord2(radius_rad), _chord2(outer_radius_rad)
        if method == "kernel" or (method == "auto" and weighting != "subsample"):
            return _sums_kernel(self, vectors, c2_in, c2_out, weighting, progress)
        return _sums_direct(self, vectors, c2_in, c2_out, weighting, subsample_level, progress)

    # ------------------------------------------------------------------ SkyMap: harmonic space
    def filtered(self, transfer, *, n_iter=3) -> "HealpixMap":
        """healpy map2alm (``n_iter`` iterations, no pixel weights), almxfl, alm2map on the full RING sphere."""
        transfer = np.asarray(transfer, dtype=np.float64)
        lmax = transfer.size - 1
        alm = hp.map2alm(self._full_ring_array(), lmax=lmax, iter=n_iter, use_pixel_weights=False)
        hp.almxfl(alm, transfer, inplace=True)
        full = hp.alm2map(alm, self.nside, lmax=lmax)
        held_ring = self._ring_pixels_at(np.arange(self.n_held))
        return self.with_values(full[held_ring].astype(self.values.dtype, copy=False))

    def _full_ring_array(self) -> np.ndarray:
        """RING-ordered full-sky float64 array: usable values, the mean of the usable ones elsewhere."""
        usable = self.weight > 0
        vals = np.asarray(self.values, dtype=np.float64)
        mean = float(vals[usable].mean()) if usable.any() else 0.0
        full = np.full(self.npix, mean)
        full[self._ring_pixels_at(np.flatnonzero(usable))] = vals[usable]
        return full

    def pixel_window(self, lmax) -> np.ndarray:
        """Window of a disc of the pixel's area, 2 J1(l t) / (l t) (the tabulated HEALPix windows are
        downloads; this equal-area approximation is within a few per cent of them below the pixel
        scale [from memory])."""
        from scipy.special import j1

        t = math.sqrt(self.pixel_area_sr / math.pi)
        x = np.arange(lmax + 1) * t
        out = np.ones(lmax + 1)
        out[1:] = 2 * j1(x[1:]) / x[1:]
        return out

    def source_map(self, lon_deg, lat_deg, amplitude, *, fwhm_arcmin=None) -> "HealpixMap":
        """Full sky in RING order; Gaussian sources through :func:`pairvel.maps.sources.paint_beam_sources`."""
        values = np.zeros(self.npix)
        if fwhm_arcmin:
            from .sources import paint_beam_sources

            where, painted = paint_beam_sources(self.nside, np.asarray(lon_deg, float), np.asarray(lat_deg, float),
                                                np.asarray(amplitude, float), fwhm_arcmin)
            values[where] = painted
        else:
            np.add.at(values, hp.ang2pix(self.nside, lon_deg, lat_deg, lonlat=True), amplitude)
        return HealpixMap(self.nside, False, None, values, coordsys=self.coordsys)

    def aperture_support(self, lon_deg, lat_deg, radius_arcmin) -> "HealpixMap":
        """Partial RING map of the pixels one ``healpy.query_disc`` per position finds."""
        vec = hp.ang2vec(np.asarray(lon_deg, float), np.asarray(lat_deg, float), lonlat=True)
        r = np.broadcast_to(np.asarray(radius_arcmin, dtype=float) * ARCMIN_RAD, (len(vec),))
        chunks = [np.unique(np.concatenate([hp.query_disc(self.nside, v, float(r[i]))
                                            for i, v in enumerate(vec[a:a + _CHUNK], start=a)]))
                  for a in range(0, len(vec), _CHUNK)]
        pix = np.unique(np.concatenate(chunks)) if chunks else np.zeros(0, np.int64)
        return HealpixMap(self.nside, False, pix, np.zeros(pix.size), coordsys=self.coordsys)

    @functools.cached_property
    def _synthesis_geometry(self):
        return _ring_geometry(self.nside, self._ring_pixels_at(np.arange(self.n_held)))

    def synthesise(self, alm, *, lmax, n_threads=None) -> np.ndarray:
        """``ducc0.sht.synthesis`` on the rings that hold the held pixels only (see :func:`synthesise_pixels`)."""
        return synthesise_pixels(alm, self.nside, lmax, None, geometry=self._synthesis_geometry, n_threads=n_threads)

    def white_noise(self, level_uk_arcmin, rng) -> np.ndarray:
        sigma = level_uk_arcmin / math.sqrt(self.pixel_area_arcmin2)
        return sigma * rng.standard_normal(self.n_held)


# ---------------------------------------------------------------------- frames
def _rotated(lon_deg, lat_deg, frames):
    """Longitude and latitude (degrees) rotated between frame letters ``frames = [from, to]``; identity
    (the same arrays) when they are equal."""
    if frames[0] == frames[1]:
        return lon_deg, lat_deg
    lon, lat = hp.Rotator(coord=frames)(np.asarray(lon_deg, dtype=np.float64), np.asarray(lat_deg, dtype=np.float64),
                                        lonlat=True)
    return np.mod(lon, 360.0), np.clip(lat, -90.0, 90.0)


# ---------------------------------------------------------------------- aperture sums
def _chord2(angle_rad):
    """Squared chord length of an angle on the unit sphere: (2 sin(a/2))^2."""
    return (2.0 * np.sin(0.5 * np.asarray(angle_rad))) ** 2


def _half_ramp(nside: int) -> float:
    """Half-width (chord, radians) of the ramp of the "fraction" weighting: half the mean pixel size."""
    return 0.5 * math.sqrt(4.0 * math.pi / (12.0 * nside ** 2))


def _region_fractions(d2, c2_in, c2_out, weighting, half):
    """Fraction of each candidate pixel in the disc and in the annulus, for one radius (numpy path)."""
    if weighting == "centre":
        fd = (d2 <= c2_in).astype(np.float64)
        return fd, ((d2 > c2_in) & (d2 <= c2_out)).astype(np.float64)
    d = np.sqrt(d2)
    fd = np.clip((np.sqrt(c2_in) + half - d) / (2.0 * half), 0.0, 1.0)
    fo = np.clip((np.sqrt(c2_out) + half - d) / (2.0 * half), 0.0, 1.0)
    return fd, fo - fd


def _subsample_fractions(nside, pix_ring, vb, owner, d2, c2_in, c2_out, level):
    """Fractions in disc and annulus from 4^level sub-pixel centres, for pixels near an edge only."""
    edge_c = 2.0 * hp.max_pixrad(nside)  # a pixel whose centre is farther than this from an edge is whole
    d = np.sqrt(d2)
    near = (np.abs(d - np.sqrt(c2_in)) < edge_c) | (np.abs(d - np.sqrt(c2_out)) < edge_c)
    fd = (d2 <= c2_in).astype(np.float64)
    fo = (d2 <= c2_out).astype(np.float64)
    idx = np.flatnonzero(near)
    n_child = 4 ** level
    for c0 in range(0, idx.size, max(1, (1 << 21) // n_child)):
        part = idx[c0: c0 + max(1, (1 << 21) // n_child)]
        children = (hp.ring2nest(nside, pix_ring[part])[:, None] * n_child + np.arange(n_child)[None, :]).ravel()
        cx, cy, cz = hp.pix2vec(nside << level, children, nest=True)
        o = np.repeat(owner[part], n_child)
        cd2 = (cx - vb[o, 0]) ** 2 + (cy - vb[o, 1]) ** 2 + (cz - vb[o, 2]) ** 2
        fd[part] = (cd2 <= np.repeat(c2_in[part], n_child)).reshape(-1, n_child).mean(axis=1)
        fo[part] = (cd2 <= np.repeat(c2_out[part], n_child)).reshape(-1, n_child).mean(axis=1)
    return fd, fo - fd


def _disc_candidates(skymap, vb, r_query):
    """RING pixels within ``r_query`` of each position (one query_disc each), their owner, squared chord
    distance, and the map's values and weights there."""
    nside, m = skymap.nside, vb.shape[0]
    lists = [hp.query_disc(nside, vb[k], r_query, inclusive=False) for k in range(m)]
    lens = np.fromiter((p.size for p in lists), dtype=np.int64, count=m)
    pix_ring = np.concatenate(lists) if m else np.zeros(0, np.int64)
    owner = np.repeat(np.arange(m), lens)
    px, py, pz = hp.pix2vec(nside, pix_ring)
    d2 = (px - vb[owner, 0]) ** 2 + (py - vb[owner, 1]) ** 2 + (pz - vb[owner, 2]) ** 2
    vals, w = skymap.lookup(hp.ring2nest(nside, pix_ring) if skymap.nest else pix_ring)
    return pix_ring, owner, d2, vals, w.astype(np.float64)


def _sums_direct(skymap, vec, c2_in, c2_out, weighting, level, progress):
    """(6, R, N) region sums with one healpy.query_disc per position and numpy for the rest; c2_in, c2_out (R, N)."""
    n, nr = vec.shape[0], c2_in.shape[0]
    nside = skymap.nside
    half = _half_ramp(nside)
    pad = {"centre": 0.0, "fraction": half, "subsample": 2.0 * hp.max_pixrad(nside)}[weighting]
    r_query = min(math.pi, 2.0 * math.asin(min(1.0, 0.5 * (math.sqrt(float(c2_out.max())) + pad))) + 1e-12)
    sums = np.zeros((6, nr, n))
    chunk = _CHUNK if weighting != "subsample" else max(64, _CHUNK // 4 ** max(level - 1, 0))
    for b0 in range(0, n, chunk):
        b1 = min(b0 + chunk, n)
        vb = vec[b0:b1]
        pix_ring, owner, d2, vals, w = _disc_candidates(skymap, vb, r_query)
        wv = np.where(w > 0, vals, 0.0) * w
        for r in range(nr):
            ci, co = c2_in[r, b0:b1][owner], c2_out[r, b0:b1][owner]
            if weighting == "subsample":
                fd, fa = _subsample_fractions(nside, pix_ring, vb, owner, d2, ci, co, level)
            else:
                fd, fa = _region_fractions(d2, ci, co, weighting, half)
            for k, f in enumerate((fd, fd * w, fd * wv, fa, fa * w, fa * wv)):
                sums[k, r, b0:b1] = np.bincount(owner, weights=f, minlength=b1 - b0)
        if progress is not None:
            progress(b1, n)
    return sums


def _sums_kernel(skymap, vec, c2_in, c2_out, weighting, progress):
    """(6, R, N) region sums from the compiled ring walk (no Python loop over positions)."""
    from ._aperture_kernels import aperture_sums

    ring = skymap._ring()
    full = ring.pixels is None
    held = np.zeros(0, np.int64) if full else ring.pixels
    values = ring.values if ring.values.dtype in (np.float32, np.float64) else ring.values.astype(np.float64)
    half = _half_ramp(skymap.nside) if weighting == "fraction" else 0.0
    n, nr = vec.shape[0], c2_in.shape[0]
    # visit positions in RING pixel order of the map, so neighbouring apertures read neighbouring memory
    order = np.argsort(hp.vec2pix(skymap.nside, vec[:, 0], vec[:, 1], vec[:, 2]), kind="stable")
    vec_sorted = vec[order]
    sums = np.zeros((6, nr, n))
    for b0 in range(0, n, _CHUNK):
        b1 = min(b0 + _CHUNK, n)
        part = np.zeros((6, nr, b1 - b0))
        rows = order[b0:b1]
        aperture_sums(skymap.nside, np.ascontiguousarray(vec_sorted[b0:b1]), np.sqrt(c2_in[:, rows]),
                      np.sqrt(c2_out[:, rows]), half, held, full, values, ring.weight, part)
        sums[:, :, order[b0:b1]] = part
        if progress is not None:
            progress(b1, n)
    return sums


def aperture_temperatures(hpx_map, ra_deg, dec_deg, radius_arcmin, *, nest=False):
    """Compensated top-hat aperture temperatures on a full-sky HEALPix array.

    Parameters
    ----------
    hpx_map : ndarray of shape (12 nside^2,), uK
        Full-sky map; UNSEEN and NaN pixels are left out of the means.
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    radius_arcmin : float or sequence of float, arcmin
        Disc radius theta (annulus theta..sqrt(2) theta).
    nest : bool, default False
        Ordering of ``hpx_map``.

    Returns
    -------
    ndarray of shape (N,) for a scalar radius, (n_radii, N) for a sequence, uK
        NaN where the disc or the annulus holds no usable pixel.

    Examples
    --------
    >>> import numpy as np
    >>> m = np.full(12 * 256**2, 5.0)
    >>> float(aperture_temperatures(m, [10.0], [20.0], 30.0)[0])
    0.0
    """
    from .photometry import _check_positions, _check_radii, _measure

    skymap = HealpixMap.from_array(hpx_map, nest=nest)
    ra, dec = _check_positions(ra_deg, dec_deg)
    radii = _check_radii(radius_arcmin)
    res = _measure(skymap, ra, dec, radii, 1.0, None)
    return res.temperatures[0] if np.ndim(radius_arcmin) == 0 else res.temperatures


# ---------------------------------------------------------------------- synthesis on a few rings
def _ring_geometry(nside: int, pixels_ring: np.ndarray):
    """The HEALPix rings holding ``pixels_ring`` as a reduced ring geometry for ducc0, and each
    pixel's index in a map over those rings only."""
    import ducc0

    info = ducc0.healpix.Healpix_Base(nside, "RING").sht_info()
    start = info["ringstart"].astype(np.int64)
    ring = np.searchsorted(start, pixels_ring, side="right") - 1
    rings, inv = np.unique(ring, return_inverse=True)
    nphi = info["nphi"][rings].astype(np.int64)
    sub_start = np.concatenate([[0], np.cumsum(nphi)[:-1]]).astype(np.int64)
    where = sub_start[inv.ravel()] + (pixels_ring - start[ring])
    geom = {"theta": np.ascontiguousarray(info["theta"][rings]), "phi0": np.ascontiguousarray(info["phi0"][rings]),
            "nphi": nphi.astype(np.uintp), "ringstart": sub_start.astype(np.uintp)}
    return geom, where


def synthesise_pixels(alm, nside: int, lmax: int, pixels_ring, *, geometry=None, n_threads=None) -> np.ndarray:
    """The band-limited field sum a_lm Y_lm at HEALPix RING pixel centres.

    The synthesis runs on the rings that hold the pixels only (``ducc0.sht.synthesis`` on a reduced
    ring geometry: a ring's FFT is cheap, and the Legendre work scales with the number of rings),
    and equals ``healpy.alm2map(alm, nside)[pixels_ring]`` to rounding.

    Parameters
    ----------
    alm : ndarray of shape (nalm,), complex (healpy layout)
    nside, lmax : int
    pixels_ring : ndarray of int
    geometry : tuple, optional
        ``_ring_geometry(nside, pixels_ring)``, when it is reused (``pixels_ring`` is then ignored).
    n_threads : int, optional
        Default: all cores.
    """
    import ducc0

    geom, where = _ring_geometry(nside, np.asarray(pixels_ring, np.int64)) if geometry is None else geometry
    nthreads = int(n_threads or os.cpu_count() or 1)
    maps = ducc0.sht.synthesis(alm=np.asarray(alm)[None, :], lmax=int(lmax), spin=0, nthreads=nthreads, **geom)
    return maps[0][where]
