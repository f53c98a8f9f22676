"""The per-tracer table of a run (``tracers.fits``): every row read, whether it was used and why not,
its jackknife region and its aperture temperatures before and after the redshift-trend removal.

One row per catalogue row read, in the canonical order of
:func:`pairvel.input.catalogue.load_catalogue` (rows not kept follow the same sort, NaN positions
last).  Columns: ``row`` (row in the input file), ``ra_deg``, ``dec_deg``, ``z``, ``region`` (-1
when not used), ``used``, ``drop_reason`` ("" when used), ``t_raw_uK`` and ``t_uK`` at the primary
radius (NaN when not used), ``t_raw_uK_<r>arcmin`` and ``t_uK_<r>arcmin`` for each extra radius,
``proxy`` and ``weight`` when the run read them, and with ``[noise]`` the aperture noise rms
``noise_uK`` at the primary radius (and ``noise_weight``, mean 1 over the used tracers, with
``noise.tracer_weighting``; ``weight`` stays the catalogue's own).  Header cards say which radius is primary,
how the apertures were measured, which map and catalogue they came from (with checksums) and
whether the temperatures are blinded.

The same file is read back by :func:`read_tracer_table`, both by ``load_result`` (so that
``pairvel unblind`` carries it) and by a run that starts from it (``restart.table_path``).
"""

from __future__ import annotations

__all__ = ["TRACER_TABLE", "StoredTracers", "tracer_table", "write_tracer_table", "read_tracer_table",
           "temperature_columns", "scale_temperatures", "radius_suffix"]

import fnmatch
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.errors import InputError
from ..input.catalogue import Catalogue, RemovedRows, canonical_order

TRACER_TABLE = "tracers.fits"
_KIND = "pairvel tracer table"


def radius_suffix(radius_arcmin: float) -> str:
    """Column suffix of an extra aperture radius: ``_1.5arcmin``."""
    return f"_{radius_arcmin:g}arcmin"


def temperature_columns(table) -> list:
    """Names of the columns that hold temperatures (``t_*uK*``, ``noise_uK``): what blinding scales."""
    return [name for name in table.colnames if fnmatch.fnmatchcase(name, "t_*uK*") or name == "noise_uK"]


def scale_temperatures(table, scale):
    """A copy of ``table`` with every temperature column passed through ``scale(values)``."""
    out = table.copy(copy_data=True)
    for name in temperature_columns(out):
        out[name][...] = scale(np.asarray(out[name], dtype=np.float64))
    return out


def tracer_table(cat: Catalogue, *, regions, temps_raw, temps, radii_arcmin, meta: dict, extra_columns=None):
    """The per-tracer table of a run (module docstring).

    Parameters
    ----------
    cat : Catalogue
        The tracers used, with ``cat.removed`` the rows read but not used (may be None: no such rows
        recorded).
    regions : ndarray of shape (N,), int
        Jackknife region of each used tracer.
    temps_raw, temps : ndarray of shape (n_radii, N), uK
        Aperture temperatures of the used tracers before and after the redshift-trend removal, primary
        radius first, then ``radii_arcmin[1:]``.
    radii_arcmin : sequence of float
        The aperture radii, primary first.
    meta : dict
        Header cards (keyword -> value); ``PRIMRAD`` is set here.
    extra_columns : dict, optional
        More per-tracer columns of the used tracers, name -> ndarray of shape (N,) (NaN for the rest),
        e.g. ``noise_uK`` and ``noise_weight`` of ``[noise]``.

    Returns
    -------
    astropy.table.Table
    """
    from astropy.table import Table

    gone = cat.removed or RemovedRows.empty(proxy=cat.proxy is not None, weight=cat.weight is not None)
    n_used = len(cat)

    def both(used, removed, fill=np.nan):
        if used is None:
            return None
        return np.concatenate([used, np.full(len(gone), fill) if removed is None else removed])

    columns = {"row": both(cat.row, gone.row), "ra_deg": both(cat.ra, gone.ra), "dec_deg": both(cat.dec, gone.dec),
               "z": both(cat.z, gone.z), "proxy": both(cat.proxy, gone.proxy), "weight": both(cat.weight, gone.weight)}
    order = canonical_order([columns[k] for k in ("ra_deg", "dec_deg", "z", "proxy", "weight", "row")],
                            np.arange(n_used + len(gone)))
    cards = {k: v for k, v in meta.items() if v is not None}  # an unset setting gets no card
    table = Table(meta={"EXTNAME": "TRACERS", "PVKIND": _KIND, **cards, "PRIMRAD": float(radii_arcmin[0])})
    table["row"] = columns["row"][order].astype(np.int64)
    for name in ("ra_deg", "dec_deg", "z"):
        table[name] = columns[name][order]
    table["region"] = both(np.asarray(regions, dtype=np.int64), None, fill=-1)[order].astype(np.int32)
    table["used"] = (np.arange(n_used + len(gone)) < n_used)[order]
    table["drop_reason"] = np.concatenate([np.full(n_used, ""), gone.reason]).astype(str)[order]
    for k, radius in enumerate(radii_arcmin):
        suffix = "" if k == 0 else radius_suffix(radius)
        table[f"t_raw_uK{suffix}"] = both(temps_raw[k], None)[order]
        table[f"t_uK{suffix}"] = both(temps[k], None)[order]
    for name in ("proxy", "weight"):
        if columns[name] is not None:
            table[name] = columns[name][order]
    for name, values in (extra_columns or {}).items():
        table[name] = both(np.asarray(values, dtype=np.float64), None)[order]
    table["ra_deg"].unit = table["dec_deg"].unit = "deg"
    for name in temperature_columns(table):
        table[name].unit = "uK"
    return table


def write_tracer_table(table, path, *, blinding: dict) -> None:
    """Write ``table`` as a FITS binary table at ``path`` with the blinding cards of ``blinding``."""
    out = table.copy(copy_data=False)
    blinded = bool(blinding.get("blinded"))
    out.meta["BLINDED"] = blinded
    for card in ("BLINDKEY", "KEYFILE", "COMMENT", "comments"):
        out.meta.pop(card, None)
    if blinded:
        out.meta["BLINDKEY"] = str(blinding.get("key_id"))
        out.meta["KEYFILE"] = str(blinding.get("key_file"))
    out.meta["COMMENT"] = ["one row per catalogue row read; drop_reason says why a row is unused",
                           "t_raw_uK: aperture temperature before the redshift-trend removal",
                           "t_uK: after it, as the estimator used it; PRIMRAD: their radius",
                           "temperatures blinded (scaled by a hidden factor)" if blinded else "temperatures not blinded"]
    out.write(path, format="fits")


@dataclass(frozen=True)
class StoredTracers:
    """A tracer table read back: the table and what its header says."""

    table: object      # astropy.table.Table
    path: str
    radii_arcmin: tuple  # primary first, then the extra radii present as columns
    blinding: dict     # {"blinded": bool, "key_id", "key_file"} as the header says

    def meta(self, card, default=None):
        """The header card's value; ``default`` when it is missing or has no value."""
        from astropy.io.fits.card import Undefined

        value = self.table.meta.get(card, default)
        return default if isinstance(value, Undefined) else value


def read_tracer_table(path) -> StoredTracers:
    """Read and check a ``tracers.fits`` written by pairvel.

    Raises
    ------
    InputError
        Missing or unreadable file, not a pairvel tracer table, a missing column, or a used row whose
        position, redshift or temperature is not finite (naming the column and the first row).
    """
    from astropy.table import Table

    path = Path(path)
    where = f"tracer table {path}"
    if not path.is_file():
        raise InputError(f"{where}: file not found", path=path, key="restart.table_path")
    try:
        table = Table.read(path, format="fits", hdu="TRACERS", mask_invalid=False)
    except Exception as err:  # any reader failure is an unreadable input, in one line
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise InputError(f"{where}: cannot be read as a pairvel tracer table ({reason})", path=path) from None
    table.convert_bytestring_to_unicode()  # FITS text columns read as bytes
    if table.meta.get("PVKIND") != _KIND or "PRIMRAD" not in table.meta:
        raise InputError(f"{where}: not a pairvel tracer table (no PVKIND = '{_KIND}' and PRIMRAD cards)", path=path)
    required = ("row", "ra_deg", "dec_deg", "z", "region", "used", "drop_reason", "t_raw_uK", "t_uK")
    missing = [name for name in required if name not in table.colnames]
    if missing:
        raise InputError(f"{where}: column '{missing[0]}' not found; columns are: {', '.join(table.colnames)}",
                         path=path)
    used = np.asarray(table["used"], dtype=bool)
    for name in ("ra_deg", "dec_deg", "z", *temperature_columns(table)):
        values = np.asarray(table[name], dtype=np.float64)
        bad = used & ~np.isfinite(values)
        if bad.any():
            first = int(np.flatnonzero(bad)[0])
            raise InputError(f"{where}: column '{name}' must be finite where used is true; {int(bad.sum())} rows are "
                             f"not (first: table row {first}, catalogue row {int(table['row'][first])})", path=path)
    extra = sorted(float(name[len("t_raw_uK_"):-len("arcmin")]) for name in table.colnames
                   if name.startswith("t_raw_uK_") and name.endswith("arcmin"))
    blinded = bool(table.meta.get("BLINDED", False))
    blinding = {"blinded": blinded}
    if blinded:
        blinding.update(key_id=table.meta.get("BLINDKEY"), key_file=table.meta.get("KEYFILE"))
    return StoredTracers(table, str(path), (float(table.meta["PRIMRAD"]), *extra), blinding)
