"""The season outlook's storage edge: the queue read once for a simulation, and the stored
outlook (`season simulate --store`, shown by `request show` and `program show`).

Reading the queue writes nothing. Storing an outlook adds rows to ``season_outlook`` only.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any, Mapping

from sqlalchemy import inspect, select
from sqlalchemy.orm import Session

from scheduler.db import store
from scheduler.db.models import Program, SeasonOutlook
from scheduler.model.program import ProgramState
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import iso


def read_queue(s: Session) -> tuple[list[RequestSpec], list[ProgramState]]:
    """(active requests, programs with their tier, weight, allocated and charged hours), in one
    transaction: what a plan build reads of the queue."""
    return store.active_specs(s), list(store.program_states(s).values())


def store_outlook(s: Session, doc: Mapping[str, Any], computed_at: datetime, *, effort: int, weather: str) -> int:
    """One row per request and per program of the outlook document; returns the rows added."""
    common = dict(computed_at=computed_at, season_from=date.fromisoformat(doc["from"]),
                  season_to=date.fromisoformat(doc["to"]), realizations=int(doc["realizations"]),
                  seed=int(doc["seed"]), effort=int(effort), weather=weather[:200])
    ids = {p.code: p.id for p in store.list_programs(s)}
    n = 0
    for r in doc["requests"]:
        s.add(SeasonOutlook(request_id=int(r["id"]), p_complete=r["p_complete"], **common))
        n += 1
    for p in doc["programs"]:
        if p["code"] not in ids:
            continue
        c = p["completion"]
        s.add(SeasonOutlook(program_id=ids[p["code"]], completion_mean=c["mean"], completion_p10=c["p10"],
                            completion_p90=c["p90"], charged_h_mean=p["charged_h"]["mean"], **common))
        n += 1
    s.flush()
    return n


def _run(o: SeasonOutlook) -> dict[str, Any]:
    return {"computed_at": iso(o.computed_at), "from": o.season_from.isoformat(), "to": o.season_to.isoformat(),
            "realizations": o.realizations, "seed": o.seed, "effort": o.effort, "weather": o.weather}


def _have_table(s: Session) -> bool:
    """False on a database not yet upgraded to the outlook's schema (then there is no outlook)."""
    return inspect(s.connection()).has_table(SeasonOutlook.__tablename__)


def request_outlook(s: Session, request_id: int) -> dict[str, Any] | None:
    """The newest stored outlook of a request, or None."""
    if not _have_table(s):
        return None
    o = s.scalar(select(SeasonOutlook).where(SeasonOutlook.request_id == request_id)
                 .order_by(SeasonOutlook.computed_at.desc(), SeasonOutlook.id.desc()).limit(1))
    return None if o is None else {"p_complete": o.p_complete, **_run(o)}


def program_outlook(s: Session, code: str) -> dict[str, Any] | None:
    """The newest stored outlook of a program, or None."""
    if not _have_table(s):
        return None
    o = s.scalar(select(SeasonOutlook).join(Program, SeasonOutlook.program_id == Program.id)
                 .where(Program.code == code)
                 .order_by(SeasonOutlook.computed_at.desc(), SeasonOutlook.id.desc()).limit(1))
    if o is None:
        return None
    return {"completion": {"mean": o.completion_mean, "p10": o.completion_p10, "p90": o.completion_p90},
            "charged_h_mean": o.charged_h_mean, **_run(o)}


def outlook_line(o: Mapping[str, Any] | None, kind: str) -> str:
    """The one line `request show` / `program show` print."""
    if o is None:
        return "none stored (nightplan season simulate --store)"
    when = f"computed {o['computed_at']} for {o['from']} to {o['to']}, {o['realizations']} realizations"
    if kind == "request":
        return f"probability of completion {o['p_complete']:.2f} ({when})"
    c = o["completion"]
    if c["mean"] is None:
        return f"nothing queued at the time ({when})"
    return f"completion {100 * c['mean']:.0f} % (10-90 %: {100 * c['p10']:.0f}-{100 * c['p90']:.0f} %) ({when})"
