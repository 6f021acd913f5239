"""Copy a whole nightplan database to another one (e.g. the SQLite default to a shared
PostgreSQL server), in one transaction on the destination, ids and history preserved."""

from __future__ import annotations

from sqlalchemy import func, insert, select

from scheduler.model.errors import InputError
from scheduler.db import migrate
from scheduler.db.models import Base
from scheduler.db.session import Database

BATCH = 1000


def copy_database(src: Database, dst: Database) -> dict[str, int]:
    """Rows copied per table. The destination must be empty (freshly initialised is fine)."""
    migrate.upgrade(dst)
    if migrate.current_revision(src) != migrate.current_revision(dst):
        raise InputError("db", "source and destination schemas differ; run `nightplan init` on the source first")
    tables = Base.metadata.sorted_tables  # parents before children
    counts: dict[str, int] = {}
    with src.engine.connect() as sconn, dst.engine.begin() as dconn:
        for t in tables:
            if dconn.execute(select(func.count()).select_from(t)).scalar():
                raise InputError("to", f"destination table {t.name} is not empty; copy into a new database")
        for t in tables:
            n = 0
            result = sconn.execute(select(t).order_by(*t.primary_key.columns)).mappings()
            while rows := result.fetchmany(BATCH):
                dconn.execute(insert(t), [dict(r) for r in rows])
                n += len(rows)
            counts[t.name] = n
        if dst.engine.dialect.name == "postgresql":
            # explicit ids were inserted: move each sequence past the copied ids
            for t in tables:
                pk = list(t.primary_key.columns)
                if len(pk) == 1 and pk[0].type.python_type is int:
                    col = pk[0]
                    top = select(func.coalesce(func.max(col), 0)).scalar_subquery()
                    dconn.execute(select(func.setval(func.pg_get_serial_sequence(t.name, col.name), top + 1, False)))
    return counts
