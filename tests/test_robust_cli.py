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
                    cwd=workdir), "reason")
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


# --------------------------------------------------------------------------- several forecasts, one night

NIGHT = "2026-12-16"
BEFORE = "2026-12-16T18:00:00Z"
# Every request needs PWV <= 3 mm: impossible on the starter defaults (8 mm), so an entry shows
# that a forecast, not the defaults, was used at its time.
DRY = "\n".join(["program,target,ra,dec,band,exposure_s,max_pwv_mm"] +
                [f"STAR-1,DRY-{k},{20 + 18 * k},-30,J,1200,3" for k in range(8)]) + "\n"


def forecast(first: str, hours: int, pwv: float) -> str:
    from datetime import datetime, timedelta

    t0 = datetime.fromisoformat(first.replace("Z", "+00:00"))
    rows = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome"]
    rows += [f"{(t0 + timedelta(hours=h)).strftime('%Y-%m-%dT%H:%M:%SZ')},0.7,{pwv},0.0,5,30,open"
             for h in range(hours + 1)]
    return "\n".join(rows) + "\n"


def load(folder, name: str, text: str) -> None:
    (folder / name).write_text(text, encoding="utf-8")
    run_cli("conditions", "load", name, "--source", name, cwd=folder, check=True)


def dry_queue(folder) -> None:
    (folder / "dry.csv").write_text(DRY, encoding="utf-8")
    run_cli("request", "import", "dry.csv", cwd=folder, check=True)


def build_night(folder):
    return run_cli("plan", "build", "--night", NIGHT, "--now", BEFORE, "--reason", "test",
                   cwd=folder)


def test_tomorrows_forecast_does_not_replace_tonights(workdir):
    """The planner takes, per time, the newest report covering it (conditions/merge.py)."""
    dry_queue(workdir)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    load(workdir, "tomorrow.csv", forecast("2026-12-17T22:00:00Z", 12, 9.0))  # newer, 0 % of tonight
    proc = build_night(workdir)
    assert proc.returncode == 0, proc.stderr
    assert "warning" not in proc.stderr
    doc = cli_json("plan", "show", cwd=workdir)
    cond = doc["plan"]["conditions"]
    assert cond["report_id"] == 1 and cond["report_ids"] == [1] and cond["source"] == "tonight.csv"
    assert cond["forecast_share"] == 1.0 and cond["warning"] is None
    assert len(doc["entries"]) >= 4 and {e["predicted_pwv_mm"] for e in doc["entries"]} == {2.0}


def test_where_forecasts_overlap_the_newest_wins_and_plan_check_uses_both(workdir):
    dry_queue(workdir)
    load(workdir, "night.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    load(workdir, "update.csv", forecast("2026-12-16T23:00:00Z", 2, 2.5))  # newer, 23:00 to 01:00 only
    assert build_night(workdir).returncode == 0
    doc = cli_json("plan", "show", cwd=workdir)
    assert doc["plan"]["conditions"]["report_ids"] == [2, 1]
    late = [e for e in doc["entries"] if e["start"] >= "2026-12-17T01:30:00Z"]
    early = [e for e in doc["entries"] if "2026-12-16T23:00:00Z" <= e["start"] and e["end"] <= "2026-12-17T01:00:00Z"]
    assert late and {e["predicted_pwv_mm"] for e in late} == {2.0}  # the older report, where the update is silent
    assert all(e["predicted_pwv_mm"] == 2.5 for e in early)
    check = run_cli("plan", "check", cwd=workdir)
    assert check.returncode == 0 and "every entry passes the checker" in check.stdout, check.stdout
    text = run_cli("plan", "show", cwd=workdir, check=True).stdout
    assert "report 2 from update.csv" in text and "report 1)" in text


@pytest.mark.parametrize("how", ["plan build", "serve --once"])
def test_a_night_without_its_forecast_warns(workdir, how):
    """plan build, the service log and status say when forecasts cover less than
    planning.min_forecast_share of the night (merge.coverage_warning)."""
    dry_queue(workdir)
    load(workdir, "tomorrow.csv", forecast("2026-12-17T22:00:00Z", 12, 2.0))
    if how == "plan build":
        proc = build_night(workdir)
        assert proc.returncode == 0, proc.stderr
        said = proc.stderr
    else:
        proc = run_cli("serve", "--once", "--clock", BEFORE, cwd=workdir, timeout=120)
        assert proc.returncode == 0, proc.stdout + proc.stderr
        said = next(line for line in proc.stdout.splitlines() if " forecast_coverage_low " in line)
        assert " WARNING " in said and " share=0 " in said and " min_share=0.5 " in said
    assert "conditions reports cover 0 % of the night of 2026-12-16" in said
    assert "min_forecast_share" in said
    status = run_cli("status", cwd=workdir, check=True).stdout
    assert "warning:    conditions reports cover 0 % of the night of 2026-12-16" in status
    assert cli_json("status", cwd=workdir)["plan"]["forecast_share"] == 0.0
    assert "  warning: conditions reports cover 0 %" in run_cli("plan", "show", cwd=workdir, check=True).stdout


def test_the_service_keeps_its_plan_when_a_forecast_for_another_night_arrives(workdir):
    """The validity check compares the night's merged conditions, not the newest report alone."""
    dry_queue(workdir)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    clock = "2026-12-16T23:30:00Z"
    first = run_cli("serve", "--once", "--clock", clock, cwd=workdir, timeout=120)
    assert " plan_stored version=1 " in first.stdout, first.stdout + first.stderr
    load(workdir, "tomorrow.csv", forecast("2026-12-17T22:00:00Z", 12, 9.0))
    second = run_cli("serve", "--once", "--clock", clock, cwd=workdir, timeout=120)
    assert second.returncode == 0 and " plan_still_valid version=1 " in second.stdout, second.stdout
    assert " replan_start " not in second.stdout
    load(workdir, "wet.csv", forecast("2026-12-17T00:00:00Z", 3, 9.0))  # tonight, 00:00 to 03:00: wet
    third = run_cli("serve", "--once", "--clock", clock, cwd=workdir, timeout=120)
    assert " replan_start trigger=validity " in third.stdout and "conditions report 3 (wet.csv)" in third.stdout, \
        third.stdout


# --------------------------------------------------------------------------- the operators' safety net


def test_serve_once_exits_non_zero_after_a_failed_replan(workdir):
    """A re-plan that cannot store its plan (here a real SQLite trigger refuses the write, as a
    full disk would) makes `serve --once` exit 1, so cron and monitoring notice."""
    import sqlite3

    dry_queue(workdir)
    con = sqlite3.connect(workdir / "nightplan.sqlite")
    con.execute("CREATE TRIGGER refuse_plans BEFORE INSERT ON plan BEGIN SELECT RAISE(ABORT, 'database or disk is "
                "full'); END")
    con.commit()
    con.close()
    proc = run_cli("serve", "--once", "--clock", BEFORE, cwd=workdir, timeout=120)
    assert proc.returncode == 1, proc.stdout + proc.stderr
    assert " replan_failed " in proc.stdout and "disk is full" in proc.stdout
    assert " service_stopped mode=once exit_code=1 failed_jobs=- failed_replans=1" in proc.stdout
    assert proc.stderr.strip() == "nightplan: error: serve --once: a job or re-plan failed; see the log above"
    assert cli_json("plan", "list", cwd=workdir) == []

    # an operator's order that fails is a failure too (the plan in place is still valid)
    con = sqlite3.connect(workdir / "nightplan.sqlite")
    con.execute("DROP TRIGGER refuse_plans")
    con.commit()
    ok = run_cli("serve", "--once", "--clock", BEFORE, cwd=workdir, timeout=120)
    assert ok.returncode == 0 and " plan_stored version=1 " in ok.stdout, ok.stdout + ok.stderr
    con.execute("CREATE TRIGGER refuse_plans BEFORE INSERT ON plan BEGIN SELECT RAISE(ABORT, 'disk I/O error'); END")
    con.execute("INSERT INTO replan_order (requested_by, reason, requested_at) VALUES ('op@test', 'guider fixed', "
                "'2026-12-02 10:00:00')")
    con.commit()
    con.close()
    order = run_cli("serve", "--once", "--clock", BEFORE, cwd=workdir, timeout=120)
    assert order.returncode == 1, order.stdout
    assert " ERROR order_done orders=1 " in order.stdout and "disk I/O error" in order.stdout
    assert " plan_still_valid version=1 " in order.stdout and " replan_failed " not in order.stdout


def _filled_queue(folder) -> None:
    lines = [HEADER] + [f"STAR-1,T{i},{i % 360},-30,V,100" for i in range(600)]
    (folder / "many.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")
    run_cli("request", "import", "many.csv", cwd=folder, check=True)


def _damage_page(path, page: int) -> None:
    """Overwrite one page of a closed SQLite file with bytes no page can hold."""
    import sqlite3

    con = sqlite3.connect(path)
    size = con.execute("PRAGMA page_size").fetchone()[0]
    con.close()
    with open(path, "r+b") as f:
        f.seek((page - 1) * size)
        f.write(b"\xa5" * size)


def _pages(path) -> tuple[int, int]:
    """(page count, root page of the request status index) of a closed SQLite file."""
    import sqlite3

    con = sqlite3.connect(path)
    n = con.execute("PRAGMA page_count").fetchone()[0]
    root = con.execute("SELECT rootpage FROM sqlite_master WHERE name = 'ix_request_status'").fetchone()[0]
    con.close()
    return n, root


def test_db_check_on_a_sound_file(workdir):
    _filled_queue(workdir)
    for args in ([], ["--quick"]):
        proc = run_cli("db", "check", *args, cwd=workdir)
        assert proc.returncode == 0, proc.stdout + proc.stderr
        check = "quick_check" if args else "integrity_check"
        assert proc.stdout.strip() == f"database: {(workdir / 'nightplan.sqlite').resolve()}: PRAGMA {check}: ok"


@pytest.mark.parametrize("which", ["middle", "index"])
def test_a_damaged_page_is_found_and_the_service_refuses_the_file(workdir, which):
    """A page in the middle of the file (a table's) or an index page: `db check` reports it
    (exit 1) and `serve` refuses to start (exit 3). With the index page damaged, ordinary writes still
    succeed: only the check notices."""
    _filled_queue(workdir)
    db = workdir / "nightplan.sqlite"
    n, index_root = _pages(db)
    _damage_page(db, n // 2 if which == "middle" else index_root)
    if which == "index":
        run_cli("program", "add", "P2", "--pi", "Dr. Aino Vesk", cwd=workdir, check=True)  # unnoticed by a write
    check = run_cli("db", "check", cwd=workdir)
    assert check.returncode == 1, check.stdout + check.stderr
    assert ": PRAGMA integrity_check: DAMAGED" in check.stdout and "restore the latest backup" in check.stdout
    quick = run_cli("db", "check", "--quick", cwd=workdir)
    assert quick.returncode == 1 and "PRAGMA quick_check: DAMAGED" in quick.stdout
    serve = run_cli("serve", "--once", "--log-file", "svc.log", cwd=workdir, timeout=120)
    assert serve.returncode == 3, serve.stdout + serve.stderr
    lines = serve.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nightplan: error: db: sqlite:///nightplan.sqlite is damaged "
                                                   "(PRAGMA quick_check: "), serve.stderr
    log = (workdir / "svc.log").read_text(encoding="utf-8")
    assert " ERROR database_damaged " in log and "service_started" not in log


def test_a_read_only_folder_is_named_and_the_file_can_be_read_read_only(workdir):
    """SQLite in WAL mode must create FILE-wal and FILE-shm even to read: in a folder the user
    cannot write, say so and how to open the file read-only (db/session.py)."""
    import json
    import os
    import subprocess

    def lock(on: bool) -> None:
        if os.geteuid() == 0:  # the superuser writes through a mode of 0555; an immutable folder stops it
            r = subprocess.run(["chattr", "+i" if on else "-i", str(workdir)], capture_output=True)
            if r.returncode != 0:
                pytest.skip(f"cannot make a folder read-only for the superuser here: {r.stderr!r}")
        else:
            workdir.chmod(0o555 if on else 0o755)

    lock(True)
    try:
        line = refused(run_cli("program", "list", cwd=workdir), "db")
        assert f"the folder {workdir.resolve()} is read-only for this user" in line
        full = (workdir / "nightplan.sqlite").resolve()
        assert f"'sqlite:///file:{full}?mode=ro&uri=true'" in line
        assert f"'sqlite:///file:{full}?immutable=1&uri=true'" in line
        url = f"sqlite:///file:{full}?immutable=1&uri=true"
        ro = run_cli("--db", url, "program", "list", "--json", cwd=workdir)
        assert ro.returncode == 0, ro.stderr
        assert [p["code"] for p in json.loads(ro.stdout)] == ["STAR-1"]
        write = run_cli("--db", url, "program", "add", "P2", "--pi", "Dr. Y", cwd=workdir)
        assert write.returncode == 1 and "the database is open read-only" in write.stderr
        assert sorted(p.name for p in workdir.iterdir()) == ["nightplan.sqlite", "observatory.toml"]
    finally:
        lock(False)
    assert [p["code"] for p in cli_json("program", "list", cwd=workdir)] == ["STAR-1"]  # writable again: as usual


def test_db_check_on_postgresql_says_what_it_checked(tmp_path, pg_url):
    """PostgreSQL: what the server offers a client (a catalog query, every table read end to end)."""
    run_cli("--db", pg_url, "init", cwd=tmp_path, check=True)
    proc = run_cli("--db", pg_url, "db", "check", cwd=tmp_path)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert "PostgreSQL: a catalog query and every nightplan table read end to end" in proc.stdout
    assert proc.stdout.strip().endswith(": ok") and "amcheck" in proc.stdout


def test_exports_and_charts_follow_the_umask_while_logs_stay_private(workdir):
    import os
    import stat

    dry_queue(workdir)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    assert build_night(workdir).returncode == 0
    old = os.umask(0o022)
    try:
        run_cli("plan", "export", "--format", "json", "-o", "plan.json", cwd=workdir, check=True)
        run_cli("plan", "export", "--format", "csv", "-o", "out/plan.csv", cwd=workdir, check=True)
        run_cli("plan", "chart", "-o", "plan.png", "--at", "2026-12-17T01:00:00Z", cwd=workdir, check=True)
        run_cli("serve", "--once", "--log-file", "svc.log", "--clock", BEFORE, cwd=workdir, timeout=120)
        os.umask(0o027)
        run_cli("plan", "export", "--format", "json", "-o", "group.json", cwd=workdir, check=True)
    finally:
        os.umask(old)

    def mode(name):
        return stat.S_IMODE(os.stat(workdir / name).st_mode)

    assert [mode(n) for n in ("plan.json", "out/plan.csv", "plan.png", "group.json")] == [0o644, 0o644, 0o644, 0o640]
    assert mode("svc.log") == 0o600 and mode("nightplan.sqlite") == 0o600
    assert not [p for p in workdir.rglob(".*.tmp")]  # no temporary file left behind


# --------------------------------------------------------------------------- operators' mistakes


def test_record_refuses_a_request_not_in_the_plan_unless_unplanned(workdir):
    dry_queue(workdir)
    (workdir / "wet.csv").write_text(HEADER + "\nSTAR-1,NEVER,105,70,V,100\n", encoding="utf-8")  # never rises
    run_cli("request", "import", "wet.csv", cwd=workdir, check=True)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    assert build_night(workdir).returncode == 0
    planned = {e["request_id"] for e in cli_json("plan", "show", cwd=workdir)["entries"]}
    assert 9 not in planned and 1 in planned
    line = refused(run_cli("record", "9", "--result", "done", cwd=workdir), "id")
    assert "request 9 is in no active plan" in line and "--unplanned" in line
    assert {r["id"]: r["status"] for r in cli_json("request", "list", cwd=workdir)}[9] == "queued"
    assert "recorded" in run_cli("record", "9", "--result", "done", "--unplanned", cwd=workdir, check=True).stdout
    assert "recorded" in run_cli("record", "1", "--result", "done", cwd=workdir, check=True).stdout
    assert {r["id"]: r["status"] for r in cli_json("request", "list", cwd=workdir)}[9] == "done"


@pytest.mark.parametrize("columns", [80, 30])
def test_plan_show_fits_the_terminal_and_always_shows_ids_and_start_times(workdir, columns):
    """At 80 columns (and even 30) every line fits; each entry's id and dated start time show
    (the night crosses midnight in UTC); other columns are left out first, and the caption says so."""
    import re

    from rich.cells import cell_len

    dry_queue(workdir)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    assert build_night(workdir).returncode == 0
    entries = cli_json("plan", "show", cwd=workdir)["entries"]
    assert len(entries) >= 4
    out = run_cli("plan", "show", cwd=workdir, env={"COLUMNS": str(columns)}, check=True).stdout
    lines = out.splitlines()
    assert max(cell_len(line) for line in lines) <= columns, out
    for e in entries:
        start = f"{e['start'][5:10]} {e['start'][11:16]}"  # MM-DD HH:MM
        assert any(re.match(rf"^│{start}\b.*│ +{e['request_id']} │", line) for line in lines), (start, out)
    caption = " ".join(out.split())
    assert "left out at this width:" in caption and "merit" in caption
    if columns == 30:
        assert "end times" in caption
    wide = run_cli("plan", "show", cwd=workdir, env={"COLUMNS": "200"}, check=True).stdout
    assert "merit" in wide.splitlines()[9] or any("merit" in line and "┃" in line for line in wide.splitlines())
    assert "left out" not in wide


def test_next_in_the_afternoon_says_when_the_night_starts(workdir):
    dry_queue(workdir)
    load(workdir, "tonight.csv", forecast("2026-12-16T22:00:00Z", 12, 2.0))
    assert build_night(workdir).returncode == 0
    doc = cli_json("plan", "show", cwd=workdir)
    first = min(doc["entries"], key=lambda e: e["start"])
    start = doc["night"]["start"]  # 23:20 UTC at the starter site
    out = run_cli("next", "--at", "2026-12-16T15:00:00Z", cwd=workdir, check=True).stdout
    now = next(line for line in out.splitlines() if line.startswith("NOW"))
    assert "move to" not in now
    assert now.startswith(f"NOW   the night has not begun: it starts at {start[11:16]} UTC")
    js = cli_json("next", "--at", "2026-12-16T15:00:00Z", cwd=workdir)
    assert js["night_started"] is False and js["state"] == "before"
    assert 8 * 60 + 20 <= js["minutes_to_night"] <= 8 * 60 + 21  # 15:00 to 23:20:33 UTC
    m = int(round(js["minutes_to_night"]))
    assert f"in {m // 60} h {m % 60:02d} min" in now
    assert f"the first entry, #{first['request_id']} {first['target']}," in now
    inside = run_cli("next", "--at", start, cwd=workdir, check=True).stdout  # the night has begun: move to it
    assert f"NOW   nothing in progress: move to #{first['request_id']} {first['target']}" in inside


def test_a_csv_cell_holding_only_a_control_is_not_read_as_empty(workdir):
    """CSV and JSON agree: `too` holding U+0085 is refused in both (str.strip() used to empty the cell)."""
    (workdir / "nel.csv").write_text(f"{HEADER},too\nSTAR-1,a,10,-20,V,100,\x85\n", encoding="utf-8")
    refused(run_cli("request", "import", "nel.csv", cwd=workdir), "too")
    (workdir / "nel.json").write_text('[{"program": "STAR-1", "target": "a", "ra": 10, "dec": -20, "band": "V", '
                                      '"exposure_s": 100, "too": "\\u0085"}]', encoding="utf-8")
    refused(run_cli("request", "import", "nel.json", cwd=workdir), "too")
    assert cli_json("request", "list", cwd=workdir) == []


def test_a_replan_after_the_grids_last_step_has_nothing_left_to_cover():
    """Between the grid's last step and sunrise nothing is left to plan, so no forecast is
    missing (it used to warn that reports cover 0 % of the night "from" that time)."""
    from datetime import date, datetime, timedelta, timezone

    from scheduler.model.config import starter_config
    from scheduler.planning.planner import Planner

    planner = Planner(starter_config())
    night = planner.night(date(2026, 12, 16))
    after = datetime.fromtimestamp(float(night.times_unix[-1]) + night.step_s, timezone.utc) + timedelta(minutes=1)
    assert planner.coverage(night, (), after) == (1.0, None)
    share, warning = planner.coverage(night, (), night.start)  # before: the whole night, uncovered
    assert share == 0.0 and "cover 0 %" in warning
