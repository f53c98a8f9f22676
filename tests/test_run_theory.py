"""Theory and inference options end to end on the tiny noise-only survey (conftest.tiny_survey)."""

import json

import numpy as np

from pairvel import theory as th
from pairvel.cli import main


def run(folder, theory_toml, *extra):
    text = (folder / "run.toml").read_text() + "\n[theory]\n" + theory_toml
    (folder / "run2.toml").write_text(text)
    return main(["run", str(folder / "run2.toml"), "--out", str(folder / "out"), "--quiet", *extra])


def error_line(capsys):
    err = [line for line in capsys.readouterr().err.splitlines() if line.startswith("pairvel: error:")]
    assert len(err) == 1, err
    return err[0]


def test_bad_power_table_is_one_clear_line(tiny_survey, capsys):
    (tiny_survey / "pk.txt").write_text("0.01 1e4\n0.1 x\n")
    assert run(tiny_survey, 'power_table_path = "pk.txt"\n') == 2
    assert "power-spectrum table" in error_line(capsys) and not (tiny_survey / "out").exists()


def test_power_table_and_template_options_reach_the_outputs(tiny_survey):
    k = np.geomspace(1e-4, 50, 400)
    (tiny_survey / "pk.txt").write_text("".join(f"{a:.8e} {b:.8e}\n" for a, b in zip(k, th.linear_power(k))))
    assert run(tiny_survey, 'power_table_path = "pk.txt"\nphotoz_sigma = 0.01\ngrowth_rate = "linder"\n') == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    info = summary["template"]
    assert info["power_spectrum"].startswith("table ") and "sha256" in info["power_spectrum"]
    assert info["photoz_model"] == "convolution" and info["photoz_sigma_z0"] == 0.01
    assert abs(sum(info["z_weights"]) - 1) < 1e-12 and 0.1 <= info["z_mean_model"] <= 0.2
