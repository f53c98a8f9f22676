"""The sky-map interface every stage talks to, and what all pixelisations share.

A :class:`SkyMap` is a temperature map in thermodynamic microkelvin (uK_CMB), or a mask, on one
pixelisation of the sphere.  It holds some of its grid's pixels (the *held* pixels: all of them
for a full-sky map, the listed ones for a partial map); ``values`` and ``weight`` are aligned with
the held pixels, and an ``index`` argument is a position in those arrays.  Every held pixel has a
usable weight in [0, 1] (1 = usable, 0 = masked); pixels a map does not hold count as masked.

Photometry, the pre-filter, simulated skies, null tests, the several-frequency combination and the
monopole/dipole removal use only the methods below; the geometry (which pixels an aperture
covers, harmonic transforms on the grid, random points in a pixel) is each implementation's
business.  :class:`pairvel.maps.healpix.HealpixMap` is the HEALPix one.  A new pixelisation is one
more file with a subclass that implements the abstract methods, and a module that reads its files
(``claims_file``, ``read_map``, ``read_mask``) named in ``_FILE_FORMATS`` below.

Also here, for every pixelisation: the frame letters, the temperature units accepted on reading,
:func:`read_map` and :func:`read_mask` (which pick the reader from the file), and
:func:`remove_monopole_dipole`.
"""

from __future__ import annotations

__all__ = ["SkyMap", "read_map", "read_mask", "footprint_fraction", "unit_to_uk", "remove_monopole_dipole",
           "frame_letter"]

import importlib
import math
import warnings
from abc import ABC, abstractmethod

import numpy as np

from ..core.errors import MapError, PairvelWarning

_EQUATORIAL = ("C", "Q", "CELESTIAL", "EQUATORIAL", "ICRS", "FK5")
# Frame spellings pairvel accepts, to one letter: equatorial C, Galactic G, ecliptic E.
_FRAMES = {**{k: "C" for k in _EQUATORIAL}, "G": "G", "GAL": "G", "GALACTIC": "G", "E": "E", "ECL": "E",
           "ECLIPTIC": "E"}
FRAME_NAMES = {"C": "equatorial", "G": "Galactic", "E": "ecliptic"}

# Temperature units pairvel accepts, after normalisation (see _normalise_unit), as factors to uK_CMB.
_UNIT_TO_UK = {
    "k": 1e6, "kelvin": 1e6,
    "mk": 1e3, "millik": 1e3, "millikelvin": 1e3,
    "uk": 1.0, "muk": 1.0, "microk": 1.0, "microkelvin": 1.0,
}
ACCEPTED_UNITS = "K_CMB, mK_CMB or uK_CMB"

# Modules that read map files of one pixelisation, asked in turn whether a file is theirs.
_FILE_FORMATS = ("pairvel.maps.healpix_io", "pairvel.maps.car_io")


def frame_letter(coordsys) -> str | None:
    """The frame letter, C, G or E, of an accepted spelling (``"ICRS"``, ``"galactic"``, ...); None for others."""
    return _FRAMES.get(str(coordsys).strip().upper())


class SkyMap(ABC):
    """A map in uK_CMB (or a mask) on one pixelisation, over the whole sphere or part of it.

    Attributes
    ----------
    values : ndarray of shape (n_held,), uK_CMB
        One value per held pixel (float32 stays float32).  For a mask, the mask values.
    weight : ndarray of shape (n_held,), float32
        Usable weight in [0, 1] of each held pixel; 0 where the value is NaN or a bad-pixel marker.
    path : str or None
        File the map was read from (or a label), for messages and provenance.
    coordsys : {"C", "G", "E"}
        Frame of the pixel grid: equatorial, Galactic or ecliptic.  Tracer positions, always
        equatorial, are rotated into it; the map is never rotated.
    plane_note : str or None
        Which plane of a several-plane file the values come from (e.g. ``"Stokes I (plane 0 of 3 on
        axis 3)"``), said in the run log; None when the file has one.

    Notes
    -----
    Implementations are immutable: methods return new maps, arrays may be shared between them,
    and nobody modifies them in place.  Methods taking an ``index`` take positions in ``values``.
    """

    values: np.ndarray
    weight: np.ndarray
    path: str | None
    coordsys: str
    plane_note: str | None = None

    # ------------------------------------------------------------------ the grid
    @property
    @abstractmethod
    def grid_label(self) -> str:
        """The pixel grid in a few words for messages, e.g. ``"nside 2048"``."""

    @property
    @abstractmethod
    def pixel_area_sr(self) -> float:
        """Solid angle of a typical pixel, sr (every pixel's, on an equal-area grid)."""

    @property
    def pixel_area_arcmin2(self) -> float:
        """:attr:`pixel_area_sr` in arcmin^2."""
        return self.pixel_area_sr * (180.0 * 60.0 / math.pi) ** 2

    @property
    def pixel_size_arcmin(self) -> float:
        """Square root of the typical pixel area, arcmin."""
        return math.sqrt(self.pixel_area_arcmin2)

    @property
    @abstractmethod
    def band_limit(self) -> int:
        """Largest multipole the grid's harmonic transforms use by default (3 nside - 1 for HEALPix)."""

    @abstractmethod
    def same_grid(self, other: "SkyMap") -> bool:
        """True when ``other`` lies on the same pixel grid (pixel layout and storage order may differ)."""

    @abstractmethod
    def usable_fraction(self) -> float:
        """Weighted fraction of the sphere that is usable: sum of weight x pixel area / 4 pi."""

    # ------------------------------------------------------------------ new maps from this one
    @abstractmethod
    def with_values(self, values, *, weight=None, path=None) -> "SkyMap":
        """The same held pixels with new values (and weights, and label, when given).

        Parameters
        ----------
        values : ndarray of shape (n_held,), uK
        weight : ndarray of shape (n_held,), optional
            Default: this map's weights.  Bad values get weight 0 whatever is passed.
        path : str, optional
            Default: this map's.
        """

    def with_mask(self, mask: "SkyMap") -> "SkyMap":
        """This map with its weights multiplied by a mask on the same grid and in the same frame.

        Parameters
        ----------
        mask : SkyMap
            From :func:`read_mask`: values in [0, 1]; pixels it does not hold count as masked.

        Returns
        -------
        SkyMap
            Same pixels and values (not copied), new weights.
        """
        if not isinstance(mask, SkyMap):
            raise MapError(f"mask must be a SkyMap (from read_mask); got {type(mask).__name__}")
        name = "mask" if mask.path is None else f"mask {mask.path}"
        if not self.same_grid(mask):
            raise MapError(f"{name} has {mask.grid_label} but the map has {self.grid_label}", path=mask.path)
        if mask.coordsys != self.coordsys:
            raise MapError(f"{name} is in frame {mask.coordsys} but the map is in frame {self.coordsys} "
                           f"(COORDSYS); pairvel does not rotate masks", path=mask.path, key="COORDSYS")
        mvals, mweight = mask.values_on(self)
        factor = np.where(mweight > 0, np.clip(np.nan_to_num(mvals), 0.0, 1.0), 0.0).astype(np.float32)
        return self.with_values(self.values, weight=self.weight * factor)

    # ------------------------------------------------------------------ maps of one grid read together
    def _check_grid(self, grid: "SkyMap"):
        """MapError unless ``grid`` lies on this map's pixel grid."""
        if not self.same_grid(grid):
            raise MapError(f"map {grid.path} has {grid.grid_label} but map {self.path} has {self.grid_label}; "
                           f"their pixels cannot be matched", path=grid.path)

    @abstractmethod
    def values_on(self, grid: "SkyMap") -> tuple[np.ndarray, np.ndarray]:
        """This map's values and weights at the held pixels of ``grid``, a map on the same grid.

        Returns
        -------
        values : ndarray of shape (grid's n_held,), this map's dtype
            NaN where this map does not hold the pixel.
        weight : ndarray of the same shape, float32
            0 where this map does not hold the pixel.
        """

    @abstractmethod
    def neighbour_values_on(self, grid: "SkyMap", index) -> tuple[np.ndarray, np.ndarray]:
        """This map's values and weights at the 8 neighbours of held pixels ``index`` of ``grid``.

        Returns
        -------
        values, weight : ndarray of shape (8, len(index))
            Weight 0 where a pixel has fewer than 8 neighbours or this map does not hold one.
        """

    # ------------------------------------------------------------------ positions
    @abstractmethod
    def from_equatorial(self, ra_deg, dec_deg) -> tuple[np.ndarray, np.ndarray]:
        """Equatorial positions (degrees) as longitude and latitude in this map's frame, degrees."""

    @abstractmethod
    def to_equatorial(self, lon_deg, lat_deg) -> tuple[np.ndarray, np.ndarray]:
        """Longitude and latitude in this map's frame (degrees) as equatorial RA and Dec, degrees."""

    @abstractmethod
    def pixel_vectors(self, index) -> np.ndarray:
        """Unit vectors (n, 3) of the centres of held pixels ``index``, in this map's frame."""

    @abstractmethod
    def pixel_lonlat(self, index) -> tuple[np.ndarray, np.ndarray]:
        """Longitude and latitude (degrees, this map's frame) of the centres of held pixels ``index``."""

    @abstractmethod
    def random_points(self, n: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
        """``n`` points uniform over the area of the usable pixels (weight > 0), as longitude and
        latitude in degrees in this map's frame.  The map must have a usable pixel."""

    # ------------------------------------------------------------------ aperture photometry
    @abstractmethod
    def aperture_sums(self, vectors, radius_rad, outer_radius_rad, *, weighting="centre", method="auto",
                      subsample_level=3, progress=None) -> np.ndarray:
        """Sums over a disc and the annulus around it, for every position and radius.

        Parameters
        ----------
        vectors : ndarray of shape (N, 3)
            Unit vectors of the aperture centres in this map's frame.
        radius_rad, outer_radius_rad : ndarray of shape (R, N), radians
            Disc radius, and outer radius of the annulus that starts at the disc's edge.
        weighting : {"centre", "fraction", "subsample"}
            How a pixel counts in a region: whole by its centre; by a linear ramp in distance one
            mean pixel size wide across each edge; or by the fraction of its 4^subsample_level
            sub-pixel centres inside (computed for pixels near an edge).
        method : {"auto", "kernel", "direct"}
            Compiled path ("kernel", centre and fraction only) or numpy reference ("direct");
            "auto" takes the kernel unless ``weighting`` is "subsample".  Both give the same sums.
        subsample_level : int
        progress : callable(done, total), optional

        Returns
        -------
        ndarray of shape (6, R, N)
            For the disc, then the annulus: the number of pixels in it (with the weighting's
            fractions), the sum of their usable weights, and the weighted sum of their values (uK).
            Pixels this map does not hold count in the first sum only.

        Notes
        -----
        Arguments come validated from :func:`pairvel.maps.photometry.measure_apertures`.
        """

    # ------------------------------------------------------------------ harmonic space
    @abstractmethod
    def filtered(self, transfer, *, n_iter: int = 3) -> "SkyMap":
        """The map through a_lm -> F_l a_lm, on the same held pixels and weights.

        Masked and unheld pixels are set to the mean of the usable values first (no apodisation);
        the analysis runs to l = len(transfer) - 1, with ``n_iter`` Jacobi iterations where the
        grid's quadrature is not exact (0: none).
        """

    @abstractmethod
    def pixel_window(self, lmax: int) -> np.ndarray:
        """Harmonic window p_l (l = 0..lmax) of a typical pixel, p_0 = 1."""

    @abstractmethod
    def source_map(self, lon_deg, lat_deg, amplitude, *, fwhm_arcmin=None) -> "SkyMap":
        """Every pixel of this grid (weight 1), zero but for point sources, in this map's frame.

        With ``fwhm_arcmin``, circular Gaussian beams of that FWHM whose solid-angle integrals are
        ``amplitude`` (uK sr), evaluated at the pixel centres (overlaps add); without it, each
        ``amplitude`` (uK) is added to the pixel holding its position.
        """

    @abstractmethod
    def aperture_support(self, lon_deg, lat_deg, radius_arcmin) -> "SkyMap":
        """Zeros (weight 1) on every pixel of this grid whose centre lies within ``radius_arcmin``
        (one value, or one per position) of one of the positions (degrees, this map's frame), held
        by this map or not."""

    @abstractmethod
    def synthesise(self, alm, *, lmax: int, n_threads=None) -> np.ndarray:
        """The band-limited field sum_lm a_lm Y_lm at the centres of the held pixels, (n_held,).

        ``alm`` is complex, for m >= 0 in the triangular m-major layout shared by healpy and ducc0
        (see :func:`pairvel.maps.harmonics.alm_ell_m`); ``n_threads`` defaults to every core.
        """

    @abstractmethod
    def white_noise(self, level_uk_arcmin: float, rng: np.random.Generator) -> np.ndarray:
        """Independent Gaussian noise in each held pixel, sigma = level / sqrt(pixel area), (n_held,) uK."""


def footprint_fraction(skymap: SkyMap) -> float:
    """Weighted fraction of the sphere that is usable (:meth:`SkyMap.usable_fraction`).

    Multiply by 41252.96 deg^2 (4 pi sr) for the usable area.
    """
    return skymap.usable_fraction()


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
        raise MapError(f"{where} unit must be a CMB temperature unit ({ACCEPTED_UNITS}); got {unit!r}")
    return factor


# The pixel rms of a CMB temperature map, in uK_CMB [common practice]: the primary anisotropies give
# ~100 uK on degree scales; instrument noise in arcminute pixels runs from ~10 uK (deep maps) to a
# few mK (shallow or high-frequency ones, where foregrounds also reach tens of mK); high-passed or
# matched-filtered maps keep a few uK.  So 1 uK to 3e4 uK (30 mK) covers every plausible map.
_PLAUSIBLE_RMS_UK = (1.0, 3e4)
# Outside 1e-2..1e5 uK the unit is suspicious (a warning).  A factor 10^3 beyond the plausible range,
# below 1e-3 uK or above 3e7 uK, no temperature map is left: the label is wrong by ~10^6 (K read as
# uK, or the reverse), and a run on it would give a tau_mean off by 10^6, so a run stops there.
_RMS_WARN_UK = (1e-2, 1e5)
_RMS_STOP_UK = (_PLAUSIBLE_RMS_UK[0] * 1e-3, _PLAUSIBLE_RMS_UK[1] * 1e3)
RMS_CHECK_KEY = "map.rms_unit_check"


def check_unit_scale(values, bad, what, unit, *, stop=False, path=None, stacklevel=3):
    """Judge the unit of a map from the rms of its good pixels (in uK after the conversion).

    Warns outside 1e-2..1e5 uK; with ``stop``, raises :class:`MapError` (naming ``path``) below
    1e-3 uK or above 3e7 uK, a factor 10^3 beyond any plausible CMB temperature map (1 uK to 30 mK), which is where
    a unit label wrong by 10^6 lands.  A constant map (rms 0) is not judged.
    """
    good = values[~bad]
    if good.size == 0:
        return
    step = max(1, good.size // 1_000_000)  # a strided sample is enough for an order of magnitude
    rms = float(np.std(good[::step], dtype=np.float64))
    lo, hi = _RMS_STOP_UK
    if stop and rms > 0.0 and not lo <= rms <= hi:
        raise MapError(f"{what}: pixel rms is {rms:.3g} uK after reading it as unit {unit!r}, outside the "
                       f"{lo:g}-{hi:g} uK possible for a CMB temperature map (plausible: "
                       f"{_PLAUSIBLE_RMS_UK[0]:g}-{_PLAUSIBLE_RMS_UK[1]:g} uK); the unit label is likely wrong by "
                       f"10^6: fix the file's unit or map.unit (or set {RMS_CHECK_KEY} = false to run anyway)",
                       path=path, key=RMS_CHECK_KEY)
    lo, hi = _RMS_WARN_UK
    if rms == 0.0 or lo <= rms <= hi:
        return
    guess = "K_CMB" if rms < lo else "a smaller unit (mK or uK)"
    warnings.warn(f"{what}: pixel rms is {rms:.3g} uK after reading it as {unit!r}, outside the {lo:g}-{hi:g} uK "
                  f"of CMB maps; is the unit really {guess}? Check map.unit", PairvelWarning, stacklevel=stacklevel)


# ---------------------------------------------------------------------- reading, whatever the pixelisation
def _file_format(path):
    """The reader module of the first pixelisation that claims the file; the first one when none does
    (its reader then says what is wrong with the file)."""
    modules = [importlib.import_module(name) for name in _FILE_FORMATS]
    return next((m for m in modules if m.claims_file(path)), modules[0])


def _read(reader, path, options):
    """``reader(path, **options)``, its warnings passed on as if raised where read_map/read_mask was called."""
    caught = []
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            return reader(path, **options)
    finally:
        for w in caught:
            warnings.warn(w.message, w.category, stacklevel=3)


def read_map(path, **options) -> SkyMap:
    """Read a temperature map into uK_CMB with the reader of the pixelisation the file holds.

    Parameters
    ----------
    path : str or Path
    **options
        Keywords of that reader; every reader takes ``field``, ``unit``, ``coordsys``,
        ``ordering`` (the config's ``map.ordering``, for grids whose files may omit their pixel
        order) and ``rms_check`` (stop on a pixel rms no CMB temperature map has, see
        :func:`check_unit_scale`).  See :func:`pairvel.maps.healpix_io.read_map`.
    """
    return _read(_file_format(path).read_map, path, options)


def read_mask(path, **options) -> SkyMap:
    """Read a mask (1 = use, 0 = masked) with the reader of the pixelisation the file holds; apply it
    with :meth:`SkyMap.with_mask`, which checks that it lies on the map's grid.

    ``options`` are keywords of that reader (``coordsys``, ``ordering``; see
    :func:`pairvel.maps.healpix_io.read_mask`).
    """
    return _read(_file_format(path).read_mask, path, options)


# ---------------------------------------------------------------------- monopole and dipole
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
    x, y, z = skymap.pixel_vectors(fit_idx).T
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
        vx, vy, vz = skymap.pixel_vectors(np.arange(c0, c1)).T
        values[c0:c1] -= (coef[0] + coef[1] * vx + coef[2] * vy + coef[3] * vz).astype(values.dtype)
    return skymap.with_values(values), coef
