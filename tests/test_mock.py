"""The synthetic survey generator: files, footprint, velocity field statistics, C_l table."""

import json

import numpy as np
import pytest
from astropy.table import Table

from pairvel.errors import OutputError
from pairvel.mock import CATALOGUE_FILE, MAP_FILE, load_cmb_cl, make_mock_survey
from pairvel.skymap import read_map

SMALL = dict(n_tracers=4000, nside=256, ra_min=-10, ra_max=10, dec_min=-6, dec_max=6, z_min=0.15, z_max=0.4,
             cell_mpc=8.0, beam_fwhm_arcmin=10.0, aperture_radius_arcmin=15.0, include_cmb=False)


@pytest.fixture(scope="module")
def small_mock(tmp_path_factory):
    out = tmp_path_factory.mktemp("mock") / "survey"
    truth = make_mock_survey(out, seed=5, **SMALL)
    return out, truth


def test_files_and_footprint(small_mock):
    out, truth = small_mock
    cat = Table.read(out / CATALOGUE_FILE)
    assert set(cat.colnames) == {"ra", "dec", "z", "log_mass"}
    assert abs(len(cat) - 4000) < 5 * np.sqrt(4000) and len(cat) == truth.n_tracers  # Poisson count
    dra = (np.asarray(cat["ra"]) + 180) % 360 - 180  # the patch crosses RA = 0
    assert np.all((dra >= -10) & (dra < 10) & (cat["dec"] >= -6) & (cat["dec"] < 6))
    assert np.all((cat["z"] >= 0.15) & (cat["z"] < 0.4))
    sm = read_map(out / MAP_FILE)
    assert sm.nside == 256 and sm.pixels is not None
    record = json.loads((out / "truth.json").read_text())
    assert record["tau_mean"] == truth.tau_mean and record["scenario"]["survey"] == "Larkspur Cluster Survey"


def test_realised_pairwise_velocity_follows_linear_theory(small_mock):
    _, truth = small_mock
    v3d = np.asarray(truth.v12_3d_realised_km_s)
    lin = np.asarray(truth.v12_linear_km_s)
    assert np.all(v3d[1:4] < 0)  # infall at 20-80 Mpc
    # one small volume: sample variance and the 8 Mpc grid allow a loose factor (internal regression)
    ratio = v3d[1:4] / lin[1:4]
    assert np.all((ratio > 0.5) & (ratio < 1.5)), ratio


def test_velocity_rms_matches_linear_theory():
    """sigma_v^2 (1D) = (a H f D)^2 / (6 pi^2) int P(k) dk over the grid's k-range (analytic)."""
    from pairvel.cosmology import DEFAULT_COSMOLOGY as cosmo
    from pairvel.mock import _gaussian_fields
    from pairvel.theory import linear_power

    shape, cell = (96, 96, 96), 8.0
    _, u = _gaussian_fields(shape, cell, cosmo, np.random.default_rng(0))
    kf = [2 * np.pi * np.fft.fftfreq(n, d=cell) for n in shape]
    k = np.sqrt(kf[0][:, None, None] ** 2 + kf[1][None, :, None] ** 2 + kf[2][None, None, :] ** 2).ravel()[1:]
    expect = np.sum(linear_power(k, 0.0) / k**2) / (shape[0] * shape[1] * shape[2] * cell**3) / 3
    got = np.mean([np.var(c) for c in u])
    np.testing.assert_allclose(got, expect, rtol=0.15)  # one realisation of 96^3 cells: cosmic variance of box modes


def test_cl_table_first_peak():
    ell, cl = load_cmb_cl()
    dl = ell * (ell + 1) * cl / (2 * np.pi)
    peak = ell[np.argmax(dl[:1000])]
    assert 200 <= peak <= 240  # common practice: first acoustic peak near ell ~ 220
    assert 5000 < dl[peak] < 6000  # [mem] D_l ~ 5500-5800 uK^2 at the first peak


def test_refuses_non_empty_folder(tmp_path):
    (tmp_path / "x.txt").write_text("keep me")
    with pytest.raises(OutputError, match="exists and is not empty"):
        make_mock_survey(tmp_path, **SMALL)
    assert (tmp_path / "x.txt").read_text() == "keep me"
