"""Optional harmonic-space filtering of the temperature map before the aperture photometry.

A filter is a function of multipole F_l applied as a_lm -> F_l a_lm to the map (masked and
unheld pixels set to the mean of the usable ones first; no apodisation), by the map's own
harmonic transforms (:meth:`~pairvel.maps.skymap.SkyMap.filtered`).  Kinds:

* ``highpass``: 0 below ``highpass_ell - highpass_width``, 1 above ``highpass_ell``, a cosine
  taper between: removes the large-scale primary CMB that the compensated aperture only partly
  cancels.
* ``matched``: F_l = B_l / (C_l B_l^2 + N_l), the filter that maximises the signal-to-noise of
  a beam-shaped (unresolved) source in a background of power C_l B_l^2 + N_l [common practice:
  the matched filter for compact sources on a Gaussian background].
* ``wiener``: F_l = N_l / (C_l B_l^2 + N_l), the map minus its Wiener estimate of the primary
  CMB, C_l B_l^2 / (C_l B_l^2 + N_l) times the map [common practice]: the CMB is removed where it
  is measured well and the noise-dominated scales are kept.

C_l is the lensed CMB power (uK^2, before the beam) from ``cl_path`` or the table pairvel ships;
N_l is white noise, (noise_uk_arcmin in uK rad)^2; B_l a Gaussian beam of ``beam_fwhm_arcmin``
or a B_l table.

Filtering changes how much of a tracer's kSZ the compensated aperture collects.  To keep the
aperture temperatures (and tau_mean) in the units of the unfiltered map, the filtered map is
divided by the response R of the aperture to a beam-shaped source, filtered over unfiltered:

* ``normalise = "aperture"``: analytic, R = sum_l (2l+1) p_l B_l W_l F_l / sum_l (2l+1) p_l B_l W_l,
  with W_l the Legendre coefficients of the compensated aperture (disc mean minus annulus mean,
  from the disc window [P_{l-1}(cos t) - P_{l+1}(cos t)] / ((2l+1)(1 - cos t))) and p_l the
  map's pixel window (:meth:`~pairvel.maps.skymap.SkyMap.pixel_window`; for HEALPix, the window
  of a disc of one pixel's area, an approximation);
* ``normalise = "injected"``: beam-shaped sources painted at random footprint pixels of an empty
  map, filtered, and measured with the pipeline's own photometry; captures the pixelisation
  the analytic form misses when the filter boosts scales near the pixel size;
* ``normalise = "none"``: no correction (the aperture temperatures are in filtered units).
"""

from __future__ import annotations

__all__ = ["PrefilterResult", "filter_transfer", "aperture_window", "aperture_response", "apply_prefilter",
           "read_beam_table", "plot_transfer", "prefilter_markdown"]

import math
from dataclasses import dataclass

import numpy as np

from ..core.constants import ARCMIN_RAD
from ..core.errors import ConfigError, InputError
from ..core.plotstyle import new_figure, plot_style, save_figure
from .harmonics import gaussian_beam

_MAX_LMAX = 16384


@dataclass(frozen=True)
class PrefilterResult:
    """What a filter did: the kind, its F_l (before the response division) and the response."""

    kind: str
    lmax: int
    transfer: np.ndarray
    response: float
    normalise: str
    response_analytic: float

    def info(self) -> dict:
        ell = np.arange(self.transfer.size)
        half = ell[self.transfer >= 0.5 * self.transfer.max()]
        return {"kind": self.kind, "lmax": self.lmax, "normalise": self.normalise,
                "aperture_response": round(float(self.response), 6),
                "aperture_response_analytic": round(float(self.response_analytic), 6),
                "ell_above_half_peak": [int(half.min()), int(half.max())] if half.size else None,
                "ell_of_peak": int(ell[np.argmax(self.transfer)])}


def read_beam_table(path, lmax: int) -> np.ndarray:
    """B_l for l = 0..lmax from a two-column text table (ell, B_l); ell must start at 0 and increase."""
    try:
        table = np.loadtxt(path, comments="#", ndmin=2)
    except (OSError, ValueError) as err:
        raise InputError(f"prefilter.beam_path {path}: cannot be read as an (ell, B_l) table ({err})", path=path) from None
    if table.shape[1] < 2 or not np.all(np.isfinite(table[:, :2])):
        raise InputError(f"prefilter.beam_path {path}: needs two finite columns ell, B_l", path=path)
    ell, bl = table[:, 0], table[:, 1]
    if ell[0] != 0 or np.any(np.diff(ell) <= 0):
        raise InputError(f"prefilter.beam_path {path}: ell must start at 0 and increase", path=path)
    if abs(bl[0] - 1.0) > 0.05:
        raise InputError(f"prefilter.beam_path {path}: B_0 = {bl[0]:g}; a beam table is normalised to B_0 = 1", path=path)
    if ell[-1] < lmax:
        raise InputError(f"prefilter.beam_path {path}: reaches ell = {int(ell[-1])}, below lmax = {lmax}", path=path)
    return np.interp(np.arange(lmax + 1), ell, bl)


def _beam(pc, lmax: int) -> np.ndarray:
    if pc.beam_path is not None:
        return read_beam_table(pc.beam_path, lmax)
    if pc.beam_fwhm_arcmin is not None:
        return gaussian_beam(pc.beam_fwhm_arcmin, lmax)
    return np.ones(lmax + 1)


def _cmb_cl(pc, lmax: int) -> np.ndarray:
    if pc.cl_path is not None:
        try:
            table = np.loadtxt(pc.cl_path, comments="#", ndmin=2)
        except (OSError, ValueError) as err:
            raise InputError(f"prefilter.cl_path {pc.cl_path}: cannot be read as an (ell, C_l) table ({err})",
                             path=pc.cl_path) from None
        if table.shape[1] < 2 or not np.all(np.isfinite(table[:, :2])) or np.any(table[:, 1] < 0):
            raise InputError(f"prefilter.cl_path {pc.cl_path}: needs two finite columns ell, C_l >= 0 (uK^2)",
                             path=pc.cl_path)
        ell, cl = table[:, 0], table[:, 1]
    else:
        from ..model.cmb import load_cmb_cl

        ell, cl = load_cmb_cl()
    out = np.zeros(lmax + 1)
    ok = np.arange(lmax + 1) <= ell.max()
    out[ok] = np.interp(np.arange(lmax + 1)[ok], ell, cl)
    # beyond the table the CMB is damped away; keep the last value's tail falling as l^-4 (small next to noise)
    if (~ok).any():
        out[~ok] = cl[-1] * (ell.max() / np.arange(lmax + 1)[~ok]) ** 4
    return out


def filter_transfer(pc, lmax: int) -> np.ndarray:
    """F_l for l = 0..lmax of the ``[prefilter]`` settings ``pc`` (a PrefilterConfig), peak 1."""
    ell = np.arange(lmax + 1, dtype=float)
    if pc.kind == "highpass":
        lo, hi = pc.highpass_ell - pc.highpass_width, pc.highpass_ell
        f = np.clip((ell - lo) / max(hi - lo, 1e-12), 0.0, 1.0)
        f = 0.5 - 0.5 * np.cos(np.pi * f)
        f[ell >= hi] = 1.0
        f[ell < lo] = 0.0
        return f
    bl = _beam(pc, lmax)
    cl = _cmb_cl(pc, lmax)
    nl = np.full(lmax + 1, (pc.noise_uk_arcmin * ARCMIN_RAD) ** 2)
    total = cl * bl**2 + nl
    if pc.kind == "matched":
        f = bl / total
    elif pc.kind == "wiener":
        f = nl / total
    else:
        raise ConfigError(f"prefilter.kind: unknown kind {pc.kind!r}", key="prefilter.kind")
    f[:2] = 0.0  # monopole and dipole carry no source signal
    return f / f.max()


def aperture_window(radius_arcmin: float, lmax: int) -> np.ndarray:
    """Legendre coefficients W_l of the compensated aperture: mean over the disc of radius theta minus
    the mean over the annulus theta..sqrt(2) theta (so a uniform sky gives 0, W_0 = 0)."""
    from scipy.special import eval_legendre

    ell = np.arange(lmax + 2)

    def disc(theta):
        x = math.cos(theta)
        p = eval_legendre(ell, x)
        w = np.empty(lmax + 1)
        w[0] = 1.0
        w[1:] = (p[:lmax] - p[2:lmax + 2]) / ((2 * ell[1:lmax + 1] + 1) * (1 - x))
        return w

    t1 = radius_arcmin * ARCMIN_RAD
    t2 = math.sqrt(2.0) * t1
    a1, a2 = 1 - math.cos(t1), 1 - math.cos(t2)
    w1, w2 = disc(t1), disc(t2)
    annulus = (a2 * w2 - a1 * w1) / (a2 - a1)
    return w1 - annulus


def aperture_response(transfer, beam, radius_arcmin: float, pixel_window=None) -> float:
    """Analytic response of the compensated aperture to a beam-shaped source: filtered over unfiltered.

    ``transfer``, ``beam`` and ``pixel_window`` (default 1) are arrays over l = 0..lmax.
    """
    lmax = transfer.size - 1
    w = aperture_window(radius_arcmin, lmax)
    pw = np.ones(lmax + 1) if pixel_window is None else pixel_window
    weights = (2 * np.arange(lmax + 1) + 1) * pw * beam * w
    return float(np.sum(weights * transfer) / np.sum(weights))


def _injected_response(skymap, transfer, beam, radius_arcmin, seed, fwhm_arcmin=None, n_sources=300) -> float:
    """Response measured on beam-shaped sources painted at random positions in the usable footprint.

    With a Gaussian beam (``fwhm_arcmin``) each source is centred at a random point of a random usable
    pixel and point-sampled at the pixel centres, as a tracer's kSZ is on a real map; with a B_l table,
    the sources are pixel-centred deltas times B_l.  Apertures are measured at the source centres on
    the painted map and on its filtered copy with the pipeline's own photometry, on every pixel of the
    map's grid.
    """
    from .photometry import _measure

    rng = np.random.default_rng(seed)
    usable = np.flatnonzero(skymap.weight > 0)
    index = rng.choice(usable, size=min(n_sources, usable.size), replace=False)
    lon, lat = skymap.pixel_lonlat(index)
    ones = np.full(lon.size, 1.0)
    if fwhm_arcmin:
        side = math.degrees(math.sqrt(skymap.pixel_area_sr))
        lat = np.clip(lat + side * rng.uniform(-0.5, 0.5, lat.size), -90.0, 90.0)
        lon = (lon + side * rng.uniform(-0.5, 0.5, lon.size) / np.maximum(np.cos(np.radians(lat)), 1e-3)) % 360.0
        plain = skymap.source_map(lon, lat, ones, fwhm_arcmin=fwhm_arcmin)
        filtered = plain.filtered(transfer, n_iter=3)
    else:
        deltas = skymap.source_map(lon, lat, ones)
        plain = deltas.filtered(beam, n_iter=0)
        filtered = deltas.filtered(beam * transfer, n_iter=0)
    radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=np.float64))
    vals = []
    for m in (plain, filtered):
        res = _measure(m, lon, lat, radii, 0.1, None)  # the source positions are in the map's frame
        vals.append(np.where(res.usable, res.temperatures[0], 0.0))
    return float(np.sum(vals[1]) / np.sum(vals[0]))


def apply_prefilter(skymap, pc, *, radius_arcmin: float, seed=None, progress=None):
    """Filter ``skymap`` as ``[prefilter]`` says; returns (new SkyMap, PrefilterResult or None).

    The returned map holds the same pixels and weights; its values are the filtered
    temperatures divided by the aperture response (``pc.normalise``), so a beam-shaped source keeps
    its unfiltered aperture value.  ``kind = "none"`` returns the map itself and None.
    """
    if pc.kind == "none":
        return skymap, None
    lmax = min(skymap.band_limit, _MAX_LMAX) if pc.lmax is None else int(pc.lmax)
    transfer = filter_transfer(pc, lmax)
    beam = _beam(pc, lmax)
    analytic = aperture_response(transfer, beam, radius_arcmin, skymap.pixel_window(lmax))
    if pc.normalise == "injected":
        response = _injected_response(skymap, transfer, beam, radius_arcmin, seed,
                                      fwhm_arcmin=pc.beam_fwhm_arcmin if pc.beam_path is None else None)
    elif pc.normalise == "aperture":
        response = analytic
    else:
        response = 1.0
    if not math.isfinite(response):
        raise InputError(f"prefilter: the aperture response could not be measured (no usable {radius_arcmin:g} arcmin "
                         f"aperture around the test sources at {skymap.grid_label})", key="prefilter.normalise")
    if abs(response) <= 1e-6:
        raise InputError(f"prefilter: the aperture response of the {pc.kind} filter is {response:g}; the filter removes "
                         f"the scales the {radius_arcmin:g} arcmin aperture measures", key="prefilter.kind")
    if progress is not None:
        progress(f"      {pc.kind} filter to lmax {lmax}: aperture response {response:.4f} "
                 f"(analytic {analytic:.4f}, normalise = {pc.normalise})")
    return skymap.filtered(transfer / response), PrefilterResult(pc.kind, lmax, transfer, response, pc.normalise, analytic)


def prefilter_markdown(info: dict) -> str:
    """Report section of a filtered run."""
    lines = [f"The map was filtered in harmonic space before the photometry: kind **{info['kind']}**, to l = "
             f"{info['lmax']} (F_l in prefilter.png).",
             "",
             f"- aperture response to a beam-shaped source, filtered / unfiltered: {info['aperture_response']:.4f} "
             f"(normalise = {info['normalise']}; analytic value {info['aperture_response_analytic']:.4f})",
             "- the filtered map was divided by that response, so aperture temperatures and tau_mean are in "
             "unfiltered units" if info["normalise"] != "none" else
             "- no response correction (normalise = none): tau_mean is in filtered units",
             f"- F_l above half its peak for l in {info['ell_above_half_peak']}; masked pixels were set to the "
             "mean of the usable ones (no apodisation), so apertures within a few filter scales of a mask edge "
             "see some ringing"]
    return "\n".join(lines) + "\n"


def plot_transfer(transfer, info: dict, folder, stem: str) -> list[str]:
    """F_l of the filter (peak 1) against multipole; writes ``<stem>.pdf`` and ``<stem>.png`` into
    ``folder`` and returns their names."""
    with plot_style():
        fig = new_figure(width="column", height_in=2.4)
        ax = fig.subplots()
        ell = np.arange(transfer.size)
        ax.plot(ell[2:], transfer[2:] / np.max(transfer), "k-")
        ax.set_xscale("log")
        ax.set_xlabel("multipole l")
        ax.set_ylabel("F_l (peak 1)")
        ax.set_title(f"map pre-filter: {info['kind']}, aperture response {info['aperture_response']:.3f}")
        return save_figure(fig, folder, stem)
