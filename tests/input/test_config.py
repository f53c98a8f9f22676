"""Config validation: every error a user can meet names the file and the dotted key."""

import math
from pathlib import Path

import numpy as np
import pytest

from pairvel.core.errors import ConfigError
from pairvel.input.config import config_from_dict, iter_config_keys, load_config

MINIMAL = '[catalogue]\npath = "cat.fits"\n[map]\npath = "map.fits"\n'


def write(tmp_path, text, name="run.toml"):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_minimal_config_defaults_and_relative_paths(tmp_path):
    cfg = load_config(write(tmp_path, MINIMAL))
    assert cfg.catalogue.path == tmp_path.resolve() / "cat.fits"  # relative to the config's folder
    assert cfg.map.path == tmp_path.resolve() / "map.fits"
    # default edges 0-300 Mpc in 20 Mpc steps (the foundation issue's default)
    np.testing.assert_allclose(cfg.bins.edges(), np.arange(0, 301, 20), rtol=0, atol=1e-12)
    assert cfg.covariance.n_regions == 50
    assert cfg.trend.sigma_z == 0.01
    assert cfg.cosmology.h == 0.677


def test_unknown_key_names_file_and_key_with_suggestion(tmp_path):
    path = write(tmp_path, MINIMAL + "[aperture]\nradius_arcmn = 2.0\n")
    with pytest.raises(ConfigError, match=r"run\.toml: unknown key 'aperture\.radius_arcmn' \(did you mean 'aperture\.radius_arcmin'\?\)"):
        load_config(path)


def test_unknown_section(tmp_path):
    with pytest.raises(ConfigError, match=r"unknown section '\[aperure\]' \(did you mean '\[aperture\]'\?\)"):
        load_config(write(tmp_path, MINIMAL + "[aperure]\nradius_arcmin = 2.0\n"))


@pytest.mark.parametrize("snippet, match", [
    ("[aperture]\nradius_arcmin = \"two\"\n", r"'aperture\.radius_arcmin' must be a number; got 'two'"),
    ("[covariance]\nn_regions = 2.5\n", r"'covariance\.n_regions' must be an integer; got 2\.5"),
    ("[trend]\nenabled = 1\n", r"'trend\.enabled' must be true or false; got 1"),
    ("[map]\nordering = \"ring\"\n", r"'map\.ordering' must be one of 'RING', 'NESTED'; got 'ring'"),
    ("[map]\nmax_masked_fraction = 1.5\n", r"'map\.max_masked_fraction' must lie in \[0\.0, 1\.0\]; got 1\.5"),
    ("[bins]\nwidth_mpc = 7.0\n", r"'bins\.width_mpc' must divide"),
    ("[bins]\nedges_mpc = [0, 20, 10]\n", r"'bins\.edges_mpc' must be at least two increasing"),
    ("[cosmology]\nomega_b = 0.5\n", r"cosmology parameter 'omega_b' is out of range"),
    ("[catalogue]\nproxy_min = 14.0\n", r"'catalogue\.proxy_column' is required"),
])
def test_wrong_types_and_ranges(tmp_path, snippet, match):
    text = MINIMAL.replace("[map]\n", "[map]\n" + snippet.split("\n", 1)[1]) if snippet.startswith("[map]") else \
        MINIMAL.replace("[catalogue]\n", "[catalogue]\n" + snippet.split("\n", 1)[1]) if snippet.startswith("[catalogue]") \
        else MINIMAL + snippet
    with pytest.raises(ConfigError, match=match):
        load_config(write(tmp_path, text))


def test_missing_required_path(tmp_path):
    with pytest.raises(ConfigError, match=r"'map\.path' is required"):
        load_config(write(tmp_path, '[catalogue]\npath = "c.fits"\n'))


def test_unreadable_and_invalid_files(tmp_path):
    with pytest.raises(ConfigError, match=r"nope\.toml: file not found"):
        load_config(tmp_path / "nope.toml")
    with pytest.raises(ConfigError, match=r"bad\.toml: not valid TOML"):
        load_config(write(tmp_path, "[catalogue\npath=", name="bad.toml"))


def test_explicit_edges_and_json_roundtrip(tmp_path):
    cfg = load_config(write(tmp_path, MINIMAL + "[bins]\nedges_mpc = [10, 30, 60, 100]\n"))
    np.testing.assert_array_equal(cfg.bins.edges(), [10.0, 30.0, 60.0, 100.0])
    d = cfg.as_dict()
    assert d["bins"]["edges_mpc"] == [10.0, 30.0, 60.0, 100.0]
    assert d["catalogue"]["z_max"] == "inf"


def test_every_key_is_documented_in_configs_readme():
    readme = (Path(__file__).resolve().parents[2] / "configs" / "README.md").read_text()
    missing = [key for key, *_ in iter_config_keys() if f"`{key}`" not in readme]
    assert not missing, f"configs/README.md lacks {missing}"


def test_config_from_dict_without_file():
    cfg = config_from_dict({"catalogue": {"path": "/a/c.csv"}, "map": {"path": "/a/m.fits"}})
    assert cfg.source is None and math.isinf(cfg.catalogue.z_max)
