"""tracers.fits: one row per catalogue row read, with why a row was not used, and runs started
from it (``restart.table_path``) giving the numbers of the full run (invented tiny survey)."""

import contextlib
import hashlib
import io
import json

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from astropy.table import Table
from conftest import RESTART_CONFIG, make_tiny_survey, write_healpix
from test_row_order import assert_same_numbers

from pairvel.cli import main
from pairvel.maps.photometry import measure_apertures
from pairvel.maps.skymap import read_map, read_mask
from pairvel.maps.trend import remove_redshift_trend
from pairvel.report.tracers import read_tracer_table

MASK_CENTRE = (30.0, 0.0)  # ra, dec of the masked patch, degrees
MASK_RADIUS_DEG = 1.5

# what the full runs add to the tiny config: a mask, an invalid row dropped, repeats dropped, a z cut
FULL_SETTINGS = {"catalogue": 'drop_invalid_rows = true\nduplicate_rows = "drop"\nz_min = 0.105',
                 "map": 'mask_path = "mask.fits"'}
RESTART = RESTART_CONFIG.replace('proxy_column = "log_mass"\n', 'proxy_column = "log_mass"\nz_min = 0.105\n')


# settings changed from the first run, given to a full run and to a run from the first run's table
CHANGED = {"bins": "edges_mpc = [0.0, 20.0, 45.0, 70.0, 95.0, 120.0]", "theory": "fit_r_min_mpc = 25.0",
           "covariance": 'estimator = "bootstrap"\nn_bootstrap = 100', "nulls": "n_shuffle = 3",
           "catalogue": "z_max = 0.19"}

# keys of summary.json that name inputs, the time, the config or the map-only null tests, not results
NOT_COMPARED = {"run_name", "config", "provenance", "run_warnings", "null_tests", "null_rotations_used", "blinding",
                "empirical_significance"}  # a restart has no random-position null (no map), so fewer null amplitudes


def with_settings(text: str, settings: dict) -> str:
    """The config ``text`` with each ``section: lines`` added to (or after) its section."""
    for section, lines in settings.items():
        header = f"[{section}]\n"
        text = text.replace(header, header + lines + "\n", 1) if header in text else f"{text}\n{header}{lines}\n"
    return text


def run(folder, name: str, text: str, *extra) -> tuple:
    """``pairvel run`` of config ``text`` into ``folder/name``; returns (output folder, stderr)."""
    cfg = folder / f"{name}.toml"
    cfg.write_text(text)
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = main(["run", str(cfg), "--out", str(folder / name), "--quiet", *extra])
    assert code == 0, err.getvalue()
    return folder / name, err.getvalue()


def summary(out) -> dict:
    return json.loads((out / "summary.json").read_text())


def assert_same_results(full, restarted):
    """summary.json numbers (but inputs and map-only nulls), the curve, the shuffle nulls and the
    covariance equal to 1e-12 relative (internal regression: the same numbers from the same temperatures)."""
    a, b = summary(full), summary(restarted)
    assert_same_numbers({k: v for k, v in a.items() if k not in NOT_COMPARED},
                        {k: v for k, v in b.items() if k not in NOT_COMPARED})
    shuffles = [n for n in a["null_tests"] if n["kind"].startswith("shuffled")]
    assert shuffles and [n["kind"] for n in b["null_tests"]] == [n["kind"] for n in shuffles]
    assert_same_numbers(shuffles, b["null_tests"])
    for name in ["pairwise.ecsv"] + [f"null_{n['kind']}.ecsv" for n in shuffles]:
        ta, tb = Table.read(full / name), Table.read(restarted / name)
        assert ta.colnames == tb.colnames
        for col in ta.colnames:
            np.testing.assert_allclose(np.asarray(tb[col], float), np.asarray(ta[col], float), rtol=1e-12, atol=0,
                                       err_msg=f"{name}:{col}")
    with fits.open(full / "covariance.fits") as ha, fits.open(restarted / "covariance.fits") as hb:
        for hdu_a, hdu_b in zip(ha, hb, strict=True):
            np.testing.assert_allclose(hdu_b.data, hdu_a.data, rtol=1e-12, atol=0)


def tracers(out) -> Table:
    return read_tracer_table(out / "tracers.fits").table


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    """The tiny survey with four more rows (two off the map, a repeat, a NaN redshift), a masked patch,
    and one full run of it (``first``)."""
    folder = tmp_path_factory.mktemp("survey")
    make_tiny_survey(folder)
    frame = pd.read_csv(folder / "cat.csv")
    k = int(np.flatnonzero(frame.z > 0.12)[0])  # repeated whole as row 602, after the z cut
    more = pd.DataFrame({"ra": [100.0, 101.0, frame.ra[k], 35.0], "dec": [0.0, 1.0, frame.dec[k], 2.0],
                         "z": [0.15, 0.16, frame.z[k], np.nan], "log_mass": [14.5, 14.5, frame.log_mass[k], 14.5]})
    pd.concat([frame, more], ignore_index=True).to_csv(folder / "cat.csv", index=False)
    nside = 256
    mask = np.ones(hp.nside2npix(nside), np.float32)
    mask[hp.query_disc(nside, hp.ang2vec(*MASK_CENTRE, lonlat=True), np.radians(MASK_RADIUS_DEG))] = 0.0
    write_healpix(folder / "mask.fits", mask, nside=nside, unit=None)
    text = with_settings((folder / "run.toml").read_text(), FULL_SETTINGS)
    first, _ = run(folder, "first", text)
    return folder, text, first


def test_every_row_read_is_in_the_table_with_why_it_was_not_used(survey):
    folder, _, first = survey
    t, s = tracers(first), summary(first)
    n_read = 604
    assert len(t) == n_read and sorted(t["row"]) == list(range(n_read))
    reason = dict(zip(t["row"], t["drop_reason"]))
    assert [reason[600], reason[601], reason[602], reason[603]] == ["outside the map", "outside the map",
                                                                     "duplicate", "invalid z"]
    frame = pd.read_csv(folder / "cat.csv")
    low_z = np.flatnonzero(frame.z < 0.105)
    assert low_z.size > 0 and {reason[r] for r in low_z} == {"outside z range"}
    # tracers on the masked patch (disc radius 1.5 deg, apertures 12 arcmin): every one is "masked"
    centre = hp.ang2vec(*MASK_CENTRE, lonlat=True)
    on_patch = np.flatnonzero(hp.ang2vec(frame.ra[:600], frame.dec[:600], lonlat=True) @ centre
                              > np.cos(np.radians(MASK_RADIUS_DEG - 0.3)))
    assert on_patch.size > 0 and {reason[r] for r in on_patch} - {"outside z range"} == {"masked"}
    assert "too few pixels in the aperture" in reason.values()  # 12 arcmin apertures on 13.7 arcmin pixels

    used = np.asarray(t["used"])
    assert np.array_equal(used, np.asarray(t["drop_reason"]) == "") and used.sum() == s["n_tracers"]
    assert np.all((np.asarray(t["region"]) >= 0) == used) and np.asarray(t["region"]).max() == 11
    assert np.all(np.isfinite(t["t_uK"]) == used) and np.all(np.isfinite(t["t_raw_uK"]) == used)
    sel = s["selection"]
    counts = pd.Series(np.asarray(t["drop_reason"])).value_counts().to_dict()
    assert sel["aperture_masked_dropped"] == sum(sel["aperture_dropped_by_reason"].values())
    for name, n in sel["aperture_dropped_by_reason"].items():
        assert counts.get(name, 0) == n, name
    assert (sel["outside_z_range"], sel["duplicates_dropped"], sel["invalid_dropped"]) == (
        counts["outside z range"], 1, 1)
    assert np.all(np.diff(np.asarray(t["ra_deg"])[used]) >= 0)  # canonical order: by ra first


def test_table_temperatures_are_what_the_estimator_used(survey):
    """Aperture photometry redone on the used rows, and the trend removed again (internal regression)."""
    folder, _, first = survey
    t = tracers(first)
    u = t[np.asarray(t["used"])]
    skymap = read_map(folder / "map.fits").with_mask(read_mask(folder / "mask.fits"))
    direct = measure_apertures(skymap, np.asarray(u["ra_deg"]), np.asarray(u["dec_deg"]), 12.0).temperatures[0]
    np.testing.assert_allclose(u["t_raw_uK"], direct, rtol=1e-12, atol=0)
    np.testing.assert_allclose(u["t_uK"], remove_redshift_trend(direct, np.asarray(u["z"]), sigma_z=0.01),
                               rtol=1e-12, atol=1e-12)


def test_header_names_radius_map_and_blinding(survey):
    folder, _, first = survey
    with fits.open(first / "tracers.fits") as hdul:
        h = hdul["TRACERS"].header
        units = {h[f"TTYPE{k}"]: h.get(f"TUNIT{k}") for k in range(1, h["TFIELDS"] + 1)}
    assert h["PRIMRAD"] == 12.0 and h["BLINDED"] is False and h["PIXWT"] == "centre"
    assert h["MAPSHA"] == hashlib.sha256((folder / "map.fits").read_bytes()).hexdigest()
    assert h["MASKSHA"] == hashlib.sha256((folder / "mask.fits").read_bytes()).hexdigest()
    assert units["ra_deg"] == units["dec_deg"] == "deg" and units["t_raw_uK"] == units["t_uK"] == "uK"
    assert "tracers.fits" in (first / "report.md").read_text()


def test_restart_gives_the_numbers_of_the_full_run(survey):
    folder, _, first = survey
    again, _ = run(folder, "again", RESTART.format(table=first / "tracers.fits"))
    skipped = [w["text"] for w in summary(again)["run_warnings"] if "needs the sky map" in w["text"]]
    assert [text.split(":")[0] for text in skipped] == ["nulls.n_random"]  # rotation is opt-in (off by default)
    assert_same_results(first, again)
    assert summary(again)["provenance"]["tracer_table"]["path"] == str(first / "tracers.fits")
    t0, t1 = tracers(first), tracers(again)
    assert t0.colnames == t1.colnames
    for col in t0.colnames:
        assert np.array_equal(t0[col], t1[col], equal_nan=t0[col].dtype.kind == "f"), col


def test_restart_with_other_bins_fit_range_covariance_and_cuts(survey):
    """A full run with changed settings against a run with them from the first run's table."""
    folder, text, first = survey
    full, _ = run(folder, "changed_full", with_settings(text, CHANGED))
    again, _ = run(folder, "changed_again", with_settings(RESTART.format(table=first / "tracers.fits"), CHANGED))
    s = summary(again)
    assert s["covariance"]["method"].startswith("bootstrap") and s["fit"]["n_bins"] == 4
    assert s["selection"]["outside_z_range"] > summary(first)["selection"]["outside_z_range"]
    assert_same_results(full, again)


def test_blinded_table_restarts_blinded_and_unblinds(survey, tmp_path):
    folder, text, first = survey
    key = tmp_path / "key.json"
    blinded, _ = run(folder, "blinded", with_settings(text, {"blinding": f'enabled = true\nkey_path = "{key}"'}))
    key_id, factor = json.loads(key.read_text())["key_id"], json.loads(key.read_text())["factor"]
    with fits.open(blinded / "tracers.fits") as hdul:
        assert hdul["TRACERS"].header["BLINDED"] is True and hdul["TRACERS"].header["BLINDKEY"] == key_id
    tb, t0 = tracers(blinded), tracers(first)
    for col in ("t_raw_uK", "t_uK"):  # same seed and settings: the true temperatures times the factor
        np.testing.assert_allclose(tb[col], factor * np.asarray(t0[col]), rtol=1e-12, atol=0)
    np.testing.assert_array_equal(tb["z"], t0["z"])

    again, _ = run(folder, "blinded_again", RESTART.format(table=blinded / "tracers.fits"))
    s = summary(again)
    assert s["blinded"] is True and s["blinding"]["key_id"] == key_id
    np.testing.assert_allclose(s["tau_mean"], summary(blinded)["tau_mean"], rtol=1e-12)
    assert tracers(again).meta["BLINDED"] is True

    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["unblind", str(blinded), "--key", str(key), "--out", str(folder / "unblinded"), "--quiet"]) == 0
    tu = tracers(folder / "unblinded")
    assert tu.meta["BLINDED"] is False
    for col in ("t_raw_uK", "t_uK"):  # divided by the same factor: back to within one rounding
        np.testing.assert_allclose(tu[col], t0[col], rtol=1e-12, atol=1e-12)
    back, _ = run(folder, "unblinded_again", RESTART.format(table=folder / "unblinded" / "tracers.fits"))
    assert summary(back)["blinded"] is False
    np.testing.assert_allclose(summary(back)["tau_mean"], summary(first)["tau_mean"], rtol=1e-12)
