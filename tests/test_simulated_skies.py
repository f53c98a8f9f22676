"""Simulated skies measure the same apertures as the data: mask and holes, physical radii, pixel
weighting, several radii (the pipeline's ``simulated_sets`` against its ``measure_tracers``)."""

import healpy as hp
import numpy as np
import pytest
from conftest import write_healpix

import pairvel.stats.simcov as simcov
from pairvel.core.progress import Progress
from pairvel.input.config import load_config
from pairvel.pipeline import measure_tracers, prepare_map, read_catalogue, simulated_sets

NSIDE = 256  # the tiny survey's map


def _holed_survey(folder, *, weighting, noise=400.0, extra=""):
    """The tiny survey with a mask of 80 round holes (0.2-0.5 deg) over its tracers, a 5000 kpc proper
    radius (about 25-44 arcmin at z = 0.1-0.2), a second radius and simulated skies of white noise."""
    rng = np.random.default_rng(21)
    mask = np.ones(hp.nside2npix(NSIDE), np.float32)
    for ra, dec, r in zip(rng.uniform(20, 50, 80), rng.uniform(-10, 15, 80), rng.uniform(0.2, 0.5, 80)):
        mask[hp.query_disc(NSIDE, hp.ang2vec(ra, dec, lonlat=True), np.radians(r))] = 0.0
    write_healpix(folder / "mask.fits", mask, nside=NSIDE)
    text = (folder / "run.toml").read_text()
    text = text.replace('path = "map.fits"', 'path = "map.fits"\nmask_path = "mask.fits"\nmax_masked_fraction = 0.4')
    text = text.replace("radius_arcmin = 12.0", f'radius_arcmin = 12.0\nradii_arcmin = [16.0]\nradius_kpc = 5000.0\n'
                                                f'pixel_weighting = "{weighting}"')
    text = text.replace("n_regions = 12", f'n_regions = 12\nestimator = "simulations"\nsim_cmb = false\n'
                                          f'sim_white_noise_uk_arcmin = {noise}\n{extra}')
    (folder / "holes.toml").write_text(text + "\n[trend]\nenabled = false\n")
    return load_config(folder / "holes.toml")


def _data_inputs(cfg):
    quiet = Progress(10, quiet=True)
    sky = prepare_map(cfg, quiet)
    with pytest.warns(Warning):  # tracers in the holes are dropped (and said so)
        cat, aps = measure_tracers(cfg, read_catalogue(cfg, quiet), sky.skymap, quiet)
    return sky, cat, aps, quiet


@pytest.mark.filterwarnings("ignore:map .* has no COORDSYS")
@pytest.mark.parametrize("weighting", ["centre", "fraction"])
def test_a_simulated_sky_measures_as_the_data(tiny_survey, monkeypatch, weighting):
    """Internal: each simulated sky, put into the data map's pixels and measured by the data's photometry
    (``measure_tracers``: mask with holes, per-tracer radius, weighting, both radii), gives the aperture
    temperatures the simulation path gave, to rounding; the sky's values outside what the apertures
    read are garbage, so the test also shows that the simulation synthesises every pixel they read."""
    cfg = _holed_survey(tiny_survey, weighting=weighting, extra="n_sim = 2")
    sky, cat, aps, quiet = _data_inputs(cfg)
    near_hole = np.any(aps.temperatures != aps.temperatures, axis=0)  # none: the data kept usable tracers only
    assert not near_hole.any() and aps.scale is not None and np.ptp(aps.scale) > 0.5

    seen = []

    def recording(skymap, *args, **kwargs):
        res = measure(skymap, *args, **kwargs)
        seen.append((skymap, res))
        return res

    measure = simcov.measure_apertures
    monkeypatch.setattr(simcov, "measure_apertures", recording)
    sims = simulated_sets(cfg, sky, cat, quiet)
    assert sims.shape == (2, 2, len(cat)) and np.all(np.isfinite(sims))
    garbage = np.random.default_rng(6).normal(0, 1e4, sky.skymap.values.size)
    for k, (support, res) in enumerate(seen):
        values = support.values_on(sky.skymap)[0]
        as_data = sky.skymap.with_values(np.where(np.isfinite(values), values, garbage))
        kept, again = measure_tracers(cfg, cat, as_data, quiet)
        assert len(kept) == len(cat)
        np.testing.assert_allclose(again.temperatures, res.temperatures, rtol=1e-10, atol=1e-9)
        np.testing.assert_allclose(sims[:, k], res.temperatures, rtol=1e-12)  # no trend: the sets are these


@pytest.mark.filterwarnings("ignore:map .* has no COORDSYS")
def test_white_noise_skies_have_the_variance_of_the_masked_apertures(tiny_survey):
    """Analytic: white noise of pixel sigma s gives T_AP the variance s^2 (1/n_disc + 1/n_annulus) with
    the usable pixel counts of each tracer's disc and annulus (here: after the holes, at its own
    physical radius).  The simulated skies before they followed the data's apertures (a fixed 12
    arcmin, no mask) gave 2.8-24 times this variance (mean 8.4; measured 2026-12-05).  Bounds: each
    variance from 150 skies scatters by sqrt(2/149) = 12%; their mean over ~585 tracers by ~0.5%
    (neighbouring apertures share pixels: more, loosely)."""
    cfg = _holed_survey(tiny_survey, weighting="centre", extra="n_sim = 150")
    sky, cat, aps, quiet = _data_inputs(cfg)
    res = simcov.measure_apertures(sky.skymap, cat.ra, cat.dec, [12.0, 16.0], max_masked_fraction=0.4,
                                   radius_scale=aps.scale)
    n_disc = res.n_pixels_disc * (1 - res.masked_fraction_disc)
    n_ann = res.n_pixels_annulus * (1 - res.masked_fraction_annulus)
    sigma_pix = 400.0 / np.sqrt(hp.nside2pixarea(NSIDE, degrees=True) * 3600.0)
    expected = sigma_pix**2 * (1 / n_disc + 1 / n_ann)  # (n_radii, N)
    sims = simulated_sets(cfg, sky, cat, quiet)
    ratio = sims.var(axis=1, ddof=1) / expected
    np.testing.assert_allclose(ratio.mean(axis=1), 1.0, rtol=0.03)
    assert np.all(np.abs(ratio - 1) < 0.6)
    assert np.ptp(expected[0]) / expected[0].mean() > 1.0  # the test can tell per-tracer radii from one radius
    # tracers whose disc or annulus lost over 15% to the holes (68 here); measured without the mask their
    # mean ratio is 0.85 (2026-12-05), with it 0.99; the mean of 68 ratios scatters by ~1.5%
    holed = np.maximum(res.masked_fraction_disc[0], res.masked_fraction_annulus[0]) > 0.15
    assert holed.sum() > 30
    assert abs(ratio[0, holed].mean() - 1.0) < 0.06


@pytest.mark.filterwarnings("ignore:map .* has no COORDSYS")
def test_the_configured_tracer_signal_reaches_the_simulated_skies(tiny_survey):
    """Analytic: skies without CMB and noise hold only the configured thermal SZ, a log-normal decrement of
    mean 3 uK at the primary radius and (12 / 16)^2 of it at the second (no beam; see sims.skysignal)."""
    cfg = _holed_survey(tiny_survey, weighting="centre", noise=0.0, extra="n_sim = 3\nsim_signal_tsz_uk = 3.0")
    sky, cat, aps, quiet = _data_inputs(cfg)
    sims = simulated_sets(cfg, sky, cat, quiet)
    assert np.all(sims[0] < 0) and abs(sims[0].mean() + 3.0) < 0.3  # 3 x ~585 draws of sd ~1.5 uK
    np.testing.assert_allclose(sims[1], sims[0] * (12.0 / 16.0) ** 2, rtol=1e-12)
