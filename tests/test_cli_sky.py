"""`almanac`, `conditions load|show` and `request show --night` through the real CLI."""

from __future__ import annotations

from datetime import datetime

import pytest

from conftest import cli_json, run_cli

NIGHT = "2026-12-05"


def test_almanac_json_keys_and_order(workdir):
    data = cli_json("almanac", "--night", NIGHT, cwd=workdir)
    keys = ["sunset", "civil_dusk", "nautical_dusk", "astronomical_dusk",
            "astronomical_dawn", "nautical_dawn", "civil_dawn", "sunrise"]
    for k in keys + ["moon_illumination", "site"]:
        assert k in data
    times = [datetime.fromisoformat(data[k].replace("Z", "+00:00")) for k in keys]
    assert times == sorted(times)
    assert 0.0 <= data["moon_illumination"] <= 1.0
    assert data["site"]["lat_deg"] == pytest.approx(-26.647)
    # Early December in the southern hemisphere: short nights, 6-8 h of astronomical darkness.
    assert 6.0 < data["dark_hours"] < 8.0


def test_almanac_moon_illumination_against_pyephem(workdir):
    ephem = pytest.importorskip("ephem")
    data = cli_json("almanac", "--night", NIGHT, cwd=workdir)
    # Reference: PyEphem's Moon phase (percent illuminated) at the grid's middle time.
    start = datetime.fromisoformat(data["grid"]["start"].replace("Z", "+00:00"))
    n, step = data["grid"]["n_times"], data["grid"]["step_s"]
    mid = start.timestamp() + (n // 2) * step
    obs = ephem.Observer()
    obs.lat, obs.lon, obs.elevation = "-26.647", "-67.633", 3870
    obs.date = ephem.Date(datetime.utcfromtimestamp(mid))
    moon = ephem.Moon(obs)
    assert data["moon_illumination"] == pytest.approx(moon.moon_phase, abs=0.01)


@pytest.mark.slow
def test_conditions_load_show_and_refusal(workdir):
    good = workdir / "forecast.csv"
    good.write_text("time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome\n"
                    "2026-12-06T00:00:00Z,0.7,1.5,0,4,20,open\n"
                    "2026-12-06T06:00:00Z,1.1,4.0,,6,35,open\n")
    proc = run_cli("conditions", "load", str(good), cwd=workdir)
    assert proc.returncode == 0, proc.stderr
    shown = cli_json("conditions", "show", cwd=workdir)
    assert len(shown["samples"]) == 2 and shown["samples"][1]["cloud_mag"] is None
    for bad_line, field in [("2026-12-06T07:00:00Z,0.7,-1,0,4,20,open", "pwv_mm"),
                            ("not-a-time,0.7,1,0,4,20,open", "time"),
                            ("2026-12-06T07:00:00Z,0,1,0,4,20,open", "seeing_arcsec"),
                            ("2026-12-06T07:00:00Z,0.7,1,0,4,20,ajar", "dome")]:
        bad = workdir / "bad.csv"
        bad.write_text("time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome\n"
                       "2026-12-06T06:30:00Z,0.7,1.5,0,4,20,open\n" + bad_line + "\n")
        proc = run_cli("conditions", "load", str(bad), cwd=workdir)
        assert proc.returncode == 2 and "row 3" in proc.stderr and field in proc.stderr, proc.stderr
        assert len(proc.stderr.strip().splitlines()) == 1
    assert cli_json("conditions", "show", cwd=workdir)["id"] == shown["id"]  # nothing new stored


@pytest.mark.slow
def test_request_show_night_windows_and_binding_constraint(workdir):
    # Dec +60 culminates at 90 - |(-26.6) - 60| = 3.4 deg: never above the 20 deg limit.
    low = run_cli("request", "add", "--program", "STAR-1", "--target", "north", "--ra", "0", "--dec", "60",
                  "--band", "V", "--exposure", "300", cwd=workdir, check=True).stdout.strip()
    # RA 60 deg is near opposition in early December: up most of the night at this site.
    good = run_cli("request", "add", "--program", "STAR-1", "--target", "south", "--ra", "60", "--dec", "-30",
                   "--band", "V", "--exposure", "300", cwd=workdir, check=True).stdout.strip()
    w_low = cli_json("request", "show", low, "--night", NIGHT, cwd=workdir)["windows"]
    assert w_low["windows"] == [] and w_low["binding_constraint"] == "ALTITUDE"
    w_good = cli_json("request", "show", good, "--night", NIGHT, cwd=workdir)["windows"]
    assert w_good["windows"], w_good
    alma = cli_json("almanac", "--night", NIGHT, cwd=workdir)
    # V needs astronomical darkness: every window lies inside it (steps are checked at both ends).
    def ts(text):
        return datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()

    for win in w_good["windows"]:
        assert ts(win["start"]) >= ts(alma["astronomical_dusk"])
        assert ts(win["end"]) <= ts(alma["astronomical_dawn"])
