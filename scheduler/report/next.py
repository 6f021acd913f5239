"""`nightplan next`: what to observe at a given time, until when, and the two entries after it. Pure."""

from __future__ import annotations

from datetime import datetime
from typing import Any

from scheduler.model.timegrid import iso


def _t(s: str) -> datetime:
    return datetime.fromisoformat(s.replace("Z", "+00:00"))


def what_next(doc: dict[str, Any], at: datetime, n_after: int = 2) -> dict[str, Any]:
    """From a plan document: the entry in progress at ``at`` (or None), and the next ``n_after``.

    With nothing in progress, ``upcoming[0]`` is the entry to move to now (the telescope slews
    and sets up during the gap before it) and ``until`` is when it starts. Before the night has
    begun (``night_started`` false) there is nothing to move to yet: ``minutes_to_night`` says
    how long until it does.
    """
    entries = sorted(doc["entries"], key=lambda e: e["start"])
    current = next((e for e in entries if _t(e["start"]) <= at < _t(e["end"])), None)
    after = [e for e in entries if _t(e["start"]) > at]
    out: dict[str, Any] = {
        "at": iso(at),
        "plan_version": doc["plan"]["version"],
        "night": doc["night"]["date"],
        "current": current,
        "until": current["end"] if current else (after[0]["start"] if after else None),
        "minutes_left": round((_t(current["end"]) - at).total_seconds() / 60.0, 1) if current else None,
        "upcoming": after[:n_after],
        "caution": doc["caution"],
        # before the night has begun (an afternoon look) the answer is when it begins, not a target
        "night_start": doc["night"]["start"],
        "night_start_local": doc["night"]["start_local"],
        "night_started": at >= _t(doc["night"]["start"]),
        "minutes_to_night": None if at >= _t(doc["night"]["start"]) else
        round((_t(doc["night"]["start"]) - at).total_seconds() / 60.0, 1),
    }
    if current is None:
        if not entries:
            out["state"] = "empty"
        elif at < _t(entries[0]["start"]):
            out["state"] = "before"
        elif not after:
            out["state"] = "finished"
        else:
            out["state"] = "between"
    else:
        out["state"] = "observing"
    return out
