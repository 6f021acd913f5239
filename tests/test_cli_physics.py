"""Moving targets, adaptive optics and dish surfaces through the real CLI on a real SQLite file."""

from __future__ import annotations

import json
import shutil
import sqlite3
import tomllib
from datetime import datetime, timedelta, timezone

import pytest

from conftest import cli_json, run_cli

pytestmark = pytest.mark.slow

NIGHT = "2026-12-16"
BEFORE = "2026-12-16T20:00:00Z"
BASE = ["--program", "STAR-1", "--band", "K", "--exposure", "600"]


def _comet_table(start: datetime, hours: int, bad_row: int | None = None) -> str:
    """An invented comet crossing RA 0/360, hourly rows, 0.4 AU away."""
    lines = ["time,ra,dec,delta_au"]
    for h in range(hours):
        t = start + timedelta(hours=h)
        if bad_row is not None and h + 1 == bad_row:
            t = start - timedelta(hours=1)  # out of order
        lines.append(f"{t.strftime('%Y-%m-%dT%H:%M:%SZ')},{(359.0 + 0.2 * h) % 360.0:.4f},{-32.0 + 0.05 * h:.4f},0.4")
    return "\n".join(lines) + "\n"


def _count_requests(folder) -> int:
    with sqlite3.connect(folder / "nightplan.sqlite") as conn:
        return conn.execute("select count(*) from request").fetchone()[0]


def test_add_body_and_ephemeris_and_refusals(workdir):
    rid = int(run_cli("request", "add", *BASE, "--target", "Jupiter", "--body", "Jupiter", cwd=workdir,
                      check=True).stdout)
    d = cli_json("request", "show", str(rid), cwd=workdir)
    assert d["body"] == "jupiter" and d["ephemeris_rows"] is None

    start = datetime(2026, 12, 16, 18, tzinfo=timezone.utc)
    (workdir / "comet.csv").write_text(_comet_table(start, 24), encoding="utf-8")
    rid2 = int(run_cli("request", "add", *BASE, "--target", "C/Invented", "--ephemeris", "comet.csv",
                       cwd=workdir, check=True).stdout)
    d2 = cli_json("request", "show", str(rid2), cwd=workdir)
    assert d2["ephemeris_rows"] == 24 and d2["body"] is None
    listing = run_cli("request", "list", cwd=workdir, check=True).stdout
    assert "table" in listing and "jupiter" in listing

    n = _count_requests(workdir)
    (workdir / "bad.csv").write_text(_comet_table(start, 6, bad_row=4), encoding="utf-8")
    for extra, message in (
        (["--ephemeris", "bad.csv"], "ephemeris_file: row 4: time 2026-12-16T17:00:00Z is not after row 3's"),
        (["--ephemeris", "missing.csv"], "ephemeris_file: missing.csv:"),
        (["--body", "moon"], "body: 'moon': the Moon"),
        (["--body", "mars", "--ra", "10", "--dec", "5"], "give one of ra/dec, body or ephemeris_file"),
        (["--ra", "10", "--dec", "5", "--guide-star-sep", "900"], "guide_star_sep_arcsec: '900' is out of range"),
        (["--ephemeris", "comet.csv", "--not-after", "2026-12-20T00:00:00Z"], "the table ends at row 24"),
    ):
        proc = run_cli("request", "add", *BASE, "--target", "x", *extra, cwd=workdir)
        assert proc.returncode == 2, proc.stderr
        lines = proc.stderr.strip().splitlines()
        assert len(lines) == 1 and message in lines[0], proc.stderr
    assert _count_requests(workdir) == n  # nothing written


def test_import_body_and_ephemeris_file_columns_relative_to_the_file(workdir):
    sub = workdir / "queue"
    (sub / "tables").mkdir(parents=True)
    (sub / "tables" / "comet.csv").write_text(_comet_table(datetime(2026, 12, 16, 18, tzinfo=timezone.utc), 24),
                                              encoding="utf-8")
    (sub / "requests.csv").write_text(
        "program,target,ra,dec,band,exposure_s,body,ephemeris_file,guide_star_sep_arcsec\n"
        "STAR-1,Saturn,,,K,600,saturn,,\n"
        "STAR-1,C/Invented,,,R,900,,tables/comet.csv,\n"
        "STAR-1,AO field,10.0,-30.0,K,600,,,12\n", encoding="utf-8")
    out = run_cli("request", "import", "queue/requests.csv", cwd=workdir, check=True).stdout
    assert "imported 3 requests" in out
    rows = {r["target"]: r for r in cli_json("request", "list", cwd=workdir)}
    assert rows["Saturn"]["body"] == "saturn"
    assert rows["C/Invented"]["ephemeris_rows"] == 24
    assert rows["AO field"]["guide_star_sep_arcsec"] == 12.0
    # a missing table names the row and the column; nothing is imported
    (sub / "more.csv").write_text("program,target,band,exposure_s,ephemeris_file\n"
                                  "STAR-1,C/Lost,R,900,tables/none.csv\n", encoding="utf-8")
    proc = run_cli("request", "import", "queue/more.csv", cwd=workdir)
    assert proc.returncode == 2 and "ephemeris_file" in proc.stderr and "row 2" in proc.stderr, proc.stderr
    assert _count_requests(workdir) == 3


def test_band_below_the_dish_surface_floor_is_refused(workdir):
    text = (workdir / "observatory.toml").read_text(encoding="utf-8")
    text = text.replace("settle_s = 20\n", "settle_s = 20\nsurface_rms_um = 40\nsurface_rms_day_um = 60\n"
                                           "surface_efficiency_floor = 0.5\n", 1)
    text += ('\n[[band]]\nname = "smm450"\nwavelength_um = 450\nseeing_limited = false\ntau_dry = 0.5\n'
             'tau_per_mm_pwv = 1.0\ntwilight = "day"\n\n[[instrument]]\nname = "rx"\nbands = ["smm450"]\nsetup_s = 60\n')
    tomllib.loads(text)
    (workdir / "observatory.toml").write_text(text, encoding="utf-8")
    proc = run_cli("request", "add", "--program", "STAR-1", "--target", "dust", "--ra", "10", "--dec", "-30",
                   "--band", "smm450", "--exposure", "600", cwd=workdir)
    assert proc.returncode == 2
    # Ruze: exp(-(4 pi 40 / 450)^2) = 0.29, both numbers shown
    assert "efficiency of 0.29 (Ruze), below the floor 0.5" in proc.stderr, proc.stderr
    assert _count_requests(workdir) == 0


@pytest.fixture(scope="module")
def planned(tmp_path_factory, _initialised_template):
    folder = tmp_path_factory.mktemp("physics_plan")
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(_initialised_template / name, folder / name)
    (folder / "comet.csv").write_text(_comet_table(datetime(2026, 12, 16, 18, tzinfo=timezone.utc), 24),
                                      encoding="utf-8")
    (folder / "requests.csv").write_text(
        "program,target,ra,dec,band,exposure_s,resolution_arcsec,body,ephemeris_file,guide_star_sep_arcsec,priority\n"
        "STAR-1,Saturn,,,K,600,,saturn,,,8\n"
        "STAR-1,C/Invented,,,R,900,,,comet.csv,,8\n"
        "STAR-1,AO near,40.0,-35.0,K,600,0.25,,,0,9\n"
        "STAR-1,AO far,41.0,-36.0,K,600,0.25,,,35,9\n", encoding="utf-8")
    rows = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome,coherence_time_ms"]
    t = datetime(2026, 12, 16, 22, tzinfo=timezone.utc)
    for _ in range(13):
        rows.append(f"{t.strftime('%Y-%m-%dT%H:%M:%SZ')},0.7,2.0,0.0,5,30,open,4.0")
        t += timedelta(hours=1)
    (folder / "forecast.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    run_cli("request", "import", "requests.csv", cwd=folder, check=True)
    run_cli("conditions", "load", "forecast.csv", "--source", "invented forecast", cwd=folder, check=True)
    run_cli("plan", "build", "--night", NIGHT, "--now", BEFORE, cwd=folder, check=True)
    return folder


def test_plan_with_moving_targets_and_ao(planned):
    doc = cli_json("plan", "show", cwd=planned)
    ents = {e["target"]: e for e in doc["entries"]}
    assert {"Saturn", "C/Invented", "AO near"} <= set(ents), doc["unscheduled"]
    assert "AO far" not in ents
    listed = {r["target"]: r for r in cli_json("request", "list", cwd=planned)}
    # the comet's exported position is the table's at the entry's start (0.2 deg/h in RA from 359.0)
    c = ents["C/Invented"]
    h = (datetime.fromisoformat(c["start"].replace("Z", "+00:00"))
         - datetime(2026, 12, 16, 18, tzinfo=timezone.utc)).total_seconds() / 3600.0
    assert c["ra_deg"] == pytest.approx((359.0 + 0.2 * h) % 360.0, abs=1e-3)
    assert c["dec_deg"] == pytest.approx(-32.0 + 0.05 * h, abs=1e-3)
    assert c["dec_deg"] != pytest.approx(listed["C/Invented"]["dec_deg"], abs=1e-3)
    assert ents["Saturn"]["body"] == "saturn"
    # predicted Strehl where AO is modelled (K with the NIR camera), null elsewhere
    assert 0.3 <= ents["AO near"]["strehl"] <= 1.0 and ents["Saturn"]["strehl"] is not None
    assert c["strehl"] is None and c["surface_efficiency"] is None
    assert run_cli("plan", "check", cwd=planned).returncode == 0
    csv_out = run_cli("plan", "export", "--format", "csv", "-o", "plan.csv", cwd=planned, check=True)
    header = (planned / "plan.csv").read_text(encoding="utf-8").splitlines()[0]
    assert "strehl" in header and "surface_efficiency" in header, csv_out.stdout


def test_plan_why_names_the_binding_physics(planned):
    far = next(r for r in cli_json("request", "list", cwd=planned) if r["target"] == "AO far")
    out = run_cli("plan", "why", str(far["id"]), cwd=planned, check=True).stdout
    assert "AO Strehl in K 0.0" in out and "at 35 arcsec from the guide star, needs 0.3" in out, out
    data = json.loads(run_cli("plan", "why", str(far["id"]), "--json", cwd=planned, check=True).stdout)
    assert data["binding"] == ["AO_STREHL"]
