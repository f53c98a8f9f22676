"""Theory and inference options end to end on the tiny noise-only survey (conftest.tiny_survey)."""

import json

import numpy as np

from pairvel.cli import main
from pairvel.model import theory as th


def run(folder, theory_toml, *extra):
    text = (folder / "run.toml").read_text().replace("[theory]\n", "[theory]\n" + theory_toml)
    (folder / "run2.toml").write_text(text)
    return main(["run", str(folder / "run2.toml"), "--out", str(folder / "out"), "--quiet", *extra])


def error_line(capsys):
    err = [line for line in capsys.readouterr().err.splitlines() if line.startswith("pairvel: error:")]
    assert len(err) == 1, err
    return err[0]


def test_bad_power_table_is_one_clear_line(tiny_survey, capsys):
    (tiny_survey / "pk.txt").write_text("0.01 1e4\n0.1 x\n")
    assert run(tiny_survey, 'power_table_path = "pk.txt"\n') == 2
    assert "power-spectrum table" in error_line(capsys) and not (tiny_survey / "out").exists()


def test_power_table_and_template_options_reach_the_outputs(tiny_survey):
    k = np.geomspace(1e-4, 50, 400)
    (tiny_survey / "pk.txt").write_text("".join(f"{a:.8e} {b:.8e}\n" for a, b in zip(k, th.linear_power(k))))
    assert run(tiny_survey, 'power_table_path = "pk.txt"\nphotoz_sigma = 0.01\ngrowth_rate = "linder"\n') == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    info = summary["template"]
    assert info["power_spectrum"].startswith("table ") and "sha256" in info["power_spectrum"]
    assert info["photoz_model"] == "convolution" and info["photoz_sigma_z0"] == 0.01
    assert abs(sum(info["z_weights"]) - 1) < 1e-12 and 0.1 <= info["z_mean_model"] <= 0.2


def test_proxy_bins_joint_fit_and_conversion_in_outputs(tiny_survey):
    toml = ('likelihood = "sellentin-heavens"\nproxy_bin_edges = [14.0, 14.33, 14.67, 15.0]\nfit_velocity_scale = true\n'
            'tau_prior_mean = 0.01\ntau_prior_sigma = 0.002\nproxy_power_law = "log10"\n')
    assert run(tiny_survey, toml) == 0
    out = tiny_survey / "out"
    for name in ("proxy_bins.ecsv", "tau_vs_proxy.png", "velocity_scale.png"):
        assert (out / name).is_file(), name
    s = json.loads((out / "summary.json").read_text())
    assert s["likelihood"] == "sellentin-heavens" and s["fit"]["likelihood"] == "sellentin-heavens"
    assert s["covariance"]["precision_correction"].startswith("none: Sellentin & Heavens")
    lo, hi = s["tau_mean_68"]
    assert lo < s["tau_mean"] < hi
    bins = s["proxy_bins"]["bins"]
    assert len(bins) == 3 and sum(b["n_tracers"] for b in bins) == s["n_tracers"]
    # the bins' joint covariance; the power law, which this noise-only survey cannot constrain (alpha runs to
    # the edge of its range), is reported as not fitted, without figure (the fitted case: test_blinding_holds)
    joint = s["joint_covariances"]["proxy_joint"]
    assert joint["bins"] == [0, 1, 2] and np.array(joint["covariance"]).shape == (12, 12)
    np.testing.assert_allclose(joint["tau"], [b["tau_mean"] for b in bins], rtol=1e-10)
    assert s["tau_against_mass"] == {"problem": "the best alpha lies outside [-5.0, 5.0]", "n_bins_fitted": 3}
    assert not (out / "tau_vs_mass.png").exists()
    # conversion: T_CMB / c in uK per km/s (analytic, SCIENCE.md: T_CMB = 2.72548 K)
    conv = s["conversion"]
    np.testing.assert_allclose(conv["uK_per_km_s_per_unit_tau"], 2.72548e6 / 299792.458, rtol=1e-12)
    np.testing.assert_allclose(conv["uK_per_km_s_at_fitted_tau"], conv["uK_per_km_s_per_unit_tau"] * s["tau_mean"],
                               rtol=1e-12)
    joint = s["velocity_scale_fit"]
    assert joint["tau_prior"] == {"mean": 0.01, "sigma": 0.002} and joint["f_sigma8_std"] > 0
    report = (out / "report.md").read_text()
    for heading in ("## Template, likelihood and units", "## Fits per bin of log_mass",
                    "## Joint fit of tau_mean and f sigma_8", "## Optical depth against mass"):
        assert heading in report
    assert "No power law fitted: the best alpha lies outside" in report
    assert "best of 3 bins fitted" in report and "Correlation of tau_mean between bins" in report


def test_theory_config_consistency(tiny_survey, capsys):
    assert run(tiny_survey, "tau_prior_mean = 0.01\n") == 2
    assert "tau_prior_sigma" in error_line(capsys)
    assert run(tiny_survey, "tau_prior_mean = 0.01\ntau_prior_sigma = 0.001\n") == 2
    assert "only by the joint fit" in error_line(capsys)
    assert run(tiny_survey, "power_table_z = 1.0\n") == 2
    assert "power_table_path" in error_line(capsys)
    assert run(tiny_survey, "proxy_bin_edges = [15.0, 14.0]\n") == 2
    assert "proxy_bin_edges" in error_line(capsys)
    assert run(tiny_survey, 'proxy_bin_edges = [14.0, 15.0]\nproxy_power_law = "log10"\n') == 2
    assert "theory.proxy_power_law" in error_line(capsys)


def test_empty_proxy_bin_is_reported_not_fatal(tiny_survey):
    assert run(tiny_survey, "proxy_bin_edges = [14.0, 15.0, 16.0]\n") == 0
    bins = json.loads((tiny_survey / "out" / "summary.json").read_text())["proxy_bins"]["bins"]
    assert bins[0]["tau_mean_error"] > 0 and bins[0]["problem"] is None
    assert bins[1]["n_tracers"] == 0 and bins[1]["problem"] == "only 0 tracers" and "tau_mean" not in bins[1]
