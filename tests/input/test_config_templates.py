"""Config rules of the bias from a proxy and of the templates beyond linear theory ([theory] keys)."""

import pytest

from pairvel.core.errors import ConfigError
from pairvel.input.config import load_config

BASE = '[catalogue]\npath = "c.fits"\nproxy_column = "log_mass"\n[map]\npath = "m.fits"\n[theory]\n'


def load(tmp_path, theory, base=BASE):
    path = tmp_path / "run.toml"
    path.write_text(base + theory)
    return load_config(path)


def test_bias_from_proxy_replaces_theory_bias(tmp_path):
    cfg = load(tmp_path, 'bias_from_proxy = "mass"\nproxy_is_log10 = true\n')
    assert cfg.theory.bias is None and cfg.theory.halo_overdensity == 200.0
    lum = load(tmp_path, 'bias_from_proxy = "luminosity"\nluminosity_pivot = 1e10\n'
                         'mass_at_luminosity_pivot_msun = 1e13\nmass_luminosity_slope = 1.3\n')
    assert lum.theory.mass_luminosity_slope == 1.3


@pytest.mark.parametrize("theory, key, message", [
    ('bias = 2.0\nbias_from_proxy = "mass"\n', "theory.bias", "and theory.bias_from_proxy are both set; keep one"),
    ('bias_from_proxy = "luminosity"\nluminosity_pivot = 1e10\n', "theory.mass_luminosity_slope",
     "are all required with theory.bias_from_proxy = 'luminosity'"),
    ('bias_from_proxy = "mass"\nmass_luminosity_slope = 1.0\n', "theory.luminosity_pivot",
     "used only with theory.bias_from_proxy = 'luminosity'"),
    ('bias_from_proxy = "halo"\n', "theory.bias_from_proxy", "must be one of"),
    ('bias_from_proxy = "mass"\nhalo_overdensity = 100.0\n', "theory.halo_overdensity", r"must lie in \[200.0, 3200.0\]; got 100.0"),
    ('bias = 1.0\nvelocity_model = "table"\n', "theory.v12_table_path", "is required with theory.velocity_model"),
    ('bias = 1.0\nv12_table_path = "v.ecsv"\n', "theory.v12_table_path", "is required with theory.velocity_model"),
    ('bias = 1.0\nvelocity_model = "table"\nv12_table_path = "v.ecsv"\nphotoz_sigma = 0.02\n',
     "theory.photoz_sigma", "cannot damp a v12 table"),
    ('bias = 1.0\nvelocity_model = "halofit"\n', "theory.velocity_model", "must be one of"),
    ('bias = 1.0\nfit_template_tolerance = 0.0\n', "theory.fit_template_tolerance", r"must lie in \[0.0001, 10.0\]"),
])
def test_inconsistent_template_settings_are_one_line(tmp_path, theory, key, message):
    with pytest.raises(ConfigError, match=message) as caught:
        load(tmp_path, theory)
    assert caught.value.key == key and "\n" not in str(caught.value) and "run.toml" in str(caught.value)


def test_bias_from_proxy_needs_the_proxy_column(tmp_path):
    with pytest.raises(ConfigError, match=r"'catalogue\.proxy_column' is required when theory\.bias_from_proxy"):
        load(tmp_path, 'bias_from_proxy = "mass"\n', base=BASE.replace('proxy_column = "log_mass"\n', ""))
