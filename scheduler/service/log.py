"""Service logs: one event a line, ``TIMESTAMP LEVEL EVENT key=value ...``.

Timestamps are wall-clock UTC (the simulated clock, when there is one, appears as ``now=``).
Values with spaces, quotes or ``=`` are JSON-quoted so a line splits unambiguously.
"""

from __future__ import annotations

import json
import logging
import logging.handlers
import os
import sys
from datetime import datetime, timezone
from typing import Any

from scheduler.report.safe_text import clean

LOGGER_NAME = "nightplan.service"


def _value(v: Any) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, float):
        return f"{v:.3f}".rstrip("0").rstrip(".") if abs(v) < 1e6 else f"{v:.6g}"
    if isinstance(v, datetime):
        return v.astimezone(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    s = clean(str(v).replace("\r", " ").replace("\n", " "))  # no terminal control reaches a log reader
    if not s or any(c in s for c in ' "=\t'):
        return json.dumps(s, ensure_ascii=False)
    return s


class EventFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        ts = datetime.fromtimestamp(record.created, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"
        fields = getattr(record, "kv", None) or {}
        parts = [ts, record.levelname, record.getMessage()]
        parts += [f"{k}={_value(v)}" for k, v in fields.items()]
        if record.exc_info and not fields.get("error"):
            e = record.exc_info[1]
            parts.append(f"error={_value(f'{type(e).__name__}: {e}')}")
        return " ".join(parts)


class EventLog:
    """log.info("plan_stored", version=3, reason="...")"""

    def __init__(self, logger: logging.Logger):
        self.logger = logger

    def _emit(self, level: int, event: str, kv: dict[str, Any]) -> None:
        self.logger.log(level, event, extra={"kv": kv})

    def info(self, event: str, **kv: Any) -> None:
        self._emit(logging.INFO, event, kv)

    def warning(self, event: str, **kv: Any) -> None:
        self._emit(logging.WARNING, event, kv)

    def error(self, event: str, **kv: Any) -> None:
        self._emit(logging.ERROR, event, kv)


LOG_FILE_MODE = 0o600  # like the database: operators' names, reasons and file names stay private


def create_log_file(path: str | os.PathLike) -> None:
    """Make sure ``path`` can be appended to, creating it owner-only (0600) if it is new.
    An existing file keeps its mode (an operator may have opened it to a group on purpose)."""
    os.close(os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, LOG_FILE_MODE))


class PrivateLogFile(logging.handlers.WatchedFileHandler):
    """A log file reopened when logrotate moves it away, created 0600 each time it is new."""

    def _open(self):
        fd = os.open(self.baseFilename, os.O_WRONLY | os.O_APPEND | os.O_CREAT, LOG_FILE_MODE)
        return os.fdopen(fd, "a", encoding=self.encoding, errors=self.errors)


def setup_logging(log_file: str | None = None) -> EventLog:
    """Events to stdout, or to ``log_file`` instead (reopened if rotated away by logrotate)."""
    logger = logging.getLogger(LOGGER_NAME)
    logger.handlers.clear()
    logger.propagate = False
    logger.setLevel(logging.INFO)
    if log_file:
        handler: logging.Handler = PrivateLogFile(log_file, encoding="utf-8")
    else:
        handler = logging.StreamHandler(sys.stdout)
    handler.setFormatter(EventFormatter())
    logger.addHandler(handler)
    # APScheduler's own chatter is noise: every job run, and "skipped" runs, which are expected
    # because all jobs share one worker. Keep its errors, in our format.
    aps = logging.getLogger("apscheduler")
    aps.handlers.clear()
    aps.propagate = False
    aps.setLevel(logging.ERROR)
    aps.addHandler(handler)
    return EventLog(logger)
