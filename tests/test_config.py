"""Config validation: clear messages, nothing evaluated, values normalised."""

import pytest
from astropy.coordinates import Angle

from lineshift.errors import ConfigError
from lineshift.run.config import load_config, parse_site


def _cfg(tmp_path, text):
    p = tmp_path / "c.toml"
    p.write_text(text)
    return str(p)


def test_valid_config_is_normalised(tmp_path):
    cfg = load_config(_cfg(tmp_path, '[target]\nra = "08:45:37.5"\ndec = "-18:43:25"\n'
                                     "[site]\nlon = 35.2\nlat = -12.4\nheight = 1850\n"
                                     "[measure]\nvelocity_range = [-1e5, 1e5]\nmethod = 'mask'\n"))
    assert cfg["target"]["ra"] == pytest.approx(Angle("08h45m37.5s").deg)  # reference: astropy Angle
    assert len(cfg["site"]["xyz"]) == 3
    assert cfg["measure"]["velocity_range"] == (-1e5, 1e5)


@pytest.mark.parametrize(("text", "message"), [
    ("[nope]\nx = 1\n", "unknown config section"),
    ("[measure]\nbox_width = 'wide'\n", "should be int/float"),
    ("[measure]\nbox_width = -3\n", "must be positive"),
    ("[measure]\nvelocity_range = [5, 1]\n", "low < high"),
    ("[measure]\nmedium = 'water'\n", "air' or 'vacuum"),
    ("[target]\npm_dec = 3.0\n", "space motion needs"),
    ("[target]\ndec = 123\n", "outside -90..+90"),
    ("[site]\nlon = 1\n", "either lon, lat, height or x, y, z"),
    ("[site]\nlon = 1\nlat = 95\nheight = 0\n", "not a place on the Earth"),
    ("[measure]\nvelocity_step = true\n", "should be"),
    ("x = __import__('os')\n", "not valid TOML"),
])
def test_invalid_configs_are_clear(tmp_path, text, message):
    with pytest.raises(ConfigError, match=message) as info:
        load_config(_cfg(tmp_path, text))
    assert "\n" not in str(info.value)
    assert str(info.value).startswith(str(tmp_path))


def test_site_option():
    x, y, z = parse_site("35.2133,-12.4418,1850")
    assert 6.3e6 < (x * x + y * y + z * z) ** 0.5 < 6.4e6
    with pytest.raises(ConfigError, match="LON,LAT,HEIGHT"):
        parse_site("35.2,-12.4")
