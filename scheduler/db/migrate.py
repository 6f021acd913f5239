"""Schema upgrades with Alembic. The scripts ship inside the package (``scheduler/db/migrations/``,
package data), so an installed wheel finds them as a source checkout does."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory

from scheduler.db.session import Database

MIGRATIONS_DIR = Path(__file__).resolve().parent / "migrations"


def alembic_config(db: Database) -> Config:
    if not (MIGRATIONS_DIR / "env.py").is_file():
        raise RuntimeError(
            f"migration scripts not found at {MIGRATIONS_DIR}; this nightplan installation is incomplete "
            "(reinstall it: `pip install --force-reinstall nightplan`)"
        )
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.set_main_option("sqlalchemy.url", db.url.replace("%", "%%"))
    return cfg


def _with_connection(db: Database, fn) -> None:
    """Run ``fn(cfg)`` in one transaction: a failed upgrade leaves the schema as it was.

    SQLite needs two things for that. Python's driver opens a transaction only before a data
    change, so schema changes would commit one by one: the transaction is begun explicitly.
    Foreign-key enforcement is off meanwhile: a batch migration copies a table, drops the
    original and renames the copy, and dropping a table others refer to fails with it on. The
    keys are checked before the commit instead."""
    cfg = alembic_config(db)
    sqlite = db.engine.dialect.name == "sqlite"
    with db.engine.connect() as conn:
        if sqlite:  # only outside a transaction does SQLite take this pragma
            conn.exec_driver_sql("PRAGMA foreign_keys=OFF")
            conn.commit()
        try:
            with conn.begin():
                if sqlite:
                    conn.exec_driver_sql("BEGIN IMMEDIATE")
                cfg.attributes["connection"] = conn
                fn(cfg)
                if sqlite:
                    broken = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                    if broken:
                        raise RuntimeError(f"the migration left {len(broken)} broken foreign keys "
                                           f"(first: {tuple(broken[0])}); nothing was changed")
        finally:
            if sqlite:
                conn.exec_driver_sql("PRAGMA foreign_keys=ON")
                conn.commit()


def upgrade(db: Database, revision: str = "head") -> None:
    _with_connection(db, lambda cfg: command.upgrade(cfg, revision))


def downgrade(db: Database, revision: str) -> None:
    _with_connection(db, lambda cfg: command.downgrade(cfg, revision))


def current_revision(db: Database) -> str | None:
    with db.engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def head_revision(db: Database) -> str | None:
    return ScriptDirectory.from_config(alembic_config(db)).get_current_head()
