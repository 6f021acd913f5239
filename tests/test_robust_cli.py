"""Issue-level bad input and operator mistakes through the real CLI on a real SQLite file.

Companion of tests/test_robust_cli_reproductions.py (the reproductions as first filed): each test
here fails on a command line that does not call the shared check named in its docstring.
"""

from __future__ import annotations

import pytest

from conftest import cli_json, run_cli

pytestmark = pytest.mark.slow


def refused(proc, field: str) -> str:
    """Exit 2, one line naming the field, nothing a terminal would act on; returns the line."""
    assert proc.returncode == 2, (proc.returncode, proc.stdout, proc.stderr)
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and f"{field}: " in lines[0], proc.stderr
    assert "\x1b" not in proc.stderr + proc.stdout and "Traceback" not in proc.stderr
    return lines[0]


# --------------------------------------------------------------------------- text and numbers


@pytest.mark.parametrize("reason", ["storm\x1b[2J", "a\u202eb", "\u200b", "x\x9by"],
                         ids=["esc", "bidi", "invisible", "c1"])
def test_plan_build_reason_is_checked_text(workdir, reason):
    """plan build --reason goes through model.untrusted.check_text; nothing is stored."""
    refused(run_cli("plan", "build", "--night", "2026-12-16", "--now", "2026-12-16T18:00:00Z", "--reason", reason,
                    "--time-limit", "1", cwd=workdir), "reason")
    assert cli_json("plan", "list", cwd=workdir) == []


def test_plan_build_night_at_the_end_of_the_calendar(workdir):
    """--night is read by model.timegrid.parse_date in every command (here plan build and plan list)."""
    line = refused(run_cli("plan", "build", "--night", "9999-12-31", cwd=workdir), "night")
    assert "1900" in line
    refused(run_cli("plan", "list", "--night", "0001-01-01", cwd=workdir), "night")


@pytest.mark.parametrize("args, field", [
    (["P2", "--pi", "Dr. X", "--weight", "1_0"], "weight"),
    (["P2", "--pi", "Dr. X", "--hours", "\u0661\u0660"], "hours"),
    (["P2", "--pi", "Dr. X", "--weight", "1e-320"], "weight"),
    (["P2", "--pi", "Dr.\x7fX"], "pi"),
], ids=["weight-1_0", "hours-arabic-digits", "weight-subnormal", "pi-del"])
def test_program_add_numbers_and_names(workdir, args, field):
    """program add: store.add_program calls model.request.validate_program; numbers are read as text."""
    refused(run_cli("program", "add", *args, cwd=workdir), field)
    assert [p["code"] for p in cli_json("program", "list", cwd=workdir)] == ["STAR-1"]


def test_program_add_still_takes_plain_numbers(workdir):
    run_cli("program", "add", "P2", "--pi", "Dr. Aino Vesk", "--hours", "7.5", "--weight", "0.5", cwd=workdir,
            check=True)
    p2 = [p for p in cli_json("program", "list", cwd=workdir) if p["code"] == "P2"][0]
    assert p2["hours"] == 7.5 and p2["weight"] == 0.5


def test_file_names_with_controls_are_stored_escaped(workdir):
    """A conditions file's name becomes the report's source when it names none: stored escaped
    (conditions.ingest passes it through model.untrusted.safe_name), by `conditions load` and by
    the service's feed alike. A guard: this held before the command-line wiring."""
    import os

    body = "time,pwv_mm\n2026-12-16T23:00:00Z,1\n"
    odd = workdir / "met\x1b]0;owned\x07.csv"
    odd.write_text(body, encoding="utf-8")
    run_cli("conditions", "load", str(odd), cwd=workdir, check=True)
    feed = workdir / "feed"
    feed.mkdir()
    (feed / "dome\u202ecsv.csv").write_text(body.replace("23:00", "23:30"), encoding="utf-8")
    os.utime(feed / "dome\u202ecsv.csv", (1e9, 1e9))  # written long ago: settled at the first look
    proc = run_cli("serve", "--once", "--watch", "feed", "--clock", "2026-12-16T20:00:00Z", cwd=workdir, timeout=120)
    assert " conditions_stored " in proc.stdout, proc.stdout + proc.stderr
    from scheduler.db.session import open_db
    from scheduler.db.models import ConditionsReport
    from sqlalchemy import select

    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    try:
        with db.session() as s:
            sources = list(s.scalars(select(ConditionsReport.source).order_by(ConditionsReport.id)))
    finally:
        db.dispose()
    assert sources == ["'met\\x1b]0;owned\\x07.csv'", "'dome\\u202ecsv.csv'"]


# --------------------------------------------------------------------------- request import

HEADER = "program,target,ra,dec,band,exposure_s"


@pytest.mark.parametrize("name, text, field, row", [
    ("object.json", '[{"program": "STAR-1", "target": {"x": 1}, "ra": 10, "dec": -20, "band": "V", "exposure_s": 100}]',
     "target", 1),
    ("list.json", '[{"program": "STAR-1", "target": "a", "ra": [10], "dec": -20, "band": "V", "exposure_s": 100}]',
     "ra", 1),
    ("entry.json", '[{"program": "STAR-1", "target": "a", "ra": 10, "dec": -20, "band": "V", "exposure_s": 100}, 7]',
     "request", 2),
    ("surplus.csv", f"{HEADER}\nSTAR-1,a,10,-20,V,100\nSTAR-1,b,10,-20,V,100,9\n", "columns", 3),
    ("cell.csv", f"{HEADER},not_after\nSTAR-1,a,10,-20,V,100," + "9" * 132_000 + "\n", "not_after", 2),
    ("twice.csv", f"{HEADER},program\nSTAR-1,a,10,-20,V,100,OTHER\n", "program", 1),
], ids=["json-object-for-text", "json-list-for-ra", "json-entry-not-object", "csv-surplus-value",
        "csv-cell-over-limit", "csv-program-twice"])
def test_request_import_names_column_and_row(workdir, name, text, field, row):
    """request import parses through model.request.parse_import_text: the wrong shape is refused
    naming the column and the row, and nothing is imported."""
    f = workdir / name
    f.write_text(text, encoding="utf-8")
    line = refused(run_cli("request", "import", str(f), cwd=workdir), field)
    assert f"row {row}: {field}: " in line
    assert cli_json("request", "list", cwd=workdir) == []


def test_import_refuses_a_past_not_after_unless_allow_past(workdir):
    """request import passes now= and --allow-past to validate_request."""
    f = workdir / "past.csv"
    f.write_text(f"{HEADER},not_after\nSTAR-1,a,10,-20,V,100,2099-01-01T00:00:00Z\n"
                 f"STAR-1,b,10,-20,V,100,2020-01-01T00:00:00Z\n", encoding="utf-8")
    line = refused(run_cli("request", "import", str(f), cwd=workdir), "not_after")
    assert "row 3: " in line and "--allow-past" in line
    assert cli_json("request", "list", cwd=workdir) == []
    run_cli("request", "import", str(f), "--allow-past", cwd=workdir, check=True)
    assert [r["target"] for r in cli_json("request", "list", cwd=workdir)] == ["a", "b"]


def test_a_large_import_summarises_its_warnings(workdir):
    """20,000 rows, 2,223 of them never observable from the (southern) site: a few lines, not thousands."""
    lines = [HEADER]
    for i in range(20_000):
        lines.append(f"STAR-1,T{i},{(i * 0.017) % 360:.3f},{'+75' if i % 9 == 0 else '-30'},V,100")
    f = workdir / "big.csv"
    f.write_text("\n".join(lines) + "\n", encoding="utf-8")
    proc = run_cli("request", "import", str(f), cwd=workdir)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "imported 20000 requests (ids 1-20000)"
    warnings = proc.stderr.strip().splitlines()
    assert len(warnings) == 6, proc.stderr
    assert all("never observable" in w for w in warnings)
    assert "2223 of 20000 requests are never observable" in warnings[-1]
    assert "2218 more (ids 46 to 19999: 2218 culminate below the telescope's altitude limit)" in warnings[-1]


def test_demo_imports_with_allow_past_once_its_night_is_over(workdir):
    """The demo's night is fixed (scenario.json): once the clock passes its windows the demo's
    import takes --allow-past, and the scenario imports whole with it through the real CLI."""
    import csv
    from datetime import datetime, timezone

    from scheduler.demo import DATA_DIR, past_flag

    requests = DATA_DIR / "requests.csv"
    assert past_flag(requests, datetime(2027, 1, 1, tzinfo=timezone.utc)) == ["--allow-past"]
    assert past_flag(requests, datetime(2026, 12, 16, 18, tzinfo=timezone.utc)) == []
    with open(DATA_DIR / "programs.csv", encoding="utf-8", newline="") as f:
        for row in csv.DictReader(f):
            run_cli("program", "add", row["code"], "--pi", row["pi"], "--hours", row["hours"], "--weight",
                    row["weight"], cwd=workdir, check=True)
    out = run_cli("request", "import", str(requests), "--allow-past", cwd=workdir, check=True).stdout
    assert out.startswith("imported 150 requests")
