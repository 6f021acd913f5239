"""New inputs for AO, moving targets, dish surfaces and thermal bands: config keys, request
fields and the conditions' coherence time, each refused with one line naming the field."""

from __future__ import annotations

import re
import tomllib
from datetime import datetime, timezone

import numpy as np
import pytest

from scheduler.conditions.grid import conditions_on_grid
from scheduler.conditions.ingest import parse_conditions, samples_to_csv
from scheduler.model.config import ConditionDefaults, parse_config, starter_config, starter_config_text
from scheduler.model.errors import ConfigError, InputError
from scheduler.model.request import never_observable_reason, validate_request
from scheduler.sky.bodies import parse_ephemeris_csv
from scheduler.sky import physics as ph

CFG = starter_config()
BASE = {"program": "P1", "target": "thing", "band": "K", "exposure_s": 600}


def _starter() -> dict:
    return tomllib.loads(starter_config_text())


# --------------------------------------------------------------------------- config

def test_ao_pitch_needs_the_turbulence_height():
    data = _starter()
    data["site"].pop("turbulence_height_m", None)
    nir = next(i for i in data["instrument"] if i["name"] == "nir_camera")
    nir["ao_actuator_pitch_m"] = 0.2
    with pytest.raises(ConfigError, match=r"^site.turbulence_height_m: is required: instrument 'nir_camera'"):
        parse_config(data)
    data["site"]["turbulence_height_m"] = 5000
    cfg = parse_config(data)
    inst = cfg.instrument_for("K")
    assert inst.ao_turbulence_model and inst.ao_fitting_coeff == 0.3 and inst.ao_strehl_min == 0.3


@pytest.mark.parametrize("table, key, value, field", [
    ("instrument", "ao_strehl_min", 1.5, "instrument[1].ao_strehl_min"),
    ("instrument", "ao_actuator_pitch_m", 0, "instrument[1].ao_actuator_pitch_m"),
    ("telescope", "surface_rms_um", -3, "telescope.surface_rms_um"),
    ("telescope", "surface_efficiency_floor", 2, "telescope.surface_efficiency_floor"),
    ("site", "air_temperature_c", 99, "site.air_temperature_c"),
    ("site", "turbulence_height_m", 0, "site.turbulence_height_m"),
])
def test_new_keys_out_of_range_are_named(table, key, value, field):
    data = _starter()
    target = data[table][1] if table == "instrument" else data[table]
    target[key] = value
    with pytest.raises(ConfigError, match="^" + re.escape(field) + ": "):
        parse_config(data)


def test_thermal_band_needs_a_dry_opacity():
    data = _starter()
    n = next(b for b in data["band"] if b["name"] == "N")
    n["thermal"] = True
    n["tau_dry"] = 0.0
    with pytest.raises(ConfigError, match=r"^band\[8\].tau_dry: a thermal band needs a dry opacity"):
        parse_config(data)


def test_day_surface_needs_night_surface():
    data = _starter()
    data["telescope"]["surface_rms_day_um"] = 30
    with pytest.raises(ConfigError, match=r"^telescope.surface_rms_day_um: needs surface_rms_um"):
        parse_config(data)


# --------------------------------------------------------------------------- requests

def test_body_request_gets_its_listed_position():
    spec = validate_request({**BASE, "body": "Jupiter", "not_before": "2027-03-01T00:00:00Z"}, CFG)
    assert spec.body == "jupiter" and spec.moving and spec.track == "jupiter" and spec.ephemeris is None
    # the listed position is the one at not_before: PyEphem's astrometric position then (2 arcmin, see test_sky_bodies)
    import ephem
    j = ephem.Jupiter(ephem.Date("2027/3/1 00:00:00"))
    assert spec.ra_deg == pytest.approx(np.degrees(float(j.a_ra)), abs=2 / 60)
    assert spec.dec_deg == pytest.approx(np.degrees(float(j.a_dec)), abs=2 / 60)
    assert never_observable_reason(spec, CFG) is None


def test_exactly_one_target_source():
    with pytest.raises(InputError, match=r"^ra: is required .* unless body or ephemeris_file"):
        validate_request(BASE, CFG)
    with pytest.raises(InputError, match=r"^body: give one of ra/dec, body or ephemeris_file for a target, not ra/dec and body"):
        validate_request({**BASE, "ra": 10, "dec": 5, "body": "mars"}, CFG)
    with pytest.raises(InputError, match=r"^ephemeris_file: give one of"):
        validate_request({**BASE, "body": "mars", "ephemeris": "time,ra,dec\n"}, CFG)
    with pytest.raises(InputError, match=r"^body: 'moon': the Moon"):
        validate_request({**BASE, "body": "moon"}, CFG)
    with pytest.raises(InputError, match=r"^ephemeris_file: the file was not read"):
        validate_request({**BASE, "ephemeris_file": "comet.csv"}, CFG)


TABLE = """time,ra,dec,delta_au
2027-05-01T00:00:00Z,359.0,-20.0,0.4
2027-05-02T00:00:00Z,0.8,-21.0,0.41
2027-05-03T00:00:00Z,2.6,-22.0,0.42
"""


def test_table_request_and_window_cover():
    spec = validate_request({**BASE, "ephemeris": TABLE}, CFG)
    assert spec.ephemeris == parse_ephemeris_csv(TABLE) and spec.track is spec.ephemeris
    assert (spec.ra_deg, spec.dec_deg) == pytest.approx((359.0, -20.0), abs=1e-9)  # first row: no time given
    later = validate_request({**BASE, "ephemeris": TABLE, "not_before": "2027-05-02T00:00:00Z"}, CFG)
    assert later.ra_deg == pytest.approx(0.8, abs=1e-9)
    assert "delta_au" in later.as_dict()["ephemeris"]  # stored as its canonical CSV
    with pytest.raises(InputError, match=r"^ephemeris_file: the table ends at row 3 \(2027-05-03T00:00:00Z\), before not_after"):
        validate_request({**BASE, "ephemeris": TABLE, "not_after": "2027-05-04T00:00:00Z"}, CFG)
    with pytest.raises(InputError, match=r"^ephemeris_file: row 2: time"):
        validate_request({**BASE, "ephemeris": TABLE.replace("2027-05-02", "2027-04-02")}, CFG)
    # geometry: a table that never rises above the limit is refused like a fixed target
    north = TABLE.replace("-20.0", "70.0").replace("-21.0", "71.0").replace("-22.0", "72.0")
    assert "culminates" in never_observable_reason(validate_request({**BASE, "ephemeris": north}, CFG), CFG)


def test_guide_star_separation():
    spec = validate_request({**BASE, "ra": 10, "dec": -30, "guide_star_sep_arcsec": 35}, CFG)
    assert spec.guide_star_sep_arcsec == 35.0
    with pytest.raises(InputError, match=r"^guide_star_sep_arcsec: 700 is out of range; allowed from 0 to 600 arcsec"):
        validate_request({**BASE, "ra": 10, "dec": -30, "guide_star_sep_arcsec": 700}, CFG)
    with pytest.raises(InputError, match=r"^guide_star_sep_arcsec: instrument 'optical_imager' has no adaptive optics"):
        validate_request({**BASE, "band": "V", "ra": 10, "dec": -30, "guide_star_sep_arcsec": 5}, CFG)


def _dish_config():
    data = _starter()
    data["telescope"].update(surface_rms_um=40.0, surface_rms_day_um=60.0, surface_efficiency_floor=0.5)
    data["band"].append({"name": "smm450", "wavelength_um": 450.0, "seeing_limited": False, "tau_dry": 0.5,
                         "tau_per_mm_pwv": 1.0, "twilight": "day"})
    data["band"].append({"name": "mm1300", "wavelength_um": 1300.0, "seeing_limited": False, "tau_dry": 0.017,
                         "tau_per_mm_pwv": 0.04, "twilight": "day"})
    data["instrument"].append({"name": "rx", "bands": ["smm450", "mm1300"], "setup_s": 60})
    return parse_config(data)


def test_band_below_the_surface_floor_is_refused_with_both_numbers():
    cfg = _dish_config()
    eff = float(ph.ruze_efficiency(40.0, 450.0))  # exp(-(4 pi 40 / 450)^2) = 0.288
    assert eff == pytest.approx(0.288, abs=0.001)
    with pytest.raises(InputError, match=r"^band: smm450 \(450 um\): the dish surface \(40 um rms\) leaves an "
                                         r"efficiency of 0.29 \(Ruze\), below the floor 0.5"):
        validate_request({**BASE, "band": "smm450", "ra": 10, "dec": -30}, cfg)
    ok = validate_request({**BASE, "band": "mm1300", "ra": 10, "dec": -30}, cfg)  # 0.86 at 1.3 mm
    assert ok.band == "mm1300"


# --------------------------------------------------------------------------- conditions

def test_coherence_time_column():
    text = ("time,seeing_arcsec,coherence_time_ms\n2026-03-10T00:00:00Z,0.7,4.0\n"
            "2026-03-10T02:00:00Z,0.8,\n2026-03-10T04:00:00Z,0.9,2.0\n")
    rep = parse_conditions(text)
    assert [s.coherence_time_ms for s in rep] == [4.0, None, 2.0]
    assert [s.coherence_time_ms for s in parse_conditions(samples_to_csv(rep.samples))] == [4.0, None, 2.0]
    t0 = datetime(2026, 3, 10, tzinfo=timezone.utc).timestamp()
    d = ConditionDefaults(seeing_arcsec=1.5, pwv_mm=8.0, cloud_mag=0.3, wind_ms=5.0, humidity_pct=50.0, dome_open=True)
    g = conditions_on_grid(rep, t0 + np.array([-3600.0, 0, 7200, 14400, 18000]), d)
    np.testing.assert_allclose(g.coherence_time_ms, [np.nan, 4.0, 3.0, 2.0, np.nan])
    assert g.covered[1:4].all()  # the optional column does not decide coverage
    with pytest.raises(InputError, match=r"coherence_time_ms.*0'? is out of range; allowed greater than 0"):
        parse_conditions("time,coherence_time_ms\n2026-03-10T00:00:00Z,0\n")
