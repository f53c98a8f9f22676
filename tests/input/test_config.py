"""Config validation: every error a user can meet names the file and the dotted key."""

import math
from pathlib import Path

import numpy as np
import pytest

from pairvel.core.errors import ConfigError
from pairvel.input.config import config_from_dict, iter_config_keys, load_config

MINIMAL = '[catalogue]\npath = "cat.fits"\n[map]\npath = "map.fits"\n[theory]\nbias = 1.0\n'


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
    ("[bins]\nedges_mpc = [0, 20, 10]\n", r"'bins\.edges_mpc' must increase strictly; item 3 of 3 \(10\) is not above item 2 \(20\)"),
    ("[bins]\nedges_mpc = [30]\n", r"'bins\.edges_mpc' must be at least two increasing"),
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


def test_bias_is_required_and_says_why(tmp_path):
    text = '[catalogue]\npath = "c.fits"\n[map]\npath = "m.fits"\n'
    with pytest.raises(ConfigError, match=r"run\.toml: 'theory\.bias' is required: tau_mean scales as 1/b") as caught:
        load_config(write(tmp_path, text))
    assert caught.value.key == "theory.bias" and "\n" not in str(caught.value)
    with pytest.raises(ConfigError, match=r"'theory\.bias' is required"):  # a [theory] section without it
        load_config(write(tmp_path, text + "[theory]\nwiggles = false\n"))
    assert load_config(write(tmp_path, text + "[theory]\nbias = 2.5\n")).theory.bias == 2.5


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
    cfg = config_from_dict({"catalogue": {"path": "/a/c.csv"}, "map": {"path": "/a/m.fits"}, "theory": {"bias": 1.0}})
    assert cfg.source is None and math.isinf(cfg.catalogue.z_max)


# --- every list in the config is checked when the file is read, naming the key and the bad item
@pytest.mark.parametrize("section, key, value, match", [
    ("bins", "edges_mpc", "[0, nan, 60]", r"'bins\.edges_mpc' item 2 of 3 must be a number, not nan"),
    ("bins", "edges_mpc", "[0, 30, inf]", r"'bins\.edges_mpc' must hold finite numbers; item 3 of 3 is inf"),
    ("bins", "edges_mpc", "[0, 30, 30, 60]", r"'bins\.edges_mpc' must increase strictly; item 3 of 4 \(30\) is not above"),
    ("bins", "edges_mpc", "[-10, 30]", r"'bins\.edges_mpc' must lie in \[0\.0, 10000\.0\]; item 1 of 2 is -10\.0"),
    ("bins", "edges_mpc", "[]", r"'bins\.edges_mpc' must be a non-empty list \(leave the key out for none\); got \[\]"),
    ("theory", "proxy_bin_edges", "[14.0, -inf]", r"'theory\.proxy_bin_edges' must hold finite numbers; item 2 of 2 is -inf"),
    ("theory", "proxy_bin_edges", "[14.5, 14.0]", r"'theory\.proxy_bin_edges' must increase strictly; item 2 of 2 \(14\)"),
    ("theory", "fit_r_min_mpc", "nan", r"'theory\.fit_r_min_mpc' must be a number, not nan"),
    ("theory", "fit_r_max_mpc", "-inf", r"'theory\.fit_r_max_mpc' must be finite; got -inf"),
    ("catalogue", "z_min", "inf", r"'catalogue\.z_min' must be finite; got inf"),
    ("theory", "tau_prior_mean", "nan", r"'theory\.tau_prior_mean' must be a number, not nan"),
    ("aperture", "radii_arcmin", "[1.0, nan]", r"'aperture\.radii_arcmin' item 2 of 2 must be a number, not nan"),
    ("aperture", "radii_arcmin", "[1.0, 90.0]", r"'aperture\.radii_arcmin' must lie in \[0\.05, 60\.0\]; item 2 of 2"),
    ("aperture", "radii_arcmin", "[]", r"'aperture\.radii_arcmin' must be a non-empty list"),
    ("nulls", "rotation_deg", "[90, inf]", r"'nulls\.rotation_deg' must hold finite numbers; item 2 of 2 is inf"),
    ("nulls", "rotation_deg", "[90, 400]", r"'nulls\.rotation_deg' must lie in \[-360\.0, 360\.0\]"),
    ("nulls", "rotation_deg", "90", r"'nulls\.rotation_deg' must be a list of floats; got 90"),
    ("multifrequency", "map_paths", "[]", r"'multifrequency\.map_paths' must be a non-empty list"),
    ("multifrequency", "map_paths", "[3]", r"'multifrequency\.map_paths' item 1 of 1 must be a file path"),
    ("multifrequency", "weights", "[0.5, nan]", r"'multifrequency\.weights' item 2 of 2 must be a number, not nan"),
    ("multifrequency", "frequencies_ghz", "[150, inf]", r"'multifrequency\.frequencies_ghz' must hold finite numbers"),
])
def test_lists_and_numbers_are_checked_at_load(tmp_path, section, key, value, match):
    text = MINIMAL.replace(f"[{section}]\n", f"[{section}]\n{key} = {value}\n") if f"[{section}]" in MINIMAL \
        else MINIMAL + f"[{section}]\n{key} = {value}\n"
    with pytest.raises(ConfigError, match=match) as caught:
        load_config(write(tmp_path, text))
    assert caught.value.key == f"{section}.{key}" and "run.toml" in str(caught.value)


def test_every_list_key_says_whether_it_may_be_empty():
    lists = {key: typ for key, typ, *_ in iter_config_keys() if "list" in typ}
    assert lists["nulls.rotation_deg"] == "list of float (may be empty)"
    assert all(typ.startswith("non-empty list") for key, typ in lists.items() if key != "nulls.rotation_deg"), lists


def test_empty_rotation_list_means_no_rotated_null(tmp_path):
    cfg = load_config(write(tmp_path, MINIMAL + "[nulls]\nrotation_deg = []\n"))
    assert cfg.nulls.rotation_deg == ()
    assert cfg.as_dict()["nulls"]["rotation_deg"] == []


def test_infinite_where_the_key_allows_it(tmp_path):
    cfg = load_config(write(tmp_path, MINIMAL.replace("[catalogue]\n", "[catalogue]\nz_max = inf\nproxy_min = -inf\n")
                            .replace("[theory]\n", "[theory]\nfit_r_max_mpc = inf\n")))
    assert math.isinf(cfg.catalogue.z_max) and math.isinf(cfg.theory.fit_r_max_mpc)


def test_files_that_are_not_configs(tmp_path, monkeypatch):
    latin1 = tmp_path / "latin1.toml"
    latin1.write_bytes(MINIMAL.encode() + '[run]\nname = "caf\u00e9"\n'.encode("latin-1"))
    with pytest.raises(ConfigError, match=r"latin1\.toml: is not UTF-8 text \(byte b'\\xe9' at offset \d+\)"):
        load_config(latin1)
    (tmp_path / "folder.toml").mkdir()
    with pytest.raises(ConfigError, match=r"folder\.toml: is a folder, not a TOML file"):
        load_config(tmp_path / "folder.toml")
    for name, text in (("empty.toml", ""), ("comments.toml", "# nothing yet\n")):
        with pytest.raises(ConfigError, match=rf"{name}: holds no settings"):
            load_config(write(tmp_path, text, name=name))
    (tmp_path / "binary.toml").write_bytes(bytes(range(128, 256)))
    with pytest.raises(ConfigError, match=r"binary\.toml: is not UTF-8 text"):
        load_config(tmp_path / "binary.toml")
    with pytest.raises(ConfigError, match=r"prose\.toml: not valid TOML"):
        load_config(write(tmp_path, "This is a note, not a config.\n", name="prose.toml"))
    # a path whose parent is a regular file fails for root too
    with pytest.raises(ConfigError, match=r"latin1\.toml/run\.toml: cannot be read \(Not a directory\)"):
        load_config(latin1 / "run.toml")

    def refuse(*args, **kwargs):
        raise PermissionError(13, "Permission denied")

    monkeypatch.setattr("builtins.open", refuse)  # root reads any file: unreadable is simulated
    with pytest.raises(ConfigError, match=r"locked\.toml: cannot be read \(Permission denied\)"):
        load_config(tmp_path / "locked.toml")
