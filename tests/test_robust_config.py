"""observatory.toml at the edge: every broken file is one line naming the key, exit 2, through
the real CLI (`nightplan init` validates an existing file); pure checks in-process."""

from __future__ import annotations

import tomllib

import pytest

from conftest import run_cli
from scheduler.model.config import parse_config, starter_config_text
from scheduler.model.errors import ConfigError

BASE = starter_config_text()

BROKEN = [
    ("timezone-folder", ('timezone = "America/Argentina/Catamarca"', 'timezone = "America"'), "site.timezone"),
    ("timezone-subfolder", ('timezone = "America/Argentina/Catamarca"', 'timezone = "America/Argentina"'),
     "site.timezone"),
    ("int-5000-digits", ("settle_s = 20", "settle_s = " + "7" * 5000), "config"),
    ("int-4000-digits", ("settle_s = 20", "settle_s = " + "7" * 4000), "telescope.settle_s"),
    ("array-5000-deep", ("settle_s = 20", "settle_s = 20\n[planning_extra]\nx = " + "[" * 5000 + "]" * 5000),
     "config"),
    ("slew-1e-300", ("slew_rate_az_deg_s = 2.0", "slew_rate_az_deg_s = 1e-300"), "telescope.slew_rate_az_deg_s"),
    ("aperture-1e-300", ("aperture_m = 3.8", "aperture_m = 1e-300"), "telescope.aperture_m"),
    ("seeing-default-tiny", ("seeing_arcsec = 1.5", "seeing_arcsec = 5e-324"), "defaults.seeing_arcsec"),
    ("misspelt-required", ("aperture_m = 3.8", "apperture_m = 3.8"), "telescope.apperture_m"),
    ("name-with-escape", ('name = "QTO 3.8 m"', 'name = "QTO\\u001b]0;pwned\\u0007"'), "telescope.name"),
    ("name-bidi", ('name = "QTO 3.8 m"', 'name = "QTO \\u202e3.8"'), "telescope.name"),
]


@pytest.mark.slow
@pytest.mark.parametrize("change, key", [(c, k) for _i, c, k in BROKEN], ids=[i for i, _c, _k in BROKEN])
def test_broken_observatory_toml_is_one_line_naming_the_key(tmp_path, change, key):
    old, new = change
    assert old in BASE
    (tmp_path / "observatory.toml").write_text(BASE.replace(old, new, 1), encoding="utf-8")
    proc = run_cli("init", cwd=tmp_path)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in proc.stderr, proc.stderr
    assert lines[0].startswith(f"nightplan: error: {key}: "), lines[0]
    assert "\x1b" not in proc.stderr and "\u202e" not in proc.stderr
    assert not (tmp_path / "nightplan.sqlite").exists()  # nothing written


@pytest.mark.slow
def test_misspelt_key_names_the_closest_valid_one(tmp_path):
    (tmp_path / "observatory.toml").write_text(BASE.replace("aperture_m = 3.8", "apperture_m = 3.8"), encoding="utf-8")
    proc = run_cli("init", cwd=tmp_path)
    assert "telescope.apperture_m: unknown key; did you mean 'aperture_m'?" in proc.stderr


def _doc() -> dict:
    return tomllib.loads(BASE)


def test_unknown_key_is_reported_before_a_missing_one_with_a_suggestion():
    doc = _doc()
    doc["site"]["latitude"] = doc["site"].pop("latitude_deg")
    with pytest.raises(ConfigError) as e:
        parse_config(doc)
    assert e.value.field == "site.latitude"
    assert "did you mean 'latitude_deg'" in e.value.message
    doc = _doc()
    doc["plannning"] = doc.pop("planning")
    with pytest.raises(ConfigError, match=r"^plannning: unknown key; did you mean 'planning'"):
        parse_config(doc)
    doc = _doc()
    doc["band"][2]["wavelenght_um"] = 0.5
    with pytest.raises(ConfigError, match=r"^band\[2\]\.wavelenght_um: unknown key; did you mean 'wavelength_um'"):
        parse_config(doc)


def test_every_rate_and_size_has_a_floor_and_huge_integers_are_refused():
    for table, key, value in (("telescope", "slew_rate_alt_deg_s", 0.001), ("telescope", "aperture_m", 0.001),
                              ("defaults", "seeing_arcsec", 0.01), ("telescope", "settle_s", 10 ** 400),
                              ("site", "latitude_deg", -(10 ** 400))):
        doc = _doc()
        doc[table][key] = value
        with pytest.raises(ConfigError) as e:
            parse_config(doc)
        assert e.value.field == f"{table}.{key}" and "allowed" in e.value.message


def test_service_settings_and_forecast_share_are_read_and_bounded():
    doc = _doc()
    doc["service"] = {"feed_settle_s": 2.5}
    doc["planning"]["min_forecast_share"] = 0.8
    cfg = parse_config(doc)
    assert cfg.service.feed_settle_s == 2.5 and cfg.planning.min_forecast_share == 0.8
    doc["service"] = {"feed_settle_s": -1}
    with pytest.raises(ConfigError, match=r"^service\.feed_settle_s: "):
        parse_config(doc)
    cfg = parse_config(_doc())
    assert cfg.service.feed_settle_s == 5.0 and cfg.planning.min_forecast_share == 0.5
