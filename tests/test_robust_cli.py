"""Issue-level bad input and operator mistakes through the real CLI on a real SQLite file.

Companion of tests/test_robust_cli_pending.py (the reproductions as first filed): each test
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
