"""Map units to thermodynamic microkelvin (uK_CMB), through :mod:`astropy.units`.

Three families of map units are read:

* thermodynamic (CMB) temperature: K_CMB, mK_CMB, uK_CMB (also spelled ``K``, ``Kcmb``, ``mK``,
  ``uK``, ``muK``, ``microK``, ``µK``, ...): a pure prefix scaling, no frequency needed;
* Rayleigh-Jeans (brightness) temperature: K_RJ, mK_RJ, uK_RJ;
* surface brightness: MJy/sr, Jy/sr and any other unit astropy parses as one (``MJy sr-1``).

The last two need the map's frequency.  At one frequency nu the factor is the ratio of the unit's
surface brightness to that of 1 uK_CMB, both from astropy's equivalencies:
``astropy.units.brightness_temperature(nu)`` for K_RJ and
``astropy.units.thermodynamic_temperature(nu, T_cmb)`` (the derivative dB_nu/dT of the Planck law at
T_cmb, so a small temperature shift) for K_CMB, with T_cmb = 2.72548 K
(:data:`pairvel.core.constants.T_CMB_K`).

Bandpass convention.  With a bandpass table (frequency nu in GHz, transmission tau(nu) >= 0, any
normalisation), the factor from the map unit to uK_CMB is

    F = int tau(nu) R_unit(nu) dnu / int tau(nu) dB_nu/dT|_{T_cmb} dnu,

where R_unit(nu) is the surface brightness of one map unit at nu: 1 MJy/sr at every nu for MJy/sr
(a spectrum flat in I_nu, with no colour correction), 2 k nu^2 / c^2 per kelvin for K_RJ.  That is,
the map value is the band-integrated response to the sky divided by the band-integrated response
to the unit's own reference spectrum, and F is the same ratio for a CMB temperature shift.  The
transmission multiplies the specific intensity I_nu (a detector whose response is per unit power);
for a photon-counting response fold 1/nu into the table.  The integrals are trapezoid sums over
the table's nodes.  A band narrow enough reproduces the single-frequency factor.
"""

from __future__ import annotations

__all__ = ["MapUnit", "Bandpass", "parse_map_unit", "unit_to_uk", "read_bandpass", "header_frequency_ghz",
           "resolve_unit_factor", "ACCEPTED_UNITS"]

import math
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import astropy.units as u

from ..core.constants import T_CMB_K
from ..core.errors import MapError, PairvelWarning

ACCEPTED_UNITS = ("a CMB temperature (K_CMB, mK_CMB, uK_CMB), a Rayleigh-Jeans temperature (K_RJ, mK_RJ, uK_RJ) "
                  "or a surface brightness (MJy/sr, Jy/sr)")

# Temperature spellings after normalisation (lower case, no spaces, micro sign as u), as astropy units.
_TEMPERATURES = {
    "k": "K", "kelvin": "K",
    "mk": "mK", "millik": "mK", "millikelvin": "mK",
    "uk": "uK", "muk": "uK", "microk": "uK", "microkelvin": "uK",
}
_CMB_SUFFIXES = ("_cmb", "-cmb", "(cmb)", "cmb", "_thermo")
_RJ_SUFFIXES = ("_rj", "-rj", "(rj)", "rj")
_BRIGHTNESS = u.MJy / u.sr
# Header cards that may carry the map's frequency: a number in GHz or a string with its unit ("150 GHz")
# for FREQ; Hz for RESTFRQ / RESTFREQ (the FITS standard's rest frequency card).
_FREQUENCY_CARDS = (("FREQ", u.GHz), ("RESTFRQ", u.Hz), ("RESTFREQ", u.Hz))
FREQUENCY_KEY = "map.frequency_ghz"


@dataclass(frozen=True)
class MapUnit:
    """A map unit understood: ``kind`` is "cmb", "rj" or "brightness"; ``unit`` the astropy unit
    (a kelvin multiple, or a surface-brightness unit); ``label`` as written."""

    label: str
    kind: str
    unit: u.UnitBase

    @property
    def needs_frequency(self) -> bool:
        return self.kind != "cmb"


@dataclass(frozen=True, eq=False)
class Bandpass:
    """A bandpass table: frequencies (GHz, increasing) and transmissions (>= 0, any normalisation)."""

    nu_ghz: np.ndarray
    transmission: np.ndarray
    path: str | None = None


def _strip(text: str, suffixes) -> str | None:
    for suffix in suffixes:
        if text.endswith(suffix) and len(text) > len(suffix):
            return text[: -len(suffix)]
    return None


def parse_map_unit(label, *, where: str = "map", path=None) -> MapUnit:
    """The :class:`MapUnit` of a unit label; :class:`MapError` for anything else.

    A bare temperature (``K``, ``mK``, ``uK``) is thermodynamic, as pairvel always read it.
    """
    text = str(label).strip().lower().replace(" ", "").replace("\u00b5", "u").replace("\u03bc", "u")
    cmb = _strip(text, _CMB_SUFFIXES)
    rj = _strip(text, _RJ_SUFFIXES) if cmb is None else None
    if cmb is not None and cmb in _TEMPERATURES:
        return MapUnit(str(label), "cmb", u.Unit(_TEMPERATURES[cmb]))
    if rj is not None and rj in _TEMPERATURES:
        return MapUnit(str(label), "rj", u.Unit(_TEMPERATURES[rj]))
    if cmb is None and rj is None and text in _TEMPERATURES:
        return MapUnit(str(label), "cmb", u.Unit(_TEMPERATURES[text]))
    try:
        unit = u.Unit(str(label).strip().replace("\u03bc", "u")) if str(label).strip() else None
    except (ValueError, TypeError):
        unit = None
    if unit is not None and unit.is_equivalent(_BRIGHTNESS):
        return MapUnit(str(label), "brightness", unit)
    raise MapError(f"{where} unit must be {ACCEPTED_UNITS}; got {label!r}", path=path, key="unit")


def _unit_response(unit: MapUnit, nu_ghz) -> np.ndarray:
    """Surface brightness (MJy/sr) of one map unit at each frequency (GHz)."""
    nu = np.atleast_1d(np.asarray(nu_ghz, dtype=float))
    if unit.kind == "brightness":
        return np.full(nu.shape, (1.0 * unit.unit).to_value(_BRIGHTNESS))
    return (1.0 * unit.unit).to_value(_BRIGHTNESS, equivalencies=u.brightness_temperature(nu * u.GHz))


def _cmb_response(nu_ghz, t_cmb_k: float) -> np.ndarray:
    """Surface brightness (MJy/sr) of a 1 uK_CMB shift at each frequency (GHz): dB_nu/dT at T_cmb."""
    nu = np.atleast_1d(np.asarray(nu_ghz, dtype=float))
    return (1.0 * u.uK).to_value(_BRIGHTNESS, equivalencies=u.thermodynamic_temperature(nu * u.GHz, t_cmb_k * u.K))


def unit_to_uk(unit, *, where: str = "map", frequency_ghz=None, bandpass: Bandpass | None = None,
               t_cmb_k: float = T_CMB_K, path=None) -> float:
    """Factor that converts a map value in ``unit`` to uK_CMB.

    Parameters
    ----------
    unit : str
        See :func:`parse_map_unit` and the module docstring.
    where : str
        What the unit belongs to, for messages (e.g. ``"map maps/m.fits"``).
    frequency_ghz : float, optional
        The map's frequency, needed by Rayleigh-Jeans and surface-brightness units unless
        ``bandpass`` is given; ignored for CMB temperatures.
    bandpass : Bandpass, optional
        Used instead of ``frequency_ghz`` (the band-weighted factor of the module docstring).
    t_cmb_k : float, default 2.72548
        CMB temperature, K.
    path : str, optional
        File the unit came from, carried by the error.

    Returns
    -------
    float
        uK_CMB per map unit.

    Raises
    ------
    MapError
        An unknown unit, or a non-CMB unit without a frequency or bandpass.
    """
    parsed = parse_map_unit(unit, where=where, path=path)
    if not parsed.needs_frequency:
        # a power of ten; astropy's binary prefix arithmetic leaves one ulp (1000.0000000000001)
        return float(f"{parsed.unit.to(u.uK):.15g}")
    if bandpass is not None:
        tau, nu = bandpass.transmission, bandpass.nu_ghz
        return float(np.trapezoid(tau * _unit_response(parsed, nu), nu)
                     / np.trapezoid(tau * _cmb_response(nu, t_cmb_k), nu))
    if frequency_ghz is None:
        raise MapError(f"{where} unit {unit!r} is not a CMB temperature, so its conversion to uK_CMB needs the map's "
                       f"frequency; set {FREQUENCY_KEY} (or map.bandpass_path, or a FREQ card in the header)",
                       path=path, key=FREQUENCY_KEY)
    nu = float(frequency_ghz)
    if not (math.isfinite(nu) and nu > 0):
        raise MapError(f"{where}: frequency must be a positive number of GHz; got {frequency_ghz!r}", path=path,
                       key=FREQUENCY_KEY)
    return float(_unit_response(parsed, nu)[0] / _cmb_response(nu, t_cmb_k)[0])


# ---------------------------------------------------------------------- bandpass tables
def read_bandpass(path) -> Bandpass:
    """Read a bandpass table: ECSV (first column the frequency, in GHz or with a frequency unit; second
    the transmission) or plain text (two whitespace-separated columns, nu [GHz] and transmission,
    ``#`` comments).

    Rows must have increasing frequencies, finite transmissions >= 0, and some transmission > 0.
    """
    spath = str(path)
    what = f"bandpass {spath}"
    if not Path(spath).is_file():
        raise MapError(f"{what} cannot be read: no such file", path=spath, key="map.bandpass_path")
    try:
        if spath.lower().endswith(".ecsv"):
            from astropy.table import Table

            table = Table.read(spath, format="ascii.ecsv")
            if len(table.colnames) < 2:
                raise ValueError(f"it has {len(table.colnames)} column(s); need frequency and transmission")
            nu_col, tau_col = table.columns[0], table.columns[1]
            nu = np.asarray(nu_col, dtype=float)
            if nu_col.unit is not None and nu_col.unit != u.dimensionless_unscaled:
                nu = (nu * nu_col.unit).to_value(u.GHz)
            tau = np.asarray(tau_col, dtype=float)
        else:
            data = np.loadtxt(spath, comments="#", ndmin=2)
            if data.shape[1] != 2:
                raise ValueError(f"rows must hold 2 numbers (nu in GHz, transmission); they hold {data.shape[1]}")
            nu, tau = data[:, 0], data[:, 1]
    except (OSError, ValueError, TypeError, u.UnitsError) as err:
        reason = str(err).splitlines()[0] if str(err) else type(err).__name__
        raise MapError(f"{what} cannot be read ({reason})", path=spath, key="map.bandpass_path") from None
    return _checked_bandpass(nu, tau, what, spath)


def _checked_bandpass(nu, tau, what, spath) -> Bandpass:
    if nu.size < 2:
        raise MapError(f"{what} must have at least 2 rows; got {nu.size}", path=spath)
    bad = np.flatnonzero(~(np.isfinite(nu) & (nu > 0)))
    if bad.size:
        raise MapError(f"{what}: frequencies must be finite and > 0 GHz; row {bad[0]} has {float(nu[bad[0]]):g}",
                       path=spath, row=int(bad[0]))
    bad = np.flatnonzero(np.diff(nu) <= 0)
    if bad.size:
        raise MapError(f"{what}: frequencies must increase strictly; row {bad[0] + 1} ({nu[bad[0] + 1]:g} GHz) does "
                       f"not exceed row {bad[0]} ({nu[bad[0]]:g} GHz)", path=spath, row=int(bad[0] + 1))
    bad = np.flatnonzero(~(np.isfinite(tau) & (tau >= 0)))
    if bad.size:
        raise MapError(f"{what}: transmissions must be finite and >= 0; row {bad[0]} has {float(tau[bad[0]]):g}",
                       path=spath, row=int(bad[0]))
    if not np.trapezoid(tau, nu) > 0:
        raise MapError(f"{what}: the transmission is zero over the whole band", path=spath)
    return Bandpass(np.asarray(nu, dtype=float), np.asarray(tau, dtype=float), spath)


# ---------------------------------------------------------------------- what a reader does with a file's unit
def header_frequency_ghz(header, what: str, spath: str) -> float | None:
    """The map's frequency (GHz) from a FITS header, or None when it names none.

    FREQ: a number in GHz, or a string with a unit (``"150 GHz"``); RESTFRQ and
    RESTFREQ: a number in Hz (the FITS standard's rest-frequency card).  The first present wins.
    """
    for card, default in _FREQUENCY_CARDS:
        if card not in header:
            continue
        raw = header[card]
        try:
            if isinstance(raw, str):
                value = u.Quantity(raw.strip())
                value = value * default if value.unit == u.dimensionless_unscaled else value
            elif isinstance(raw, bool):
                raise TypeError("a boolean")
            else:
                value = float(raw) * default
            nu = float(value.to_value(u.GHz))
        except (TypeError, ValueError, u.UnitsError):
            raise MapError(f"{what}: header {card} must be a frequency (a number of {default}, or a string such as "
                           f"'150 GHz'); got {raw!r}", path=spath, key=card) from None
        if not (math.isfinite(nu) and nu > 0):
            raise MapError(f"{what}: header {card} must be a positive frequency; got {raw!r}", path=spath, key=card)
        return nu
    return None


def resolve_unit_factor(file_unit, requested_unit, *, what: str, path: str, header=None, frequency_ghz=None,
                        bandpass_path=None, stacklevel: int = 3) -> tuple[float, str]:
    """The factor to uK_CMB of a map whose file names ``file_unit`` (or None), read with the config's
    ``requested_unit``, ``frequency_ghz`` and ``bandpass_path`` (each None when unset).

    The requested unit wins over the file's (with a warning when they differ), and the configured
    frequency over the header's (likewise); a bandpass table, when given, replaces both frequencies.
    ``header`` (the FITS header, or None) is read for a frequency only when the unit needs one, so a
    CMB-temperature map is never stopped by a frequency card pairvel cannot read.  Returns the factor
    and the unit label used.
    """
    if file_unit is None and requested_unit is None:
        raise MapError(f"{what} names no unit (no TUNITn, BUNIT or UNIT keyword); set map.unit in the config to "
                       f"{ACCEPTED_UNITS}", path=path, key="unit")
    used = file_unit if requested_unit is None else requested_unit
    where = what if requested_unit is None else f"{what}: requested"
    needs = parse_map_unit(used, where=where, path=path).needs_frequency
    nu = header_frequency_ghz(header, what, path) if needs and header is not None else None
    if not needs and bandpass_path is not None:
        warnings.warn(f"{what}: bandpass {bandpass_path} is not used: unit {used!r} is a CMB temperature, which needs "
                      f"no frequency", PairvelWarning, stacklevel=stacklevel)
        bandpass_path = None
    if frequency_ghz is not None:
        if nu is not None and abs(nu - frequency_ghz) > 1e-6 * frequency_ghz:
            warnings.warn(f"{what}: the header gives frequency {nu:g} GHz but the config gives {frequency_ghz:g} GHz; "
                          f"using {frequency_ghz:g} GHz", PairvelWarning, stacklevel=stacklevel)
        nu = frequency_ghz
    band = None if bandpass_path is None else read_bandpass(bandpass_path)
    options = dict(frequency_ghz=nu, bandpass=band, path=path)
    if requested_unit is None:
        return unit_to_uk(file_unit, where=what, **options), str(file_unit)
    factor = unit_to_uk(requested_unit, where=f"{what}: requested", **options)
    if file_unit is not None:
        try:
            differs = unit_to_uk(file_unit, where=what, **options) != factor
        except MapError:  # a file label pairvel cannot convert is overridden all the same
            differs = True
        if differs:
            warnings.warn(f"{what}: the file says unit {file_unit!r} but {requested_unit!r} was requested; using "
                          f"{requested_unit!r}", PairvelWarning, stacklevel=stacklevel)
    return factor, str(requested_unit)
