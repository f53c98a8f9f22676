"""Pairwise-velocity models beyond linear theory: the JSD99 closed form and a user-supplied v12(r, z) table.

**Juszkiewicz et al. (1999, ApJ 518, L25), their eqs. 6-7** (closed form fitted to
perturbation theory and N-body results):

    v12(r, z) = -(2/3) H(z) a f(z) r xi2(r, z) [1 + alpha xi2(r, z)],   xi2 = b xibar / (1 + b^2 xi),
    alpha = 1.2 - 0.65 gamma,   gamma = -dln xi / dln r where xi(r, z) = 1.

xi and xibar are the run's linear matter correlation functions at z (:mod:`pairvel.model.theory`);
the bias enters xi2 exactly as in the linear template, so that JSD99 is the linear template times
(1 + alpha xi2) and the two converge where xi2 << 1.  gamma is the local slope of the linear
matter xi(r, z) where it crosses 1; for a power-law spectrum P ~ k^n it is n + 3 (xi ~ r^-(n+3)),
so alpha = 1.2 - 0.65 (n + 3) for scale-free initial conditions of index n (the paper's
alpha(n) form).

**A v12(r, z) table** (from simulations or another model): an ECSV or FITS table read with
astropy, with columns ``r`` (a length unit, converted to Mpc) and ``v12`` (a velocity unit,
converted to km/s), and optionally ``z`` (dimensionless).  Without ``z`` the curve is used at every
redshift; with it the rows must form a full grid (every r at every z, each once).  It is
interpolated linearly in log r and in z and never extrapolated: separations or redshifts outside
the table are an error.  The table is taken as the tracers' own v12, so theory.bias does not
enter it.
"""

from __future__ import annotations

__all__ = ["V12Table", "jsd99_alpha", "jsd99_velocity", "read_v12_table"]

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..core.errors import TheoryError
from .cosmology import DEFAULT_COSMOLOGY, Cosmology
from .theory import correlation_function, mean_correlation, pairwise_velocity

_SLOPE_GRID = np.geomspace(0.5, 200.0, 600)


def jsd99_alpha(z: float, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None) -> tuple:
    """(alpha, gamma, r_1) of JSD99 at redshift z: gamma = -dln xi/dln r where the linear xi(r_1, z) = 1."""
    xi = correlation_function(_SLOPE_GRID, z, cosmo=cosmo, wiggles=wiggles, power=power)
    above = xi >= 1.0
    if not above[0] or above.all():
        raise TheoryError(f"the JSD99 slope needs the linear xi(r, z={z:g}) to cross 1 between "
                          f"{_SLOPE_GRID[0]:g} and {_SLOPE_GRID[-1]:g} Mpc; it runs from {xi[0]:.3g} to {xi[-1]:.3g}")
    i = int(np.argmin(above))  # first r with xi < 1
    lr, lx = np.log(_SLOPE_GRID), np.log(np.abs(xi))
    t = lx[i - 1] / (lx[i - 1] - lx[i])  # log xi = 0 between nodes i-1 and i
    r_1 = float(np.exp(lr[i - 1] + t * (lr[i] - lr[i - 1])))
    slope = np.gradient(lx, lr)
    gamma = -float(slope[i - 1] + t * (slope[i] - slope[i - 1]))
    return 1.2 - 0.65 * gamma, gamma, r_1


def jsd99_velocity(r_mpc, z, bias=1.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None,
                   growth: str = "exact"):
    """Mean pairwise velocity of JSD99 (module notes), km/s, negative for approaching pairs."""
    v_lin = pairwise_velocity(r_mpc, z, bias, cosmo=cosmo, wiggles=wiggles, power=power, growth=growth)
    r = np.asarray(r_mpc, dtype=float)
    xi = correlation_function(r, z, cosmo=cosmo, wiggles=wiggles, power=power)
    xibar = mean_correlation(r, z, cosmo=cosmo, wiggles=wiggles, power=power)
    xi2 = bias * xibar / (1.0 + bias**2 * xi)
    alpha, _, _ = jsd99_alpha(z, cosmo=cosmo, wiggles=wiggles, power=power)
    return v_lin * (1.0 + alpha * xi2)


@dataclass(frozen=True)
class V12Table:
    """A tabulated v12(r[, z]): ``r_mpc`` (n_r,), ``z`` (n_z,) or None, ``v12_km_s`` (n_z or 1, n_r)."""

    r_mpc: np.ndarray
    z: np.ndarray | None
    v12_km_s: np.ndarray
    source: str
    sha256: str

    def __call__(self, r_mpc, z: float):
        """v12 at separations ``r_mpc`` and one redshift ``z``, km/s (interpolated, never extrapolated)."""
        r = np.asarray(r_mpc, dtype=float)
        lo, hi = self.r_mpc[0], self.r_mpc[-1]
        if r.size and (r.min() < lo * (1 - 1e-12) or r.max() > hi * (1 + 1e-12)):
            raise TheoryError(f"v12 table {self.source}: covers r in [{lo:g}, {hi:g}] Mpc but the template needs "
                              f"[{r.min():.4g}, {r.max():.4g}] Mpc; extend the table or the bins (bins.*)")
        if self.z is None:
            rows = self.v12_km_s[0]
        elif not self.z[0] - 1e-12 <= z <= self.z[-1] + 1e-12:
            raise TheoryError(f"v12 table {self.source}: covers z in [{self.z[0]:g}, {self.z[-1]:g}] but the "
                              f"pairs reach z = {z:.4g}; extend the table or set catalogue.z_min / z_max")
        else:
            j = int(np.clip(np.searchsorted(self.z, z) - 1, 0, self.z.size - 2))
            t = (z - self.z[j]) / (self.z[j + 1] - self.z[j])
            rows = (1 - t) * self.v12_km_s[j] + t * self.v12_km_s[j + 1]
        return np.interp(np.log(np.clip(r, lo, hi)), np.log(self.r_mpc), rows)


def _column(table, name: str, unit, what: str, path) -> np.ndarray:
    import astropy.units as u

    if name not in table.colnames:
        raise TheoryError(f"v12 table {path}: needs a column '{name}' ({what}); has {table.colnames}")
    col = table[name]
    if unit is None:
        if col.unit not in (None, u.dimensionless_unscaled):
            raise TheoryError(f"v12 table {path}: column '{name}' must be dimensionless; has unit {col.unit}")
        values = np.asarray(col, dtype=float)
    else:
        if col.unit is None:
            raise TheoryError(f"v12 table {path}: column '{name}' must carry a unit ({what}); it has none")
        try:
            values = (np.asarray(col, dtype=float) * col.unit).to_value(unit)
        except u.UnitConversionError:
            raise TheoryError(f"v12 table {path}: column '{name}' must be {what}; has unit {col.unit}") from None
    if not np.all(np.isfinite(values)):
        bad = int(np.flatnonzero(~np.isfinite(values))[0])
        raise TheoryError(f"v12 table {path}: column '{name}' must be finite; row {bad} is {values[bad]}")
    return values


def read_v12_table(path) -> V12Table:
    """Read a v12(r[, z]) table (ECSV or FITS with units; module notes), checking it fully."""
    from astropy.table import Table
    import astropy.units as u

    path = Path(path)
    name = path.name.lower()
    fmt = "ascii.ecsv" if name.endswith(".ecsv") else "fits" if name.endswith((".fits", ".fit", ".fits.gz")) else None
    if fmt is None:
        raise TheoryError(f"v12 table {path}: must be an .ecsv or .fits file")
    try:
        data = path.read_bytes()
        table = Table.read(path, format=fmt)
    except OSError as err:
        raise TheoryError(f"v12 table {path}: cannot be read ({err.strerror or err})") from None
    except Exception as err:  # astropy raises many kinds for a malformed file
        raise TheoryError(f"v12 table {path}: is not a readable {fmt} table ({type(err).__name__}: {err})") from None
    r = _column(table, "r", u.Mpc, "a comoving separation with a length unit", path)
    v = _column(table, "v12", u.km / u.s, "a velocity with a unit such as km / s", path)
    if r.size < 2 or np.any(r <= 0):
        raise TheoryError(f"v12 table {path}: needs >= 2 rows with r > 0; got {r.size} rows, min r {r.min():g}")
    if "z" not in table.colnames:
        order = np.argsort(r)
        if np.any(np.diff(r[order]) <= 0):
            raise TheoryError(f"v12 table {path}: column 'r' repeats a value; without a 'z' column each r appears once")
        return V12Table(r[order], None, v[order][None, :], str(path), hashlib.sha256(data).hexdigest())
    z = _column(table, "z", None, "a redshift", path)
    rs, zs = np.unique(r), np.unique(z)
    if zs.size < 2 or rs.size < 2 or r.size != rs.size * zs.size or zs.min() < 0:
        raise TheoryError(f"v12 table {path}: rows must form a full r x z grid with >= 2 values of each and z >= 0; "
                          f"got {r.size} rows for {rs.size} r and {zs.size} z values")
    grid = np.full((zs.size, rs.size), np.nan)
    grid[np.searchsorted(zs, z), np.searchsorted(rs, r)] = v
    if np.any(np.isnan(grid)):
        raise TheoryError(f"v12 table {path}: rows must form a full r x z grid; some (r, z) pairs repeat or are missing")
    return V12Table(rs, zs, grid, str(path), hashlib.sha256(data).hexdigest())
