"""HEALPix temperature maps and masks: reading, units, ordering, full and partial sky.

A :class:`SkyMap` holds either a full-sky array or the sorted pixel indices and values of a
partial-sky map, so a few hundred square degrees at nside 2048 never become a 50-million-pixel
array.  Values are uK_CMB; UNSEEN and NaN pixels are masked.
"""

from __future__ import annotations

__all__ = ["SkyMap", "read_map", "read_mask", "write_partial_map", "unit_to_uk"]

import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from .errors import MapError, OutputError, PairvelWarning

UNSEEN = -1.6375e30
_UNIT_FACTORS = {"k": 1e6, "mk": 1e3, "uk": 1.0, "µk": 1.0, "μk": 1.0, "muk": 1.0, "microk": 1.0}


def unit_to_uk(unit: str, *, where: str) -> float:
    """Factor that converts a temperature unit (K_CMB, mK, uK ...) to uK_CMB."""
    key = unit.strip().lower().replace("_cmb", "").replace("cmb", "").replace(" ", "").strip("_()[]")
    if key not in _UNIT_FACTORS:
        raise MapError(f"{where}: unit '{unit}' is not a CMB temperature unit; use K_CMB, mK_CMB or uK_CMB")
    return _UNIT_FACTORS[key]


@dataclass(frozen=True)
class SkyMap:
    """A HEALPix map in uK_CMB with a usable-pixel weight (1 use, 0 masked).

    Attributes
    ----------
    nside : int
    nest : bool
        True for NESTED ordering.
    pixels : ndarray of shape (n,), int64, or None
        Sorted pixel indices held (partial sky), or None for a full-sky array.
    values : ndarray of shape (n,) or (12 nside^2,), uK
    weight : ndarray, same shape as ``values``
        1 where usable, 0 where masked (UNSEEN, NaN, or the mask).
    path : str or None
    """

    nside: int
    nest: bool
    pixels: np.ndarray | None
    values: np.ndarray
    weight: np.ndarray
    path: str | None = None

    @classmethod
    def from_array(cls, hpx_map, *, nest=False, path=None) -> "SkyMap":
        """Wrap a full-sky HEALPix array (uK); UNSEEN and NaN become masked."""
        import healpy as hp

        values = np.asarray(hpx_map)
        nside = hp.npix2nside(values.size)
        return cls(nside, bool(nest), None, values, _usable(values), path)

    def lookup(self, pix):
        """Values and weights at pixel indices ``pix`` (pixels not held count as masked)."""
        pix = np.asarray(pix, dtype=np.int64)
        if self.pixels is None:
            return self.values[pix], self.weight[pix]
        idx = np.searchsorted(self.pixels, pix)
        idx_c = np.minimum(idx, self.pixels.size - 1)
        found = self.pixels[idx_c] == pix
        return np.where(found, self.values[idx_c], np.nan), np.where(found, self.weight[idx_c], 0.0)

    def usable_pixels(self) -> np.ndarray:
        """Indices (in this map's ordering) of the usable pixels."""
        ok = self.weight > 0
        return np.flatnonzero(ok) if self.pixels is None else self.pixels[ok]

    def with_mask(self, mask: "SkyMap") -> "SkyMap":
        """This map with ``mask`` (same nside) applied: pixels masked in either are masked."""
        if mask.nside != self.nside:
            raise MapError(f"mask {mask.path} has nside {mask.nside} but the map has nside {self.nside}")
        import healpy as hp

        pix = np.arange(self.values.size) if self.pixels is None else self.pixels
        if mask.nest != self.nest:
            pix = hp.ring2nest(self.nside, pix) if mask.nest else hp.nest2ring(self.nside, pix)
        m, _ = mask.lookup(pix)
        return replace(self, weight=np.where(np.nan_to_num(m) > 0.5, self.weight, 0.0).astype(np.float32))


def _usable(values) -> np.ndarray:
    return (np.isfinite(values) & (np.abs(values) < 1e30)).astype(np.float32)


def _healpix_hdu(path: Path):
    from astropy.io import fits

    try:
        hdul = fits.open(path, memmap=True)
    except FileNotFoundError:
        raise MapError(f"map {path}: file not found", path=path) from None
    except Exception as err:  # astropy raises OSError and others for non-FITS input
        raise MapError(f"map {path}: cannot be read as FITS ({str(err).splitlines()[0] if str(err) else type(err).__name__})",
                       path=path) from None
    for hdu in hdul[1:]:
        if isinstance(hdu, fits.BinTableHDU) and (hdu.header.get("PIXTYPE", "").upper() == "HEALPIX"
                                                  or "NSIDE" in hdu.header):
            return hdul, hdu
    hdul.close()
    raise MapError(f"map {path}: no HEALPix binary table (PIXTYPE = 'HEALPIX') found", path=path)


def _read_columns(path, *, field, nest, what):
    """(nside, nest, pixels or None, data, unit text or None) of one column of a HEALPix FITS file."""
    path = Path(path)
    hdul, hdu = _healpix_hdu(path)
    with hdul:
        hdr = hdu.header
        ordering = str(hdr.get("ORDERING", "")).strip().upper()
        if ordering in ("RING", "NESTED"):
            file_nest = ordering == "NESTED"
            if nest is not None and bool(nest) != file_nest:
                warnings.warn(f"{what} {path}: header says ORDERING = {ordering}; the header wins over the config",
                              PairvelWarning, stacklevel=3)
        elif nest is None:
            raise MapError(f"{what} {path}: header has no ORDERING (RING or NESTED); set map.ordering in the config",
                           path=path, key="map.ordering")
        else:
            file_nest = bool(nest)
        try:
            nside = int(hdr["NSIDE"])
        except (KeyError, ValueError):
            raise MapError(f"{what} {path}: header has no valid NSIDE", path=path) from None
        if nside < 1 or nside & (nside - 1):
            raise MapError(f"{what} {path}: NSIDE must be a power of 2; got {nside}", path=path)
        names = list(hdu.columns.names)
        explicit = str(hdr.get("INDXSCHM", "")).upper() == "EXPLICIT" or "PIXEL" in [n.upper() for n in names]
        data_cols = [n for n in names if n.upper() != "PIXEL"]
        if isinstance(field, str):
            if field not in data_cols:
                raise MapError(f"{what} {path}: no column '{field}'; columns are {data_cols}", path=path, key="map.field")
            col = field
        else:
            if not 0 <= field < len(data_cols):
                raise MapError(f"{what} {path}: field {field} asked but the file has {len(data_cols)} map columns "
                               f"({data_cols})", path=path, key="map.field")
            col = data_cols[field]
        data = np.asarray(hdu.data[col]).ravel()
        data = data.astype(data.dtype.newbyteorder("="))
        unit = hdu.columns[col].unit or hdr.get("TUNIT", None) or hdr.get("BUNIT", None)
        npix = 12 * nside * nside
        if explicit:
            pix_col = [n for n in names if n.upper() == "PIXEL"][0]
            pixels = np.asarray(hdu.data[pix_col]).ravel().astype(np.int64)
            if pixels.size != data.size:
                raise MapError(f"{what} {path}: PIXEL and {col} columns differ in length", path=path)
            if pixels.size and (pixels.min() < 0 or pixels.max() >= npix):
                raise MapError(f"{what} {path}: pixel indices outside 0..{npix - 1} for NSIDE {nside}", path=path)
            order = np.argsort(pixels, kind="stable")
            pixels, data = pixels[order], data[order]
        else:
            pixels = None
            if data.size != npix:
                raise MapError(f"{what} {path}: {data.size} pixels do not match NSIDE {nside} ({npix} expected)",
                               path=path)
    return nside, file_nest, pixels, data, unit


def read_map(path, *, field=0, unit=None, nest=None) -> SkyMap:
    """Read a HEALPix temperature map (full or partial sky) in uK_CMB.

    Parameters
    ----------
    path : path-like
        HEALPix FITS file (binary table, implicit or explicit pixel indexing).
    field : int or str, default 0
        Map column by 0-based index among the non-PIXEL columns, or by name.
    unit : str, optional
        Unit to use when the file has none (K_CMB, mK_CMB, uK_CMB); overrides the file's with a
        warning when they differ.
    nest : bool, optional
        Ordering when the header has no ORDERING.

    Raises
    ------
    MapError
        Unreadable or non-HEALPix file, no ORDERING and no ``nest``, bad NSIDE, unknown or missing unit.
    """
    nside, file_nest, pixels, data, file_unit = _read_columns(path, field=field, nest=nest, what="map")
    where = f"map {path}"
    if file_unit is None and unit is None:
        raise MapError(f"{where}: no unit in the header; set map.unit (K_CMB, mK_CMB or uK_CMB)", path=path,
                       key="map.unit")
    if file_unit is not None and unit is not None and unit_to_uk(file_unit, where=where) != unit_to_uk(unit, where="config map.unit"):
        warnings.warn(f"{where}: header unit '{file_unit}' differs from map.unit '{unit}'; using map.unit",
                      PairvelWarning, stacklevel=2)
    factor = unit_to_uk(unit if unit is not None else file_unit, where=where)
    weight = _usable(data)
    values = data if data.dtype.kind == "f" else data.astype(np.float64)
    if factor != 1.0:
        values = np.where(weight > 0, values * values.dtype.type(factor), values)
    if not weight.any():
        raise MapError(f"{where}: every pixel is UNSEEN or NaN", path=path)
    return SkyMap(nside, file_nest, pixels, values, weight, str(path))


def read_mask(path, *, nside, nest=None) -> SkyMap:
    """Read a HEALPix mask (1 = use, 0 = masked) that must have the map's ``nside``."""
    m_nside, m_nest, pixels, data, _ = _read_columns(path, field=0, nest=nest, what="mask")
    if m_nside != nside:
        raise MapError(f"mask {path} has nside {m_nside} but the map has nside {nside}", path=path,
                       key="map.mask_path")
    good = np.isfinite(data)
    if np.any((data[good] < 0) | (data[good] > 1)):
        raise MapError(f"mask {path}: values must lie in [0, 1]", path=path)
    values = np.where(good, data, 0.0).astype(np.float32)
    return SkyMap(m_nside, m_nest, pixels, values, np.ones_like(values), str(path))


def write_partial_map(path, pixels, values, *, nside, nest=False, unit="uK_CMB", extra_header=None) -> None:
    """Write a partial-sky HEALPix FITS map with explicit pixel indexing (never overwrites)."""
    from astropy.io import fits

    path = Path(path)
    if path.exists():
        raise OutputError(f"map {path} exists already; refusing to overwrite it", path=path)
    pixels = np.asarray(pixels, dtype=np.int64)
    order = np.argsort(pixels)
    values = np.asarray(values)[order]
    pixels = pixels[order]
    cols = [fits.Column(name="PIXEL", format="K", array=pixels),
            fits.Column(name="T", format="E" if values.dtype == np.float32 else "D", unit=unit, array=values)]
    hdu = fits.BinTableHDU.from_columns(cols)
    hdr = hdu.header
    hdr["PIXTYPE"] = ("HEALPIX", "HEALPIX pixelisation")
    hdr["ORDERING"] = ("NESTED" if nest else "RING", "pixel ordering scheme")
    hdr["NSIDE"] = (int(nside), "resolution parameter")
    hdr["INDXSCHM"] = ("EXPLICIT", "indexing: explicit pixel numbers")
    hdr["OBJECT"] = ("PARTIAL", "sky coverage")
    hdr["COORDSYS"] = ("C", "celestial (equatorial) coordinates")
    hdr["FIRSTPIX"] = int(pixels[0]) if pixels.size else 0
    hdr["LASTPIX"] = int(pixels[-1]) if pixels.size else 0
    for key, value in (extra_header or {}).items():
        hdr[key] = value
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
