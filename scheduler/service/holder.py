"""Who holds a database's service lock and whether that holder is alive: plain data read from
the ``service_lock`` row (service/lock.py takes and refreshes the lock), with no database
library, so `nightplan status` can answer without loading one.
"""

from __future__ import annotations

import os
import socket
from dataclasses import dataclass
from datetime import datetime

from scheduler.model.timegrid import iso, utcnow

LOCK_NAME = "service"
REFRESH_S = 5.0  # heartbeat period
STALE_AFTER_S = 30.0  # six missed heartbeats: the holder is presumed dead


def this_host() -> str:
    return socket.gethostname()[:200]


def pid_alive(pid: int) -> bool:
    """Is a process with this pid running on this host (a zombie counts as gone)?"""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True  # exists, owned by someone else
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as f:
            state = f.read().rsplit(")", 1)[1].split()[0]
        return state not in ("Z", "X")
    except (OSError, IndexError):
        return True


@dataclass(frozen=True)
class LockInfo:
    holder: str
    pid: int
    host: str
    started_at: datetime
    heartbeat_at: datetime

    @classmethod
    def of(cls, row) -> "LockInfo":
        return cls(row.holder, row.pid, row.host, row.started_at, row.heartbeat_at)

    def heartbeat_age_s(self, now: datetime | None = None) -> float:
        return ((now or utcnow()) - self.heartbeat_at).total_seconds()

    def stale_reason(self, now: datetime | None = None, stale_after_s: float = STALE_AFTER_S) -> str | None:
        """Why this holder is presumed dead, or None while it is alive."""
        if self.host == this_host() and not pid_alive(self.pid):
            return f"process {self.pid} on {self.host} is gone"
        age = self.heartbeat_age_s(now)
        if age > stale_after_s:
            return f"last heartbeat {age:.0f} s ago (stale after {stale_after_s:g} s)"
        return None

    def describe(self, now: datetime | None = None) -> str:
        return (f"pid {self.pid} on {self.host}, since {iso(self.started_at)}, "
                f"heartbeat {self.heartbeat_age_s(now):.0f} s ago")

    def as_dict(self, now: datetime | None = None) -> dict:
        return {"holder": self.holder, "pid": self.pid, "host": self.host, "since": iso(self.started_at),
                "heartbeat_at": iso(self.heartbeat_at), "heartbeat_age_s": round(self.heartbeat_age_s(now), 1)}


