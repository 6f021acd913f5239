"""The same schema and commands on a real PostgreSQL server (skipped, visibly, without one)."""

from __future__ import annotations

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from conftest import cli_json, run_cli

from scheduler.db import migrate
from scheduler.db.models import Base
from scheduler.db.session import open_db


def test_migrations_on_postgres(pg_url):
    db = open_db(pg_url)
    migrate.upgrade(db)
    with db.engine.connect() as conn:
        assert compare_metadata(MigrationContext.configure(conn, opts={"compare_type": True}), Base.metadata) == []
    migrate.downgrade(db, "base")
    assert migrate.current_revision(db) is None
    migrate.upgrade(db)
    assert migrate.current_revision(db) == migrate.head_revision(db)
    db.dispose()


@pytest.mark.slow
def test_cli_queue_on_postgres(pg_url, tmp_path):
    env = {"NIGHTPLAN_DB": pg_url}
    run_cli("init", cwd=tmp_path, env=env, check=True)
    run_cli("program", "add", "PG-1", "--pi", "Dr. Post Gres", cwd=tmp_path, env=env, check=True)
    csv = tmp_path / "r.csv"
    csv.write_text("program,target,ra,dec,band,exposure_s,max_pwv_mm\n"
                   "PG-1,a,10,-30,V,300,\nPG-1,b,20,-40,N,600,2.5\n")
    run_cli("request", "import", str(csv), cwd=tmp_path, env=env, check=True)
    bad = tmp_path / "bad.csv"
    bad.write_text("program,target,ra,dec,band,exposure_s\nPG-1,c,10,-30,V,300\nPG-1,d,10,-30,V,-1\n")
    proc = run_cli("request", "import", str(bad), cwd=tmp_path, env=env)
    assert proc.returncode == 2 and "row 3" in proc.stderr
    rows = cli_json("request", "list", cwd=tmp_path, env=env)
    assert [r["target"] for r in rows] == ["a", "b"] and rows[1]["max_pwv_mm"] == 2.5
    run_cli("request", "withdraw", str(rows[0]["id"]), cwd=tmp_path, env=env, check=True)
    assert cli_json("request", "show", str(rows[0]["id"]), cwd=tmp_path, env=env)["status"] == "withdrawn"


@pytest.mark.slow
def test_copy_sqlite_queue_to_postgres(pg_url, workdir):
    """The documented move from the SQLite default to a shared PostgreSQL server."""
    csv = workdir / "r.csv"
    csv.write_text("program,target,ra,dec,band,exposure_s\nSTAR-1,a,10,-30,V,300\nSTAR-1,b,20,-40,K,600\n")
    run_cli("request", "import", str(csv), cwd=workdir, check=True)
    run_cli("request", "withdraw", "1", cwd=workdir, check=True)
    before = cli_json("request", "list", cwd=workdir)
    proc = run_cli("db", "copy", "--to", pg_url, cwd=workdir, check=True)
    assert "request 2" in proc.stdout
    env = {"NIGHTPLAN_DB": pg_url}
    assert cli_json("request", "list", cwd=workdir, env=env) == before
    # ids continue after the copied ones on PostgreSQL
    new_id = run_cli("request", "add", "--program", "STAR-1", "--target", "c", "--ra", "30", "--dec", "-20",
                     "--band", "R", "--exposure", "60", cwd=workdir, env=env, check=True).stdout.strip()
    assert int(new_id) == 3
    # copying again into a non-empty database is refused, nothing changed
    proc = run_cli("db", "copy", "--to", pg_url, cwd=workdir)
    assert proc.returncode == 2 and "not empty" in proc.stderr


@pytest.mark.slow
def test_service_on_postgres(pg_url, workdir):
    """The real service, unchanged, on PostgreSQL: first plan, an operator order, status, SIGTERM."""
    import os
    import signal
    import subprocess
    import sys

    from conftest import ROOT, wait_while_running

    env = {"NIGHTPLAN_DB": pg_url}
    run_cli("init", cwd=workdir, env=env, check=True)
    run_cli("program", "add", "PG-1", "--pi", "Dr. Post Gres", cwd=workdir, env=env, check=True)
    csv = workdir / "r.csv"
    csv.write_text("program,target,ra,dec,band,exposure_s\n" +
                   "".join(f"PG-1,t{i},{20 + 8 * i},-{30 + 3 * i},{'VRIJK'[i % 5]},600\n" for i in range(8)))
    run_cli("request", "import", str(csv), cwd=workdir, env=env, check=True)
    (workdir / "f.csv").write_text("time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome\n"
                                   "2026-12-16T22:00:00Z,0.8,2,0,5,30,open\n2026-12-17T10:00:00Z,0.9,3,0,5,30,open\n")
    run_cli("conditions", "load", "f.csv", cwd=workdir, env=env, check=True)
    full_env = dict(os.environ, NIGHTPLAN_DB=pg_url, PYTHONPATH=str(ROOT))
    full_env.pop("NIGHTPLAN_CONFIG", None)
    log = open(workdir / "service.log", "w")
    proc = subprocess.Popen([sys.executable, "-m", "scheduler", "serve", "--poll", "0.5", "--clock",
                             "2026-12-17T02:00:00Z"], cwd=workdir, env=full_env, stdout=log, stderr=subprocess.STDOUT)

    def wait_for(pred, what):
        return wait_while_running(pred, proc, workdir / "service.log", what, poll=0.3)

    def active_reason():
        st = cli_json("status", cwd=workdir, env=env)
        return st["service"]["alive"] and (st.get("plan") or {}).get("reason")

    try:
        wait_for(active_reason, "the first plan")
        run_cli("replan", "--reason", "operator order on postgres", cwd=workdir, env=env, check=True)
        wait_for(lambda: active_reason() == "operator order on postgres", "the ordered plan")
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(60) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
        log.close()
    assert cli_json("status", cwd=workdir, env=env)["service"]["alive"] is False
    assert run_cli("plan", "check", cwd=workdir, env=env).returncode == 0
