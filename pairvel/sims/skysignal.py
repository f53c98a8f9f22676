"""A kSZ and thermal-SZ signal of the tracers for the simulated-sky covariance.

In: the tracers of a run (ra, dec, z), its aperture radii, an optical depth and a thermal-SZ level.
Out: a callback ``signal(rng) -> (n_radii, N)`` aperture temperatures, uK, that
:func:`pairvel.stats.simcov.simulate_aperture_temperatures` adds to each simulated sky, so that the
simulated covariance holds the signal's own sample variance besides the CMB and noise.

Each call draws a Gaussian linear velocity field (:mod:`pairvel.sims._fields`, the mock's
machinery) summed exactly at the tracers' comoving positions, and gives tracer i the kSZ aperture
temperature dT_i = -tau T_CMB v_r,i / c at the primary radius, plus a thermal-SZ decrement
-A 10^(s g_i) / <10^(s g)> with a fresh standard normal g_i per tracer and map (log-normal scatter
s dex around the mean A).  The field is drawn independently of the tracers' positions (they are the
data's), so a sky's mean pairwise signal is zero and only its scatter enters the covariance: the
velocity term of the signal's variance, not the part from the tracers' own clustering.

At another radius theta_k the aperture returns a beam-convolved point-like profile of the same
integral, dT_i (theta_0 / theta_k)^2 f(theta_k) / f(theta_0), with f of
:func:`pairvel.maps.photometry.point_source_fraction` (flat sky, pixelisation and overlaps of
neighbouring tracers left out).
"""

from __future__ import annotations

__all__ = ["tracer_signal"]

import math

import numpy as np

from ..core.constants import C_KM_S, T_CMB_UK
from ..core.errors import InputError
from ..maps.photometry import point_source_fraction
from ..model.cosmology import DEFAULT_COSMOLOGY
from ..pairs.geometry import comoving_positions
from ._fields import _gaussian_fields_at, _patch_frame

_BOX_PADDING = 1.5          # the periodic box is the tracers' bounding box grown 1.5x about its centre
_MAX_CELLS = 30_000_000     # about 2 GB of complex grids in the field sum


def tracer_signal(ra_deg, dec_deg, z, radii_arcmin, *, tau: float, tsz_uk: float = 0.0, tsz_scatter_dex: float = 0.2,
                  beam_fwhm_arcmin: float = 0.0, cell_mpc: float = 10.0, radius_scale=None,
                  cosmo=DEFAULT_COSMOLOGY):
    """The signal callback for the simulated skies (see the module docstring).

    Parameters
    ----------
    ra_deg, dec_deg, z : ndarray of shape (N,)
        The tracers.
    radii_arcmin : sequence of float, arcmin
        The run's aperture radii, primary first (:func:`pairvel.maps.radii.aperture_radii`).
    tau : float
        Aperture optical depth of every tracer at the primary radius (0: no kSZ).
    tsz_uk : float, uK
        Mean thermal-SZ aperture decrement at the primary radius (0: none).
    tsz_scatter_dex : float, dex
        Log-normal scatter of the thermal SZ, drawn per tracer and per call.
    beam_fwhm_arcmin : float, arcmin
        Beam of the signal's profile (sets how the aperture response changes with radius).
    cell_mpc : float, Mpc
        Cell of the FFT grid of the velocity field.
    radius_scale : ndarray of shape (N,), optional
        Per-tracer factor on every radius (physical radii).
    cosmo : Cosmology

    Returns
    -------
    callable(numpy.random.Generator) -> ndarray of shape (n_radii, N), uK
        Its ``grid`` attribute describes the periodic box of the velocity field (corner ``lo_mpc``
        and axes ``frame`` as in :mod:`pairvel.sims._fields`, ``shape``, ``cell_mpc``).
    """
    from ..model.theory import growth_factor, growth_rate

    z = np.asarray(z, dtype=float)
    radii = np.asarray(radii_arcmin, dtype=float)
    scale = np.ones(z.size) if radius_scale is None else np.asarray(radius_scale, dtype=float)
    response = np.array([[point_source_fraction(r * s, beam_fwhm_arcmin) for s in scale] for r in radii])
    response *= (radii[0] / radii)[:, None] ** 2 / response[0]          # (n_radii, N), 1 at the primary radius

    pos = comoving_positions(ra_deg, dec_deg, z, cosmo=cosmo)
    unit = pos / np.linalg.norm(pos, axis=1)[:, None]
    centre = unit.mean(axis=0)
    ra_c = math.degrees(math.atan2(centre[1], centre[0]))
    dec_c = math.degrees(math.atan2(centre[2], math.hypot(centre[0], centre[1])))
    frame = _patch_frame(ra_c, ra_c, dec_c, dec_c)                      # grid axes towards the tracers
    q = pos @ frame.T
    mid, half = 0.5 * (q.min(axis=0) + q.max(axis=0)), 0.5 * _BOX_PADDING * (np.ptp(q, axis=0) + 2 * cell_mpc)
    lo = mid - half
    shape = tuple(int(n) for n in np.ceil(2 * half / cell_mpc))
    if math.prod(shape) > _MAX_CELLS:
        raise InputError(f"covariance.sim_signal_cell_mpc = {cell_mpc:g} gives a velocity grid of "
                         f"{math.prod(shape):,} cells around the tracers; the most is {_MAX_CELLS:,}: increase it",
                         key="covariance.sim_signal_cell_mpc")
    zg = np.linspace(z.min(), z.max(), 256)                             # D and f vary slowly: interpolate
    growth = np.interp(z, zg, growth_factor(zg, cosmo=cosmo))
    vel_scale = np.interp(z, zg, growth_rate(zg, cosmo=cosmo)) * growth * cosmo.hubble_km_s_mpc(z) / (1.0 + z)
    ksz_per_v = -float(tau) * T_CMB_UK / C_KM_S
    s = float(tsz_scatter_dex) * math.log(10.0)

    def signal(rng) -> np.ndarray:
        dt = np.zeros(z.size)
        if tau:
            _, u = _gaussian_fields_at(q, lo, shape, cell_mpc, cosmo, rng)
            v_r = np.einsum("ij,ij->i", u @ frame, unit) * vel_scale
            dt += ksz_per_v * v_r
        if tsz_uk:
            dt -= tsz_uk * np.exp(s * rng.standard_normal(z.size) - 0.5 * s * s)
        return response * dt[None, :]

    signal.grid = {"lo_mpc": lo, "shape": shape, "cell_mpc": float(cell_mpc), "frame": frame}  # for checks
    return signal
