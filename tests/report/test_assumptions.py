"""What tau_mean assumes and what it is: summary.json, report.md and the closing lines of one run."""

import json
import math

import pytest

from pairvel.cli import main
from pairvel.core.errors import ConfigError
from pairvel.input.config import config_from_dict
from pairvel.maps.photometry import point_source_fraction
from pairvel.model.cosmology import Cosmology
from pairvel.model.theory import growth_rate, sigma_radius
from pairvel.report.assumptions import assumptions, beam_fwhm, tau_mean_meaning
from pairvel.report.blinding import load_result


def test_assumptions_reach_summary_report_and_terminal(tiny_survey, capsys):
    text = (tiny_survey / "run.toml").read_text()
    text = text.replace("bias = 1.0", "bias = 2.0\nfit_r_min_mpc = 30.0")
    text = text.replace("radius_arcmin = 12.0", "radius_arcmin = 12.0\nbeam_fwhm_arcmin = 10.0")
    (tiny_survey / "a.toml").write_text(text.replace("[nulls]\n", "[nulls]\nn_shuffle = 2\nn_shuffle_z = 0\n"))
    assert main(["run", str(tiny_survey / "a.toml"), "--out", str(tiny_survey / "out")]) == 0
    printed = capsys.readouterr().out
    out = tiny_survey / "out"
    s = json.loads((out / "summary.json").read_text())
    a = s["assumptions"]
    assert a["bias b"] == 2.0 and a["fit range"] == "30-120 Mpc (3 of 4 bins)"
    assert a["z_eff (measured pairs in the fit range)"] == s["z_eff"]
    assert a["z_template (mean over the template's pair redshifts)"] == s["template"]["z_mean_model"]
    # internal consistency: f sigma_8 at z_eff from the theory module directly
    c = Cosmology()
    fs8 = growth_rate(s["z_eff"], cosmo=c) * sigma_radius(8.0 / c.h, s["z_eff"], cosmo=c, wiggles=True)
    assert a["f sigma_8 at z_eff"] == pytest.approx(float(fs8), rel=1e-12)
    assert (a["h"], a["Omega_m"], a["sigma_8"]) == (0.677, 0.31, 0.81) and "N_eff = 3.046" in a["distances"]
    assert a["trend-loss factor"].endswith("(the template is multiplied by it, bin by bin)")
    assert "not the integral over a tracer's profile" in a["tau_mean"]
    f = point_source_fraction(12.0, 10.0)
    assert a["point-source fraction f (aperture value x pi theta^2 / profile integral)"] == f
    assert a["profile integral per unit tau_mean [arcmin^2]"] == pytest.approx(math.pi * 144.0 / f, rel=1e-12)
    assert s["tau_mean_meaning"]["beam_from"] == "aperture.beam_fwhm_arcmin"
    # the Hartlap factor the warning quotes is the fit's: 12 regions, 3 fitted bins (analytic (12-3-2)/11)
    assert s["fit"]["precision_factor"] == s["covariance"]["diagnostics"]["hartlap_factor"]["jackknife"] == 7 / 11
    quoted = [w["text"] for w in s["run_warnings"] if "Hartlap factor" in w["text"]]
    assert quoted and "for the 3 fitted bins (Hartlap factor 0.64 < 0.8)" in quoted[0]
    report = (out / "report.md").read_text()
    head = report.split("## Null tests")[0]
    assert "## What tau_mean assumes" in head and "| bias b | 2 |" in head and "z_template is the mean" in head
    assert "- assumes b = 2, f sigma_8(z_eff) = " in head and "disc-minus-annulus optical depth at 12'" in head
    assert f"  assumes b = 2, f sigma_8(z_eff) = {fs8:.3f}; h = 0.677" in printed
    assert "a beam-sized point source keeps f = 0.963)" in printed  # analytic (1 - e^-x)^2, x = 144 / (2 sigma^2)
    # a result read back from the folder states the same assumptions
    assert json.loads(json.dumps(assumptions(load_result(out)))) == a


def test_beam_key_falls_back_to_the_prefilter_beam_and_must_agree_with_it():
    base = {"catalogue": {"path": "c.csv"}, "map": {"path": "m.fits"}, "theory": {"bias": 1.0}}
    cfg = config_from_dict(base)
    assert beam_fwhm(cfg) == (None, None) and set(tau_mean_meaning(cfg)) == {"definition"}
    cfg = config_from_dict({**base, "prefilter": {"kind": "highpass", "beam_fwhm_arcmin": 1.4}})
    assert beam_fwhm(cfg) == (1.4, "prefilter.beam_fwhm_arcmin")
    assert tau_mean_meaning(cfg)["point_source_fraction"] == point_source_fraction(2.1, 1.4)
    cfg = config_from_dict({**base, "aperture": {"radius_kpc": 500.0, "beam_fwhm_arcmin": 1.4}})
    assert "500 kpc proper" in tau_mean_meaning(cfg)["definition"]  # no single theta: no factor
    assert "point_source_fraction" not in tau_mean_meaning(cfg)
    with pytest.raises(ConfigError, match=r"'aperture\.beam_fwhm_arcmin' and prefilter\.beam_fwhm_arcmin describe "
                                          r"the same map beam; got 1\.4 and 1\.6"):
        config_from_dict({**base, "aperture": {"beam_fwhm_arcmin": 1.4}, "prefilter": {"beam_fwhm_arcmin": 1.6}})
