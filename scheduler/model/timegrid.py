"""Time and grid rules, one home for each: ISO-8601 in and out, UTC helpers, the grid step of a
moment, and runs of True on a grid. Imports nothing of ours beyond errors and input checks."""

from __future__ import annotations

from datetime import date, datetime, timezone
from typing import TYPE_CHECKING, Any

from scheduler.model.errors import InputError
from scheduler.model.untrusted import shown, type_name

if TYPE_CHECKING:  # annotations only
    import numpy as np

MIN_YEAR, MAX_YEAR = 1900, 2200  # the ephemerides (IERS, planetary series) are trusted in this span


def utc(unix_s: float) -> datetime:
    """Aware UTC datetime of a unix time in seconds."""
    return datetime.fromtimestamp(float(unix_s), tz=timezone.utc)


def utcnow() -> datetime:
    return datetime.now(timezone.utc)


def as_utc(t: datetime) -> datetime:
    """An aware UTC datetime; a naive one is taken as UTC (the database stores naive UTC)."""
    return t.replace(tzinfo=timezone.utc) if t.tzinfo is None else t.astimezone(timezone.utc)


def stored_utc(t: datetime) -> datetime:
    """The naive UTC datetime the database stores for an aware one; a naive one is refused (its
    zone is unknown)."""
    if t.tzinfo is None:
        raise ValueError("naive datetime given to a UTC column")
    return t.astimezone(timezone.utc).replace(tzinfo=None)


def iso(t: datetime | None) -> str | None:
    """ISO-8601 UTC with a Z, to the second."""
    if t is None:
        return None
    return as_utc(t).strftime("%Y-%m-%dT%H:%M:%SZ")


def parse_time(value: Any, field_name: str, *, require_zone: bool = False) -> datetime:
    """ISO-8601 with a zone (``Z`` or an offset); returns an aware UTC datetime.

    ``require_zone``: a time without a zone is refused (requests and conditions reports: a
    local time read as UTC would be off by hours without anyone noticing). Otherwise it is
    taken as UTC (command-line clocks such as ``--now``, where the help says UTC).
    """
    example = "e.g. 2026-12-05T03:30:00Z"
    if isinstance(value, datetime):
        t = value
    elif not isinstance(value, str):
        raise InputError(field_name, f"must be an ISO-8601 time as text, not {type_name(value)} ({example})")
    else:
        s = value.strip()
        if s.endswith(("Z", "z")):
            s = s[:-1] + "+00:00"
        try:
            t = datetime.fromisoformat(s)
        except ValueError:
            raise InputError(field_name, f"{shown(value)} is not an ISO-8601 time ({example})") from None
    if require_zone and t.tzinfo is None:
        raise InputError(field_name, f"{shown(value)} has no time zone; add Z for UTC or an offset such as "
                                     f"-03:00 ({example})")
    if t.tzinfo is not None and not (MIN_YEAR <= t.year <= MAX_YEAR):
        # checked before the conversion: years 1 and 9999 with an offset overflow astimezone
        raise InputError(field_name, f"{shown(value)}: year must be from {MIN_YEAR} to {MAX_YEAR}")
    t = as_utc(t)
    if not (MIN_YEAR <= t.year <= MAX_YEAR):
        raise InputError(field_name, f"{shown(value)}: year must be from {MIN_YEAR} to {MAX_YEAR}")
    return t


def parse_date(value: Any, field_name: str = "night") -> date:
    """A calendar date YYYY-MM-DD (a night is named by its local evening), within the years
    the ephemerides are trusted for: a night near year 1 or 9999 would overflow the UTC span."""
    if not isinstance(value, str):
        raise InputError(field_name, f"must be a date YYYY-MM-DD as text, not {type_name(value)}")
    try:
        d = date.fromisoformat(value.strip())
    except ValueError:
        raise InputError(field_name, f"{shown(value)} is not a date YYYY-MM-DD "
                                     "(the local evening the night begins)") from None
    if not (MIN_YEAR <= d.year <= MAX_YEAR - 1):
        raise InputError(field_name, f"{shown(value)}: year must be from {MIN_YEAR} to {MAX_YEAR - 1}")
    return d


# numpy is imported inside the functions that use it: the interactive commands (request add,
# request list, status) read the queue through this module and answer faster without it.

def step_of(times_unix: np.ndarray, when: datetime | float) -> int:
    """The grid step of a moment: the first step that starts at or after ``when``.

    It rounds up, and that is the one rule everywhere (planning from now, re-plans, the
    service's validity checks, explanations, charts): nothing new may start in the past, so
    the step already under way when ``when`` falls inside it belongs to what came before. A
    moment on a step boundary (within a microsecond) is that step. Before the grid it is 0,
    after its last step it is ``len(times_unix)``.
    """
    import numpy as np

    t = when.timestamp() if isinstance(when, datetime) else float(when)
    return int(np.searchsorted(times_unix, t - 1e-6, side="left"))


def runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """Half-open index runs [start, end) where a 1-D mask is True."""
    import numpy as np

    m = np.concatenate([[False], np.asarray(mask, dtype=bool), [False]]).astype(np.int8)
    d = np.flatnonzero(np.diff(m))
    return list(zip(d[0::2].tolist(), d[1::2].tolist()))


def consecutive_runs(values: np.ndarray) -> list[tuple[int, int]]:
    """Inclusive (first, last) runs of consecutive integers in a sorted 1-D array."""
    import numpy as np

    values = np.asarray(values)
    if values.size == 0:
        return []
    br = np.flatnonzero(np.diff(values) != 1)
    lo = np.concatenate([[values[0]], values[br + 1]])
    hi = np.concatenate([values[br], [values[-1]]])
    return list(zip(lo.tolist(), hi.tolist()))
