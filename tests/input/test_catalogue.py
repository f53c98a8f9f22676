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
    np.testing.assert_allclose(cat.z, df["Z"].to_numpy(), rtol=1e-15)  # analytic: same numbers back
    np.testing.assert_allclose(cat.ra, df["RA"].to_numpy(), rtol=1e-15)
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
    np.testing.assert_allclose(cat.weight, df["W"][(df.Z >= 0.3)].to_numpy(), rtol=1e-15)
    df.loc[9, "W"] = -1.0
    df.to_csv(path, index=False)
    with pytest.raises(CatalogueError, match=r"column 'W' must be finite and >= 0; 1 rows are not \(first: row 9, W=-1\)"):
        load_catalogue(cfg_for(path, weight_column="W"))
