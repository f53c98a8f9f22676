"""Where the tau(M) recovery on mocks goes wrong: fits of the same noiseless mock from three kinds of temperatures.

For one ``pairvel mock`` without CMB, noise or tSZ (6000 tracers, tau_i ~ M_i^alpha, the mocks of
benchmarks/mass_trend_mocks.py), the four proxy bins and the power law are fitted, on the same tracers,
jackknife regions and trend-loss factor, from

- ``const``: the tracers' true signal with one optical depth for all, R <tau> u_i (u_i = -T_CMB v_r,i / c,
  R the mock's aperture response): any spread of the bins' tau is the sampling of the velocities alone
  (truth: alpha = 0, every bin R <tau>);
- ``ideal``: the true signal R tau_i u_i (truth: the injected law);
- ``measured``: compensated-aperture temperatures of the signal-only map (what the pipeline sees).

each with the redshift-trend removal off, and on (bins fitted with the whole-sample offset of
:func:`pairvel.stats.subsamples.fit_proxy_bins`).  ``measured`` minus ``ideal`` is what photometry
(beam, neighbours in the aperture) adds; ``ideal`` minus truth is the velocities' sampling, which the
chain cannot remove.  Prints one JSON line per seed and the mean and scatter of the pulls.

The per-tracer velocities and optical depths are taken from the mock's own draw (the private
``_tracers_in_cone`` and ``_sz_amplitudes`` are wrapped while the mock is made; a diagnostic only).

Usage::

    python benchmarks/mass_trend_decomposition.py --seeds 3-12
    python benchmarks/mass_trend_decomposition.py --seeds 3-10 --nside 512 --beam 5 --aperture 8
"""

from __future__ import annotations

import argparse
import json
import tempfile
from pathlib import Path

import numpy as np

import pairvel.sims.mock as mock
from pairvel.core.constants import C_KM_S, T_CMB_UK
from pairvel.input.config import config_from_dict
from pairvel.maps.photometry import measure_apertures
from pairvel.maps.skymap import read_map
from pairvel.maps.trend import remove_redshift_trend
from pairvel.model.template import template_for_run
from pairvel.model.trendmodel import trend_transfer
from pairvel.pairs.estimator import pairwise_momentum
from pairvel.pairs.geometry import comoving_positions
from pairvel.stats.covariance import jackknife_covariance, kmeans_regions
from pairvel.stats.fit import fit_amplitude
from pairvel.stats.masstrend import fit_mass_trend
from pairvel.stats.subsamples import fit_proxy_bins

PROXY_EDGES = [14.0, 14.1, 14.25, 14.45, 15.0]
EDGES = np.arange(0.0, 201.0, 20.0)
N_REGIONS = 30


def _mock_with_tracers(folder: Path, seed: int, nside: int, beam: float, aperture: float, alpha: float):
    """The mock, and its tracers and amplitudes as drawn."""
    seen = {}
    draw_tracers, draw_amplitudes = mock._tracers_in_cone, mock._sz_amplitudes

    def tracers(*a, **k):
        seen["tracers"] = draw_tracers(*a, **k)
        return seen["tracers"]

    def amplitudes(*a, **k):
        seen["amplitudes"] = draw_amplitudes(*a, **k)
        return seen["amplitudes"]

    mock._tracers_in_cone, mock._sz_amplitudes = tracers, amplitudes
    try:
        truth = mock.make_mock_survey(folder, seed=seed, n_tracers=6000, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8,
                                      z_min=0.15, z_max=0.45, tau_mean=1.0e-2, bias=0.4, cell_mpc=8.0,
                                      noise_uk_arcmin=0.0, tsz_amplitude_uk=0.0, tau_mass_slope=alpha, nside=nside,
                                      beam_fwhm_arcmin=beam, aperture_radius_arcmin=aperture, include_cmb=False)
    finally:
        mock._tracers_in_cone, mock._sz_amplitudes = draw_tracers, draw_amplitudes
    return truth, seen["tracers"], seen["amplitudes"]


class _Fitter:
    """Bins and power law of one mock's tracers for any temperatures, trend removal off or on."""

    def __init__(self, folder, tracers, amplitudes, aperture, seed):
        self.cfg = config_from_dict({"catalogue": {"path": str(folder / mock.CATALOGUE_FILE)},
                                     "map": {"path": str(folder / mock.MAP_FILE)}, "theory": {"bias": 0.4}})
        t = measure_apertures(read_map(folder / mock.MAP_FILE), tracers.ra, tracers.dec, aperture,
                              max_masked_fraction=1.0).temperatures[0]
        ok = np.isfinite(t)
        self.measured = t[ok]
        self.pos = comoving_positions(tracers.ra, tracers.dec, tracers.z, cosmo=self.cfg.cosmology)[ok]
        self.z, self.proxy, self.tau = tracers.z[ok], amplitudes.log_mass[ok], amplitudes.tau[ok]
        self.u = -T_CMB_UK * tracers.v_r[ok] / C_KM_S
        self.regions = kmeans_regions(tracers.ra[ok], tracers.dec[ok], N_REGIONS, seed=seed)
        self.factor = trend_transfer(self.pos, self.z, EDGES, 0.01, seed=seed, cosmo=self.cfg.cosmology).factor
        self.in_fit = np.ones(EDGES.size - 1, bool)

    def whole_sample(self, temps):
        pr = pairwise_momentum(self.pos, temps[None], EDGES, regions=self.regions, redshifts=self.z)
        z_eff = float(np.sum(pr.denominator * pr.z_eff) / pr.denominator.sum())
        v12, _ = template_for_run(self.cfg.theory, self.cfg.cosmology, EDGES, pair_counts=pr.pair_counts,
                                  z_tracers=self.z, z_eff=z_eff)
        t_uk = T_CMB_UK * v12 / C_KM_S * self.factor
        return fit_amplitude(pr.p[0], t_uk, jackknife_covariance(pr.p_jk[0]), n_samples=N_REGIONS,
                             use=self.in_fit).amplitude

    def fit(self, temps, trend: bool):
        x = remove_redshift_trend(temps, self.z, sigma_z=0.01) if trend else temps
        bins, joint = fit_proxy_bins(PROXY_EDGES, proxy=self.proxy, positions=self.pos, temperatures=x,
                                     redshifts=self.z, regions=self.regions, edges=EDGES, in_fit=self.in_fit,
                                     theory_cfg=self.cfg.theory, cosmo=self.cfg.cosmology,
                                     template_factor=self.factor if trend else None,
                                     tau_all=self.whole_sample(x) if trend else None)
        return bins, fit_mass_trend(bins, joint, proxy=self.proxy, proxy_scale="log10")


def one_mock(folder: Path, seed: int, *, nside=1024, beam=2.5, aperture=4.0, alpha=1.0) -> dict:
    truth, tracers, amplitudes = _mock_with_tracers(folder, seed, nside, beam, aperture, alpha)
    fitter = _Fitter(folder, tracers, amplitudes, aperture, seed)
    resp, tau = truth.aperture_response, fitter.tau
    cases = {"const": (resp * tau.mean() * fitter.u, 0.0), "ideal": (resp * tau * fitter.u, alpha),
             "measured": (fitter.measured, alpha)}
    row = {"seed": seed, "response": resp}
    for name, (temps, alpha_true) in cases.items():
        for trend in (False, True):
            bins, m = fitter.fit(temps, trend)
            if m.get("problem"):
                row[f"{name}_trend_{'on' if trend else 'off'}"] = {"problem": m["problem"]}
                continue
            scale = tau.mean() if alpha_true == 0 else amplitudes.tau_at_pivot * (m["pivot_mass"] / 10 ** 14.5) ** alpha
            row[f"{name}_trend_{'on' if trend else 'off'}"] = {
                "bins": [round(b.fit.amplitude, 6) if b.fit else None for b in bins],
                "bin_errors": [round(b.fit.error, 6) if b.fit else None for b in bins],
                "alpha": m["alpha"], "alpha_error": m["alpha_error"], "tau_0": m["tau_0"],
                "pull_alpha": (m["alpha"] - alpha_true) / m["alpha_error"],
                "pull_tau0": (m["tau_0"] - resp * scale) / m["tau_0_error"], "chi2": m["chi2_min"]}
    return row


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", default="3-5", help="first-last (inclusive)")
    ap.add_argument("--nside", type=int, default=1024)
    ap.add_argument("--beam", type=float, default=2.5, help="beam FWHM, arcmin")
    ap.add_argument("--aperture", type=float, default=4.0, help="aperture radius, arcmin")
    ap.add_argument("--alpha", type=float, default=1.0)
    args = ap.parse_args()
    first, last = (int(x) for x in args.seeds.split("-"))
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(first, last + 1):
            rows.append(one_mock(Path(tmp) / f"m{seed}", seed, nside=args.nside, beam=args.beam,
                                 aperture=args.aperture, alpha=args.alpha))
            print(json.dumps(rows[-1]), flush=True)
    for case in [k for k in rows[0] if "_trend_" in k]:
        for key in ("pull_alpha", "pull_tau0", "chi2"):
            x = np.array([r[case][key] for r in rows if key in r[case]])
            if x.size > 1:
                print(f"{case} {key}: mean {x.mean():+.2f}, scatter {x.std(ddof=1):.2f} over {x.size} mocks")


if __name__ == "__main__":
    main()
