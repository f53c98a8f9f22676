"""The mock's second, galaxy-like catalogue (pairvel.sims.partner)."""

import json

import pytest
from astropy.table import Table

from pairvel.core.errors import InputError
from pairvel.input.config import load_config
from pairvel.sims.mock import make_mock_survey
from pairvel.sims.partner import PARTNER_FILE

TINY = dict(n_tracers=600, nside=64, ra_min=30, ra_max=45, dec_min=20, dec_max=30, z_min=0.1, z_max=0.3,
            cell_mpc=16.0, beam_fwhm_arcmin=40.0, aperture_radius_arcmin=60.0, include_cmb=False)


def test_partner_catalogue_truth_and_run_config(tmp_path):
    truth = make_mock_survey(tmp_path / "m", seed=4, **TINY, partner_n_tracers=400, partner_bias=0.7,
                             partner_tau_mean=1e-3)
    record = json.loads((tmp_path / "m" / "truth.json").read_text())
    part = record["partner"]
    table = Table.read(tmp_path / "m" / PARTNER_FILE)
    assert part["n_tracers"] == len(table) and 300 < len(table) < 500  # a Poisson draw around 400
    assert part["bias"] == 0.7 and part["tau_mean"] == 1e-3
    b1 = truth.bias
    # the cross amplitude (pairvel.stats.cross, derived there): (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2)
    assert part["tau_cross"] == pytest.approx((truth.tau_mean * 0.7 + 1e-3 * b1) / (b1 + 0.7), rel=1e-12)
    cfg = load_config(tmp_path / "m" / "run.toml")
    assert cfg.partner.path == (tmp_path / "m" / PARTNER_FILE).resolve() and cfg.partner.bias == 0.7
    assert table["z"].min() >= 0.1 and table["z"].max() < 0.3


def test_without_partner_nothing_changes(tmp_path):
    """partner_n_tracers = 0 draws nothing: the survey equals one made without the option (internal regression)."""
    make_mock_survey(tmp_path / "a", seed=6, **TINY)
    make_mock_survey(tmp_path / "b", seed=6, **TINY, partner_n_tracers=0, partner_bias=0.9)
    ta, tb = (json.loads((tmp_path / d / "truth.json").read_text()) for d in "ab")
    assert "partner" not in tb and "partner" not in tb["options"]
    assert ta["n_tracers"] == tb["n_tracers"] and ta["v12_los_realised_km_s"] == tb["v12_los_realised_km_s"]
    assert "[partner]" not in (tmp_path / "b" / "run.toml").read_text()
    assert (tmp_path / "a" / "skerry_150ghz_partial.fits").read_bytes() == \
        (tmp_path / "b" / "skerry_150ghz_partial.fits").read_bytes()


@pytest.mark.parametrize("bad, match", [
    (dict(partner_n_tracers=1), r"'partner_n_tracers' must be 0 \(none\) or an integer >= 2; got 1"),
    (dict(partner_n_tracers=100, partner_bias=-1.0), r"'partner_bias' must be a finite number >= 0; got -1\.0"),
    (dict(partner_n_tracers=100, partner_tau_mean=float("nan")), r"'partner_tau_mean' must be a finite number"),
])
def test_bad_partner_options(tmp_path, bad, match):
    with pytest.raises(InputError, match=match):
        make_mock_survey(tmp_path / "m", **TINY, **bad)
