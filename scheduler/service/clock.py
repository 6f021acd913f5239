"""The service's notion of "now": real UTC time, or a simulated clock for rehearsals and tests.

A simulated clock starts at a given ISO-8601 UTC instant and advances with the wall clock
(monotonic time), so a night in the past or future can be rehearsed at its own pace.
"""

from __future__ import annotations

import os
import time
from datetime import datetime, timedelta, timezone

from scheduler.model.errors import InputError
from scheduler.model.timegrid import iso, parse_time

CLOCK_ENV = "NIGHTPLAN_CLOCK"


class Clock:
    def __init__(self, start: datetime | None = None):
        self.start = start
        self._mono0 = time.monotonic()

    @classmethod
    def from_option(cls, text: str | None) -> "Clock":
        """--clock ISO, else NIGHTPLAN_CLOCK, else real time."""
        text = text if text else os.environ.get(CLOCK_ENV, "")
        if not text.strip():
            return cls(None)
        try:
            return cls(parse_time(text, "clock"))
        except InputError as e:
            raise InputError("clock", f"{e.message} (--clock or {CLOCK_ENV})") from None

    @property
    def simulated(self) -> bool:
        return self.start is not None

    def now(self) -> datetime:
        if self.start is None:
            return datetime.now(timezone.utc)
        return self.start + timedelta(seconds=time.monotonic() - self._mono0)

    def describe(self) -> str:
        return f"simulated from {iso(self.start)}" if self.start is not None else "real UTC"
