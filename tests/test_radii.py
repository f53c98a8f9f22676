"""Several aperture radii in one run: every radius through the same pair pass, a fit per radius, outputs."""

import json

import numpy as np
import pytest
from astropy.table import Table

from pairvel.cli import main
from pairvel.config import load_config
from pairvel.errors import ConfigError
from pairvel.pipeline import run_pipeline
from pairvel.radii import aperture_radii


def with_aperture(folder, text, name):
    cfg = (folder / "run.toml").read_text().replace("[aperture]\nradius_arcmin = 12.0\n", "[aperture]\n" + text)
    path = folder / name
    path.write_text(cfg)
    return path


def test_radius_list_puts_the_primary_first(tiny_survey):
    cfg = load_config(with_aperture(tiny_survey, "radius_arcmin = 12.0\nradii_arcmin = [16.0, 8.0, 12.0]\n", "a.toml"))
    np.testing.assert_array_equal(aperture_radii(cfg.aperture), [12.0, 8.0, 16.0])
    assert aperture_radii(load_config(tiny_survey / "run.toml").aperture).tolist() == [12.0]
    with pytest.raises(ConfigError, match=r"'aperture.radii_arcmin' must not repeat a radius; got \[8.0, 8.0\]"):
        load_config(with_aperture(tiny_survey, "radii_arcmin = [8.0, 8.0]\n", "b.toml"))
    with pytest.raises(ConfigError, match=r"'aperture.radii_arcmin' must lie in \[0.05, 60.0\]"):
        load_config(with_aperture(tiny_survey, "radii_arcmin = [8.0, 90.0]\n", "c.toml"))


def test_each_radius_matches_a_run_at_that_radius(tiny_survey):
    multi = run_pipeline(load_config(with_aperture(
        tiny_survey, "radius_arcmin = 16.0\nradii_arcmin = [20.0, 24.0]\n", "multi.toml")))
    fits = multi.extra["radius_fits"]
    assert [f.radius_arcmin for f in fits] == [16.0, 20.0, 24.0] and fits[0].primary
    # internal consistency: the primary radius row is the main result
    assert fits[0].fit.amplitude == pytest.approx(multi.fit.amplitude, rel=1e-12)
    np.testing.assert_allclose(fits[0].p, multi.p, rtol=1e-12)
    for k, r in ((1, 20.0), (2, 24.0)):
        single = run_pipeline(load_config(with_aperture(tiny_survey, f"radius_arcmin = {r}\n", f"r{r:g}.toml")))
        assert single.n_tracers == multi.n_tracers  # every tracer usable at every radius on this map
        # internal equivalence: one pass over an (M, N) stack gives each set's curve as a run of its own
        np.testing.assert_allclose(fits[k].p, single.p, rtol=1e-9, atol=1e-12)
        assert fits[k].fit.amplitude == pytest.approx(single.fit.amplitude, rel=1e-9)
        assert fits[k].fit.error == pytest.approx(single.fit.error, rel=1e-9)


def test_outputs_have_the_table_figure_and_report_line(tiny_survey):
    cfg = with_aperture(tiny_survey, "radius_arcmin = 16.0\nradii_arcmin = [14.0, 20.0, 24.0]\n"
                                     "pixel_weighting = \"fraction\"\n", "run_radii.toml")
    assert main(["run", str(cfg), "--out", str(tiny_survey / "out"), "--quiet"]) == 0
    out = tiny_survey / "out"
    table = Table.read(out / "aperture_radii.ecsv")
    assert list(table["radius_arcmin"]) == [16.0, 14.0, 20.0, 24.0] and list(table["primary"]) == [True, False, False, False]
    assert table["p_uk"].shape == (4, 4) and np.all(np.isfinite(table["tau_mean_error"]))
    assert (out / "tau_vs_radius.png").stat().st_size > 1000
    report = (out / "report.md").read_text()
    assert "## Signal against aperture radius" in report and "| 16 * |" in report
    summary = json.loads((out / "summary.json").read_text())
    assert summary["aperture_radii"][0]["tau_mean"] == pytest.approx(summary["tau_mean"], rel=1e-12)
    assert summary["config"]["aperture"]["pixel_weighting"] == "fraction"
