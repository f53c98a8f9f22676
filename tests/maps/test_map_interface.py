"""The sky-map interface: the stages give the numbers they gave before it existed.

``healpix_regression.npz`` holds the outputs of the map stages (photometry with every pixel weighting
and method, random apertures, monopole/dipole removal, pre-filter, simulated skies, rotated nulls,
several-frequency combination) on small invented maps, recorded with the code before the stages
talked to the map through :class:`~pairvel.maps.skymap.SkyMap` (commit f063bce): internal
regression.  :func:`regression_cases` builds them from a map constructor, so the same function
recorded the file (``python tests/maps/test_map_interface.py record``, run on that commit) and checks it.
"""

import sys
import warnings
from pathlib import Path

import healpy as hp
import numpy as np

from pairvel.input.config import PrefilterConfig
from pairvel.maps.multifreq import combine_maps, pixel_difference_covariance
from pairvel.maps.photometry import measure_apertures, measure_random_apertures
from pairvel.maps.prefilter import apply_prefilter
from pairvel.maps.skymap import remove_monopole_dipole
from pairvel.stats.nulltests import rotated_sets
from pairvel.stats.simcov import simulate_aperture_temperatures

REGRESSION_FILE = Path(__file__).with_name("healpix_regression.npz")


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


def test_stages_give_the_numbers_recorded_before_the_interface(tmp_path):
    """Internal regression (see the module docstring): equal to 1e-12 of each array's largest value;
    most are bit-identical."""
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
