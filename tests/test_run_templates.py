"""Bias from a proxy and templates beyond linear theory, end to end on the tiny survey (conftest)."""

import json

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from pairvel.cli import main
from pairvel.model import theory as th

pytestmark = pytest.mark.filterwarnings("ignore::UserWarning")


def run(folder, theory_toml, *, name="out"):
    text = (folder / "run.toml").read_text().replace("[theory]\nbias = 1.0\n", "[theory]\n" + theory_toml)
    (folder / "run2.toml").write_text(text)
    return main(["run", str(folder / "run2.toml"), "--out", str(folder / name), "--quiet"])


def test_derived_bias_and_jsd99_template_with_a_tolerance_reach_the_outputs(tiny_survey, capsys):
    toml = ('bias_from_proxy = "mass"\nproxy_is_log10 = true\nvelocity_model = "jsd99"\n'
            'fit_template_tolerance = 0.1\nfit_r_max_mpc = 100.0\n')
    assert run(tiny_survey, toml) == 0
    printed = capsys.readouterr().out
    out = tiny_survey / "out"
    s = json.loads((out / "summary.json").read_text())
    info = s["template"]
    b = info["bias_from_proxy"]
    lo, _, hi = b["tracer_bias_min_median_max"]
    # the catalogue's log10 M200m runs over 14-15 (conftest): Tinker et al. 2010 gives b ~ 2-6 at z ~ 0.15
    # (checked against colossus in tests/model/test_halobias.py); the pair-weighted mean lies inside
    assert 1.5 < lo < b["b_eff"] < hi < 8 and b["mass_definition"].startswith("M200m in Msun")
    assert len(b["b_per_redshift_node"]) == len(info["z_nodes"])
    assert s["assumptions"]["bias b"] == b["b_eff"] and f"assumes b = {b['b_eff']:.4g}" in printed
    assert info["velocity_model"] == "jsd99" and info["kind"].startswith("Juszkiewicz et al. 1999")
    c = info["compared"]
    assert set(c["v12_km_s"]) == {"linear", "jsd99"} and c["tolerance"] == 0.1
    # the fit range: bins with centre < 100 Mpc (fit_r_max_mpc) whose templates agree within 10%
    curve = Table.read(out / "pairwise.ecsv")
    expected = (np.asarray(curve["r_mid"]) < 100.0) & np.array(c["within_tolerance"])
    np.testing.assert_array_equal(np.asarray(curve["in_fit"]), expected)
    assert not all(c["within_tolerance"]) and expected.any()  # the first bin (15 Mpc) differs by ~15%
    side = Table.read(out / "templates.ecsv")
    np.testing.assert_allclose(side["v12_jsd99"], c["v12_km_s"]["jsd99"], rtol=1e-12)
    assert side["v12_linear"].unit == u.km / u.s
    report = (out / "report.md").read_text()
    for text in ("bias from the proxy (log10 mass, M200m", "velocity model: Juszkiewicz", "Templates side by side",
                 "![templates](templates.png)"):
        assert text in report, text
    assert (out / "templates.pdf").is_file()


def test_table_of_linear_theory_gives_the_linear_result(tiny_survey, tiny_run):
    r = np.geomspace(0.5, 200.0, 400)
    zs = np.linspace(0.09, 0.21, 7)
    rr, zz = np.meshgrid(r, zs)
    v = np.concatenate([th.pairwise_velocity(r, z, 1.0) for z in zs])
    Table({"r": rr.ravel() * u.Mpc, "z": zz.ravel(), "v12": v * u.km / u.s}).write(tiny_survey / "v12.ecsv")
    assert run(tiny_survey, 'bias = 1.0\nvelocity_model = "table"\nv12_table_path = "v12.ecsv"\n') == 0
    table_run = json.loads((tiny_survey / "out" / "summary.json").read_text())
    linear_run = json.loads((tiny_run / "summary.json").read_text())
    assert table_run["template"]["v12_table"]["sha256"] and table_run["template"]["velocity_model"] == "table"
    # internal consistency: a table of the linear v12 (400 log r x 7 z nodes, interpolated linearly) is the
    # linear template to ~1e-4, so tau_mean is the same
    assert table_run["tau_mean"] == pytest.approx(linear_run["tau_mean"], rel=2e-3)
    assert table_run["tau_mean_error"] == pytest.approx(linear_run["tau_mean_error"], rel=2e-3)


def test_bad_table_is_one_line_before_the_pair_pass(tiny_survey, capsys):
    Table({"r": [1.0, 2.0], "v12": [1.0, 2.0] * u.km / u.s}).write(tiny_survey / "v12.ecsv")
    assert run(tiny_survey, 'bias = 1.0\nvelocity_model = "table"\nv12_table_path = "v12.ecsv"\n') == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.startswith("pairvel: error:")]
    assert len(err) == 1 and "column 'r' must carry a unit" in err[0] and "v12.ecsv" in err[0]
    assert not (tiny_survey / "out").exists()
