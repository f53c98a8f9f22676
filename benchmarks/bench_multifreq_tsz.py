"""Benchmark the thermal-SZ-free combination: tau from the 150 GHz map alone against tsz_free.

A handful of small mocks (``pairvel.sims.mock``) with strong tSZ and maps at 90, 150 and 220 GHz (the
same CMB, kSZ and beam, the tSZ scaled by f(nu)/f(150), independent white noise).  Each mock is
measured twice through the whole pipeline, once on the 150 GHz map and once on the tsz_free
combination of the three; the script prints the bias and scatter of tau over the mocks, the mean
quoted error, and the time of reading and combining the maps against reading one map.  It also
prints the noise cost of the combination for a few frequency sets at given noise levels.

Usage::

    python benchmarks/bench_multifreq_tsz.py --mocks 5 --tsz 300
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from pairvel.core.errors import PairvelWarning
from pairvel.input.config import config_from_dict
from pairvel.maps.multifreq import combination_weights, noise_cost, read_input_map
from pairvel.model.sz import tsz_spectrum
from pairvel.pipeline import run_pipeline
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, extra_map_file, make_mock_survey

FREQS = (90.0, 150.0, 220.0)


def noise_cost_table(levels: dict) -> list[tuple[str, float, float]]:
    """(frequency set, tsz_free cost, minimum_variance cost) for sets of the given noise levels."""
    rows = []
    for combo in ((90.0, 150.0), (150.0, 220.0), (90.0, 220.0), (90.0, 150.0, 220.0)):
        cov = np.diag([levels[nu] ** 2 for nu in combo])
        f = tsz_spectrum(combo)
        rows.append(("+".join(f"{nu:g}" for nu in combo), noise_cost(combination_weights(f, cov), cov),
                     noise_cost(combination_weights(f, cov, combination="minimum_variance"), cov)))
    return rows


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mocks", type=int, default=5, help="number of mocks (default 5)")
    parser.add_argument("--tracers", type=int, default=6000, help="tracers per mock (default 6000)")
    parser.add_argument("--tsz", type=float, default=300.0, help="mock tsz_amplitude_uk (default 300)")
    parser.add_argument("--nside", type=int, default=256, help="map nside (default 256)")
    parser.add_argument("--noise", type=float, nargs=3, default=(3.0, 3.0, 3.0), metavar=("N90", "N150", "N220"),
                        help="white noise of the 90, 150, 220 GHz maps, uK-arcmin (default 3 3 3)")
    args = parser.parse_args(argv)
    tau = 1.0e-2
    mock = dict(n_tracers=args.tracers, nside=args.nside, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8, z_min=0.15,
                z_max=0.45, tau_mean=tau, bias=0.4, cell_mpc=8.0, beam_fwhm_arcmin=10.0,
                noise_uk_arcmin=args.noise[1], aperture_radius_arcmin=15.0, include_cmb=True,
                tsz_amplitude_uk=args.tsz)
    base = {"aperture": {"radius_arcmin": 15.0}, "bins": {"r_max_mpc": 200.0, "width_mpc": 20.0},
            "covariance": {"n_regions": 30}, "theory": {"bias": 0.4},
            "nulls": {"n_random": 0, "n_shuffle": 0, "n_shuffle_z": 0, "rotation_deg": [90.0]}}
    taus = {"150 GHz alone": [], "tsz_free 90+150+220": []}
    errs = {k: [] for k in taus}
    t_single, t_combo = [], []
    cost = None
    with tempfile.TemporaryDirectory() as tmp, warnings.catch_warnings():
        warnings.simplefilter("ignore", PairvelWarning)
        for k in range(args.mocks):
            m = Path(tmp) / f"m{k}"
            make_mock_survey(m, seed=300 + k, extra_frequencies_ghz=(90.0, 220.0),
                             extra_noise_uk_arcmin=(args.noise[0], args.noise[2]), **mock)
            common = {**base, "run": {"seed": k}, "catalogue": {"path": str(m / CATALOGUE_FILE)}}
            single = config_from_dict({**common, "map": {"path": str(m / MAP_FILE)}})
            combo = config_from_dict({**common, "multifrequency": {
                "map_paths": [str(m / extra_map_file(90.0)), str(m / MAP_FILE), str(m / extra_map_file(220.0))],
                "frequencies_ghz": list(FREQS), "noise_uk_arcmin": list(args.noise)}})
            t0 = time.perf_counter()
            read_input_map(single)
            t_single.append(time.perf_counter() - t0)
            t0 = time.perf_counter()
            _, info = read_input_map(combo)
            t_combo.append(time.perf_counter() - t0)
            cost = info["noise_cost"]
            for name, cfg in zip(taus, (single, combo)):
                res = run_pipeline(cfg)
                taus[name].append(res.fit.amplitude)
                errs[name].append(res.fit.error)
            print(f"mock {k}: tau 150 GHz {taus['150 GHz alone'][-1]:+.4e} +- {errs['150 GHz alone'][-1]:.2e}, "
                  f"tsz_free {taus['tsz_free 90+150+220'][-1]:+.4e} +- {errs['tsz_free 90+150+220'][-1]:.2e}")
    print(f"\n{args.mocks} mocks, {args.tracers} tracers, nside {args.nside}, tsz_amplitude_uk {args.tsz:g}, "
          f"noise {'/'.join(f'{n:g}' for n in args.noise)} uK-arcmin at 90/150/220 GHz, injected tau {tau:g}")
    print(f"{'input':<22} {'mean tau':>10} {'bias':>10} {'scatter':>10} {'mean error':>11}")
    for name in taus:
        t = np.array(taus[name])
        print(f"{name:<22} {t.mean():10.3e} {t.mean() - tau:+10.2e} {t.std(ddof=1):10.2e} {np.mean(errs[name]):11.2e}")
    print(f"noise cost of the combination (map noise / best single map): {cost:.3f}")
    print(f"read one map: {np.median(t_single) * 1e3:.1f} ms; read and combine three: "
          f"{np.median(t_combo) * 1e3:.1f} ms (median over mocks, ratio {np.median(t_combo) / np.median(t_single):.1f})")
    for label, levels in (("equal noise 10/10/10 uK-arcmin", {90.0: 10.0, 150.0: 10.0, 220.0: 10.0}),
                          ("noise 12/10/35 uK-arcmin (90/150/220)", {90.0: 12.0, 150.0: 10.0, 220.0: 35.0})):
        print(f"\nnoise cost, {label}:\n{'set':<12} {'tsz_free':>9} {'min. var.':>9}")
        for name, c_free, c_mv in noise_cost_table(levels):
            print(f"{name:<12} {c_free:9.3f} {c_mv:9.3f}")


if __name__ == "__main__":
    main()
