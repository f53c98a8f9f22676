"""Spread of tau_mean over k-means region seeds: the summary numbers, the run's record of them,
and their blinding."""

import json

import numpy as np
import pytest

from pairvel.cli import main
from pairvel.input.config import config_from_dict
from pairvel.pipeline import region_seed_spread
from pairvel.stats.regionseeds import SECTION_TITLE, spread_markdown, summarise_spread


def test_summary_is_the_sample_spread_against_the_quoted_error():
    tau, err = [1.0e-3, 1.4e-3, 0.6e-3], [2.0e-4, 2.5e-4, 1.5e-4]
    s = summarise_spread(tau, err, quoted_error=2.0e-4, n_regions=30)
    # analytic: values 0.6, 1.0, 1.4 (x1e-3) have sample variance 0.16e-6, std 0.4e-3
    np.testing.assert_allclose(s["tau_mean_std"], 4.0e-4, rtol=1e-12)
    np.testing.assert_allclose(s["std_over_error"], 2.0, rtol=1e-12)
    np.testing.assert_allclose(s["error_std_over_error"], 0.25, rtol=1e-12)  # analytic: std 0.5e-4 of 2e-4
    assert s["n_seeds"] == 3 and s["tau_mean"] == tau and s["tau_error"] == err
    text = spread_markdown(s)
    assert "| 2 | 6.0000e-04 | 1.5000e-04 |" in text and "2.00 of the quoted error" in text


def test_healpix_regions_and_zero_seeds_give_no_spread():
    base = {"catalogue": {"path": "/a/c.csv"}, "map": {"path": "/a/m.fits"}, "theory": {"bias": 1.0}}
    for cov in ({"regions": "healpix", "extra_region_seeds": 3}, {"extra_region_seeds": 0}):
        cfg = config_from_dict(dict(base, covariance=cov))
        assert region_seed_spread(cfg, None, None, None, None, None, None, 1.0) is None


def _run(folder, name, text):
    (folder / f"{name}.toml").write_text(text)
    assert main(["run", str(folder / f"{name}.toml"), "--out", str(folder / name), "--quiet"]) == 0
    return json.loads((folder / name / "summary.json").read_text())


@pytest.mark.filterwarnings("ignore")
def test_run_records_the_spread_and_blinding_scales_it(tiny_survey):
    text = (tiny_survey / "run.toml").read_text().replace("[covariance]\n", "[covariance]\nextra_region_seeds = 3\n")
    plain = _run(tiny_survey, "plain", text)
    spread = plain["covariance"]["region_seed_spread"]
    assert spread["n_seeds"] == 4 and spread["n_regions"] == 12 and spread["skipped"] == 0
    assert spread["tau_mean"][0] == plain["tau_mean"] and spread["tau_error"][0] == plain["tau_mean_error"]
    assert len(set(spread["tau_mean"])) == 4 and len(set(spread["tau_error"])) == 4  # other regions, other fits
    np.testing.assert_allclose(spread["tau_mean_std"], np.std(spread["tau_mean"], ddof=1), rtol=1e-12)  # analytic
    np.testing.assert_allclose(spread["std_over_error"], spread["tau_mean_std"] / plain["tau_mean_error"], rtol=1e-12)
    assert f"## {SECTION_TITLE}" in (tiny_survey / "plain" / "report.md").read_text()

    blinded = _run(tiny_survey, "blinded", text + "\n[blinding]\nenabled = true\n")
    factor = json.loads((tiny_survey / "blinded.blinding-key.json").read_text())["factor"]
    hidden = blinded["covariance"]["region_seed_spread"]
    for k in ("tau_mean", "tau_error"):
        np.testing.assert_allclose(hidden[k], factor * np.array(spread[k]), rtol=1e-12)  # analytic: scaled
    np.testing.assert_allclose(hidden["std_over_error"], spread["std_over_error"], rtol=1e-10)
    assert f"{spread['tau_mean'][1]:.4e}" not in (tiny_survey / "blinded" / "report.md").read_text()

    out = tiny_survey / "unblinded"
    assert main(["unblind", str(tiny_survey / "blinded"), "--key", str(tiny_survey / "blinded.blinding-key.json"),
                 "--out", str(out)]) == 0
    back = json.loads((out / "summary.json").read_text())["covariance"]["region_seed_spread"]
    for k in ("tau_mean", "tau_error", "tau_mean_std"):
        np.testing.assert_allclose(back[k], spread[k], rtol=1e-12)
    assert f"| 1 | {spread['tau_mean'][1]:.4e} |" in (out / "report.md").read_text()
