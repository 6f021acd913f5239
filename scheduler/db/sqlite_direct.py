"""The commands people type most, answered from the SQLite file with the standard library.

Importing SQLAlchemy takes 0.3-0.5 s on a loaded 2-core machine, as long as `request list
--json`, `request add` and `status` may take in all. When the database is a plain SQLite file
(a path, or ``sqlite:///PATH`` without options) that ``nightplan init`` has brought to the
schema this code knows, those commands read and append through ``sqlite3`` here; anything else
(another database, a URI with options, an older schema, any sqlite3 error) takes the ordinary
path through SQLAlchemy (db/session.py), which also words the errors.

What keeps this a view of the one schema rather than a second one:

* every read is ``SELECT *`` of one table, so the columns are the file's own, and each value
  is converted by the column's declared type in the file's catalog (DATETIME: aware UTC,
  DATE, BOOLEAN, JSON), the way the models' types read them (db/models.py);
* the rows go to the same document builders (db/documents.py, service/status.status_of);
* the one write, a new request, sets every column of the row: SPEC_FIELDS (db/documents.py),
  the program, the ephemeris table and the two timestamps, with values stored as SQLAlchemy
  stores them (naive UTC text to the microsecond, booleans as 0/1, enums as their values);
* tests/test_sqlite_direct.py reads and writes the same files both ways and compares, and
  checks SCHEMA_HEAD against the migrations' head.
"""

from __future__ import annotations

import json
import os
import sqlite3
from contextlib import closing
from datetime import date, datetime, timezone
from enum import Enum
from pathlib import Path
from types import SimpleNamespace
from typing import Any, Callable, Iterable, TypeVar
from urllib.parse import quote

from scheduler.db.documents import SPEC_FIELDS
from scheduler.model.timegrid import stored_utc

DEFAULT_DB_FILE = "nightplan.sqlite"
SCHEMA_HEAD = "season_outlook"  # the newest migration's revision (db/migrations/versions/)
T = TypeVar("T")


def resolve_url(url: str | None) -> str:
    """--db URL, else NIGHTPLAN_DB, else a SQLite file in the current folder."""
    url = url or os.environ.get("NIGHTPLAN_DB") or ""
    if not url:
        return f"sqlite:///{DEFAULT_DB_FILE}"
    if "://" not in url:  # a bare path means a SQLite file
        return f"sqlite:///{url}"
    return url


def plain_sqlite_file(url: str | None) -> Path | None:
    """The file of a plain SQLite URL, None for anything this module leaves to SQLAlchemy (other
    databases, options, URI file names, escapes, in-memory databases)."""
    url = resolve_url(url)
    prefix = "sqlite:///"
    if not url.startswith(prefix):
        return None
    name = url[len(prefix):]
    if not name or any(c in name for c in "?%#") or name == ":memory:" or name.startswith("file:"):
        return None
    return Path(name)


def _utc(text: str) -> datetime:
    return datetime.fromisoformat(text).replace(tzinfo=timezone.utc)


# declared type (as the models create it) -> how its stored value reads back
_READERS: dict[str, Callable[[Any], Any]] = {
    "DATETIME": _utc, "DATE": date.fromisoformat, "BOOLEAN": bool, "JSON": json.loads,
}  # FLOAT needs none: a column of REAL affinity reads back a float even where it stored an integer


def _stored(value: Any) -> Any:
    """A Python value as SQLAlchemy stores it in SQLite."""
    if isinstance(value, datetime):  # SQLAlchemy's SQLite DATETIME text, to the microsecond
        return stored_utc(value).strftime("%Y-%m-%d %H:%M:%S.%f")
    if isinstance(value, Enum):
        return value.value
    if isinstance(value, bool):
        return int(value)
    return value


# Every statement this module runs: constants with bound parameters only (tests/test_security.py
# reads this table), each the twin of the function of store.py, plans.py or service/lock.py named
# beside it. A read is `SELECT *` of one table: the columns are the file's own.
SQL = {
    "foreign_keys": "PRAGMA foreign_keys=ON",
    "column_types": "SELECT name, type FROM pragma_table_info(?)",
    "has_revision": "SELECT count(*) FROM sqlite_master WHERE type = 'table' AND name = 'alembic_version'",
    "revision": "SELECT version_num FROM alembic_version",
    "programs": "SELECT * FROM program ORDER BY id",
    "requests": ("SELECT * FROM request WHERE (?1 IS NULL OR status = ?1) AND "  # store.list_requests
                 "(?2 IS NULL OR program_id IN (SELECT id FROM program WHERE code = ?2)) ORDER BY id"),
    "active_plan": "SELECT * FROM plan WHERE active = 1 ORDER BY id DESC LIMIT 1",  # plans.active_plan
    "plan_entries": "SELECT count(*) FROM plan_entry WHERE plan_id = ?",
    "service_lock": "SELECT * FROM service_lock WHERE name = ?",  # lock.read_lock
    "latest_conditions": "SELECT * FROM conditions_report ORDER BY id DESC LIMIT 1",  # store.latest_conditions
    "pending_orders": "SELECT * FROM replan_order WHERE done_at IS NULL ORDER BY id",  # plans.pending_orders
    "last_done_order": ("SELECT * FROM replan_order WHERE done_at IS NOT NULL "  # plans.last_done_order
                        "ORDER BY done_at DESC LIMIT 1"),
    "program_ids": "SELECT id, code FROM program",
    "add_request": (  # store.add_requests: every column but the id (the test compares with the model)
        "INSERT INTO request (program_id, target, ra_deg, dec_deg, band, instrument, exposure_s, repeats, "
        "min_spacing_s, resolution_arcsec, max_seeing_arcsec, max_pwv_mm, max_airmass, min_moon_sep_deg, "
        "max_moon_illum, min_sky_mag, max_cloud_mag, not_before, not_after, period_epoch, period_days, "
        "phase_min, phase_max, priority, too, status, completed_repeats, partial_exposure_s, "
        "guide_star_sep_arcsec, body, ephemeris_csv, created_at, updated_at) "
        "VALUES (:program_id, :target, :ra_deg, :dec_deg, :band, :instrument, :exposure_s, :repeats, "
        ":min_spacing_s, :resolution_arcsec, :max_seeing_arcsec, :max_pwv_mm, :max_airmass, :min_moon_sep_deg, "
        ":max_moon_illum, :min_sky_mag, :max_cloud_mag, :not_before, :not_after, :period_epoch, :period_days, "
        ":phase_min, :phase_max, :priority, :too, :status, :completed_repeats, :partial_exposure_s, "
        ":guide_star_sep_arcsec, :body, :ephemeris_csv, :created_at, :updated_at)"),
    "begin": "BEGIN",
    "begin_write": "BEGIN IMMEDIATE",  # the write lock before the programs are read again for the insert
    "commit": "COMMIT",
    "rollback": "ROLLBACK",
}


class DirectDb:
    """An open SQLite file at the known schema (``open`` returns None otherwise)."""

    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn
        self._readers: dict[str, dict[str, Callable[[Any], Any]]] = {}

    @classmethod
    def open(cls, url: str | None) -> DirectDb | None:
        path = plain_sqlite_file(url)
        if path is None or not path.is_file():
            return None
        try:
            # mode=rw: never create a file (a missing one is the ordinary path's error to word)
            conn = sqlite3.connect(f"file:{quote(str(path.resolve()))}?mode=rw", uri=True, timeout=30,
                                   isolation_level=None)
        except sqlite3.Error:
            return None
        try:
            conn.execute(SQL["foreign_keys"])
            known = conn.execute(SQL["has_revision"]).fetchone()[0]
            head = conn.execute(SQL["revision"]).fetchall() if known else []
        except sqlite3.Error:
            conn.close()
            return None
        if head != [(SCHEMA_HEAD,)]:
            conn.close()
            return None
        return cls(conn)

    def close(self) -> None:
        self.conn.close()

    def _column_readers(self, table: str) -> dict[str, Callable[[Any], Any]]:
        if table not in self._readers:
            cols = self.conn.execute(SQL["column_types"], (table,)).fetchall()
            self._readers[table] = {name: _READERS[kind.upper()] for name, kind in cols if kind.upper() in _READERS}
        return self._readers[table]

    def rows(self, table: str, query: str, params: Iterable[Any] = ()) -> list[SimpleNamespace]:
        """The rows of ``SQL[query]`` (a `SELECT *` of ``table``), the columns as attributes."""
        readers = self._column_readers(table)
        cur = self.conn.execute(SQL[query], tuple(params))
        names = [d[0] for d in cur.description]
        return [SimpleNamespace(**{n: (readers[n](v) if v is not None and n in readers else v)
                                   for n, v in zip(names, values)}) for values in cur]

    def first(self, table: str, query: str, params: Iterable[Any] = ()) -> SimpleNamespace | None:
        found = self.rows(table, query, params)
        return found[0] if found else None

    # ------------------------------------------------------------------ reads

    def requests(self, status: str | None = None, program: str | None = None) -> list[SimpleNamespace]:
        """store.list_requests: by id, each with ``.program.code``."""
        self.conn.execute(SQL["begin"])  # one snapshot for both reads
        try:
            programs = {p.id: p for p in self.rows("program", "programs")}
            rows = self.rows("request", "requests", (status or None, program or None))
        finally:
            self.conn.execute(SQL["rollback"])
        for r in rows:
            r.program = programs.get(r.program_id)
        return [r for r in rows if r.program is not None]  # as the join there: a row without its program is not listed

    def status(self) -> dict[str, Any]:
        """service/status.status_document, read in one transaction."""
        from scheduler.service.holder import LOCK_NAME
        from scheduler.service.status import status_of

        self.conn.execute(SQL["begin"])
        try:
            plan = self.first("plan", "active_plan")
            n_entries = 0 if plan is None else self.conn.execute(SQL["plan_entries"], (plan.id,)).fetchone()[0]
            return status_of(self.first("service_lock", "service_lock", (LOCK_NAME,)), plan, n_entries,
                             self.first("conditions_report", "latest_conditions"),
                             self.rows("replan_order", "pending_orders"), self.first("replan_order", "last_done_order"))
        finally:
            self.conn.execute(SQL["rollback"])

    # ------------------------------------------------------------------ the one write

    def add_requests(self, make_specs: Callable[[set[str]], list]) -> tuple[list, list[int]]:
        """store.add_requests after validation: ``make_specs(program codes)`` gives the
        RequestSpecs (it raises to refuse them; nothing is written then). The programs are read
        again under the write lock, so a program gone meanwhile refuses the insert."""
        from scheduler.model.errors import InputError
        from scheduler.model.request import RequestStatus
        from scheduler.model.timegrid import utcnow

        # Validation first, outside the write lock: it may take most of a second (a planet's
        # ephemeris loads on first use), and a held lock would stall the service's heartbeat.
        specs = make_specs({code for _pid, code in self.conn.execute(SQL["program_ids"])})
        self.conn.execute(SQL["begin_write"])
        try:
            program_ids = {code: pid for pid, code in self.conn.execute(SQL["program_ids"])}
            ids = []
            for spec in specs:
                if spec.program not in program_ids:
                    raise InputError("program", f"unknown program {spec.program!r}")
                row = {f: getattr(spec, f) for f in SPEC_FIELDS}
                row.update(program_id=program_ids[spec.program], status=RequestStatus.QUEUED,
                           ephemeris_csv=spec.ephemeris.to_csv() if spec.ephemeris is not None else None,
                           created_at=utcnow(), updated_at=utcnow())
                ids.append(self.conn.execute(SQL["add_request"], {k: _stored(v) for k, v in row.items()}).lastrowid)
            self.conn.execute(SQL["commit"])
        except BaseException:
            self.conn.execute(SQL["rollback"])
            raise
        return specs, ids


def run_direct(url: str | None, work: Callable[[DirectDb], T]) -> tuple[bool, T | None]:
    """(True, work's result) when the database could be used here, else (False, None) and
    nothing was written: the caller then takes the ordinary path. An InputError from ``work``
    (bad input) propagates; a sqlite3 error means "use the ordinary path"."""
    db = DirectDb.open(url)
    if db is None:
        return False, None
    with closing(db):
        try:
            return True, work(db)
        except sqlite3.Error:
            return False, None
