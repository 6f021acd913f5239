"""Plan outputs through the real CLI: export contract, show --json agreement, CSV, chart, why, next.

One small invented queue on the night of 2026-12-16 at the starter (fictional) site, built once
per module with a 2 s solver limit. Request ids follow the CSV order below.
"""

from __future__ import annotations

import csv
import io
import json
import re
import shutil
import struct
from datetime import datetime, timedelta

import numpy as np
import pytest

from conftest import cli_json, run_cli

NIGHT = "2026-12-16"
BEFORE = "2026-12-16T18:00:00Z"  # plan the whole night (the clock is before sunset)

# The site is at latitude -26.6 deg: Dec +70 culminates at -6.6 deg (never rises). WIN-HIGH and
# WIN-LOW share a 45 min window and each needs 33 min (1800 s + 180 s setup): only one fits, and
# the priority 9 one should hold it.
REQUESTS = """program,target,ra,dec,band,exposure_s,not_before,not_after,priority
STAR-1,NEVER-UP,105.0,70.0,R,900,,,5
STAR-1,WIN-HIGH,75.0,-30.0,V,1800,2026-12-17T04:00:00Z,2026-12-17T04:45:00Z,9
STAR-1,WIN-LOW,76.0,-31.0,V,1800,2026-12-17T04:00:00Z,2026-12-17T04:45:00Z,3
STAR-1,FILL-A,30.0,-20.0,R,1200,,,5
STAR-1,FILL-B,120.0,-45.0,J,1200,,,5
STAR-1,FILL-C,60.0,-60.0,N,900,,,5
STAR-1,FILL-D,150.0,-10.0,I,900,,,5
"""
NEVER_UP, WIN_HIGH, WIN_LOW = 1, 2, 3

CONTRACT = {
    "site": {"lat_deg", "lon_deg", "elevation_m"},
    "telescope": {"aperture_m", "slew_rate_az_deg_s", "slew_rate_alt_deg_s", "settle_s"},
    "night": {"start", "end"},
    "plan": {"version", "created_at", "reason", "solver_status", "objective", "bound", "gap"},
}
ENTRY_CONTRACT = {"request_id", "target", "ra_deg", "dec_deg", "band", "band_wavelength_um", "start", "end", "slew_s",
                  "setup_s", "airmass_start", "airmass_end", "predicted_fwhm_arcsec", "predicted_pwv_mm",
                  "transmission", "merit"}


def forecast_csv() -> str:
    rows = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome"]
    t = datetime.fromisoformat("2026-12-16T22:00:00+00:00")
    for _ in range(13):
        rows.append(f"{t.strftime('%Y-%m-%dT%H:%M:%SZ')},0.8,2.0,0.0,5,30,open")
        t += timedelta(hours=1)
    return "\n".join(rows) + "\n"


def make_queue(folder) -> None:
    (folder / "requests.csv").write_text(REQUESTS, encoding="utf-8")
    (folder / "forecast.csv").write_text(forecast_csv(), encoding="utf-8")
    run_cli("request", "import", "requests.csv", cwd=folder, check=True)
    run_cli("conditions", "load", "forecast.csv", "--source", "test forecast (invented)", cwd=folder, check=True)


def build(folder, reason: str = "test build") -> str:
    return run_cli("plan", "build", "--night", NIGHT, "--now", BEFORE, "--reason", reason,
                   cwd=folder, check=True).stdout


@pytest.fixture(scope="module")
def planned(tmp_path_factory, _initialised_template):
    folder = tmp_path_factory.mktemp("report")
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(_initialised_template / name, folder / name)
    make_queue(folder)
    out = build(folder)
    assert "plan version 1 stored" in out
    return folder


@pytest.fixture(scope="module")
def shown(planned):
    """`plan show --json` of the module's plan (read once)."""
    return cli_json("plan", "show", cwd=planned)


def test_build_summary_names_the_figures(planned):
    out = run_cli("plan", "list", "--json", cwd=planned, check=True).stdout
    rows = json.loads(out)
    assert [r["version"] for r in rows] == [1] and rows[0]["active"] is True


def test_export_json_has_every_contract_field_and_agrees_with_show(planned, shown):
    proc = run_cli("plan", "export", "--format", "json", "-o", "out/plan.json", cwd=planned, check=True)
    assert "exported as JSON" in proc.stdout
    assert "interlocks" in proc.stderr  # the caution goes with every export
    path = planned / "out" / "plan.json"
    doc = json.loads(path.read_text(encoding="utf-8"))
    assert not [p for p in path.parent.iterdir() if p.name != "plan.json"]  # no temp file left behind
    for section, keys in CONTRACT.items():
        assert keys <= set(doc[section]), (section, keys - set(doc[section]))
    assert {"entries", "unscheduled", "caution"} <= set(doc)
    assert doc["entries"], "the test queue should give a plan with entries"
    for e in doc["entries"]:
        assert ENTRY_CONTRACT <= set(e), ENTRY_CONTRACT - set(e)
        assert e["start"].endswith("Z") and e["end"].endswith("Z")
        assert datetime.fromisoformat(e["end"].replace("Z", "+00:00")) > datetime.fromisoformat(
            e["start"].replace("Z", "+00:00"))
        assert e["airmass_start"] >= 1.0 and 0.0 < e["transmission"] <= 1.0 and 0.0 < e["merit"] <= 1.0
    for u in doc["unscheduled"]:
        assert {"request_id", "reason"} <= set(u)
    # one entry = one execution of the full exposure: end - start covers setup + exposure
    for e in doc["entries"]:
        span = (datetime.fromisoformat(e["end"].replace("Z", "+00:00"))
                - datetime.fromisoformat(e["start"].replace("Z", "+00:00"))).total_seconds()
        assert span >= e["setup_s"] + e["exposure_s"] - 1e-6
    assert shown["entries"] == doc["entries"]
    assert shown["plan"] == doc["plan"] and shown["unscheduled"] == doc["unscheduled"]
    assert doc["site"]["lat_deg"] == pytest.approx(-26.647)  # the starter config's invented site
    assert doc["telescope"]["aperture_m"] == pytest.approx(3.8)


def test_export_csv_one_row_per_entry(planned, shown):
    text = run_cli("plan", "export", "--format", "csv", cwd=planned, check=True).stdout
    rows = list(csv.DictReader(io.StringIO(text)))
    doc = shown
    assert len(rows) == len(doc["entries"])
    for row, e in zip(rows, doc["entries"]):
        assert int(row["request_id"]) == e["request_id"] and row["start"] == e["start"]
        assert float(row["airmass_start"]) == pytest.approx(e["airmass_start"])
        assert ENTRY_CONTRACT <= set(row)


def test_show_table_has_summary_times_and_caution(planned, shown):
    out = run_cli("plan", "show", cwd=planned, check=True).stdout
    doc = shown
    assert "dark hours used" in out and "gap" in out and "report 1 from test forecast" in out
    assert "interlocks" in out
    first = doc["entries"][0]
    assert first["start"][11:16] in out and first["start_local"][11:16] in out  # UTC and local time


def test_plan_document_is_made_from_plain_data(tmp_path):
    """The report takes a StoredPlan (what storage reads) and needs no database."""
    from datetime import date

    from scheduler.model.config import load_config, starter_config_text
    from scheduler.model.plan import RequestLabel, StoredEntry, StoredPlan
    from scheduler.report.export import plan_document
    from scheduler.sky.night import night_for

    (tmp_path / "observatory.toml").write_text(starter_config_text(), encoding="utf-8")
    config = load_config(str(tmp_path / "observatory.toml"))
    night = night_for(config.site, date(2026, 12, 16), config.planning.step_s)
    t0 = night.astronomical_dusk + timedelta(minutes=30)

    def entry(rid, minutes):
        start = t0 + timedelta(minutes=minutes)
        return StoredEntry(request_id=rid, execution=0, start=start, end=start + timedelta(minutes=20), slew_s=30.04,
                           transition_s=45.0, setup_s=120.0, exposure_s=1080.0, airmass_start=1.23456,
                           airmass_end=1.3, fwhm_arcsec=0.8123, pwv_mm=2.049, transmission=0.95, merit=0.81234,
                           moon_sep_deg=None, value=2.0, fixed=False)

    plan = StoredPlan(
        version=7, night=date(2026, 12, 16), created_at=t0, reason="plain data", planned_from=night.start,
        solver_status="OPTIMAL", objective=4.0, bound=4.0, gap=0.0, runtime_s=1.234, greedy_objective=3.0,
        active=True, superseded_at=None, previous_version=6,
        summary={"unscheduled": [{"request_id": 9, "reason": "never rises"}], "queue_size": 3},
        diff={}, entries=(entry(2, 60), entry(1, 0)),
        requests={1: RequestLabel(1, "STAR-1", "Alpha", 10.0, -30.0, "V", "imager"),
                  9: RequestLabel(9, "STAR-2", "Gamma", 105.0, 70.0, "R", None)},
        conditions_report_id=None, conditions=None)
    doc = plan_document(plan, config, night)
    assert [e["request_id"] for e in doc["entries"]] == [1, 2]  # in time order
    first, second = doc["entries"]
    assert (first["target"], first["program"], first["band"], first["band_wavelength_um"]) == \
        ("Alpha", "STAR-1", "V", config.bands["V"].wavelength_um)
    assert second["target"] is None and second["program"] is None  # a request storage could not name
    assert first["airmass_start"] == 1.235 and first["slew_s"] == 30.0 and first["moon_sep_deg"] is None
    assert doc["unscheduled"] == [{"request_id": 9, "reason": "never rises", "target": "Gamma", "program": "STAR-2",
                                   "band": "R"}]
    assert doc["plan"]["version"] == 7 and doc["plan"]["previous_version"] == 6
    assert doc["plan"]["conditions"]["report_id"] is None and "defaults" in doc["plan"]["conditions"]["note"]
    assert doc["site"]["name"] == config.site.name  # not stored with the plan: the configuration's
    assert doc["summary"]["entries"] == 2 and doc["summary"]["scheduled_hours"] == round(40 / 60, 3)
    assert doc["summary"]["queue_size"] == 3 and doc["summary"]["unscheduled"] == 1
    assert first["start"].endswith("Z") and first["start_local"][-6] in "+-"


def _png_size(data: bytes) -> tuple[int, int]:
    assert data[:8] == b"\x89PNG\r\n\x1a\n", "not a PNG signature"
    assert data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


@pytest.mark.slow
def test_chart_is_a_readable_png(planned):
    proc = run_cli("plan", "chart", "-o", "chart.png", cwd=planned, check=True)
    data = (planned / "chart.png").read_bytes()
    w, h = _png_size(data)
    assert 1200 <= w <= 2600 and 700 <= h <= 1600, (w, h)
    assert len(data) > 40_000  # a real drawing, not an empty canvas
    import matplotlib.image as mpimg

    img = mpimg.imread(planned / "chart.png")
    assert img.shape[0] == h and img.shape[1] == w
    assert float(np.std(img[..., :3])) > 0.05  # not a blank page
    assert "chart of plan version 1" in proc.stdout
    bad = run_cli("plan", "chart", "-o", "chart.jpg", cwd=planned)
    assert bad.returncode == 2 and "output" in bad.stderr and not (planned / "chart.jpg").exists()


def test_why_never_rising_target_names_altitude(planned):
    res = cli_json("plan", "why", str(NEVER_UP), cwd=planned)
    assert res["state"] == "never_feasible"
    assert res["binding"] == ["ALTITUDE"]
    # culmination altitude 90 - |lat - dec| = 90 - 96.647 = -6.6 deg (geometry of the meridian transit);
    # the grid's highest value is within a few tenths of it (true altitude, no refraction)
    assert "highest altitude -6." in res["details"]["ALTITUDE"]


@pytest.mark.slow
def test_why_displaced_request_names_the_entry_that_holds_its_time(planned):
    res = cli_json("plan", "why", str(WIN_LOW), cwd=planned)
    assert res["state"] == "displaced"
    assert WIN_HIGH in [d["request_id"] for d in res["displaced_by"]]
    assert res["value_needed"] > res["value_at_best"] > 0
    text = run_cli("plan", "why", str(WIN_LOW), cwd=planned, check=True).stdout
    assert "displaced" in text and f"#{WIN_HIGH} WIN-HIGH" in text
    win = cli_json("plan", "why", str(WIN_HIGH), cwd=planned)
    assert win["state"] == "scheduled" and win["entries"][0]["request_id"] == WIN_HIGH
    assert "04:00:00Z" <= win["entries"][0]["start"][11:] and win["entries"][0]["end"][11:] <= "04:45:00Z"


@pytest.mark.slow
def test_why_altitude_and_airmass_come_from_the_same_time(planned, tmp_path):
    """A target rising late (RA 12h, Dec -27: airmass under 1.3 only from about 07:50 UTC, shortly
    before dawn) with a window that closes at 07:30, asked about after a mid-night re-plan. The
    altitude figure is read where only the altitude fails (before 07:30); the airmass printed next
    to it must be the airmass there, not the lower one of the dawn the window excludes."""
    from scheduler.sky.airmass import kasten_young_1989

    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(planned / name, tmp_path / name)
    rid = run_cli("request", "add", "--program", "STAR-1", "--target", "LATE-RISER", "--ra", "180", "--dec", "-27",
                  "--band", "V", "--exposure", "300", "--max-airmass", "1.3", "--not-after", "2026-12-17T07:30:00Z",
                  cwd=tmp_path, check=True).stdout
    rid = re.search(r"\d+", rid).group(0)
    run_cli("plan", "build", "--night", NIGHT, "--now", "2026-12-17T02:00:00Z",
            "--reason", "mid-night re-plan", cwd=tmp_path, check=True)
    res = cli_json("plan", "why", rid, cwd=tmp_path)
    assert res["plan_version"] == 2 and res["state"] == "never_feasible" and res["binding"] == ["ALTITUDE"]
    text = res["details"]["ALTITUDE"]
    m = re.search(r"highest altitude ([\d.]+) deg at (\d\d:\d\d) UTC.*lowest airmass ([\d.]+)", text)
    assert m, text
    alt, at, airmass = float(m.group(1)), m.group(2), float(m.group(3))
    assert "02:00" <= at <= "07:30"
    # Kasten & Young (1989) at the printed altitude (rounded to 0.1 deg); over the 1.3 it allows
    assert airmass == pytest.approx(float(kasten_young_1989(alt)), abs=0.01)
    assert airmass > 1.3
    assert res["closest"]["time"][11:16] == at


def test_why_unknown_request_is_a_clean_error(planned):
    proc = run_cli("plan", "why", "999", cwd=planned)
    assert proc.returncode == 2 and "request 999 not found" in proc.stderr and "Traceback" not in proc.stderr


@pytest.mark.slow
def test_next_inside_an_entry(planned, shown):
    entries = sorted(shown["entries"], key=lambda e: e["start"])
    assert len(entries) >= 3
    e = entries[0]
    mid = datetime.fromisoformat(e["start"].replace("Z", "+00:00")) + timedelta(minutes=5)
    res = cli_json("next", "--at", mid.strftime("%Y-%m-%dT%H:%M:%SZ"), cwd=planned)
    assert res["current"]["request_id"] == e["request_id"] and res["until"] == e["end"]
    assert [u["request_id"] for u in res["upcoming"]] == [x["request_id"] for x in entries[1:3]]
    text = run_cli("next", "--at", mid.strftime("%Y-%m-%dT%H:%M:%SZ"), cwd=planned, check=True).stdout
    assert text.count("\n") >= 4 and "NOW" in text and "NEXT" in text and "interlocks" in text
    before = cli_json("next", "--at", "2026-12-16T20:00:00Z", cwd=planned)  # before sunset
    assert before["current"] is None and before["state"] == "before"
    assert before["upcoming"][0]["request_id"] == entries[0]["request_id"]
