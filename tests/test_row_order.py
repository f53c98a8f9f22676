"""A run does not depend on the order of the catalogue rows: the same numbers, to 1e-12 relative,
in summary.json and in every output table for permuted CSV, FITS and Parquet files."""

import json

import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from astropy.table import Table
from conftest import assert_json_close

from pairvel.cli import main

# keys whose values name the input files or the time of the run, not results
NOT_RESULTS = {"started_utc", "path", "sha256", "config_file", "config_sha256", "config_text", "config_git_commit",
               "platform", "versions"}


def write_catalogue(frame: pd.DataFrame, path):
    if path.suffix == ".csv":
        frame.to_csv(path, index=False)
    elif path.suffix == ".fits":
        Table.from_pandas(frame).write(path)
    else:
        frame.to_parquet(path)


def run_with(folder, catalogue, settings: str, out: str):
    cfg = folder / f"{out}.toml"
    text = (folder / "run.toml").read_text().replace('path = "cat.csv"', f'path = "{catalogue.name}"')
    cfg.write_text(text.replace("[covariance]\n", "[covariance]\n" + settings))
    assert main(["run", str(cfg), "--out", str(folder / out), "--quiet"]) == 0
    return folder / out


def assert_same_numbers(a, b, where="summary"):
    """Every number equal to 1e-12 relative, every string equal, recursively (run-specific keys skipped)."""
    assert_json_close(a, b, rtol=1e-12, skip=NOT_RESULTS, where=where)


def assert_same_outputs(first, other):
    assert_same_numbers(json.loads((first / "summary.json").read_text()),
                        json.loads((other / "summary.json").read_text()))
    tables = sorted(p.name for p in first.glob("*.ecsv"))
    assert tables == sorted(p.name for p in other.glob("*.ecsv")) and "pairwise.ecsv" in tables
    for name in tables:
        ta, tb = Table.read(first / name), Table.read(other / name)
        assert ta.colnames == tb.colnames, name
        for col in ta.colnames:
            np.testing.assert_allclose(np.asarray(tb[col], dtype=float), np.asarray(ta[col], dtype=float),
                                       rtol=1e-12, atol=0, err_msg=f"{name}:{col}")  # internal: same run
    with fits.open(first / "covariance.fits") as ha, fits.open(other / "covariance.fits") as hb:
        assert len(ha) == len(hb)
        for hdu_a, hdu_b in zip(ha, hb):
            if hdu_a.data is not None:
                np.testing.assert_allclose(hdu_b.data, hdu_a.data, rtol=1e-12, atol=0)


SETTINGS = {
    # k-means regions (and one more seed), jackknife re-trended per region, random positions, both
    # shuffles, trend-loss draws
    "jackknife": "extra_region_seeds = 1\n",
    "bootstrap": 'estimator = "bootstrap"\nn_bootstrap = 200\n',
}


@pytest.mark.parametrize("estimator", sorted(SETTINGS))
def test_permuted_rows_give_the_same_run(tiny_survey, estimator):
    frame = pd.read_csv(tiny_survey / "cat.csv")
    n = len(frame)
    rng = np.random.default_rng(8)
    permutations = {"reversed": np.arange(n)[::-1], "random": rng.permutation(n)}
    runs = {"as_written": run_with(tiny_survey, tiny_survey / "cat.csv", SETTINGS[estimator], "as_written")}
    for k, (label, perm) in enumerate(permutations.items()):
        suffix = (".csv", ".fits", ".parquet")[k + (estimator == "bootstrap")]
        path = tiny_survey / f"cat_{label}{suffix}"
        write_catalogue(frame.iloc[perm].reset_index(drop=True), path)
        runs[label] = run_with(tiny_survey, path, SETTINGS[estimator], label)
    summary = json.loads((runs["as_written"] / "summary.json").read_text())
    assert summary["n_tracers"] > 500 and {n["kind"] for n in summary["null_tests"]} >= {
        "random_positions", "shuffled", "shuffled_in_z"}
    assert summary["covariance"]["n_regions"] == 12
    assert ("region_seed_spread" in summary["covariance"]) == (estimator == "jackknife")
    for label in permutations:
        assert_same_outputs(runs["as_written"], runs[label])
