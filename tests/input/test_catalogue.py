"""Catalogue loading: formats, column mapping, invalid rows, cuts."""

import numpy as np
import pandas as pd
import pytest
from astropy.table import Table

from pairvel.core.errors import CatalogueError, PairvelWarning
from pairvel.input.catalogue import load_catalogue
from pairvel.input.config import CatalogueConfig


def frame(n=50, seed=1):
    rng = np.random.default_rng(seed)
    return pd.DataFrame({"RA": rng.uniform(0, 360, n), "DEC": rng.uniform(-60, 60, n),
                         "Z": rng.uniform(0.1, 0.7, n), "LOGM": rng.uniform(13.5, 15.0, n)})


def cfg_for(path, **kw):
    base = dict(path=path, ra_column="RA", dec_column="DEC", z_column="Z", proxy_column="LOGM")
    base.update(kw)
    return CatalogueConfig(**base)


@pytest.mark.parametrize("suffix", [".fits", ".ecsv", ".csv", ".parquet"])
def test_every_format_reads_the_same_values(tmp_path, suffix):
    df = frame()
    path = tmp_path / f"cat{suffix}"
    if suffix in (".fits", ".ecsv"):
        Table.from_pandas(df).write(path)
    elif suffix == ".csv":
        df.to_csv(path, index=False)
    else:
        df.to_parquet(path)
    cat = load_catalogue(cfg_for(path))
    np.testing.assert_allclose(cat.z, df["Z"].to_numpy()[cat.row], rtol=1e-15)  # analytic: same numbers back
    np.testing.assert_allclose(cat.ra, df["RA"].to_numpy()[cat.row], rtol=1e-15)
    assert cat.selection["kept"] == 50 and len(cat.sha256) == 64


def test_missing_column_names_file_and_key(tmp_path):
    path = tmp_path / "c.csv"
    frame().to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"c\.csv: column 'redshift' \(catalogue\.z_column\) not found; columns are: RA, DEC, Z, LOGM"):
        load_catalogue(cfg_for(path, z_column="redshift"))


def test_non_numeric_column(tmp_path):
    path = tmp_path / "c.csv"
    df = frame()
    df["Z"] = "abc"
    df.to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"column 'Z' \(catalogue\.z_column\) must be numeric"):
        load_catalogue(cfg_for(path))


def test_nan_rows_reported_with_count_and_first_row_then_dropped_if_allowed(tmp_path):
    df = frame()
    df.loc[[7, 20, 33], "Z"] = np.nan
    path = tmp_path / "c.parquet"
    df.to_parquet(path)
    with pytest.raises(CatalogueError, match=r"column 'Z' must be finite and > 0; 3 rows are not \(first: row 7, Z=nan\)"):
        load_catalogue(cfg_for(path))
    with pytest.warns(PairvelWarning, match="3 rows are not"):
        cat = load_catalogue(cfg_for(path, drop_invalid_rows=True))
    assert len(cat) == 47 and cat.selection["invalid_dropped"] == 3
    assert 7 not in cat.row and 8 in cat.row


def test_out_of_range_dec(tmp_path):
    df = frame()
    df.loc[4, "DEC"] = 95.0
    path = tmp_path / "c.csv"
    df.to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"'DEC' must be finite and within \[-90, 90\] degrees; 1 rows are not \(first: row 4"):
        load_catalogue(cfg_for(path))


def test_cuts_counted(tmp_path):
    df = frame(200)
    path = tmp_path / "c.csv"
    df.to_csv(path, index=False)
    cat = load_catalogue(cfg_for(path, z_min=0.2, z_max=0.5, proxy_min=14.0))
    in_z = (df.Z >= 0.2) & (df.Z < 0.5)
    keep = in_z & (df.LOGM >= 14.0)
    assert len(cat) == keep.sum()
    assert cat.selection["outside_z_range"] == (~in_z).sum()
    assert cat.selection["outside_proxy_range"] == (in_z & (df.LOGM < 14.0)).sum()
    assert np.all((cat.z >= 0.2) & (cat.z < 0.5))


def test_unreadable_and_missing_files(tmp_path):
    bad = tmp_path / "broken.fits"
    bad.write_bytes(b"this is not a FITS file at all" * 10)
    with pytest.raises(CatalogueError, match=r"broken\.fits: cannot be read as fits"):
        load_catalogue(cfg_for(bad))
    with pytest.raises(CatalogueError, match=r"absent\.csv: file not found"):
        load_catalogue(cfg_for(tmp_path / "absent.csv"))
    with pytest.raises(CatalogueError, match=r"cannot tell the format"):
        load_catalogue(cfg_for(tmp_path / "c.dat"))


def test_input_file_is_not_modified(tmp_path):
    path = tmp_path / "c.csv"
    frame().to_csv(path, index=False)
    before = path.read_bytes()
    load_catalogue(cfg_for(path, z_min=0.3))
    assert path.read_bytes() == before


def test_weight_column_loaded_and_checked(tmp_path):
    df = frame()
    df["W"] = np.linspace(0.5, 2.0, len(df))
    path = tmp_path / "c.csv"
    df.to_csv(path, index=False)
    cat = load_catalogue(cfg_for(path, weight_column="W", z_min=0.3))
    assert np.all(df.Z.to_numpy()[cat.row] >= 0.3) and len(cat) == (df.Z >= 0.3).sum()
    np.testing.assert_allclose(cat.weight, df["W"].to_numpy()[cat.row], rtol=1e-15)
    df.loc[9, "W"] = -1.0
    df.to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"column 'W' must be finite and >= 0; 1 rows are not \(first: row 9, W=-1\)"):
        load_catalogue(cfg_for(path, weight_column="W"))


@pytest.mark.parametrize("suffix", [".csv", ".fits", ".parquet"])
def test_tracers_come_in_one_order_whatever_the_row_order(tmp_path, suffix):
    """The canonical order: the same arrays, bit for bit, for permuted files, and row points back
    at each tracer's row in its own file."""
    df = frame(80)
    df.loc[5, "RA"] = df.loc[6, "RA"]  # a tie in the primary key, broken by dec
    df["W"] = np.linspace(0.5, 2.0, len(df))
    loaded = []
    for k, perm in enumerate([np.arange(80), np.arange(80)[::-1], np.random.default_rng(4).permutation(80)]):
        path = tmp_path / f"c{k}{suffix}"
        shuffled = df.iloc[perm].reset_index(drop=True)
        if suffix == ".fits":
            Table.from_pandas(shuffled).write(path)
        elif suffix == ".csv":
            shuffled.to_csv(path, index=False)
        else:
            shuffled.to_parquet(path)
        cat = load_catalogue(cfg_for(path, weight_column="W", z_min=0.2))
        np.testing.assert_array_equal(perm[cat.row], loaded[0][1] if loaded else perm[cat.row])
        loaded.append((cat, perm[cat.row]))
    first = loaded[0][0]
    assert np.all(np.diff(first.ra) >= 0) and len(first) == (df.Z >= 0.2).sum()
    for cat, _ in loaded[1:]:
        for name in ("ra", "dec", "z", "proxy", "weight"):
            np.testing.assert_array_equal(getattr(cat, name), getattr(first, name))  # analytic: a sort


def with_repeats(tmp_path):
    """A catalogue whose rows 30 and 41 repeat row 12's position and redshift, and row 44 row 3's
    (row 41 with another proxy)."""
    df = frame()
    for copy, of in ((30, 12), (41, 12), (44, 3)):
        df.loc[copy, ["RA", "DEC", "Z"]] = df.loc[of, ["RA", "DEC", "Z"]]
    df.loc[30, "LOGM"] = df.loc[12, "LOGM"]
    path = tmp_path / "c.csv"
    df.to_csv(path, index=False)
    return path


def test_duplicates_stop_the_run_by_default_naming_count_rows_and_key(tmp_path):
    path = with_repeats(tmp_path)
    with pytest.raises(CatalogueError, match=r"c\.csv: 3 rows repeat the ra, dec and z of another kept row \(row 30 "
                       r"repeats row 12, row 41 repeats row 12, row 44 repeats row 3\); set catalogue\.duplicate_rows "
                       r"= \"warn\" to keep them or \"drop\""):
        load_catalogue(cfg_for(path))
    df = pd.read_csv(path)
    df.loc[[12, 30, 41], "Z"] = 0.69  # that group is cut away by z_max: only kept rows are compared
    df.loc[3, "Z"] = df.loc[44, "Z"] = 0.3
    df.to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"1 rows repeat .* \(row 44 repeats row 3\);") as err:
        load_catalogue(cfg_for(path, z_max=0.6, duplicate_rows="error"))
    assert err.value.row == 44 and err.value.key == "catalogue.duplicate_rows"


def test_duplicates_warned_and_kept_or_dropped(tmp_path):
    path = with_repeats(tmp_path)
    with pytest.warns(PairvelWarning, match=r"3 rows repeat .*\(row 30 repeats row 12, .*; kept"):
        kept = load_catalogue(cfg_for(path, duplicate_rows="warn"))
    assert len(kept) == 50 and kept.selection["duplicates_dropped"] == 0
    with pytest.warns(PairvelWarning, match=r"3 rows repeat .*; dropped the repeats"):
        dropped = load_catalogue(cfg_for(path, duplicate_rows="drop"))
    assert len(dropped) == 47 and dropped.selection["duplicates_dropped"] == 3
    assert dropped.selection["kept"] == 47
    assert np.unique(np.column_stack([dropped.ra, dropped.dec, dropped.z]), axis=0).shape[0] == 47
    assert 3 in dropped.row or 44 in dropped.row
