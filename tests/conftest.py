"""Shared fixtures: a tiny noise-only survey written to a temporary folder (invented data)."""

import math

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy.io import fits

TINY_CONFIG = """
[run]
name = "tiny"
seed = 3

[catalogue]
path = "cat.csv"
proxy_column = "log_mass"

[map]
path = "map.fits"

[aperture]
radius_arcmin = 12.0

[bins]
r_max_mpc = 120.0
width_mpc = 30.0

[covariance]
n_regions = 12

[theory]
bias = 1.0

[nulls]
n_random = 2
"""

#: A config that starts from the tracer table of an earlier run of TINY_CONFIG (``{table}``) with the
#: same settings; catalogue and map are not read.
RESTART_CONFIG = (TINY_CONFIG.replace('name = "tiny"', 'name = "again"').replace('path = "cat.csv"\n', "")
                  .replace('[map]\npath = "map.fits"', '[restart]\ntable_path = "{table}"'))


def assert_json_close(a, b, *, rtol: float, skip=frozenset(), where: str = "") -> None:
    """Two JSON values equal recursively: floats to ``rtol`` relative (or exactly equal, NaN
    included), everything else exactly; dict keys in ``skip`` are not compared."""
    if isinstance(a, dict):
        assert a.keys() == b.keys(), where
        for key in a:
            if key not in skip:
                assert_json_close(a[key], b[key], rtol=rtol, skip=skip, where=f"{where}.{key}")
    elif isinstance(a, list):
        assert len(a) == len(b), where
        for k, (x, y) in enumerate(zip(a, b)):
            assert_json_close(x, y, rtol=rtol, skip=skip, where=f"{where}[{k}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=rtol, abs_tol=0.0) or a == b or (math.isnan(a) and math.isnan(b)), \
            (where, a, b)
    else:
        assert a == b, (where, a, b)


def write_healpix(path, values, *, nside, pixels=None, unit="uK_CMB", ordering="RING"):
    cols = []
    if pixels is not None:
        cols.append(fits.Column(name="PIXEL", format="K", array=pixels))
    cols.append(fits.Column(name="T", format="E", unit=unit, array=values))
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header.update(PIXTYPE="HEALPIX", ORDERING=ordering, NSIDE=nside,
                      INDXSCHM="EXPLICIT" if pixels is not None else "IMPLICIT")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)


def make_tiny_survey(folder):
    """Write the 600-tracer catalogue, the partial nside-256 white-noise map and the config into ``folder``."""
    rng = np.random.default_rng(11)
    n = 600
    ra = rng.uniform(20, 50, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-10)), np.sin(np.radians(15)), n)))
    pd.DataFrame({"ra": ra, "dec": dec, "z": rng.uniform(0.1, 0.2, n),
                  "log_mass": rng.uniform(14, 15, n)}).to_csv(folder / "cat.csv", index=False)
    nside = 256
    pix = np.sort(hp.query_disc(nside, hp.ang2vec(35, 2.5, lonlat=True), np.radians(25)))
    write_healpix(folder / "map.fits", rng.normal(0, 30, pix.size).astype(np.float32), nside=nside, pixels=pix)
    (folder / "run.toml").write_text(TINY_CONFIG)


@pytest.fixture
def tiny_survey(tmp_path):
    """A 600-tracer catalogue, a partial nside-256 white-noise map, and a config; returns the folder."""
    make_tiny_survey(tmp_path)
    return tmp_path


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory):
    """The output folder of one `pairvel run` on the tiny survey, shared by tests that only read it."""
    from pairvel.cli import main

    folder = tmp_path_factory.mktemp("tiny_run")
    make_tiny_survey(folder)
    assert main(["run", str(folder / "run.toml"), "--out", str(folder / "out"), "--quiet"]) == 0
    return folder / "out"


@pytest.fixture(scope="session")
def dask_cluster():
    """One real two-worker Dask LocalCluster (one thread each) and its client, shared by the Dask tests."""
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as local, distributed.Client(local) as client:
        yield local, client
