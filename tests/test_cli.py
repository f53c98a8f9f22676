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
    out = capsys.readouterr().out
    assert "\n[aperture]\n  radius_arcmin " in out
    theory = out.split("\n[theory]\n")[1].split("\n[")[0]
    bias = [line for line in theory.splitlines() if line.startswith("  bias ")]
    assert len(bias) == 1 and "(required)" in bias[0] and "1.0" not in bias[0]  # no default value shown
    with pytest.raises(SystemExit) as exc:
        main(["run", "--help"])
    assert exc.value.code == 0


def test_keys_table_groups_by_section_within_100_columns(capsys):
    from pairvel.input.config import iter_config_keys

    assert main(["keys"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert max(len(line) for line in lines) <= 100
    keys = list(iter_config_keys())
    sections = list(dict.fromkeys(key.split(".")[0] for key, *_ in keys))
    assert [line for line in lines if line.startswith("[")] == [f"[{s}]" for s in sections]
    # each row: a line whose four cells start the columns, then continuation lines in the same columns
    section, rows = None, {}
    for line in lines:
        if line.startswith("["):
            section = line.strip("[]")
        elif section is not None and re.match(r"  \S", line):
            starts = [2] + [2 + m.end() - 1 for m in re.finditer(r" {2,}\S", line[2:])]
            assert len(starts) == 4, line
            rows[f"{section}.{line.split()[0]}"] = [[] for _ in starts]
            current = (starts, rows[f"{section}.{line.split()[0]}"])
        if section is not None and line.startswith("  "):
            starts, cells = current
            for k, (a, b) in enumerate(zip(starts, starts[1:] + [None])):
                cells[k] += line[a:b].split()
    assert list(rows) == [key for key, *_ in keys]
    # the same cells as the documented table in configs/README.md (`pairvel keys --markdown`)
    readme = (Path(__file__).resolve().parents[1] / "configs" / "README.md").read_text().splitlines()
    documented = [line.strip("|").split(" | ") for line in readme if line.startswith("| `")]
    assert len(documented) == len(keys)
    for key, typ, shown, doc in documented:
        key = key.strip(" `")
        assert rows[key] == [[key.split(".")[1]], typ.split(), shown.split(), doc.split()], key


def test_keys_markdown_is_the_readme_table(capsys):
    assert main(["keys", "--markdown"]) == 0
    printed = capsys.readouterr().out.splitlines()
    assert printed[:2] == ["| key | type | default | meaning |", "|---|---|---|---|"]
    readme = (Path(__file__).resolve().parents[1] / "configs" / "README.md").read_text().splitlines()
    assert printed[2:] == [line for line in readme if line.startswith("| `")]


def subcommands():
    from pairvel.cli import _parser

    action = next(a for a in _parser()._actions if a.dest == "command")
    return sorted(action.choices)


@pytest.mark.parametrize("argv", [[]] + [[name] for name in subcommands()])
def test_help_texts_print_percent_signs_once(argv, capsys):
    with pytest.raises(SystemExit) as exc:
        main([*argv, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "%%" not in out and "%(" not in out
    if argv == ["validate"]:
        assert "68% coverage" in out


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


def with_rotations(folder):
    """Turn on the opt-in rotated-map null, whose rotations leave the tiny partial map (a stage warning)."""
    toml = folder / "run.toml"
    toml.write_text(toml.read_text().replace("[nulls]\n", "[nulls]\nrotation_deg = [90.0, 180.0, 270.0]\n"))


def test_stderr_levels_run_log_and_warnings(tiny_survey, capsys):
    """Default: progress and warnings on stderr; --quiet: warnings only; --verbose: debug records too.
    run.log (INFO and above, timestamped) is the same whatever the flags; the summary stays on stdout."""
    with_rotations(tiny_survey)
    state = pairvel_logger_state()
    out = tiny_survey / "out"
    argv = ["run", str(tiny_survey / "run.toml"), "--out", str(out)]

    assert main(argv) == 0
    printed = capsys.readouterr()
    err = printed.err.splitlines()
    assert "[1/12] catalogue ..." in err and any(line.startswith("[12/12] writing outputs: done in") for line in err)
    warned = [line.removeprefix("pairvel: warning: ") for line in err if line.startswith("pairvel: warning: ")]
    assert any("has no COORDSYS keyword" in w for w in warned) and any("rotation skipped" in w for w in warned)
    assert not any(line.startswith("pair pass: ") for line in err)            # a DEBUG record
    assert "tau_mean = " in printed.out and f"outputs: {out}" in printed.out
    assert "tau_mean = " not in printed.err
    log = (out / "run.log").read_text().splitlines()
    assert log[0].startswith("# pairvel ") and ": pairvel run " in log[0]
    assert all(STAMPED.match(line) for line in log[1:]), log
    assert any(line.endswith(" INFO    [1/12] catalogue ...") for line in log)
    assert any(line.endswith(" INFO    [12/12] writing outputs ...") for line in log)
    assert [line.split(" WARNING ", 1)[1] for line in log if " WARNING " in line] == warned
    assert pairvel_logger_state() == state

    assert main(argv + ["--force", "--quiet"]) == 0
    printed = capsys.readouterr()
    err = printed.err.splitlines()
    assert err and all(line.startswith("pairvel: warning: ") for line in err), err
    assert "tau_mean = " in printed.out
    quiet_log = (out / "run.log").read_text()
    assert " INFO    [1/12] catalogue ..." in quiet_log and " WARNING " in quiet_log
    assert pairvel_logger_state() == state

    assert main(argv + ["--force", "--verbose", "--debug"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert "[1/12] catalogue ..." in err
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

    def full_disk(result, summary, figures):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(outputs, "_report", full_disk)
    state = pairvel_logger_state()
    assert main(["run", str(tiny_survey / "run.toml"), "--out", str(tiny_survey / "out")]) == 2
    line = only_error_line(capsys)
    assert "cannot be written" in line and "No space left on device" in line
    assert sorted(p.name for p in tiny_survey.iterdir()) == ["cat.csv", "map.fits", "run.toml"]
    assert not (Path.cwd() / "run.log").exists()
    assert pairvel_logger_state() == state


# --- configs that are not configs: one error line naming the file, exit 2, nothing written
@pytest.mark.parametrize("make, match", [
    (lambda p: p.write_bytes("[run]\nname = 'caf\u00e9'\n".encode("latin-1")), "is not UTF-8 text"),
    (lambda p: p.mkdir(), "is a folder, not a TOML file"),
    (lambda p: p.write_text(""), "holds no settings"),
    (lambda p: p.write_text("name: tiny\nseed: 3\n"), "not valid TOML"),
])
def test_config_files_that_cannot_be_used(tmp_path, capsys, make, match):
    config = tmp_path / "bad.toml"
    make(config)
    assert main(["run", str(config), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    line = only_error_line(capsys)
    assert str(config) in line and match in line, line
    assert not (tmp_path / "out").exists() and not (tmp_path / "pairvel-run").exists()


def test_unreadable_config(tiny_survey, capsys, monkeypatch):
    real_open = open

    def refuse(path, *args, **kwargs):  # root reads any file: the refusal is simulated at the open call
        if str(path).endswith("run.toml"):
            raise PermissionError(13, "Permission denied", str(path))
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr("builtins.open", refuse)
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "run.toml: cannot be read (Permission denied)" in line


# --- a reader that stops early is not a fault
def test_keys_into_a_pipe_closed_early():
    import os
    import subprocess
    import sys

    read_end, write_end = os.pipe()
    os.close(read_end)  # nobody will read: the first write meets a closed pipe, whatever the buffer size
    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    for argv in (["keys"], ["keys", "--markdown"], ["--version"]):
        proc = subprocess.run([sys.executable, "-m", "pairvel.cli", *argv], stdout=write_end, stderr=subprocess.PIPE,
                              env=env, timeout=120)
        assert proc.stderr == b"" and proc.returncode == 0, (argv, proc.returncode, proc.stderr)
    os.close(write_end)


def test_keys_into_head():
    import os
    import subprocess
    import sys

    env = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parents[1])}
    producer = subprocess.Popen([sys.executable, "-m", "pairvel.cli", "keys"], stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE, env=env)
    first = producer.stdout.readline()
    producer.stdout.close()  # like `| head -n 1`: the reader goes away while pairvel may still be writing
    err = producer.stderr.read()
    assert producer.wait(timeout=120) == 0 and err == b"", err
    assert first.startswith(b"Config keys by [section]")


def test_other_broken_pipes_are_still_faults(capsys, monkeypatch):
    import pairvel.cli as cli

    def broken(args):
        raise BrokenPipeError(32, "Broken pipe")

    monkeypatch.setattr(cli, "_cmd_keys", broken)
    monkeypatch.setattr(cli, "_stdout_closed", lambda: False)  # stdout is fine: the pipe was another one
    assert main(["keys"]) == 1
    assert "internal error: BrokenPipeError" in capsys.readouterr().err


# --- a map unit wrong by 10^6 stops the run
def _relabel(path, unit):
    from astropy.io import fits

    with fits.open(path, mode="update") as hdul:
        hdul[1].header[f"TUNIT{hdul[1].columns.names.index('T') + 1}"] = unit


@pytest.mark.parametrize("unit, scale, expected_rms", [("K_CMB", 100 / 30, 1e8), ("uK_CMB", 1e-6, 30e-6)])
def test_map_unit_wrong_by_a_million_stops_the_run(tiny_survey, capsys, unit, scale, expected_rms):
    """tiny_survey's map is 30 uK white noise labelled uK_CMB.  Scaled to a CMB-like 100 uK and labelled
    K it reads as 1e8 uK; written in K but labelled uK it reads as 3e-5 uK (analytic).  (The 30 uK map
    itself labelled K would read 3e7 uK, on the stop bound: a uK map labelled K stops from 30 uK rms up.)"""
    from astropy.io import fits

    path = tiny_survey / "map.fits"
    with fits.open(path, mode="update") as hdul:
        hdul[1].data["T"] = hdul[1].data["T"] * scale
    _relabel(path, unit)
    before = path.read_bytes()
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert str(path) in line and f"unit '{unit}'" in line and "map.rms_unit_check = false" in line, line
    rms = float(re.search(r"pixel rms is (\S+) uK", line).group(1))
    assert rms == pytest.approx(expected_rms, rel=0.05)  # analytic: the map's 30 uK noise, misread by 10^6
    assert not (tiny_survey / "out").exists() and path.read_bytes() == before
    # the key turns the stop into the old warning, for maps that really are that faint or bright
    toml = tiny_survey / "run.toml"
    toml.write_text(toml.read_text().replace('path = "map.fits"\n', 'path = "map.fits"\nrms_unit_check = false\n'))
    assert run(tiny_survey) == 0
    assert "is the unit really" in capsys.readouterr().err


def test_map_unit_check_covers_every_frequency_map(tiny_survey, capsys):
    import shutil

    from astropy.io import fits

    shutil.copy(tiny_survey / "map.fits", tiny_survey / "map_90.fits")
    with fits.open(tiny_survey / "map_90.fits", mode="update") as hdul:  # 100 uK, labelled K: 1e8 uK
        hdul[1].data["T"] = hdul[1].data["T"] * (100 / 30)
    _relabel(tiny_survey / "map_90.fits", "K_CMB")
    toml = tiny_survey / "run.toml"
    toml.write_text(toml.read_text().replace('path = "map.fits"\n', "")
                    + '[multifrequency]\nmap_paths = ["map.fits", "map_90.fits"]\nfrequencies_ghz = [150, 90]\n'
                      'noise_uk_arcmin = [20, 30]\n')
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "map_90.fits" in line and "unit 'K_CMB'" in line and "map.rms_unit_check" in line, line


# --- an empty rotation list: no rotated-map null, as documented
def test_empty_rotation_list_runs_without_that_null(tiny_survey):
    toml = tiny_survey / "run.toml"
    toml.write_text(toml.read_text().replace("[nulls]\n", "[nulls]\nrotation_deg = []\n"))
    assert run(tiny_survey) == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    assert summary["null_rotations_used"] == [] and summary["config"]["nulls"]["rotation_deg"] == []
    assert "rotated" not in {n["kind"] for n in summary["null_tests"]}
    assert "random_positions" in {n["kind"] for n in summary["null_tests"]}


# --- every warning of a run is kept in summary.json and report.md
def test_every_warning_reaches_summary_and_report(tiny_survey, capsys):
    with_rotations(tiny_survey)
    assert main(["run", str(tiny_survey / "run.toml"), "--out", str(tiny_survey / "out")]) == 0
    err = capsys.readouterr().err.splitlines()
    shown = [line.removeprefix("pairvel: warning: ") for line in err if line.startswith("pairvel: warning: ")]
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    kept = summary["run_warnings"]
    assert [w["text"] for w in kept] == shown and len(shown) >= 2, (kept, shown)
    by_text = {w["text"].split(";")[0]: w for w in kept}
    coordsys = next(w for t, w in by_text.items() if "has no COORDSYS keyword" in t)
    assert coordsys["stage"] == "sky map" and coordsys["source"] == "PairvelWarning in pairvel.maps.multifreq"  # where read_map was called
    rotation = next(w for t, w in by_text.items() if "rotation skipped" in t or "rotation by" in t)
    assert rotation["stage"].startswith("null-test photometry: map rotated")
    report = (tiny_survey / "out" / "report.md").read_text()
    section = report.split("## Warnings during the run\n", 1)[1].split("\n## ", 1)[0]
    assert f"{len(kept)} warnings, in the order raised:" in section
    assert all(w["text"] in section for w in kept)


def test_run_pipeline_keeps_warnings_for_library_callers(tiny_survey):
    import logging
    import warnings

    from pairvel.input.config import load_config
    from pairvel.pipeline import run_pipeline

    cfg = load_config(tiny_survey / "run.toml")
    with warnings.catch_warnings(record=True) as shown:  # the filters in force stay as they are
        first = run_pipeline(cfg)
        n_first = len(shown)
        logging.getLogger("pairvel.stats").warning("a logged warning")  # outside a run: not kept
        second = run_pipeline(cfg)  # the same warnings again, although shown once already
    assert first.warnings and all(w.stage for w in first.warnings)
    assert [str(s.message) for s in shown[:n_first]] == [w.text for w in first.warnings]  # kept and still shown
    assert [w.text for w in second.warnings] == [w.text for w in first.warnings]
    assert [str(s.message) for s in shown[n_first:]] == [w.text for w in second.warnings]
    assert not any(type(h).__name__ == "_Keeper" for h in logging.getLogger("pairvel").handlers)


def test_logged_warnings_are_kept_with_their_logger():
    import logging
    import warnings

    from pairvel.core.progress import Progress
    from pairvel.core.warnlog import collect_warnings

    progress = Progress(2, quiet=True)
    with collect_warnings(lambda: progress.current) as kept:
        with progress.stage("first"):
            logging.getLogger("pairvel.maps.trend").warning("trend %s", "odd")
            logging.getLogger("pairvel.maps.trend").info("not a warning")
            logging.getLogger("elsewhere").warning("not pairvel's")
        with progress.stage("second"), warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a filter that hides a warning hides it from the record too
            warnings.warn("hidden", stacklevel=1)
        warnings.warn("plain", UserWarning, stacklevel=1)
    assert [w.as_dict() for w in kept] == [
        {"text": "trend odd", "source": "pairvel.maps.trend", "stage": "first"},
        {"text": "plain", "source": "UserWarning in test_cli", "stage": None},
    ]


# --- any run checked against a truth.json (run.truth_path)

def with_truth(folder, truth, *, extra=""):
    (folder / "truth.json").write_text(truth if isinstance(truth, str) else json.dumps(truth))
    cfg = folder / "run.toml"
    cfg.write_text(cfg.read_text().replace('seed = 3\n', 'seed = 3\ntruth_path = "truth.json"\n') + extra)


def test_run_compares_tau_mean_with_a_truth_file(tiny_survey, capsys):
    with_truth(tiny_survey, {"tau_mean": 1.5e-3, "aperture_response": 0.98})
    assert run(tiny_survey) == 0
    printed = capsys.readouterr().out
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    check = summary["truth_check"]
    assert check["tau_mean_injected"] == 1.5e-3 and check["truth_file"] == str(tiny_survey / "truth.json")
    # the pull from the run's own fit (internal consistency, to rounding)
    assert check["pull_sigma"] == pytest.approx((summary["tau_mean"] - 1.5e-3) / summary["tau_mean_error"], rel=1e-12)
    assert "tau_mean_vs_realised_velocity" not in check  # this truth holds no realised velocity curve
    verdict = check["verdict"]
    assert verdict.startswith("truth check: injected tau_mean = 1.500e-03") and verdict in printed
    assert printed.index("outputs:") < printed.index("truth check:")
    report = (tiny_survey / "out" / "report.md").read_text()
    assert "## Comparison with the injected truth" in report and verdict in report
    assert "expected recovered value is about 1.470e-03" in report  # 1.5e-3 x 0.98


def test_run_without_truth_path_has_no_truth_check(tiny_survey, capsys):
    assert run(tiny_survey) == 0
    assert "truth check" not in capsys.readouterr().out
    assert "truth_check" not in json.loads((tiny_survey / "out" / "summary.json").read_text())


@pytest.mark.parametrize("truth, match", [
    (None, r"run\.truth_path .*truth\.json: file not found"),
    ("{not json", r"run\.truth_path .*truth\.json: is not JSON"),
    ("[1, 2]", r"run\.truth_path .*truth\.json: must hold a JSON object .*; got list"),
    ('{"tau_mean": "2e-3"}', r"run\.truth_path .*truth\.json: 'tau_mean' must be a finite number .*; got '2e-3'"),
    ('{"bias": 0.4}', r"run\.truth_path .*truth\.json: 'tau_mean' must be a finite number .*; got None"),
])
def test_unusable_truth_file_stops_before_the_work(tiny_survey, capsys, truth, match):
    with_truth(tiny_survey, "" if truth is None else truth)
    if truth is None:
        (tiny_survey / "truth.json").unlink()
    assert run(tiny_survey) == 2
    assert re.search(match, only_error_line(capsys))
    assert not (tiny_survey / "out").exists()


def test_truth_check_and_blinding_exclude_each_other(tiny_survey, capsys):
    with_truth(tiny_survey, {"tau_mean": 1e-3}, extra="\n[blinding]\nenabled = true\n")
    assert run(tiny_survey) == 2
    line = only_error_line(capsys)
    assert "'run.truth_path' cannot be used with blinding.enabled" in line and "run.toml" in line
    assert not (tiny_survey / "out").exists()
