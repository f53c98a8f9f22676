"""Blinding holds: no file of a blinded run gives the true amplitude back, and unblinding restores it.

One analysis with every option that yields an amplitude (several aperture radii, proxy bins, the
joint tau_mean x f sigma_8 fit with a prior, the Sellentin-Heavens interval, every null kind) runs
on an invented survey with an injected infall signal, once plain and once blinded with a key of a
known factor.  Every file of the blinded folder (text, ECSV, JSON, HTML, FITS data and headers, PNG
and PDF metadata, run.log) is read as numbers, each with the number of significant digits it was written
with; the test fails when one of them equals a true amplitude or curve value, or when two of them
differ by exactly the factor (a true and a blinded version of one quantity side by side).
"""

import json
import math
import re

import healpy as hp
import numpy as np
import pandas as pd
import pytest
from astropy.io import fits
from astropy.table import Table
from conftest import assert_json_close, write_healpix
from PIL import Image

from pairvel.cli import main
from pairvel.pairs.geometry import comoving_positions

#: The hidden factor of this test's key (any value in the blinding range that is not a round number).
FACTOR = 1.2873519364

CONFIG = """
[run]
name = "holds"
seed = 6  # a seed whose 3-bin tau(M) fit of this small survey converges (the test is about blinding)

[catalogue]
path = "cat.csv"
proxy_column = "log_mass"
weight_column = "w"

[map]
path = "map.fits"
coordsys = "C"

[aperture]
radius_arcmin = 12.0
radii_arcmin = [9.0, 16.0]

[bins]
r_max_mpc = 120.0
width_mpc = 30.0

[covariance]
n_regions = 12

[theory]
bias = 1.0
likelihood = "sellentin-heavens"
proxy_bin_edges = [14.0, 14.33, 14.67, 15.0]
proxy_power_law = "log10"
fit_velocity_scale = true
tau_prior_mean = 0.015
tau_prior_sigma = 0.004

[nulls]
n_random = 2
n_shuffle = 3
n_shuffle_z = 3
rotation_deg = [90.0, 180.0]
"""

BLINDING = '\n[blinding]\nenabled = true\nkey_path = "key.json"\n'


def _infall_survey(folder, *, n=700, nside=256, amp_uk=150.0, seed=21):
    """Invented survey: tracers fall towards the nearest of 40 centres; the line-of-sight part of
    that infall is painted into each tracer's pixel over white noise, so the pairwise curve has a
    signal of S/N ~ 4 (amplitudes well away from 0)."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(20, 50, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-10)), np.sin(np.radians(15)), n)))
    z = rng.uniform(0.1, 0.2, n)
    pos = comoving_positions(ra, dec, z)
    centres = pos[rng.choice(n, 40, replace=False)]
    nearest = centres[np.argmin(np.linalg.norm(pos[:, None, :] - centres[None], axis=2), axis=1)]
    los = pos / np.linalg.norm(pos, axis=1)[:, None]
    values = rng.normal(0, 20, hp.nside2npix(nside))
    np.add.at(values, hp.ang2pix(nside, ra, dec, lonlat=True), amp_uk * np.einsum("ij,ij->i", pos - nearest, los) / 40)
    write_healpix(folder / "map.fits", values.astype(np.float32), nside=nside)
    pd.DataFrame({"ra": ra, "dec": dec, "z": z, "log_mass": rng.uniform(14, 15, n),
                  "w": rng.uniform(0.5, 1.5, n)}).to_csv(folder / "cat.csv", index=False)
    (folder / "plain.toml").write_text(CONFIG)
    (folder / "blind.toml").write_text(CONFIG + BLINDING)
    (folder / "key.json").write_text(json.dumps({"kind": "pairvel blinding key", "key_id": "0123456789abcdef",
                                                 "factor": FACTOR, "run_name": "holds"}))


# ----------------------------------------------------------------------- numbers in the files
_PDF_INFO = re.compile(r"/(Title|Author|Subject|Keywords|Creator|Producer|CreationDate|ModDate) \(([^)]*)\)")
_DATA_URI = re.compile(r"data:image/png;base64,[A-Za-z0-9+/=]+")
_NUMBER = re.compile(r"(?<![\w.])[-+]?(?:\d+\.\d*|\.\d+|\d+)(?:[eE][-+]?\d+)?")
#: A clock time ("2026-12-05T19:07:01.927Z") carries no measurement; its seconds would otherwise read as
#: a 4-5 digit number that matches a true value by chance about once in a few dozen runs.
_TIMESTAMP = re.compile(r"\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}:\d{2}(?:\.\d+)?(?:Z|[+-]\d{2}:?\d{2})?")


def _significant_digits(token: str) -> int:
    mantissa = re.split("[eE]", token.lstrip("+-"))[0]
    digits = mantissa.replace(".", "").lstrip("0")
    if "." not in mantissa:
        digits = digits.rstrip("0")  # 1200: the trailing zeros say nothing
    return max(len(digits), 1)


def _text_numbers(text: str):
    for m in _NUMBER.finditer(_TIMESTAMP.sub(" ", text)):
        value = float(m.group())
        if value != 0 and math.isfinite(value):
            yield value, _significant_digits(m.group())


def _fits_numbers(path):
    with fits.open(path) as hdul:
        for hdu in hdul:
            data = hdu.data
            if data is not None:
                arrays = [data[name] for name in data.names] if hasattr(data, "names") and data.names else [data]
                for arr in arrays:
                    if np.asarray(arr).dtype.kind in "SU":  # a text column (drop reasons): the numbers in its text
                        yield from _text_numbers(" ".join(str(v) for v in np.ravel(arr)))
                        continue
                    flat = np.asarray(arr, dtype=float).ravel()
                    digits = 7 if np.asarray(arr).dtype.itemsize <= 4 else 17
                    yield from ((float(v), digits) for v in flat if v != 0 and np.isfinite(v))
            yield from _text_numbers(hdu.header.tostring(sep="\n"))


def folder_numbers(folder) -> dict:
    """{file name: [(value, significant digits written), ...]} for every file of ``folder``."""
    out = {}
    for path in sorted(p for p in folder.rglob("*") if p.is_file()):
        name = str(path.relative_to(folder))
        if path.suffix == ".fits":
            out[name] = list(_fits_numbers(path))
        elif path.suffix == ".png":
            with Image.open(path) as im:
                meta = {**im.info, **getattr(im, "text", {})}
            out[name] = list(_text_numbers(" ".join(f"{k} {v}" for k, v in meta.items() if isinstance(v, str))))
        elif path.suffix == ".pdf":  # drawn like its PNG twin; its document information is text
            info = _PDF_INFO.findall(path.read_bytes().decode("latin-1"))
            out[name] = list(_text_numbers(" ".join(v for _, v in info)))
        elif path.suffix == ".html":  # the embedded PNGs are read as files; base64 text is no number
            out[name] = list(_text_numbers(_DATA_URI.sub("", path.read_text(encoding="utf-8"))))
        else:
            out[name] = list(_text_numbers(path.read_text(encoding="utf-8")))  # fails loudly on unknown binaries
    return out


def _rounded(value: float, digits: int) -> str:
    return f"{value:.{digits - 1}e}"


def true_values(folder) -> np.ndarray:
    """Every amplitude- or curve-carrying number of the plain run, read from its files."""
    s = json.loads((folder / "summary.json").read_text())
    vals = [s["tau_mean"], s["tau_mean_error"], *s["tau_mean_68"], s["fit"]["amplitude"], s["fit"]["error"],
            s["conversion"]["uK_per_km_s_at_fitted_tau"], s["conversion"]["km_s_per_uK_at_fitted_tau"]]
    for r in s["aperture_radii"]:
        vals += [r["tau_mean"], r["tau_mean_error"], *r["p_uk"], *r["p_err_uk"]]
    for b in s["proxy_bins"]["bins"]:
        vals += [b["tau_mean"], b["tau_mean_error"]]
    m = s["tau_against_mass"]
    vals += [m["tau_0"], m["tau_0_error"], *m["tau"], *m["tau_error"], *m["model_tau"]]
    for joint in s["joint_covariances"].values():  # the radii's and the proxy bins'
        vals += [*joint["tau"], *np.ravel(joint["tau_covariance"]), *np.ravel(joint["covariance"])]
    v = s["velocity_scale_fit"]
    vals += [v["measured_product_A"], v["measured_product_A_error"], v["f_sigma8_mean"], v["f_sigma8_std"],
             *v["f_sigma8_68"], v["tau_mean_posterior_mean"], v["tau_mean_posterior_std"]]
    for errors in s["covariance"]["diagnostics"]["errors"].values():
        vals += errors
    t = Table.read(folder / "pairwise.ecsv", format="ascii.ecsv")
    vals += [*t["p_uK"], *t["p_err_uK"], *t["model_uK"]]
    with fits.open(folder / "covariance.fits") as h:
        vals += [*np.ravel(h[0].data), *np.ravel(h["JACKKNIFE_SAMPLES"].data)]
    for path in folder.glob("null_*.ecsv"):
        nt = Table.read(path, format="ascii.ecsv")
        vals += [x for c in nt.colnames if c != "r_mid" for x in nt[c]]
    vals = np.array(vals, dtype=float)
    return vals[np.isfinite(vals) & (vals != 0)]


def leaks_of_true_values(numbers: dict, truth) -> list:
    """(file, number) pairs written with >= 4 significant digits that equal a true value to
    min(digits written, 8) significant digits."""
    hits = []
    for digits in range(4, 9):
        true_set = {_rounded(t, digits): t for t in truth}
        for name, nums in numbers.items():
            hits += [(name, x, true_set[_rounded(x, digits)]) for x, n in nums
                     if min(n, 8) == digits and _rounded(x, digits) in true_set]
    return hits


def factor_ratios(numbers: dict, *, rtol=1e-9) -> list:
    """Pairs of full-precision numbers (anywhere in the folder) whose ratio is the factor or its square."""
    full = [(abs(x), name) for name, nums in numbers.items() for x, n in nums if n >= 12]
    logs = np.log(np.array([x for x, _ in full]))
    order = np.argsort(logs)
    logs_sorted = logs[order]
    hits = []
    for power in (1, 2):
        target = logs + power * math.log(FACTOR)
        lo = np.searchsorted(logs_sorted, target - rtol)
        hi = np.searchsorted(logs_sorted, target + rtol)
        for i in np.flatnonzero(hi > lo):
            j = order[lo[i]]
            hits.append((full[i][1], full[i][0], full[j][1], full[j][0], power))
    return hits


# ------------------------------------------------------------------------------------ the test
def _run(folder, config, out):
    assert main(["run", str(folder / config), "--out", str(folder / out), "--quiet"]) == 0


def _close(a, b, path=""):
    """Recursive comparison of two JSON values: numbers to 1e-10 relative, everything else equal."""
    assert_json_close(a, b, rtol=1e-10, where=path)


def _same_table(path_a, path_b):
    ta, tb = (Table.read(p, format="ascii.ecsv") for p in (path_a, path_b))
    assert ta.colnames == tb.colnames, path_a.name
    for c in ta.colnames:
        if ta[c].dtype.kind == "f":
            np.testing.assert_allclose(tb[c], ta[c], rtol=1e-10, atol=1e-14 * np.nanmax(np.abs(ta[c]), initial=0),
                                       err_msg=f"{path_a.name}:{c}")
        else:
            assert list(ta[c]) == list(tb[c]), f"{path_a.name}:{c}"
    _close({k: v for k, v in ta.meta.items() if k != "blinding"}, {k: v for k, v in tb.meta.items() if k != "blinding"},
           path_a.name)


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore")
def test_blinded_folder_hides_every_amplitude_and_unblinding_restores_them(tmp_path):
    _infall_survey(tmp_path)
    _run(tmp_path, "plain.toml", "plain")
    _run(tmp_path, "blind.toml", "blinded")
    plain, blinded = tmp_path / "plain", tmp_path / "blinded"
    s0 = json.loads((plain / "summary.json").read_text())
    s1 = json.loads((blinded / "summary.json").read_text())
    assert s1["blinded"] and abs(s0["snr"]) > 3                        # a real signal, blinded
    np.testing.assert_allclose(s1["tau_mean"], FACTOR * s0["tau_mean"], rtol=1e-12)
    m0, m1 = s0["tau_against_mass"], s1["tau_against_mass"]  # tau(M): tau_0 scales, alpha does not
    assert m0["problem"] is None and set(s0["joint_covariances"]) == {"radius_joint", "proxy_joint"}
    np.testing.assert_allclose([m1["tau_0"], m1["alpha"]], [FACTOR * m0["tau_0"], m0["alpha"]], rtol=1e-6)

    # every file is read; none holds a true amplitude or curve value, nor a number and its blinded twin
    numbers = folder_numbers(blinded)
    assert {"run.log", "report.md", "report.html", "aperture_radii.ecsv", "proxy_bins.ecsv", "velocity_scale.png",
            "velocity_scale.pdf", "tau_vs_mass.png"} <= set(numbers)
    truth = true_values(plain)
    assert truth.size > 200
    leaks = leaks_of_true_values(numbers, truth)
    assert not leaks, f"{len(leaks)} true values in the blinded folder, e.g. {leaks[:5]}"
    pairs = factor_ratios(numbers)
    assert not pairs, f"{len(pairs)} pairs of numbers differ by the hidden factor, e.g. {pairs[:5]}"
    assert not [name for name, nums in numbers.items()
                if any(_rounded(x, 6) == _rounded(FACTOR, 6) for x, _ in nums)], "the factor itself is written"

    # the primary radius and the main fit are the same measurement, so the same blinded number
    primary = [r for r in s1["aperture_radii"] if r["primary"]][0]
    np.testing.assert_allclose(primary["tau_mean"] / s1["tau_mean"], 1.0, rtol=1e-12)
    np.testing.assert_allclose(primary["p_uk"], Table.read(blinded / "pairwise.ecsv")["p_uK"], rtol=1e-12)

    # unblinding gives back the plain run, file by file
    unblinded = tmp_path / "unblinded"
    assert main(["unblind", str(blinded), "--key", str(tmp_path / "key.json"), "--out", str(unblinded), "--quiet"]) == 0
    skipped = {"run.log"}
    assert {p.name for p in unblinded.iterdir()} - skipped == {p.name for p in plain.iterdir()} - skipped
    s2 = json.loads((unblinded / "summary.json").read_text())
    ignore = ("blinded", "blinding", "config", "provenance")
    _close({k: v for k, v in s0.items() if k not in ignore}, {k: v for k, v in s2.items() if k not in ignore})
    for path in plain.glob("*.ecsv"):
        _same_table(path, unblinded / path.name)
    with fits.open(plain / "covariance.fits") as a, fits.open(unblinded / "covariance.fits") as b:
        for ha, hb in zip(a, b):
            np.testing.assert_allclose(hb.data, ha.data, rtol=1e-10, atol=0, err_msg=ha.name)
    report = [(plain / "report.md").read_text(), (unblinded / "report.md").read_text()]
    differ = ("- config:", "- seed:")  # the two runs' configs and start times
    keep = [[line for line in r.splitlines() if "lind" not in line and not line.startswith(differ)] for r in report]
    assert keep[0] == keep[1]


# ------------------------------------------------------------------ the declarations themselves
def _small_result(**extra):
    """A RunResult of invented numbers (4 bins, 6 jackknife samples), enough for the blinding rules."""
    from pairvel.report.result import RunResult
    from pairvel.stats.fit import fit_amplitude

    rng = np.random.default_rng(2)
    p_jk = rng.normal(1.0, 0.3, (6, 4))
    cov = np.cov(p_jk.T) * 5
    template = np.array([-1.0, -0.8, -0.5, -0.3])
    p = 0.9 * template + rng.normal(0, 0.1, 4)
    fit = fit_amplitude(p, template, cov, n_samples=40, use=np.ones(4, bool), likelihood="sellentin-heavens")
    return RunResult(config=None, edges=np.arange(5.0), p=p, covariance=cov, p_jk=p_jk, pair_counts=np.ones(4),
                     z_eff_bins=np.ones(4), z_eff=0.1, v12_template=template, in_fit=np.ones(4, bool), fit=fit,
                     nulls=(), n_tracers=10, selection={}, provenance={}, extra=extra)


def test_an_undeclared_extra_key_stops_blinding_and_writing(tmp_path):
    """A new option that stores a quantity without saying how it scales fails loudly, blinded or not."""
    from pairvel.report.blinding import UndeclaredQuantityError, apply_factor
    from pairvel.report.outputs import write_outputs

    result = _small_result(new_option_amplitude=0.01)
    with pytest.raises(UndeclaredQuantityError, match=r"extra keys \['new_option_amplitude'\] have no blinding rule"):
        apply_factor(result, FACTOR, blinding={"blinded": True})
    with pytest.raises(UndeclaredQuantityError, match="new_option_amplitude"):
        write_outputs(result, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_an_undeclared_field_and_true_text_stop_blinding():
    import dataclasses

    from pairvel.report.blinding import UndeclaredQuantityError, apply_factor

    result = _small_result()
    wider = dataclasses.make_dataclass("WiderFit", [(f.name, f.type) for f in dataclasses.fields(result.fit)]
                                       + [("bias_corrected_amplitude", float)], frozen=True)
    fit = wider(**dataclasses.asdict(result.fit), bias_corrected_amplitude=1.0)
    with pytest.raises(UndeclaredQuantityError, match=r"WiderFit fields \['bias_corrected_amplitude'\]"):
        apply_factor(dataclasses.replace(result, fit=fit), FACTOR, blinding={"blinded": True})
    for key in ("report_sections", "truth_check", "plot_curves"):   # text or comparisons made from true numbers
        with pytest.raises(UndeclaredQuantityError, match=f"extra\\['{key}'\\] is made from the true amplitude"):
            apply_factor(_small_result(**{key: {}}), FACTOR, blinding={"blinded": True})


@pytest.mark.parametrize("prior", [None, (0.8, 0.2)])
def test_joint_fit_is_made_again_from_the_blinded_fit(prior):
    """Without a prior the blinded joint fit is the true one with its tau_mean axis scaled (f sigma_8
    axis and posterior unchanged); with a prior (true units, from the config) its f sigma_8 moves too.
    Unblinding gives the true fit back (internal regression, to one rounding)."""
    from pairvel.report.blinding import apply_factor
    from pairvel.stats.joint import fit_velocity_scale

    base = _small_result()
    true = fit_velocity_scale(base.fit, 0.45, n_samples=40, tau_prior=prior)
    result = _small_result(velocity_scale_fit=true)
    blinded = apply_factor(result, FACTOR, blinding={"blinded": True})
    blind = blinded.extra["velocity_scale_fit"]
    np.testing.assert_allclose(blind.amplitude, FACTOR * true.amplitude, rtol=1e-14)
    np.testing.assert_array_equal(blind.s_grid, true.s_grid)
    if prior is None:
        np.testing.assert_allclose(blind.tau_grid, FACTOR * true.tau_grid, rtol=1e-12)
        np.testing.assert_allclose(blind.posterior, true.posterior, rtol=1e-9, atol=1e-15)
    else:
        assert blind.prior == true.prior and not np.isclose(blind.s_mean, true.s_mean, rtol=1e-3)
    back = apply_factor(blinded, FACTOR, divide=True, blinding={"blinded": False}).extra["velocity_scale_fit"]
    for name in ("amplitude", "amplitude_error", "s_mean", "s_std", "tau_mean_post", "tau_std_post"):
        np.testing.assert_allclose(getattr(back, name), getattr(true, name), rtol=1e-10, equal_nan=True)
    np.testing.assert_allclose(back.posterior, true.posterior, rtol=1e-9, atol=1e-15)



def test_clock_times_in_logs_are_not_read_as_measured_numbers():
    # run.log stamps each line; "…T19:07:01.927Z" once read as 1.927 and matched a true value by chance
    got = list(_text_numbers("2026-12-05T19:07:01.927Z INFO tau 1.927e-3, written 2026-12-05 19:07:02+00:00"))
    assert got == [(1.927e-3, 4)]
