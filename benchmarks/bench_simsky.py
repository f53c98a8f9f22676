"""Benchmark the simulated-sky covariance: full band in float64 against the band the apertures see in float32.

The tracers of bench_covariance.py (uniform over about 5000 deg^2, z 0.1-0.6) get ``--sims``
Gaussian skies at ``--nside`` (shipped CMB C_l, 1.4 arcmin beam, 15 uK-arcmin white noise,
2.1 arcmin apertures), twice with the same seed: as before (every multipole to 3 nside - 1,
float64 synthesis) and as now (``simcov.band_needed``, ``simcov.SYNTHESIS_DTYPE``).  Printed: the
time of each, the band, the largest change of an aperture temperature against their rms, and the
per-bin errors of the pairwise curve from the skies' covariance with their ratio, beside the
sampling noise of such an error, sqrt(1 / (2 (n_sim - 1))).

Usage::

    python benchmarks/bench_simsky.py --n 1e5 --sims 10 --nside 2048
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from bench_covariance import catalogue

import pairvel.stats.simcov as simcov
from pairvel.model.cmb import load_cmb_cl
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import comoving_positions


def skies(args, ra, dec, *, full_band: bool):
    saved = simcov.TAIL_FRACTION, simcov.SYNTHESIS_DTYPE
    if full_band:
        simcov.TAIL_FRACTION, simcov.SYNTHESIS_DTYPE = 0.0, np.complex128
    try:
        t0 = time.perf_counter()
        out = simcov.simulate_aperture_temperatures(args.nside, ra, dec, args.radius_arcmin, args.sims, seed=3,
                                                    cmb_cl=load_cmb_cl()[1], beam_fwhm_arcmin=1.4,
                                                    white_noise_uk_arcmin=15.0, n_threads=args.threads)
        return time.perf_counter() - t0, out
    finally:
        simcov.TAIL_FRACTION, simcov.SYNTHESIS_DTYPE = saved


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=float, default=1e5)
    ap.add_argument("--sims", type=int, default=10)
    ap.add_argument("--nside", type=int, default=2048)
    ap.add_argument("--radius-arcmin", type=float, default=2.1)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args(argv)
    ra, dec, z, _ = catalogue(int(args.n))
    lmax = 3 * args.nside - 1
    spec = simcov._spectrum(lmax, 1.4, None, load_cmb_cl()[1])
    band = simcov.band_needed(spec, args.radius_arcmin, white_cl=(15.0 * simcov.ARCMIN_RAD) ** 2)
    t_old, old = skies(args, ra, dec, full_band=True)
    t_new, new = skies(args, ra, dec, full_band=False)
    ok = np.isfinite(old) & np.isfinite(new)
    rms = np.sqrt(np.mean(old[ok] ** 2))
    print(f"{int(args.n):,} tracers, {args.sims} skies at nside {args.nside}: full band (lmax {lmax}, float64) "
          f"{t_old:.1f} s, band {band} in float32 {t_new:.1f} s ({t_old / t_new:.2f}x faster)")
    print(f"aperture temperatures: rms {rms:.2f} uK, largest change {np.max(np.abs(new[ok] - old[ok])):.3f} uK "
          f"(rms of the change {np.sqrt(np.mean((new[ok] - old[ok]) ** 2)):.4f} uK)")
    pos = comoving_positions(ra, dec, z)
    edges = np.arange(0.0, 301.0, 20.0)
    curves = [pairwise_momentum(pos, np.where(np.isfinite(s), s, 0.0), edges, n_threads=args.threads).p
              for s in (old, new)]
    err_old, err_new = (np.sqrt(np.diag(np.cov(c, rowvar=False, ddof=1))) for c in curves)
    ratio = err_new / err_old
    print("per-bin error of p(r) from the skies, uK (full band -> trimmed band), ratio:")
    for lo, a, b, r in zip(edges[:-1], err_old, err_new, ratio):
        print(f"  {lo:5.0f}-{lo + 20:3.0f} Mpc: {a:.4e} -> {b:.4e}  {r:.5f}")
    print(f"largest |ratio - 1| {np.max(np.abs(ratio - 1)):.1e}; sampling noise of an error from {args.sims} skies "
          f"{np.sqrt(1 / (2 * (args.sims - 1))):.3f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
