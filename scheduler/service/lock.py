"""One service per database: the ``service_lock`` row (holder, pid, host, heartbeat).

The holder refreshes ``heartbeat_at`` every few seconds. A holder is stale when its heartbeat
is older than ``STALE_AFTER_S`` or, on the same host, when its process is gone; a new service
takes a stale lock over with a compare-and-swap on the holder, so two starters cannot both win.
All times here are wall-clock UTC (never the simulated service clock).
"""

from __future__ import annotations

import os
import uuid

from sqlalchemy import delete, update
from sqlalchemy.exc import IntegrityError

from scheduler.db.models import ServiceLock, utcnow
from scheduler.db.session import Database
from scheduler.service.holder import (  # noqa: F401  (re-exported: the lock's names)
    LOCK_NAME, REFRESH_S, STALE_AFTER_S, LockInfo, pid_alive, this_host,
)


class LockHeld(Exception):
    def __init__(self, info: LockInfo):
        self.info = info
        super().__init__(f"another service holds this database ({info.describe()})")


class LockLost(Exception):
    """Our row was taken over or removed: another service now owns the database."""


def read_lock(db: Database) -> LockInfo | None:
    with db.session() as s:
        row = s.get(ServiceLock, LOCK_NAME)
        return LockInfo.of(row) if row is not None else None


class DatabaseLock:
    def __init__(self, db: Database, *, stale_after_s: float = STALE_AFTER_S):
        self.db = db
        self.stale_after_s = stale_after_s
        self.host = this_host()
        self.pid = os.getpid()
        self.holder = f"{self.host}:{self.pid}:{uuid.uuid4().hex[:12]}"[:200]
        self.held = False

    def acquire(self) -> LockInfo | None:
        """Take the lock. Returns the stale holder taken over (None if the row was free).

        Raises LockHeld when a live service holds it.
        """
        def work(s):
            now = utcnow()
            row = s.get(ServiceLock, LOCK_NAME)
            if row is None:
                s.add(ServiceLock(name=LOCK_NAME, holder=self.holder, pid=self.pid, host=self.host,
                                  started_at=now, heartbeat_at=now))
                s.flush()
                return None
            old = LockInfo.of(row)
            if old.stale_reason(now, self.stale_after_s) is None:
                raise LockHeld(old)
            res = s.execute(update(ServiceLock).where(ServiceLock.name == LOCK_NAME,
                                                      ServiceLock.holder == old.holder)
                            .values(holder=self.holder, pid=self.pid, host=self.host, started_at=now,
                                    heartbeat_at=now).execution_options(synchronize_session=False))
            if res.rowcount != 1:  # someone else took it over first
                raise LockHeld(old)
            return old

        try:
            taken = self.db.retrying(work)
        except IntegrityError:  # another starter inserted the row between our read and write
            taken = self.db.retrying(work)
        self.held = True
        return taken

    def refresh(self) -> None:
        def work(s):
            res = s.execute(update(ServiceLock).where(ServiceLock.name == LOCK_NAME,
                                                      ServiceLock.holder == self.holder)
                            .values(heartbeat_at=utcnow()).execution_options(synchronize_session=False))
            return res.rowcount

        if self.db.retrying(work) != 1:
            self.held = False
            raise LockLost("the service lock was taken over by another service")

    def release(self) -> None:
        if not self.held:
            return

        def work(s):
            s.execute(delete(ServiceLock).where(ServiceLock.name == LOCK_NAME, ServiceLock.holder == self.holder)
                      .execution_options(synchronize_session=False))

        self.db.retrying(work)
        self.held = False
