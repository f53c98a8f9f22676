"""Blinding: a blinded run hides the scale, keeps every chi2, and its key restores the unblinded numbers."""

import hashlib
import json

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from pairvel.cli import main


def _digest(folder):
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir()) if p.is_file()}


def _numbers(folder):
    s = json.loads((folder / "summary.json").read_text())
    t = Table.read(folder / "pairwise.ecsv", format="ascii.ecsv")
    with fits.open(folder / "covariance.fits") as h:
        cov, jk = np.array(h[0].data), np.array(h["JACKKNIFE_SAMPLES"].data)
    nulls = {k: np.array(Table.read(folder / f"null_{k}.ecsv", format="ascii.ecsv")["p_mean_uK"])
             for k in ("random_positions", "shuffled", "shuffled_in_z")}
    return s, t, cov, jk, nulls


@pytest.mark.filterwarnings("ignore")
def test_blinded_run_unblinds_to_the_unblinded_run(tiny_survey, capsys):
    """Internal regression: same config and seed with and without blinding; `pairvel unblind` on the
    blinded folder must give the unblinded numbers (to one rounding: x*f/f), never touching the input."""
    plain = tiny_survey / "plain"
    assert main(["run", str(tiny_survey / "run.toml"), "--out", str(plain), "--quiet"]) == 0
    (tiny_survey / "blind.toml").write_text((tiny_survey / "run.toml").read_text() + "\n[blinding]\nenabled = true\n")
    blinded = tiny_survey / "blinded"
    assert main(["run", str(tiny_survey / "blind.toml"), "--out", str(blinded), "--quiet"]) == 0
    assert "BLINDED" in capsys.readouterr().out
    key = tiny_survey / "blinded.blinding-key.json"
    assert key.is_file() and not list(blinded.glob("*key*"))            # the key is not in the output folder

    s0, t0, c0, jk0, n0 = _numbers(plain)
    s1, t1, c1, jk1, n1 = _numbers(blinded)
    factor = json.loads(key.read_text())["factor"]
    assert s0["blinded"] is False and s1["blinded"] is True and s1["blinding"]["key_id"]
    assert "BLINDED" in (blinded / "report.md").read_text() and "not blinded" in (plain / "report.md").read_text()
    assert "BLINDED: the curve" in (blinded / "report.html").read_text() and "BLINDED" not in (plain / "report.html").read_text()
    assert "BLINDED" in t1.meta["blinding"] and fits.getheader(blinded / "covariance.fits")["BLINDED"]
    assert not np.isclose(s1["tau_mean"], s0["tau_mean"], rtol=1e-6)
    np.testing.assert_allclose(s1["tau_mean"], factor * s0["tau_mean"], rtol=1e-12)
    for k in ("chi2_null", "chi2_min", "snr"):                           # scale-free numbers are unchanged
        np.testing.assert_allclose(s1[k], s0[k], rtol=1e-10)

    before = _digest(blinded)
    out = tiny_survey / "unblinded"
    assert main(["unblind", str(blinded), "--key", str(key), "--out", str(out)]) == 0
    assert _digest(blinded) == before                                    # input folder not modified
    s2, t2, c2, jk2, n2 = _numbers(out)
    assert s2["blinded"] is False and "not blinded" in (out / "report.md").read_text()
    assert "Not blinded." in (out / "report.html").read_text()                # unblind rewrites the HTML report too
    for k in ("tau_mean", "tau_mean_error", "snr", "chi2_null", "pte_null"):
        np.testing.assert_allclose(s2[k], s0[k], rtol=1e-15, atol=0)
    for col in ("p_uK", "p_err_uK", "model_uK"):
        np.testing.assert_allclose(t2[col], t0[col], rtol=1e-15, atol=0)
    np.testing.assert_allclose(c2, c0, rtol=1e-15, atol=0)
    np.testing.assert_allclose(jk2, jk0, rtol=1e-15, atol=0)
    for k in n0:   # the written mean curve is re-averaged from scaled realisations: rounding of the sum
        np.testing.assert_allclose(n2[k], n0[k], rtol=0, atol=1e-14 * np.abs(n0[k]).max())
    assert s2["null_tests"] == s0["null_tests"]


@pytest.mark.filterwarnings("ignore")
def test_unblind_refuses_wrong_key_and_unblinded_folder(tiny_survey, tmp_path):
    from pairvel.core.errors import InputError, OutputError
    from pairvel.report.blinding import unblind_folder, write_key

    assert main(["run", str(tiny_survey / "run.toml"), "--out", str(tmp_path / "plain"), "--quiet"]) == 0
    key = tmp_path / "k.json"
    write_key(key, run_name="x")
    with pytest.raises(InputError, match="is not blinded"):
        unblind_folder(tmp_path / "plain", key, tmp_path / "o")
    with pytest.raises(OutputError, match="already exists"):
        write_key(key, run_name="x")
    (tmp_path / "bad.json").write_text('{"factor": 2}')
    with pytest.raises(InputError, match="not a pairvel blinding key"):
        unblind_folder(tmp_path / "plain", tmp_path / "bad.json", tmp_path / "o")


@pytest.mark.filterwarnings("ignore")
def test_blinded_run_log_keeps_the_factor_hidden_and_unblind_writes_its_own(tiny_survey):
    (tiny_survey / "blind.toml").write_text((tiny_survey / "run.toml").read_text() + "\n[blinding]\nenabled = true\n")
    blinded = tiny_survey / "blinded"
    assert main(["run", str(tiny_survey / "blind.toml"), "--out", str(blinded), "--quiet"]) == 0
    key = tiny_survey / "blinded.blinding-key.json"
    log = (blinded / "run.log").read_text()
    assert "outputs blinded; key kept in" in log
    factor = json.loads(key.read_text())["factor"]
    assert f"{factor:.6f}" not in log and f"{factor:.4e}" not in log     # the log does not reveal the factor
    out = tiny_survey / "unblinded"
    assert main(["unblind", str(blinded), "--key", str(key), "--out", str(out), "--quiet"]) == 0
    unblind_log = (out / "run.log").read_text()
    assert ": pairvel unblind " in unblind_log.splitlines()[0] and f"INFO    unblinding {blinded}" in unblind_log
