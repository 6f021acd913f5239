"""observatory.toml validation: the starter file loads; bad keys are named."""

from __future__ import annotations

import tomllib

import pytest

from scheduler.model.config import parse_config, starter_config, starter_config_text
from scheduler.model.errors import ConfigError


def _starter() -> dict:
    return tomllib.loads(starter_config_text())


def test_starter_config_has_the_optical_to_mid_infrared_bands():
    cfg = starter_config()
    assert list(cfg.bands) == ["U", "B", "V", "R", "I", "J", "H", "K", "N", "Q"]
    assert cfg.instrument_for("K").name == "nir_camera"
    assert cfg.instrument_for("Q").name == "mir_camera"
    assert cfg.telescope.max_altitude_deg < 90  # the starter mount has a zenith blind spot


def test_starter_site_is_labelled_as_invented():
    cfg = starter_config()
    assert "fictional" in cfg.site.name.lower()


@pytest.mark.parametrize(
    "path, value, key",
    [
        (("telescope", "aperture_m"), -1.0, "telescope.aperture_m"),
        (("site", "latitude_deg"), 95.0, "site.latitude_deg"),
        (("site", "timezone"), "Mars/Olympus", "site.timezone"),
        (("safety", "max_humidity_pct"), 120, "safety.max_humidity_pct"),
        (("telescope", "slew_rate_az_deg_s"), 0, "telescope.slew_rate_az_deg_s"),
        (("planning", "step_s"), 7.5, "planning.step_s"),
        (("planning", "effort"), 0, "planning.effort"),
        (("planning", "effort"), 2.5, "planning.effort"),
        (("planning", "effort"), 1001, "planning.effort"),
        (("planning", "seed"), -1, "planning.seed"),
    ],
)
def test_out_of_range_values_name_their_key(path, value, key):
    data = _starter()
    data[path[0]][path[1]] = value
    with pytest.raises(ConfigError) as err:
        parse_config(data)
    assert str(err.value).startswith(key)


def test_effort_is_optional_and_read_when_set():
    data = _starter()
    assert parse_config(data).planning.effort is None  # the starter file leaves it commented out
    data["planning"]["effort"] = 12
    assert parse_config(data).planning.effort == 12


def test_unknown_and_missing_keys_are_named():
    data = _starter()
    data["telescope"]["apperture_m"] = 4.0
    with pytest.raises(ConfigError, match=r"^telescope.apperture_m: unknown key"):
        parse_config(data)
    data = _starter()
    del data["site"]["elevation_m"]
    with pytest.raises(ConfigError, match=r"^site.elevation_m: is required"):
        parse_config(data)


def test_instrument_band_must_exist():
    data = _starter()
    data["instrument"][0]["bands"].append("Z")
    with pytest.raises(ConfigError, match=r"instrument\[0\].bands: unknown band 'Z'"):
        parse_config(data)


def test_submillimetre_dish_configuration_is_accepted():
    """An invented 12 m submillimetre dish: diffraction-limited, water-vapour dominated, daylight."""
    text = """
[site]
name = "Invented high dry plateau (fictional)"
latitude_deg = -21.5
longitude_deg = -66.1
elevation_m = 4900
timezone = "UTC"
[telescope]
name = "invented 12 m dish"
aperture_m = 12.0
min_altitude_deg = 15
slew_rate_az_deg_s = 3.0
slew_rate_alt_deg_s = 1.5
settle_s = 5
surface_rms_um = 25
surface_rms_day_um = 40
[safety]
sun_avoidance_deg = 30
max_wind_ms = 20
max_humidity_pct = 95
[defaults]
seeing_arcsec = 1.0
pwv_mm = 2.0
cloud_mag = 0.0
wind_ms = 5
humidity_pct = 30
[[instrument]]
name = "heterodyne_rx"
bands = ["mm1300", "smm870"]
setup_s = 60
[[band]]
name = "mm1300"
wavelength_um = 1300
seeing_limited = false
tau_dry = 0.017
tau_per_mm_pwv = 0.04
twilight = "day"
source = "225 GHz opacity relation at a high dry site (from memory)"
[[band]]
name = "smm870"
wavelength_um = 870
seeing_limited = false
tau_dry = 0.07
tau_per_mm_pwv = 0.18
twilight = "day"
source = "about 4.5x the 225 GHz opacity (from memory)"
"""
    cfg = parse_config(tomllib.loads(text))
    band = cfg.band("mm1300")
    assert band.seeing_limited is False and band.twilight == "day"
    assert band.sun_alt_limit_deg >= 90  # daylight allowed: sun avoidance is the only Sun rule
    # 1.22 lambda/D for 1.3 mm on 12 m: 1.22 * 1.3e-3 / 12 rad = 27.3 arcsec (computed from the formula)
    assert cfg.diffraction_limit_arcsec("mm1300") == pytest.approx(27.26, rel=1e-3)
    # the dish's surface: 25 um rms at night, 40 um sunlit; the default efficiency floor
    tel = cfg.telescope
    assert (tel.surface_rms_um, tel.surface_rms_day_um, tel.surface_efficiency_floor) == (25.0, 40.0, 0.3)
