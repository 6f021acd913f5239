"""Engines and sessions: SQLite by default (WAL, busy timeout, owner-only file), any SQLAlchemy URL.

``open_db(url)`` returns a ``Database`` with a session factory and ``retrying`` to run a
write transaction with bounded retry and backoff when SQLite reports the database locked.
"""

from __future__ import annotations

import os
import random
import time
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator, TypeVar

from sqlalchemy import create_engine, event, inspect
from sqlalchemy.engine import Engine, make_url
from sqlalchemy.exc import ArgumentError, OperationalError
from sqlalchemy.orm import Session, sessionmaker

from scheduler.model.errors import InputError

DEFAULT_DB_FILE = "nightplan.sqlite"
T = TypeVar("T")


def resolve_url(url: str | None) -> str:
    """--db URL, else NIGHTPLAN_DB, else a SQLite file in the current folder."""
    url = url or os.environ.get("NIGHTPLAN_DB") or ""
    if not url:
        return f"sqlite:///{DEFAULT_DB_FILE}"
    if "://" not in url:  # a bare path means a SQLite file
        return f"sqlite:///{url}"
    return url


def sqlite_path(url: str) -> Path | None:
    u = make_url(url)
    if u.get_backend_name() != "sqlite" or not u.database or u.database == ":memory:":
        return None
    return Path(u.database)


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


def open_db(url: str | None = None, *, create_file: bool = True) -> Database:
    url = resolve_url(url)
    try:
        u = make_url(url)
    except ArgumentError:
        raise InputError("db", f"{url!r} is not a database URL (e.g. sqlite:///queue.sqlite)") from None
    path = sqlite_path(url)
    kwargs: dict = {}
    if path is not None:
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
        event.listen(engine, "connect", _sqlite_pragmas)
    return Database(url=url, engine=engine, sessions=sessionmaker(engine, expire_on_commit=False))
