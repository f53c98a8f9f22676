"""Map inputs through the whole run: tracers off a partial map are a counted, reported drop; a footprint with
no usable aperture, a mask in another frame and a header without ORDERING are one clear error."""

import json

import healpy as hp
import numpy as np
import pandas as pd
from conftest import write_healpix

from pairvel.cli import main


def run(folder, *extra):
    return main(["run", str(folder / "run.toml"), "--out", str(folder / "out"), "--quiet", *extra])


def error_line(capsys):
    lines = [ln for ln in capsys.readouterr().err.splitlines() if ln.startswith("pairvel: error:")]
    assert len(lines) == 1
    return lines[0]


def test_tracers_outside_partial_coverage_are_counted_and_reported(tiny_survey):
    df = pd.read_csv(tiny_survey / "cat.csv")
    far = df.iloc[:7].copy()
    far["ra"] = 200.0 + np.arange(7)  # far from the map's 25-degree cap around (35, 2.5)
    pd.concat([df, far]).to_csv(tiny_survey / "cat.csv", index=False)
    assert run(tiny_survey) == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    sel = summary["selection"]
    assert sel["aperture_masked_dropped"] >= 7 and sel["used"] == len(df) + 7 - sel["aperture_masked_dropped"]
    assert f"aperture_masked_dropped: {sel['aperture_masked_dropped']}" in (tiny_survey / "out" / "report.md").read_text()


def test_footprint_with_no_usable_aperture_is_one_error(tiny_survey, capsys):
    nside = 256
    write_healpix(tiny_survey / "mask.fits", np.zeros(hp.nside2npix(nside), np.float32), nside=nside, unit=None)
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('path = "map.fits"', 'path = "map.fits"\nmask_path = "mask.fits"'))
    assert run(tiny_survey) == 2
    line = error_line(capsys)
    assert "map.fits: fewer than 2 tracers have usable apertures" in line
    assert not (tiny_survey / "out").exists()


def test_mask_in_another_frame_is_one_error(tiny_survey, capsys):
    nside = 256
    path = tiny_survey / "mask.fits"
    write_healpix(path, np.ones(hp.nside2npix(nside), np.float32), nside=nside, unit=None)
    from astropy.io import fits
    with fits.open(path, mode="update") as h:
        h[1].header["COORDSYS"] = "G"
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('path = "map.fits"', 'path = "map.fits"\nmask_path = "mask.fits"'))
    assert run(tiny_survey) == 2
    assert "mask.fits is in frame G but the map is in frame C" in error_line(capsys)


def test_map_without_ordering_needs_the_config_key(tiny_survey, capsys):
    from astropy.io import fits
    with fits.open(tiny_survey / "map.fits", mode="update") as h:
        del h[1].header["ORDERING"]
    assert run(tiny_survey) == 2
    assert "has no ORDERING keyword; set map.ordering to RING or NESTED" in error_line(capsys)
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('path = "map.fits"', 'path = "map.fits"\nordering = "RING"'))
    assert run(tiny_survey) == 0


def test_dipole_removal_is_recorded(tiny_survey):
    cfg = tiny_survey / "run.toml"
    cfg.write_text(cfg.read_text().replace('path = "map.fits"', 'path = "map.fits"\nremove_dipole = true'))
    assert run(tiny_survey) == 0
    summary = json.loads((tiny_survey / "out" / "summary.json").read_text())
    assert len(summary["selection"]["map_monopole_dipole_removed_uk"]) == 4
    assert summary["config"]["map"]["remove_dipole"] is True
