"""The schema: Alembic migrations agree with the models, upgrade from empty and downgrade."""

from __future__ import annotations

import os
import stat
from datetime import datetime, timezone

import numpy as np
import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect, text

from scheduler.db import migrate, store
from scheduler.db.documents import request_dict
from scheduler.db.models import Base
from scheduler.db.session import open_db


def test_migrations_match_models_and_round_trip(tmp_path):
    db = open_db(f"sqlite:///{tmp_path / 'q.sqlite'}")
    migrate.upgrade(db)
    assert migrate.current_revision(db) == migrate.head_revision(db)
    with db.engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}), Base.metadata)
    assert diff == []
    tables = set(inspect(db.engine).get_table_names())
    assert {"program", "request", "conditions_report", "conditions_sample", "plan", "plan_entry",
            "outcome", "replan_order", "service_lock"} <= tables
    migrate.downgrade(db, "base")
    assert migrate.current_revision(db) is None
    assert set(inspect(db.engine).get_table_names()) <= {"alembic_version"}
    migrate.upgrade(db)  # and back up again
    assert migrate.current_revision(db) == migrate.head_revision(db)


def test_sqlite_file_is_owner_only_and_in_wal_mode(tmp_path):
    path = tmp_path / "q.sqlite"
    db = open_db(f"sqlite:///{path}")
    migrate.upgrade(db)
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    with db.engine.connect() as conn:
        assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert conn.execute(text("PRAGMA busy_timeout")).scalar() == 30000


def test_times_come_back_as_aware_utc(tmp_path):
    db = open_db(f"sqlite:///{tmp_path / 'q.sqlite'}")
    migrate.upgrade(db)
    db.retrying(lambda s: store.add_program(s, "P1", "Dr. Test"))
    with db.session() as s:
        p = store.list_programs(s)[0]
        assert p.created_at.tzinfo is not None
        assert abs((datetime.now(timezone.utc) - p.created_at).total_seconds()) < 60


# --------------------------------------------------------------------------- queries per listing

def _planned(rid: int, k: int):
    from datetime import timedelta

    from scheduler.model.plan import PlanEntry

    start = datetime(2026, 12, 17, 1, 0, tzinfo=timezone.utc) + timedelta(minutes=20 * k)
    return PlanEntry(request_id=rid, execution=0, start=start, end=start + timedelta(minutes=15), start_step=k,
                     end_step=k + 1, slew_s=10.0, transition_s=20.0, setup_s=60.0, airmass_start=1.1,
                     airmass_end=1.2, predicted_fwhm_arcsec=0.9, predicted_pwv_mm=2.0, transmission=0.9,
                     merit=0.8, moon_sep_deg=float("nan"), value=np.float64(1.5))


def _result(entries):
    from scheduler.model.plan import PlanResult

    return PlanResult(entries=tuple(entries), unscheduled=((1, "no time left"),), solver_status="FEASIBLE",
                      objective=1.0, bound=2.0, gap=0.5, runtime_s=0.1, greedy_objective=0.5, used_greedy=False,
                      timings={"solve": np.float64(0.1), "sky": float("nan")}, violations=(), stats={"arcs": np.arange(3)})


def _count_queries(db):
    from sqlalchemy import event

    seen: list[str] = []

    def on(conn, cursor, statement, *a):
        seen.append(statement)

    event.listen(db.engine, "before_cursor_execute", on)
    return seen, lambda: event.remove(db.engine, "before_cursor_execute", on)


def test_listings_take_a_fixed_number_of_queries(tmp_path):
    """`plan list` and `request list` used to issue one query per plan or program listed."""
    from datetime import date

    from scheduler.db import plans
    from scheduler.model.request import validate_request
    from scheduler.model.config import load_config, starter_config_text

    cfg_path = tmp_path / "observatory.toml"
    cfg_path.write_text(starter_config_text(), encoding="utf-8")
    config = load_config(str(cfg_path))
    db = open_db(f"sqlite:///{tmp_path / 'q.sqlite'}")
    migrate.upgrade(db)
    codes = ["P1", "P2", "P3", "P4"]

    def fill(s):
        for c in codes:
            store.add_program(s, c, f"Dr. {c}")
        specs = [validate_request({"program": codes[i % 4], "target": f"t{i}", "ra": 10 + i, "dec": -30, "band": "V",
                                   "exposure_s": 300}, config) for i in range(12)]
        ids = store.add_requests(s, specs)
        for night in range(1, 6):  # five nights, one plan each, 1..5 entries
            plans.store_plan(s, _result([_planned(ids[k], k) for k in range(night)]), night=date(2026, 12, night),
                             reason=f"night {night}", planned_from=datetime(2026, 12, night, tzinfo=timezone.utc),
                             specs={}, conditions_report_id=None)

    db.retrying(fill)
    with db.session() as s:
        seen, stop = _count_queries(db)
        rows = plans.plan_listing(s)
        n_plan_list = len(seen)
        seen.clear()
        reqs = [request_dict(r) for r in store.list_requests(s)]
        n_request_list = len(seen)
        seen.clear()
        plan = plans.get_plan(s, 5)
        stored = plans.stored_plan(s, plan)
        n_stored = len(seen)
        stop()
    assert [(r["version"], r["entries"]) for r in rows] == [(5, 5), (4, 4), (3, 3), (2, 2), (1, 1)]
    assert n_plan_list == 1
    assert [r["program"] for r in reqs] == [codes[i % 4] for i in range(12)] and n_request_list == 1
    # the plan, its entries, the requests named (with programs); no conditions report to read
    assert len(stored.entries) == 5 and set(stored.requests) == {1, 2, 3, 4, 5} and n_stored == 3
    # what the solver hands over (numpy numbers, NaN) is stored as plain JSON and read back
    assert stored.summary["timings"] == {"solve": 0.1, "sky": None} and stored.summary["stats"] == {"arcs": [0, 1, 2]}
    assert stored.summary["unscheduled"] == [{"request_id": 1, "reason": "no time left"}]
    assert stored.entries[0].moon_sep_deg is None and stored.entries[0].value == 1.5


def test_status_is_an_enum_in_and_out(tmp_path):
    from sqlalchemy.exc import StatementError

    from scheduler.db.models import Request
    from scheduler.model.request import RequestStatus

    db = open_db(f"sqlite:///{tmp_path / 'q.sqlite'}")
    migrate.upgrade(db)
    db.retrying(lambda s: store.add_program(s, "P1", "Dr. Test"))
    base = dict(program_id=1, target="t", ra_deg=1.0, dec_deg=2.0, band="V", exposure_s=10.0)
    db.retrying(lambda s: s.add(Request(**base)))
    with db.session() as s:
        row = s.get(Request, 1)
        assert row.status is RequestStatus.QUEUED and row.status == "queued"  # a str, as JSON and tables show it
    with pytest.raises(StatementError, match="on hold"):  # refused before it reaches the database
        db.retrying(lambda s: s.add(Request(**base, status="on hold")))
