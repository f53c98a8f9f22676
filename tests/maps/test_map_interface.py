"""The sky-map interface: the stages use nothing else, and give the numbers they gave before it existed.

Three checks: the stage modules' source (read with ``ast``) names no healpy, ducc0 or HEALPix
attribute; the stages run unchanged on a second implementation that only forwards the interface's
methods; and their outputs match a regression file recorded before the interface.

``healpix_regression.npz`` holds the outputs of the map stages (photometry with every pixel weighting
and method, random apertures, monopole/dipole removal, pre-filter, simulated skies, rotated nulls,
several-frequency combination) on small invented maps, recorded with the code before the stages
talked to the map through :class:`~pairvel.maps.skymap.SkyMap` (commit f063bce): internal
regression.  :func:`regression_cases` builds them from a map constructor, so the same function
recorded the file (``python tests/maps/test_map_interface.py record``, run on that commit) and checks it.
"""

import ast
import sys
import warnings
from pathlib import Path

import healpy as hp
import numpy as np
import pytest

from pairvel.input.config import PrefilterConfig
from pairvel.maps.multifreq import combine_maps, pixel_difference_covariance
from pairvel.maps.photometry import measure_apertures, measure_random_apertures
from pairvel.maps.prefilter import apply_prefilter
from pairvel.maps.skymap import SkyMap, footprint_fraction, remove_monopole_dipole
from pairvel.stats.nulltests import rotated_sets
from pairvel.stats.simcov import simulate_aperture_temperatures

REGRESSION_FILE = Path(__file__).with_name("healpix_regression.npz")
PACKAGE = Path(__file__).resolve().parents[2] / "pairvel"

# ---------------------------------------------------------------------- the stages name no pixelisation
# The modules that must work for any pixelisation: photometry, pre-filter, several frequencies, the
# interface itself (with the monopole/dipole removal), simulated skies and null tests.
STAGE_MODULES = ["maps/photometry.py", "maps/prefilter.py", "maps/multifreq.py", "maps/skymap.py", "maps/harmonics.py",
                 "stats/simcov.py", "stats/nulltests.py"]
# what belongs to the HEALPix implementation (and harmonic transforms to each implementation)
PIXELISATION_MODULES = ("healpy", "ducc0", "pairvel.maps.healpix", "pairvel.maps.healpix_io",
                        "pairvel.maps._aperture_kernels", "pairvel.maps.sources")
HEALPIX_ATTRIBUTES = {"nside", "nest", "pixels", "npix", "held_pixels", "usable_pixels", "lookup", "reordered",
                      "from_array", "is_partial", "n_held"}
# an integer nside passed to simulate_aperture_temperatures names the HEALPix grid (the pipeline's call)
ALLOWED = {("pairvel.stats.simcov", "pairvel.maps.healpix")}


def _imported(node, module: str) -> list[str]:
    """Absolute names of the modules an import statement reads."""
    if isinstance(node, ast.Import):
        return [a.name for a in node.names]
    if node.level:
        base = module.split(".")[: -node.level]
        target = ".".join(base + ([node.module] if node.module else []))
    else:
        target = node.module or ""
    return [f"{target}.{a.name}" for a in node.names] + [target]


def pixelisation_uses(source: str, module: str) -> list[str]:
    """(line: what) for each import of a pixelisation module and each HEALPix attribute in ``source``."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            for name in _imported(node, module):
                hit = next((p for p in PIXELISATION_MODULES if name == p or name.startswith(p + ".")), None)
                if hit and (module, hit) not in ALLOWED:
                    found.append(f"{module} line {node.lineno} imports {name}")
        elif isinstance(node, ast.Attribute) and node.attr in HEALPIX_ATTRIBUTES:
            found.append(f"{module} line {node.lineno} reads .{node.attr}")
    return sorted(set(found))


@pytest.mark.parametrize("relpath", STAGE_MODULES)
def test_stage_talks_to_the_map_only_through_the_interface(relpath):
    path = PACKAGE / relpath
    module = "pairvel." + relpath[:-3].replace("/", ".")
    found = pixelisation_uses(path.read_text(), module)
    assert not found, "\n".join(found)


@pytest.mark.parametrize("source, module", [
    ("import healpy as hp", "pairvel.maps.photometry"),
    ("def f(m):\n    return m.nside", "pairvel.maps.prefilter"),
    ("from .healpix import HealpixMap", "pairvel.maps.multifreq"),
    ("from ..maps import _aperture_kernels", "pairvel.stats.nulltests"),
    ("import ducc0.sht", "pairvel.maps.skymap"),
    ("from ..maps.healpix_io import read_mask", "pairvel.stats.simcov"),
])
def test_checker_reports_a_pixelisation_use(source, module):
    assert pixelisation_uses(source, module)


# ---------------------------------------------------------------------- a second implementation
class ForwardingMap(SkyMap):
    """A SkyMap that forwards the interface's methods, and nothing else, to a HEALPix map.

    A stage that reached past the interface (``nside``, ``pixels``, a healpy call on the map's
    arrays) fails on it; one that does not gives the HEALPix numbers exactly.
    """

    def __init__(self, inner):
        self.inner = inner
        self.values, self.weight, self.path, self.coordsys = inner.values, inner.weight, inner.path, inner.coordsys

    grid_label = property(lambda self: "forwarded " + self.inner.grid_label)
    pixel_area_sr = property(lambda self: self.inner.pixel_area_sr)
    band_limit = property(lambda self: self.inner.band_limit)

    def same_grid(self, other):
        return isinstance(other, ForwardingMap) and self.inner.same_grid(other.inner)

    def usable_fraction(self):
        return self.inner.usable_fraction()

    def with_values(self, values, **kw):
        return ForwardingMap(self.inner.with_values(values, **kw))

    def values_on(self, grid):
        return self.inner.values_on(grid.inner)

    def neighbour_values_on(self, grid, index):
        return self.inner.neighbour_values_on(grid.inner, index)

    def from_equatorial(self, ra_deg, dec_deg):
        return self.inner.from_equatorial(ra_deg, dec_deg)

    def to_equatorial(self, lon_deg, lat_deg):
        return self.inner.to_equatorial(lon_deg, lat_deg)

    def pixel_vectors(self, index):
        return self.inner.pixel_vectors(index)

    def pixel_lonlat(self, index):
        return self.inner.pixel_lonlat(index)

    def random_points(self, n, rng):
        return self.inner.random_points(n, rng)

    def aperture_sums(self, vectors, radius_rad, outer_radius_rad, **kw):
        return self.inner.aperture_sums(vectors, radius_rad, outer_radius_rad, **kw)

    def filtered(self, transfer, **kw):
        return ForwardingMap(self.inner.filtered(transfer, **kw))

    def pixel_window(self, lmax):
        return self.inner.pixel_window(lmax)

    def source_map(self, lon_deg, lat_deg, amplitude, **kw):
        return ForwardingMap(self.inner.source_map(lon_deg, lat_deg, amplitude, **kw))

    def aperture_support(self, lon_deg, lat_deg, radius_arcmin):
        return ForwardingMap(self.inner.aperture_support(lon_deg, lat_deg, radius_arcmin))

    def synthesise(self, alm, **kw):
        return self.inner.synthesise(alm, **kw)

    def white_noise(self, level_uk_arcmin, rng):
        return self.inner.white_noise(level_uk_arcmin, rng)


def _stage_outputs(wrap, make_map, beam_table) -> dict:
    """What each stage returns for maps passed through ``wrap`` (identity, or ForwardingMap)."""
    rng = np.random.default_rng(2)
    ra, dec = rng.uniform(30, 50, 40), rng.uniform(0, 20, 40)
    part, gal = wrap(_partial(make_map, True)), wrap(_partial(make_map, False, coordsys="G"))
    full = wrap(_full(make_map, nside=32))
    out = {"centre": measure_apertures(part, ra, dec, [40.0, 60.0]).temperatures,
           "subsample": measure_apertures(part, ra, dec, 50.0, pixel_weighting="subsample").temperatures,
           "random": np.vstack(measure_random_apertures(gal, 20, 50.0, seed=3, max_masked_fraction=0.3)),
           "rotated": rotated_sets(full, ra, dec + 30.0, [40.0], radius_arcmin=80.0, max_masked_fraction=0.2)[0],
           "dipole": remove_monopole_dipole(part)[1],
           "masked": full.with_mask(wrap(_full(make_map, nside=32, seed=8))).weight,
           "fraction": footprint_fraction(part)}
    for name, pc in (("wiener", PrefilterConfig(kind="wiener", beam_fwhm_arcmin=80.0, noise_uk_arcmin=300.0, lmax=120)),
                     ("matched", PrefilterConfig(kind="matched", beam_path=beam_table, noise_uk_arcmin=300.0, lmax=120))):
        out[name] = apply_prefilter(part, pc, radius_arcmin=70.0, seed=4)[0].values
    out["sims"] = simulate_aperture_temperatures(wrap(make_map(32, False, None, np.zeros(12 * 32**2))), ra, dec,
                                                 120.0, 2, seed=5, cmb_cl=np.full(96, 1e-3), white_noise_uk_arcmin=50.0)
    maps = [full, wrap(_full(make_map, nside=32, seed=4)), wrap(_full(make_map, nest=True, nside=32, seed=5))]
    out["combined"] = combine_maps(maps, [0.2, 0.3, 0.5]).values
    out["noise"] = pixel_difference_covariance(maps)[0]
    return out


def test_stages_run_on_any_implementation_of_the_interface(tmp_path):
    """Internal equivalence: the stages on a map that only has the interface's methods give the HEALPix
    map's numbers bit for bit."""
    from pairvel.maps.healpix import HealpixMap

    table = _beam_table(tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        direct = _stage_outputs(lambda m: m, HealpixMap, table)
        forwarded = _stage_outputs(ForwardingMap, HealpixMap, table)
    for key, want in direct.items():
        np.testing.assert_array_equal(forwarded[key], want, err_msg=key)


def test_reading_picks_the_pixelisation_from_the_file(tmp_path):
    from astropy.io import fits

    from pairvel.core.errors import MapError
    from pairvel.maps import healpix_io
    from pairvel.maps.healpix import HealpixMap
    from pairvel.maps.skymap import read_map, read_mask

    m = healpix_io.write_partial_map(tmp_path / "m.fits", np.arange(10), np.arange(10.0), nside=8, nest=True)
    k = healpix_io.write_partial_map(tmp_path / "k.fits", np.arange(5), np.ones(5), nside=8, nest=True, unit="K_CMB")
    assert healpix_io.claims_file(m)
    sm = read_map(m, ordering="NESTED")
    assert isinstance(sm, HealpixMap) and sm.nest and sm.values[3] == 3.0
    masked = sm.with_mask(read_mask(k, ordering="NESTED", coordsys="C"))
    np.testing.assert_array_equal(masked.weight, [1] * 5 + [0] * 5)
    with pytest.raises(MapError, match="nest=False contradicts ordering='NESTED'"):
        read_map(m, nest=False, ordering="NESTED")
    with pytest.raises(MapError, match="ordering must be RING or NESTED; got 'ROW'"):
        read_mask(k, ordering="ROW")
    junk = tmp_path / "junk.fits"
    junk.write_bytes(b"not a fits file " * 200)
    image = tmp_path / "image.fits"
    fits.HDUList([fits.PrimaryHDU(np.zeros((4, 4)))]).writeto(image)
    assert not healpix_io.claims_file(junk) and not healpix_io.claims_file(image)
    # no reader claims them: the HEALPix reader says what is wrong
    with pytest.raises(MapError, match="junk.fits cannot be read as FITS"):
        read_map(junk)
    # an image is the rectangular-pixel reader's, which says it lacks a celestial WCS
    with pytest.raises(MapError, match="image.fits has no celestial WCS"):
        read_mask(image)
    # the reader's warnings point at the line that called read_map, as its own would
    from pairvel.core.errors import PairvelWarning

    hp.write_map(tmp_path / "nocoord.fits", np.zeros(12 * 4 ** 2), column_units="uK_CMB", dtype=np.float64)
    with pytest.warns(PairvelWarning, match="no COORDSYS keyword") as record:
        read_map(tmp_path / "nocoord.fits")
    assert [w.filename for w in record] == [__file__]


def test_simulated_skies_follow_the_grid_and_frame_of_the_map():
    """An nside and an unmasked full-sky RING map in the equatorial frame are the same grid (identical
    skies); on a Galactic map the skies are evaluated where the rotated apertures fall, so every
    aperture is usable."""
    from pairvel.maps.healpix import HealpixMap

    rng = np.random.default_rng(1)
    ra, dec = rng.uniform(0, 360, 50), rng.uniform(-60, 60, 50)
    kw = dict(seed=4, cmb_cl=np.full(96, 1e-3), white_noise_uk_arcmin=40.0)
    by_nside = simulate_aperture_temperatures(32, ra, dec, 150.0, 2, **kw)
    full = None, np.zeros(12 * 32**2)
    np.testing.assert_array_equal(simulate_aperture_temperatures(HealpixMap(32, False, *full), ra, dec, 150.0, 2, **kw),
                                  by_nside)
    galactic = simulate_aperture_temperatures(HealpixMap(32, True, *full, coordsys="G"), ra, dec, 150.0, 2, **kw)
    assert np.all(np.isfinite(galactic)) and not np.allclose(galactic, by_nside)


def _partial(make_map, nest, *, nside=64, dtype=np.float64, coordsys="C"):
    """A 15-degree disc of noise plus a ramp, 15 per cent of pixels masked, a few at weight 0.5 or UNSEEN."""
    rng = np.random.default_rng(7)
    ring = np.sort(hp.query_disc(nside, hp.ang2vec(40.0, 10.0, lonlat=True), np.radians(15)))
    vals = rng.normal(0, 50, ring.size) + 3.0 * np.arange(ring.size) / ring.size
    weight = (rng.random(ring.size) > 0.15).astype(np.float32)
    weight[rng.random(ring.size) < 0.05] = 0.5
    vals[rng.random(ring.size) < 0.01] = hp.UNSEEN
    if not nest:
        return make_map(nside, False, ring, vals.astype(dtype), weight, coordsys=coordsys)
    pix = hp.ring2nest(nside, ring)
    order = np.argsort(pix)
    return make_map(nside, True, pix[order], vals[order].astype(dtype), weight[order], coordsys=coordsys)


def _full(make_map, nest=False, nside=16, seed=3):
    """Noise, a monopole and a dipole on the whole sphere, the band |b| < 20 deg masked."""
    rng = np.random.default_rng(seed)
    theta, phi = hp.pix2ang(nside, np.arange(12 * nside ** 2))
    m = rng.normal(0, 30, theta.size) + 5.0 + 20 * np.cos(theta) + 7 * np.sin(theta) * np.cos(phi)
    weight = (np.abs(90 - np.degrees(theta)) > 20).astype(np.float32)
    if nest:
        m, weight = hp.reorder(m, r2n=True), hp.reorder(weight, r2n=True)
    return make_map(nside, nest, None, m, weight)


def _photometry(make_map, out):
    rng = np.random.default_rng(5)
    ra, dec = rng.uniform(30, 50, 60), rng.uniform(0, 20, 60)
    scale = rng.uniform(0.7, 1.4, ra.size)
    runs = [("centre", "kernel"), ("centre", "direct"), ("fraction", "kernel"), ("fraction", "direct"),
            ("subsample", "direct")]
    for nest in (False, True):
        for dtype in (np.float64, np.float32):
            sm = _partial(make_map, nest, dtype=dtype)
            tag = f"{'nest' if nest else 'ring'}_{np.dtype(dtype).name}"
            for weighting, method in runs:
                res = measure_apertures(sm, ra, dec, [40.0, 70.0], max_masked_fraction=0.3, pixel_weighting=weighting,
                                        method=method, subsample_level=2)
                key = f"ap_{tag}_{weighting}_{method}"
                out[key] = res.temperatures
                out[key + "_masked"] = np.stack([res.masked_fraction_disc, res.masked_fraction_annulus])
                out[key + "_counts"] = np.stack([res.n_pixels_disc, res.n_pixels_annulus])
            out[f"ap_{tag}_scaled"] = measure_apertures(sm, ra, dec, [30.0, 50.0], radius_scale=scale,
                                                        max_masked_fraction=0.3).temperatures
    lon, lat = hp.Rotator(coord=["G", "C"])(40.0, 10.0, lonlat=True)
    gal = _partial(make_map, False, coordsys="G")
    out["ap_galactic"] = measure_apertures(gal, np.mod(lon + rng.uniform(-10, 10, 40), 360),
                                           lat + rng.uniform(-10, 10, 40), 50.0, pixel_weighting="fraction").temperatures
    for nest in (False, True):
        for weighting in ("centre", "subsample"):
            r, d, t = measure_random_apertures(_partial(make_map, nest), 40, [40.0, 60.0], seed=11,
                                               max_masked_fraction=0.3, pixel_weighting=weighting, radius_scale=scale)
            out[f"random_{'nest' if nest else 'ring'}_{weighting}"] = np.vstack([r, d, t])
    r, d, t = measure_random_apertures(gal, 30, 50.0, seed=2, max_masked_fraction=0.3)
    out["random_galactic"] = np.vstack([r, d, t])
    sets, kept = rotated_sets(_full(make_map, nside=32), ra, dec + 30.0, [30.0, 200.0], radius_arcmin=80.0,
                              max_masked_fraction=0.2)
    out["rotated"] = sets
    out["rotated_kept"] = np.array(kept)


def _maps(make_map, out, beam_table):
    for nest in (False, True):
        m, coef = remove_monopole_dipole(_full(make_map, nest))
        out[f"dipole_full_{nest}"] = np.append(m.values, coef)
        m, coef = remove_monopole_dipole(_partial(make_map, nest), pixels_per_fit=300)
        out[f"dipole_partial_{nest}"] = np.append(m.values[m.weight > 0], coef)
    configs = {"highpass": PrefilterConfig(kind="highpass", highpass_ell=40, highpass_width=20, normalise="aperture"),
               "wiener": PrefilterConfig(kind="wiener", beam_fwhm_arcmin=80.0, noise_uk_arcmin=300.0, lmax=120),
               "matched": PrefilterConfig(kind="matched", beam_path=beam_table, noise_uk_arcmin=300.0, lmax=120)}
    for nest in (False, True):
        for name, pc in configs.items():
            m, info = apply_prefilter(_partial(make_map, nest), pc, radius_arcmin=70.0, seed=4)
            out[f"prefilter_{name}_{nest}"] = np.append(m.values[m.weight > 0], [info.response, info.response_analytic])
    a, c = _full(make_map), _full(make_map, nest=True, seed=4)
    b = _partial(make_map, True, nside=16)
    for key, maps in (("full", [a, b, c]), ("partial", [b, a, c])):
        comb = combine_maps(maps, [0.5, 0.7, -0.2])
        out[f"combined_{key}"] = np.append(comb.values, comb.weight)
    noisy = [make_map(16, False, None, a.values + np.random.default_rng(k).normal(0, s, a.values.size), a.weight)
             for k, s in ((20, 10.0), (21, 20.0))]
    cov, n = pixel_difference_covariance(noisy + [c], [0.1, -0.2, 0.3])
    out["noise_cov"] = np.append(np.diag(cov), n)


def _simulations(out):
    rng = np.random.default_rng(6)
    ra, dec = rng.uniform(0, 60, 80), rng.uniform(-20, 20, 80)
    cl = 1e3 / (np.arange(96) + 10.0) ** 2
    out["sim_noise"] = simulate_aperture_temperatures(32, ra, dec, 120.0, 2, seed=5, white_noise_uk_arcmin=100.0)
    out["sim_cmb"] = simulate_aperture_temperatures(32, ra, dec, 120.0, 2, seed=6, cmb_cl=cl, beam_fwhm_arcmin=60.0,
                                                    white_noise_uk_arcmin=50.0, noise_cl=np.full(40, 1e-3))
    out["sim_transfer"] = simulate_aperture_temperatures(32, ra, dec, 120.0, 2, seed=6, cmb_cl=cl,
                                                         white_noise_uk_arcmin=50.0, transfer=np.linspace(0, 1, 80))


def regression_cases(make_map, beam_table) -> dict:
    """Every regression output, with maps built by ``make_map(nside, nest, pixels, values, weight, coordsys=)``."""
    out = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        _photometry(make_map, out)
        _maps(make_map, out, beam_table)
        _simulations(out)
    return out


def _beam_table(folder: Path) -> Path:
    path = folder / "beam.txt"
    np.savetxt(path, np.column_stack([np.arange(200), hp.gauss_beam(np.radians(80 / 60), lmax=199)]))
    return path


def _map_class():
    from pairvel.maps.healpix import HealpixMap

    return HealpixMap


def test_stages_give_the_numbers_recorded_before_the_interface(tmp_path, monkeypatch):
    """Internal regression (see the module docstring): equal to 1e-12 of each array's largest value;
    most are bit-identical.  The simulated skies are synthesised as when recorded (every multipole,
    float64); the band cut and float32 are checked against that in tests/stats/test_simcov.py."""
    monkeypatch.setattr("pairvel.stats.simcov.TAIL_FRACTION", 0.0)
    monkeypatch.setattr("pairvel.stats.simcov.SYNTHESIS_DTYPE", np.complex128)
    got = regression_cases(_map_class(), _beam_table(tmp_path))
    with np.load(REGRESSION_FILE, allow_pickle=False) as ref:
        assert sorted(ref.files) == sorted(got)
        for key in ref.files:
            want = ref[key]
            assert got[key].shape == want.shape and got[key].dtype == want.dtype, key
            scale = float(np.nanmax(np.abs(want.astype(float)), initial=0.0))
            np.testing.assert_allclose(got[key], want, rtol=1e-12, atol=1e-12 * scale, err_msg=key)


if __name__ == "__main__" and sys.argv[1:] == ["record"]:
    import tempfile

    with tempfile.TemporaryDirectory() as folder:
        cases = regression_cases(_map_class(), _beam_table(Path(folder)))
    np.savez_compressed(REGRESSION_FILE, **cases)
    print(f"{len(cases)} arrays written to {REGRESSION_FILE}")
