"""Errors of the simulated-sky covariance with and without a tracer signal in the skies (README, "Covariance choices").

Runs the pipeline's stages on the run.toml that ``pairvel mock`` writes beside a mock survey, draws
``--n-sim`` simulated skies (lensed CMB through the mock's 1.4 arcmin beam, 15 uK-arcmin white noise:
what the mock map holds besides its tracers) once, and one tracer signal per sky
(``covariance.sim_signal_*``: kSZ with the mock's tau_mean, thermal SZ of the mock's mean level and
scatter).  One pair pass measures every set; the script prints, bin by bin, the errors of the
noise-only covariance, of the covariance of noise + signal (the same skies plus their signal) and
of the signal alone, and the tau_mean error each gives.

Usage::

    pairvel mock /tmp/mock --n-tracers 8000
    python benchmarks/sim_signal_errors.py /tmp/mock/run.toml --n-sim 80
"""

from __future__ import annotations

import argparse
import dataclasses
import datetime as _dt
import warnings

import numpy as np

from pairvel.core.progress import Progress
from pairvel.core.rng import derived_generators
from pairvel.input.config import load_config
from pairvel.model.template import load_power
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pipeline import (_trend, correct_trend, geometry_and_regions, measured_tracers, simulated_sets,
                              simulated_signal, template)
from pairvel.stats.fit import fit_amplitude
from pairvel.stats.simcov import simulation_covariance

# the mock's defaults (pairvel.sims.mock.make_mock_survey): beam, noise, tau_mean; its thermal SZ is
# 0.953 x 4 uK x (M / 10^14.5)^(5/3) ((1 + z) / 1.35)^2 with dN/dlog M ~ M^-1.5 over 10^14-10^15 Msun:
# mean 2.43 uK, log10 scatter 0.37 dex over that mass function (computed for this script)
MOCK_SKY = {"sim_cmb": True, "sim_beam_fwhm_arcmin": 1.4, "sim_white_noise_uk_arcmin": 15.0}
MOCK_SIGNAL = {"sim_signal_tau": 2.0e-3, "sim_signal_tsz_uk": 2.43, "sim_signal_tsz_scatter_dex": 0.37}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("config", help="run.toml written by `pairvel mock`")
    ap.add_argument("--n-sim", type=int, default=80)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    cfg = load_config(args.config)
    cov_cfg = dataclasses.replace(cfg.covariance, estimator="simulations", n_sim=args.n_sim, **MOCK_SKY)
    cfg = dataclasses.replace(cfg, covariance=cov_cfg)
    with_signal = dataclasses.replace(cfg, covariance=dataclasses.replace(cov_cfg, **MOCK_SIGNAL))
    progress = Progress(10)
    rng = np.random.default_rng(cfg.run.seed)
    cat, sky, aps, _ = measured_tracers(cfg, progress)
    temps = correct_trend(cfg, aps.temperatures, cat.z)
    positions, regions = geometry_and_regions(cfg, cat, rng, progress)
    with progress.stage(f"{args.n_sim} simulated skies"):
        noise = simulated_sets(cfg, sky, cat, progress)[0]
    signal_rng = derived_generators(cfg.run.seed, "signal comparison", 1)[0]
    draw = simulated_signal(with_signal, cat)
    signal = np.array([_trend(draw(signal_rng)[0], cat.z, cfg) for _ in range(args.n_sim)])
    edges = cfg.bins.edges()
    values = np.vstack([temps[:1], noise, noise + signal, signal])
    with progress.stage("pair pass"):
        pr = pairwise_momentum(positions, values, edges, regions=regions, redshifts=cat.z, weights=cat.weight)
    model = template(cfg, pr, edges, cat, positions, load_power(cfg.theory, cfg.cosmology), rng, progress)
    n = args.n_sim
    blocks = {"noise": pr.p[1:1 + n], "noise+signal": pr.p[1 + n:1 + 2 * n], "signal": pr.p[1 + 2 * n:]}
    covs = {name: simulation_covariance(p) for name, p in blocks.items()}
    err = {name: np.sqrt(np.diag(c)) for name, c in covs.items()}
    print(f"# {_dt.date.today()}: {len(cat)} tracers, {n} skies, {args.config}")
    print("| r (Mpc) | error, noise only (uK) | error, noise + signal (uK) | ratio | error, signal alone (uK) |")
    print("|---|---|---|---|---|")
    mid = 0.5 * (edges[1:] + edges[:-1])
    for k in range(mid.size):
        print(f"| {mid[k]:g} | {err['noise'][k]:.4f} | {err['noise+signal'][k]:.4f} | "
              f"{err['noise+signal'][k] / err['noise'][k]:.3f} | {err['signal'][k]:.4f} |")
    for name in ("noise", "noise+signal"):
        fit = fit_amplitude(pr.p[0], model.template_uk, covs[name], n_samples=n, use=model.in_fit,
                            likelihood=cfg.theory.likelihood)
        print(f"tau_mean error, {name}: {fit.error:.3e} (tau_mean {fit.amplitude:.3e}, chi2 {fit.chi2_min:.1f})")


if __name__ == "__main__":
    main()
