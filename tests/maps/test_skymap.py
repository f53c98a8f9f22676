"""HEALPix maps and masks: reading (full and partial sky, orderings, units), writing, and every error
a user can meet."""

import re

import healpy as hp
import numpy as np
import pytest
from astropy.io import fits

from pairvel.core.errors import MapError, OutputError, PairvelWarning
from pairvel.maps.healpix import HealpixMap
from pairvel.maps.healpix_io import read_map, read_mask, write_partial_map
from pairvel.maps.skymap import footprint_fraction, unit_to_uk


def table_file(path, values, *, ordering="RING", unit="K_CMB", nside=None, coordsys="C", pixels=None,
               extra=None, fmt="E"):
    """A HEALPix FITS table written by hand, so each header card can be left out or made wrong."""
    cols = [] if pixels is None else [fits.Column(name="PIXEL", format="K", array=np.asarray(pixels))]
    cols.append(fits.Column(name="TEMPERATURE", format=fmt, unit=unit, array=values))
    hdu = fits.BinTableHDU.from_columns(cols)
    hdu.header["PIXTYPE"] = "HEALPIX"
    for key, val in (("ORDERING", ordering), ("COORDSYS", coordsys)):
        if val is not None:
            hdu.header[key] = val
    hdu.header["NSIDE"] = nside or hp.npix2nside(values.size)
    hdu.header["INDXSCHM"] = "IMPLICIT" if pixels is None else "EXPLICIT"
    for key, val in (extra or {}).items():
        hdu.header[key] = val
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


def test_full_sky_k_cmb_is_converted_to_uk_and_float32_kept(tmp_path):
    v = np.random.default_rng(0).normal(0, 1e-4, 12 * 16**2).astype(np.float32)
    path = tmp_path / "m.fits"
    hp.write_map(path, v, column_units="K_CMB", dtype=np.float32, coord="C")  # 1024-element vector rows
    sm = read_map(path)
    assert sm.values.dtype == np.float32 and sm.nside == 16 and not sm.nest and sm.pixels is None
    np.testing.assert_allclose(sm.values, v * 1e6, rtol=1e-6)  # analytic: 1 K = 1e6 uK
    np.testing.assert_array_equal(sm.weight, 1.0)
    assert footprint_fraction(sm) == 1.0


@pytest.mark.parametrize("unit, factor", [("K_CMB", 1e6), ("K", 1e6), ("Kcmb", 1e6), ("mK_CMB", 1e3), ("mK", 1e3),
                                          ("uK_CMB", 1.0), ("uK", 1.0), ("muK", 1.0), ("microK", 1.0),
                                          ("\u00b5K_CMB", 1.0), (" uk_cmb ", 1.0)])
def test_unit_spellings(unit, factor):
    assert unit_to_uk(unit) == factor  # analytic: SI prefixes


@pytest.mark.parametrize("unit", ["", "y", "Mpc", "K_Planck", "counts"])
def test_unknown_units_refused(unit):
    with pytest.raises(MapError, match=r"unit must be a CMB temperature \(K_CMB, mK_CMB, uK_CMB\), a Rayleigh-Jeans"):
        unit_to_uk(unit)


@pytest.mark.parametrize("unit", ["K_RJ", "uK_RJ", "Jy/sr", "MJy/sr"])
def test_non_cmb_units_need_a_frequency(unit):
    with pytest.raises(MapError, match=r"is not a CMB temperature, so its conversion .* set map\.frequency_ghz"):
        unit_to_uk(unit)


def test_nested_ordering_from_header_matches_healpy(tmp_path):
    v = np.arange(12 * 8**2, dtype=np.float64)
    path = table_file(tmp_path / "n.fits", v, ordering="NESTED", unit="uK_CMB", fmt="D")
    sm = read_map(path)
    assert sm.nest and sm.nside == 8 and sm.values.dtype == np.float64
    # computed with healpy: the same file read by healpy.read_map, which converts to RING
    np.testing.assert_array_equal(sm.reordered(nest=False).values, hp.read_map(path))
    with pytest.warns(PairvelWarning, match="header ORDERING = NESTED overrides the ordering requested"):
        assert read_map(path, nest=False).nest


def test_partial_map_round_trip_through_us_and_healpy(tmp_path):
    nside = 2048  # a handful of pixels at nside 2048: nothing is expanded to the 50-million-pixel sphere
    pix = np.array([5, 100, 7, 3000, 40_000_000])
    vals = np.array([1.0, 2.0, 3.0, 4.0, 5.0], dtype=np.float32)
    path = tmp_path / "p.fits"
    write_partial_map(path, pix, vals, nside=nside, extra_header={"EXTNAME": "DEMO", "SEED": (7, "mock seed")})
    sm = read_map(path)
    assert sm.values.size == 5 and sm.values.dtype == np.float32 and sm.is_partial
    np.testing.assert_array_equal(sm.pixels, np.sort(pix))
    got, w = sm.lookup(np.array([7, 8, 40_000_000]))
    assert got[0] == 3.0 and got[2] == 5.0 and np.isnan(got[1]) and list(w) == [1, 0, 1]
    assert footprint_fraction(sm) == pytest.approx(5 / (12 * nside**2), rel=1e-12)  # analytic
    hdr = fits.getheader(path, 1)
    assert (hdr["OBJECT"], hdr["INDXSCHM"], hdr["FIRSTPIX"], hdr["LASTPIX"], hdr["SEED"]) == \
        ("PARTIAL", "EXPLICIT", 5, 40_000_000, 7)
    # computed with healpy's own partial-map reader (UNSEEN where no pixel is listed)
    small = tmp_path / "small.fits"
    write_partial_map(small, pix[:4], vals[:4], nside=64, nest=True)
    full = hp.read_map(small, partial=True, nest=True)
    np.testing.assert_array_equal(full[pix[:4]], vals[:4])
    assert np.sum(full != hp.UNSEEN) == 4
    with pytest.raises(OutputError, match=r"map file .*p\.fits exists already; pairvel does not overwrite it"):
        write_partial_map(path, pix, vals, nside=nside)
    with pytest.raises(MapError, match="may not set the HEALPix structure key 'NSIDE'"):
        write_partial_map(tmp_path / "q.fits", pix, vals, nside=nside, extra_header={"NSIDE": 4})
    with pytest.raises(MapError, match=r"pixel indices must be unique; 1 repeat \(first: pixel 5\)"):
        write_partial_map(tmp_path / "r.fits", [5, 5], [1.0, 2.0], nside=64)


def test_unsorted_explicit_table_is_sorted_and_unseen_masked(tmp_path):
    vals = np.array([3.0, hp.UNSEEN, 1.0, np.nan], dtype=np.float32)
    path = table_file(tmp_path / "u.fits", vals, pixels=[30, 20, 10, 5], nside=4, unit="mK")
    sm = read_map(path)
    np.testing.assert_array_equal(sm.pixels, [5, 10, 20, 30])
    np.testing.assert_array_equal(sm.weight, [0, 1, 0, 1])  # NaN and UNSEEN are masked
    assert sm.values[1] == pytest.approx(1000.0) and sm.values[3] == pytest.approx(3000.0)  # analytic: mK -> uK
    assert sm.values[2] == hp.UNSEEN  # still recognisable after the unit conversion
    with pytest.raises(MapError, match=r"every pixel is UNSEEN or NaN"):
        read_map(table_file(tmp_path / "all.fits", np.full(12 * 4**2, hp.UNSEEN, np.float32)))


def test_header_errors_name_the_file(tmp_path):
    v = np.zeros(12 * 16**2, dtype=np.float32)
    with pytest.raises(MapError, match=r"map .*noord\.fits has no ORDERING keyword; set map\.ordering to RING or NESTED"):
        read_map(table_file(tmp_path / "noord.fits", v, ordering=None))
    assert read_map(tmp_path / "noord.fits", nest=True).nest
    with pytest.raises(MapError, match=r"jy\.fits unit must be a CMB temperature \(K_CMB.*; got 'Jy/Mpc'"):
        read_map(table_file(tmp_path / "jy.fits", v, unit="Jy/Mpc"))
    with pytest.raises(MapError, match=r"nounit\.fits names no unit .*; set map\.unit in the config"):
        read_map(table_file(tmp_path / "nounit.fits", v, unit=None))
    assert read_map(tmp_path / "nounit.fits", unit="mK_CMB").values.dtype == np.float32
    with pytest.warns(PairvelWarning, match=r"the file says unit 'K_CMB' but 'uK_CMB' was requested; using 'uK_CMB'"):
        read_map(table_file(tmp_path / "k.fits", v + 2.0), unit="uK_CMB")
    hdr_unit = table_file(tmp_path / "bunit.fits", v + 2.0, unit=None, extra={"BUNIT": "mK_CMB"})
    np.testing.assert_allclose(read_map(hdr_unit).values, 2000.0)  # analytic: mK -> uK
    with pytest.raises(MapError, match=r"badn\.fits: a full-sky map at NSIDE = 32 must have 12288 pixels; the file has 3072"):
        read_map(table_file(tmp_path / "badn.fits", v, nside=32))
    with pytest.raises(MapError, match=r"pow\.fits: NSIDE must be a power of 2 between 1 and 2\^29; got 12"):
        read_map(table_file(tmp_path / "pow.fits", np.zeros(12 * 144, np.float32), nside=12))
    assert read_map(table_file(tmp_path / "gal.fits", v, coordsys="G")).coordsys == "G"
    assert read_map(table_file(tmp_path / "ecl.fits", v, coordsys="ECLIPTIC")).coordsys == "E"
    with pytest.raises(MapError, match=r"odd\.fits: COORDSYS must be C \(equatorial\), G \(Galactic\) or E \(ecliptic\); got 'X'"):
        read_map(table_file(tmp_path / "odd.fits", v, coordsys="X"))
    with pytest.warns(PairvelWarning, match="has no COORDSYS keyword; assuming equatorial"):
        read_map(table_file(tmp_path / "nocoord.fits", v, coordsys=None))
    with pytest.raises(MapError, match=r"field must be in \[0, 0\] \(columns \['TEMPERATURE'\]\); got 2"):
        read_map(tmp_path / "k.fits", field=2)


def test_unreadable_and_non_healpix_files(tmp_path):
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"not a fits file " * 200)
    with pytest.raises(MapError, match=r"map .*junk\.fits cannot be read as FITS"):
        read_map(junk)
    with pytest.raises(MapError, match=r"map .*absent\.fits cannot be read: no such file"):
        read_map(tmp_path / "absent.fits")
    img = tmp_path / "image.fits"
    fits.HDUList([fits.PrimaryHDU(np.zeros((4, 4)))]).writeto(img)
    with pytest.raises(MapError, match=r"image\.fits is not a HEALPix FITS map: it has no binary table extension"):
        read_map(img)
    tab = tmp_path / "table.fits"
    fits.BinTableHDU.from_columns([fits.Column(name="RA", format="D", array=np.zeros(3))]).writeto(tab)
    with pytest.raises(MapError, match=r"table\.fits is not a HEALPix FITS map: its table has neither PIXTYPE"):
        read_map(tab)


def test_mask_nside_mismatch_orderings_and_application(tmp_path):
    nside = 16
    v = np.random.default_rng(1).normal(size=12 * nside**2).astype(np.float32)
    sm = read_map(table_file(tmp_path / "m.fits", v, unit="uK"))
    wrong = table_file(tmp_path / "mask8.fits", np.ones(12 * 8**2, np.float32), unit=None)
    expected = f"mask {wrong} has nside 8 but the map has nside 16"
    with pytest.raises(MapError, match=re.escape(expected)):
        read_mask(wrong, nside=16)
    noord = table_file(tmp_path / "mask_noord.fits", np.ones(12 * nside**2, np.float32), unit=None, ordering=None)
    with pytest.raises(MapError, match=r"mask .*mask_noord\.fits has no ORDERING keyword; add ORDERING"):
        read_mask(noord, nside=nside)
    assert read_mask(noord, nside=nside, nest=False).weight.sum() == 12 * nside**2
    # a NESTED mask on a RING map: zero the NESTED pixels 0..99
    mvals = np.ones(12 * nside**2, np.float32)
    mvals[:100] = 0
    mask = read_mask(table_file(tmp_path / "mask.fits", mvals, unit=None, ordering="NESTED"), nside=nside)
    masked = sm.with_mask(mask)
    ring_of_masked = hp.nest2ring(nside, np.arange(100))
    assert masked.weight[ring_of_masked].sum() == 0 and masked.weight.sum() == 12 * nside**2 - 100
    assert masked.values is sm.values  # the values are shared, not copied
    assert footprint_fraction(masked) == pytest.approx(1 - 100 / (12 * nside**2), rel=1e-12)  # analytic
    # a partial mask: pixels it does not list are masked
    pmask = tmp_path / "pmask.fits"
    write_partial_map(pmask, np.arange(50), np.ones(50), nside=nside, unit="uK")
    assert sm.with_mask(read_mask(pmask, nside=nside)).weight.sum() == 50
    with pytest.raises(MapError, match=r"mask .*bad\.fits must hold values in \[0, 1\]; 1 pixels do not \(first: pixel 3, value 2\)"):
        mv = np.ones(12 * nside**2, np.float32)
        mv[3] = 2.0
        read_mask(table_file(tmp_path / "bad.fits", mv, unit=None), nside=nside)


def test_skymap_validation_and_partial_lookup():
    with pytest.raises(MapError, match=r"nside must be a power of 2 between 1 and 2\^29; got 3"):
        HealpixMap(3, False, None, np.zeros(108))
    with pytest.raises(MapError, match=r"a full-sky map at nside 4 must have 192 values; got 10"):
        HealpixMap(4, False, None, np.zeros(10))
    with pytest.raises(MapError, match=r"pixels must be sorted, unique and in \[0, 192\)"):
        HealpixMap(4, False, np.array([3, 1]), np.zeros(2))
    with pytest.raises(MapError, match=r"weight must lie in \[0, 1\]; 1 pixels do not \(first: index 1, weight=2.0\)"):
        HealpixMap(4, False, np.array([1, 3]), np.zeros(2), np.array([1.0, 2.0]))
    sm = HealpixMap(4, False, np.array([1, 3, 190]), np.array([1.0, np.nan, 3.0]))
    vals, w = sm.lookup([0, 1, 3, 190, 191])
    np.testing.assert_array_equal(w, [0, 1, 0, 1, 0])
    assert vals[1] == 1.0 and vals[3] == 3.0
    np.testing.assert_array_equal(sm.usable_pixels(), [1, 190])
    back = sm.reordered(nest=True).reordered(nest=False)
    np.testing.assert_array_equal(back.pixels, sm.pixels)
    np.testing.assert_array_equal(back.weight, sm.weight)
