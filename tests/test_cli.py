"""The command line: one clear line and exit code 2 for bad input, no partial output, atomic writes."""

import json
import logging
import re
from pathlib import Path

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from conftest import write_healpix

from pairvel.cli import main


def run(folder, *extra):
    return main(["run", str(folder / "run.toml"), "--out", str(folder / "out"), "--quiet", *extra])


def only_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    errors = [line for line in err if line.startswith("pairvel: error:")]
    assert len(errors) == 1, err
    assert not any("Traceback" in line for line in err)
    return errors[0]


def test_run_writes_every_output_and_refuses_to_overwrite(tiny_survey, capsys):
    assert run(tiny_survey) == 0
    out = tiny_survey / "out"
    for name in ("pairwise.ecsv", "covariance.fits", "null_random_positions.ecsv", "null_shuffled.ecsv",
                 "null_shuffled_in_z.ecsv", "summary.json", "report.md", "pairwise.png", "nulls.png"):
        assert (out / name).is_file(), name
    summary = json.loads((out / "summary.json").read_text())
    for key in ("tau_mean", "tau_mean_error", "snr", "chi2_null", "pte_null", "null_tests", "provenance"):
        assert key in summary
    assert summary["provenance"]["seed"] == 3 and len(summary["provenance"]["catalogue"]["sha256"]) == 64
    before = (out / "summary.json").read_bytes()
    assert run(tiny_survey) == 2
    assert "exists already" in only_error_line(capsys)
    assert (out / "summary.json").read_bytes() == before
    assert run(tiny_survey, "--force") == 0
    assert not [p for p in tiny_survey.iterdir() if p.name.startswith(".out")]  # no temporary folders left


def test_config_typo(tiny_survey, capsys):
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace("radius_arcmin", "radius_arcmn"))
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "run.toml" in line and "aperture.radius_arcmn" in line
    assert not (tiny_survey / "out").exists()


def test_missing_column(tiny_survey, capsys):
    df = pd.read_csv(tiny_survey / "cat.csv").drop(columns="dec")
    df.to_csv(tiny_survey / "cat.csv", index=False)
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "cat.csv" in line and "'dec'" in line and "catalogue.dec_column" in line
    assert not (tiny_survey / "out").exists()


def test_nan_in_catalogue(tiny_survey, capsys):
    df = pd.read_csv(tiny_survey / "cat.csv")
    df.loc[17, "z"] = np.nan
    df.to_csv(tiny_survey / "cat.csv", index=False)
    assert run(tiny_survey) == 2
    assert "row 17" in only_error_line(capsys)
    assert not (tiny_survey / "out").exists()


def test_mask_of_another_nside(tiny_survey, capsys):
    write_healpix(tiny_survey / "mask.fits", np.ones(hp.nside2npix(128), np.float32), nside=128, unit=None)
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('path = "map.fits"', 'path = "map.fits"\nmask_path = "mask.fits"'))
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "mask.fits" in line and "nside 128" in line and "nside 256" in line
    assert not (tiny_survey / "out").exists()


def test_unreadable_map(tiny_survey, capsys):
    (tiny_survey / "map.fits").write_bytes(b"\x00garbage" * 50)
    assert run(tiny_survey) == 2
    assert "map.fits" in only_error_line(capsys)
    assert not (tiny_survey / "out").exists()


def test_debug_shows_traceback(tiny_survey, capsys):
    (tiny_survey / "map.fits").unlink()
    assert run(tiny_survey, "--debug") == 2
    assert "Traceback" in capsys.readouterr().err


def test_force_never_replaces_a_folder_pairvel_did_not_write(tiny_survey, capsys):
    (tiny_survey / "out").mkdir()
    (tiny_survey / "out" / "precious.txt").write_text("user data")
    assert run(tiny_survey, "--force") == 2
    assert "not a pairvel output" in only_error_line(capsys)
    assert (tiny_survey / "out" / "precious.txt").read_text() == "user data"


def test_keys_and_help(capsys):
    assert main(["keys"]) == 0
    assert "aperture.radius_arcmin" in capsys.readouterr().out
    with pytest.raises(SystemExit) as exc:
        main(["run", "--help"])
    assert exc.value.code == 0


def test_healpix_jackknife_regions(tiny_survey):
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace("n_regions = 12", 'regions = "healpix"\nhealpix_nside = 8\nmin_region_tracers = 20'))
    assert run(tiny_survey) == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    assert summary["covariance"]["method"].startswith("delete-one jackknife over healpix")
    assert summary["covariance"]["n_regions"] >= 6


def test_weight_column_reaches_the_estimator(tiny_survey, capsys):
    cat = pd.read_csv(tiny_survey / "cat.csv")
    rng = np.random.default_rng(5)
    cat["w_flat"] = 2.0
    cat["w_rand"] = rng.uniform(0.2, 3.0, len(cat))
    cat["w_bad"] = np.where(np.arange(len(cat)) == 7, -1.0, 1.0)
    cat.to_csv(tiny_survey / "cat.csv", index=False)
    base = (tiny_survey / "run.toml").read_text()

    def p_with(column, out):
        text = base if column is None else base.replace('proxy_column = "log_mass"',
                                                          f'proxy_column = "log_mass"\nweight_column = "{column}"')
        (tiny_survey / "run.toml").write_text(text)
        code = main(["run", str(tiny_survey / "run.toml"), "--out", str(tiny_survey / out), "--quiet"])
        if code:
            return code
        return pd.read_csv(tiny_survey / out / "pairwise.ecsv", comment="#", sep=" ")["p_uK"].to_numpy()

    plain, flat, rand = p_with(None, "o1"), p_with("w_flat", "o2"), p_with("w_rand", "o3")
    np.testing.assert_allclose(flat, plain, rtol=1e-12)   # analytic: a common weight cancels in the ratio
    assert np.max(np.abs(rand - plain)) > 1e-3 * np.max(np.abs(plain))
    capsys.readouterr()
    assert p_with("w_bad", "o4") == 2
    line = only_error_line(capsys)
    assert "w_bad" in line and "row 7" in line and not (tiny_survey / "o4").exists()


# --- logging: stderr levels, run.log, warnings ---------------------------------------------------

STAMPED = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z (INFO   |WARNING) ")


def pairvel_logger_state():
    logger = logging.getLogger("pairvel")
    return list(logger.handlers), logger.level


def test_stderr_levels_run_log_and_warnings(tiny_survey, capsys):
    """Default: progress and warnings on stderr; --quiet: warnings only; --verbose: debug records too.
    run.log (INFO and above, timestamped) is the same whatever the flags; the summary stays on stdout."""
    state = pairvel_logger_state()
    out = tiny_survey / "out"
    argv = ["run", str(tiny_survey / "run.toml"), "--out", str(out)]

    assert main(argv) == 0
    printed = capsys.readouterr()
    err = printed.err.splitlines()
    assert "[1/10] catalogue ..." in err and any(line.startswith("[10/10] writing outputs: done in") for line in err)
    warned = [line.removeprefix("pairvel: warning: ") for line in err if line.startswith("pairvel: warning: ")]
    assert any("has no COORDSYS keyword" in w for w in warned) and any("rotation skipped" in w for w in warned)
    assert not any(line.startswith("pair pass: ") for line in err)            # a DEBUG record
    assert "tau_mean = " in printed.out and f"outputs: {out}" in printed.out
    assert "tau_mean = " not in printed.err
    log = (out / "run.log").read_text().splitlines()
    assert log[0].startswith("# pairvel ") and ": pairvel run " in log[0]
    assert all(STAMPED.match(line) for line in log[1:]), log
    assert any(line.endswith(" INFO    [1/10] catalogue ...") for line in log)
    assert any(line.endswith(" INFO    [10/10] writing outputs ...") for line in log)
    assert [line.split(" WARNING ", 1)[1] for line in log if " WARNING " in line] == warned
    assert pairvel_logger_state() == state

    assert main(argv + ["--force", "--quiet"]) == 0
    printed = capsys.readouterr()
    err = printed.err.splitlines()
    assert err and all(line.startswith("pairvel: warning: ") for line in err), err
    assert "tau_mean = " in printed.out
    quiet_log = (out / "run.log").read_text()
    assert " INFO    [1/10] catalogue ..." in quiet_log and " WARNING " in quiet_log
    assert pairvel_logger_state() == state

    assert main(argv + ["--force", "--verbose", "--debug"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert "[1/10] catalogue ..." in err
    assert any(line.startswith("pair pass: ") and " threads, " in line for line in err)
    assert any(line.startswith("config ") and f"output folder {out}" in line for line in err)
    assert any(line.startswith("pairvel: warning: ") and ".py:" in line and "PairvelWarning: " in line for line in err)
    verbose_log = (out / "run.log").read_text()
    assert "Z DEBUG " not in verbose_log and " threads, " not in verbose_log
    assert "PairvelWarning: " in verbose_log                                  # --debug: warnings name their origin
    assert pairvel_logger_state() == state


def test_quiet_and_verbose_exclude_each_other(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["run", "x.toml", "--quiet", "--verbose"])
    assert exc.value.code == 2 and "not allowed with argument" in capsys.readouterr().err


def test_failed_write_leaves_no_folder_and_no_log(tiny_survey, capsys, monkeypatch):
    """The log is held in memory: a run that fails while writing leaves neither a folder nor a run.log."""
    import pairvel.report.outputs as outputs

    def full_disk(result, summary):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(outputs, "_report", full_disk)
    state = pairvel_logger_state()
    assert main(["run", str(tiny_survey / "run.toml"), "--out", str(tiny_survey / "out")]) == 2
    line = only_error_line(capsys)
    assert "cannot be written" in line and "No space left on device" in line
    assert sorted(p.name for p in tiny_survey.iterdir()) == ["cat.csv", "map.fits", "run.toml"]
    assert not (Path.cwd() / "run.log").exists()
    assert pairvel_logger_state() == state
