"""Point-source masking and outlier clipping in the pipeline's map stages: the tracers dropped leave
the catalogue with their reasons and counts before anything else sees them, so the null and
simulated-sky sets are made for the same tracers as the data."""

import dataclasses

import numpy as np
import pandas as pd
import pytest

from pairvel.core.progress import Progress
from pairvel.input.config import OutlierConfig, load_config
from pairvel.maps.photometry import MASKED, measure_apertures
from pairvel.maps.sourcemask import CLIPPED, NEAR_SOURCE, near_sources
from pairvel.pipeline import (Apertures, SkyInputs, measure_tracers, prepare_map, random_position_sets,
                              read_catalogue, selection_counts, simulated_sets)
from pairvel.stats.cross import load_partner, partner_tracers


@pytest.mark.filterwarnings("ignore:map .* has no COORDSYS", "ignore:aperture radius", "ignore:.* dropped by the")
def test_masked_sources_and_clipped_outliers_leave_every_set(tiny_survey):
    cat_file = pd.read_csv(tiny_survey / "cat.csv")
    # 20 sources 5' east of the first 20 tracers (invented); discs of 6'
    pd.DataFrame({"ra": cat_file.ra[:20] + 5 / 60, "dec": cat_file.dec[:20]}).to_csv(tiny_survey / "src.csv",
                                                                                      index=False)
    text = (tiny_survey / "run.toml").read_text()
    text = text.replace("n_regions = 12", 'n_regions = 12\nestimator = "simulations"\nn_sim = 2\nsim_cmb = false\n'
                                          'sim_white_noise_uk_arcmin = 400.0')
    (tiny_survey / "src.toml").write_text(text + '\n[source_mask]\npath = "src.csv"\nradius_arcmin = 6.0\n'
                                                 '\n[outliers]\nclip_sigma = 3.0\n'
                                                 '\n[partner]\npath = "cat.csv"\nbias = 1.0\n')
    cfg = load_config(tiny_survey / "src.toml")
    quiet = Progress(10, quiet=True)
    sky = prepare_map(cfg, quiet)
    assert len(sky.sources) == 20 and np.count_nonzero(sky.skymap.weight == 0) > 0
    full = read_catalogue(cfg, quiet)
    cat, aps = measure_tracers(cfg, full, sky.skymap, quiet, sources=sky.sources)

    # the drops, recomputed from their definitions: near a source (reach 12' sqrt 2 + 6'), then 3 robust sigma
    res = measure_apertures(sky.skymap, full.ra, full.dec, 12.0)
    photometry_ok = res.usable | (res.drop_reason == MASKED)
    near = near_sources(full.ra, full.dec, 12.0 * np.sqrt(2), sky.sources) & photometry_ok
    reasons = cat.removed.reason
    assert np.sum(reasons == NEAR_SOURCE) == near.sum() > 0
    t = res.temperatures[0, res.usable & ~near]
    mad_sigma = 1.482602218505602 * np.median(np.abs(t - np.median(t)))
    assert np.sum(reasons == CLIPPED) == np.sum(np.abs(t - np.median(t)) > 3 * mad_sigma) > 0  # analytic rule
    assert len(cat) == int((res.usable & ~near).sum()) - int(np.sum(reasons == CLIPPED))

    selection = selection_counts(cfg, cat, aps, sky)
    assert selection["near_point_source_dropped"] == near.sum() and selection["point_sources_masked"] == 20
    assert selection["outliers_clipped"] == np.sum(reasons == CLIPPED) and selection["outlier_clip_sigma"] == 3.0
    assert selection["used"] + selection["aperture_masked_dropped"] + near.sum() + selection["outliers_clipped"] \
        == selection["kept"]
    # a run from the tracer table (no map, no [source_mask] or [outliers]) still counts the table's reasons
    from_table = selection_counts(dataclasses.replace(cfg, outliers=OutlierConfig()), cat, aps,
                                  SkyInputs(None, None, None, None))
    assert from_table["near_point_source_dropped"] == near.sum()
    assert from_table["outliers_clipped"] == selection["outliers_clipped"]
    assert "point_sources_masked" not in from_table and "outlier_clip_sigma" not in from_table

    # the null and simulated-sky sets are made for exactly these tracers
    sims = simulated_sets(cfg, sky, cat, quiet)
    randoms = random_position_sets(cfg, sky.skymap, cat, aps.scale, quiet)
    assert sims.shape == (1, 2, len(cat)) and randoms.shape == (2, len(cat))
    assert isinstance(aps, Apertures) and aps.temperatures.shape == (1, len(cat))

    # a [partner] catalogue (here the same file, same radius) loses the same tracers, for the same reasons
    cat2, temps2, selection2, _ = partner_tracers(cfg, load_partner(cfg), sky.skymap, sources=sky.sources)
    np.testing.assert_array_equal(cat2.row, cat.row)
    np.testing.assert_array_equal(temps2, aps.temperatures[0])
    assert selection2["near_point_source"] == near.sum() and selection2["outliers_clipped"] == selection["outliers_clipped"]
