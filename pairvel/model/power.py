"""A linear power spectrum read from a file, for users who bring their own Boltzmann-code output.

Two layouts are read:

- plain text: two numeric columns, k in 1/Mpc and P(k) in Mpc^3, separated by spaces, tabs or
  commas; lines starting with ``#`` are comments;
- ECSV (``.ecsv``): columns ``k`` and ``pk``; a column that carries a unit is converted to 1/Mpc
  and Mpc^3 (so a table in h/Mpc and (Mpc/h)^3 written with astropy units is read correctly),
  including ``littleh`` units; a column without a unit is taken to be in 1/Mpc or Mpc^3 already.

Between the tabulated points P(k) is interpolated linearly in log k - log P.  The template needs
P(k) from 1e-5 to 1e3 / Mpc, so outside the table it is extended as power laws: k^n_s below
the first point (the primordial slope, where the transfer function is 1) and the log-slope of
the last decade of the table above the last point.  The table must cover at least
[``K_MIN_REQUIRED``, ``K_MAX_REQUIRED``] so that the extension changes xi(r) on 10-150 Mpc by
well under a per cent (see tests/model/test_power.py).
"""

from __future__ import annotations

__all__ = ["K_MAX_REQUIRED", "K_MIN_REQUIRED", "TabulatedPower", "read_power_table"]

import hashlib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core.errors import InputError

#: The table must start at or below this wavenumber, 1/Mpc.
K_MIN_REQUIRED = 1e-3
#: The table must reach at least this wavenumber, 1/Mpc.
K_MAX_REQUIRED = 2.0


@dataclass(frozen=True, eq=False)
class TabulatedPower:
    """Linear matter P(k) on a grid, at redshift ``z``.

    Attributes
    ----------
    k : ndarray of shape (n,), 1/Mpc, strictly increasing
    pk : ndarray of shape (n,), Mpc^3, > 0
    z : float
        Redshift the table is for; the template scales it with the growth factor.
    renormalise : bool
        Rescale the table so that sigma(8 Mpc/h, z=0) equals the cosmology's sigma_8.
    source : str
        File it was read from.
    sha256 : str
        Checksum of that file (recorded in the outputs).
    n_s : float
        Slope used to extend the table below its first point.

    Notes
    -----
    Instances compare and hash by identity, so the template's caches hold one set of FFTLog
    tables per table read.
    """

    k: np.ndarray
    pk: np.ndarray
    z: float = 0.0
    renormalise: bool = False
    source: str = "<array>"
    sha256: str = ""
    n_s: float = 0.965
    _slope_hi: float = field(default=0.0, repr=False)

    def __post_init__(self):
        k = np.asarray(self.k, dtype=float)
        pk = np.asarray(self.pk, dtype=float)
        where = f"power-spectrum table {self.source}"
        if k.ndim != 1 or pk.shape != k.shape or k.size < 8:
            raise InputError(f"{where} must have at least 8 rows of (k, P); got shapes {k.shape} and {pk.shape}",
                             path=self.source)
        for name, arr in (("k", k), ("P", pk)):
            bad = ~(np.isfinite(arr) & (arr > 0))
            if bad.any():
                i = int(np.flatnonzero(bad)[0])
                raise InputError(f"{where}: column {name} must be finite and > 0; {int(bad.sum())} rows are not "
                                 f"(first: row {i}, {name}={arr[i]!r})", path=self.source, row=i)
        steps = np.diff(k)
        if np.any(steps <= 0):
            i = int(np.flatnonzero(steps <= 0)[0]) + 1
            raise InputError(f"{where}: k must increase strictly; row {i} has k={k[i]!r} after {k[i - 1]!r}",
                             path=self.source, row=i)
        if k[0] > K_MIN_REQUIRED or k[-1] < K_MAX_REQUIRED:
            raise InputError(f"{where} must cover k from <= {K_MIN_REQUIRED:g} to >= {K_MAX_REQUIRED:g} 1/Mpc; "
                             f"got {k[0]:.3g} to {k[-1]:.3g} (is k in h/Mpc? write 1/Mpc, or an ECSV with units)",
                             path=self.source)
        if not (np.isfinite(self.z) and 0 <= self.z <= 20):
            raise InputError(f"{where}: redshift of the table must be in [0, 20]; got {self.z!r}", path=self.source)
        top = k >= k[-1] / 10
        slope = np.polyfit(np.log(k[top]), np.log(pk[top]), 1)[0]
        if not slope < -1.5:  # linear P(k) falls as about k^-2.3 to k^-2.7 at 2-50 /Mpc
            raise InputError(f"{where}: P(k) must fall at least as steeply as k^-1.5 over the last decade of k "
                             f"to be extended beyond it; its log-slope there is {slope:.2f}", path=self.source)
        object.__setattr__(self, "k", k)
        object.__setattr__(self, "pk", pk)
        object.__setattr__(self, "_slope_hi", float(slope))

    def __call__(self, k_mpc):
        """P(k) at the table's redshift, Mpc^3, interpolated in log-log and extended as power laws."""
        k = np.asarray(k_mpc, dtype=float)
        lk = np.log(np.clip(k, 1e-300, None))
        lk0, lk1 = np.log(self.k[0]), np.log(self.k[-1])
        inside = np.interp(lk, np.log(self.k), np.log(self.pk))
        low = np.log(self.pk[0]) + self.n_s * (lk - lk0)
        high = np.log(self.pk[-1]) + self._slope_hi * (lk - lk1)
        return np.exp(np.where(lk < lk0, low, np.where(lk > lk1, high, inside)))


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _read_ecsv(path: Path, h: float):
    import astropy.units as u
    from astropy.cosmology import units as cu
    from astropy.table import Table

    try:
        with u.add_enabled_units(cu):  # so that littleh in a unit string is understood
            table = Table.read(path, format="ascii.ecsv")
    except (ValueError, TypeError, KeyError, OSError) as err:  # astropy's reader errors derive from these
        raise InputError(f"power-spectrum table {path}: not a readable ECSV table ({err})", path=path) from None
    names = {n.lower(): n for n in table.colnames}
    missing = [c for c in ("k", "pk") if c not in names]
    if missing:
        raise InputError(f"power-spectrum table {path} must have columns 'k' and 'pk'; missing {missing} "
                         f"(has {table.colnames})", path=path, key=missing[0])
    out = []
    for name, unit in (("k", u.Mpc**-1), ("pk", u.Mpc**3)):
        col = table[names[name]]
        try:
            values = np.asarray(col, dtype=float)
        except (TypeError, ValueError):
            raise InputError(f"power-spectrum table {path}: column '{name}' must be numeric", path=path,
                             key=name) from None
        if col.unit is not None:
            try:
                values = (values * col.unit).to_value(unit, equivalencies=cu.with_H0(100 * h * u.km / u.s / u.Mpc))
            except u.UnitConversionError:
                raise InputError(f"power-spectrum table {path}: column '{name}' has unit '{col.unit}', which "
                                 f"cannot be converted to '{unit}'", path=path, key=name) from None
        out.append(values)
    return out


def _read_text(path: Path):
    rows = []
    try:
        lines = path.read_text().splitlines()
    except UnicodeDecodeError:
        raise InputError(f"power-spectrum table {path}: not a text file (expected two columns k, P)",
                         path=path) from None
    for i, line in enumerate(lines):
        text = line.split("#", 1)[0].replace(",", " ").split()
        if not text:
            continue
        if len(text) != 2:
            raise InputError(f"power-spectrum table {path}: line {i + 1} must hold two numbers (k in 1/Mpc, "
                             f"P in Mpc^3); got {len(text)} fields", path=path, row=i)
        try:
            rows.append((float(text[0]), float(text[1])))
        except ValueError:
            raise InputError(f"power-spectrum table {path}: line {i + 1} is not numeric: {line.strip()[:60]!r}",
                             path=path, row=i) from None
    if not rows:
        raise InputError(f"power-spectrum table {path} holds no data rows", path=path)
    arr = np.array(rows)
    return arr[:, 0], arr[:, 1]


def read_power_table(path, *, z: float = 0.0, renormalise: bool = False, n_s: float = 0.965, h: float = 0.677) -> TabulatedPower:
    """Read a linear P(k) table (see the module notes for the layouts).

    Parameters
    ----------
    path : str or Path
        ``.ecsv`` for ECSV; anything else is read as two text columns.
    z : float, default 0
        Redshift of the tabulated spectrum.
    renormalise : bool, default False
        Rescale to the cosmology's sigma_8 (otherwise the table's own amplitude is used).
    n_s : float
        Slope of the extension below the first tabulated k.
    h : float
        H0 / 100 km/s/Mpc, to convert ECSV columns written in astropy's ``littleh`` units.

    Raises
    ------
    InputError
        The file is missing or unreadable, has the wrong columns, non-numeric, non-positive or
        non-increasing values, or does not cover the k range the template needs.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"power-spectrum table {path}: file not found", path=path)
    k, pk = _read_ecsv(path, h) if path.suffix.lower() == ".ecsv" else _read_text(path)
    return TabulatedPower(k, pk, z=float(z), renormalise=bool(renormalise), source=str(path),
                          sha256=_sha256(path), n_s=float(n_s))
