"""`make_mock_survey(pixels="car")`: the mock's sky as a plate-carree FITS image."""

import json
import math

import numpy as np
import pytest
from astropy.io import fits
from astropy.table import Table
from astropy.wcs import WCS

from pairvel.core.constants import ARCMIN_RAD, T_CMB_UK
from pairvel.core.errors import InputError
from pairvel.maps.car import CarMap
from pairvel.sims.mock import make_mock_survey
from pairvel.sims.mock_car import check_car_options


@pytest.mark.parametrize("pixels,arcmin,match", [("hexagons", 1.0, "'pixels' must be one of healpix, car"),
                                                 ("car", 0.7, "whole number of columns"),
                                                 ("car", 0.0, "'car_arcmin' must be"),
                                                 ("car", True, "'car_arcmin' must be")])
def test_car_options_are_checked(pixels, arcmin, match):
    with pytest.raises(InputError, match=match):
        check_car_options(pixels, arcmin)


def test_car_mock_holds_the_painted_sources(tmp_path):
    # CMB and noise off: the image is the beam-shaped kSZ and tSZ sources alone
    out = tmp_path / "car"
    truth = make_mock_survey(out, n_tracers=300, nside=256, ra_min=0.0, ra_max=6.0, dec_min=-3.0, dec_max=3.0,
                             z_min=0.2, z_max=0.4, include_cmb=False, noise_uk_arcmin=0.0,
                             electron_temperature_kev=5.0, pixels="car", car_arcmin=1.0, seed=11)
    assert truth.files["map"] == "skerry_150ghz_car.fits"
    record = json.loads((out / "truth.json").read_text())
    assert record["options"]["pixels"] == "car" and record["options"]["car_arcmin"] == 1.0
    assert "skerry_150ghz_car.fits" in (out / "run.toml").read_text()

    with fits.open(out / "skerry_150ghz_car.fits") as hdul:
        header, image = hdul[0].header, hdul[0].data.astype(np.float64)
    assert (header["CTYPE1"], header["CTYPE2"], header["BUNIT"]) == ("RA---CAR", "DEC--CAR", "uK_CMB")
    assert abs(header["CDELT1"]) == pytest.approx(1.0 / 60.0, rel=1e-12)
    sky = CarMap.from_image(image, WCS(header))
    lon, lat = sky.pixel_lonlat(np.arange(sky.n_held))
    # the footprint plus its 1-degree margin lies on the image
    assert lat.min() < -3.9 and lat.max() > 3.9
    assert np.mod(lon + 180.0, 360.0).min() < 180.0 - 0.9 and np.mod(lon + 180.0, 360.0).max() > 186.0 + 0.9

    # analytic: each source's pixel sum times the pixel solid angle is its integral (dT_ksz + f T_CMB y)
    # pi theta_ap^2, to the point-sampling error of a 1.4-arcmin beam on 1-arcmin pixels (well below 1e-3)
    per = Table.read(out / "tracer_truth.fits")
    f150 = -0.95333  # x coth(x/2) - 4 at 150 GHz (Carlstrom et al. 2002), as the mock uses
    want = np.sum(per["dt_ksz_uk"] + f150 * T_CMB_UK * per["y"]) * math.pi * (2.1 * ARCMIN_RAD) ** 2
    area = sky.grid.row_area_sr[np.arange(sky.n_held) // sky.grid.nx]
    assert float(np.sum(sky.values * area)) == pytest.approx(want, rel=1e-3)
    # the ideal aperture returns dT up to the beam's spill beyond the disc, 0.996 [analytic, mock docstring],
    # and the pixelisation of a 2.1-arcmin disc on 1-arcmin pixels (a few per cent)
    assert truth.aperture_response == pytest.approx(0.996, abs=0.04)


def test_cli_refuses_a_car_pixel_that_does_not_divide_360_degrees(tmp_path, capsys):
    from pairvel.cli import main

    assert main(["mock", str(tmp_path / "m"), "--pixels", "car", "--car-arcmin", "0.7"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'car_arcmin' must be a pixel size" in err[0] and "got 0.7" in err[0]
    assert not (tmp_path / "m").exists()
