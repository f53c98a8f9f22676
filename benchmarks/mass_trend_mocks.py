"""Re-measure the README's tau-against-mass recovery on mocks ("Optical depth against mass").

Each mock is ``pairvel mock`` (:func:`pairvel.sims.mock.make_mock_survey`) with tau_i proportional to
M_i^alpha (``--alpha``, default 1), 6000 tracers on a 24 x 16 degree patch; the pipeline fits four proxy
bins and the power law (``theory.proxy_power_law = "log10"``) with no null tests.  For each seed it
prints one JSON line with the pulls of alpha and tau_0 (truth: the injected law at the fit's pivot
times the mock's measured aperture response), the power law's chi2 and the whole-sample tau_mean
pull; at the end the mean and scatter of each.

Usage::

    python benchmarks/mass_trend_mocks.py --setting small-aperture --seeds 3-11
    python benchmarks/mass_trend_mocks.py --setting no-cmb --seeds 3-10
    python benchmarks/mass_trend_mocks.py --setting wide-aperture --seeds 2-8 --no-trend

Settings: ``wide-aperture`` (nside 512, 5' beam, 8' apertures, CMB), ``small-aperture`` (nside 1024,
2.5' beam, 4' apertures, CMB: the setting of tests/test_mass_trend_injection.py), ``no-cmb``
(nside 2048, 2.5' beam, 4' apertures, no CMB).  Mocks are written into a temporary folder.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import warnings
from pathlib import Path

import numpy as np

from pairvel.input.config import config_from_dict
from pairvel.pipeline import run_pipeline
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, make_mock_survey

SETTINGS = {
    "wide-aperture": dict(nside=512, beam_fwhm_arcmin=5.0, aperture_radius_arcmin=8.0, include_cmb=True),
    "small-aperture": dict(nside=1024, beam_fwhm_arcmin=2.5, aperture_radius_arcmin=4.0, include_cmb=True),
    "no-cmb": dict(nside=2048, beam_fwhm_arcmin=2.5, aperture_radius_arcmin=4.0, include_cmb=False),
}
PROXY_EDGES = [14.0, 14.1, 14.25, 14.45, 15.0]


def one_mock(folder: Path, seed: int, setting: dict, alpha: float, trend: bool) -> dict:
    truth = make_mock_survey(folder, seed=seed, n_tracers=6000, ra_min=-12, ra_max=12, dec_min=-8, dec_max=8,
                             z_min=0.15, z_max=0.45, tau_mean=1.0e-2, bias=0.4, cell_mpc=8.0, noise_uk_arcmin=10.0,
                             tau_mass_slope=alpha, **setting)
    cfg = config_from_dict({
        "run": {"seed": seed},
        "catalogue": {"path": str(folder / CATALOGUE_FILE), "proxy_column": "log_mass"},
        "map": {"path": str(folder / MAP_FILE)},
        "aperture": {"radius_arcmin": setting["aperture_radius_arcmin"]},
        "trend": {"enabled": trend},
        "bins": {"r_max_mpc": 200.0, "width_mpc": 20.0},
        "covariance": {"n_regions": 30},
        "theory": {"bias": 0.4, "proxy_bin_edges": PROXY_EDGES, "proxy_power_law": "log10"},
        "nulls": {"n_random": 0, "n_shuffle": 0, "n_shuffle_z": 0, "rotation_deg": []},
    })
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = run_pipeline(cfg)
    m, rel, response = res.extra["mass_trend"], truth.tau_mass_relation, truth.aperture_response
    main = (res.fit.amplitude - truth.tau_mean * response) / res.fit.error
    if m.get("problem"):
        return {"seed": seed, "problem": m["problem"], "main_pull": main}
    tau_0 = rel["tau_at_pivot"] * response * (m["pivot_mass"] / 10 ** rel["log10_mass_pivot"]) ** alpha
    return {"seed": seed, "alpha": m["alpha"], "alpha_error": m["alpha_error"],
            "pull_alpha": (m["alpha"] - alpha) / m["alpha_error"], "pull_tau0": (m["tau_0"] - tau_0) / m["tau_0_error"],
            "chi2": m["chi2_min"], "main_pull": main}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--setting", choices=sorted(SETTINGS), default="small-aperture")
    ap.add_argument("--seeds", default="3-5", help="first-last (inclusive)")
    ap.add_argument("--alpha", type=float, default=1.0)
    ap.add_argument("--no-trend", action="store_true", help="switch the redshift-trend removal off")
    args = ap.parse_args()
    first, last = (int(x) for x in args.seeds.split("-"))
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for seed in range(first, last + 1):
            rows.append(one_mock(Path(tmp) / f"m{seed}", seed, SETTINGS[args.setting], args.alpha, not args.no_trend))
            print(json.dumps(rows[-1]), flush=True)
    for key in ("pull_alpha", "pull_tau0", "chi2", "main_pull"):
        x = np.array([r[key] for r in rows if key in r])
        if x.size > 1:
            print(f"{key}: mean {x.mean():+.2f}, scatter {x.std(ddof=1):.2f} over {x.size} mocks")


if __name__ == "__main__":
    main()
