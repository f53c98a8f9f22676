"""Map units to uK_CMB: Rayleigh-Jeans and surface-brightness units at one frequency and over a
bandpass, frequencies from headers and config, and the errors a user can meet."""

import healpy as hp
import numpy as np
import pytest
import astropy.units as u
from astropy.io import fits
from astropy.table import Table
from scipy import constants as sc
from scipy.integrate import quad

from pairvel.core.constants import T_CMB_K
from pairvel.core.errors import ConfigError, MapError, PairvelWarning
from pairvel.maps.healpix_io import read_map
from pairvel.maps.units import Bandpass, parse_map_unit, read_bandpass, unit_to_uk

FREQS_GHZ = [30.0, 90.0, 150.0, 220.0, 353.0, 545.0]


def planck_derivative_mjy_sr(nu_ghz, t_k=T_CMB_K):
    """dB_nu/dT at T (MJy/sr per K), written out: 2 k nu^2 / c^2 * x^2 e^x / (e^x - 1)^2, x = h nu / (k T)."""
    nu = nu_ghz * 1e9
    x = sc.h * nu / (sc.k * t_k)
    return 2 * sc.k * nu**2 / sc.c**2 * x**2 * np.exp(x) / np.expm1(x) ** 2 / 1e-20  # W m^-2 Hz^-1 sr^-1 -> MJy/sr


@pytest.mark.parametrize("nu", FREQS_GHZ)
def test_brightness_factor_matches_astropy(nu):
    expected = (1 * u.MJy / u.sr).to_value(u.uK, equivalencies=u.thermodynamic_temperature(nu * u.GHz, T_CMB_K * u.K))
    assert unit_to_uk("MJy/sr", frequency_ghz=nu) == pytest.approx(expected, rel=1e-12)  # astropy equivalency
    assert unit_to_uk("Jy/sr", frequency_ghz=nu) == pytest.approx(expected * 1e-6, rel=1e-12)  # SI prefix


@pytest.mark.parametrize("nu", FREQS_GHZ)
def test_rayleigh_jeans_factor_matches_astropy_and_the_planck_law(nu):
    via_mjy = (1 * u.K).to(u.MJy / u.sr, equivalencies=u.brightness_temperature(nu * u.GHz))
    expected = via_mjy.to_value(u.uK, equivalencies=u.thermodynamic_temperature(nu * u.GHz, T_CMB_K * u.K))
    assert unit_to_uk("K_RJ", frequency_ghz=nu) == pytest.approx(expected, rel=1e-12)  # astropy equivalencies
    x = sc.h * nu * 1e9 / (sc.k * T_CMB_K)
    # analytic: dT_CMB / dT_RJ = (e^x - 1)^2 / (x^2 e^x)
    assert unit_to_uk("uK_RJ", frequency_ghz=nu) == pytest.approx(np.expm1(x) ** 2 / (x**2 * np.exp(x)), rel=1e-9)
    assert unit_to_uk("mK_RJ", frequency_ghz=nu) == pytest.approx(1e3 * unit_to_uk("uK_RJ", frequency_ghz=nu),
                                                                  rel=1e-12)  # SI prefix


def test_worked_value_one_mjy_per_sr_at_150_ghz():
    # computed with astropy 8.0.2 (thermodynamic_temperature at 150 GHz) and T_CMB = 2.72548 K
    # (pairvel.core.constants, Fixsen 2009): 1 MJy/sr = 2509.55 uK_CMB
    assert unit_to_uk("MJy/sr", frequency_ghz=150.0) == pytest.approx(2509.5502, rel=1e-7)
    # the same from the Planck law written out with scipy.constants (h, k, c exact in SI)
    assert unit_to_uk("MJy/sr", frequency_ghz=150.0) == pytest.approx(1e-6 / planck_derivative_mjy_sr(150.0) * 1e12,
                                                                      rel=1e-9)


def test_rayleigh_jeans_tends_to_cmb_at_low_frequency():
    # analytic: dT_CMB/dT_RJ = 1 + x^2/12 + O(x^4) as x = h nu / k T -> 0
    x = sc.h * 1e9 / (sc.k * T_CMB_K)
    assert unit_to_uk("uK_RJ", frequency_ghz=1.0) == pytest.approx(1.0 + x**2 / 12, rel=1e-8)
    assert unit_to_uk("uK_RJ", frequency_ghz=1.0) == pytest.approx(1.0, abs=3e-5)


@pytest.mark.parametrize("unit", ["MJy/sr", "K_RJ"])
def test_delta_like_band_reproduces_the_single_frequency_factor(unit):
    nu = np.linspace(149.999, 150.001, 5)
    band = Bandpass(nu, np.ones_like(nu))
    # analytic: a band 2 MHz wide changes the ratio at order (width / nu)^2 ~ 1e-10
    assert unit_to_uk(unit, bandpass=band) == pytest.approx(unit_to_uk(unit, frequency_ghz=150.0), rel=1e-8)


def test_top_hat_band_matches_a_direct_integral():
    nu = np.linspace(130.0, 170.0, 4001)
    band = Bandpass(nu, np.ones_like(nu))
    # numerical (scipy.integrate.quad of the Planck derivative): F = int 1 MJy/sr dnu / int dB/dT dnu
    den_per_k, _ = quad(planck_derivative_mjy_sr, 130.0, 170.0, epsabs=0, epsrel=1e-12)
    expected_mjy = 40.0 / den_per_k * 1e6
    assert unit_to_uk("MJy/sr", bandpass=band) == pytest.approx(expected_mjy, rel=1e-7)
    rj, _ = quad(lambda f: 2 * sc.k * (f * 1e9) ** 2 / sc.c**2 / 1e-20, 130.0, 170.0, epsrel=1e-12)
    assert unit_to_uk("K_RJ", bandpass=band) == pytest.approx(rj / den_per_k * 1e6, rel=1e-7)  # same, for K_RJ
    # the band-weighted factor is not the one at the band centre (dB/dT curves across 40 GHz) [analytic]
    assert unit_to_uk("MJy/sr", bandpass=band) != pytest.approx(unit_to_uk("MJy/sr", frequency_ghz=150.0), rel=1e-4)


def test_bandpass_tables_text_and_ecsv_agree(tmp_path):
    nu = np.linspace(120.0, 180.0, 61)
    tau = np.exp(-0.5 * ((nu - 150.0) / 12.0) ** 2)
    text = tmp_path / "band.txt"
    np.savetxt(text, np.column_stack([nu, tau]), header="nu_ghz transmission")
    ecsv = tmp_path / "band.ecsv"
    Table({"nu": nu * 1e3 * u.MHz, "transmission": tau}).write(ecsv)
    a, b = read_bandpass(text), read_bandpass(ecsv)
    np.testing.assert_allclose(b.nu_ghz, nu, rtol=1e-12)  # MHz converted to GHz [analytic]
    assert unit_to_uk("MJy/sr", bandpass=a) == pytest.approx(unit_to_uk("MJy/sr", bandpass=b), rel=1e-12)


@pytest.mark.parametrize("rows, message", [
    ("150 1\n140 1\n", r"frequencies must increase strictly; row 1 \(140 GHz\)"),
    ("140 1\n150 -0.5\n", r"transmissions must be finite and >= 0; row 1 has -0.5"),
    ("140 0\n150 0\n", "the transmission is zero over the whole band"),
    ("140 1 3\n150 1 3\n", "rows must hold 2 numbers"),
    ("150 1\n", "must have at least 2 rows; got 1"),
    ("0 1\n150 1\n", r"frequencies must be finite and > 0 GHz; row 0"),
])
def test_bad_bandpass_tables(tmp_path, rows, message):
    path = tmp_path / "band.txt"
    path.write_text(rows)
    with pytest.raises(MapError, match=rf"bandpass \S*band\.txt.*{message}"):
        read_bandpass(path)


def healpix_file(path, values, *, unit, header=None):
    hdu = fits.BinTableHDU.from_columns([fits.Column(name="I", format="E", unit=unit, array=values)])
    hdu.header.update({"PIXTYPE": "HEALPIX", "ORDERING": "RING", "COORDSYS": "C", "NSIDE": hp.npix2nside(values.size),
                       "INDXSCHM": "IMPLICIT", **(header or {})})
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


@pytest.mark.parametrize("card, value", [("FREQ", 150.0), ("FREQ", "150 GHz"), ("FREQ", "1.5e11 Hz"),
                                         ("RESTFRQ", 1.5e11)])
def test_header_frequency_converts_a_brightness_map(tmp_path, card, value):
    v = np.random.default_rng(1).normal(0.0, 0.04, 12 * 8**2).astype(np.float32)  # MJy/sr
    sm = read_map(healpix_file(tmp_path / "m.fits", v, unit="MJy/sr", header={card: value}))
    # astropy via unit_to_uk, checked above against astropy's equivalency directly
    np.testing.assert_allclose(sm.values, v * unit_to_uk("MJy/sr", frequency_ghz=150.0), rtol=1e-6)


def test_config_frequency_wins_over_the_header_with_a_warning(tmp_path):
    v = np.random.default_rng(2).normal(0.0, 1e-5, 12 * 8**2).astype(np.float32)  # K_RJ
    path = healpix_file(tmp_path / "m.fits", v, unit="K_RJ", header={"FREQ": 90.0})
    with pytest.warns(PairvelWarning, match="header gives frequency 90 GHz but the config gives 150 GHz"):
        sm = read_map(path, frequency_ghz=150.0)
    np.testing.assert_allclose(sm.values, v * unit_to_uk("K_RJ", frequency_ghz=150.0), rtol=1e-6)  # astropy
    band = tmp_path / "band.txt"
    band.write_text("149.999 1\n150.001 1\n")
    sm_band = read_map(path, bandpass_path=band)  # a bandpass replaces the header's frequency
    np.testing.assert_allclose(sm_band.values, sm.values, rtol=1e-6)  # analytic: a delta-like band


def test_brightness_map_without_frequency_names_file_and_key(tmp_path):
    path = healpix_file(tmp_path / "m.fits", np.zeros(12 * 8**2, np.float32), unit="Jy/sr")
    with pytest.raises(MapError, match=r"map \S*m\.fits unit 'Jy/sr' is not a CMB temperature.*map\.frequency_ghz") as err:
        read_map(path)
    assert err.value.key == "map.frequency_ghz" and err.value.path.endswith("m.fits")
    assert "\n" not in str(err.value)


def test_bad_frequency_card(tmp_path):
    path = healpix_file(tmp_path / "m.fits", np.zeros(12 * 8**2, np.float32), unit="MJy/sr", header={"FREQ": "3 Mpc"})
    with pytest.raises(MapError, match=r"header FREQ must be a frequency .*got '3 Mpc'"):
        read_map(path)
    # a CMB-temperature map needs no frequency, so its cards are not read, and a bandpass is not used
    cmb = healpix_file(tmp_path / "c.fits", np.ones(12 * 8**2, np.float32), unit="uK_CMB", header={"FREQ": "3 Mpc"})
    assert read_map(cmb).values[0] == 1.0  # analytic: uK_CMB as is
    with pytest.warns(PairvelWarning, match=r"bandpass \S*band\.txt is not used: unit 'uK_CMB' is a CMB temperature"):
        read_map(cmb, bandpass_path=tmp_path / "band.txt")


def test_unit_kinds():
    assert [parse_map_unit(s).kind for s in ("uK", "K_CMB", "mK_RJ", "uK(RJ)", "MJy sr-1", "Jy/sr")] == \
        ["cmb", "cmb", "rj", "rj", "brightness", "brightness"]


RUN = {"catalogue": {"path": "c.fits"}, "theory": {"bias": 2.0}}


def test_each_frequency_map_is_converted_at_its_own_frequency(tmp_path):
    from pairvel.input.config import config_from_dict
    from pairvel.maps.multifreq import _read_each

    v = np.random.default_rng(3).normal(0.0, 3e-5, 12 * 8**2).astype(np.float32)  # K_RJ
    paths = [str(healpix_file(tmp_path / f"m{nu}.fits", v, unit="K_RJ")) for nu in (90, 150)]
    cfg = config_from_dict({**RUN, "multifrequency": {"map_paths": paths, "frequencies_ghz": [90.0, 150.0]}},
                           source=tmp_path / "run.toml")
    maps = _read_each(cfg)
    for m, nu in zip(maps, (90.0, 150.0)):  # astropy via unit_to_uk, checked above
        np.testing.assert_allclose(m.values, v * unit_to_uk("K_RJ", frequency_ghz=nu), rtol=1e-6)
    for nu in (90, 150):  # delta-like bands at the same frequencies give the same maps [analytic]
        (tmp_path / f"band{nu}.txt").write_text(f"{nu - 1e-3} 1\n{nu + 1e-3} 1\n")
    banded = config_from_dict({**RUN, "multifrequency": {
        "map_paths": paths, "frequencies_ghz": [30.0, 30.0], "combination": "minimum_variance",
        "bandpass_paths": ["band90.txt", "band150.txt"]}}, source=tmp_path / "run.toml")
    for m, again in zip(_read_each(banded), maps):
        np.testing.assert_allclose(m.values, again.values, rtol=1e-6)
    with pytest.raises(ConfigError, match=r"'multifrequency\.bandpass_paths' must have one value per map .* got 1"):
        config_from_dict({**RUN, "multifrequency": {"map_paths": paths, "frequencies_ghz": [90.0, 150.0],
                                                                "bandpass_paths": ["band90.txt"]}})
