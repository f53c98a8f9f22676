"""Catalogue position columns with units: converted to degrees in FITS, ECSV and Parquet; unitless
columns read as degrees; non-angle units refused in one line."""

import astropy.units as u
import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table

from pairvel.core.errors import CatalogueError
from pairvel.input.catalogue import load_catalogue
from pairvel.input.config import CatalogueConfig


def positions(n=40, seed=4):
    rng = np.random.default_rng(seed)
    return rng.uniform(0, 360, n), rng.uniform(-60, 60, n), rng.uniform(0.1, 0.7, n)


def write(path, ra, dec, z, ra_unit, dec_unit):
    if path.suffix == ".fits":  # TUNITn written as given (astropy would refuse to write 'hourangle', not a FITS unit)
        cols = [fits.Column(name=n, format="D", unit=un, array=a)
                for n, un, a in (("RA", ra_unit, ra), ("DEC", dec_unit, dec), ("Z", None, z))]
        fits.BinTableHDU.from_columns(cols).writeto(path)
        return path
    table = Table({"RA": ra, "DEC": dec, "Z": z})
    table["RA"].unit, table["DEC"].unit = ra_unit, dec_unit
    table.write(path)
    return path


def config(path):
    return CatalogueConfig(path=path, ra_column="RA", dec_column="DEC", z_column="Z")


@pytest.mark.parametrize("suffix", [".fits", ".ecsv", ".parquet"])
@pytest.mark.parametrize("ra_unit, dec_unit", [("rad", "rad"), ("hourangle", "arcmin"), ("arcsec", "deg"),
                                               (None, None)])
def test_angle_units_become_degrees(tmp_path, suffix, ra_unit, dec_unit):
    ra, dec, z = positions()
    in_ra = ra if ra_unit is None else (ra * u.deg).to_value(ra_unit)
    in_dec = dec if dec_unit is None else (dec * u.deg).to_value(dec_unit)
    cat = load_catalogue(config(write(tmp_path / f"c{suffix}", in_ra, in_dec, z, ra_unit, dec_unit)))
    # astropy: the unit conversion back to degrees; a unitless column is degrees
    np.testing.assert_allclose(cat.ra, ra[cat.row], rtol=1e-12)
    np.testing.assert_allclose(cat.dec, dec[cat.row], rtol=1e-12, atol=1e-12)


def test_fits_tunit_spellings_astropy_does_not_parse(tmp_path):
    ra, dec, z = positions()
    cols = [fits.Column(name="RA", format="D", unit="degrees", array=ra),
            fits.Column(name="DEC", format="D", unit="RADIANS", array=np.radians(dec)),
            fits.Column(name="Z", format="D", array=z)]
    path = tmp_path / "c.fits"
    fits.BinTableHDU.from_columns(cols).writeto(path)
    with pytest.warns(u.UnitsWarning):  # astropy's own note that it does not know the spelling
        cat = load_catalogue(config(path))
    np.testing.assert_allclose(cat.dec, dec[cat.row], rtol=1e-12)  # analytic: radians back to degrees


@pytest.mark.parametrize("suffix", [".fits", ".ecsv", ".parquet"])
def test_non_angle_unit_is_one_line_naming_file_and_column(tmp_path, suffix):
    ra, dec, z = positions()
    path = write(tmp_path / f"c{suffix}", ra, dec, z, "Mpc", None)
    with pytest.raises(CatalogueError, match=r"catalogue \S*c\.\w+: column 'RA' \(catalogue\.ra_column\) has unit "
                                             r"'Mpc', which is not an angle") as err:
        load_catalogue(config(path))
    assert err.value.key == "catalogue.ra_column" and "\n" not in str(err.value)


def test_declination_in_hour_angle_is_refused(tmp_path):
    ra, dec, z = positions()
    path = write(tmp_path / "c.ecsv", ra, (dec * u.deg).to_value(u.hourangle), z, None, "hourangle")
    with pytest.raises(CatalogueError, match=r"column 'DEC' \(catalogue\.dec_column\) has unit 'hourangle'"):
        load_catalogue(config(path))
