"""The schema: Alembic migrations agree with the models, upgrade from empty and downgrade."""

from __future__ import annotations

import os
import stat
from datetime import datetime, timezone

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect, text

from scheduler.db import migrate, store
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
