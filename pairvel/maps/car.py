"""Rectangular-pixel maps: the sky-map interface on a cylindrical WCS grid (CAR, CEA, MER, CYP).

A :class:`CarMap` is a FITS image whose columns follow longitude and whose rows follow latitude:
any cylindrical projection astropy.wcs describes with the native and celestial poles aligned
(CAR with CRVAL2 = 0, CEA, MER, ...).  Column x sits at longitude lon0 + dlon x (dlon constant);
row y at a latitude lat_y that may be unevenly spaced (CEA, MER).  :class:`CarGrid` derives these
from the WCS once, checks on a few pixels that the grid really separates, and gives every pixel
its true solid angle

    Omega_y = |dlon| |sin(lat_hi) - sin(lat_lo)|   (row edges lat_lo, lat_hi at y -/+ 1/2, within +-90 deg),

which changes with latitude (a CAR pixel near a pole is much smaller than one at the equator).
Aperture means are area-weighted (:meth:`CarMap.aperture_sums`); random points are uniform on the
sphere.  The map holds every pixel of its grid (``pixels is None``) or a listed subset (a support
for simulated skies); NaN pixels get weight 0.  Files: :mod:`pairvel.maps.car_io`.

For the aperture sums the grid is extended, for counting only, by virtual pixels beyond its edges
(the rest of each row around the sphere, and rows up to 15 degrees beyond the first and last
ones): an aperture that runs off a partial map then has the missing part counted as not held,
exactly as for a partial HEALPix map, and is dropped by the masked-fraction cut.
"""

from __future__ import annotations

__all__ = ["CarMap", "CarGrid", "box_wcs", "CYLINDRICAL"]

import functools
import math
from dataclasses import dataclass, field

import numpy as np
from astropy.wcs import WCS

from ..core.constants import ARCMIN_RAD
from ..core.errors import MapError
from ..core.sphere import unit_vectors
from .healpix import _chord2, _region_fractions, _rotated, _checked_values, _checked_weight
from .skymap import SkyMap, frame_letter

#: Cylindrical projections of the FITS WCS standard (Calabretta & Greisen 2002, section 5.2).
CYLINDRICAL = ("CAR", "CEA", "MER", "CYP")
_FRAME_OF_CTYPE = {"RA": "C", "GLON": "G", "ELON": "E"}
_LAT_OF_LON = {"RA": "DEC", "GLON": "GLAT", "ELON": "ELAT"}
_EQUATORIAL_SYSTEMS = ("", "ICRS", "FK5")
_TOL_DEG = 1e-7           # separability and linearity tolerance, degrees
_VIRTUAL_REACH_DEG = 15.0  # virtual rows beyond the grid: more than the largest outer radius (sqrt 2 x 10 deg)
_CHUNK = 4096


# ---------------------------------------------------------------------- the grid
@dataclass(frozen=True, eq=False)
class CarGrid:
    """Geometry of a separable cylindrical pixel grid, from its WCS.

    Attributes
    ----------
    ny, nx : int
        Rows and columns.
    lon0_deg, dlon_deg : float
        Longitude of column 0 and the (signed) step between columns, degrees.
    lat_deg : ndarray of shape (ny,)
        Latitude of each row's centres, strictly monotonic.
    z_lo, z_hi : ndarray of shape (ny,)
        sin(latitude) of each row's lower and upper edge (edges clipped to +-90 deg).
    row_area_sr : ndarray of shape (ny,)
        Solid angle of one pixel of each row, |dlon| (z_hi - z_lo).
    frame : {"C", "G", "E"}
    projection : str
        Three-letter WCS projection code.
    wcs : astropy.wcs.WCS
    x_ref : float
        A column the WCS places on the sky, where row latitudes are evaluated.
    """

    ny: int
    nx: int
    lon0_deg: float
    dlon_deg: float
    lat_deg: np.ndarray
    z_lo: np.ndarray
    z_hi: np.ndarray
    row_area_sr: np.ndarray
    frame: str
    projection: str
    wcs: WCS = field(repr=False)
    x_ref: float = 0.0

    @property
    def period(self) -> float:
        """Columns in a full turn of 360 degrees (not necessarily an integer)."""
        return 360.0 / abs(self.dlon_deg)

    @property
    def wraps(self) -> bool:
        """True when the columns go all the way round (nx |dlon| = 360 deg)."""
        return abs(self.nx - self.period) < 1e-6 * self.period

    @property
    def n_turn(self) -> int:
        """Columns of the lattice around the sphere, real and virtual (nx when the grid wraps)."""
        return self.nx if self.wraps else max(self.nx, int(round(self.period)))

    @functools.cached_property
    def mean_area_sr(self) -> float:
        return float(np.mean(self.row_area_sr))

    def column_lon_deg(self, x) -> np.ndarray:
        return np.mod(self.lon0_deg + self.dlon_deg * np.asarray(x, dtype=np.float64), 360.0)

    def matches(self, other: "CarGrid") -> bool:
        return (self.ny == other.ny and self.nx == other.nx and abs(self.dlon_deg - other.dlon_deg) < _TOL_DEG
                and abs(((self.lon0_deg - other.lon0_deg) + 180.0) % 360.0 - 180.0) < _TOL_DEG
                and bool(np.allclose(self.lat_deg, other.lat_deg, rtol=0.0, atol=_TOL_DEG)))

    def pixel_of(self, lon_deg, lat_deg) -> np.ndarray:
        """Flat index y nx + x of the pixel holding each direction (this frame), -1 outside the grid."""
        lon = np.asarray(lon_deg, dtype=np.float64)
        z = np.sin(np.radians(np.asarray(lat_deg, dtype=np.float64)))
        lo = np.minimum(self.z_lo, self.z_hi)
        order = np.argsort(lo)
        k = np.searchsorted(lo[order], z, side="right") - 1
        y = order[np.clip(k, 0, self.ny - 1)]
        inside_row = (k >= 0) & (z <= np.maximum(self.z_lo, self.z_hi)[y] + 1e-15)
        u = np.mod((lon - self.lon0_deg) / self.dlon_deg + 0.5, self.period)
        x = np.floor(u).astype(np.int64)
        ok = inside_row & (x < self.nx)
        return np.where(ok, y * self.nx + np.minimum(x, self.nx - 1), -1)

    @functools.cached_property
    def extended_rows(self) -> dict:
        """Rows sorted by latitude, the grid's and virtual ones up to 15 deg beyond, for the aperture walk.

        Keys: ``lat`` (radians, ascending), ``z``, ``s`` (sin, cos of it), ``z_lo``, ``z_hi``,
        ``area`` (sr), ``row`` (grid row, -1 for a virtual row).
        """
        parts = [(self.lat_deg, self.z_lo, self.z_hi, np.arange(self.ny))]
        for side in (-1, 1):
            v_lat, v_lo, v_hi = _virtual_rows(self, side)
            parts.append((v_lat, v_lo, v_hi, np.full(v_lat.size, -1)))
        lat = np.concatenate([p[0] for p in parts])
        zl = np.concatenate([np.minimum(p[1], p[2]) for p in parts])
        zh = np.concatenate([np.maximum(p[1], p[2]) for p in parts])
        row = np.concatenate([p[3] for p in parts]).astype(np.int64)
        order = np.argsort(lat, kind="stable")
        lat_r = np.radians(lat[order])
        return {"lat": np.ascontiguousarray(lat_r), "z": np.sin(lat_r), "s": np.cos(lat_r),
                "z_lo": zl[order], "z_hi": zh[order], "area": math.radians(abs(self.dlon_deg)) * (zh - zl)[order],
                "row": row[order]}

    @functools.cached_property
    def lattice_columns(self) -> tuple[np.ndarray, np.ndarray]:
        """cos and sin of the longitude of every lattice column around the sphere, (n_turn,) each."""
        lon = np.radians(self.lon0_deg + self.dlon_deg * np.arange(self.n_turn))
        return np.cos(lon), np.sin(lon)


def _world(wcs, x, y):
    """(lon, lat) degrees at 0-based pixel coordinates; NaN where the projection has no sky."""
    with np.errstate(invalid="ignore"):
        lon, lat = wcs.wcs_pix2world(np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64), 0)
    return np.asarray(lon, dtype=np.float64), np.asarray(lat, dtype=np.float64)


def _row_latitudes(wcs, y, x_ref) -> np.ndarray:
    return _world(wcs, np.full(np.shape(y), x_ref, dtype=np.float64), y)[1]


def _edges_z(wcs, y_edges, x_ref, row_lat) -> np.ndarray:
    """sin(latitude) at the row edges ``y_edges`` of rows at ``row_lat``; an edge beyond a pole (NaN) is that pole."""
    lat = _row_latitudes(wcs, y_edges, x_ref)
    z = np.sin(np.radians(np.clip(lat, -90.0, 90.0)))
    bad = ~np.isfinite(lat)
    z[bad] = np.sign(np.asarray(row_lat, dtype=np.float64)[bad])
    return z


def _virtual_rows(grid: CarGrid, side: int):
    """Virtual rows beyond the first (side -1) or last (side +1) row, up to 15 deg or a pole."""
    if grid.ny < 2:
        return np.zeros(0), np.zeros(0), np.zeros(0)
    step = abs(grid.lat_deg[-1] - grid.lat_deg[-2]) if side > 0 else abs(grid.lat_deg[1] - grid.lat_deg[0])
    k = int(min(math.ceil(_VIRTUAL_REACH_DEG / max(step, 1e-9)) + 1, 200_000))
    y = (grid.ny - 1 + np.arange(1, k + 1)) if side > 0 else -np.arange(1, k + 1, dtype=np.float64)
    lat = _row_latitudes(grid.wcs, y, grid.x_ref)
    edge_lat = grid.lat_deg[-1] if side > 0 else grid.lat_deg[0]
    ascending = grid.lat_deg[-1] > grid.lat_deg[0]
    outward = 1.0 if (side > 0) == ascending else -1.0
    ok = np.isfinite(lat) & (np.abs(lat) < 90.0) & ((lat - edge_lat) * outward > 0) \
        & (np.abs(lat - edge_lat) <= _VIRTUAL_REACH_DEG)
    # keep the unbroken run next to the grid
    stop = int(np.argmin(ok)) if not ok.all() else ok.size
    y, lat = y[:stop], lat[:stop]
    z_a = _edges_z(grid.wcs, y - 0.5, grid.x_ref, lat)
    z_b = _edges_z(grid.wcs, y + 0.5, grid.x_ref, lat)
    return lat, z_a, z_b


def car_grid(wcs, shape, what="map", path=None) -> CarGrid:
    """The :class:`CarGrid` of an image of ``shape`` (ny, nx) with a 2-D celestial ``wcs``.

    Raises :class:`MapError` naming the keyword for anything but a separable cylindrical grid.
    """
    if not isinstance(wcs, WCS):
        raise MapError(f"{what}: wcs must be an astropy.wcs.WCS; got {type(wcs).__name__}", path=path)
    try:
        ny, nx = (int(n) for n in shape)
    except (TypeError, ValueError):
        raise MapError(f"{what}: shape must be (ny, nx); got {shape!r}", path=path, key="NAXIS") from None
    if ny < 1 or nx < 1:
        raise MapError(f"{what}: the image must have at least one row and one column; got shape ({ny}, {nx})",
                       path=path, key="NAXIS")
    if wcs.naxis != 2 or not wcs.has_celestial:
        raise MapError(f"{what}: the image needs a 2-D celestial WCS (CTYPE1/CTYPE2 such as RA---CAR / DEC--CAR); "
                       f"got CTYPE {list(wcs.wcs.ctype)}", path=path, key="CTYPE1")
    ctype = [str(c).upper() for c in wcs.wcs.ctype]
    lon_name = ctype[0].split("-")[0]
    if wcs.wcs.lng != 0 or wcs.wcs.lat != 1 or lon_name not in _FRAME_OF_CTYPE \
            or ctype[1].split("-")[0] != _LAT_OF_LON[lon_name]:
        raise MapError(f"{what}: columns must follow longitude and rows latitude (CTYPE1 RA/GLON/ELON, CTYPE2 "
                       f"DEC/GLAT/ELAT); got CTYPE1 = {ctype[0]!r}, CTYPE2 = {ctype[1]!r}", path=path, key="CTYPE1")
    projection = ctype[0][5:8] if len(ctype[0]) >= 8 else ""
    if projection not in CYLINDRICAL or ctype[1][5:8] != projection:
        raise MapError(f"{what}: projection {projection or ctype[0]!r} is not cylindrical; pairvel reads "
                       f"{', '.join(CYLINDRICAL)} grids (or HEALPix)", path=path, key="CTYPE1")
    frame = _FRAME_OF_CTYPE[lon_name]
    radesys = str(wcs.wcs.radesys or "").strip().upper()
    if frame == "C" and radesys not in _EQUATORIAL_SYSTEMS:
        raise MapError(f"{what}: RADESYS must be ICRS or FK5 (J2000); got {radesys!r}", path=path, key="RADESYS")
    y_ref = 0.5 * (ny - 1)
    lon_cols = _world(wcs, np.arange(nx), np.full(nx, y_ref))[0]
    # WCSLIB gives no sky beyond native longitude +-180 deg; such columns repeat the turn (x is linear in
    # longitude on a cylinder), so the step comes from the columns it does place
    placed = np.flatnonzero(np.isfinite(lon_cols))
    if placed.size < min(nx, 2):
        raise MapError(f"{what}: its columns lie off the sky; check CRPIX1/CDELT1", path=path, key="CRPIX1")
    x_ref = float(placed[np.argmin(np.abs(placed - 0.5 * (nx - 1)))])
    lat = _row_latitudes(wcs, np.arange(ny), x_ref)
    if not (np.all(np.isfinite(lat)) and np.all(np.abs(lat) <= 90.0 + 1e-9)):
        first = int(np.flatnonzero(~(np.isfinite(lat) & (np.abs(lat) <= 90.0 + 1e-9)))[0])
        raise MapError(f"{what}: row {first} lies off the sky (beyond a pole); check CRPIX2/CDELT2", path=path,
                       key="CRPIX2")
    _check_separable(wcs, lon_cols, lat, placed, ny, what, path)
    lon0, dlon = _linear_longitudes(lon_cols, placed, what, path)
    if ny > 1 and not (np.all(np.diff(lat) > 0) or np.all(np.diff(lat) < 0)):
        raise MapError(f"{what}: row latitudes must change monotonically; check CDELT2/PC2_2", path=path, key="CDELT2")
    if nx * abs(dlon) > 360.0 * (1.0 + 1e-6):
        raise MapError(f"{what}: {nx} columns of {abs(dlon):g} deg cover more than 360 deg; check CDELT1 and NAXIS1",
                       path=path, key="NAXIS1")
    y = np.arange(ny, dtype=np.float64)
    z_a, z_b = _edges_z(wcs, y - 0.5, x_ref, lat), _edges_z(wcs, y + 0.5, x_ref, lat)
    area = math.radians(abs(dlon)) * np.abs(z_b - z_a)
    return CarGrid(ny, nx, lon0, dlon, lat, z_a, z_b, area, frame, projection, wcs, x_ref)


def _check_separable(wcs, lon_cols, lat, placed, ny, what, path):
    """Longitude must depend on the column only and latitude on the row only (checked on 25 pixels of
    the columns WCSLIB places)."""
    xs = np.unique(np.linspace(placed[0], placed[-1], 5).round().astype(int))
    ys = np.unique(np.linspace(0, ny - 1, 5).round().astype(int))
    gx, gy = np.meshgrid(xs, ys)
    lon, la = _world(wcs, gx.ravel(), gy.ravel())
    dlon = np.abs((lon - lon_cols[gx.ravel()] + 180.0) % 360.0 - 180.0)
    pole = np.abs(la) >= 90.0 - 1e-9  # longitude is arbitrary at a pole
    bad = ~np.isfinite(lon) | ~np.isfinite(la) | (np.abs(la - lat[gy.ravel()]) > _TOL_DEG) \
        | ((dlon > _TOL_DEG) & ~pole)
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise MapError(f"{what}: the grid is not separable (longitude must follow columns and latitude rows; pixel "
                       f"({int(gx.ravel()[k])}, {int(gy.ravel()[k])}) is off by up to {float(np.nanmax(dlon)):.3g} deg "
                       f"in longitude): an oblique projection (CRVAL2 = {wcs.wcs.crval[1]:g}, LONPOLE "
                       f"{wcs.wcs.lonpole:g}) or a rotated PC matrix; reproject to CRVAL2 = 0", path=path, key="CRVAL2")


def _linear_longitudes(lon_cols, placed, what, path) -> tuple[float, float]:
    """(longitude of column 0, step), degrees, from the placed columns, which must be evenly spaced."""
    if lon_cols.size == 1:
        raise MapError(f"{what}: a grid of one column has no longitude step; NAXIS1 must be >= 2", path=path,
                       key="NAXIS1")
    if np.any(np.diff(placed) != 1):
        raise MapError(f"{what}: WCSLIB places columns {placed[0]}..{placed[-1]} with gaps; not a cylindrical grid",
                       path=path, key="CTYPE1")
    unwrapped = np.degrees(np.unwrap(np.radians(lon_cols[placed])))
    dlon = float((unwrapped[-1] - unwrapped[0]) / max(placed[-1] - placed[0], 1))
    resid = unwrapped - (unwrapped[0] + dlon * (placed - placed[0]))
    if dlon == 0.0 or np.max(np.abs(resid)) > max(_TOL_DEG, 1e-6 * abs(dlon)):
        raise MapError(f"{what}: column longitudes are not evenly spaced (off by up to {np.max(np.abs(resid)):.3g} "
                       f"deg); check CDELT1 and the projection", path=path, key="CDELT1")
    return float((unwrapped[0] - dlon * placed[0]) % 360.0), dlon


def box_wcs(lon_range_deg, lat_range_deg, pixel_arcmin, *, frame="C", projection="CAR") -> tuple[WCS, tuple[int, int]]:
    """A CAR (or CEA) WCS and image shape (ny, nx) covering a longitude-latitude box.

    Parameters
    ----------
    lon_range_deg : (lo, hi)
        Longitudes, degrees; ``hi - lo`` at most 360 (e.g. (-20, 40) crosses 0; (0, 360) is the
        full turn, which then wraps).  Column 0 is at the high end (longitude grows to the left).
    lat_range_deg : (lo, hi)
        Latitudes in [-90, 90].  For CAR, rows are centred half a pixel inside the edges.
    pixel_arcmin : float
        Column step (and, for CAR, row step) in arcmin.
    frame : {"C", "G", "E"}
    projection : {"CAR", "CEA"}
        CEA rows are equal in sin(latitude) (equal-area pixels, lambda = 1).
    """
    lon_lo, lon_hi = (float(v) for v in lon_range_deg)
    lat_lo, lat_hi = (float(v) for v in lat_range_deg)
    d = float(pixel_arcmin) / 60.0
    if not (0 < lon_hi - lon_lo <= 360.0 and -90.0 <= lat_lo < lat_hi <= 90.0 and d > 0):
        raise MapError(f"box_wcs: need 0 < lon span <= 360, -90 <= lat_lo < lat_hi <= 90 and a positive pixel; got "
                       f"{lon_range_deg}, {lat_range_deg}, {pixel_arcmin}")
    letter = frame_letter(frame)
    names = {"C": ("RA", "DEC"), "G": ("GLON", "GLAT"), "E": ("ELON", "ELAT")}[letter]
    nx = max(2, int(round((lon_hi - lon_lo) / d)))
    w = WCS(naxis=2)
    w.wcs.ctype = [f"{names[0]:-<5}{projection}", f"{names[1]:-<5}{projection}"]
    dx = (lon_hi - lon_lo) / nx
    w.wcs.crval = [0.5 * (lon_lo + lon_hi) % 360.0, 0.0]
    w.wcs.crpix = [0.5 * nx + 0.5, 0.0]
    if projection == "CAR":
        ny = max(1, int(round((lat_hi - lat_lo) / d)))
        dy = (lat_hi - lat_lo) / ny
        w.wcs.cdelt = [-dx, dy]
        w.wcs.crpix[1] = 1.0 - (lat_lo + 0.5 * dy) / dy  # row 0 centred at lat_lo + dy / 2
    elif projection == "CEA":
        # y = (180/pi) sin(lat) / lambda with lambda = 1; rows of equal height in sin(lat)
        s_lo, s_hi = (math.degrees(math.sin(math.radians(v))) for v in (lat_lo, lat_hi))
        ny = max(1, int(round((s_hi - s_lo) / d)))
        dy = (s_hi - s_lo) / ny
        w.wcs.cdelt = [-dx, dy]
        w.wcs.crpix[1] = 1.0 - (s_lo + 0.5 * dy) / dy
        w.wcs.set_pv([(2, 1, 1.0)])
    else:
        raise MapError(f"box_wcs: projection must be CAR or CEA; got {projection!r}")
    if letter == "C":
        w.wcs.radesys = "ICRS"
    w.wcs.set()
    return w, (ny, nx)


# ---------------------------------------------------------------------- the map
@dataclass(frozen=True, eq=False)
class CarMap(SkyMap):
    """A map in uK_CMB (or a mask) on a separable cylindrical pixel grid.

    Parameters
    ----------
    wcs : astropy.wcs.WCS
        2-D celestial WCS of the image (CTYPE RA/DEC, GLON/GLAT or ELON/ELAT; CAR, CEA, MER, CYP).
    shape : (ny, nx)
        Image shape: rows (latitude) by columns (longitude).
    pixels : ndarray of shape (n_held,), int64, or None
        Sorted flat indices y nx + x of the held pixels; None for every pixel of the image, whose
        values are then the image in row-major order.
    values : ndarray of shape (n_held,), uK_CMB
    weight : ndarray of the same shape, float32, optional
        Usable weight in [0, 1]; default 1; NaN and infinite values get 0 whatever is passed.
    path : str, optional
    coordsys : str, optional
        Frame letter; default (and checked against) the WCS's (RA/DEC: C, GLON/GLAT: G, ELON/ELAT: E).
    plane_note : str, optional
        Which plane of a several-plane file the values come from, for the run log.
    """

    wcs: WCS
    shape: tuple
    pixels: np.ndarray | None
    values: np.ndarray
    weight: np.ndarray | None = None
    path: str | None = field(default=None)
    coordsys: str | None = None
    plane_note: str | None = None

    def __post_init__(self):
        what = "sky map" if self.path is None else f"map {self.path}"
        grid = car_grid(self.wcs, self.shape, what, self.path)
        if self.coordsys is not None and frame_letter(self.coordsys) != grid.frame:
            raise MapError(f"{what}: coordsys {self.coordsys!r} contradicts the WCS frame {grid.frame} "
                           f"(CTYPE1 = {self.wcs.wcs.ctype[0]!r})", path=self.path, key="CTYPE1")
        values = _checked_values(self.values, what, self.path)
        npix = grid.ny * grid.nx
        pixels = self.pixels
        if pixels is None:
            if values.size != npix:
                raise MapError(f"{what}: an image of shape ({grid.ny}, {grid.nx}) needs {npix} values; got "
                               f"{values.size}", path=self.path, key="NAXIS")
        else:
            pixels = np.asarray(pixels)
            if pixels.ndim != 1 or pixels.dtype.kind not in "iu" or pixels.size != values.size:
                raise MapError(f"{what}: pixels must be a 1-D integer array as long as values ({values.size})",
                               path=self.path)
            pixels = pixels.astype(np.int64, copy=False)
            if pixels.size and (pixels[0] < 0 or pixels[-1] >= npix or np.any(np.diff(pixels) <= 0)):
                raise MapError(f"{what}: pixels must be sorted, unique and in [0, {npix})", path=self.path)
        object.__setattr__(self, "shape", (grid.ny, grid.nx))
        object.__setattr__(self, "pixels", pixels)
        object.__setattr__(self, "coordsys", grid.frame)
        object.__setattr__(self, "weight", _checked_weight(self.weight, values, what, self.path))
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "grid", grid)

    grid: CarGrid = field(init=False, repr=False, default=None)

    @classmethod
    def from_image(cls, image, wcs, *, weight=None, path=None, plane_note=None) -> "CarMap":
        """Wrap a 2-D image (ny, nx) in uK on ``wcs`` (flattened row-major; not copied when contiguous)."""
        image = np.asarray(image)
        if image.ndim != 2:
            raise MapError(f"image must be 2-D (ny, nx); got shape {image.shape}", path=path, key="NAXIS")
        w = None if weight is None else np.asarray(weight).reshape(-1)
        return cls(wcs, image.shape, None, image.reshape(-1), w, path=path, plane_note=plane_note)

    # ------------------------------------------------------------------ look-ups
    @property
    def n_held(self) -> int:
        return int(self.values.size)

    def held_pixels(self) -> np.ndarray:
        """Flat indices y nx + x of the held pixels, (n_held,) int64."""
        g = self.grid
        return np.arange(g.ny * g.nx, dtype=np.int64) if self.pixels is None else self.pixels

    def _flat(self, index) -> np.ndarray:
        index = np.asarray(index, dtype=np.int64)
        return index if self.pixels is None else self.pixels[index]

    def lookup(self, flat) -> tuple[np.ndarray, np.ndarray]:
        """Values and weights at flat pixel indices (NaN and 0 where the map does not hold the pixel)."""
        flat = np.asarray(flat, dtype=np.int64)
        if self.pixels is None:
            return self.values[flat], self.weight[flat]
        if self.pixels.size == 0:
            return np.full(flat.shape, np.nan, dtype=self.values.dtype), np.zeros(flat.shape, dtype=np.float32)
        idx = np.minimum(np.searchsorted(self.pixels, flat), self.pixels.size - 1)
        found = self.pixels[idx] == flat
        return (np.where(found, self.values[idx], np.nan).astype(self.values.dtype, copy=False),
                np.where(found, self.weight[idx], np.float32(0.0)))

    @functools.cached_property
    def _full_arrays(self) -> tuple[np.ndarray, np.ndarray]:
        """Values and weights over the whole image (0 and weight 0 at pixels not held), contiguous."""
        values = self.values if self.values.dtype in (np.float32, np.float64) else self.values.astype(np.float64)
        if self.pixels is None:
            return np.ascontiguousarray(values), np.ascontiguousarray(self.weight)
        g = self.grid
        full_v = np.zeros(g.ny * g.nx, dtype=values.dtype)
        full_w = np.zeros(g.ny * g.nx, dtype=np.float32)
        full_v[self.pixels] = np.where(self.weight > 0, values, 0)
        full_w[self.pixels] = self.weight
        return full_v, full_w

    def _held_rows(self, index=None) -> np.ndarray:
        """Grid row of held pixels ``index`` (default all)."""
        index = np.arange(self.n_held) if index is None else index
        return self._flat(index) // self.grid.nx

    def _row_sums(self, per_pixel) -> np.ndarray:
        """Sums over each grid row of a per-held-pixel array, (ny,) float64."""
        g = self.grid
        if self.pixels is None:
            return np.sum(np.reshape(per_pixel, (g.ny, g.nx)), axis=1, dtype=np.float64)
        return np.bincount(self.pixels // g.nx, weights=per_pixel, minlength=g.ny)

    # ------------------------------------------------------------------ SkyMap: the grid
    @property
    def grid_label(self) -> str:
        g = self.grid
        return f"{g.projection} grid {g.ny}x{g.nx} ({abs(g.dlon_deg) * 60.0:.3g}' columns)"

    @property
    def pixel_area_sr(self) -> float:
        """Mean solid angle of the grid's pixels, sr (each row's differs; see ``grid.row_area_sr``)."""
        return self.grid.mean_area_sr

    @property
    def band_limit(self) -> int:
        """Azimuthal Nyquist limit of the columns, 180 deg / |dlon| - 1."""
        return max(1, int(180.0 / abs(self.grid.dlon_deg)) - 1)

    def same_grid(self, other) -> bool:
        return isinstance(other, CarMap) and self.grid.matches(other.grid)

    def usable_fraction(self) -> float:
        return float(self._row_sums(self.weight) @ self.grid.row_area_sr / (4.0 * math.pi))

    def with_values(self, values, *, weight=None, path=None) -> "CarMap":
        return CarMap(self.wcs, self.shape, self.pixels, values, self.weight if weight is None else weight,
                      path=self.path if path is None else path, plane_note=self.plane_note)

    def values_on(self, grid) -> tuple[np.ndarray, np.ndarray]:
        if grid is self:
            return self.values, self.weight
        self._check_grid(grid)
        if grid.pixels is None and self.pixels is None:
            return self.values, self.weight
        return self.lookup(grid.held_pixels())

    def neighbour_values_on(self, grid, index) -> tuple[np.ndarray, np.ndarray]:
        self._check_grid(grid)
        g = self.grid
        y, x = np.divmod(grid._flat(index), g.nx)
        values, weights = [], []
        for dy in (-1, 0, 1):
            for dx in (-1, 0, 1):
                if dy == 0 and dx == 0:
                    continue
                ny_, nx_ = y + dy, x + dx
                if g.wraps:
                    nx_ = np.mod(nx_, g.nx)
                ok = (ny_ >= 0) & (ny_ < g.ny) & (nx_ >= 0) & (nx_ < g.nx)
                v, w = self.lookup(np.where(ok, ny_ * g.nx + nx_, 0))
                values.append(v)
                weights.append(np.where(ok, w, np.float32(0.0)))
        return np.stack(values), np.stack(weights)

    # ------------------------------------------------------------------ SkyMap: positions
    def from_equatorial(self, ra_deg, dec_deg):
        return _rotated(ra_deg, dec_deg, ["C", self.coordsys])

    def to_equatorial(self, lon_deg, lat_deg):
        return _rotated(lon_deg, lat_deg, [self.coordsys, "C"])

    def pixel_lonlat(self, index):
        y, x = np.divmod(self._flat(index), self.grid.nx)
        return self.grid.column_lon_deg(x), self.grid.lat_deg[y]

    def pixel_vectors(self, index) -> np.ndarray:
        return unit_vectors(*self.pixel_lonlat(index))

    @functools.cached_property
    def _usable_by_row(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Usable held pixels (row-major), the first of each row among them, and the cumulative usable
        area of the rows."""
        usable = np.flatnonzero(self.weight > 0)
        counts = np.bincount(self._held_rows(usable), minlength=self.grid.ny)
        return usable, np.cumsum(counts) - counts, np.cumsum(counts * self.grid.row_area_sr)

    def random_points(self, n, rng):
        """A usable pixel drawn with probability proportional to its solid angle (a row by its usable
        area, then one of its usable pixels), then a point uniform on the sphere within it (uniform in
        longitude and in sin(latitude) between the row edges)."""
        usable, first, cum = self._usable_by_row
        if usable.size == 0:
            raise MapError(f"map {self.path}: no usable pixel to draw random points in", path=self.path)
        g = self.grid
        row = np.minimum(np.searchsorted(cum, rng.random(n) * cum[-1], side="right"), g.ny - 1)
        count = np.diff(np.append(first, usable.size))[row]
        pick = first[row] + np.minimum((rng.random(n) * count).astype(np.int64), count - 1)
        y, x = np.divmod(self._flat(usable[pick]), g.nx)
        lon = g.column_lon_deg(x + rng.random(n) - 0.5)
        z = g.z_lo[y] + (g.z_hi[y] - g.z_lo[y]) * rng.random(n)
        return lon, np.degrees(np.arcsin(np.clip(z, -1.0, 1.0)))

    # ------------------------------------------------------------------ SkyMap: aperture photometry
    def aperture_sums(self, vectors, radius_rad, outer_radius_rad, *, weighting="centre", method="auto",
                      subsample_level=3, progress=None) -> np.ndarray:
        """Area-weighted region sums: every pixel counts with its solid angle over the mean pixel area,
        so the first sum is the region's area in mean pixels and the temperature an area-weighted mean."""
        from . import _car_sums

        c_in, c_out = np.sqrt(_chord2(radius_rad)), np.sqrt(_chord2(outer_radius_rad))
        if method == "kernel" or (method == "auto" and weighting != "subsample"):
            return _car_sums.sums_kernel(self, vectors, c_in, c_out, weighting, progress)
        return _car_sums.sums_direct(self, vectors, c_in, c_out, weighting, subsample_level, progress)

    # ------------------------------------------------------------------ SkyMap: harmonic space
    def filtered(self, transfer, *, n_iter=3) -> "CarMap":
        """Through a_lm -> F_l a_lm with :func:`pairvel.maps.car_sht.filtered_grid` (masked, unheld and
        off-image pixels at the mean of the usable values; exact quadrature on a full CC/F1 grid,
        solid-angle weights with ``n_iter`` Jacobi iterations otherwise)."""
        from .car_sht import filtered_grid

        values, weight = self._full_arrays
        g = self.grid
        image = filtered_grid(values.reshape(g.ny, g.nx), weight.reshape(g.ny, g.nx) > 0, self._rings, transfer,
                              n_iter=n_iter)
        return self.with_values(image.reshape(-1)[self.held_pixels()].astype(self.values.dtype, copy=False))

    def pixel_window(self, lmax) -> np.ndarray:
        """Orientation-averaged window of the grid's mean rectangular pixel (:func:`pairvel.maps.car_sht.grid_pixel_window`)."""
        from .car_sht import grid_pixel_window

        return grid_pixel_window(self._rings, int(lmax))

    def synthesise(self, alm, *, lmax, n_threads=None) -> np.ndarray:
        """``ducc0`` synthesis on the rows holding the held pixels (:func:`pairvel.maps.car_sht.synthesise_pixels`)."""
        from .car_sht import synthesise_pixels

        return synthesise_pixels(alm, self._rings, self.held_pixels(), lmax=lmax, n_threads=n_threads)

    @functools.cached_property
    def _rings(self):
        """The grid as rings for the harmonic transforms; a MapError unless 360 deg is a whole number of columns."""
        from .car_sht import ring_grid

        g = self.grid
        return ring_grid(np.radians(90.0 - g.lat_deg), g.nx, math.radians(g.dlon_deg), math.radians(g.lon0_deg),
                         row_area_sr=g.row_area_sr, what="map" if self.path is None else f"map {self.path}")

    def source_map(self, lon_deg, lat_deg, amplitude, *, fwhm_arcmin=None) -> "CarMap":
        """Every pixel of the image; Gaussian beams evaluated at the pixel centres out to 5 sigma."""
        from ._car_sums import disc_candidates

        g = self.grid
        lon = np.atleast_1d(np.asarray(lon_deg, float))
        lat = np.atleast_1d(np.asarray(lat_deg, float))
        amp = np.broadcast_to(np.asarray(amplitude, float), lon.shape)
        values = np.zeros(g.ny * g.nx)
        if fwhm_arcmin:
            sigma = float(fwhm_arcmin) * ARCMIN_RAD / math.sqrt(8.0 * math.log(2.0))
            vec = unit_vectors(lon, lat)
            for b0 in range(0, lon.size, _CHUNK):
                b1 = min(b0 + _CHUNK, lon.size)
                flat, owner, d2 = disc_candidates(g, vec[b0:b1], np.full(b1 - b0, 5.0 * sigma), real_only=True)
                peak = amp[b0:b1][owner] / (2.0 * math.pi * sigma ** 2)
                values += np.bincount(flat, weights=peak * np.exp(-d2 / (2.0 * sigma ** 2)), minlength=values.size)
        else:
            flat = g.pixel_of(lon, lat)
            inside = flat >= 0
            np.add.at(values, flat[inside], amp[inside])
        return CarMap(self.wcs, self.shape, None, values)

    def aperture_support(self, lon_deg, lat_deg, radius_arcmin) -> "CarMap":
        """The pixels of the image whose centres lie within ``radius_arcmin`` of a position (a partial map)."""
        from ._car_sums import disc_candidates

        vec = unit_vectors(np.asarray(lon_deg, float), np.asarray(lat_deg, float))
        r = np.broadcast_to(np.asarray(radius_arcmin, dtype=float) * ARCMIN_RAD, (len(vec),))
        chunks = []
        for b0 in range(0, len(vec), _CHUNK):
            b1 = min(b0 + _CHUNK, len(vec))
            flat, owner, d2 = disc_candidates(self.grid, vec[b0:b1], r[b0:b1], real_only=True)
            chunks.append(np.unique(flat[d2 <= _chord2(r[b0:b1])[owner]]))
        pix = np.unique(np.concatenate(chunks)) if chunks else np.zeros(0, np.int64)
        return CarMap(self.wcs, self.shape, pix, np.zeros(pix.size))

    def white_noise(self, level_uk_arcmin, rng) -> np.ndarray:
        """sigma = level / sqrt(pixel area in arcmin^2), each pixel with its own row's area."""
        sigma = level_uk_arcmin / np.sqrt(self.grid.row_area_sr / ARCMIN_RAD ** 2)  # per row
        if self.pixels is None:
            return (rng.standard_normal(self.shape) * sigma[:, None]).reshape(-1)
        return sigma[self._held_rows()] * rng.standard_normal(self.n_held)
