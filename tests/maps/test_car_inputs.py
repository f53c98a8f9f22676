"""Rectangular-pixel FITS images as inputs: reading (planes, frames, units, masks), bad headers as one
error line with exit 2, and a whole `pairvel run` on a CAR map."""

import json

import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from conftest import make_tiny_survey

from pairvel.cli import main
from pairvel.core.errors import MapError
from pairvel.maps.car import CarMap, box_wcs
from pairvel.maps.car_io import write_car_map
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.skymap import read_map, read_mask


def _image_file(path, image, header_updates=None, *, frame="C"):
    w, shape = box_wcs((12, 58), (-18, 23), 4.0, frame=frame)
    header = w.to_header()
    header["BUNIT"] = "uK_CMB"
    hdu = fits.PrimaryHDU(image if image is not None else np.zeros(shape, np.float32), header=header)
    for key, value in (header_updates or {}).items():
        if value is None:
            del hdu.header[key]
        else:
            hdu.header[key] = value
    hdu.writeto(path)
    return path, shape


def test_written_map_reads_back_on_the_same_grid_in_uk(tmp_path):
    w, shape = box_wcs((-20, 30), (-10, 20), 10.0)
    img = np.random.default_rng(0).normal(0, 100, shape).astype(np.float32)
    img[3, 4] = np.nan
    m = CarMap.from_image(img, w)
    back = read_map(write_car_map(tmp_path / "m.fits", m, unit="mK_CMB"))  # stored in mK, read into uK
    assert isinstance(back, CarMap) and back.same_grid(m) and back.values.dtype == np.float32
    assert np.allclose(back.values, m.values, equal_nan=True, rtol=1e-6)
    assert back.weight[3 * shape[1] + 4] == 0 and back.plane_note is None and back.coordsys == "C"


def test_the_temperature_plane_of_a_stokes_cube_is_taken_wherever_it_sits(tmp_path):
    w, shape = box_wcs((0, 10), (0, 10), 10.0)
    cube = np.stack([np.full(shape, v, np.float32) for v in (3.0, 2.0, 1.0)])  # U, Q, I
    hdu = fits.PrimaryHDU(cube, header=w.to_header())
    # STOKES value of plane k: CRVAL3 + CDELT3 (k + 1 - CRPIX3) = 3, 2, 1 (U, Q, I; Greisen & Calabretta 2002)
    hdu.header.update(CTYPE3="STOKES", CRVAL3=1.0, CRPIX3=3.0, CDELT3=-1.0, BUNIT="uK")
    hdu.writeto(tmp_path / "iqu.fits")
    m = read_map(tmp_path / "iqu.fits")
    assert np.all(m.values == 1.0) and m.plane_note == "Stokes I (plane 2 of 3 on axis 3)"
    assert np.all(read_map(tmp_path / "iqu.fits", field=2).values == 3.0)           # field 2 = Stokes U
    plain = fits.PrimaryHDU(cube, header=w.to_header())
    plain.header.update(CTYPE3="FREQ", BUNIT="uK")
    plain.writeto(tmp_path / "planes.fits")
    assert np.all(read_map(tmp_path / "planes.fits", field=1).values == 2.0)       # no STOKES axis: file order
    with pytest.raises(MapError, match="field must be in"):
        read_map(tmp_path / "planes.fits", field=3)


def test_galactic_image_and_mask(tmp_path):
    path, shape = _image_file(tmp_path / "g.fits", None, frame="G")
    m = read_map(path)
    assert m.coordsys == "G"
    mask = np.ones(shape, np.float32)
    mask[:10] = 0.0
    mpath, _ = _image_file(tmp_path / "mask.fits", mask, {"BUNIT": None}, frame="G")
    masked = m.with_mask(read_mask(mpath))
    assert masked.weight.reshape(shape)[:10].max() == 0 and masked.weight.reshape(shape)[10:].min() == 1
    with pytest.raises(MapError, match="has nside 64 but the map has CAR grid"):
        m.with_mask(HealpixMap(64, False, None, np.ones(12 * 64 ** 2)))


BAD_HEADERS = [
    ({"CTYPE1": "RA---TAN", "CTYPE2": "DEC--TAN"}, "is not cylindrical"),
    ({"CRVAL2": 30.0}, "not separable"),
    ({"CTYPE1": "PIXEL", "CTYPE2": "PIXEL"}, "no celestial WCS"),
    ({"RADESYS": "FK4"}, "RADESYS must be ICRS or FK5"),
    ({"BUNIT": "furlong"}, "furlong"),
    ({"BUNIT": None}, "names no unit"),
    ({"CDELT1": -3.0}, "cover more than 360 deg"),
]


@pytest.mark.parametrize("updates, text", BAD_HEADERS)
def test_bad_headers_are_one_error_line_and_exit_2(tmp_path, capsys, updates, text):
    make_tiny_survey(tmp_path)
    (tmp_path / "map.fits").unlink()
    _image_file(tmp_path / "map.fits", None, updates)
    assert main(["run", str(tmp_path / "run.toml"), "--out", str(tmp_path / "out"), "--quiet"]) == 2
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("pairvel: error:")]
    assert len(lines) == 1 and "map.fits" in lines[0] and text in lines[0], lines
    assert not (tmp_path / "out").exists()


@pytest.mark.filterwarnings("ignore:File may have been truncated")  # astropy, while the readers probe the file
def test_truncated_image_or_wrong_naxis_is_one_error(tmp_path):
    path, shape = _image_file(tmp_path / "m.fits", None)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(MapError, match="m.fits"):
        read_map(path)
    path, shape = _image_file(tmp_path / "n.fits", None)
    card = f"NAXIS2  = {shape[0]:>20d}".encode()
    assert card in path.read_bytes()
    path.write_bytes(path.read_bytes().replace(card, f"NAXIS2  = {shape[0] + 7:>20d}".encode()))
    with pytest.raises(MapError, match="n.fits") as err:
        read_map(path)
    assert "\n" not in str(err.value)


def test_a_run_on_a_car_map_goes_through(tmp_path):
    """The tiny survey (its first 250 tracers) with its map as a 4' CAR Stokes cube (I first), the tiny
    config with fewer shuffled nulls."""
    make_tiny_survey(tmp_path)
    cat = pd.read_csv(tmp_path / "cat.csv")
    cat.iloc[:250].to_csv(tmp_path / "cat.csv", index=False)
    (tmp_path / "map.fits").unlink()
    w, shape = box_wcs((12, 58), (-18, 23), 4.0)
    rng = np.random.default_rng(5)
    cube = np.stack([rng.normal(0, 30, shape), np.zeros(shape), np.zeros(shape)]).astype(np.float32)
    hdu = fits.PrimaryHDU(cube, header=w.to_header())
    hdu.header.update(CTYPE3="STOKES", CRVAL3=1.0, CRPIX3=1.0, CDELT3=1.0, BUNIT="uK_CMB")
    hdu.writeto(tmp_path / "map.fits")
    cfg = tmp_path / "run.toml"
    cfg.write_text(cfg.read_text().replace("n_random = 2", "n_random = 2\nn_shuffle = 4\nn_shuffle_z = 4"))
    assert main(["run", str(cfg), "--out", str(tmp_path / "out"), "--quiet"]) == 0
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["selection"]["used"] > 200
    assert "read Stokes I (plane 0 of 3 on axis 3)" in (tmp_path / "out" / "run.log").read_text()
