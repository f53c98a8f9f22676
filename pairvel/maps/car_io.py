"""FITS images with a cylindrical celestial WCS: reading maps and masks, and writing maps.

A rectangular-pixel map is a FITS image (primary HDU or image extension) whose first two axes
carry a celestial WCS in a cylindrical projection (CTYPE1/2 = RA---CAR/DEC--CAR, GLON-CEA/GLAT-CEA,
...; see :mod:`pairvel.maps.car`).  A third axis holds several planes: with CTYPE3 = 'STOKES'
the ``field`` counts Stokes parameters (0 = I, the temperature, wherever it sits in the file;
1 = Q, 2 = U, 3 = V, FITS WCS paper I, Greisen & Calabretta 2002, table 7); otherwise ``field``
is the plane index in file order.  Which plane was read is kept in ``CarMap.plane_note`` and said
in the run log.  BUNIT gives the unit (K_CMB, mK_CMB, uK_CMB); NaN pixels get weight 0.
:func:`pairvel.maps.skymap.read_map` comes here for every file this module's :func:`claims_file`
accepts.
"""

from __future__ import annotations

__all__ = ["claims_file", "read_map", "read_mask", "write_car_map"]

import warnings
from pathlib import Path

import numpy as np
from astropy.io import fits
from astropy.utils.exceptions import AstropyWarning
from astropy.wcs import WCS, FITSFixedWarning

from ..core.errors import MapError, OutputError, PairvelWarning
from .car import CarMap
from .healpix import bad_pixels
from .skymap import ACCEPTED_UNITS, check_unit_scale, frame_letter, unit_to_uk

_STOKES_NAMES = {1: "I", 2: "Q", 3: "U", 4: "V"}


def _images(hdul):
    return [h for h in hdul if isinstance(h, (fits.PrimaryHDU, fits.ImageHDU)) and int(h.header.get("NAXIS", 0)) >= 2]


def claims_file(path) -> bool:
    """True when ``path`` is a FITS file with an image of two or more axes (its reader judges the WCS)."""
    try:
        with warnings.catch_warnings():  # a damaged file is reported once, by the reader
            warnings.simplefilter("ignore", AstropyWarning)
            with fits.open(str(path), memmap=True) as hdul:
                return bool(_images(hdul))
    except (OSError, ValueError, TypeError):
        return False


def _open_image(path, what):
    """(header, data array) of the first image HDU with two or more axes; MapError naming the problem."""
    spath = str(path)
    if not Path(spath).is_file():
        raise MapError(f"{what} cannot be read: no such file", path=spath)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", AstropyWarning)  # a damaged file is reported once, below
            with fits.open(spath, memmap=False) as hdul:
                images = _images(hdul)
                if not images:
                    raise MapError(f"{what} has no image of two or more axes (NAXIS >= 2)", path=spath, key="NAXIS")
                hdu = images[0]
                header = hdu.header.copy()
                data = hdu.data
    except MapError:
        raise
    except (OSError, ValueError, TypeError, IndexError) as err:
        raise MapError(f"{what} cannot be read as a FITS image ({str(err).splitlines()[0]})", path=spath) from None
    naxis = int(header["NAXIS"])
    expected = tuple(int(header.get(f"NAXIS{k}", -1)) for k in range(naxis, 0, -1))
    if data is None or tuple(data.shape) != expected:
        got = None if data is None else tuple(data.shape)
        raise MapError(f"{what}: the image data {got} do not match NAXIS1..{naxis} = {expected[::-1]} (truncated "
                       f"file or wrong NAXISn)", path=spath, key="NAXIS")
    return header, data


def _wcs(header, what, spath) -> WCS:
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FITSFixedWarning)
            wcs = WCS(header)
    except Exception as err:  # astropy.wcs raises several unrelated types for bad headers
        raise MapError(f"{what}: its WCS cannot be read ({str(err).splitlines()[0]})", path=spath,
                       key="CTYPE1") from None
    if not wcs.has_celestial:
        raise MapError(f"{what} has no celestial WCS (CTYPE1/CTYPE2 such as RA---CAR/DEC--CAR); got CTYPE "
                       f"{list(wcs.wcs.ctype)}", path=spath, key="CTYPE1")
    if (wcs.wcs.lng, wcs.wcs.lat) != (0, 1):
        raise MapError(f"{what}: the celestial axes must be the first two (CTYPE1 longitude, CTYPE2 latitude); got "
                       f"CTYPE {list(wcs.wcs.ctype)}", path=spath, key="CTYPE1")
    return wcs


def _plane(header, wcs, data, field, what, spath):
    """(2-D image, note or None) for ``field``: a Stokes parameter on a STOKES axis, else a plane index."""
    extra = data.shape[:-2]  # numpy order: the axes beyond the first two, last FITS axis first
    if not extra or int(np.prod(extra)) == 1:
        if field != 0:
            raise MapError(f"{what} holds one plane; field must be 0; got {field}", path=spath, key="field")
        return data.reshape(data.shape[-2:]), None
    long_axes = [k for k, n in enumerate(extra) if n > 1]
    if len(long_axes) > 1:
        raise MapError(f"{what}: more than one axis beyond the first two has several planes (shape {data.shape}); "
                       f"pairvel reads one 2-D plane from a 3-D cube", path=spath, key="NAXIS")
    axis_np = long_axes[0]
    fits_axis = data.ndim - axis_np  # FITS numbering of that axis
    n = extra[axis_np]
    ctype = str(header.get(f"CTYPE{fits_axis}", "")).strip().upper()
    if ctype == "STOKES":
        pix = np.arange(n, dtype=np.float64)
        crval, cdelt = float(header.get(f"CRVAL{fits_axis}", 1.0)), float(header.get(f"CDELT{fits_axis}", 1.0))
        crpix = float(header.get(f"CRPIX{fits_axis}", 1.0))
        stokes = np.rint(crval + cdelt * (pix + 1.0 - crpix)).astype(int)
        want = field + 1
        hits = np.flatnonzero(stokes == want)
        if hits.size != 1:
            raise MapError(f"{what}: field {field} asks for Stokes {_STOKES_NAMES.get(want, want)} but the STOKES "
                           f"axis (CTYPE{fits_axis}) holds {[_STOKES_NAMES.get(int(s), int(s)) for s in stokes]}",
                           path=spath, key=f"CTYPE{fits_axis}")
        k = int(hits[0])
        note = f"Stokes {_STOKES_NAMES.get(want, want)} (plane {k} of {n} on axis {fits_axis})"
    else:
        if not 0 <= field < n:
            raise MapError(f"{what}: field must be in [0, {n - 1}] (planes on axis {fits_axis}, CTYPE{fits_axis} = "
                           f"{ctype!r}); got {field}", path=spath, key="field")
        k = field
        note = f"plane {k} of {n} on axis {fits_axis}" + (f" ({ctype})" if ctype else "")
    index = [0] * len(extra)
    index[axis_np] = k
    return data[tuple(index)], note


def _read_image(path, field, kind, coordsys):
    what = f"{kind} {path}"
    spath = str(path)
    header, data = _open_image(path, what)
    if data.dtype.kind not in "fiu":
        raise MapError(f"{what}: the image must be numeric; got {data.dtype}", path=spath, key="BITPIX")
    wcs = _wcs(header, what, spath)
    image, note = _plane(header, wcs, data, field, what, spath)
    values = np.array(image, dtype=image.dtype.newbyteorder("=") if image.dtype.kind == "f" else np.float64)
    celestial = wcs.celestial
    if coordsys is not None:
        requested = frame_letter(coordsys)
        if requested is None:
            raise MapError(f"{what}: requested coordsys must be C (equatorial), G (Galactic) or E (ecliptic); got "
                           f"{coordsys!r}", path=spath, key="coordsys")
    return header, celestial, values, note


def _frame_warning(skymap, coordsys, what):
    if coordsys is not None and frame_letter(coordsys) != skymap.coordsys:
        warnings.warn(f"{what}: the WCS frame {skymap.coordsys} (CTYPE1 = {skymap.wcs.wcs.ctype[0]!r}) overrides "
                      f"the frame requested ({coordsys})", PairvelWarning, stacklevel=3)


def read_map(path, *, field=0, unit=None, nest=None, coordsys=None, ordering=None, rms_check=False) -> CarMap:
    """Read a rectangular-pixel temperature map (FITS image, cylindrical WCS) into uK_CMB.

    Parameters
    ----------
    path : str or Path
    field : int, default 0
        With a STOKES axis, the Stokes parameter (0 = I, the temperature); otherwise the plane of a
        3-D cube in file order.  A 2-D image has only field 0.
    unit : str, optional
        Unit of the map (K_CMB, mK_CMB, uK_CMB and variants), used when the header has no BUNIT;
        when it has one and this differs, this one is used with a :class:`PairvelWarning`.
    nest, ordering : ignored
        HEALPix pixel orders, accepted so that one set of options serves every pixelisation.
    coordsys : {"C", "G", "E"}, optional
        The frame comes from CTYPE1/2 (RA/DEC, GLON/GLAT, ELON/ELAT); a different request warns.
    rms_check : bool, default False
        As in :func:`pairvel.maps.healpix_io.read_map`.

    Returns
    -------
    CarMap
        Values in uK_CMB (the file's float precision), NaN pixels with weight 0, ``plane_note``
        saying which plane of a several-plane file was read.

    Raises
    ------
    MapError
        Unreadable file, no image, no celestial or non-cylindrical or non-separable WCS, NAXISn
        that do not match the data, an unknown or missing unit, a missing plane.
    """
    if isinstance(field, bool) or not isinstance(field, (int, np.integer)) or field < 0:
        raise MapError(f"map {path}: field must be a non-negative integer; got {field!r}", path=str(path), key="field")
    what = f"map {path}"
    header, wcs, values, note = _read_image(path, int(field), "map", coordsys)
    file_unit = str(header.get("BUNIT", "")).strip() or None
    if file_unit is None and unit is None:
        raise MapError(f"{what} names no unit (no BUNIT keyword); set map.unit in the config to {ACCEPTED_UNITS}",
                       path=str(path), key="BUNIT")
    if unit is not None:
        factor = unit_to_uk(unit, where=f"{what}: requested")
        if file_unit is not None and unit_to_uk(file_unit, where=f"{what} (BUNIT)") != factor:
            warnings.warn(f"{what}: the file says unit {file_unit!r} but {unit!r} was requested; using {unit!r}",
                          PairvelWarning, stacklevel=2)
    else:
        factor = unit_to_uk(file_unit, where=f"{what} (BUNIT)")
    values = values.reshape(-1)
    bad = bad_pixels(values)
    if bad.all():
        raise MapError(f"{what}: every pixel is NaN", path=str(path))
    if factor != 1.0:
        values *= values.dtype.type(factor)
    check_unit_scale(values, bad, what, file_unit if unit is None else unit, stop=rms_check, path=str(path))
    skymap = CarMap(wcs, (header["NAXIS2"], header["NAXIS1"]), None, values, path=str(path), plane_note=note)
    _frame_warning(skymap, coordsys, what)
    return skymap


def read_mask(path, *, nside=None, nest=None, coordsys=None, ordering=None) -> CarMap:
    """Read a rectangular-pixel mask (1 = use, 0 = masked, values in [0, 1]; NaN read as 0).

    ``nside``, ``nest`` and ``ordering`` are HEALPix options, ignored here (the grid is checked by
    :meth:`~pairvel.maps.skymap.SkyMap.with_mask`); ``coordsys`` as in :func:`read_map`.
    """
    what = f"mask {path}"
    header, wcs, values, _ = _read_image(path, 0, "mask", coordsys)
    values = values.reshape(-1).astype(np.float32)
    values[bad_pixels(values)] = 0.0
    out = ~((values >= 0.0) & (values <= 1.0))
    if out.any():
        first = int(np.flatnonzero(out)[0])
        raise MapError(f"{what} must hold values in [0, 1]; {int(out.sum())} pixels do not (first: row "
                       f"{first // int(header['NAXIS1'])}, column {first % int(header['NAXIS1'])}, value "
                       f"{values[first]:g})", path=str(path))
    skymap = CarMap(wcs, (header["NAXIS2"], header["NAXIS1"]), None, values, values.copy(), path=str(path))
    _frame_warning(skymap, coordsys, what)
    return skymap


def write_car_map(path, skymap: CarMap, *, unit="uK_CMB", extra_header=None) -> Path:
    """Write a :class:`CarMap` as a FITS primary image with its WCS (pixels not held or with weight 0 as NaN).

    Parameters
    ----------
    path : str or Path
        New file; an existing file is never overwritten.
    skymap : CarMap
        Values in uK_CMB; written in ``unit`` (K_CMB, mK_CMB or uK_CMB), float32 stays float32.
    unit : str, default "uK_CMB"
        Written as BUNIT.
    extra_header : dict, optional
        More header cards ``{key: value}``; the WCS and structure keys cannot be set this way.
    """
    path = Path(path)
    if path.exists():
        raise OutputError(f"map file {path} exists already; pairvel does not overwrite it", path=path)
    if not isinstance(skymap, CarMap):
        raise MapError(f"write_car_map needs a CarMap; got {type(skymap).__name__}")
    factor = unit_to_uk(unit, where=f"map {path}")
    ny, nx = skymap.shape
    dtype = np.float32 if skymap.values.dtype == np.float32 else np.float64
    image = np.full(ny * nx, np.nan, dtype=dtype)
    image[skymap.held_pixels()] = np.where(skymap.weight > 0, skymap.values / factor, np.nan)
    header = skymap.wcs.to_header()
    header["BUNIT"] = (unit, "map unit")
    reserved = set(header) | {"SIMPLE", "BITPIX", "NAXIS", "NAXIS1", "NAXIS2", "EXTEND"}
    for key, val in (extra_header or {}).items():
        if str(key).upper() in reserved:
            raise MapError(f"extra_header may not set the WCS or structure key {key!r}", key=str(key))
        header[str(key)] = val
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        fits.PrimaryHDU(image.reshape(ny, nx), header=header).writeto(path, overwrite=False)
    except OSError as err:
        raise OutputError(f"map file {path} cannot be written ({err})", path=path) from None
    return path
