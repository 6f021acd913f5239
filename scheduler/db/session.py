"""Engines and sessions: SQLite by default (WAL, busy timeout, owner-only file), any SQLAlchemy URL.

``open_db(url)`` returns a ``Database`` with a session factory and ``retrying`` to run a
write transaction with bounded retry and backoff when SQLite reports the database locked.
"""

from __future__ import annotations

import os
import random
import sqlite3
import tempfile
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, TypeVar

from sqlalchemy import create_engine, event, inspect
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, OperationalError
from sqlalchemy.orm import Session, sessionmaker

from scheduler.db.sqlite_direct import resolve_url
from scheduler.model.errors import InputError

T = TypeVar("T")


def sqlite_path(url: str) -> Path | None:
    """The file of a SQLite URL (also of the URI form ``sqlite:///file:PATH?mode=ro&uri=true``)."""
    u = make_url(url)
    if u.get_backend_name() != "sqlite" or not u.database or u.database == ":memory:":
        return None
    name = u.database
    if _is_uri(u) and name.startswith("file:"):
        name = name[len("file:"):]
    return Path(name)


def _is_uri(u) -> bool:
    return str(u.query.get("uri", "")).lower() in ("true", "1")


def sqlite_read_only(url: str) -> bool:
    """A SQLite URL that opens the file read-only (``mode=ro`` or ``immutable=1`` with ``uri=true``)."""
    u = make_url(url)
    return (u.get_backend_name() == "sqlite" and _is_uri(u)
            and (u.query.get("mode") == "ro" or str(u.query.get("immutable", "")) == "1"))


def _can_create_in(folder: Path, name: str) -> bool:
    """Whether a file can be created in ``folder``: tried, as permissions alone do not tell (an
    immutable folder or a read-only mount refuses even the superuser)."""
    try:
        fd, probe = tempfile.mkstemp(prefix=f".{name}-probe-", dir=folder)
    except OSError:
        return False
    os.close(fd)
    os.unlink(probe)
    return True


def _check_folder_writable(path: Path) -> None:
    """SQLite in WAL mode creates FILE-wal and FILE-shm beside the database even to read it: in a
    folder this user cannot write, that fails as "unable to open database file". Say why, and how
    to read the file anyway."""
    folder = path.parent if str(path.parent) else Path(".")
    if not path.exists():
        return
    wal, shm = (path.with_name(path.name + suffix) for suffix in ("-wal", "-shm"))
    if all(p.exists() and os.access(p, os.R_OK | os.W_OK) for p in (wal, shm)):
        return  # SQLite can use the files already there
    if os.access(folder, os.W_OK | os.X_OK) and _can_create_in(folder, path.name):
        return
    full = path.resolve()
    raise InputError("db", f"the folder {folder.resolve()} is read-only for this user, and SQLite must create "
                           f"{path.name}-wal and {path.name}-shm beside the database even to read it; make the folder "
                           f"writable, or read the file without writing: --db 'sqlite:///file:{full}?mode=ro&uri=true' "
                           f"(when the -wal/-shm files exist) or --db 'sqlite:///file:{full}?immutable=1&uri=true' "
                           "(when nothing writes the file meanwhile)")


def _prepare_sqlite_file(path: Path) -> None:
    """Create the file readable only by its owner before SQLite creates it with the umask."""
    if not path.exists():
        path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(path, os.O_CREAT | os.O_WRONLY, 0o600)
        os.close(fd)


def _sqlite_pragmas(dbapi_conn, _record) -> None:
    cur = dbapi_conn.cursor()
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA busy_timeout=30000")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.execute("PRAGMA synchronous=NORMAL")
    cur.close()


def _sqlite_read_only_pragmas(dbapi_conn, _record) -> None:
    # no journal mode change: that is a write; whatever mode the file is in, it is read as it is
    cur = dbapi_conn.cursor()
    cur.execute("PRAGMA busy_timeout=30000")
    cur.execute("PRAGMA query_only=ON")
    cur.close()


@dataclass
class Database:
    url: str
    engine: Engine
    sessions: sessionmaker[Session]

    @property
    def path(self) -> Path | None:
        return sqlite_path(self.url)

    def is_initialised(self) -> bool:
        return inspect(self.engine).has_table("request")

    @contextmanager
    def session(self) -> Iterator[Session]:
        with self.sessions() as s:
            yield s

    def retrying(self, work: Callable[[Session], T], *, attempts: int = 8) -> T:
        """Run ``work`` in one transaction; retry with backoff if the database is locked."""
        delay = 0.05
        for attempt in range(attempts):
            try:
                with self.sessions.begin() as s:
                    return work(s)
            except OperationalError as e:
                if "locked" not in str(e).lower() and "busy" not in str(e).lower() or attempt == attempts - 1:
                    raise
                time.sleep(delay * (1 + random.random()))
                delay = min(delay * 2, 2.0)
        raise RuntimeError("unreachable")

    def dispose(self) -> None:
        self.engine.dispose()

    def check_integrity(self, *, quick: bool = False) -> tuple[str, list[str]]:
        """(what was checked, the problems found: empty when the database is sound).

        SQLite: ``PRAGMA integrity_check`` (every page, every index against its table) or, with
        ``quick``, ``PRAGMA quick_check`` (page structure, no index contents; what the service
        runs at start). A file too damaged for the check to finish is one problem: SQLite's message.
        PostgreSQL offers a client no whole-database check: the server answers a catalog query
        and every nightplan table is read end to end (page-level checks are the server's: data
        checksums, the amcheck extension). Other databases: the tables are read end to end.
        """
        from sqlalchemy import func, select
        from sqlalchemy.exc import DBAPIError
        from sqlalchemy.sql import table

        from scheduler.db.models import Base

        dialect = self.engine.dialect.name
        if dialect == "sqlite":
            what = "PRAGMA quick_check" if quick else "PRAGMA integrity_check"
            try:
                raw = self.engine.raw_connection()
                try:
                    cur = raw.cursor()
                    if quick:
                        cur.execute("PRAGMA quick_check")
                    else:
                        cur.execute("PRAGMA integrity_check")
                    rows = [str(r[0]) for r in cur.fetchall()]
                    cur.close()
                finally:
                    raw.close()
            except DBAPIError as e:
                return what, [f"the check could not finish: {e.orig}"]
            except sqlite3.DatabaseError as e:  # raised by the cursor itself, outside SQLAlchemy's wrapping
                return what, [f"the check could not finish: {e}"]
            lines = [line for r in rows for line in r.splitlines() if line and not line.startswith("*** in database")]
            return what, [] if lines == ["ok"] else lines
        if dialect == "postgresql":
            what = ("PostgreSQL: a catalog query and every nightplan table read end to end (the server offers "
                    "clients no whole-database check; page checks are its data checksums and amcheck)")
        else:
            what = f"{dialect}: every nightplan table read end to end"
        problems = []
        with self.engine.connect() as conn:
            if dialect == "postgresql":
                try:
                    conn.execute(select(func.count()).select_from(table("pg_class", schema="pg_catalog"))).scalar()
                except DBAPIError as e:
                    return what, [f"catalog query failed: {str(e.orig).strip().splitlines()[0]}"]
            for t in Base.metadata.sorted_tables:
                try:
                    conn.execute(select(func.count()).select_from(t)).scalar()
                except DBAPIError as e:
                    problems.append(f"table {t.name}: {str(e.orig).strip().splitlines()[0]}")
                    conn.rollback()
        return what, problems


def open_db(url: str | None = None, *, create_file: bool = True) -> Database:
    url = resolve_url(url)
    try:
        u = make_url(url)
    except ArgumentError:
        raise InputError("db", f"{url!r} is not a database URL (e.g. sqlite:///queue.sqlite)") from None
    path = sqlite_path(url)
    read_only = path is not None and sqlite_read_only(url)
    kwargs: dict = {}
    if path is not None:
        if read_only:
            if not path.exists():
                raise InputError("db", f"{path} does not exist (a read-only URL opens an existing file only)")
        else:
            _check_folder_writable(path)
            if create_file:
                _prepare_sqlite_file(path)
        kwargs["connect_args"] = {"timeout": 30}
    else:
        kwargs["pool_pre_ping"] = True
    shown = u.render_as_string(hide_password=True)  # never print a password
    try:
        engine = create_engine(u, **kwargs)
    except ModuleNotFoundError as e:
        raise InputError("db", f"cannot open {shown}: its driver is not installed ({e.name}); for PostgreSQL "
                               "use postgresql+psycopg2://... with `pip install psycopg2-binary`") from None
    except Exception as e:  # unknown dialect
        raise InputError("db", f"cannot open {shown}: {e}") from None
    if path is not None:
        event.listen(engine, "connect", _sqlite_read_only_pragmas if read_only else _sqlite_pragmas)
    return Database(url=url, engine=engine, sessions=sessionmaker(engine, expire_on_commit=False))
