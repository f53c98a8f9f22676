"""Compensated top-hat aperture photometry on HEALPix maps, full or partial sky.

For a tracer at direction n and a disc radius theta,

    T_AP = <T>_disc(theta) - <T>_annulus(theta, sqrt(2) theta),

the means taken over the pixels whose centres lie in the disc and in the annulus [common
practice].  The two regions have equal areas, so a constant cancels exactly and a linear
gradient cancels up to pixelisation.  Each pixel enters its mean with the map's usable weight
(1 = usable, 0 = masked), so masked pixels, and pixels a partial map does not hold, are left
out; the masked fraction of each region is 1 - (sum of weights) / (number of pixel centres).

One ``healpy.query_disc`` of radius sqrt(2) theta_max per tracer (RING scheme, the fast one),
then numpy for everything else: exact chord distances of the pixel centres split disc and
annulus, and ``bincount`` sums give the means ("direct" method).  The default "kernel" method
gets the same sums from a compiled walk over the RING pixel rings (``_aperture_kernels.py``),
with no Python loop over positions.  Pixels can count whole by their centre, or by a fraction
near the edges (a linear ramp in distance, or sub-pixel centres).
"""

from __future__ import annotations

__all__ = ["ApertureResult", "aperture_temperatures", "measure_apertures", "random_positions_in_footprint",
           "measure_random_apertures"]

import math
import warnings
from dataclasses import dataclass

import healpy as hp
import numpy as np

from ..core.rng import as_generator
from ..core.constants import ARCMIN_RAD
from ..core.errors import InputError, MapError, PairvelWarning
from .skymap import SkyMap

_CHUNK = 4096               # tracers per vectorised batch (and per progress call)
_MAX_RADIUS_ARCMIN = 600.0  # 10 degrees: beyond this a "compensated aperture" is not what anyone wants
_SUBPIXEL_LEVELS = 10       # random positions: uniform over 4^10 sub-pixels of the chosen pixel


@dataclass(frozen=True, eq=False)
class ApertureResult:
    """Compensated aperture photometry of N positions at n_radii radii.

    Attributes
    ----------
    radius_arcmin : ndarray of shape (n_radii,), arcmin
        Disc radii theta; each annulus runs from theta to sqrt(2) theta.
    temperatures : ndarray of shape (n_radii, N), uK
        Disc mean minus annulus mean; NaN where the disc or annulus has no usable pixel.
    masked_fraction_disc, masked_fraction_annulus : ndarray of shape (n_radii, N)
        1 - (sum of pixel weights) / (pixel centres in the region); 1 for a region with none.
    n_pixels_disc, n_pixels_annulus : ndarray of shape (n_radii, N), int64
        Pixel centres inside each region, usable or not.
    usable : ndarray of shape (N,), bool
        Finite temperature and both masked fractions <= ``max_masked_fraction`` at every radius.
    max_masked_fraction : float
        The threshold ``usable`` was computed with.
    """

    radius_arcmin: np.ndarray
    temperatures: np.ndarray
    masked_fraction_disc: np.ndarray
    masked_fraction_annulus: np.ndarray
    n_pixels_disc: np.ndarray
    n_pixels_annulus: np.ndarray
    usable: np.ndarray
    max_masked_fraction: float

    @property
    def n_usable(self) -> int:
        return int(self.usable.sum())


def _check_positions(ra_deg, dec_deg):
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    if ra.ndim != 1 or ra.shape != dec.shape:
        raise InputError(f"ra_deg and dec_deg must be 1-D arrays of equal length; got shapes {ra.shape} and {dec.shape}")
    bad = ~(np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0))
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(f"positions must be finite with |dec| <= 90 degrees; {int(bad.sum())} are not "
                         f"(first: row {first}, ra={float(ra[first])}, dec={float(dec[first])})")
    return ra, dec


def _check_radii(radius_arcmin) -> np.ndarray:
    try:
        radii = np.atleast_1d(np.asarray(radius_arcmin, dtype=np.float64))
    except (TypeError, ValueError):
        raise InputError(f"radius_arcmin must be a positive number or a sequence of them; got {radius_arcmin!r}") from None
    if radii.ndim != 1 or radii.size == 0 or not np.all(np.isfinite(radii)) \
            or np.any(radii <= 0) or np.any(radii > _MAX_RADIUS_ARCMIN):
        raise InputError(f"radius_arcmin must be positive and at most {_MAX_RADIUS_ARCMIN:g} arcmin "
                         f"(scalar or 1-D); got {radius_arcmin!r}")
    return radii


def _check_fraction(max_masked_fraction) -> float:
    f = max_masked_fraction
    if isinstance(f, bool) or not isinstance(f, (int, float, np.integer, np.floating)) or not 0.0 <= f <= 1.0:
        raise InputError(f"max_masked_fraction must be a number in [0, 1]; got {f!r}")
    return float(f)


def _chord2(angle_rad):
    """Squared chord length of an angle on the unit sphere: (2 sin(a/2))^2."""
    return (2.0 * np.sin(0.5 * np.asarray(angle_rad))) ** 2


def _ang2vec(ra, dec) -> np.ndarray:
    ra_r, dec_r = np.radians(ra), np.radians(dec)
    cd = np.cos(dec_r)
    return np.column_stack([cd * np.cos(ra_r), cd * np.sin(ra_r), np.sin(dec_r)])


_WEIGHTINGS = ("centre", "fraction", "subsample")
_METHODS = ("auto", "kernel", "direct")


def _half_ramp(nside: int) -> float:
    """Half-width (chord, radians) of the ramp of the "fraction" weighting: half the mean pixel size."""
    return 0.5 * math.sqrt(4.0 * math.pi / (12.0 * nside ** 2))


def _region_fractions(d2, c2_in, c2_out, weighting, nside, half):
    """Fraction of each candidate pixel in the disc and in the annulus, for one radius (numpy path)."""
    if weighting == "centre":
        fd = (d2 <= c2_in).astype(np.float64)
        return fd, ((d2 > c2_in) & (d2 <= c2_out)).astype(np.float64)
    d = np.sqrt(d2)
    fd = np.clip((np.sqrt(c2_in) + half - d) / (2.0 * half), 0.0, 1.0)
    fo = np.clip((np.sqrt(c2_out) + half - d) / (2.0 * half), 0.0, 1.0)
    return fd, fo - fd


def _subsample_fractions(nside, pix_ring, vb, owner, d2, c2_in, c2_out, level):
    """Fractions in disc and annulus from 4^level sub-pixel centres, for pixels near an edge only."""
    edge_c = 2.0 * hp.max_pixrad(nside)  # a pixel whose centre is farther than this from an edge is whole
    d = np.sqrt(d2)
    near = (np.abs(d - np.sqrt(c2_in)) < edge_c) | (np.abs(d - np.sqrt(c2_out)) < edge_c)
    fd = (d2 <= c2_in).astype(np.float64)
    fo = (d2 <= c2_out).astype(np.float64)
    idx = np.flatnonzero(near)
    n_child = 4 ** level
    for c0 in range(0, idx.size, max(1, (1 << 21) // n_child)):
        part = idx[c0: c0 + max(1, (1 << 21) // n_child)]
        children = (hp.ring2nest(nside, pix_ring[part])[:, None] * n_child + np.arange(n_child)[None, :]).ravel()
        cx, cy, cz = hp.pix2vec(nside << level, children, nest=True)
        o = np.repeat(owner[part], n_child)
        cd2 = (cx - vb[o, 0]) ** 2 + (cy - vb[o, 1]) ** 2 + (cz - vb[o, 2]) ** 2
        fd[part] = (cd2 <= np.repeat(c2_in[part], n_child)).reshape(-1, n_child).mean(axis=1)
        fo[part] = (cd2 <= np.repeat(c2_out[part], n_child)).reshape(-1, n_child).mean(axis=1)
    return fd, fo - fd


def _sums_direct(skymap, vec, c2_in, c2_out, weighting, level, progress):
    """(6, R, N) region sums with one healpy.query_disc per position and numpy for the rest; c2_in, c2_out (R, N)."""
    n, nr = vec.shape[0], c2_in.shape[0]
    nside = skymap.nside
    half = _half_ramp(nside)
    pad = {"centre": 0.0, "fraction": half, "subsample": 2.0 * hp.max_pixrad(nside)}[weighting]
    r_query = min(math.pi, 2.0 * math.asin(min(1.0, 0.5 * (math.sqrt(float(c2_out.max())) + pad))) + 1e-12)
    sums = np.zeros((6, nr, n))
    chunk = _CHUNK if weighting != "subsample" else max(64, _CHUNK // 4 ** max(level - 1, 0))
    for b0 in range(0, n, chunk):
        b1 = min(b0 + chunk, n)
        m = b1 - b0
        vb = vec[b0:b1]
        lists = [hp.query_disc(nside, vb[k], r_query, inclusive=False) for k in range(m)]
        lens = np.fromiter((p.size for p in lists), dtype=np.int64, count=m)
        pix_ring = np.concatenate(lists) if m else np.zeros(0, np.int64)
        owner = np.repeat(np.arange(m), lens)
        px, py, pz = hp.pix2vec(nside, pix_ring)
        d2 = (px - vb[owner, 0]) ** 2 + (py - vb[owner, 1]) ** 2 + (pz - vb[owner, 2]) ** 2
        pix = hp.ring2nest(nside, pix_ring) if skymap.nest else pix_ring
        vals, w = skymap.lookup(pix)
        w = w.astype(np.float64)
        wv = np.where(w > 0, vals, 0.0) * w
        for r in range(nr):
            ci, co = c2_in[r, b0:b1][owner], c2_out[r, b0:b1][owner]
            if weighting == "subsample":
                fd, fa = _subsample_fractions(nside, pix_ring, vb, owner, d2, ci, co, level)
            else:
                fd, fa = _region_fractions(d2, ci, co, weighting, nside, half)
            for k, f in enumerate((fd, fd * w, fd * wv, fa, fa * w, fa * wv)):
                sums[k, r, b0:b1] = np.bincount(owner, weights=f, minlength=m)
        if progress is not None:
            progress(b1, n)
    return sums


def _sums_kernel(skymap, vec, c2_in, c2_out, weighting, progress):
    """(6, R, N) region sums from the compiled ring walk (no Python loop over positions)."""
    from ._aperture_kernels import aperture_sums

    ring = skymap.reordered(nest=False)
    full = ring.pixels is None
    held = np.zeros(0, np.int64) if full else ring.pixels
    values = ring.values if ring.values.dtype in (np.float32, np.float64) else ring.values.astype(np.float64)
    half = _half_ramp(skymap.nside) if weighting == "fraction" else 0.0
    n, nr = vec.shape[0], c2_in.shape[0]
    # visit positions in RING pixel order of the map, so neighbouring apertures read neighbouring memory
    order = np.argsort(hp.vec2pix(skymap.nside, vec[:, 0], vec[:, 1], vec[:, 2]), kind="stable")
    vec_sorted = vec[order]
    sums = np.zeros((6, nr, n))
    step = _CHUNK
    for b0 in range(0, n, step):
        b1 = min(b0 + step, n)
        part = np.zeros((6, nr, b1 - b0))
        rows = order[b0:b1]
        aperture_sums(skymap.nside, np.ascontiguousarray(vec_sorted[b0:b1]), np.sqrt(c2_in[:, rows]),
                      np.sqrt(c2_out[:, rows]), half, held, full, values, ring.weight, part)
        sums[:, :, order[b0:b1]] = part
        if progress is not None:
            progress(b1, n)
    return sums


def _measure(skymap: SkyMap, ra, dec, radii, max_masked_fraction, progress, *, weighting="centre", method="auto",
             level=3, scale=None) -> ApertureResult:
    """Validated inputs (positions already in the map's frame) in, ApertureResult out (see measure_apertures)."""
    vec = _ang2vec(ra, dec)
    theta = radii[:, None] * ARCMIN_RAD * (np.ones(ra.size) if scale is None else scale)[None, :]  # (R, N)
    c2_in = _chord2(theta)
    c2_out = _chord2(math.sqrt(2.0) * theta)
    use_kernel = method == "kernel" or (method == "auto" and weighting != "subsample")
    if use_kernel:
        sums = _sums_kernel(skymap, vec, c2_in, c2_out, weighting, progress)
    else:
        sums = _sums_direct(skymap, vec, c2_in, c2_out, weighting, level, progress)
    nd, wd, sd, na, wa, sa = sums
    with np.errstate(invalid="ignore", divide="ignore"):
        temps = np.where((wd > 0) & (wa > 0), sd / np.where(wd > 0, wd, 1.0) - sa / np.where(wa > 0, wa, 1.0), np.nan)
        frac_disc = np.clip(np.where(nd > 0, 1.0 - wd / np.where(nd > 0, nd, 1.0), 1.0), 0.0, 1.0)
        frac_ann = np.clip(np.where(na > 0, 1.0 - wa / np.where(na > 0, na, 1.0), 1.0), 0.0, 1.0)
    tol = 1e-9  # the fractions are ratios of float sums; do not let rounding flip a boundary case
    usable = np.all(np.isfinite(temps) & (frac_disc <= max_masked_fraction + tol)
                    & (frac_ann <= max_masked_fraction + tol), axis=0)
    n_disc = np.rint(nd).astype(np.int64)
    n_ann = np.rint(na).astype(np.int64)
    return ApertureResult(radii, temps, frac_disc, frac_ann, n_disc, n_ann, usable, max_masked_fraction)


def _to_map_frame(skymap: SkyMap, ra, dec, *, inverse=False):
    """Equatorial (ra, dec) to the map's frame (or back with ``inverse``), degrees; identity for "C"."""
    if skymap.coordsys == "C":
        return ra, dec
    frames = [skymap.coordsys, "C"] if inverse else ["C", skymap.coordsys]
    lon, lat = hp.Rotator(coord=frames)(np.asarray(ra, dtype=np.float64), np.asarray(dec, dtype=np.float64), lonlat=True)
    lon = np.mod(lon, 360.0)
    return lon, np.clip(lat, -90.0, 90.0)


def _check_scale(radius_scale, n):
    if radius_scale is None:
        return None
    scale = np.asarray(radius_scale, dtype=np.float64)
    bad = ~(np.isfinite(scale) & (scale > 0)) if scale.shape == (n,) else None
    if bad is None:
        raise InputError(f"radius_scale must be a 1-D array with one value per position ({n}); got shape {scale.shape}")
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        raise InputError(f"radius_scale must be finite and > 0; {int(bad.sum())} values are not "
                         f"(first: row {first}, {float(scale[first])})")
    return scale


def _check_choice(value, choices, name):
    if value not in choices:
        raise InputError(f"{name} must be one of {', '.join(choices)}; got {value!r}")
    return value


def measure_apertures(skymap: SkyMap, ra_deg, dec_deg, radius_arcmin, *, max_masked_fraction=0.1,
                      progress=None, pixel_weighting="centre", method="auto", subsample_level=3,
                      radius_scale=None) -> ApertureResult:
    """Compensated top-hat aperture temperatures at every position, for one or several radii.

    Parameters
    ----------
    skymap : SkyMap
        Map in uK_CMB with its usable weights (full or partial sky, either ordering).
    ra_deg, dec_deg : ndarray of shape (N,), degrees
        Equatorial positions; rotated into the map's frame (``skymap.coordsys``) when that is
        Galactic or ecliptic.
    radius_arcmin : float or sequence of float, arcmin
        Disc radius theta; the annulus runs from theta to sqrt(2) theta.
    max_masked_fraction : float, default 0.1
        A position is usable when at most this fraction of its disc and of its annulus is masked
        (or outside a partial map), at every radius.
    progress : callable(done, total), optional
        Called after every batch of positions.
    pixel_weighting : {"centre", "fraction", "subsample"}, default "centre"
        How a pixel counts in a region: "centre" whole pixels by their centre; "fraction" a linear
        ramp in distance one mean pixel size wide across each edge (a pixel centred on the edge
        counts half); "subsample" the fraction of its 4^subsample_level NESTED sub-pixel centres
        inside, computed for pixels near an edge.
    method : {"auto", "kernel", "direct"}, default "auto"
        "kernel": compiled ring walk, no Python loop over positions (centre and fraction only);
        "direct": one healpy.query_disc per position plus numpy.  "auto" takes the kernel unless
        ``pixel_weighting`` is "subsample".  Both give the same sums (tests compare them).
    subsample_level : int, default 3
        Sub-pixels per pixel side = 2^level for "subsample".
    radius_scale : ndarray of shape (N,), optional
        Per-position factor on every radius (e.g. a fixed physical size at each redshift, see
        :func:`pairvel.maps.radii.angular_radius_arcmin`); ``radius_arcmin`` are then the radii at scale 1.

    Returns
    -------
    ApertureResult
        ``temperatures`` of shape (n_radii, N) in uK, masked fractions, pixel counts, ``usable``.

    Notes
    -----
    A pixel belongs to the disc when the angular distance of its centre from the position is
    <= theta, to the annulus when it is in (theta, sqrt(2) theta]; distances are exact chord
    lengths of the pixel-centre unit vectors.  The disc and annulus means are weighted by the
    map's usable weights, which for a binary mask leaves masked pixels out.
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"skymap must be a pairvel SkyMap (see read_map); got {type(skymap).__name__}")
    ra, dec = _check_positions(ra_deg, dec_deg)
    radii = _check_radii(radius_arcmin)
    fmax = _check_fraction(max_masked_fraction)
    if progress is not None and not callable(progress):
        raise InputError(f"progress must be a callable(done, total) or None; got {type(progress).__name__}")
    _check_choice(pixel_weighting, _WEIGHTINGS, "pixel_weighting")
    _check_choice(method, _METHODS, "method")
    if method == "kernel" and pixel_weighting == "subsample":
        raise InputError("method 'kernel' supports pixel_weighting 'centre' and 'fraction'; use 'direct' for 'subsample'")
    if isinstance(subsample_level, bool) or not isinstance(subsample_level, (int, np.integer)) \
            or not 1 <= subsample_level <= 6:
        raise InputError(f"subsample_level must be an integer in [1, 6]; got {subsample_level!r}")
    scale = _check_scale(radius_scale, ra.size)
    smallest = radii.min() * (1.0 if scale is None else float(scale.min(initial=1.0)))
    if scale is not None and radii.max() * scale.max(initial=0.0) > _MAX_RADIUS_ARCMIN:
        raise InputError(f"radius_arcmin x radius_scale must be at most {_MAX_RADIUS_ARCMIN:g} arcmin; got up to "
                         f"{radii.max() * scale.max():g}")
    expected = math.pi * smallest ** 2 / skymap.pixel_area_arcmin2
    if expected < 3.0:
        warnings.warn(f"aperture radius {smallest:g} arcmin holds only ~{expected:.1f} pixel centres at nside "
                      f"{skymap.nside} (pixel size {skymap.pixel_size_arcmin:.2f} arcmin); the aperture temperature "
                      f"is dominated by pixelisation", PairvelWarning, stacklevel=2)
    ra, dec = _to_map_frame(skymap, ra, dec)
    return _measure(skymap, ra, dec, radii, fmax, progress, weighting=pixel_weighting, method=method,
                    level=int(subsample_level), scale=scale)


def aperture_temperatures(hpx_map, ra_deg, dec_deg, radius_arcmin, *, nest=False):
    """Compensated top-hat aperture temperatures on a full-sky HEALPix array.

    Parameters
    ----------
    hpx_map : ndarray of shape (12 nside^2,), uK
        Full-sky map; UNSEEN and NaN pixels are left out of the means.
    ra_deg, dec_deg : ndarray of shape (N,), degrees
    radius_arcmin : float or sequence of float, arcmin
        Disc radius theta (annulus theta..sqrt(2) theta).
    nest : bool, default False
        Ordering of ``hpx_map``.

    Returns
    -------
    ndarray of shape (N,) for a scalar radius, (n_radii, N) for a sequence, uK
        NaN where the disc or the annulus holds no usable pixel.

    Examples
    --------
    >>> import numpy as np
    >>> m = np.full(12 * 256**2, 5.0)
    >>> float(aperture_temperatures(m, [10.0], [20.0], 30.0)[0])
    0.0
    """
    skymap = SkyMap.from_array(hpx_map, nest=nest)
    ra, dec = _check_positions(ra_deg, dec_deg)
    radii = _check_radii(radius_arcmin)
    res = _measure(skymap, ra, dec, radii, 1.0, None)
    return res.temperatures[0] if np.ndim(radius_arcmin) == 0 else res.temperatures


def _candidates(skymap: SkyMap, usable_pix: np.ndarray, k: int, rng: np.random.Generator):
    """k positions uniform over the area of the usable pixels (ra, dec in degrees)."""
    nside = skymap.nside
    levels = min(_SUBPIXEL_LEVELS, 29 - int(round(math.log2(nside))))
    pix = usable_pix[rng.integers(0, usable_pix.size, k)]
    nest_pix = pix if skymap.nest else hp.ring2nest(nside, pix)
    # HEALPix pixels have equal areas, and so do the 4^levels NESTED children of each one: a random
    # child centre is uniform within the pixel to 1/2^levels of its size.
    child = nest_pix * (4 ** levels) + rng.integers(0, 4 ** levels, k)
    return hp.pix2ang(nside * 2 ** levels, child, nest=True, lonlat=True)


def _draw_usable(skymap: SkyMap, n: int, rng, radii, fmax, max_draws, weighting="centre", method="auto", scale=None):
    usable_pix = skymap.usable_pixels()
    if usable_pix.size == 0:
        raise MapError(f"map {skymap.path}: no usable pixels to place random apertures on", path=skymap.path)
    ra_parts, dec_parts, t_parts = [], [], []
    have, drawn, accepted = 0, 0, 0
    while have < n:
        if drawn >= max_draws:
            raise MapError(f"map {skymap.path}: only {have} of {n} random apertures of {radii.max():g} arcmin found "
                           f"with at most {fmax:.0%} masked after {drawn} draws; the usable footprint is too small "
                           f"or too fragmented for this aperture", path=skymap.path)
        rate = max((accepted + 1) / (drawn + 1), 0.01)
        k = int(min(max((n - have) / rate * 1.2 + 64, 256), 1 << 20, max_draws - drawn))
        ra, dec = _candidates(skymap, usable_pix, k, rng)
        cand_scale = None if scale is None else scale[rng.integers(0, scale.size, k)]
        res = _measure(skymap, ra, dec, radii, fmax, None, weighting=weighting, method=method, scale=cand_scale)
        ok = np.flatnonzero(res.usable)
        drawn += k
        accepted += ok.size
        ok = ok[: n - have]
        ra_eq, dec_eq = _to_map_frame(skymap, ra[ok], dec[ok], inverse=True)
        ra_parts.append(ra_eq)
        dec_parts.append(dec_eq)
        t_parts.append(res.temperatures[:, ok])
        have += ok.size
    return (np.concatenate(ra_parts) if ra_parts else np.zeros(0), np.concatenate(dec_parts) if dec_parts else np.zeros(0),
            np.concatenate(t_parts, axis=1) if t_parts else np.zeros((radii.size, 0)))


def _check_n(n) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 0:
        raise InputError(f"n must be a non-negative integer; got {n!r}")
    return int(n)


def random_positions_in_footprint(skymap: SkyMap, n, *, seed, radius_arcmin, max_masked_fraction,
                                  max_draws=None):
    """Random sky positions whose apertures are usable on the map, for the random-position null test.

    Positions are drawn uniformly over the area of the usable pixels (weight > 0), then kept only
    when their aperture passes the same test as a tracer's in :func:`measure_apertures`; the rest
    are redrawn.  So the accepted positions are uniform over the region where an aperture is usable.

    Parameters
    ----------
    skymap : SkyMap
    n : int
        Number of positions wanted.
    seed : None, int or numpy.random.Generator
    radius_arcmin : float or sequence of float, arcmin
        Aperture radii that must all be usable.
    max_masked_fraction : float
        As in :func:`measure_apertures`.
    max_draws : int, optional
        Give up (MapError) after this many candidates; default max(100 n, 10^5).

    Returns
    -------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    """
    ra, dec, _ = measure_random_apertures(skymap, n, radius_arcmin, seed=seed,
                                          max_masked_fraction=max_masked_fraction, max_draws=max_draws)
    return ra, dec


def measure_random_apertures(skymap: SkyMap, n, radius_arcmin, *, seed, max_masked_fraction=0.1, max_draws=None,
                             pixel_weighting="centre", method="auto", radius_scale=None):
    """Random usable positions (see :func:`random_positions_in_footprint`) and their aperture temperatures.

    Returns
    -------
    ra_deg, dec_deg : ndarray of shape (n,), degrees
    temperatures : ndarray of shape (n_radii, n), uK
        The same values :func:`measure_apertures` gives at those positions (with the same
        ``pixel_weighting`` and ``method``).

    Notes
    -----
    With ``radius_scale`` (any length), each candidate position takes a scale drawn at random from
    it, so the random apertures follow the tracers' radius distribution (up to the acceptance,
    which favours small apertures where the footprint is fragmented).
    """
    if not isinstance(skymap, SkyMap):
        raise InputError(f"skymap must be a pairvel SkyMap (see read_map); got {type(skymap).__name__}")
    n = _check_n(n)
    radii = _check_radii(radius_arcmin)
    fmax = _check_fraction(max_masked_fraction)
    rng = as_generator(seed)
    limit = max(100 * n, 100_000) if max_draws is None else _check_n(max_draws)
    _check_choice(pixel_weighting, _WEIGHTINGS, "pixel_weighting")
    _check_choice(method, _METHODS, "method")
    scale = None if radius_scale is None else _check_scale(radius_scale, np.size(radius_scale))
    return _draw_usable(skymap, n, rng, radii, fmax, limit, pixel_weighting, method, scale)
