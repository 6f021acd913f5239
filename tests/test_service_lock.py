"""One service per database: the service_lock row, stale holders, take-over, refusal."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from datetime import timedelta

import pytest

from conftest import run_cli
from scheduler.db.models import ServiceLock, utcnow
from scheduler.db.session import open_db
from scheduler.service.lock import (
    LOCK_NAME, STALE_AFTER_S, DatabaseLock, LockHeld, LockLost, pid_alive, read_lock, this_host,
)


@pytest.fixture
def db(workdir):
    d = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    yield d
    d.dispose()


def _set_holder(db, **values):
    def work(s):
        row = s.get(ServiceLock, LOCK_NAME)
        for k, v in values.items():
            setattr(row, k, v)
    db.retrying(work)


def _dead_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()  # reaped: the pid is free (reuse within a test is vanishingly unlikely)
    return p.pid


def test_first_acquire_then_second_refused(db):
    a = DatabaseLock(db)
    assert a.acquire() is None
    info = read_lock(db)
    assert (info.pid, info.host, info.holder) == (os.getpid(), this_host(), a.holder)
    b = DatabaseLock(db)
    with pytest.raises(LockHeld) as e:
        b.acquire()
    assert e.value.info.holder == a.holder
    assert not b.held


def test_refresh_moves_heartbeat_and_release_frees(db):
    a = DatabaseLock(db)
    a.acquire()
    _set_holder(db, heartbeat_at=utcnow() - timedelta(seconds=10))
    a.refresh()
    assert read_lock(db).heartbeat_age_s() < 5
    a.release()
    assert read_lock(db) is None
    assert DatabaseLock(db).acquire() is None


def test_dead_process_on_this_host_is_taken_over_at_once(db):
    a = DatabaseLock(db)
    a.acquire()
    dead = _dead_pid()
    _set_holder(db, pid=dead)  # heartbeat still fresh: the pid check alone decides
    b = DatabaseLock(db)
    taken = b.acquire()
    assert taken is not None and taken.pid == dead
    assert read_lock(db).holder == b.holder
    with pytest.raises(LockLost):  # the old holder, were it alive, learns at its next refresh
        a.refresh()
    a.release()  # releasing someone else's row must not delete it
    assert read_lock(db).holder == b.holder


def test_other_host_is_stale_only_by_heartbeat_age(db):
    a = DatabaseLock(db)
    a.acquire()
    _set_holder(db, host="another-host.invalid", pid=1)
    with pytest.raises(LockHeld):
        DatabaseLock(db).acquire()
    _set_holder(db, heartbeat_at=utcnow() - timedelta(seconds=STALE_AFTER_S + 5))
    taken = DatabaseLock(db).acquire()
    assert taken.host == "another-host.invalid"


def test_live_pid_with_old_heartbeat_is_stale(db):
    a = DatabaseLock(db)
    a.acquire()
    info = read_lock(db)
    assert info.stale_reason() is None
    _set_holder(db, heartbeat_at=utcnow() - timedelta(seconds=STALE_AFTER_S + 1))
    assert "heartbeat" in read_lock(db).stale_reason()


def test_zombie_counts_as_gone():
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline:  # exited but not reaped yet: a zombie
        with open(f"/proc/{p.pid}/stat") as f:
            if f.read().rsplit(")", 1)[1].split()[0] == "Z":
                break
        time.sleep(0.02)
    assert not pid_alive(p.pid)
    p.wait()
    assert not pid_alive(p.pid)
    assert pid_alive(os.getpid())


def test_cli_refuses_while_a_live_service_holds_the_lock(workdir, db):
    holder = DatabaseLock(db)  # this test process plays the running service
    holder.acquire()
    r = run_cli("serve", "--once", cwd=workdir, timeout=120)
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "another nightplan service already runs" in lines[0]
    assert f"pid {os.getpid()}" in lines[0]
    assert "Traceback" not in r.stderr
    st = run_cli("status", "--json", cwd=workdir, check=True)
    svc = json.loads(st.stdout)["service"]
    assert svc["alive"] is True and svc["pid"] == os.getpid()
    holder.release()
    st = json.loads(run_cli("status", "--json", cwd=workdir, check=True).stdout)["service"]
    assert st["alive"] is False and st["state"] == "stopped"
