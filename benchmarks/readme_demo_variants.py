"""Re-measure the README's figures that come from variants of the demo run (configs/demo.toml).

Each part runs the whole pipeline (``run_pipeline``, no output folder) on the shipped demo inputs
with configs/demo.toml and a few keys changed, and prints what the README quotes:

``prefilter``
    the table of "Pre-filtering the map": no filter, then ``[prefilter]`` kinds highpass, matched
    and wiener with the demo map's beam (1.4 arcmin) and noise (15 uK-arcmin) and ``lmax = 6000``;
    aperture response (injected and analytic), tau_mean, S/N and the run's wall time.  A few
    minutes per filter on two cores.
``photoz``
    the photometric-redshift check of "Tests and validation": catalogue redshifts scattered by
    0.01 (1 + z) (``--scatter-seed``, default 7), fitted with the undamped template and with each
    damping model.
``weighting``
    the template-averaging defaults of "Template and fit options" against the older choices
    (``redshift_weighting = "effective"``, ``separation_weighting = "volume"``).
``region-seeds``
    the spread of tau_mean over k-means region seeds of "Covariance choices": 30 regions with 7
    extra seeds and the shipped 50 regions with 5, and the wall time against a run without them
    (after a warm-up run, so that neither pays for loading the kernels and the map).

Usage::

    python benchmarks/readme_demo_variants.py prefilter
    python benchmarks/readme_demo_variants.py photoz weighting region-seeds
"""

from __future__ import annotations

import argparse
import copy
import datetime as _dt
import tempfile
import time
import tomllib
import warnings
from pathlib import Path

import numpy as np
from astropy.table import Table

from pairvel.core.errors import PairvelWarning
from pairvel.input.config import config_from_dict
from pairvel.pipeline import run_pipeline

DEMO_CONFIG = Path(__file__).resolve().parents[1] / "configs" / "demo.toml"


def demo_run(**changes):
    """Run the pipeline on configs/demo.toml with ``changes`` ({section: {key: value}}) merged in.

    Returns the RunResult and the wall time of ``run_pipeline`` in seconds.
    """
    data = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))
    merged = copy.deepcopy(data)
    for section, keys in changes.items():
        merged.setdefault(section, {}).update(keys)
    cfg = config_from_dict(merged, source=DEMO_CONFIG)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", PairvelWarning)  # the Hartlap factor and skipped rotations of every run
        result = run_pipeline(cfg)
    return result, time.perf_counter() - t0


def short_e(x: float, digits: int) -> str:
    """``x`` in e-notation as the README writes it: 2.027e-3, not 2.027e-03."""
    mantissa, exponent = f"{x:.{digits}e}".split("e")
    return f"{mantissa}e{int(exponent)}"


def fit_text(fit) -> str:
    return f"{short_e(fit.amplitude, 3)} +- {short_e(fit.error, 2)}"


def part_prefilter(args) -> None:
    common = {"beam_fwhm_arcmin": 1.4, "noise_uk_arcmin": 15.0, "lmax": 6000}
    print("| filter | aperture response: injected (analytic) | tau_mean | S/N | whole run |")
    print("|---|---|---|---|---|")
    for kind in ("none", "highpass", "matched", "wiener"):
        if kind == "none":
            result, seconds = demo_run()
            response = "-"
        else:
            result, seconds = demo_run(prefilter={"kind": kind, **common})
            info = result.extra["prefilter"]
            response = f"{info['aperture_response']:.3f} ({info['aperture_response_analytic']:.3f})"
        label = f"highpass, l > {result.config.prefilter.highpass_ell:g}" if kind == "highpass" else kind
        print(f"| {label} | {response} | {fit_text(result.fit)} | {result.fit.snr:.1f} | {seconds:.0f} s |", flush=True)


def part_photoz(args) -> None:
    with tempfile.TemporaryDirectory(prefix="pairvel-photoz-") as tmp:
        data = tomllib.loads(DEMO_CONFIG.read_text(encoding="utf-8"))
        source = (DEMO_CONFIG.parent / data["catalogue"]["path"]).resolve()
        table = Table.read(source)
        z = np.asarray(table["z"], dtype=float)
        table["z"] = z + args.sigma_z * (1 + z) * np.random.default_rng(args.scatter_seed).normal(size=len(z))
        scattered = Path(tmp) / "scattered.fits"
        table.write(scattered)
        print(f"redshifts scattered by {args.sigma_z:g} (1 + z), numpy default_rng({args.scatter_seed}), in file row order")
        variants = [("undamped template", {})]
        variants += [(f"damped, photoz_model = {m}", {"photoz_sigma": args.sigma_z, "photoz_model": m})
                     for m in ("convolution", "exponential")]
        for label, theory in variants:
            result, _ = demo_run(catalogue={"path": str(scattered)}, theory=theory)
            print(f"  {label:<36} tau_mean = {fit_text(result.fit)}", flush=True)


def part_weighting(args) -> None:
    for label, theory in (("redshift effective, separation volume", {"redshift_weighting": "effective",
                                                                      "separation_weighting": "volume"}),
                          ("defaults (pair_distribution, pair_counts)", {})):
        result, _ = demo_run(theory=theory)
        print(f"  {label:<44} tau_mean = {fit_text(result.fit)}", flush=True)


def part_region_seeds(args) -> None:
    demo_run()  # warm-up: the first run in a process also loads numba's kernels and the map
    for n_regions, extra in ((30, 7), (50, 5)):
        _, plain = demo_run(covariance={"n_regions": n_regions})
        result, seconds = demo_run(covariance={"n_regions": n_regions, "extra_region_seeds": extra})
        s = result.extra["region_seed_spread"]
        tau, err = np.array(s["tau_mean"]), np.array(s["tau_error"])
        print(f"  {n_regions} regions, {s['n_seeds']} assignments ({s['skipped']} skipped): tau_mean {short_e(tau.min(), 3)} to "
              f"{short_e(tau.max(), 3)}, std {short_e(s['tau_mean_std'], 2)} = {s['std_over_error']:.2f} of the quoted "
              f"error {short_e(s['quoted_error'], 3)}; errors {short_e(err.min(), 3)} to {short_e(err.max(), 3)}; "
              f"run {plain:.0f} s without extra seeds, {seconds:.0f} s with them ({(seconds - plain) / extra:.1f} s per "
              "extra seed)", flush=True)


PARTS = {"prefilter": part_prefilter, "photoz": part_photoz, "weighting": part_weighting,
         "region-seeds": part_region_seeds}


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("parts", nargs="+", choices=list(PARTS), help="what to measure")
    parser.add_argument("--scatter-seed", type=int, default=7, help="photoz: seed of the redshift scatter (default 7)")
    parser.add_argument("--sigma-z", type=float, default=0.01, help="photoz: scatter sigma_z of (1 + z) (default 0.01)")
    args = parser.parse_args(argv)
    print(f"measured {_dt.datetime.now(_dt.UTC):%Y-%m-%d} on configs/demo.toml")
    for name in args.parts:
        print(f"\n{name}:", flush=True)
        PARTS[name](args)


if __name__ == "__main__":
    main()
