"""The second family of validation mocks: tracers placed in the cells of a density grid.

The first family (:func:`pairvel.sims.validate._draw_catalogue`) sums the Gaussian fields exactly at
each tracer, so its truth is the template's own continuous linear theory.  This one is built the
way a new user would build a quick mock, and its truth differs from the template by a known window:

1. a Gaussian density contrast delta_0 and velocity-potential gradient u_0 on the nodes of an FFT
   grid of cell c (the same box as the first family: the cone's bounding box grown by
   ``box_padding``; the Nyquist planes are left out so that both fields are real and consistent);
2. in each cell near the cone a Poisson number of tracers with mean n c^3 max(1 + b D(z) delta_0, 0)
   (z of the cell centre, n the constant comoving density giving ``n_tracers`` in the cone);
3. each tracer uniform inside its cell, kept when inside the cone, with its cell's velocity
   a H f D u_0 scaled to its own redshift.

Its expected pairwise signal
----------------------------
The density and the velocity seen by the tracers are piecewise constant over the cells.  For a pair
at separation vector r with its first member uniform in its cell, the node separation along each
axis is floor(r_i / c) with probability 1 - frac(r_i / c) and one more with probability
frac(r_i / c), independently per axis.  So the mean density-velocity cross-correlation of the
tracers, C(r) = <delta(x) u(x + r)>, is exactly the *trilinear interpolation* at r / c of the
lattice function C_node(m) = (1/V) sum_k P(k) (i k / k^2) exp(i k . m c), the band-limited
correlation of the node values, which one inverse FFT of P(k) i k / k^2 on the mock's own box
gives (periodic images included).  The template instead assumes the continuous
C(r) = -rhat r xibar(r) / 3 (:mod:`pairvel.model.template`).  The estimator weights each pair by
c_ij ~ rhat_ij . lhat and measures the line-of-sight velocity difference, so the expected curve
over the template's, per separation bin, is

    w_b = < mu C_cell(r) . lhat > / < -mu^2 r xibar(r) / 3 >,   mu = rhat . lhat,

averaged over separations in the bin (density r^2) and isotropic directions, with lines of sight
lhat drawn over the patch (:func:`cell_window`).  The growth, a H f and the bias factor out of
both, so w_b depends on the shape of P(k), the cell and the box only.  The 1 + b^2 xi denominator
of the template is left unchanged (the window changes b^2 xi by less than 0.2% of 1 beyond 20 Mpc).

The clipping at zero lowers the tracers' bias as in the first family (Stein's lemma with
f(x) = max(1 + x, 0), no upper cap; :func:`pairvel.sims.validate._clipped_density_moments`).
"""

from __future__ import annotations

__all__ = ["cell_window", "draw_cell_catalogue", "draw_cell_pair", "paired_window", "points_window"]

import functools
import math

import numpy as np

from ..model.cosmology import DEFAULT_COSMOLOGY

_NO_CAP = 1.0e6  # the cells' density is clipped at 0 only: an upper clip point no Gaussian reaches


def _cell_box(opt):
    """(frame, lo, shape, d_min, d_max) of the grid: the cone's bounding box grown by ``opt.box_padding``."""
    from ._fields import _cone_box, _patch_frame

    cosmo = DEFAULT_COSMOLOGY
    ra0, ra1, de0, de1 = -opt.ra_half_deg, opt.ra_half_deg, -opt.dec_half_deg, opt.dec_half_deg
    d_min, d_max = (float(d) for d in cosmo.comoving_distance_mpc([opt.z_min, opt.z_max]))
    frame = _patch_frame(ra0, ra1, de0, de1)
    lo, hi = _cone_box(ra0, ra1, de0, de1, d_min, d_max, opt.cell_mpc, frame)
    centre, half = 0.5 * (lo + hi), 0.5 * opt.box_padding * (hi - lo)
    shape = tuple(int(s) for s in np.ceil(2 * half / opt.cell_mpc).astype(int))
    return frame, centre - half, shape, d_min, d_max


def _modes(shape, cell):
    """P(k) / cell^3 and the wavevectors of a real-FFT grid, with the Nyquist planes set to zero power."""
    from ._fields import _grid_wavevectors, _power_at

    kx, ky, kz, k2 = _grid_wavevectors(shape, cell, half=True)
    power = _power_at(np.sqrt(k2), DEFAULT_COSMOLOGY) / cell**3
    power[0, 0, 0] = 0.0
    for axis, n in enumerate(shape):  # drop the Nyquist planes (rfft's last axis: its last index)
        if n % 2 == 0:
            idx = n // 2 if axis < 2 else power.shape[2] - 1
            power[(slice(None),) * axis + (idx,)] = 0.0
    return power, (kx, ky, kz), k2


def node_fields(shape, cell, rng):
    """delta_0 and u_0 = IFFT[i k / k^2 delta_0(k)] (Mpc) at the nodes of a periodic grid (float32)."""
    power, kvec, k2 = _modes(shape, cell)
    dk = np.fft.rfftn(rng.standard_normal(shape))
    dk *= np.sqrt(power)
    del power
    delta = np.fft.irfftn(dk, s=shape, axes=(0, 1, 2)).astype(np.float32)
    dk /= k2
    u = [np.fft.irfftn(1j * kk * dk, s=shape, axes=(0, 1, 2)).astype(np.float32) for kk in kvec]
    return delta, u


def draw_cell_catalogue(opt, rng: np.random.Generator):
    """Tracers of one cell-family mock: (ra, dec, z, v_r, bias_eff) as :func:`validate._draw_catalogue`.

    Poisson counts in the grid cells near the cone, positions uniform inside each cell, the cell's
    velocity (module docstring); ``bias_eff`` is ``opt.bias`` times the mean over the tracers of
    E[f'] / E[f] for f(x) = max(1 + x, 0), x = b D(z) delta_0 (Stein's lemma, as the first family).
    """
    return _draw(opt, rng, paired=False)[:5]


def draw_cell_pair(opt, rng: np.random.Generator):
    """As :func:`draw_cell_catalogue`, plus each tracer's line-of-sight velocity from the same Fourier modes
    summed exactly at its position (km/s): the same tracers and field with only the velocity read differently,
    so the two noiseless curves differ by far less than either scatters (``paired_exact``)."""
    return _draw(opt, rng, paired=True)


def _draw(opt, rng, *, paired: bool):
    from ..model.theory import growth_factor, growth_rate
    from ._fields import _gaussian_fields_at
    from .mock import _Cone, _poisson_cells, _tracers_in_cone
    from .validate import _clipped_density_moments

    cosmo = DEFAULT_COSMOLOGY
    frame, lo, shape, d_min, d_max = _cell_box(opt)
    z_grid = np.linspace(opt.z_min, opt.z_max, 256)
    cone = _Cone(frame, lo, shape, opt.cell_mpc, d_min, d_max, z_grid, growth_factor(z_grid, cosmo=cosmo),
                 growth_rate(z_grid, cosmo=cosmo))
    spec = _CellSpec(opt)
    twin = np.random.Generator(type(rng.bit_generator)())  # the same white noise for the exact sum
    twin.bit_generator.state = rng.bit_generator.state
    delta0, u0 = node_fields(shape, opt.cell_mpc, rng)
    cells, _ = _poisson_cells(cone, delta0, spec, rng)
    tracers = _tracers_in_cone(cone, cells, u0, spec, rng)
    del delta0, u0
    sigma0 = math.sqrt(_node_variance(shape, opt.cell_mpc))
    growth = np.interp(tracers.z, z_grid, cone.growth)
    mean_f, slope_f = _clipped_density_moments(opt.bias * growth * sigma0, _NO_CAP)
    bias_eff = opt.bias * float(np.mean(slope_f / mean_f))
    v_exact = None
    if paired:  # mock.py puts node i at the centre of cell i, lo + (i + 1/2) cell: shift the series' origin to match
        _, u = _gaussian_fields_at(tracers.pos @ frame.T, lo + 0.5 * opt.cell_mpc, shape, opt.cell_mpc, cosmo, twin)
        scale = cosmo.hubble_km_s_mpc(tracers.z) * growth_rate(tracers.z, cosmo=cosmo) * growth / (1.0 + tracers.z)
        v_exact = np.einsum("ij,ij->i", (u @ frame) * scale[:, None], tracers.pos) / np.linalg.norm(tracers.pos, axis=1)
    return tracers.ra, tracers.dec, tracers.z, tracers.v_r, bias_eff, v_exact


@functools.lru_cache(maxsize=4)
def _node_variance(shape, cell) -> float:
    """Variance of the z = 0 node field of :func:`node_fields` (the same for every mock of a run)."""
    from ._fields import _field_variance

    return _field_variance(shape, cell, DEFAULT_COSMOLOGY, drop_nyquist=True)


class _CellSpec:
    """The few fields of a mock spec that :mod:`pairvel.sims.mock`'s cell sampler reads, from validation options."""

    def __init__(self, opt):
        self.ra_min, self.ra_max = -opt.ra_half_deg, opt.ra_half_deg
        self.dec_min, self.dec_max = -opt.dec_half_deg, opt.dec_half_deg
        self.z_max, self.n_tracers, self.bias, self.cosmo = opt.z_max, opt.n_tracers, opt.bias, DEFAULT_COSMOLOGY


def node_cross_correlation(shape, cell):
    """C_node(m) (3, *shape), Mpc: <delta_0(n) u_0(n + m)> over the nodes of the periodic grid, for z = 0.

    (1/V) sum_k P(k) (i k / k^2) exp(i k . m cell) over the modes :func:`node_fields` draws (index m
    taken modulo the shape, so negative lags sit at the end of each axis).
    """
    power, kvec, k2 = _modes(shape, cell)  # power is P / cell^3, and irfftn divides by the number of cells
    return np.stack([np.fft.irfftn(1j * kk * power / k2, s=shape, axes=(0, 1, 2)) for kk in kvec])


def trilinear(lattice, shape, r_cells):
    """Trilinear interpolation of the periodic lattice functions ``lattice`` (q, *shape) at ``r_cells`` (n, 3)."""
    base = np.floor(r_cells).astype(np.int64)
    frac = r_cells - base
    out = np.zeros((lattice.shape[0], r_cells.shape[0]))
    for corner in np.ndindex(2, 2, 2):
        weight = np.prod(np.where(np.array(corner)[None, :] == 1, frac, 1.0 - frac), axis=1)
        idx = tuple(((base[:, a] + corner[a]) % shape[a]) for a in range(3))
        out += weight[None, :] * lattice[(slice(None),) + idx]
    return out


def _points_correlation(shape, cell, r_grid):
    """<delta_0(x) u_0(x + r)> (3, n), Mpc, of the fields :func:`pairvel.sims._fields._gaussian_fields_at` sums at
    points (the same modes, Nyquist planes left out), at separations ``r_grid`` (n, 3) in the grid frame: the
    Fourier series (1/V) sum_k P(k) (i k / k^2) exp(i k . r) summed by a type-2 non-uniform FFT."""
    import os

    import ducc0

    from ._fields import _grid_wavevectors, _power_at

    kx, ky, kz, k2 = _grid_wavevectors(shape, cell)
    n_cells = shape[0] * shape[1] * shape[2]
    power = _power_at(np.sqrt(k2), DEFAULT_COSMOLOGY) / cell**3 / n_cells
    power[0, 0, 0] = 0.0
    for axis, n in enumerate(shape):
        if n % 2 == 0:
            power[(slice(None),) * axis + (n // 2,)] = 0.0
    grids = np.empty((3,) + tuple(shape), np.complex128)
    for i, kk in enumerate((kx, ky, kz)):
        grids[i] = 1j * kk * power / k2
    del power, k2
    period = np.array(shape, dtype=float) * cell
    coord = np.ascontiguousarray(np.mod(r_grid, period))
    values = ducc0.nufft.u2nu(grid=grids, coord=coord, forward=False, epsilon=1e-7, nthreads=os.cpu_count() or 1,
                              periodicity=period.tolist(), fft_order=True)
    return values.real


@functools.lru_cache(maxsize=4)
def _window_cached(opt, edges: tuple, n_draw: int, seed: int, family: str) -> np.ndarray:
    from ..core.sphere import unit_vectors
    from ..model.theory import mean_correlation

    frame, _, shape, _, _ = _cell_box(opt)
    edges = np.asarray(edges, dtype=float)
    rng = np.random.default_rng(seed)
    nb = edges.size - 1
    r = np.empty((nb, n_draw))
    for b in range(nb):  # density r^2 in each bin; xibar is tabulated from 0.5 Mpc (1.6e-5 of the first bin)
        r[b] = np.cbrt(rng.uniform(max(edges[b], 0.5) ** 3, edges[b + 1] ** 3, n_draw))
    r = r.ravel()
    rhat = rng.standard_normal((r.size, 3))
    rhat /= np.linalg.norm(rhat, axis=1)[:, None]
    sin_dec = rng.uniform(math.sin(math.radians(-opt.dec_half_deg)), math.sin(math.radians(opt.dec_half_deg)), r.size)
    los = unit_vectors(rng.uniform(-opt.ra_half_deg, opt.ra_half_deg, r.size), np.degrees(np.arcsin(sin_dec)))
    los = los @ frame.T                                                   # lines of sight in the grid frame
    mu = np.einsum("nd,nd->n", rhat, los)
    if family == "cells":
        corr = trilinear(node_cross_correlation(shape, opt.cell_mpc), shape, rhat * (r / opt.cell_mpc)[:, None])
    elif family == "paired":  # density at one tracer's node, velocity exact at the other: one uniform offset
        offset = rng.uniform(-0.5 * opt.cell_mpc, 0.5 * opt.cell_mpc, rhat.shape)
        corr = _points_correlation(shape, opt.cell_mpc, rhat * r[:, None] + offset)
    else:
        corr = _points_correlation(shape, opt.cell_mpc, rhat * r[:, None])
    num = (mu * np.einsum("dn,nd->n", corr, los)).reshape(nb, n_draw).sum(axis=1)
    den = (-mu**2 * r * mean_correlation(r, 0.0, cosmo=DEFAULT_COSMOLOGY) / 3.0).reshape(nb, n_draw).sum(axis=1)
    return num / den


def cell_window(opt, edges, *, n_draw: int = 20000, seed: int = 1) -> np.ndarray:
    """w_b per separation bin: the cell family's expected curve over the continuous template (module docstring).

    Depends only on the options (grid, box, patch) and ``edges``; computed once per set of them (one
    inverse FFT per velocity component on the mock's box, then ``n_draw`` Monte Carlo separations per
    bin drawn from ``seed``; the Monte Carlo error is below 0.1%).
    """
    return _window_cached(opt, tuple(float(e) for e in edges), int(n_draw), int(seed), "cells").copy()


def points_window(opt, edges, *, n_draw: int = 20000, seed: int = 1) -> np.ndarray:
    """The same ratio for the first family (fields summed exactly at each tracer): what remains of the grid
    there is its band limit (the Nyquist cube, Nyquist planes dropped) and the periodic images of the box.

    The band-limited correlation at each drawn separation is the Fourier series of the box summed by a
    non-uniform FFT (:func:`_points_correlation`, about the cost of one mock's field synthesis).  The
    validation does not multiply that family's template by it; it reports it (``points_window``) and the
    amplitude it predicts.
    """
    return _window_cached(opt, tuple(float(e) for e in edges), int(n_draw), int(seed), "points").copy()


def paired_window(opt, edges, *, n_draw: int = 20000, seed: int = 1) -> np.ndarray:
    """The ratio for the paired curve of :func:`draw_cell_pair`: density read at a tracer's cell node, velocity
    summed exactly at its partner, so the lag is the separation plus one uniform offset within a cell."""
    return _window_cached(opt, tuple(float(e) for e in edges), int(n_draw), int(seed), "paired").copy()


def trend_kept_summary(rows: dict, truth: float) -> dict:
    """The noiseless fits without trend removal and the fraction of the noiseless signal the removal keeps.

    ``trend_kept_measured`` per bin is mean(p with the removal) / mean(p without it) over the mocks (same
    tracers, same pairs), with its delta-method standard error; ``trend_kept_predicted`` is the mean of
    the per-mock prediction of :func:`pairvel.model.trendmodel.trend_transfer` (``trend_transfer`` rows).
    """
    from .validate import _calibration

    out = {"noiseless_signal_no_trend": _calibration(rows["notrend_signal_tau_hat"], rows["notrend_signal_tau_err"],
                                                     rows["notrend_signal_lower_68"], rows["notrend_signal_upper_68"],
                                                     truth)}
    kept, plain = rows["signal_p_uk"], rows["notrend_signal_p_uk"]
    n = kept.shape[0]
    mk, mp = kept.mean(axis=0), plain.mean(axis=0)
    ratio = mk / mp
    # delta method for a ratio of two correlated means
    var = (np.var(kept, axis=0, ddof=1) - 2 * ratio * _cov_columns(kept, plain) + ratio**2 * np.var(plain, axis=0, ddof=1))
    out["trend_kept_measured"] = ratio.tolist()
    out["trend_kept_measured_se"] = (np.sqrt(np.maximum(var, 0.0) / n) / np.abs(mp)).tolist()
    if "trend_transfer" in rows:
        out["trend_kept_predicted"] = np.mean(rows["trend_transfer"], axis=0).tolist()
    return out


def _cov_columns(a, b):
    """Per-column sample covariance of two (n, q) arrays."""
    return np.sum((a - a.mean(axis=0)) * (b - b.mean(axis=0)), axis=0) / (a.shape[0] - 1)


def trend_kept_lines(summary: dict) -> list:
    """Terminal lines: the noiseless amplitude with the trend removal on and off, the fraction kept per bin."""
    truth = summary["tau_true"]
    lines = []
    for label, key in (("trend removed", "noiseless_signal"), ("no trend removal", "noiseless_signal_no_trend")):
        c = summary[key]
        lines.append(f"  noiseless amplitude / truth, {label}: {c['tau_hat_mean'] / truth:.4f} ± "
                     f"{c['tau_hat_scatter'] / truth / math.sqrt(c['n_mocks']):.4f} (standard error of the mean)")
    for label, key in (("measured", "trend_kept_measured"), ("predicted", "trend_kept_predicted")):
        if key in summary:
            lines.append(f"  signal kept by the trend removal per bin, {label}: "
                         + ", ".join(f"{v:.3f}" for v in summary[key]))
    return lines
