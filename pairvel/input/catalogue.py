"""Tracer catalogue: read a table, check every value, apply the redshift and proxy cuts.

Reads FITS and ECSV (astropy), CSV and Parquet (pandas/pyarrow; astropy for Parquet files astropy
wrote).  The input file is only ever read.  Positions are degrees: an ra or dec column whose file
gives it an angle unit (FITS TUNITn, ECSV and astropy-Parquet units: rad, arcmin, arcsec, hourangle
for ra) is converted to degrees; a column without a unit (always so in CSV) is read as degrees.  Rows with NaN or out-of-range positions or redshifts stop the run with the count and the
first offending row, unless the config allows dropping them, in which case they are counted in
the selection report and a warning is issued.

Canonical order.  The tracers that pass are put into one order fixed by their values, not by the
order of the rows in the file: sorted by ra, then dec, z, proxy and weight (the columns a run
uses), with ties only between rows equal in all of them, which no later stage can tell apart.
Every later step that draws random numbers per tracer (k-means regions, null positions and
shuffles, the Monte Carlo of the trend loss, bootstrap, simulated skies) or sums over tracers in
floating point then sees the same arrays for any permutation of the input rows, so a run gives
the same numbers bit for bit.  Sorting once here, rather than making each random step
order-free, keeps that guarantee for steps added later.  ``Catalogue.row`` keeps each tracer's
row in the file for anything reported per tracer.

Removed rows.  Rows read but not kept (invalid values dropped, outside the redshift or proxy range,
repeats dropped) travel with the catalogue as :class:`RemovedRows`, with their values as read
and a short reason each; later stages that drop tracers add theirs through
:meth:`Catalogue.subset`.  The per-tracer table of a run (``tracers.fits``) is made from both.

Duplicates.  Two kept rows (after the validity checks and cuts) are duplicates when their ra
(wrapped to [0, 360)), dec and z are equal as read, to the last bit; ``duplicate_rows`` chooses
between stopping, warning and dropping the repeats.
"""

from __future__ import annotations

__all__ = ["Catalogue", "RemovedRows", "load_catalogue", "read_table_columns", "canonical_order", "column_in_unit"]

import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.errors import CatalogueError, PairvelWarning
from ..core.provenance import file_sha256

_SUFFIX_FORMATS = {
    ".fits": "fits", ".fit": "fits", ".fits.gz": "fits", ".fz": "fits",
    ".ecsv": "ecsv", ".csv": "csv", ".csv.gz": "csv", ".parquet": "parquet", ".pq": "parquet",
}


#: Reasons the loader gives for a row it does not keep (``invalid <column>`` for a bad value).
OUTSIDE_Z, OUTSIDE_PROXY, DUPLICATE = "outside z range", "outside proxy range", "duplicate"


@dataclass(frozen=True)
class RemovedRows:
    """Rows read from the file but not (or no longer) among the tracers, each with why.

    Attributes
    ----------
    row : ndarray of shape (m,), int
        Row in the input file (0-based).
    ra, dec : ndarray of shape (m,), degrees
        As read (ra wrapped to [0, 360) where valid); NaN where the file had none.
    z : ndarray of shape (m,)
    proxy, weight : ndarray of shape (m,) or None
        As in :class:`Catalogue`.
    reason : ndarray of shape (m,), str
        E.g. "outside z range", "invalid z", "duplicate", "masked".
    """

    row: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    proxy: np.ndarray | None
    weight: np.ndarray | None
    reason: np.ndarray

    @classmethod
    def empty(cls, *, proxy: bool, weight: bool) -> "RemovedRows":
        nothing = np.zeros(0)
        return cls(np.zeros(0, np.int64), nothing, nothing, nothing, nothing if proxy else None,
                   nothing if weight else None, np.zeros(0, dtype=str))

    def __len__(self) -> int:
        return self.row.size

    def plus(self, other: "RemovedRows") -> "RemovedRows":
        """These rows followed by ``other``'s."""
        def join(a, b):
            return None if a is None or b is None else np.concatenate([a, b])
        return RemovedRows(np.concatenate([self.row, other.row]), join(self.ra, other.ra), join(self.dec, other.dec),
                           join(self.z, other.z), join(self.proxy, other.proxy), join(self.weight, other.weight),
                           np.concatenate([self.reason, other.reason]))


@dataclass(frozen=True)
class Catalogue:
    """Tracers that passed validation and cuts.

    Attributes
    ----------
    ra, dec : ndarray of shape (n,), degrees
    z : ndarray of shape (n,)
    proxy : ndarray of shape (n,) or None
        Mass or luminosity proxy, when the config names its column.
    weight : ndarray of shape (n,) or None
        Per-tracer weight, when the config names its column.
    row : ndarray of shape (n,), int
        Row of each tracer in the input file (0-based), for tracing results back.
    path : str
        The file read.
    sha256 : str
        Checksum of the file read.
    selection : dict
        Counts at each step: rows read, invalid rows dropped, cut by z, cut by proxy, duplicates
        dropped, kept.
    removed : RemovedRows or None
        The rows read but not among these tracers, with their reasons (None when not recorded).

    The tracers are in the canonical order of the module docstring, not in file order.
    """

    ra: np.ndarray
    dec: np.ndarray
    z: np.ndarray
    proxy: np.ndarray | None
    row: np.ndarray
    path: str
    sha256: str
    selection: dict = field(default_factory=dict)
    weight: np.ndarray | None = None
    removed: RemovedRows | None = None

    def __len__(self) -> int:
        return self.ra.size

    def subset(self, keep: np.ndarray, *, reason="dropped") -> "Catalogue":
        """The tracers where boolean ``keep`` is true (same provenance); the others join ``removed``
        with ``reason`` (one string, or an array with one per tracer)."""
        keep = np.asarray(keep, dtype=bool)
        removed = self.removed
        if removed is not None and not keep.all():
            gone = ~keep
            why = np.broadcast_to(np.asarray(reason, dtype=str), keep.shape)[gone]
            removed = removed.plus(RemovedRows(self.row[gone], self.ra[gone], self.dec[gone], self.z[gone],
                                               _take(self.proxy, gone), _take(self.weight, gone), why))
        return Catalogue(self.ra[keep], self.dec[keep], self.z[keep], _take(self.proxy, keep), self.row[keep],
                         self.path, self.sha256, dict(self.selection), _take(self.weight, keep), removed)


def _take(values, which):
    return None if values is None else values[which]


def _format_of(path: Path, fmt: str, section: str = "catalogue") -> str:
    if fmt != "auto":
        return fmt
    name = path.name.lower()
    for suffix, kind in sorted(_SUFFIX_FORMATS.items(), key=lambda kv: -len(kv[0])):
        if name.endswith(suffix):
            return kind
    raise CatalogueError(
        f"catalogue {path}: cannot tell the format from the suffix; set {section}.format to fits, ecsv, csv or parquet",
        path=path, key=f"{section}.format")


def read_table_columns(path, columns, *, fmt="auto", section="catalogue", units=None, what="catalogue") -> dict:
    """Read the named columns of a table file as float64 arrays.

    Parameters
    ----------
    path : path-like
        FITS, ECSV, CSV or Parquet file.
    columns : dict of str -> str
        Config key -> column name, e.g. ``{"catalogue.z_column": "Z"}``; the key names the setting
        in error messages.
    fmt : {"auto", "fits", "ecsv", "csv", "parquet"}
    section : str
        Config section of the settings (for the ``format`` key in messages).
    units : dict of str -> str, optional
        Key of ``columns`` -> the unit its values are returned in (e.g. ``"deg"``, ``"mJy"``),
        converted from the column's unit when the file gives one; a column without a unit is taken
        to be in it already (see :func:`column_in_unit`).
    what : str
        What the file is, for messages ("catalogue", "source list").

    Returns
    -------
    dict of column name -> ndarray of float64
    """
    path = Path(path)
    kind = _format_of(path, fmt, section)
    if not path.is_file():
        raise CatalogueError(f"{what} {path}: file not found", path=path)
    try:
        available, getter = _open_table(path, kind)
    except CatalogueError:
        raise
    except Exception as err:  # any reader failure is an unreadable input, reported in one line
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise CatalogueError(f"{what} {path}: cannot be read as {kind} ({reason})", path=path) from None
    out = {}
    for key, name in columns.items():
        if name not in available:
            hint = ", ".join(available[:12]) + (" ..." if len(available) > 12 else "")
            raise CatalogueError(f"{what} {path}: column '{name}' ({key}) not found; columns are: {hint}",
                                 path=path, key=key)
        raw = getter(name)
        if getattr(raw, "ndim", 1) != 1:
            raise CatalogueError(f"{what} {path}: column '{name}' ({key}) must be one number per row",
                                 path=path, key=key)
        values = np.ma.filled(np.ma.asarray(raw), np.nan) if np.ma.isMaskedArray(raw) else np.asarray(raw)
        if values.size and values.dtype.kind not in "fiub":  # a header-only text table reads as object
            raise CatalogueError(f"{what} {path}: column '{name}' ({key}) must be numeric; got {values.dtype}",
                                 path=path, key=key)
        values = values.astype(np.float64)
        if key in (units or {}):
            values = column_in_unit(values, getattr(raw, "unit", None), units[key],
                                    where=f"{what} {path}: column '{name}' ({key})", path=path, key=key)
        out[name] = values
    return out


def _open_table(path: Path, kind: str):
    """(column names, name -> column) of a table file.  FITS, ECSV and Parquet files written by astropy
    are read with astropy, so that their columns keep their units; CSV and other Parquet files with pandas."""
    if kind == "parquet" and not _astropy_parquet(path):
        import pandas as pd

        frame = pd.read_parquet(path)
        return [str(c) for c in frame.columns], lambda name: frame[name].to_numpy()
    if kind == "csv":
        import pandas as pd

        frame = pd.read_csv(path)
        return [str(c) for c in frame.columns], lambda name: frame[name].to_numpy()
    from astropy.table import Table

    table = Table.read(path, format={"fits": "fits", "ecsv": "ascii.ecsv", "parquet": "parquet"}[kind])
    return list(table.colnames), lambda name: table[name]


def _astropy_parquet(path: Path) -> bool:
    """Whether a Parquet file carries astropy's table metadata (and so its column units)."""
    import pyarrow.parquet as pq

    metadata = pq.read_schema(path).metadata or {}
    return b"table_meta_yaml" in metadata


# Unit spellings astropy does not parse but catalogues use, lower case, to astropy names.
_ANGLE_ALIASES = {"degree": "deg", "degrees": "deg", "radian": "rad", "radians": "rad", "arcmins": "arcmin",
                  "arcsecs": "arcsec", "hour": "hourangle", "hours": "hourangle", "hourangles": "hourangle"}


def column_in_unit(values, unit, target: str, *, where: str, path=None, key=None) -> np.ndarray:
    """A column in the unit ``target`` (e.g. "deg"), converted from its own ``unit`` (e.g. rad, arcmin,
    arcsec, hourangle for an angle).

    A column without a unit (or a dimensionless one) is taken to be in ``target`` already, as pairvel
    always read it; a unit of another kind, or one astropy cannot read, is a :class:`CatalogueError`,
    and so is a declination (a ``key`` ending in dec_column) in hour angle.
    """
    import astropy.units as u

    goal = u.Unit(target)
    if unit is None:
        return values
    text = str(unit).strip()
    parsed = u.Unit(text, parse_strict="silent") if not isinstance(unit, u.UnitBase) else unit
    if isinstance(parsed, u.UnrecognizedUnit) or not text:
        alias = _ANGLE_ALIASES.get(text.lower(), text.lower())
        parsed = u.Unit(alias, parse_strict="silent") if text else u.dimensionless_unscaled
    if parsed == u.dimensionless_unscaled or parsed == goal:
        return values
    if isinstance(parsed, u.UnrecognizedUnit) or not parsed.is_equivalent(goal):
        kind = "an angle (deg, rad, arcmin, arcsec, hourangle)" if goal.is_equivalent(u.deg) else \
            f"a {goal.physical_type} ({goal})"
        raise CatalogueError(f"{where} has unit '{text}', which is not {kind}; fix the column's unit or remove it "
                             f"to read {goal}", path=path, key=key)
    if parsed == u.hourangle and key is not None and key.endswith("dec_column"):
        raise CatalogueError(f"{where} has unit 'hourangle', which a declination cannot have", path=path, key=key)
    return (values * parsed).to_value(goal)


def _describe_invalid(name, values, ok) -> str:
    """'12 rows are not (first: row 41, z=-0.3)' for the rows where ``ok`` is false."""
    bad = np.flatnonzero(~ok)
    return f"{bad.size} rows are not (first: row {bad[0]}, {name}={values[bad[0]]:.6g})"


def load_catalogue(cfg, *, section: str = "catalogue") -> Catalogue:
    """Read, validate and cut the catalogue described by a :class:`~pairvel.input.config.CatalogueConfig`.

    ``section`` is the config table the settings came from ("catalogue", or "partner" for the second
    catalogue of a cross curve); messages name its keys.

    Raises
    ------
    CatalogueError
        File missing or unreadable, a column missing or not numeric, or invalid rows while
        ``drop_invalid_rows`` is false.  The message names the file, the column and the first row.
    """
    path = Path(cfg.path)
    columns = {f"{section}.ra_column": cfg.ra_column, f"{section}.dec_column": cfg.dec_column,
               f"{section}.z_column": cfg.z_column}
    if cfg.proxy_column is not None:
        columns[f"{section}.proxy_column"] = cfg.proxy_column
    if cfg.weight_column is not None:
        columns[f"{section}.weight_column"] = cfg.weight_column
    data = read_table_columns(path, columns, fmt=cfg.format, section=section,
                              units={f"{section}.ra_column": "deg", f"{section}.dec_column": "deg"})
    ra, dec, z = data[cfg.ra_column], data[cfg.dec_column], data[cfg.z_column]
    proxy = data[cfg.proxy_column] if cfg.proxy_column is not None else None
    weight = data[cfg.weight_column] if cfg.weight_column is not None else None
    n_read = ra.size
    if n_read == 0:
        raise CatalogueError(f"catalogue {path}: has no rows", path=path)

    checks = [
        (cfg.ra_column, ra, np.isfinite(ra) & (ra >= -360.0) & (ra <= 360.0), "finite and within [-360, 360] degrees"),
        (cfg.dec_column, dec, np.isfinite(dec) & (np.abs(dec) <= 90.0), "finite and within [-90, 90] degrees"),
        (cfg.z_column, z, np.isfinite(z) & (z > 0.0), "finite and > 0"),
    ]
    if proxy is not None:
        checks.append((cfg.proxy_column, proxy, np.isfinite(proxy), "finite"))
    if weight is not None:
        checks.append((cfg.weight_column, weight, np.isfinite(weight) & (weight >= 0), "finite and >= 0"))
    valid = np.ones(n_read, dtype=bool)
    reason = np.full(n_read, "", dtype=object)
    for name, values, ok, rule in checks:
        reason[valid & ~ok] = f"invalid {name}"
        if not ok.all():
            message = f"catalogue {path}: column '{name}' must be {rule}; {_describe_invalid(name, values, ok)}"
            if not cfg.drop_invalid_rows:
                raise CatalogueError(message + f" (set {section}.drop_invalid_rows = true to drop them)",
                                     path=path, key=name, row=int(np.flatnonzero(~ok)[0]))
            warnings.warn(message + "; dropped", PairvelWarning, stacklevel=2)
            valid &= ok
    with np.errstate(invalid="ignore"):
        ra = np.where(valid, np.mod(ra, 360.0), ra)  # an invalid row keeps the value read, for the tracer table

    in_z = (z >= cfg.z_min) & (z < cfg.z_max)
    in_proxy = np.ones(n_read, dtype=bool) if proxy is None else (proxy >= cfg.proxy_min) & (proxy < cfg.proxy_max)
    keep = valid & in_z & in_proxy
    order = canonical_order([ra, dec, z, proxy, weight], np.flatnonzero(keep))
    repeat = _repeats(ra[order], dec[order], z[order])
    if repeat.any():
        _report_duplicates(path, cfg.duplicate_rows, order, repeat, section)
        if cfg.duplicate_rows == "drop":
            order = order[~repeat]
    reason[valid & ~in_z] = OUTSIDE_Z
    reason[valid & in_z & ~in_proxy] = OUTSIDE_PROXY
    kept = np.zeros(n_read, dtype=bool)
    kept[order] = True
    reason[keep & ~kept] = DUPLICATE
    gone = np.flatnonzero(~kept)
    removed = RemovedRows(gone, ra[gone], dec[gone], z[gone], _take(proxy, gone), _take(weight, gone),
                          reason[gone].astype(str))
    selection = {
        "rows_read": int(n_read),
        "invalid_dropped": int((~valid).sum()),
        "outside_z_range": int((valid & ~in_z).sum()),
        "outside_proxy_range": int((valid & in_z & ~in_proxy).sum()),
        "duplicates_dropped": int(keep.sum() - order.size),
        "kept": int(order.size),
    }
    if selection["kept"] < 2:
        raise CatalogueError(f"catalogue {path}: {selection['kept']} tracers left after cuts {selection}; need at least 2",
                             path=path)
    return Catalogue(
        ra=ra[order], dec=dec[order], z=z[order], proxy=None if proxy is None else proxy[order],
        row=order, path=str(path), sha256=file_sha256(path), selection=selection,
        weight=None if weight is None else weight[order], removed=removed,
    )


def canonical_order(columns, rows) -> np.ndarray:
    """``rows`` sorted by the values of ``columns`` (first column first; None entries skipped).

    Parameters
    ----------
    columns : list of ndarray of shape (n,) or None
        Finite values; the first column is the primary key.
    rows : ndarray of int
        The rows to order.

    Returns
    -------
    ndarray of int
        ``rows`` reordered; rows equal in every column keep their relative order (the sort is
        stable), so the order of the values is the same for any permutation of the rows.
    """
    keys = [c[rows] for c in reversed(columns) if c is not None]
    return rows[np.lexsort(keys)] if keys else rows


def _repeats(ra, dec, z) -> np.ndarray:
    """For tracers sorted with ra, dec, z as leading keys: true where a row repeats the one before."""
    same = np.zeros(ra.size, dtype=bool)
    same[1:] = (ra[1:] == ra[:-1]) & (dec[1:] == dec[:-1]) & (z[1:] == z[:-1])
    return same


def _report_duplicates(path, action, order, repeat, section="catalogue") -> None:
    """Stop or warn about repeated (ra, dec, z): the count, and the first repeats in file order,
    each named with the lowest row of its group."""
    group = np.cumsum(~repeat) - 1
    lowest = np.full(group[-1] + 1, order.max() + 1)
    np.minimum.at(lowest, group, order)
    pairs = sorted((int(r), int(lowest[g])) for r, g in zip(order, group) if r != lowest[g])
    shown = ", ".join(f"row {r} repeats row {o}" for r, o in pairs[:3]) + (", ..." if len(pairs) > 3 else "")
    message = (f"catalogue {path}: {len(pairs)} rows repeat the ra, dec and z of another kept row ({shown})")
    if action == "error":
        raise CatalogueError(message + f'; set {section}.duplicate_rows = "warn" to keep them or "drop" to drop '
                             "the repeats", path=path, key=f"{section}.duplicate_rows", row=pairs[0][0])
    warnings.warn(message + ("; dropped the repeats" if action == "drop" else "; kept"), PairvelWarning,
                  stacklevel=3)
