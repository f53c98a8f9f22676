"""Several aperture radii in one run: every radius through the same pair pass, a fit per radius, outputs."""

import json

import numpy as np
import pytest
from astropy.table import Table

from pairvel.cli import main
from pairvel.core.errors import ConfigError
from pairvel.input.config import load_config
from pairvel.maps.radii import aperture_radii
from pairvel.pipeline import run_pipeline


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


def test_physical_radius_against_astropy():
    from pairvel.maps.radii import angular_radius_arcmin
    from pairvel.model.cosmology import Cosmology

    cosmo = Cosmology()
    z = np.array([0.1, 0.5, 1.0, 2.0])
    # computed with astropy: kpc per arcmin, proper and comoving, for the same flat LCDM
    ref_p = 500.0 / cosmo.astropy.kpc_proper_per_arcmin(z).value
    ref_c = 500.0 / cosmo.astropy.kpc_comoving_per_arcmin(z).value
    np.testing.assert_allclose(angular_radius_arcmin(500.0, z, cosmo, kind="proper"), ref_p, rtol=1e-6)
    np.testing.assert_allclose(angular_radius_arcmin(500.0, z, cosmo, kind="comoving"), ref_c, rtol=1e-6)


@pytest.mark.parametrize("method, weighting", [("kernel", "centre"), ("direct", "centre"), ("kernel", "fraction"),
                                               ("direct", "subsample")])
def test_per_tracer_radius_equals_measuring_each_tracer_alone(method, weighting):
    import healpy as hp

    from pairvel.maps.healpix import HealpixMap
    from pairvel.maps.photometry import measure_apertures

    nside = 128
    rng = np.random.default_rng(5)
    sm = HealpixMap.from_array(rng.normal(0, 10, 12 * nside ** 2))
    ra, dec = rng.uniform(0, 360, 40), rng.uniform(-60, 60, 40)
    scale = rng.uniform(0.6, 1.8, 40)
    radii = np.array([60.0, 90.0])
    both = measure_apertures(sm, ra, dec, radii, radius_scale=scale, method=method, pixel_weighting=weighting,
                             subsample_level=2)
    for i in range(0, 40, 7):
        alone = measure_apertures(sm, ra[i:i + 1], dec[i:i + 1], radii * scale[i], method=method,
                                  pixel_weighting=weighting, subsample_level=2)
        # internal equivalence: a per-tracer factor is the same as that tracer's own radii
        np.testing.assert_allclose(both.temperatures[:, i], alone.temperatures[:, 0], rtol=1e-10, atol=1e-12)
    assert hp.nside2resol(nside, arcmin=True) < 60.0


def test_physical_radius_run(tiny_survey):
    cfg = with_aperture(tiny_survey, "radius_arcmin = 16.0\nradius_kpc = 2500.0\nradius_kpc_kind = \"comoving\"\n",
                        "kpc.toml")
    res = run_pipeline(load_config(cfg))
    ang = run_pipeline(load_config(with_aperture(tiny_survey, "radius_arcmin = 16.0\n", "ang.toml")))
    assert res.config.aperture.radius_kpc == 2500.0 and res.n_tracers > 300
    assert not np.allclose(res.p, ang.p)  # the apertures did change with redshift
