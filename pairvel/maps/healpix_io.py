"""HEALPix FITS files: reading maps and masks, full or partial sky, and writing partial maps.

The reader follows the HEALPix FITS conventions (Gorski et al. 2005, ApJ 622, 759): a binary
table with PIXTYPE = 'HEALPIX', NSIDE, ORDERING (RING or NESTED) and INDXSCHM (IMPLICIT for a
full-sky map stored in pixel order, EXPLICIT for a partial map with a PIXEL column).  Input maps
in K_CMB or mK_CMB (or in Rayleigh-Jeans or surface-brightness units at a stated frequency,
:mod:`pairvel.maps.units`) are converted to uK_CMB; UNSEEN and NaN pixels get weight 0.  The result is a
:class:`~pairvel.maps.healpix.HealpixMap`; :func:`pairvel.maps.skymap.read_map` comes here for
every file this module's :func:`claims_file` accepts.
"""

from __future__ import annotations

__all__ = ["claims_file", "read_map", "read_mask", "write_partial_map"]

import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.io.fits.verify import VerifyWarning

from ..core.errors import MapError, OutputError, PairvelWarning
from .healpix import UNSEEN, HealpixMap, bad_pixels, is_power_of_two
from .skymap import FRAME_NAMES, check_unit_scale, frame_letter, unit_to_uk
from .units import resolve_unit_factor

_UNIT_KEYS = ("BUNIT", "UNIT", "UNITS")


def claims_file(path) -> bool:
    """True when ``path`` is a FITS file whose first binary table says it is HEALPix (PIXTYPE or NSIDE)."""
    try:
        with warnings.catch_warnings():  # a damaged file is reported once, by the reader
            warnings.simplefilter("ignore", VerifyWarning)
            with fits.open(str(path), memmap=True) as hdul:
                table = next((h for h in hdul if isinstance(h, fits.BinTableHDU)), None)
                return table is not None and (str(table.header.get("PIXTYPE", "")).strip().upper() == "HEALPIX"
                                              or "NSIDE" in table.header)
    except (OSError, ValueError, TypeError):
        return False


def _tables(hdul, what, spath) -> list:
    """The binary tables of an open FITS file; a truncated or damaged file is a MapError.

    astropy reports a header cut short only as a multi-line VerifyWarning and then stops listing
    HDUs, which would surface as a misleading "no binary table"; other warnings pass through.
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", VerifyWarning)
        tables = [h for h in hdul if isinstance(h, fits.BinTableHDU)]
    for w in caught:
        text = str(w.message)
        if issubclass(w.category, VerifyWarning) and ("corrupted" in text or "truncated" in text):
            raise MapError(f"{what} cannot be read: the FITS file is truncated or damaged "
                           f"({text.splitlines()[-1].strip()})", path=spath)
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    return tables


def _nest_option(nest, ordering, what, spath):
    """``nest`` (bool or None) from the ``nest`` and ``ordering`` ("RING"/"NESTED") options."""
    if ordering is None:
        return nest
    order = str(ordering).strip().upper()
    if order not in ("RING", "NESTED", "NEST"):
        raise MapError(f"{what}: ordering must be RING or NESTED; got {ordering!r}", path=spath, key="ordering")
    if nest is not None and bool(nest) != (order != "RING"):
        raise MapError(f"{what}: nest={nest!r} contradicts ordering={ordering!r}; give one of them", path=spath,
                       key="ordering")
    return order != "RING"


@dataclass(frozen=True)
class _RawTable:
    nside: int
    nest: bool
    pixels: np.ndarray | None
    values: np.ndarray
    unit: str | None
    coordsys: str = "C"
    header: object = None  # the table's header, for a frequency card (pairvel.maps.units)


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
            hdu = _healpix_table(hdul, what, spath)
            frame = _frame(hdu.header, coordsys, what, spath)
            nest_hdr = _ordering(hdu.header, nest, what, spath)
            explicit, pix_name, col, unit = _columns(hdu, field_index, what, spath)
            nside, pixels, values = _pixels_and_values(hdu, explicit, pix_name, col, what, spath)
            header = hdu.header.copy() if kind == "map" else None
        except MapError:
            raise
        except (OSError, ValueError, TypeError, KeyError, IndexError) as err:
            raise MapError(f"{what} cannot be read as a HEALPix map ({err})", path=spath) from None
    return _RawTable(nside, nest_hdr, pixels, values, unit, frame, header)


def _healpix_table(hdul, what, spath):
    """The first binary table of the file, which must say it is HEALPix."""
    tables = _tables(hdul, what, spath)
    if not tables:
        raise MapError(f"{what} is not a HEALPix FITS map: it has no binary table extension", path=spath)
    hdr = tables[0].header
    if str(hdr.get("PIXTYPE", "")).strip().upper() != "HEALPIX" and "NSIDE" not in hdr:
        raise MapError(f"{what} is not a HEALPix FITS map: its table has neither PIXTYPE = 'HEALPIX' nor NSIDE",
                       path=spath)
    return tables[0]


def _columns(hdu, field_index, what, spath):
    """(explicit indexing?, PIXEL column name or None, signal column name, its unit or None)."""
    hdr = hdu.header
    names = list(hdu.columns.names)
    scheme = str(hdr.get("INDXSCHM", "")).strip().upper()
    explicit = scheme == "EXPLICIT" or (scheme != "IMPLICIT" and names and names[0].upper() == "PIXEL")
    if explicit:
        pix_name = next((n for n in names if n.upper() == "PIXEL"), None)
        if pix_name is None:
            if scheme == "EXPLICIT":
                raise MapError(f"{what}: INDXSCHM = 'EXPLICIT' (a partial map) but the table has no PIXEL column; "
                               f"columns are {names}", path=spath, key="PIXEL")
            pix_name = names[0]
        signal = [n for n in names if n != pix_name]
    else:
        pix_name, signal = None, names
    if not 0 <= field_index < len(signal):
        raise MapError(f"{what}: field must be in [0, {len(signal) - 1}] (columns {signal}); "
                       f"got {field_index}", path=spath, key="field")
    col = signal[field_index]
    if hdu.columns[col].dtype.base.kind not in "fiub":  # base: a vector column (1024E) is a subarray
        raise MapError(f"{what}: column {col!r} must be numeric; its FITS format is {hdu.columns[col].format}",
                       path=spath, key=col)
    unit = hdu.columns[col].unit
    if not unit:
        unit = next((str(hdr[k]) for k in _UNIT_KEYS if str(hdr.get(k, "")).strip()), None)
    return explicit, pix_name, col, unit


def _pixels_and_values(hdu, explicit, pix_name, col, what, spath):
    """(nside, sorted pixel indices or None for a full-sky map, values in native byte order)."""
    hdr = hdu.header
    values = _native(np.asarray(hdu.data[col]).ravel())
    pixels = None if pix_name is None else np.asarray(hdu.data[pix_name]).ravel().astype(np.int64)
    nside = _nside(hdr, values.size, explicit, what, spath)
    if explicit:
        pixels, values = _sorted_unique(pixels, values, nside, what, spath)
    elif values.size != 12 * nside ** 2:
        first, last = hdr.get("FIRSTPIX"), hdr.get("LASTPIX")
        if first is None or last is None or int(last) - int(first) + 1 != values.size:
            raise MapError(f"{what}: a full-sky map at NSIDE = {nside} must have {12 * nside ** 2} "
                           f"pixels; the file has {values.size}", path=spath)
        pixels = np.arange(int(first), int(last) + 1, dtype=np.int64)  # implicit cut-sky range
        pixels, values = _sorted_unique(pixels, values, nside, what, spath)
    return nside, pixels, values


def _frame(hdr, coordsys, what, spath) -> str:
    """The map's frame letter (C, G or E) from COORDSYS, else from ``coordsys``, else equatorial with a warning."""
    requested = None
    if coordsys is not None:
        requested = frame_letter(coordsys)
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
    frame = frame_letter(coord)
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
    elif not explicit and n_values % 12 == 0 and is_power_of_two(int(round(math.sqrt(n_values // 12)))) \
            and 12 * int(round(math.sqrt(n_values // 12))) ** 2 == n_values:
        nside = int(round(math.sqrt(n_values // 12)))
    else:
        raise MapError(f"{what} has no NSIDE keyword and {n_values} values, which is not 12 nside^2",
                       path=spath, key="NSIDE")
    if not is_power_of_two(nside):
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


def read_map(path, *, field=0, unit=None, nest=None, coordsys=None, ordering=None, rms_check=False,
             frequency_ghz=None, bandpass_path=None) -> HealpixMap:
    """Read a HEALPix temperature map from FITS, full sky or partial sky, into uK_CMB.

    Parameters
    ----------
    path : str or Path
        HEALPix FITS file: a binary table with NSIDE and ORDERING; INDXSCHM = EXPLICIT with a
        PIXEL column for a partial map, otherwise all 12 nside^2 pixels in order.
    field : int, default 0
        Which signal column to read (0-based, not counting PIXEL).
    unit : str, optional
        Unit of the map: K_CMB, mK_CMB, uK_CMB and variants, K_RJ, mK_RJ, uK_RJ, or a surface
        brightness such as MJy/sr (see :mod:`pairvel.maps.units`).  Used when the file names no unit
        (TUNITn of the column, or a BUNIT/UNIT/UNITS header key); when the file does name one and
        this differs, this one is used and a :class:`PairvelWarning` says so.
    nest : bool, optional
        Ordering to assume when the header has no ORDERING (True = NESTED).  The header wins when
        both are present (with a warning if they differ).
    coordsys : {"C", "G", "E"}, optional
        Frame to assume when the header has no COORDSYS (equatorial, Galactic, ecliptic); without
        either, equatorial with a warning.  The header wins when both are present.
    ordering : {"RING", "NESTED"}, optional
        The same as ``nest``, spelled as the config's ``map.ordering``; give one or the other.
    rms_check : bool, default False
        Raise :class:`MapError` when the rms of the pixels with data, in uK after the conversion, is
        below 1e-3 uK or above 3e7 uK (a unit label wrong by ~10^6); otherwise only warn outside
        1e-2..1e5 uK.  See :func:`pairvel.maps.skymap.check_unit_scale`.
    frequency_ghz : float, optional
        The map's frequency, for Rayleigh-Jeans and surface-brightness units; wins over a FREQ,
        RESTFRQ header card (with a warning when they differ).
    bandpass_path : str or Path, optional
        Bandpass table used instead of one frequency (:func:`pairvel.maps.units.read_bandpass`).

    Returns
    -------
    HealpixMap
        Values in uK_CMB in the file's float precision; UNSEEN and NaN pixels have weight 0.

    Raises
    ------
    MapError
        Unreadable or non-HEALPix file, missing ORDERING (and no ``nest``), bad NSIDE, pixel
        count inconsistent with NSIDE, unknown or missing unit, unknown COORDSYS, and (with
        ``rms_check``) a pixel rms no CMB temperature map has.
    """
    if isinstance(field, bool) or not isinstance(field, (int, np.integer)):
        raise MapError(f"map {path}: field must be a non-negative integer; got {field!r}", path=path, key="field")
    what = f"map {path}"
    nest = _nest_option(nest, ordering, what, str(path))
    raw = _read_table(path, field_index=int(field), nest=nest, kind="map", coordsys=coordsys)
    factor, used_unit = resolve_unit_factor(raw.unit, unit, what=what, path=str(path),
                                            header=raw.header, frequency_ghz=frequency_ghz,
                                            bandpass_path=bandpass_path)
    values = raw.values
    bad = bad_pixels(values)
    if factor != 1.0:
        values *= values.dtype.type(factor)  # _native returned a private copy
        values[bad] = UNSEEN
    if bad.all():
        raise MapError(f"{what}: every pixel is UNSEEN or NaN", path=path)
    weight = np.where(bad, np.float32(0.0), np.float32(1.0))
    check_unit_scale(values, bad, what, used_unit, stop=rms_check, path=str(path))
    return HealpixMap(raw.nside, raw.nest, raw.pixels, values, weight, path=str(path), coordsys=raw.coordsys)


def read_mask(path, *, nside=None, nest=None, coordsys=None, ordering=None) -> HealpixMap:
    """Read a HEALPix mask (1 = use, 0 = masked, values in [0, 1]).

    Parameters
    ----------
    path : str or Path
        HEALPix FITS file, full or partial sky; pixels a partial mask does not list are masked.
    nside : int, optional
        Resolution of the map the mask is for, checked here when given (and by
        :meth:`~pairvel.maps.skymap.SkyMap.with_mask` in any case).
    nest : bool, optional
        Ordering to assume when the header has no ORDERING.
    coordsys : {"C", "G", "E"}, optional
        Frame to assume when the header has no COORDSYS (pass the map's frame).
    ordering : {"RING", "NESTED"}, optional
        The same as ``nest``, spelled as the config's ``map.ordering``.

    Returns
    -------
    HealpixMap
        ``values`` and ``weight`` both the mask (NaN and UNSEEN read as 0); pass it to
        :meth:`~pairvel.maps.skymap.SkyMap.with_mask`.
    """
    nest = _nest_option(nest, ordering, f"mask {path}", str(path))
    raw = _read_table(path, field_index=0, nest=nest, kind="mask", coordsys=coordsys)
    if nside is not None and raw.nside != int(nside):
        raise MapError(f"mask {path} has nside {raw.nside} but the map has nside {int(nside)}", path=path, key="NSIDE")
    values = raw.values.astype(np.float32)
    bad = bad_pixels(values)
    values[bad] = 0.0
    out = ~((values >= 0.0) & (values <= 1.0))
    if out.any():
        first = int(np.flatnonzero(out)[0])
        pix = first if raw.pixels is None else int(raw.pixels[first])
        raise MapError(f"mask {path} must hold values in [0, 1]; {int(out.sum())} pixels do not "
                       f"(first: pixel {pix}, value {values[first]:g})", path=path)
    return HealpixMap(raw.nside, raw.nest, raw.pixels, values, values.copy(), path=str(path), coordsys=raw.coordsys)


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
    if isinstance(nside, bool) or not isinstance(nside, (int, np.integer)) or not is_power_of_two(int(nside)):
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
    frame = frame_letter(coordsys)
    if frame is None:
        raise MapError(f"coordsys must be C (equatorial), G (Galactic) or E (ecliptic); got {coordsys!r}", key="coordsys")
    hdr["COORDSYS"] = (frame, FRAME_NAMES[frame] + " coordinates")
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
