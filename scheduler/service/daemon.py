"""`nightplan serve`: one long-running process per database, its jobs run by APScheduler.

Jobs (all but the lock heartbeat share one worker thread, so re-plans never overlap):
  feed       every --poll s: conditions files in the watched folder -> reports
  orders     every --poll s: operator re-plan orders -> a build from now, recorded on the order
  validity   every --poll s: new report / outcome / request -> does the plan still hold?
  heartbeat  every minute: re-plan when the plan is older than planning.heartbeat_min
  expire     every minute: requests whose windows have passed leave the queue
  lock       every few seconds, on its own thread: refresh the service lock's heartbeat

SIGTERM and SIGINT stop it cleanly: running jobs finish, the lock row is deleted. The process
opens no network port (unless --web serves the observer's page from it, on its own thread);
everything it shares goes through the database.
"""

from __future__ import annotations

import signal
import threading
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Callable

from scheduler.model.config import ObservatoryConfig
from scheduler.db.session import Database
from scheduler.planning.planner import Planner
from scheduler.service.clock import Clock
from scheduler.service.jobs import Jobs
from scheduler.service.lock import REFRESH_S, DatabaseLock, LockLost
from scheduler.service.log import EventLog

MAINTENANCE_S = 60.0


class DatabaseDamaged(Exception):
    """The start-up integrity check found damage: the service refuses to run on the file."""

    def __init__(self, what: str, problems: list[str]):
        super().__init__(problems[0])
        self.what = what
        self.problems = problems


class Service:
    def __init__(self, db: Database, config: ObservatoryConfig, *, log: EventLog, clock: Clock,
                 watch: Path | None = None, poll_s: float = 2.0, time_limit_s: float | None = None, web=None):
        self.db = db
        self.config = config
        self.log = log
        self.clock = clock
        self.watch = watch
        self.poll_s = poll_s
        self.planner = Planner(config)
        self.jobs = Jobs(db, config, self.planner, clock, log, watch=watch, time_limit_s=time_limit_s)
        self.lock = DatabaseLock(db)
        self._stop = threading.Event()
        self.exit_code = 0
        self._scheduler = None
        self._why_stop = "lock lost"
        self.web = web  # a scheduler.web.server.WebThread, started and stopped with the service

    # ------------------------------------------------------------------ job wrapper

    def _guard(self, name: str, fn: Callable[[], object]) -> Callable[[], bool]:
        """A job that never raises: a failure is one log line and the service keeps running.
        The wrapped job returns False when it failed."""
        def run() -> bool:
            if self._stop.is_set():
                return True
            try:
                fn()
            except LockLost as e:
                self.log.error("lock_lost", error=str(e))
                self.exit_code = 1
                self._stop.set()
                return False
            except Exception as e:  # noqa: BLE001 - keep the service alive
                first = (str(e).strip().splitlines() or [repr(e)])[0][:500]
                self.log.error("job_failed", job=name, error=f"{type(e).__name__}: {first}")
                return False
            return True
        return run

    def _after_feed(self) -> None:
        res = self.jobs.ingest_folder()
        if res.stored and self._scheduler is not None:  # look at the new report now, not a poll later
            self._scheduler.modify_job("validity", next_run_time=datetime.now(timezone.utc))

    # ------------------------------------------------------------------ run

    def check_database(self) -> None:
        """The quick integrity check at start: a damaged database is refused, never served
        (a write into a damaged file can spread the damage)."""
        what, problems = self.db.check_integrity(quick=True)
        if problems:
            self.log.error("database_damaged", db=self.db.url, check=what, problems=len(problems), first=problems[0])
            raise DatabaseDamaged(what, problems)
        self.log.info("database_checked", check=what, result="ok")

    def start_lock(self) -> None:
        """Take the database lock (raises LockHeld if a live service has it)."""
        taken = self.lock.acquire()
        if taken is not None:
            self.log.warning("lock_taken_over", previous=taken.holder, previous_pid=taken.pid,
                             previous_heartbeat=taken.heartbeat_at)

    def _started(self, mode: str) -> None:
        self.log.info("service_started", mode=mode, pid=self.lock.pid, host=self.lock.host, db=self.db.url,
                      watch=self.watch, poll_s=self.poll_s, clock=self.clock.describe(), now=self.clock.now(),
                      heartbeat_min=self.config.planning.heartbeat_min)

    def run_once(self) -> int:
        """--once: every job one time, in order, then release the lock.

        Exit status 1 when a job failed or a re-plan stored nothing (disk full, a damaged file,
        the checker refusing the plan): cron and monitoring see it, not only the log.
        """
        self.check_database()
        self.start_lock()
        self._started("once")
        failed_jobs: list[str] = []
        try:
            for name, fn in (("expire", self.jobs.expire), ("feed", self.jobs.ingest_folder),
                             ("orders", self.jobs.take_orders), ("validity", self.jobs.check_validity),
                             ("heartbeat", self.jobs.heartbeat)):
                if not self._guard(name, fn)():
                    failed_jobs.append(name)
        finally:
            self.lock.release()
            if failed_jobs or self.jobs.failed_replans:
                self.exit_code = self.exit_code or 1
            self.log.info("service_stopped", mode="once", exit_code=self.exit_code,
                          failed_jobs=",".join(failed_jobs) or None, failed_replans=self.jobs.failed_replans)
        return self.exit_code

    def run_forever(self) -> int:
        from apscheduler.executors.pool import ThreadPoolExecutor
        from apscheduler.schedulers.background import BackgroundScheduler

        self.check_database()
        self.start_lock()
        previous = {sig: signal.signal(sig, self._on_signal) for sig in (signal.SIGTERM, signal.SIGINT)}
        sched = BackgroundScheduler(
            executors={"default": ThreadPoolExecutor(1), "lock": ThreadPoolExecutor(1)},
            job_defaults={"coalesce": True, "max_instances": 1, "misfire_grace_time": None},
            timezone=timezone.utc,
        )
        self._scheduler = sched
        now = datetime.now(timezone.utc)
        soon = now + timedelta(seconds=0.2)
        sched.add_job(self._guard("lock", self.lock.refresh), "interval", seconds=REFRESH_S, id="lock",
                      executor="lock")
        sched.add_job(self._guard("expire", self.jobs.expire), "interval", seconds=MAINTENANCE_S, id="expire",
                      next_run_time=now)
        sched.add_job(self._guard("feed", self._after_feed), "interval", seconds=self.poll_s, id="feed",
                      next_run_time=now)
        sched.add_job(self._guard("orders", self.jobs.take_orders), "interval", seconds=self.poll_s, id="orders",
                      next_run_time=soon)
        sched.add_job(self._guard("validity", self.jobs.check_validity), "interval", seconds=self.poll_s,
                      id="validity", next_run_time=soon)
        sched.add_job(self._guard("heartbeat", self.jobs.heartbeat), "interval", seconds=MAINTENANCE_S,
                      id="heartbeat")
        self._started("serve")
        try:
            sched.start()
            if self.web is not None:
                self.web.start()
                self.log.info("web_started", url=self.web.url)
            while not self._stop.wait(0.5):
                # A library may reset SIGINT/SIGTERM at the C level (some solvers do after a solve in
                # a worker thread); re-arm ours so Ctrl-C always stops cleanly.
                for sig in previous:
                    signal.signal(sig, self._on_signal)
            self.log.info("service_stopping", why=self._why_stop)
            sched.shutdown(wait=True)  # lets a running build finish (bounded by the solver time limit)
        finally:
            if self.web is not None:
                self.web.stop()
            for sig, handler in previous.items():
                signal.signal(sig, handler)
            if self.lock.held:
                try:
                    self.lock.release()
                except Exception as e:  # noqa: BLE001 - a stale lock is taken over at the next start
                    self.log.error("lock_release_failed", error=str(e))
            self.log.info("service_stopped", exit_code=self.exit_code)
        return self.exit_code

    def _on_signal(self, signum, _frame) -> None:
        name = signal.Signals(signum).name
        if self._stop.is_set():
            self.log.warning("signal_ignored", signal=name, why="already stopping")
            return
        self._why_stop = name
        self._stop.set()

    def stop(self) -> None:
        self._why_stop = "stop()"
        self._stop.set()


def wait_until(pred: Callable[[], bool], timeout_s: float, step_s: float = 0.2) -> bool:
    """Poll ``pred`` until true or ``timeout_s`` passes (used by `replan --wait`)."""
    end = time.monotonic() + timeout_s
    while True:
        if pred():
            return True
        if time.monotonic() >= end:
            return False
        time.sleep(step_s)
