"""HEALPix temperature maps and masks: reading, holding and writing, full sky or partial sky.

A :class:`SkyMap` holds either every pixel of the sphere (``pixels is None``) or only the pixels a
partial map lists (``pixels`` sorted, int64), so a few hundred square degrees at nside 2048 stay a
few hundred thousand values.  Every held pixel carries a usable weight in [0, 1] (1 = usable,
0 = masked); UNSEEN and NaN pixels get weight 0, and pixels a partial map does not hold count as
masked wherever they are looked up.  Temperatures are thermodynamic microkelvin (uK_CMB); input
maps in K_CMB or mK_CMB are converted on reading.

The reader follows the HEALPix FITS conventions (Gorski et al. 2005, ApJ 622, 759): a binary
table with PIXTYPE = 'HEALPIX', NSIDE, ORDERING (RING or NESTED) and INDXSCHM (IMPLICIT for a
full-sky map stored in pixel order, EXPLICIT for a partial map with a PIXEL column).
"""

from __future__ import annotations

__all__ = ["SkyMap", "read_map", "read_mask", "write_partial_map", "footprint_fraction", "unit_to_uk",
           "remove_monopole_dipole"]

import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import healpy as hp
import numpy as np
from astropy.io import fits

from ..core.errors import MapError, OutputError, PairvelWarning

_MAX_NSIDE = 1 << 29
_UNSEEN = hp.UNSEEN

# Temperature units pairvel accepts, after normalisation (see _normalise_unit), as factors to uK_CMB.
_UNIT_TO_UK = {
    "k": 1e6, "kelvin": 1e6,
    "mk": 1e3, "millik": 1e3, "millikelvin": 1e3,
    "uk": 1.0, "muk": 1.0, "microk": 1.0, "microkelvin": 1.0,
}
_ACCEPTED_UNITS = "K_CMB, mK_CMB or uK_CMB"
_UNIT_KEYS = ("BUNIT", "UNIT", "UNITS")
_EQUATORIAL = ("C", "Q", "CELESTIAL", "EQUATORIAL", "ICRS", "FK5")
# COORDSYS spellings pairvel accepts, to healpy's one-letter frame codes (equatorial C, Galactic G, ecliptic E).
_FRAMES = {**{k: "C" for k in _EQUATORIAL}, "G": "G", "GAL": "G", "GALACTIC": "G", "E": "E", "ECL": "E",
           "ECLIPTIC": "E"}


def _is_power_of_two(n: int) -> bool:
    return 1 <= n <= _MAX_NSIDE and (n & (n - 1)) == 0


def _bad_pixels(values: np.ndarray) -> np.ndarray:
    """True where a value is NaN, infinite or healpy's UNSEEN sentinel."""
    return ~np.isfinite(values) | (np.abs(values - _UNSEEN) <= 1e-5 * abs(_UNSEEN))


@dataclass(frozen=True, eq=False)
class SkyMap:
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
        Temperatures (float32 stays float32).  For a mask from :func:`read_mask`, the mask values.
    weight : ndarray of the same shape, float32, optional
        Usable weight in [0, 1] (1 = usable, 0 = masked).  Default 1.  Pixels whose value is NaN,
        infinite or UNSEEN get weight 0 whatever is passed.
    path : str, optional
        File the map was read from, for messages and provenance.
    coordsys : str, default "C"
        Frame of the pixel grid: "C" equatorial, "G" Galactic or "E" ecliptic.  Photometry rotates
        tracer positions (always equatorial RA, Dec) into this frame; the map is never rotated.

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
        frame = _FRAMES.get(str(self.coordsys).strip().upper())
        if frame is None:
            raise MapError(f"{what}: coordsys must be C (equatorial), G (Galactic) or E (ecliptic); got "
                           f"{self.coordsys!r}", path=self.path, key="COORDSYS")
        object.__setattr__(self, "coordsys", frame)
        nside = self.nside
        if isinstance(nside, bool) or not isinstance(nside, (int, np.integer)) or not _is_power_of_two(int(nside)):
            raise MapError(f"{what}: nside must be a power of 2 between 1 and 2^29; got {nside!r}", path=self.path)
        object.__setattr__(self, "nside", int(nside))
        object.__setattr__(self, "nest", bool(self.nest))
        values = np.asarray(self.values)
        if values.ndim != 1 or values.dtype.kind not in "fiu":
            raise MapError(f"{what}: values must be a 1-D numeric array; got shape {values.shape} "
                           f"of {values.dtype}", path=self.path)
        if values.dtype.kind != "f":
            values = values.astype(np.float64)
        npix = 12 * self.nside ** 2
        if self.pixels is None:
            if values.size != npix:
                raise MapError(f"{what}: a full-sky map at nside {self.nside} must have {npix} values; "
                               f"got {values.size}", path=self.path)
        else:
            pixels = np.asarray(self.pixels)
            if pixels.ndim != 1 or pixels.dtype.kind not in "iu" or pixels.size != values.size:
                raise MapError(f"{what}: pixels must be a 1-D integer array as long as values ({values.size}); "
                               f"got shape {pixels.shape} of {pixels.dtype}", path=self.path)
            pixels = pixels.astype(np.int64, copy=False)
            if pixels.size and (pixels[0] < 0 or pixels[-1] >= npix or np.any(np.diff(pixels) <= 0)):
                raise MapError(f"{what}: pixels must be sorted, unique and in [0, {npix}) at nside "
                               f"{self.nside}; got range [{pixels.min()}, {pixels.max()}]", path=self.path)
            object.__setattr__(self, "pixels", pixels)
        bad = _bad_pixels(values)
        if self.weight is None:
            weight = np.ones(values.size, dtype=np.float32)
        else:
            weight = np.asarray(self.weight)
            if weight.shape != values.shape:
                raise MapError(f"{what}: weight must have the shape of values {values.shape}; got {weight.shape}",
                               path=self.path)
            if weight.dtype != np.float32 or bad.any():
                weight = weight.astype(np.float32)  # a copy: the caller's array is left alone
            with np.errstate(invalid="ignore"):
                out_of_range = ~((weight >= 0) & (weight <= 1))
            if out_of_range.any():
                first = int(np.flatnonzero(out_of_range)[0])
                raise MapError(f"{what}: weight must lie in [0, 1]; {int(out_of_range.sum())} pixels do not "
                               f"(first: index {first}, weight={float(weight[first])})", path=self.path)
        if bad.any():
            weight[bad] = 0.0
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "weight", weight)

    @classmethod
    def from_array(cls, hpx_map, *, nest=False, path=None, coordsys="C") -> "SkyMap":
        """Wrap a full-sky HEALPix array in uK (not copied); UNSEEN and NaN pixels get weight 0."""
        values = np.asarray(hpx_map)
        if values.ndim != 1 or not hp.isnpixok(values.size):
            raise MapError(f"hpx_map must be a 1-D full-sky HEALPix array of 12 nside^2 values; got shape "
                           f"{values.shape}", path=path)
        return cls(hp.npix2nside(values.size), bool(nest), None, values, path=path, coordsys=coordsys)

    # ------------------------------------------------------------------ basic properties
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
    def pixel_area_arcmin2(self) -> float:
        """Area of one pixel, pi / (3 nside^2) sr, in arcmin^2."""
        return math.pi / (3.0 * self.nside ** 2) * (180.0 * 60.0 / math.pi) ** 2

    @property
    def pixel_size_arcmin(self) -> float:
        """Square root of the pixel area, arcmin."""
        return math.sqrt(self.pixel_area_arcmin2)

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

    # ------------------------------------------------------------------ look-ups and transforms
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

    def reordered(self, *, nest: bool) -> "SkyMap":
        """The same map with pixel indices in the other ordering (self when already in ``nest``)."""
        if bool(nest) == self.nest:
            return self
        if self.pixels is None:
            new_index = np.arange(self.npix, dtype=np.int64)
            idx = hp.nest2ring(self.nside, new_index) if nest else hp.ring2nest(self.nside, new_index)  # old index
            return SkyMap(self.nside, bool(nest), None, self.values[idx], self.weight[idx], path=self.path,
                          coordsys=self.coordsys)
        convert = hp.ring2nest if nest else hp.nest2ring
        new = convert(self.nside, self.pixels)
        order = np.argsort(new, kind="stable")
        return SkyMap(self.nside, bool(nest), new[order], self.values[order], self.weight[order], path=self.path,
                      coordsys=self.coordsys)

    def with_mask(self, mask: "SkyMap") -> "SkyMap":
        """This map with its weights multiplied by a mask of the same nside.

        Parameters
        ----------
        mask : SkyMap
            From :func:`read_mask`: values in [0, 1]; pixels it does not hold count as masked.
            Any ordering (converted to this map's).

        Returns
        -------
        SkyMap
            Same pixels and values (not copied), new weights.
        """
        if not isinstance(mask, SkyMap):
            raise MapError(f"mask must be a SkyMap (from read_mask); got {type(mask).__name__}")
        if mask.nside != self.nside:
            name = "mask" if mask.path is None else f"mask {mask.path}"
            raise MapError(f"{name} has nside {mask.nside} but the map has nside {self.nside}", path=mask.path)
        if mask.coordsys != self.coordsys:
            name = "mask" if mask.path is None else f"mask {mask.path}"
            raise MapError(f"{name} is in frame {mask.coordsys} but the map is in frame {self.coordsys} "
                           f"(COORDSYS); pairvel does not rotate masks", path=mask.path, key="COORDSYS")
        mask = mask.reordered(nest=self.nest)
        mvals, mweight = mask.lookup(self.held_pixels())
        factor = np.where(mweight > 0, np.clip(np.nan_to_num(mvals), 0.0, 1.0), 0.0).astype(np.float32)
        return SkyMap(self.nside, self.nest, self.pixels, self.values, self.weight * factor, path=self.path,
                      coordsys=self.coordsys)


def footprint_fraction(skymap: SkyMap) -> float:
    """Weighted fraction of the sphere that is usable: sum of the weights / (12 nside^2).

    Multiply by 41252.96 deg^2 (4 pi sr) for the usable area.
    """
    return float(np.sum(skymap.weight, dtype=np.float64) / skymap.npix)


# ---------------------------------------------------------------------- units
def _normalise_unit(unit: str) -> str:
    u = str(unit).strip().lower().replace(" ", "").replace("\u00b5", "u").replace("\u03bc", "u")
    for suffix in ("_cmb", "-cmb", "(cmb)", "cmb", "_thermo"):
        if u.endswith(suffix) and len(u) > len(suffix):
            u = u[: -len(suffix)]
            break
    return u


def unit_to_uk(unit: str, *, where: str = "map") -> float:
    """Factor that converts a temperature in ``unit`` to uK_CMB.

    Accepts K_CMB, mK_CMB and uK_CMB with case and spelling variants (``K``, ``Kcmb``, ``mK``,
    ``uK``, ``muK``, ``microK``, ``µK``).  Anything else (e.g. Rayleigh-Jeans or intensity units)
    raises :class:`MapError`.
    """
    factor = _UNIT_TO_UK.get(_normalise_unit(unit))
    if factor is None:
        raise MapError(f"{where} unit must be a CMB temperature unit ({_ACCEPTED_UNITS}); got {unit!r}")
    return factor


# ---------------------------------------------------------------------- reading
@dataclass(frozen=True)
class _RawTable:
    nside: int
    nest: bool
    pixels: np.ndarray | None
    values: np.ndarray
    unit: str | None
    coordsys: str = "C"


def _native(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype.kind == "f":
        return a.astype(a.dtype.newbyteorder("="), copy=True)
    return a.astype(np.float64 if a.dtype.kind in "iub" else a.dtype)


def _read_table(path, *, field_index: int, nest, kind: str, coordsys=None) -> _RawTable:
    """Read one column of a HEALPix FITS table; shared by the map and mask readers."""
    spath = str(path)
    what = f"{kind} {spath}"
    if not Path(spath).is_file():
        raise MapError(f"{what} cannot be read: no such file", path=spath)
    try:
        hdul = fits.open(spath, memmap=True)
    except (OSError, ValueError, TypeError) as err:
        raise MapError(f"{what} cannot be read as FITS ({err})", path=spath) from None
    with hdul:
        try:
            tables = [h for h in hdul if isinstance(h, fits.BinTableHDU)]
            if not tables:
                raise MapError(f"{what} is not a HEALPix FITS map: it has no binary table extension", path=spath)
            hdu = tables[0]
            hdr = hdu.header
            pixtype = str(hdr.get("PIXTYPE", "")).strip().upper()
            if pixtype != "HEALPIX" and "NSIDE" not in hdr:
                raise MapError(f"{what} is not a HEALPix FITS map: its table has neither PIXTYPE = 'HEALPIX' "
                               f"nor NSIDE", path=spath)
            frame = _frame(hdr, coordsys, what, spath)
            nest_hdr = _ordering(hdr, nest, what, spath)
            names = list(hdu.columns.names)
            scheme = str(hdr.get("INDXSCHM", "")).strip().upper()
            explicit = scheme == "EXPLICIT" or (scheme != "IMPLICIT" and names and names[0].upper() == "PIXEL")
            if explicit:
                pix_name = next((n for n in names if n.upper() == "PIXEL"), names[0])
                signal = [n for n in names if n != pix_name]
            else:
                pix_name, signal = None, names
            if not 0 <= field_index < len(signal):
                raise MapError(f"{what}: field must be in [0, {len(signal) - 1}] (columns {signal}); "
                               f"got {field_index}", path=spath, key="field")
            col = signal[field_index]
            unit = hdu.columns[col].unit
            if not unit:
                unit = next((str(hdr[k]) for k in _UNIT_KEYS if str(hdr.get(k, "")).strip()), None)
            values = _native(np.asarray(hdu.data[col]).ravel())
            pixels = None if pix_name is None else np.asarray(hdu.data[pix_name]).ravel().astype(np.int64)
            nside = _nside(hdr, values.size, explicit, what, spath)
            if explicit:
                pixels, values = _sorted_unique(pixels, values, nside, what, spath)
            elif values.size != 12 * nside ** 2:
                first, last = hdr.get("FIRSTPIX"), hdr.get("LASTPIX")
                if first is not None and last is not None and int(last) - int(first) + 1 == values.size:
                    pixels = np.arange(int(first), int(last) + 1, dtype=np.int64)  # implicit cut-sky range
                    pixels, values = _sorted_unique(pixels, values, nside, what, spath)
                else:
                    raise MapError(f"{what}: a full-sky map at NSIDE = {nside} must have {12 * nside ** 2} "
                                   f"pixels; the file has {values.size}", path=spath)
        except MapError:
            raise
        except (OSError, ValueError, TypeError, KeyError, IndexError) as err:
            raise MapError(f"{what} cannot be read as a HEALPix map ({err})", path=spath) from None
    return _RawTable(nside, nest_hdr, pixels, values, unit, frame)


def _frame(hdr, coordsys, what, spath) -> str:
    """The map's frame letter (C, G or E) from COORDSYS, else from ``coordsys``, else equatorial with a warning."""
    requested = None
    if coordsys is not None:
        requested = _FRAMES.get(str(coordsys).strip().upper())
        if requested is None:
            raise MapError(f"{what}: requested coordsys must be C (equatorial), G (Galactic) or E (ecliptic); "
                           f"got {coordsys!r}", path=spath, key="coordsys")
    coord = str(hdr.get("COORDSYS", "")).strip().upper()
    if not coord:
        if requested is None:
            warnings.warn(f"{what} has no COORDSYS keyword; assuming equatorial coordinates (RA, Dec) "
                          f"(set map.coordsys to say otherwise)", PairvelWarning, stacklevel=4)
            return "C"
        return requested
    frame = _FRAMES.get(coord)
    if frame is None:
        raise MapError(f"{what}: COORDSYS must be C (equatorial), G (Galactic) or E (ecliptic); got {coord!r}",
                       path=spath, key="COORDSYS")
    if requested is not None and requested != frame:
        warnings.warn(f"{what}: header COORDSYS = {coord} overrides the frame requested ({requested})",
                      PairvelWarning, stacklevel=4)
    return frame


def _ordering(hdr, nest, what, spath) -> bool:
    order = str(hdr.get("ORDERING", "")).strip().upper()
    if not order:
        if nest is None:
            hint = ("set map.ordering to RING or NESTED in the config (nest= in read_map)" if what.startswith("map")
                    else "add ORDERING = 'RING' or 'NESTED' to its header (nest= in read_mask)")
            raise MapError(f"{what} has no ORDERING keyword; {hint}", path=spath, key="ORDERING")
        return bool(nest)
    if order not in ("RING", "NESTED", "NEST"):
        raise MapError(f"{what}: ORDERING must be RING or NESTED; got {order!r}", path=spath, key="ORDERING")
    from_header = order != "RING"
    if nest is not None and bool(nest) != from_header:
        warnings.warn(f"{what}: header ORDERING = {order} overrides the ordering requested "
                      f"({'NESTED' if nest else 'RING'})", PairvelWarning, stacklevel=4)
    return from_header


def _nside(hdr, n_values, explicit, what, spath) -> int:
    if "NSIDE" in hdr:
        try:
            nside = int(hdr["NSIDE"])
        except (TypeError, ValueError):
            raise MapError(f"{what}: NSIDE must be an integer power of 2; got {hdr['NSIDE']!r}",
                           path=spath, key="NSIDE") from None
    elif not explicit and n_values % 12 == 0 and _is_power_of_two(int(round(math.sqrt(n_values // 12)))) \
            and 12 * int(round(math.sqrt(n_values // 12))) ** 2 == n_values:
        nside = int(round(math.sqrt(n_values // 12)))
    else:
        raise MapError(f"{what} has no NSIDE keyword and {n_values} values, which is not 12 nside^2",
                       path=spath, key="NSIDE")
    if not _is_power_of_two(nside):
        raise MapError(f"{what}: NSIDE must be a power of 2 between 1 and 2^29; got {nside}", path=spath, key="NSIDE")
    return nside


def _sorted_unique(pixels, values, nside, what, spath):
    if pixels.size != values.size:
        raise MapError(f"{what}: the PIXEL column has {pixels.size} entries but the signal has {values.size}",
                       path=spath)
    if pixels.size and np.any(np.diff(pixels) <= 0):
        order = np.argsort(pixels, kind="stable")
        pixels, values = pixels[order], values[order]
        dup = np.flatnonzero(np.diff(pixels) == 0)
        if dup.size:
            raise MapError(f"{what}: pixel indices must be unique; {dup.size} repeat (first: pixel {pixels[dup[0]]})",
                           path=spath, key="PIXEL")
    npix = 12 * nside ** 2
    if pixels.size and (pixels[0] < 0 or pixels[-1] >= npix):
        raise MapError(f"{what}: pixel indices must be in [0, {npix}) at NSIDE = {nside}; got range "
                       f"[{pixels[0]}, {pixels[-1]}]", path=spath, key="PIXEL")
    return pixels, values


def read_map(path, *, field=0, unit=None, nest=None, coordsys=None) -> SkyMap:
    """Read a HEALPix temperature map from FITS, full sky or partial sky, into uK_CMB.

    Parameters
    ----------
    path : str or Path
        HEALPix FITS file: a binary table with NSIDE and ORDERING; INDXSCHM = EXPLICIT with a
        PIXEL column for a partial map, otherwise all 12 nside^2 pixels in order.
    field : int, default 0
        Which signal column to read (0-based, not counting PIXEL).
    unit : str, optional
        Unit of the map (K_CMB, mK_CMB, uK_CMB and variants).  Used when the file names no unit
        (TUNITn of the column, or a BUNIT/UNIT/UNITS header key); when the file does name one and
        this differs, this one is used and a :class:`PairvelWarning` says so.
    nest : bool, optional
        Ordering to assume when the header has no ORDERING (True = NESTED).  The header wins when
        both are present (with a warning if they differ).
    coordsys : {"C", "G", "E"}, optional
        Frame to assume when the header has no COORDSYS (equatorial, Galactic, ecliptic); without
        either, equatorial with a warning.  The header wins when both are present.

    Returns
    -------
    SkyMap
        Values in uK_CMB in the file's float precision; UNSEEN and NaN pixels have weight 0.

    Raises
    ------
    MapError
        Unreadable or non-HEALPix file, missing ORDERING (and no ``nest``), bad NSIDE, pixel
        count inconsistent with NSIDE, unknown or missing unit, unknown COORDSYS.
    """
    if isinstance(field, bool) or not isinstance(field, (int, np.integer)):
        raise MapError(f"map {path}: field must be a non-negative integer; got {field!r}", path=path, key="field")
    raw = _read_table(path, field_index=int(field), nest=nest, kind="map", coordsys=coordsys)
    what = f"map {path}"
    if raw.unit is None and unit is None:
        raise MapError(f"{what} names no unit (no TUNITn, BUNIT or UNIT keyword); set map.unit in the config "
                       f"to {_ACCEPTED_UNITS}", path=path, key="unit")
    if unit is not None:
        factor = unit_to_uk(unit, where=f"{what}: requested")
        if raw.unit is not None and unit_to_uk(raw.unit, where=what) != factor:
            warnings.warn(f"{what}: the file says unit {raw.unit!r} but {unit!r} was requested; using {unit!r}",
                          PairvelWarning, stacklevel=2)
    else:
        factor = unit_to_uk(raw.unit, where=what)
    values = raw.values
    bad = _bad_pixels(values)
    if factor != 1.0:
        values *= values.dtype.type(factor)  # _native returned a private copy
        values[bad] = _UNSEEN
    if bad.all():
        raise MapError(f"{what}: every pixel is UNSEEN or NaN", path=path)
    weight = np.where(bad, np.float32(0.0), np.float32(1.0))
    _check_scale(values, bad, what, raw.unit if unit is None else unit)
    return SkyMap(raw.nside, raw.nest, raw.pixels, values, weight, path=str(path), coordsys=raw.coordsys)


# A CMB temperature map (sky, noise, or both, filtered or not) has an rms between about 1 uK and a few mK
# [common practice]; far outside [1e-2 uK, 1e5 uK] the unit is almost surely wrong (K read as uK, or
# the reverse).
_RMS_RANGE_UK = (1e-2, 1e5)


def _check_scale(values, bad, what, unit):
    """Warn when the rms of the usable pixels (after conversion to uK) points at a wrong unit."""
    good = values[~bad]
    if good.size == 0:
        return
    step = max(1, good.size // 1_000_000)  # a strided sample is enough for an order of magnitude
    rms = float(np.std(good[::step], dtype=np.float64))
    lo, hi = _RMS_RANGE_UK
    if rms == 0.0 or lo <= rms <= hi:
        return
    guess = "K_CMB" if rms < lo else "a smaller unit (mK or uK)"
    warnings.warn(f"{what}: pixel rms is {rms:.3g} uK after reading it as {unit!r}, outside the {lo:g}-{hi:g} uK "
                  f"of CMB maps; is the unit really {guess}? Check map.unit", PairvelWarning, stacklevel=3)


def read_mask(path, *, nside, nest=None, coordsys=None) -> SkyMap:
    """Read a HEALPix mask (1 = use, 0 = masked, values in [0, 1]) for a map of the given nside.

    Parameters
    ----------
    path : str or Path
        HEALPix FITS file, full or partial sky; pixels a partial mask does not list are masked.
    nside : int
        Resolution of the map the mask is for; the mask must have the same.
    nest : bool, optional
        Ordering to assume when the header has no ORDERING.
    coordsys : {"C", "G", "E"}, optional
        Frame to assume when the header has no COORDSYS (pass the map's frame).

    Returns
    -------
    SkyMap
        ``values`` and ``weight`` both the mask (NaN and UNSEEN read as 0); pass it to
        :meth:`SkyMap.with_mask`.
    """
    raw = _read_table(path, field_index=0, nest=nest, kind="mask", coordsys=coordsys)
    if raw.nside != int(nside):
        raise MapError(f"mask {path} has nside {raw.nside} but the map has nside {int(nside)}", path=path, key="NSIDE")
    values = raw.values.astype(np.float32)
    bad = _bad_pixels(values)
    values[bad] = 0.0
    out = ~((values >= 0.0) & (values <= 1.0))
    if out.any():
        first = int(np.flatnonzero(out)[0])
        pix = first if raw.pixels is None else int(raw.pixels[first])
        raise MapError(f"mask {path} must hold values in [0, 1]; {int(out.sum())} pixels do not "
                       f"(first: pixel {pix}, value {values[first]:g})", path=path)
    return SkyMap(raw.nside, raw.nest, raw.pixels, values, values.copy(), path=str(path), coordsys=raw.coordsys)


# ---------------------------------------------------------------------- writing
_RESERVED = {"PIXTYPE", "ORDERING", "INDXSCHM", "NSIDE", "FIRSTPIX", "LASTPIX", "OBJECT", "OBS_NPIX", "COORDSYS",
             "XTENSION", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "PCOUNT", "GCOUNT", "TFIELDS"}


def write_partial_map(path, pixels, values, *, nside, nest=False, unit="uK_CMB", extra_header=None,
                      coordsys="C") -> Path:
    """Write a partial-sky HEALPix map (explicit pixel indexing) as a FITS binary table.

    Parameters
    ----------
    path : str or Path
        New file; an existing file is never overwritten.
    pixels : array_like of shape (n,), int
        Pixel indices, unique, in [0, 12 nside^2); written sorted.
    values : array_like of shape (n,), ``unit``
        Map values (float32 written as 32-bit, anything else as 64-bit floats).
    nside : int
        Power of 2.
    nest : bool, default False
        Ordering of ``pixels``.
    unit : str, default "uK_CMB"
        Written as TUNIT of the signal column; must be a temperature unit pairvel reads back.
    extra_header : dict, optional
        More header cards, ``{key: value}`` or ``{key: (value, comment)}``; the HEALPix structure
        keys cannot be set this way.
    coordsys : {"C", "G", "E"}, default "C"
        Frame of the pixel grid, written as COORDSYS.

    Returns
    -------
    Path
        The file written (OBJECT 'PARTIAL', INDXSCHM 'EXPLICIT').
    """
    path = Path(path)
    if path.exists():
        raise OutputError(f"map file {path} exists already; pairvel does not overwrite it", path=path)
    if isinstance(nside, bool) or not isinstance(nside, (int, np.integer)) or not _is_power_of_two(int(nside)):
        raise MapError(f"nside must be a power of 2 between 1 and 2^29; got {nside!r}", key="nside")
    nside = int(nside)
    unit_to_uk(unit, where=f"map {path}")
    pixels = np.asarray(pixels)
    values = np.asarray(values)
    if pixels.ndim != 1 or pixels.dtype.kind not in "iu" or values.shape != pixels.shape or values.dtype.kind not in "fiu":
        raise MapError(f"pixels and values must be 1-D arrays of equal length (integer and numeric); got "
                       f"{pixels.shape} {pixels.dtype} and {values.shape} {values.dtype}")
    pixels, values = _sorted_unique(pixels.astype(np.int64), values, nside, f"map {path}", str(path))
    if values.dtype != np.float32:
        values = values.astype(np.float64)
    cols = [fits.Column(name="PIXEL", format="K", array=pixels),
            fits.Column(name="SIGNAL", format="E" if values.dtype == np.float32 else "D", array=values, unit=unit)]
    hdu = fits.BinTableHDU.from_columns(cols)
    hdr = hdu.header
    hdr["PIXTYPE"] = ("HEALPIX", "HEALPIX pixelisation")
    hdr["ORDERING"] = ("NESTED" if nest else "RING", "pixel ordering scheme")
    frame = _FRAMES.get(str(coordsys).strip().upper())
    if frame is None:
        raise MapError(f"coordsys must be C (equatorial), G (Galactic) or E (ecliptic); got {coordsys!r}", key="coordsys")
    hdr["COORDSYS"] = (frame, {"C": "equatorial", "G": "Galactic", "E": "ecliptic"}[frame] + " coordinates")
    hdr["NSIDE"] = (nside, "resolution parameter")
    hdr["INDXSCHM"] = ("EXPLICIT", "pixel indices listed in the PIXEL column")
    hdr["OBJECT"] = ("PARTIAL", "sky coverage")
    hdr["FIRSTPIX"] = (int(pixels[0]) if pixels.size else 0, "first pixel index held")
    hdr["LASTPIX"] = (int(pixels[-1]) if pixels.size else 0, "last pixel index held")
    hdr["OBS_NPIX"] = (int(pixels.size), "number of pixels held")
    for key, val in (extra_header or {}).items():
        if str(key).upper() in _RESERVED:
            raise MapError(f"extra_header may not set the HEALPix structure key {key!r}", key=str(key))
        hdr[str(key)] = val
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, overwrite=False)
    except OSError as err:
        raise OutputError(f"map file {path} cannot be written ({err})", path=path) from None
    return path


def remove_monopole_dipole(skymap: SkyMap, *, pixels_per_fit=4_000_000) -> tuple[SkyMap, np.ndarray]:
    """Fit and subtract a monopole and a dipole over the usable pixels, full or partial sky.

    A weighted least-squares fit of T(n) = a0 + a . n (n the pixel-centre unit vector, weights the
    usable weights) over the held pixels with weight > 0, subtracted from every held pixel; masked
    pixels keep weight 0.  Same model as ``healpy.remove_dipole``, without building a full-sky array.

    Parameters
    ----------
    skymap : SkyMap
    pixels_per_fit : int, default 4e6
        Usable pixels used in the fit (a regular stride through them when there are more).

    Returns
    -------
    SkyMap
        A new map (values copied, same dtype).
    coefficients : ndarray of shape (4,), uK
        Monopole a0 and dipole vector (a_x, a_y, a_z) in the map's frame.
    """
    usable = np.flatnonzero(skymap.weight > 0)
    if usable.size < 4:
        raise MapError(f"map {skymap.path}: a monopole and dipole need at least 4 usable pixels; got {usable.size}",
                       path=skymap.path)
    step = max(1, usable.size // int(pixels_per_fit))
    fit_idx = usable[::step]
    pix = fit_idx if skymap.pixels is None else skymap.pixels[fit_idx]
    x, y, z = hp.pix2vec(skymap.nside, pix, nest=skymap.nest)
    design = np.column_stack([np.ones_like(x), x, y, z])
    w = skymap.weight[fit_idx].astype(np.float64)
    lhs = design.T @ (design * w[:, None])
    rhs = design.T @ (w * skymap.values[fit_idx].astype(np.float64))
    try:
        coef = np.linalg.solve(lhs, rhs)
    except np.linalg.LinAlgError:
        raise MapError(f"map {skymap.path}: the usable pixels do not constrain a dipole (footprint too symmetric "
                       f"or too small)", path=skymap.path) from None
    values = skymap.values.copy()
    for c0 in range(0, values.size, 1 << 22):
        c1 = min(c0 + (1 << 22), values.size)
        p = np.arange(c0, c1) if skymap.pixels is None else skymap.pixels[c0:c1]
        vx, vy, vz = hp.pix2vec(skymap.nside, p, nest=skymap.nest)
        values[c0:c1] -= (coef[0] + coef[1] * vx + coef[2] * vy + coef[3] * vz).astype(values.dtype)
    return (SkyMap(skymap.nside, skymap.nest, skymap.pixels, values, skymap.weight, path=skymap.path,
                   coordsys=skymap.coordsys), coef)
