"""Benchmark aperture photometry on a rectangular-pixel (CAR) map: compiled row walk against numpy.

A white-noise CAR map (float32, uK) over an RA/Dec box of about 1e4 deg^2 at 0.5' pixels
(~1.5e8 pixels), tracers uniform on the sphere within the box, three compensated-aperture radii
measured in one call.  Prints the map size, the kernel time for all tracers (after a warm-up
call that compiles it), the numpy reference's time on a subsample and its extrapolation (the
baseline, measured in the same run), the largest kernel - reference difference in units of the
aperture-noise rms, and the pixels classified per tracer (the area within the largest outer
radius, in pixels; the kernel visits these plus about two columns per row).  Target from the
issue: 1e6 tracers x 3 radii under 60 s on an idle machine.

Usage::

    python benchmarks/bench_car_photometry.py --n 1e6 --pixel 0.5 --ra 0,120 --dec=-40,45 --radii 1.5,2.0,2.5
"""

from __future__ import annotations

import argparse
import math
import resource
import time

import numpy as np

from bench_photometry import time_kernel_and_direct  # this folder: run as a script

from pairvel.maps.car import CarMap, box_wcs


def _pair(text):
    lo, hi = (float(v) for v in text.split(","))
    return lo, hi


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--n", type=float, default=1e6, help="tracers (default 1e6)")
    parser.add_argument("--pixel", type=float, default=0.5, help="CAR pixel size, arcmin (default 0.5)")
    parser.add_argument("--ra", type=_pair, default=(0.0, 120.0), help="RA range of the box, degrees (default 0,120)")
    parser.add_argument("--dec", type=_pair, default=(-40.0, 45.0), help="Dec range, degrees (default -40,45)")
    parser.add_argument("--radii", default="1.5,2.0,2.5", help="aperture radii in arcmin, comma separated")
    parser.add_argument("--n-direct", type=float, default=1e4, help="tracers timed on the numpy path (default 1e4)")
    parser.add_argument("--weighting", default="centre", choices=("centre", "fraction"), help="pixel weighting")
    parser.add_argument("--noise", type=float, default=20.0, help="white-noise rms per pixel, uK (default 20)")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args(argv)

    n, n_direct = int(args.n), int(min(args.n_direct, args.n))
    radii = [float(r) for r in args.radii.split(",")]
    rng = np.random.default_rng(args.seed)
    t0 = time.perf_counter()
    wcs, shape = box_wcs(args.ra, args.dec, args.pixel)
    values = rng.standard_normal(shape[0] * shape[1], dtype=np.float32)
    values *= np.float32(args.noise)
    sm = CarMap(wcs, shape, None, values)
    area_deg2 = (args.ra[1] - args.ra[0]) * (math.sin(math.radians(args.dec[1])) - math.sin(math.radians(args.dec[0]))) \
        * 180.0 / math.pi
    print(f"map: {sm.grid_label}, {values.size:,} pixels float32 over {area_deg2:,.0f} deg^2, white noise "
          f"{args.noise:g} uK; made in {time.perf_counter() - t0:.1f} s (not counted)")
    margin = 0.1  # degrees inside the box edges, so every aperture lies on the map
    ra = rng.uniform(args.ra[0] + margin, args.ra[1] - margin, n) % 360.0
    z_lo, z_hi = (math.sin(math.radians(d)) for d in (args.dec[0] + margin, args.dec[1] - margin))
    dec = np.degrees(np.arcsin(rng.uniform(z_lo, z_hi, n)))
    print(f"tracers: {n:,} uniform within the box; radii {radii} arcmin; pixel weighting {args.weighting}")

    fast, direct = time_kernel_and_direct(sm, ra, dec, radii, args.weighting, n_direct,
                                          direct_label="numpy reference (baseline)")
    k_out = len(radii) - 1
    classified = fast.n_pixels_disc[k_out] + fast.n_pixels_annulus[k_out]
    print(f"pixels classified per tracer (within the outer radius {math.sqrt(2) * radii[-1]:.2f}'): median "
          f"{int(np.median(classified))}; {int(classified.sum()):,} in all")
    for k, r in enumerate(radii):
        rms = float(np.nanstd(fast.temperatures[k]))
        a, b = fast.temperatures[k, :n_direct], direct.temperatures[k]
        diff = float(np.nanmax(np.abs(a - b))) if np.isfinite(a).any() else float("nan")
        print(f"  theta = {r:g}': aperture-noise rms {rms:.3f} uK; max |kernel - reference| = {diff:.2e} uK "
              f"= {diff / rms:.2e} rms; usable {fast.n_usable:,} of {n:,}")
    print(f"peak resident memory: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2:.2f} GB")
    print("note: wall-clock times on a shared 2-core machine; other jobs slow these figures")


if __name__ == "__main__":
    main()
