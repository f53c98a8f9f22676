"""The synthetic survey generator: files, footprint, velocity field statistics, C_l table."""

import json
import math

import numpy as np
import pytest
from astropy.table import Table

from pairvel.core.errors import InputError, OutputError
from pairvel.maps.skymap import read_map
from pairvel.model.cmb import load_cmb_cl
from pairvel.model.cosmology import DEFAULT_COSMOLOGY
from pairvel.sims.mock import CATALOGUE_FILE, MAP_FILE, _cone_box, _patch_frame, make_mock_survey

SMALL = dict(n_tracers=4000, nside=256, ra_min=-10, ra_max=10, dec_min=-6, dec_max=6, z_min=0.15, z_max=0.4,
             cell_mpc=8.0, beam_fwhm_arcmin=10.0, aperture_radius_arcmin=15.0, include_cmb=False)
# a patch far from the equator (the grid is turned towards it), with the CMB, resolved beam and aperture
NORTH = dict(n_tracers=3000, nside=512, ra_min=140, ra_max=165, dec_min=35, dec_max=50, z_min=0.15, z_max=0.4,
             cell_mpc=10.0, beam_fwhm_arcmin=5.0, aperture_radius_arcmin=8.0, include_cmb=True)
TINY = dict(n_tracers=600, nside=64, ra_min=30, ra_max=45, dec_min=20, dec_max=30, z_min=0.1, z_max=0.3,
            cell_mpc=16.0, beam_fwhm_arcmin=40.0, aperture_radius_arcmin=60.0, include_cmb=False)


@pytest.fixture(scope="module")
def small_mock(tmp_path_factory):
    out = tmp_path_factory.mktemp("mock") / "survey"
    truth = make_mock_survey(out, seed=5, **SMALL)
    return out, truth


@pytest.fixture(scope="module")
def north_mock(tmp_path_factory):
    out = tmp_path_factory.mktemp("north") / "survey"
    truth = make_mock_survey(out, seed=8, **NORTH)
    return out, truth


def _no_nan(text):
    def refuse(name):
        raise ValueError(f"non-standard JSON constant {name}")
    return json.loads(text, parse_constant=refuse)


def test_files_and_footprint(small_mock):
    out, truth = small_mock
    cat = Table.read(out / CATALOGUE_FILE)
    assert set(cat.colnames) == {"ra", "dec", "z", "log_mass"}
    assert abs(len(cat) - 4000) < 5 * np.sqrt(4000) and len(cat) == truth.n_tracers  # Poisson count
    dra = (np.asarray(cat["ra"]) + 180) % 360 - 180  # the patch crosses RA = 0
    assert np.all((dra >= -10) & (dra < 10) & (cat["dec"] >= -6) & (cat["dec"] < 6))
    assert np.all((cat["z"] >= 0.15) & (cat["z"] < 0.4))
    assert np.all((cat["log_mass"] >= 14.0) & (cat["log_mass"] <= 15.0))
    sm = read_map(out / MAP_FILE)
    assert sm.nside == 256 and sm.pixels is not None and sm.values.dtype == np.float32
    record = _no_nan((out / "truth.json").read_text())  # strict JSON: no NaN constants
    assert record["tau_mean"] == truth.tau_mean and record["scenario"]["survey"] == "Larkspur Cluster Survey"
    assert record["seed"] == 5 and record["options"]["n_tracers"] == 4000


def test_catalogue_redshifts_give_back_the_true_positions(small_mock, north_mock):
    # cosmological redshifts only, same cosmology: recomputed positions are the true ones (analytic),
    # up to the z(d) interpolation (~1e-9 relative) and float64 rounding
    for _, truth in (small_mock, north_mock):
        assert truth.position_roundtrip_mpc < 1e-3


def test_realised_pairwise_velocity_follows_linear_theory(small_mock):
    _, truth = small_mock
    v3d = np.asarray(truth.v12_3d_realised_km_s)
    lin = np.asarray(truth.v12_linear_km_s)
    assert np.all(v3d[1:4] < 0)  # infall at 20-80 Mpc
    # one small volume: sample variance and the 8 Mpc grid allow a loose factor (internal regression)
    ratio = v3d[1:4] / lin[1:4]
    assert np.all((ratio > 0.5) & (ratio < 1.5)), ratio


def test_patch_frame_turns_the_grid_towards_the_footprint():
    # centred on RA = 0, Dec = 0 the frame is exactly the identity (analytic), so such mocks do not
    # depend on the rotation at all
    assert np.array_equal(_patch_frame(-20, 20, -10, 10), np.eye(3))
    frame = _patch_frame(140, 165, 35, 50)
    np.testing.assert_allclose(frame @ frame.T, np.eye(3), atol=1e-15)  # orthonormal (analytic)
    np.testing.assert_allclose(np.linalg.det(frame), 1.0, rtol=1e-14)  # a rotation, not a reflection
    ra_c, dec_c = np.radians(152.5), np.radians(42.5)
    centre = [np.cos(dec_c) * np.cos(ra_c), np.cos(dec_c) * np.sin(ra_c), np.sin(dec_c)]
    np.testing.assert_allclose(frame[0], centre, atol=1e-15)
    d_min, d_max = DEFAULT_COSMOLOGY.comoving_distance_mpc([0.15, 0.4])
    vol = [np.prod(np.subtract(*_cone_box(140, 165, 35, 50, d_min, d_max, 10.0, f)[::-1]))
           for f in (None, frame)]
    # internal regression: the turned box is about half the equatorial-axes box for this patch
    assert vol[1] < 0.6 * vol[0], vol


def test_turned_grid_mock_stays_in_its_footprint(north_mock):
    out, truth = north_mock
    cat = Table.read(out / CATALOGUE_FILE)
    assert abs(len(cat) - 3000) < 5 * np.sqrt(3000)  # Poisson count
    assert np.all((cat["ra"] >= 140) & (cat["ra"] < 165) & (cat["dec"] >= 35) & (cat["dec"] < 50))
    assert np.all((cat["z"] >= 0.15) & (cat["z"] < 0.4))
    v3d = np.asarray(truth.v12_3d_realised_km_s)
    lin = np.asarray(truth.v12_linear_km_s)
    assert np.all(v3d[:3] < 0)  # infall below 60 Mpc, as in linear theory
    ratio = v3d[1:3] / lin[1:3]
    assert np.all((ratio > 0.4) & (ratio < 1.6)), ratio  # 3000 tracers: loose (internal regression)


def test_rotating_the_patch_rotates_the_survey(tmp_path):
    # the same seed on a patch turned by 100 degrees about the pole gives the same survey turned with
    # it: the same redshifts, RAs shifted by 100 degrees, and the same rotation-invariant pairwise
    # velocities, which holds only if velocities are turned with the positions (analytic)
    opts = dict(TINY, dec_min=-6, dec_max=6, nside=64)
    a = make_mock_survey(tmp_path / "a", seed=3, **dict(opts, ra_min=-10, ra_max=10))
    b = make_mock_survey(tmp_path / "b", seed=3, **dict(opts, ra_min=90, ra_max=110))
    ca, cb = Table.read(tmp_path / "a" / CATALOGUE_FILE), Table.read(tmp_path / "b" / CATALOGUE_FILE)
    assert len(ca) == len(cb) > 300
    np.testing.assert_allclose((np.asarray(cb["ra"]) - np.asarray(ca["ra"])) % 360, 100.0, atol=1e-9)
    np.testing.assert_allclose(cb["dec"], ca["dec"], atol=1e-9)
    np.testing.assert_allclose(cb["z"], ca["z"], rtol=1e-12)
    np.testing.assert_allclose(a.v12_los_realised_km_s, b.v12_los_realised_km_s, rtol=1e-8)
    np.testing.assert_allclose(a.v12_3d_realised_km_s, b.v12_3d_realised_km_s, rtol=1e-8)


def test_aperture_response_is_the_beam_fraction(north_mock):
    # a Gaussian source of width sigma in a compensated aperture of radius theta returns
    # (1 - exp(-theta^2 / 2 sigma^2))^2 of its dT (analytic: disc minus equal-area annulus);
    # 5' beam, 8' aperture -> 0.998.  Pixel-centre sampling at nside 512 (6.9' pixels) moves the
    # measured slope by a few per cent (internal regression: 0.999-1.033 over four seeds)
    _, truth = north_mock
    sigma = 5.0 / math.sqrt(8 * math.log(2))
    expected = (1 - math.exp(-8.0**2 / (2 * sigma**2))) ** 2
    np.testing.assert_allclose(truth.aperture_response, expected, rtol=0.05)


def test_map_holds_the_footprint_and_the_cmb(north_mock):
    import healpy as hp

    out, _ = north_mock
    sm = read_map(out / MAP_FILE)
    ra, dec = hp.pix2ang(512, sm.pixels, lonlat=True)
    assert ra.min() > 140 - 3 and ra.max() < 165 + 3 and dec.min() > 35 - 1.2 and dec.max() < 50 + 1.2
    # footprint plus a 1-degree margin is fully covered: a pixel at each corner of the patch is held
    corners = hp.ang2pix(512, [140.0, 165.0, 140.0, 165.0], [35.0, 35.0, 50.0, 50.0], lonlat=True)
    assert np.all(np.isin(corners, sm.pixels))
    # the beam-smoothed primary CMB dominates the pixel rms: sqrt(sum_l (2l+1) C_l B_l^2 / 4 pi) = 108 uK
    # (computed with numpy and healpy.gauss_beam from the shipped table); one 400 deg^2 patch holds few
    # degree-scale modes, so 25% (internal regression: 97-109 uK over four seeds)
    ell, cl = load_cmb_cl()
    b_l = hp.gauss_beam(math.radians(5.0 / 60.0), lmax=3 * 512 - 1)
    expected = math.sqrt(np.sum((2 * ell[:1536] + 1) * cl[:1536] * b_l**2) / (4 * math.pi))
    np.testing.assert_allclose(np.std(sm.values), expected, rtol=0.25)


@pytest.mark.parametrize("bad, message", [
    (dict(z_min=0.5, z_max=0.3), "mock option 'z_max' must be in \\(z_min = 0.5, 3\\]; got 0.3"),
    (dict(dec_min=10, dec_max=5), "mock option 'dec_max' must be in"),
    (dict(ra_min=10, ra_max=400), "mock option 'ra_max' must be greater than ra_min = 10"),
    (dict(nside=300), "mock option 'nside' must be a power of 2"),
    (dict(n_tracers=1.5e3), "mock option 'n_tracers' must be an integer >= 2; got 1500.0"),
    (dict(cell_mpc=0.0), "mock option 'cell_mpc' must be > 0; got 0.0"),
    (dict(tau_mean=float("nan")), "mock option 'tau_mean' must be a finite number; got nan"),
    (dict(cell_mpc=0.5), "mock grid must have at most 50,000,000 cells"),
])
def test_bad_options_are_refused(tmp_path, bad, message):
    with pytest.raises(InputError, match=message):
        make_mock_survey(tmp_path / "m", **{**TINY, **bad})
    assert not (tmp_path / "m").exists()


def test_same_seed_same_survey_and_none_is_recorded(tmp_path):
    a = make_mock_survey(tmp_path / "a", seed=7, **TINY)
    b = make_mock_survey(tmp_path / "b", seed=7, **TINY)
    ta, tb = Table.read(tmp_path / "a" / CATALOGUE_FILE), Table.read(tmp_path / "b" / CATALOGUE_FILE)
    for col in ta.colnames:
        np.testing.assert_array_equal(ta[col], tb[col])  # bitwise reproducible (internal regression)
    np.testing.assert_array_equal(read_map(tmp_path / "a" / MAP_FILE).values,
                                  read_map(tmp_path / "b" / MAP_FILE).values)
    assert a.v12_los_realised_km_s == b.v12_los_realised_km_s
    c = make_mock_survey(tmp_path / "c", seed=None, **TINY)
    assert isinstance(c.seed, int) and _no_nan((tmp_path / "c" / "truth.json").read_text())["seed"] == c.seed
    d = make_mock_survey(tmp_path / "d", seed=c.seed, **TINY)  # the recorded seed reproduces it
    np.testing.assert_array_equal(Table.read(tmp_path / "c" / CATALOGUE_FILE)["z"],
                                  Table.read(tmp_path / "d" / CATALOGUE_FILE)["z"])
    assert d.v12_3d_realised_km_s == c.v12_3d_realised_km_s


def test_random_draws_keep_their_order(tmp_path):
    """Internal regression: values written by make_mock_survey before it was split into stages (commit
    f063bce).  Any change to the order of the draws (field, Poisson counts, positions, masses, CMB a_lm,
    150 GHz noise, extra-frequency noise) changes them; update them only with a deliberate change of the
    mock's randomness."""
    from pairvel.sims.mock import extra_map_file

    truth = make_mock_survey(tmp_path / "m", seed=11, **dict(TINY, include_cmb=True, extra_frequencies_ghz=(90,)))
    cat = Table.read(tmp_path / "m" / CATALOGUE_FILE)
    assert truth.n_tracers == len(cat) == 619
    np.testing.assert_allclose([cat["ra"][0], cat["z"][0], cat["log_mass"][0], cat["log_mass"][-1]],
                               [42.06746975102437, 0.1005206292673904, 14.050565626940577, 14.14121278759036],
                               rtol=1e-9)
    # first and last footprint pixel of each map (float32): the CMB plus that map's own noise draw
    for name, expected in ((MAP_FILE, [-93.65811920166016, 75.28042602539062]),
                           (extra_map_file(90), [-93.59326934814453, 75.01764678955078])):
        values = read_map(tmp_path / "m" / name).values
        np.testing.assert_allclose([values[0], values[-1]], expected, rtol=1e-6)


def test_velocity_rms_matches_linear_theory():
    """sigma_v^2 (1D) = (a H f D)^2 / (6 pi^2) int P(k) dk over the grid's k-range (analytic)."""
    from pairvel.model.cosmology import DEFAULT_COSMOLOGY as cosmo
    from pairvel.model.theory import linear_power
    from pairvel.sims._fields import _gaussian_fields

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


def test_cl_table_layout():
    ell, cl = load_cmb_cl()
    np.testing.assert_array_equal(ell, np.arange(8001))  # ell = 0..8000 (the table's stated range)
    assert cl[0] == 0.0 and cl[1] == 0.0 and np.all(cl[2:] > 0)  # no monopole or dipole (analytic)


def test_refuses_non_empty_folder(tmp_path):
    (tmp_path / "x.txt").write_text("keep me")
    with pytest.raises(OutputError, match="exists and is not empty"):
        make_mock_survey(tmp_path, **SMALL)
    assert (tmp_path / "x.txt").read_text() == "keep me"


def _direct_fields(points, lo, shape, cell, seed):
    """Slow reference: the Fourier series of the mock's fields summed mode by mode at each point."""
    from pairvel.sims._fields import _power_at

    k1 = [2 * np.pi * np.fft.fftfreq(n, d=cell) for n in shape]
    kk = np.stack(np.meshgrid(*k1, indexing="ij"), axis=-1).reshape(-1, 3)
    k2 = np.einsum("ij,ij->i", kk, kk)
    dk = np.fft.fftn(np.random.default_rng(seed).standard_normal(shape)).reshape(-1)
    amp = np.zeros_like(k2)
    amp[k2 > 0] = np.sqrt(_power_at(np.sqrt(k2[k2 > 0]), DEFAULT_COSMOLOGY) / cell**3)
    dk = dk * amp
    phase = np.exp(1j * (np.asarray(points) - lo) @ kk.T)  # (N, modes)
    n_cells = np.prod(shape)
    delta = (phase @ dk).real / n_cells
    with np.errstate(divide="ignore", invalid="ignore"):
        grad = np.where(k2[:, None] > 0, 1j * kk / k2[:, None], 0.0)
    u = (phase @ (dk[:, None] * grad)).real / n_cells
    return delta, u


def test_fields_at_points_match_a_direct_fourier_sum():
    """The non-uniform FFT evaluation equals the mode-by-mode Fourier sum off the grid (odd grid: no
    Nyquist planes), to the requested NUFFT accuracy."""
    from pairvel.sims._fields import _gaussian_fields_at

    shape, cell, lo = (7, 9, 5), 8.0, np.array([10.0, -30.0, 400.0])
    pts = lo + np.random.default_rng(3).uniform(0, 1, (50, 3)) * np.array(shape) * cell
    delta, u = _gaussian_fields_at(pts, lo, shape, cell, DEFAULT_COSMOLOGY, np.random.default_rng(11))
    d_ref, u_ref = _direct_fields(pts, lo, shape, cell, 11)
    assert np.max(np.abs(delta - d_ref)) < 1e-5 * np.std(d_ref)
    assert np.max(np.abs(u - u_ref)) < 1e-5 * np.std(u_ref)


def test_fields_at_grid_nodes_equal_the_grid_fields():
    """At the grid nodes, the point evaluation reproduces the FFT grid of _gaussian_fields (same draw)."""
    from pairvel.sims._fields import _gaussian_fields, _gaussian_fields_at

    shape, cell, lo = (9, 7, 11), 6.0, np.zeros(3)
    idx = np.stack(np.meshgrid(*[np.arange(n) for n in shape], indexing="ij"), axis=-1).reshape(-1, 3)
    delta, u = _gaussian_fields_at(idx * cell, lo, shape, cell, DEFAULT_COSMOLOGY, np.random.default_rng(5))
    d_grid, u_grid = _gaussian_fields(shape, cell, DEFAULT_COSMOLOGY, np.random.default_rng(5))
    np.testing.assert_allclose(delta, d_grid.reshape(-1), atol=1e-5 * float(np.std(d_grid)))
    for i in range(3):
        np.testing.assert_allclose(u[:, i], u_grid[i].reshape(-1), atol=1e-5 * float(np.std(u_grid[i])))


# --- the ready-to-run config written beside the survey (run.toml)

def test_run_config_states_the_mock_assumptions(small_mock):
    from pairvel.input.config import load_config

    out, truth = small_mock
    text = (out / "run.toml").read_text()
    assert text.startswith("# Ready-to-run config written by pairvel") and "(`pairvel mock`)" in text
    cfg = load_config(out / "run.toml")
    assert cfg.catalogue.path == out / CATALOGUE_FILE and cfg.map.path == out / MAP_FILE  # relative to run.toml
    assert cfg.run.truth_path == out / "truth.json" and cfg.run.name == "survey-run"
    assert cfg.theory.bias == truth.bias == 0.4 and cfg.cosmology == DEFAULT_COSMOLOGY
    assert cfg.aperture.radius_arcmin == SMALL["aperture_radius_arcmin"]
    assert cfg.aperture.beam_fwhm_arcmin == SMALL["beam_fwhm_arcmin"]
    assert (cfg.catalogue.z_min, cfg.catalogue.z_max) == (SMALL["z_min"], SMALL["z_max"])
    assert cfg.catalogue.proxy_column == "log_mass" and cfg.trend.enabled and cfg.trend.sigma_z == 0.01
    np.testing.assert_array_equal(cfg.bins.edges(), truth.edges_mpc)  # the bins of the realised velocity
    assert "[multifrequency]" not in text  # one map only


def test_run_config_of_a_mock_runs_and_checks_its_truth(small_mock, tmp_path, capsys):
    import re

    from pairvel.cli import main

    out, truth = small_mock
    # the generated config with absolute paths and fewer regions and null sets, to keep the test short
    text = re.sub(r'^(\w*path) = "', rf'\1 = "{out}/', (out / "run.toml").read_text(), flags=re.M)
    fast = tmp_path / "fast.toml"
    fast.write_text(text + "\n[covariance]\nn_regions = 30\n\n[nulls]\nn_random = 2\nn_shuffle = 2\n"
                           "n_shuffle_z = 2\nrotation_deg = []\n")
    assert main(["run", str(fast), "--out", str(tmp_path / "r"), "--quiet"]) == 0
    printed = capsys.readouterr().out
    check = json.loads((tmp_path / "r" / "summary.json").read_text())["truth_check"]
    assert check["tau_mean_injected"] == truth.tau_mean and check["verdict"] in printed
    # the truth's bins are the run's, so the fit against the mock's realised velocity is made too
    assert np.isfinite(check["tau_mean_vs_realised_velocity"])
    assert "against this mock's own realised pairwise velocity" in (tmp_path / "r" / "report.md").read_text()


def test_mock_command_says_how_to_run_it(tmp_path, capsys, monkeypatch):
    import pairvel.sims.mock as mock
    from pairvel.cli import main
    from pairvel.input.config import load_config

    made = mock.make_mock_survey
    monkeypatch.setattr(mock, "make_mock_survey", lambda out, **kw: made(out, **{**kw, **TINY}))
    assert main(["mock", str(tmp_path / "m"), "--seed", "4", "--extra-frequency", "90", "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert f"  run it with: pairvel run {tmp_path / 'm' / 'run.toml'}\n" in printed
    text = (tmp_path / "m" / "run.toml").read_text()
    cfg = load_config(tmp_path / "m" / "run.toml")
    assert cfg.map.path == tmp_path / "m" / MAP_FILE and cfg.run.seed == 4
    # the commented [multifrequency] block is a valid config once uncommented (and [map] path removed)
    block = text[text.index("# [multifrequency]"):].replace("# ", "")
    combined = tmp_path / "m" / "combined.toml"
    combined.write_text(text.replace(f'path = "{MAP_FILE}"\n', "", 1) + "\n" + block)
    mf = load_config(combined).multifrequency
    assert mf.map_paths == (tmp_path / "m" / MAP_FILE, tmp_path / "m" / "skerry_90ghz_partial.fits")
    assert mf.frequencies_ghz == (150.0, 90.0) and mf.beam_fwhm_arcmin == (TINY["beam_fwhm_arcmin"],) * 2
    assert all(path.is_file() for path in mf.map_paths)
