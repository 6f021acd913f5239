"""Upgrading a database made by the previous schema (revision 0001): every row survives and reads
back right through storage and the CLI; a failed upgrade changes nothing; downgrade restores it.

The 0001 rows are written with plain SQL in that schema's own shape (text JSON, free-text
status), as the code of that time wrote them, including a NaN it could write into a summary.
"""

from __future__ import annotations

import json
from datetime import date, datetime, timedelta, timezone

import pytest
from sqlalchemy import Boolean, Date, DateTime, Float, Integer, String, Text, column, func, inspect, select, table, text
from sqlalchemy.exc import IntegrityError

from conftest import cli_json, run_cli
from scheduler.db import migrate, plans, store
from scheduler.db.models import Base, Outcome, Plan
from scheduler.db.session import open_db
from scheduler.model.request import OutcomeResult, RequestStatus

T0 = datetime(2026, 12, 5, 23, 0)  # naive UTC, as 0001 stores times
NIGHT = date(2026, 12, 5)

SUMMARY_V1 = {"unscheduled": [{"request_id": 3, "reason": "never above the altitude limit: altitude"}],
              "timings": {"sky": 0.5, "solve": 1.25}, "used_greedy": False, "queue_size": 3,
              "conditions_covered_fraction": 0.75}
SUMMARY_V2_TEXT = ('{"unscheduled": [], "timings": {"solve": NaN}, "queue_size": 3, '
                   '"conditions_covered_fraction": 1.0, "stats": {"requests": 2, "arcs": [1, 2]}}')
DIFF_V2 = {"added": [{"request_id": 2, "start": "2026-12-06T01:00:00Z"}], "dropped": [],
           "moved": [{"request_id": 1, "from": "2026-12-05T23:00:00Z", "to": "2026-12-05T23:30:00Z", "minutes": 30.0}]}


def _t(name, *cols):
    return table(name, *(column(n, ty) for n, ty in cols))


def fill_0001(db) -> dict[str, int]:
    """Rows in every table, written in revision 0001's shape. Returns the row counts."""
    program = _t("program", ("id", Integer), ("code", String), ("pi", String), ("hours_allocated", Float),
                 ("weight", Float), ("created_at", DateTime))
    req_cols = [("id", Integer), ("program_id", Integer), ("target", String), ("ra_deg", Float), ("dec_deg", Float),
                ("band", String), ("instrument", String), ("exposure_s", Float), ("repeats", Integer),
                ("priority", Integer), ("too", Boolean), ("status", String), ("completed_repeats", Integer),
                ("partial_exposure_s", Float), ("created_at", DateTime), ("updated_at", DateTime),
                ("not_after", DateTime)]
    request = _t("request", *req_cols)
    report = _t("conditions_report", ("id", Integer), ("issued_at", DateTime), ("received_at", DateTime),
                ("source", String), ("n_samples", Integer))
    sample = _t("conditions_sample", ("id", Integer), ("report_id", Integer), ("time", DateTime),
                ("seeing_arcsec", Float), ("pwv_mm", Float), ("dome_open", Boolean))
    plan_cols = [("id", Integer), ("night", Date), ("created_at", DateTime), ("reason", Text),
                 ("planned_from", DateTime), ("conditions_report_id", Integer), ("solver_status", String),
                 ("objective", Float), ("bound", Float), ("gap", Float), ("runtime_s", Float),
                 ("greedy_objective", Float), ("active", Boolean), ("superseded_at", DateTime),
                 ("previous_id", Integer), ("summary_json", Text), ("diff_json", Text)]
    plan = _t("plan", *plan_cols)
    entry_cols = [("id", Integer), ("plan_id", Integer), ("request_id", Integer), ("execution", Integer),
                  ("start", DateTime), ("end", DateTime), ("slew_s", Float), ("transition_s", Float),
                  ("setup_s", Float), ("exposure_s", Float), ("airmass_start", Float), ("airmass_end", Float),
                  ("fwhm_arcsec", Float), ("pwv_mm", Float), ("transmission", Float), ("merit", Float),
                  ("moon_sep_deg", Float), ("value", Float), ("fixed", Boolean)]
    entry = _t("plan_entry", *entry_cols)
    outcome = _t("outcome", ("id", Integer), ("request_id", Integer), ("plan_entry_id", Integer), ("result", String),
                 ("exposure_s", Float), ("note", Text), ("recorded_at", DateTime))
    order = _t("replan_order", ("id", Integer), ("requested_by", String), ("reason", Text),
               ("requested_at", DateTime), ("taken_at", DateTime), ("done_at", DateTime), ("result", Text),
               ("plan_id", Integer))
    lock = _t("service_lock", ("name", String), ("holder", String), ("pid", Integer), ("host", String),
              ("started_at", DateTime), ("heartbeat_at", DateTime))

    def req(i, target, status, band="V"):
        return {"id": i, "program_id": 1, "target": target, "ra_deg": 10.0 * i, "dec_deg": -20.0 - i, "band": band,
                "instrument": "imager", "exposure_s": 300.0, "repeats": 2, "priority": 5, "too": False,
                "status": status, "completed_repeats": 1 if status == "done" else 0, "partial_exposure_s": 0.0,
                "created_at": T0, "updated_at": T0, "not_after": None}

    def ent(i, plan_id, rid, minutes):
        start = T0 + timedelta(minutes=minutes)
        return {"id": i, "plan_id": plan_id, "request_id": rid, "execution": 0, "start": start,
                "end": start + timedelta(minutes=10), "slew_s": 12.5, "transition_s": 20.0, "setup_s": 60.0,
                "exposure_s": 300.0, "airmass_start": 1.2, "airmass_end": 1.25, "fwhm_arcsec": 0.9, "pwv_mm": 3.0,
                "transmission": 0.95, "merit": 0.8, "moon_sep_deg": None if i == 1 else 45.0, "value": 2.5,
                "fixed": i == 3}

    with db.engine.begin() as conn:
        conn.execute(program.insert(), [{"id": 1, "code": "STAR-1", "pi": "Dr. Mira Okafor", "hours_allocated": 12.0,
                                         "weight": 2.0, "created_at": T0}])
        conn.execute(request.insert(), [req(1, "NGC 1 [a]", "planned"), req(2, "Invented-2", "done", "K"),
                                        req(3, "Deep south", "queued"), req(4, "Gone", "withdrawn")])
        conn.execute(report.insert(), [{"id": 1, "issued_at": T0, "received_at": T0, "source": "forecast A",
                                        "n_samples": 2}])
        conn.execute(sample.insert(), [{"id": 1, "report_id": 1, "time": T0, "seeing_arcsec": 0.8, "pwv_mm": 3.0,
                                        "dome_open": True},
                                       {"id": 2, "report_id": 1, "time": T0.replace(hour=23, minute=30),
                                        "seeing_arcsec": None, "pwv_mm": 2.5, "dome_open": None}])
        common = {"night": NIGHT, "created_at": T0, "planned_from": T0, "conditions_report_id": 1,
                  "solver_status": "OPTIMAL", "objective": 5.0, "bound": 5.0, "gap": 0.0, "runtime_s": 1.5,
                  "greedy_objective": 4.0}
        conn.execute(plan.insert(), [
            {**common, "id": 1, "reason": "first plan", "active": False, "superseded_at": T0, "previous_id": None,
             "summary_json": json.dumps(SUMMARY_V1), "diff_json": "{}"},
            {**common, "id": 2, "reason": "re-plan [/] after a forecast", "active": True, "superseded_at": None,
             "previous_id": 1, "summary_json": SUMMARY_V2_TEXT, "diff_json": json.dumps(DIFF_V2)},
        ])
        conn.execute(entry.insert(), [ent(1, 1, 1, 0), ent(2, 2, 1, 30), ent(3, 2, 2, 45)])
        conn.execute(outcome.insert(), [{"id": 1, "request_id": 2, "plan_entry_id": 3, "result": "done",
                                         "exposure_s": 300.0, "note": "clean", "recorded_at": T0},
                                        {"id": 2, "request_id": 1, "plan_entry_id": None, "result": "partial",
                                         "exposure_s": 120.0, "note": None, "recorded_at": T0}])
        conn.execute(order.insert(), [{"id": 1, "requested_by": "op@host", "reason": "dome reopened",
                                       "requested_at": T0, "taken_at": T0, "done_at": T0, "result": "done: plan 2",
                                       "plan_id": 2}])
        conn.execute(lock.insert(), [{"name": "service", "holder": "host:1:x", "pid": 1, "host": "host",
                                      "started_at": T0, "heartbeat_at": T0}])
        if conn.dialect.name == "postgresql":  # ids were given: move the sequences past them, as the code's own inserts would
            for t in ("program", "request", "conditions_report", "conditions_sample", "plan", "plan_entry", "outcome",
                      "replan_order"):
                conn.execute(text(f"SELECT setval(pg_get_serial_sequence('{t}', 'id'), (SELECT max(id) FROM {t}))"))
    return row_counts(db)


def row_counts(db) -> dict[str, int]:
    with db.engine.connect() as conn:
        return {t: conn.execute(select(func.count()).select_from(table(t))).scalar()
                for t in ("program", "request", "conditions_report", "conditions_sample", "plan", "plan_entry",
                          "outcome", "replan_order", "service_lock")}


def check_upgraded(db, counts: dict[str, int]) -> None:
    assert migrate.current_revision(db) == migrate.head_revision(db)
    assert row_counts(db) == counts
    with db.engine.connect() as conn:  # the schema is exactly the models'
        from alembic.autogenerate import compare_metadata
        from alembic.runtime.migration import MigrationContext

        assert compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}), Base.metadata) == []
    assert {"summary_json", "diff_json"}.isdisjoint(c["name"] for c in inspect(db.engine).get_columns("plan"))
    with db.session() as s:
        v1, v2 = s.get(Plan, 1), s.get(Plan, 2)
        assert v1.summary == SUMMARY_V1 and v1.diff == {}
        assert v2.diff == DIFF_V2
        # NaN, which PostgreSQL's JSON refuses, became null; everything else as it was written
        assert v2.summary == {"unscheduled": [], "timings": {"solve": None}, "queue_size": 3,
                              "conditions_covered_fraction": 1.0, "stats": {"requests": 2, "arcs": [1, 2]}}
        assert plans.plan_summary(v1)["unscheduled"][0]["request_id"] == 3
        statuses = {r.id: r.status for r in store.list_requests(s)}
        assert statuses == {1: RequestStatus.PLANNED, 2: RequestStatus.DONE, 3: RequestStatus.QUEUED,
                            4: RequestStatus.WITHDRAWN}
        assert all(type(v) is RequestStatus for v in statuses.values())
        assert [o.result for o in s.scalars(select(Outcome).order_by(Outcome.id))] == [OutcomeResult.DONE,
                                                                                       OutcomeResult.PARTIAL]
        stored = plans.stored_plan(s, v2)
        assert [(e.request_id, e.start) for e in stored.entries] == [
            (1, datetime(2026, 12, 5, 23, 30, tzinfo=timezone.utc)),
            (2, datetime(2026, 12, 5, 23, 45, tzinfo=timezone.utc))]
        assert stored.entries[1].moon_sep_deg == 45.0 and stored.entries[1].fixed
        assert stored.requests[1].target == "NGC 1 [a]" and stored.requests[2].program == "STAR-1"
        assert stored.conditions.source == "forecast A" and stored.previous_version == 1
        assert [p.id for p in plans.active_plans(s)] == [2]
        assert [(r["version"], r["entries"], r["active"]) for r in plans.plan_listing(s)] == [(2, 2, True),
                                                                                           (1, 1, False)]
        # the upgraded database takes new writes through the models
        store.record_outcome(s, 1, "failed", note="clouds")
        s.commit()
    with db.engine.connect() as conn:
        # the status is held to its values by the database itself, not only by the code
        with pytest.raises(IntegrityError):
            conn.execute(text("UPDATE request SET status = 'lost' WHERE id = 1"))
        conn.rollback()
        with pytest.raises(IntegrityError):
            conn.execute(text("UPDATE outcome SET result = 'maybe' WHERE id = 1"))
        conn.rollback()
        if db.engine.dialect.name == "sqlite":
            assert conn.execute(text("PRAGMA foreign_key_check")).fetchall() == []
            assert conn.execute(text("PRAGMA foreign_keys")).scalar() == 1  # enforcement is back on


@pytest.fixture(params=["sqlite", "postgresql"])
def empty_db(request, tmp_path):
    if request.param == "sqlite":
        db = open_db(f"sqlite:///{tmp_path / 'old.sqlite'}")
    else:
        db = open_db(request.getfixturevalue("pg_url"))
    yield db
    db.dispose()


def test_upgrade_from_0001_keeps_every_row_and_reads_back(empty_db):
    db = empty_db
    migrate.upgrade(db, "0001")
    counts = fill_0001(db)
    migrate.upgrade(db)
    check_upgraded(db, counts)


def test_downgrade_to_0001_gives_the_text_back(empty_db):
    db = empty_db
    migrate.upgrade(db, "0001")
    counts = fill_0001(db)
    migrate.upgrade(db)
    migrate.downgrade(db, "0001")
    assert migrate.current_revision(db) == "0001" and row_counts(db) == counts
    with db.engine.connect() as conn:
        rows = dict(conn.execute(text("SELECT id, summary_json FROM plan")).all())
        assert json.loads(rows[1]) == SUMMARY_V1
        assert json.loads(rows[2])["timings"] == {"solve": None}
        conn.execute(text("UPDATE request SET status = 'lost' WHERE id = 1"))  # no constraint at 0001
        conn.rollback()
    migrate.upgrade(db)
    check_upgraded(db, counts)


def test_upgrade_over_an_unknown_status_is_refused_and_changes_nothing(empty_db):
    db = empty_db
    migrate.upgrade(db, "0001")
    counts = fill_0001(db)
    with db.engine.begin() as conn:
        conn.execute(text("UPDATE request SET status = 'on hold' WHERE id = 3"))
    with pytest.raises(RuntimeError, match=r"request.status .*request 3: 'on hold'"):
        migrate.upgrade(db)
    # one transaction: the plan table's conversion, done before the refusal, is undone too
    assert migrate.current_revision(db) == "0001" and row_counts(db) == counts
    cols = {c["name"] for c in inspect(db.engine).get_columns("plan")}
    assert {"summary_json", "diff_json"} <= cols and not {"summary", "diff"} & cols


@pytest.mark.slow
def test_cli_on_a_database_upgraded_by_init(tmp_path):
    """`nightplan init` upgrades an old file; the listings and the plan document read it."""
    db = open_db(f"sqlite:///{tmp_path / 'nightplan.sqlite'}")
    migrate.upgrade(db, "0001")
    fill_0001(db)
    db.dispose()
    out = run_cli("init", cwd=tmp_path, check=True).stdout
    assert f"upgraded, schema {migrate.head_revision(db)}" in out
    reqs = cli_json("request", "list", cwd=tmp_path)
    assert [(r["id"], r["status"]) for r in reqs] == [(1, "planned"), (2, "done"), (3, "queued"), (4, "withdrawn")]
    listed = cli_json("plan", "list", cwd=tmp_path)
    assert [(p["version"], p["entries"], p["active"]) for p in listed] == [(2, 2, True), (1, 1, False)]
    doc = cli_json("plan", "show", "--version", "2", cwd=tmp_path)
    assert [e["target"] for e in doc["entries"]] == ["NGC 1 [a]", "Invented-2"]
    assert doc["plan"]["conditions"]["source"] == "forecast A"
    assert doc["plan"]["conditions"]["covered_fraction"] == 1.0
    v1 = cli_json("plan", "show", "--version", "1", cwd=tmp_path)
    assert v1["unscheduled"] == [{"request_id": 3, "reason": SUMMARY_V1["unscheduled"][0]["reason"],
                                  "target": "Deep south", "program": "STAR-1", "band": "V"}]
    table_out = run_cli("plan", "show", "--version", "2", cwd=tmp_path, check=True).stdout
    assert "re-plan [/] after a forecast" in table_out and "NGC 1 [a]" in table_out


def test_copy_an_upgraded_database_to_postgres(tmp_path, pg_url):
    """`db copy` carries the JSON columns and the enums across databases unchanged."""
    from scheduler.db.transfer import copy_database

    src = open_db(f"sqlite:///{tmp_path / 'old.sqlite'}")
    migrate.upgrade(src, "0001")
    counts = fill_0001(src)
    migrate.upgrade(src)
    dst = open_db(pg_url)
    later_tables = {t: 0 for t in Base.metadata.tables if t not in counts}  # made after 0001: empty
    assert later_tables and copy_database(src, dst) == {**counts, **later_tables}
    check_upgraded(dst, counts)
    dst.dispose()
    src.dispose()
