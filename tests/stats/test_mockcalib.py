"""Per-bin calibration read from a `pairvel validate` folder and shown in a run's report."""

import json

import numpy as np
import pytest

from pairvel.core.errors import InputError
from pairvel.stats.mockcalib import calibration_markdown, read_mock_calibration


def _validation_folder(folder, edges, ratio):
    """A summary.json with the entries `pairvel validate` writes (invented numbers)."""
    folder.mkdir()
    summary = {"measured": {"n_mocks": 240, "coverage_68": 0.69}, "dof": len(ratio) - 1, "chi2_min_mean": 13.3,
               "per_bin_jk_error_over_scatter": ratio, "per_bin_jk_error_over_scatter_se": [0.03] * len(ratio),
               "best_fit_pte_ks_p": 0.41,
               "jackknife_variants": {"pipeline": {"per_bin_error_over_scatter": ratio},
                                      "pairs": {"per_bin_error_over_scatter": [r * 1.2 for r in ratio]}}}
    record = {"summary": summary, "edges_mpc": list(edges),
              "provenance": {"options": {"seed": 7, "jackknife_deletes": "tracers"}}}
    (folder / "summary.json").write_text(json.dumps(record))
    return folder


def test_read_and_markdown(tmp_path):
    folder = _validation_folder(tmp_path / "val", [0, 30, 60, 90, 120], [0.98, 1.01, 1.04, 0.97])
    calib = read_mock_calibration(folder)
    assert calib["n_mocks"] == 240 and calib["jackknife"] == "tracers" and calib["chi2_over_dof"] == pytest.approx(13.3 / 3)
    text = calibration_markdown(calib, np.array([0, 30, 60, 90, 120.0]))
    assert "| 60 | 90 | 1.04 | 0.03 |" in text and "differ" not in text
    assert "differ from this run's" in calibration_markdown(calib, np.array([0, 20, 40.0]))
    (folder / "summary.json").write_text('{"summary": {}}')
    with pytest.raises(InputError, match=r"covariance.calibration_dir .*summary.json: not a pairvel validate summary"):
        read_mock_calibration(folder)
    with pytest.raises(InputError, match="covariance.calibration_dir .*cannot read"):
        read_mock_calibration(tmp_path / "missing")


def test_run_report_shows_the_validation_per_bin_errors(tiny_survey):
    from pairvel.cli import main

    _validation_folder(tiny_survey / "val", [0, 30, 60, 90, 120], [0.98, 1.01, 1.04, 0.97])
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace("[covariance]\n", '[covariance]\ncalibration_dir = "val"\n'))
    assert main(["run", str(cfg), "--out", str(tiny_survey / "out"), "--quiet"]) == 0
    report = (tiny_survey / "out" / "report.md").read_text()
    assert "## Per-bin errors against mock scatter" in report and "| 90 | 120 | 0.97 | 0.03 |" in report
    assert "mock_calibration.png" in report and (tiny_survey / "out" / "mock_calibration.pdf").exists()
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    assert summary["covariance"]["mock_calibration"]["ratio"] == [0.98, 1.01, 1.04, 0.97]
