"""Crash safety: SIGKILL the real service at random moments while it re-plans, many times.

After every kill the database must pass SQLite's integrity check, hold every request, and
have exactly one active plan for the night, which passes the independent checker.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from datetime import date, datetime, timedelta, timezone
from pathlib import Path

import pytest
from sqlalchemy import func, select, text

from conftest import ROOT, run_cli, wait_while_running
from scheduler.model.config import load_config
from scheduler.db import plans, store
from scheduler.db.models import Plan
from scheduler.db.session import open_db
from scheduler.planning.planner import Planner, verify_stored_plan
from scheduler.model.request import validate_request

pytestmark = pytest.mark.slow

KILLS = 20  # reported in docs/reliability.md
NIGHT = date(2026, 12, 16)
CLOCK = "2026-12-17T02:00:00Z"  # inside the dark part of the night at the starter site
N_REQUESTS = 40


def _env() -> dict:
    env = dict(os.environ)
    env.pop("NIGHTPLAN_DB", None)
    env.pop("NIGHTPLAN_CONFIG", None)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    return env


@pytest.fixture
def queue(workdir: Path) -> Path:
    config = load_config(workdir / "observatory.toml")  # builds at the tests' fixed effort (conftest)
    rng = random.Random(7)
    bands = ["U", "B", "V", "R", "I", "J", "H", "K", "N", "Q"]
    raws = [{"program": "STAR-1", "target": f"crash-{i}", "ra": round(rng.uniform(0, 120), 3),
             "dec": round(rng.uniform(-70, 0), 3), "band": rng.choice(bands),
             "exposure_s": rng.choice([300, 600, 900, 1200]), "priority": rng.randint(1, 10)}
            for i in range(N_REQUESTS)]
    db = open_db(str(workdir / "nightplan.sqlite"), create_file=False)
    db.retrying(lambda s: store.add_requests(s, [validate_request(r, config, {"STAR-1"}) for r in raws]))
    db.dispose()
    start = datetime(2026, 12, 16, 22, 0, tzinfo=timezone.utc)
    rows = ["time,seeing_arcsec,pwv_mm,cloud_mag,wind_ms,humidity_pct,dome"]
    for k in range(25):
        t = start + timedelta(minutes=30 * k)
        rows.append(f"{t:%Y-%m-%dT%H:%M:%SZ},{0.6 + 0.05 * (k % 7):.2f},{1.5 + 0.3 * (k % 5):.1f},0,5,30,open")
    (workdir / "forecast.csv").write_text("\n".join(rows) + "\n")
    run_cli("conditions", "load", "forecast.csv", cwd=workdir, check=True)
    return workdir


def _serve(folder: Path, log) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "scheduler", "serve", "--poll", "0.3", "--clock", CLOCK],
                            cwd=folder, env=_env(), stdout=log, stderr=subprocess.STDOUT)


def _log(folder: Path) -> str:
    return (folder / "service.log").read_text()


def _wait(pred, proc, folder: Path, what: str) -> None:
    wait_while_running(pred, proc, folder / "service.log", what, poll=0.1)


def _state(db):
    with db.session() as s:
        integrity = s.execute(text("PRAGMA integrity_check")).scalar()
        n_req = s.scalar(select(func.count()).select_from(store.Request))
        active = s.scalars(select(Plan.id).where(Plan.active.is_(True), Plan.night == NIGHT)).all()
        n_plans = s.scalar(select(func.count()).select_from(Plan))
    return integrity, n_req, list(active), n_plans


def test_sigkill_during_replans_loses_nothing(queue):
    folder = queue
    db = open_db(str(folder / "nightplan.sqlite"), create_file=False)
    config = load_config(folder / "observatory.toml")
    rng = random.Random(2026)
    log = open(folder / "service.log", "w")
    try:
        proc = _serve(folder, log)
        # wait for the first plan, so that every later kill has a last good plan to keep
        _wait(lambda: bool(_state(db)[2]), proc, folder, "the first plan")
        kills_during_build = 0
        planner = Planner(config)  # keeps the sky between verifications
        for k in range(KILLS):
            if proc.poll() is not None:
                raise AssertionError(f"service died by itself:\n{_log(folder)[-3000:]}")
            taken = _log(folder).count("order_taken")
            started = _log(folder).count("replan_start")
            db.retrying(lambda s: plans.add_order(s, f"crash test order {k}", "crash-test"))
            _wait(lambda: _log(folder).count("order_taken") > taken, proc, folder, "the order to be taken")
            if k % 2 == 0:
                # every other kill is aimed: within 0.1 s of seeing the build begin (a build in a fresh
                # process takes over a second: the sky, then the search at the configured effort), so
                # that kills inside a build do not depend on how fast this machine is
                _wait(lambda: _log(folder).count("replan_start") > started, proc, folder, "the build to begin")
                time.sleep(rng.uniform(0.0, 0.1))
            else:
                time.sleep(rng.uniform(0.0, 5.0))  # anywhere: during the build, the store, or idle after it
            log_now = _log(folder)
            if log_now.rfind("replan_start") > max(log_now.rfind("plan_stored"), log_now.rfind("replan_failed")):
                kills_during_build += 1
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
            integrity, n_req, active, _ = _state(db)
            assert integrity == "ok"
            assert n_req == N_REQUESTS
            assert len(active) == 1, f"after kill {k}: active plans {active}"
            version, violations = verify_stored_plan(db, config, active[0], planner)
            assert violations == [], f"after kill {k}, plan {version}: {violations[:3]}"
            proc = _serve(folder, log)
        _wait(lambda: _log(folder).count("service_started") > KILLS, proc, folder, "the last start")

        def orders_served():
            with db.session() as s:
                return not plans.pending_orders(s)

        # the orders interrupted by kills were kept and are served by the last service
        _wait(orders_served, proc, folder, "the interrupted orders to be served")
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(30) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
        log.close()
    integrity, n_req, active, n_plans = _state(db)
    assert integrity == "ok" and n_req == N_REQUESTS and len(active) == 1
    assert n_plans >= 2  # the first plan, and at least the re-plan serving the interrupted orders
    assert kills_during_build >= KILLS // 4, kills_during_build  # the kills did hit builds in progress
    print(f"crash safety: {KILLS} SIGKILLs, {kills_during_build} inside a build, {n_plans} plan versions, "
          f"{N_REQUESTS} requests kept")
    db.dispose()
