"""[partner]: the second catalogue's keys are checked when the config is read."""

import pytest

from pairvel.core.errors import ConfigError
from pairvel.input.config import config_from_dict

BASE = {"catalogue": {"path": "/a/c.csv"}, "map": {"path": "/a/m.fits"}, "theory": {"bias": 1.0}}
RESTART = {"restart": {"table_path": "/a/tracers.fits"}, "theory": {"bias": 1.0}}  # reads no catalogue or map


def test_partner_keys_are_typed_and_resolved():
    cfg = config_from_dict({**BASE, "partner": {"path": "/a/g.fits", "bias": 1.5, "radius_arcmin": 1.6,
                                                "weight_column": "w", "z_max": 0.5}})
    assert str(cfg.partner.path) == "/a/g.fits" and cfg.partner.bias == 1.5 and cfg.partner.z_max == 0.5


@pytest.mark.parametrize("partner, base, match", [
    ({"radius_arcmin": 2.0}, BASE, r"'partner\.radius_arcmin' is set but partner\.path is not"),
    ({"path": "/a/g.fits"}, BASE, r"'partner\.bias' is required with partner\.path"),
    ({"path": "/a/g.fits", "bias": 1.5, "proxy_min": 14.0}, BASE,
     r"'partner\.proxy_column' is required when partner\.proxy_min or partner\.proxy_max is set"),
    ({"path": "/a/g.fits", "bias": 1.5}, RESTART, r"'partner\.path' needs the sky map"),
    ({"path": "/a/g.fits", "bias": 50.0}, BASE, r"'partner\.bias' must lie in \[0\.01, 20\.0\]; got 50\.0"),
    ({"path": "/a/g.fits", "bias": 1.5, "radius": 2.0}, BASE, r"unknown key 'partner\.radius' \(did you mean"),
])
def test_partner_config_errors(partner, base, match):
    with pytest.raises(ConfigError, match=match):
        config_from_dict({**base, "partner": partner})
