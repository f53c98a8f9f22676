"""Figures: the shared style and writer, the small formatters, and the per-tracer diagnostics."""

import types

import matplotlib
import numpy as np
import pytest
from astropy.table import Table
from PIL import Image

from pairvel.core.plotstyle import COLUMN_WIDTH_IN, PNG_DPI, RC, new_figure, plot_style, save_figure
from pairvel.report.figures import format_tau, plot_tracers, pte_flag, robust_outliers, template_label


@pytest.mark.parametrize("value, error, expected", [
    (2.03e-3, 0.19e-3, "tau_mean = (2.03 +/- 0.19) x 10^-3"),
    (-2.6296e-3, 3.0048e-3, "tau_mean = (-2.63 +/- 3.00) x 10^-3"),     # the error sets the power
    (4.5e-5, 2.0e-4, "tau_mean = (0.45 +/- 2.00) x 10^-4"),
    (2.0e-3, 1.2e-6, "tau_mean = (2.0000 +/- 0.0012) x 10^-3"),         # two significant digits of the error
    (3.2, 0.4, "tau_mean = 3.20 +/- 0.40"),                             # no x 10^0
    (0.0, 0.0, "tau_mean = 0 +/- 0"),
])
def test_format_tau(value, error, expected):
    assert format_tau(value, error) == expected


def test_format_tau_non_finite():
    assert format_tau(float("nan"), 1e-3) == "tau_mean = nan +/- 0.001"


@pytest.mark.parametrize("pte, flag", [(0.0, "low"), (0.0099, "low"), (0.01, ""), (0.5, ""), (0.99, ""),
                                       (0.9901, "high"), (1.0, "high"), (float("nan"), "")])
def test_pte_flag_marks_both_tails(pte, flag):
    assert pte_flag(pte) == flag


def test_robust_outliers_find_the_injected_values():
    rng = np.random.default_rng(4)
    t = rng.normal(3.0, 20.0, 5000)
    t[[10, 200, 3000]] = [3.0 + 200.0, 3.0 - 150.0, 3.0 + 120.0]   # 10, 7.5 and 6 sigma away
    t[11] = np.nan
    mask, med, sigma = robust_outliers(t)
    assert sorted(np.flatnonzero(mask)) == [10, 200, 3000]
    # analytic: median and 1.4826 MAD estimate the Gaussian's centre and sigma (sampling error ~2%)
    assert med == pytest.approx(3.0, abs=1.5) and sigma == pytest.approx(20.0, rel=0.05)
    none, _, s0 = robust_outliers(np.ones(5))
    assert not none.any() and s0 == 0.0


def test_template_label_names_the_trend_loss_factor():
    with_loss = types.SimpleNamespace(extra={"template": {"trend_loss_model": {"kept_fraction": [0.9]}}})
    without = types.SimpleNamespace(extra={"template": {"trend_loss_model": None}})
    assert template_label(with_loss) == "linear-theory template x trend-loss factor"
    assert template_label(without) == template_label(types.SimpleNamespace(extra={})) == "linear-theory template"


def test_save_figure_writes_pdf_and_200_dpi_png_without_touching_global_state(tmp_path):
    import matplotlib.pyplot as plt

    backend, font = matplotlib.get_backend(), matplotlib.rcParams["font.size"]
    before = plt.get_fignums()
    with plot_style():
        assert matplotlib.rcParams["font.size"] == RC["font.size"]
        fig = new_figure(width="column", height_in=2.0)
        fig.subplots().plot([0, 1], [1, 0])
        names = save_figure(fig, tmp_path, "line")
    assert names == ["line.pdf", "line.png"]
    assert (tmp_path / "line.pdf").read_bytes().startswith(b"%PDF")
    with Image.open(tmp_path / "line.png") as im:
        assert im.size == (round(COLUMN_WIDTH_IN * PNG_DPI), round(2.0 * PNG_DPI))   # analytic: inches x dpi
    assert matplotlib.rcParams["font.size"] == font and matplotlib.get_backend() == backend
    assert plt.get_fignums() == before                                              # no pyplot figure left open
    assert b"CreationDate" not in (tmp_path / "line.pdf").read_bytes()    # a rerun writes the same bytes


def synthetic_tracers(n=500, seed=8):
    """A per-tracer table with the agreed columns (invented values); 10% dropped, one 10-sigma outlier."""
    rng = np.random.default_rng(seed)
    t = Table()
    t["row"] = np.arange(n)
    t["ra_deg"] = rng.uniform(-15.0, 20.0, n) % 360.0            # across RA = 0
    t["dec_deg"] = rng.uniform(-5.0, 10.0, n)
    t["z"] = rng.uniform(0.1, 0.4, n)
    t["used"] = rng.random(n) > 0.1
    t["region"] = np.where(t["used"], rng.integers(0, 12, n), -1)
    t["drop_reason"] = np.where(t["used"], "", "masked")
    trend = 50.0 * (t["z"] - 0.25)
    t["t_uK"] = np.where(t["used"], rng.normal(0.0, 25.0, n), np.nan)
    t["t_uK"][np.flatnonzero(t["used"])[0]] = 250.0
    t["t_raw_uK"] = t["t_uK"] + trend
    return t


def test_tracer_diagnostics_from_a_synthetic_table(tmp_path):
    figures = plot_tracers(synthetic_tracers(), tmp_path)
    assert [f.stem for f in figures] == ["footprint", "redshifts", "temperature_vs_z", "temperatures"]
    assert {f.section for f in figures} == {"diagnostics"}
    for f in figures:
        assert (tmp_path / f"{f.stem}.pdf").stat().st_size > 1000 and (tmp_path / f.png).stat().st_size > 1000
    captions = {f.stem: f.caption for f in figures}
    n_dropped = int((~synthetic_tracers()["used"]).sum())
    assert f"{n_dropped} masked" in captions["footprint"]
    assert "1 outliers" in captions["temperatures"]


def test_tracer_diagnostics_need_the_agreed_columns(tmp_path):
    t = synthetic_tracers()
    t.remove_column("t_raw_uK")
    with pytest.raises(KeyError, match="t_raw_uK"):
        plot_tracers(t, tmp_path)
