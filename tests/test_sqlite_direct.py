"""The SQLite file read and appended to without SQLAlchemy (scheduler/db/sqlite_direct.py) gives
what the ordinary path through SQLAlchemy gives: the same rows, values of the same types, the same
documents, the same stored request; and it steps aside whenever it cannot be sure of that.

The oracle is the ordinary path itself (the models, store.py, plans.py, service/status.py), run on
the same files; the migrations' head comes from Alembic.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
from datetime import datetime, timedelta, timezone
from enum import Enum
from pathlib import Path

import pytest

from conftest import run_cli
from scheduler.db import plans, store
from scheduler.db.documents import request_dict
from scheduler.db.models import ConditionsReport, Plan, ReplanOrder, Request, ServiceLock
from scheduler.db.session import open_db
from scheduler.db.sqlite_direct import SCHEMA_HEAD, DirectDb, plain_sqlite_file, run_direct
from scheduler.model.config import load_config
from scheduler.model.errors import InputError
from scheduler.model.request import RequestStatus, validate_request
from scheduler.service.lock import DatabaseLock
from scheduler.service.status import status_document

NIGHT = datetime(2026, 12, 16).date()
CLOCK = datetime(2026, 12, 17, 1, 30, tzinfo=timezone.utc)
TABLE = "time,ra,dec,delta_au\n2027-05-01T00:00:00Z,359.0,-20.0,0.4\n2027-05-02T00:00:00Z,0.8,-21.0,0.41\n"

# invented requests covering every kind of column: floats, NULLs, datetimes, booleans, a planet,
# an ephemeris table, repeats, a periodic window
RAW = [
    dict(target="DIRECT-K", ra=85.0, dec=-45.0, band="K", exposure_s=1200, priority=5),
    dict(target="DIRECT-V-REP", ra=70.0, dec=-30.0, band="V", exposure_s=600, priority=7, repeats=3,
         min_spacing_s=900, max_seeing_arcsec=1.2, max_airmass=1.8, too=True),
    dict(target="DIRECT-WINDOW", ra=30.0, dec=-55.0, band="R", exposure_s=300, not_before="2027-01-02T03:04:05Z",
         not_after="2027-02-01T00:00:00Z", period_epoch="2026-11-30T12:00:00.5Z", period_days=2.5,
         phase_min=0.9, phase_max=0.1, max_moon_illum=0.4, min_sky_mag=20.5),
    dict(target="DIRECT-MARS", body="mars", band="I", exposure_s=120),
    dict(target="DIRECT-TABLE", ephemeris=TABLE, band="R", exposure_s=240, priority=2),
]


def _specs(config, raws=RAW):
    return [validate_request({"program": "STAR-1", **r}, config, {"STAR-1"}, now=CLOCK - timedelta(days=30))
            for r in raws]


@pytest.fixture(scope="module")
def busy(tmp_path_factory, _initialised_template) -> Path:
    """A folder whose database has every kind of row the direct reads meet: requests of each kind
    (one withdrawn, one with a partial outcome), two conditions reports, a plan, a service lock
    held by this process, re-plan orders pending and done."""
    from scheduler.planning.planner import Planner

    folder = tmp_path_factory.mktemp("direct")
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(_initialised_template / name, folder / name)
    run_cli("program", "add", "OTHER-2", "--pi", "Dr. Ilse Varga", "--tier", "1", cwd=folder, check=True)
    config = load_config(folder / "observatory.toml")
    db = open_db(str(folder / "nightplan.sqlite"), create_file=False)
    ids = db.retrying(lambda s: store.add_requests(s, _specs(config)))
    other = validate_request({"program": "OTHER-2", **RAW[0], "target": "DIRECT-OTHER"}, config, {"OTHER-2"})
    db.retrying(lambda s: store.add_requests(s, [other]))
    db.retrying(lambda s: store.withdraw_request(s, ids[0]))
    db.retrying(lambda s: store.record_outcome(s, ids[1], "partial", exposure_s=200.0, note="cloud"))
    from scheduler.conditions.ingest import parse_conditions

    for pwv in (3.0, 1.5):
        samples = list(parse_conditions(f"time,seeing_arcsec,pwv_mm,cloud_mag\n{(CLOCK - timedelta(hours=3)).isoformat()},"
                                        f"0.8,{pwv},0.0\n{(CLOCK + timedelta(hours=6)).isoformat()},0.9,{pwv},0.1\n"))
        db.retrying(lambda s: store.store_conditions(s, samples, f"invented forecast pwv {pwv}"))
    built = Planner(config).build_and_store(db, night_date=NIGHT, reason="direct read test", now=CLOCK)
    assert built.version is not None
    for reason, result in (("first order", "plan 1 kept"), ("second order", "plan 1 kept again")):
        done = db.retrying(lambda s: plans.add_order(s, reason, "tester").id)
        db.retrying(lambda s: plans.finish_order(s.get(ReplanOrder, done), result, built.version))
    db.retrying(lambda s: plans.add_order(s, "clouds coming", "operator on duty"))
    db.retrying(lambda s: plans.add_order(s, "second thought", "operator on duty"))
    lock = DatabaseLock(db)
    assert lock.acquire() is None  # no one held it: ours now (the row stays for the module)
    db.dispose()
    return folder


def _copy_alive(busy: Path, to: Path) -> str:
    """A copy of the busy folder whose lock holder (this process) stays alive however slowly the
    test runs: its heartbeat is set an hour ahead, so the state and the texts do not change
    between two reads."""
    for name in ("observatory.toml", "nightplan.sqlite"):
        shutil.copy2(busy / name, to / name)
    ahead = (datetime.now(timezone.utc) + timedelta(hours=1)).strftime("%Y-%m-%d %H:%M:%S.%f")
    with sqlite3.connect(to / "nightplan.sqlite") as c:
        assert c.execute("UPDATE service_lock SET heartbeat_at = ?", (ahead,)).rowcount == 1
    return str(to / "nightplan.sqlite")


def _column_values(row) -> dict:
    return {c.key: getattr(row, c.key) for c in type(row).__table__.columns}


def _same_value(direct, orm) -> bool:
    """Equal, and of the type the models read (a stored enum reads back as its value's text here,
    which is equal to it and prints the same)."""
    if isinstance(orm, Enum):
        return direct == orm and str(direct) == str(orm) and type(direct) is str
    return direct == orm and type(direct) is type(orm)


@pytest.mark.parametrize("table,model", [("request", Request), ("plan", Plan), ("conditions_report", ConditionsReport),
                                          ("replan_order", ReplanOrder), ("service_lock", ServiceLock)])
def test_every_column_reads_back_as_the_models_read_it(busy, table, model, monkeypatch):
    from sqlalchemy import select

    from scheduler.db.sqlite_direct import SQL

    monkeypatch.setitem(SQL, "everything", f"SELECT * FROM {table}")  # the test's own statement: every row

    db = open_db(str(busy / "nightplan.sqlite"), create_file=False)
    with db.session() as s:
        orm_rows = [_column_values(r) for r in s.scalars(select(model))]
    db.dispose()
    direct = DirectDb.open(str(busy / "nightplan.sqlite"))
    assert direct is not None
    try:
        direct_rows = [vars(r) for r in direct.rows(table, "everything")]
    finally:
        direct.close()
    assert len(direct_rows) == len(orm_rows) > 0
    key = "name" if table == "service_lock" else "id"
    for d, o in zip(sorted(direct_rows, key=lambda r: r[key]), sorted(orm_rows, key=lambda r: r[key])):
        assert set(d) == set(o)
        bad = {k: (d[k], o[k]) for k in o if not _same_value(d[k], o[k])}
        assert not bad, f"{table}: {bad}"
    if table == "request":  # the file holds what the check is about
        assert any(r["ephemeris_csv"] for r in orm_rows) and any(r["not_before"] for r in orm_rows)
        assert any(r["too"] for r in orm_rows) and {str(r["status"]) for r in orm_rows} >= {"queued", "withdrawn"}
    if table == "plan":
        assert orm_rows[0]["summary"] and isinstance(orm_rows[0]["night"], type(NIGHT))


@pytest.mark.parametrize("status,program", [(None, None), ("queued", None), ("withdrawn", None), (None, "OTHER-2"),
                                            ("queued", "STAR-1"), ("done", None), (None, "NOPE")])
def test_request_listing_is_the_same_both_ways(busy, status, program):
    db = open_db(str(busy / "nightplan.sqlite"), create_file=False)
    with db.session() as s:
        orm = [request_dict(r) for r in store.list_requests(s, status, program)]
    db.dispose()
    used, direct = run_direct(str(busy / "nightplan.sqlite"), lambda d: [request_dict(r) for r in d.requests(status, program)])
    assert used
    assert json.dumps(direct) == json.dumps(orm, default=str)
    if (status, program) == (None, None):
        assert len(direct) == 6


def test_status_is_the_same_both_ways(busy, tmp_path):
    path = _copy_alive(busy, tmp_path)
    db = open_db(path, create_file=False)
    orm = status_document(db)
    db.dispose()
    used, direct = run_direct(path, lambda d: d.status())
    assert used
    ages = [doc["service"].pop("heartbeat_age_s") for doc in (direct, orm)]
    assert ages[0] == pytest.approx(ages[1], abs=30.0)  # read a moment apart
    assert direct == orm
    assert direct["service"]["state"] == "running" and direct["plan"]["entries"] > 0
    assert direct["plan"]["forecast_share"] is not None
    assert [o["reason"] for o in direct["pending_orders"]] == ["clouds coming", "second thought"]
    assert direct["last_order"]["result"] == "plan 1 kept again"
    assert direct["conditions"]["source"] == "invented forecast pwv 1.5"


def test_status_without_an_active_plan(busy, tmp_path):
    path = _copy_alive(busy, tmp_path)
    with sqlite3.connect(path) as c:
        assert c.execute("UPDATE plan SET active = 0").rowcount == 1
    db = open_db(path, create_file=False)
    orm = status_document(db)
    db.dispose()
    used, direct = run_direct(path, lambda d: d.status())
    assert used and direct["plan"] is None and orm["plan"] is None


def test_a_request_added_directly_is_stored_as_the_models_store_it(workdir):
    other = workdir / "copy.sqlite"
    shutil.copy2(workdir / "nightplan.sqlite", other)
    config = load_config(workdir / "observatory.toml")

    def given(codes=None):  # whatever status a spec carries, a new request is queued
        specs = _specs(config)
        return [specs[0].with_(status=RequestStatus.DONE), *specs[1:]]

    used, (specs, direct_ids) = run_direct(str(workdir / "nightplan.sqlite"), lambda d: d.add_requests(given))
    assert used
    db = open_db(str(other), create_file=False)
    orm_ids = db.retrying(lambda s: store.add_requests(s, given()))
    db.dispose()
    assert direct_ids == orm_ids == [1, 2, 3, 4, 5]

    def stored(path):
        with sqlite3.connect(path) as c:
            c.row_factory = sqlite3.Row
            return [dict(r) for r in c.execute("SELECT * FROM request ORDER BY id")]

    for d, o in zip(stored(workdir / "nightplan.sqlite"), stored(other)):
        for stamp in ("created_at", "updated_at"):  # the moment of the insert: same text form
            assert len(d.pop(stamp)) == len(o.pop(stamp)) == len("2026-12-03 16:25:45.594713")
        assert d == o and d["status"] == "queued"
    # and the ordinary path reads the directly written row back as its own
    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    with db.session() as s:
        back = [store.to_spec(r) for r in store.list_requests(s)]
    db.dispose()
    assert [b.with_(id=None) for b in back] == [sp.with_(id=None, status=RequestStatus.QUEUED) for sp in specs]


def test_validation_runs_outside_the_write_lock(workdir):
    """Validating may take most of a second (a planet's ephemeris loads on first use); the write
    lock is taken only for the insert, so meanwhile another writer (the service's heartbeat) is
    not kept waiting."""
    config = load_config(workdir / "observatory.toml")
    path = workdir / "nightplan.sqlite"
    probes = []

    def validate(codes):
        other = sqlite3.connect(path, timeout=0, isolation_level=None)  # no waiting: locked is an error
        try:
            other.execute("BEGIN IMMEDIATE")
            other.execute("ROLLBACK")
            probes.append("free")
        finally:
            other.close()
        return _specs(config)[:1]

    used, (_specs_added, ids) = run_direct(str(path), lambda d: d.add_requests(validate))
    assert used and probes == ["free"] and ids == [1]


def test_a_request_without_its_program_is_not_listed_either_way(workdir):
    config = load_config(workdir / "observatory.toml")
    path = str(workdir / "nightplan.sqlite")
    db = open_db(path, create_file=False)
    db.retrying(lambda s: store.add_requests(s, _specs(config)[:3]))
    db.dispose()
    with sqlite3.connect(path) as c:  # a damaged file: foreign keys were off when it was written
        c.execute("PRAGMA foreign_keys=OFF")
        c.execute("UPDATE request SET program_id = 99 WHERE id = 2")
    db = open_db(path, create_file=False)
    with db.session() as s:
        orm = [request_dict(r) for r in store.list_requests(s)]
    db.dispose()
    used, direct = run_direct(path, lambda d: [request_dict(r) for r in d.requests()])
    assert used and [r["id"] for r in direct] == [r["id"] for r in orm] == [1, 3]


def test_the_insert_sets_every_column_of_the_model():
    import re

    from scheduler.db.documents import SPEC_FIELDS
    from scheduler.db.sqlite_direct import SQL

    columns, values = re.fullmatch(r"INSERT INTO request \((.*)\) VALUES \((.*)\)", SQL["add_request"]).groups()
    model = [c.key for c in Request.__table__.columns if c.key != "id"]
    assert columns.split(", ") == model and values.split(", ") == [f":{c}" for c in model]
    assert set(model) == {"program_id", *SPEC_FIELDS, "ephemeris_csv", "created_at", "updated_at"}


def test_times_are_stored_as_naive_utc_both_ways():
    """One rule (model/timegrid.stored_utc) for both paths: an aware time in any zone is stored as
    naive UTC (ISO-8601 offsets: 05:04:05+02:00 is 03:04:05Z), a naive one is refused."""
    from scheduler.db.models import UTCDateTime
    from scheduler.db.sqlite_direct import _stored

    east = datetime(2027, 1, 2, 5, 4, 5, 250000, tzinfo=timezone(timedelta(hours=2)))
    assert _stored(east) == "2027-01-02 03:04:05.250000"
    assert UTCDateTime().process_bind_param(east, None) == datetime(2027, 1, 2, 3, 4, 5, 250000)
    for store_it in (_stored, lambda t: UTCDateTime().process_bind_param(t, None)):
        with pytest.raises(ValueError, match="naive"):
            store_it(datetime(2027, 1, 2, 3, 4, 5))


def test_refused_input_writes_nothing(workdir):
    config = load_config(workdir / "observatory.toml")

    def bad(codes):
        good = _specs(config)[:2]
        return good + [validate_request({"program": "STAR-1", **RAW[0], "dec": 100}, config, codes)]

    with pytest.raises(InputError, match="dec"):
        run_direct(str(workdir / "nightplan.sqlite"), lambda d: d.add_requests(bad))
    with pytest.raises(InputError, match="unknown program 'GHOST'"):
        run_direct(str(workdir / "nightplan.sqlite"),
                   lambda d: d.add_requests(lambda codes: [sp.with_(program="GHOST") for sp in _specs(config)]))
    with sqlite3.connect(workdir / "nightplan.sqlite") as c:
        assert c.execute("SELECT count(*) FROM request").fetchone() == (0,)


def test_schema_head_is_the_migrations_head(workdir):
    from scheduler.db.migrate import current_revision, head_revision

    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    try:
        assert SCHEMA_HEAD == head_revision(db) == current_revision(db)
    finally:
        db.dispose()


def test_anything_else_takes_the_ordinary_path(workdir, tmp_path, monkeypatch):
    monkeypatch.delenv("NIGHTPLAN_DB", raising=False)
    assert plain_sqlite_file(None) == Path("nightplan.sqlite")
    assert plain_sqlite_file("q.sqlite") == Path("q.sqlite")
    assert plain_sqlite_file("sqlite:////abs/q.sqlite") == Path("/abs/q.sqlite")
    for url in ("postgresql+psycopg2://u@h/db", "sqlite://", "sqlite:///:memory:", "sqlite:///a%20b.sqlite",
                "sqlite:///file:/x/q.sqlite?mode=ro&uri=true", "sqlite:///q.sqlite?timeout=5"):
        assert plain_sqlite_file(url) is None, url
    monkeypatch.setenv("NIGHTPLAN_DB", str(workdir / "nightplan.sqlite"))
    assert plain_sqlite_file(None) == workdir / "nightplan.sqlite"

    path = str(workdir / "nightplan.sqlite")
    assert DirectDb.open(str(tmp_path / "missing.sqlite")) is None and not (tmp_path / "missing.sqlite").exists()
    (tmp_path / "empty.sqlite").touch()
    assert DirectDb.open(str(tmp_path / "empty.sqlite")) is None  # no schema: `init` is the ordinary path's advice
    with sqlite3.connect(path) as c:  # an older schema (before the newest migration)
        c.execute("UPDATE alembic_version SET version_num = '0004'")
    assert DirectDb.open(path) is None
    assert run_direct(path, lambda d: 1 / 0) == (False, None)


def _loaded(proc) -> set[str]:
    assert proc.returncode == 0, proc.stderr
    return {line.rsplit("|", 1)[1].strip() for line in proc.stderr.splitlines() if line.startswith("import time:")}


def test_the_commands_answer_the_same_without_sqlalchemy(busy, tmp_path):
    """The real commands, in new processes: on the plain file they load no SQLAlchemy; through a
    URL only SQLAlchemy opens (a URI file name) they give the same answers."""
    plain = _copy_alive(busy, tmp_path)
    ordinary = f"sqlite:///file:{plain}?uri=true"
    log = {"PYTHONPROFILEIMPORTTIME": "1"}
    add = ("request", "add", "--program", "OTHER-2", "--target", "Invented field 9", "--ra", "05:35:17.3",
           "--dec", "-05:23:28", "--band", "K", "--exposure", "600", "--not-before", "2027-01-01T00:00:00Z")
    for args in (("request", "list", "--json"), ("request", "list", "--status", "withdrawn", "--json"),
                 ("status", "--json"), ("status",), add):
        direct = run_cli("--db", plain, *args, cwd=tmp_path, env=log)
        loaded = _loaded(direct)
        assert "click" in loaded and not any(m.split(".")[0] == "sqlalchemy" for m in loaded), args
        other = run_cli("--db", ordinary, *args, cwd=tmp_path, env=log)
        assert "sqlalchemy.orm" in _loaded(other), args
        if args == add:
            assert int(other.stdout) == int(direct.stdout) + 1 == 8
        elif args[0] == "status" and "--json" in args:
            a, b = json.loads(direct.stdout), json.loads(other.stdout)
            a["service"].pop("heartbeat_age_s"), b["service"].pop("heartbeat_age_s")
            assert a == b
        elif args[0] == "status":
            assert direct.stdout.splitlines()[1:] == other.stdout.splitlines()[1:]  # the first line has the age
        else:
            assert direct.stdout == other.stdout and json.loads(direct.stdout)
    rows = json.loads(run_cli("--db", plain, "request", "list", "--json", cwd=tmp_path, check=True).stdout)
    a, b = rows[-2:]
    assert (a["id"], b["id"]) == (7, 8)
    for k in ("id", "created_at", "updated_at"):
        a.pop(k), b.pop(k)
    assert a == b and a["not_before"] == "2027-01-01T00:00:00Z"
