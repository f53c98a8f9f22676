"""`pairvel velocities` end to end: a small invented sky with known velocities, and the full-size mock check.

The fast sky (nside 512, 10 arcmin apertures) is built here from the package's pieces: a Gaussian primary
CMB from the shipped C_l, beam-shaped kSZ + tSZ sources at three frequencies and white noise; the
velocity pulls of the unflagged clusters must have unit variance.  The validation test makes a
full-size mock with `pairvel mock --electron-temperature` and does the same with the mock's truth.
"""

import contextlib
import io
import json

import healpy as hp
import numpy as np
import pytest
from astropy.table import Table

from pairvel.cli import main
from pairvel.core.constants import ARCMIN_RAD, C_KM_S, T_CMB_UK
from pairvel.maps.healpix_io import write_partial_map
from pairvel.maps.sources import paint_beam_sources
from pairvel.model.cmb import load_cmb_cl
from pairvel.model.sz import ELECTRON_REST_ENERGY_KEV, tsz_spectrum

NSIDE, BEAM, RADIUS = 512, 5.0, 10.0           # arcmin; invented
FREQS, NOISE = (90.0, 150.0, 220.0), (30.0, 25.0, 60.0)  # GHz, uK arcmin; invented
TE_KEV = 6.0


def _sky(folder, n=400, seed=11):
    """Catalogue, three maps, per-cluster truth and truth.json of an invented patch; returns the config text."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(2, 38, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-18)), np.sin(np.radians(18)), n)))
    z = rng.uniform(0.1, 0.6, n)
    tau = rng.uniform(0.01, 0.03, n)
    v = rng.normal(0, 500, n)
    y = tau * TE_KEV / ELECTRON_REST_ENERGY_KEV
    Table({"ra": ra, "dec": dec, "z": z, "log_mass": rng.uniform(14, 15, n), "te": np.full(n, TE_KEV)}
          ).write(folder / "clusters.fits")
    Table({"tau": tau, "v_r_km_s": v}).write(folder / "clusters_truth.fits")
    (folder / "truth.json").write_text(json.dumps({"files": {"tracer_truth": "clusters_truth.fits"}}))

    theta, phi = hp.pix2ang(NSIDE, np.arange(hp.nside2npix(NSIDE)))
    lon, lat = np.degrees(phi), 90 - np.degrees(theta)
    foot = np.flatnonzero((lon < 40) & (np.abs(lat) < 20))
    ell, cl = load_cmb_cl()
    np.random.seed(seed)  # healpy's synfast draws from numpy's global generator; only in this test
    cmb = hp.synfast(cl[: 3 * NSIDE], NSIDE, lmax=3 * NSIDE - 1, fwhm=np.radians(BEAM / 60), new=True)[foot]
    area = np.pi * (RADIUS * ARCMIN_RAD) ** 2
    pixel_arcmin = np.sqrt(hp.nside2pixarea(NSIDE, degrees=True)) * 60
    paths = []
    for nu, noise in zip(FREQS, NOISE):
        amp = -tau * T_CMB_UK * v / C_KM_S + T_CMB_UK * tsz_spectrum(nu) * y
        pix, val = paint_beam_sources(NSIDE, ra, dec, amp * area, BEAM)
        full = np.zeros(hp.nside2npix(NSIDE))
        np.add.at(full, pix, val)
        values = cmb + full[foot] + rng.normal(0, noise / pixel_arcmin, foot.size)
        paths.append(f"map_{nu:g}.fits")
        write_partial_map(folder / paths[-1], foot, values.astype(np.float32), nside=NSIDE)
    return f"""
[run]
name = "tiny"
truth_path = "truth.json"
[catalogue]
path = "clusters.fits"
proxy_column = "log_mass"
[aperture]
radius_arcmin = {RADIUS}
[theory]
bias = 3.0  # for `pairvel run`; the velocities do not use it (a test drops it)
[multifrequency]
map_paths = {json.dumps(paths)}
frequencies_ghz = {list(FREQS)}
[single_cluster]
electron_temperature_kev = {TE_KEV}
n_random = 4000
"""


def _velocities(*args):
    return main(["velocities", *map(str, args), "--quiet"])


@pytest.fixture(scope="module")
def measured(tmp_path_factory):
    """The invented sky, its config and one `pairvel velocities` run into ``out``: (folder, config text, stdout)."""
    folder = tmp_path_factory.mktemp("velocities")
    text = _sky(folder)
    (folder / "run.toml").write_text(text)
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        assert _velocities(folder / "run.toml", "--out", folder / "out") == 0
    return folder, text, printed.getvalue()


def test_velocities_recover_injected_velocities(measured):
    folder, _, printed = measured
    assert "caution: primary CMB" in printed and "truth check (unflagged)" in printed
    out = folder / "out"
    table = Table.read(out / "cluster_velocities.ecsv")
    fits = Table.read(out / "cluster_velocities.fits")
    np.testing.assert_array_equal(table["v_los_km_s"], fits["v_los_km_s"])
    assert list(table["row"]) == sorted(table["row"])
    assert (out / "velocity_vs_redshift.png").is_file() and (out / "velocity_vs_redshift.pdf").is_file()
    report = (out / "velocities.md").read_text()
    assert "Single-cluster velocities:" in report and "non-relativistic: relativistic corrections are off" in report

    clean = table[table["flags"] == 0]
    pulls = (clean["v_los_km_s"] - clean["v_true_km_s"]) / clean["v_los_err_km_s"]
    m = len(pulls)
    assert m > 250
    # unit variance and zero mean within 4 sampling errors (sqrt(2/(m-1)), 1/sqrt(m): analytic) plus 0.05 for
    # the channel covariance estimated from a few thousand random apertures
    assert abs(np.var(pulls, ddof=1) - 1) < 4 * np.sqrt(2 / (m - 1)) + 0.05
    assert abs(np.mean(pulls)) < 4 / np.sqrt(m)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["truth_check"]["pulls_unflagged"]["n"] == m
    # tau from y at the injected T_e: on a continuous sky the aperture keeps (1 - exp(-theta^2 / 2 sigma_b^2))^2
    # of a beam-shaped source (analytic, as in the mock's docstring), here 1.000; on 6.9 arcmin pixels against a
    # 10 arcmin disc the pixelised aperture keeps about 8% less (measured), of y and dT_kSZ alike, so v is unchanged
    sigma_b = BEAM / np.sqrt(8 * np.log(2))
    kept = (1 - np.exp(-RADIUS**2 / (2 * sigma_b**2))) ** 2
    np.testing.assert_allclose(np.median(clean["tau"] / clean["tau_true"]), kept, rtol=0.12)


def test_temperature_column_and_errors(measured, tmp_path, capsys):
    folder, text, _ = measured
    (folder / "col.toml").write_text(text.replace(f"electron_temperature_kev = {TE_KEV}",
                                                  'temperature_column = "te"\nelectron_temperature_kev = 1.0'))
    assert _velocities(folder / "col.toml", "--out", tmp_path / "a") == 0
    a = Table.read(tmp_path / "a" / "cluster_velocities.ecsv")
    b = Table.read(folder / "out" / "cluster_velocities.ecsv")
    # the column holds the same T_e as the key of the other run: the same numbers (internal consistency)
    np.testing.assert_allclose(a["v_los_km_s"], b["v_los_km_s"], rtol=1e-12)
    capsys.readouterr()

    (folder / "nomf.toml").write_text(text.split("[multifrequency]")[0] + '[map]\npath = "map_150.fits"\n')
    assert _velocities(folder / "nomf.toml", "--out", tmp_path / "c") == 2
    err = capsys.readouterr().err
    assert "multifrequency.map_paths must list the frequency maps" in err
    assert not (tmp_path / "c").exists()


def test_no_bias_needed(measured, tmp_path):
    """`pairvel velocities` fits no pairwise template, so a config without theory.bias is accepted there and
    gives the same numbers; the pairwise run still refuses it (internal consistency)."""
    from pairvel.core.errors import ConfigError
    from pairvel.input.config import load_config

    folder, text, _ = measured
    (folder / "nobias.toml").write_text(text.replace("[theory]\nbias = 3.0", "[theory]"))
    assert "bias" not in (folder / "nobias.toml").read_text().split("[theory]")[1].split("[")[0]
    with pytest.raises(ConfigError, match="theory.bias' is required"):
        load_config(folder / "nobias.toml")
    assert _velocities(folder / "nobias.toml", "--out", tmp_path / "nb") == 0
    a = Table.read(tmp_path / "nb" / "cluster_velocities.ecsv")
    b = Table.read(folder / "out" / "cluster_velocities.ecsv")
    np.testing.assert_allclose(a["v_los_km_s"], b["v_los_km_s"], rtol=1e-12)


@pytest.mark.validation
def test_mock_velocity_pulls_full_size(tmp_path, capsys):
    """A 2000-cluster mock at nside 2048 (about 2-3 minutes): pulls of the unflagged clusters."""
    mock = tmp_path / "mock"
    assert main(["mock", str(mock), "--n-tracers", "2000", "--tau-mean", "5e-3", "--extra-frequency", "90",
                 "--extra-frequency", "220", "--electron-temperature", "5", "--quiet"]) == 0
    assert _velocities(mock / "run.toml", "--out", tmp_path / "out") == 0
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    s = summary["truth_check"]["pulls_unflagged"]
    assert s["n"] > 1500
    # unit variance within 3.5 sampling errors (analytic) plus 0.03 for the estimated channel covariance
    assert abs(s["variance"] - 1) < 3.5 * s["variance_error"] + 0.03
    assert abs(s["mean"]) < 3.5 * s["mean_error"]
