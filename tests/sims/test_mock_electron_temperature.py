"""The mock's isothermal tSZ option (electron_temperature_kev) and its per-tracer truth, for `pairvel velocities`."""

import json

import numpy as np
import pytest
from astropy.table import Table

from pairvel.core.constants import C_KM_S, T_CMB_UK
from pairvel.core.errors import InputError
from pairvel.input.config import load_config
from pairvel.maps.skymap import read_map
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, TRACER_TRUTH_FILE, make_mock_survey

TINY = dict(n_tracers=300, nside=64, ra_min=30, ra_max=45, dec_min=20, dec_max=30, z_min=0.1, z_max=0.3,
            cell_mpc=16.0, beam_fwhm_arcmin=40.0, aperture_radius_arcmin=60.0, include_cmb=False,
            extra_frequencies_ghz=(90.0, 220.0))


def test_isothermal_tsz_and_tracer_truth(tmp_path):
    truth = make_mock_survey(tmp_path / "iso", seed=3, electron_temperature_kev=4.0, **TINY)
    plain = make_mock_survey(tmp_path / "plain", seed=3, **TINY)
    folder = tmp_path / "iso"
    assert truth.files["tracer_truth"] == TRACER_TRUTH_FILE and "tracer_truth" not in plain.files
    cat = Table.read(folder / CATALOGUE_FILE)
    rows = Table.read(folder / TRACER_TRUTH_FILE)
    assert len(rows) == len(cat) == truth.n_tracers
    # y = tau k T_e / (m_e c^2) (Carlstrom et al. 2002, isothermal) and dT = -tau T_CMB v / c (Birkinshaw 1999)
    np.testing.assert_allclose(rows["y"], rows["tau"] * 4.0 / 510.99895069, rtol=1e-9)
    np.testing.assert_allclose(rows["dt_ksz_uk"], -rows["tau"] * T_CMB_UK * rows["v_r_km_s"] / C_KM_S, rtol=1e-9)
    np.testing.assert_allclose(rows["tau"].mean(), truth.tau_mean, rtol=1e-9)
    # the option changes no random draw: the same catalogue, and 150 GHz maps that differ by the tSZ only
    np.testing.assert_array_equal(cat["ra"], Table.read(tmp_path / "plain" / CATALOGUE_FILE)["ra"])
    assert not np.array_equal(read_map(folder / MAP_FILE).values, read_map(tmp_path / "plain" / MAP_FILE).values)
    # a mock without the option records no new option (its truth.json stays as it was)
    assert "electron_temperature_kev" not in json.loads((tmp_path / "plain" / "truth.json").read_text())["options"]

    cfg = load_config(folder / "run.toml")
    assert cfg.map.path is None and len(cfg.multifrequency.map_paths) == 3
    assert cfg.multifrequency.frequencies_ghz == (150.0, 90.0, 220.0)
    assert cfg.single_cluster.electron_temperature_kev == 4.0


@pytest.mark.parametrize("bad", [0.0, -1.0, float("nan"), "5"])
def test_bad_electron_temperature_is_refused(tmp_path, bad):
    with pytest.raises(InputError, match="mock option 'electron_temperature_kev' must be a number in"):
        make_mock_survey(tmp_path / "m", electron_temperature_kev=bad, **TINY)
    assert not (tmp_path / "m").exists()
