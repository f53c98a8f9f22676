"""Reading HEALPix maps and masks: orderings, partial sky, units and every error a user can meet."""

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits

from pairvel.errors import MapError, OutputError, PairvelWarning
from pairvel.skymap import read_map, read_mask, write_partial_map


def full_map_file(path, values, *, ordering="RING", unit="K_CMB", nside=None):
    cols = [fits.Column(name="TEMPERATURE", format="E", unit=unit, array=values)]
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    if ordering:
        hdu.header["ORDERING"] = ordering
    hdu.header["NSIDE"] = nside or hp.npix2nside(values.size)
    hdu.header["INDXSCHM"] = "IMPLICIT"
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


def test_units_converted_to_uk_and_float32_kept(tmp_path):
    v = np.random.default_rng(0).normal(0, 1e-4, 12 * 16**2).astype(np.float32)  # K_CMB
    sm = read_map(full_map_file(tmp_path / "m.fits", v))
    assert sm.values.dtype == np.float32
    np.testing.assert_allclose(sm.values, v * 1e6, rtol=1e-6)  # analytic: 1 K = 1e6 uK


def test_nested_header_and_healpy_roundtrip(tmp_path):
    v = np.arange(12 * 8**2, dtype=np.float64)
    sm = read_map(full_map_file(tmp_path / "n.fits", v, ordering="NESTED", unit="uK_CMB"))
    assert sm.nest and sm.nside == 8
    # computed with healpy: the same file read by healpy and reordered
    np.testing.assert_allclose(hp.reorder(sm.values, n2r=True), hp.read_map(tmp_path / "n.fits"), rtol=0)


def test_partial_map_written_is_read_by_healpy_and_by_us(tmp_path):
    nside = 64
    pix = np.array([5, 100, 7, 3000])
    vals = np.array([1.0, 2.0, 3.0, 4.0], dtype=np.float32)
    path = tmp_path / "p.fits"
    write_partial_map(path, pix, vals, nside=nside)
    sm = read_map(path)
    np.testing.assert_array_equal(sm.pixels, np.sort(pix))
    got, w = sm.lookup(np.array([7, 8, 3000]))
    assert got[0] == 3.0 and w[1] == 0 and got[2] == 4.0
    full = hp.read_map(path, partial=True)  # computed with healpy's partial-map reader
    np.testing.assert_allclose(full[pix], vals)
    with pytest.raises(OutputError, match="refusing to overwrite"):
        write_partial_map(path, pix, vals, nside=nside)


def test_errors_name_the_file(tmp_path):
    v = np.zeros(12 * 16**2, dtype=np.float32)
    with pytest.raises(MapError, match=r"nohdr\.fits: header has no ORDERING"):
        read_map(full_map_file(tmp_path / "nohdr.fits", v, ordering=None))
    assert read_map(tmp_path / "nohdr.fits", nest=False).nside == 16
    with pytest.raises(MapError, match=r"unit 'Jy/sr' is not a CMB temperature unit"):
        read_map(full_map_file(tmp_path / "jy.fits", v, unit="Jy/sr"))
    with pytest.raises(MapError, match=r"nounit\.fits: no unit in the header; set map\.unit"):
        read_map(full_map_file(tmp_path / "nounit.fits", v, unit=None))
    assert read_map(tmp_path / "nounit.fits", unit="mK_CMB").values.dtype == np.float32
    bad = tmp_path / "junk.fits"
    bad.write_bytes(b"not fits" * 100)
    with pytest.raises(MapError, match=r"junk\.fits: cannot be read as FITS"):
        read_map(bad)
    with pytest.raises(MapError, match=r"absent\.fits: file not found"):
        read_map(tmp_path / "absent.fits")
    img = tmp_path / "image.fits"
    fits.HDUList([fits.PrimaryHDU(np.zeros((4, 4)))]).writeto(img)
    with pytest.raises(MapError, match=r"image\.fits: no HEALPix binary table"):
        read_map(img)
    with pytest.raises(MapError, match=r"badn\.fits: 3072 pixels do not match NSIDE 32"):
        read_map(full_map_file(tmp_path / "badn.fits", v, nside=32))
    with pytest.warns(PairvelWarning, match="differs from map.unit"):
        read_map(full_map_file(tmp_path / "k.fits", v), unit="uK_CMB")


def test_mask_nside_mismatch_and_application(tmp_path):
    v = np.random.default_rng(1).normal(size=12 * 16**2).astype(np.float32)
    sm = read_map(full_map_file(tmp_path / "m.fits", v, unit="uK"))
    with pytest.raises(MapError, match=r"mask .*mask8\.fits has nside 8 but the map has nside 16"):
        read_mask(full_map_file(tmp_path / "mask8.fits", np.ones(12 * 64, np.float32), unit=None), nside=16)
    mvals = np.ones(12 * 16**2, np.float32)
    mvals[:100] = 0
    masked = sm.with_mask(read_mask(full_map_file(tmp_path / "mask.fits", mvals, unit=None), nside=16))
    assert masked.weight[:100].sum() == 0 and masked.weight[100:].min() == 1


def test_all_unseen_map_is_an_error(tmp_path):
    v = np.full(12 * 16**2, hp.UNSEEN, dtype=np.float32)
    with pytest.raises(MapError, match="every pixel is UNSEEN or NaN"):
        read_map(full_map_file(tmp_path / "u.fits", v))
