"""Queue operations on the database: programs, requests, conditions reports, outcomes.

Every function takes an open Session and leaves commit/rollback to the caller, so a CLI
command or a service job is exactly one transaction (all or nothing).
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any, Iterable

from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session, contains_eager, selectinload

from scheduler.conditions.ingest import Sample
from scheduler.model.charging import charged_hours, completion, resolve_charge
from scheduler.model.errors import InputError, NotFoundError
from scheduler.model.program import DEFAULT_TIER, ProgramState
from scheduler.model.request import (
    ACTIVE_STATUSES, CLOSED_STATUSES, OutcomeResult, RequestSpec, RequestStatus, validate_program,
)
from scheduler.db.documents import SPEC_FIELDS, program_dict
from scheduler.db.models import (
    ConditionsReport, ConditionsSample, Opportunity, Outcome, PlanEntry, Program, Request, utcnow,
)



# --------------------------------------------------------------------------- programs

MAX_TIER = 9


def add_program(s: Session, code: str, pi: str, hours: float | str = 0.0, weight: float | str = 1.0,
                tier: int = DEFAULT_TIER) -> Program:
    """A new program; code, PI, hours and weight are checked by the one rule
    (model.request.validate_program), whatever the caller: the CLI passes --hours/--weight as
    typed, so '1_0' is refused there too."""
    code, pi, hours, weight = validate_program(code, pi, hours, weight)
    if isinstance(tier, bool) or not isinstance(tier, int) or not (1 <= tier <= MAX_TIER):
        raise InputError("tier", f"{tier!r} is out of range; allowed a whole number from 1 (highest) to {MAX_TIER}")
    if s.scalar(select(Program).where(Program.code == code)) is not None:
        raise InputError("code", f"program {code!r} already exists")
    prog = Program(code=code, pi=pi, hours_allocated=hours, weight=weight, tier=tier)
    s.add(prog)
    s.flush()
    return prog


def charged_hours_by_program(s: Session) -> dict[str, float]:
    """Hours charged to each program by its recorded outcomes (model/charging.py)."""
    q = (select(Program.code, func.coalesce(func.sum(Outcome.charged_h), 0.0))
         .select_from(Program).join(Request, Request.program_id == Program.id, isouter=True)
         .join(Outcome, Outcome.request_id == Request.id, isouter=True).group_by(Program.code))
    return {code: float(h or 0.0) for code, h in s.execute(q).all()}


def program_states(s: Session) -> dict[str, ProgramState]:
    """What the planner's value needs of every program: tier, weight, allocated and charged hours."""
    charged = charged_hours_by_program(s)
    return {p.code: ProgramState(p.code, tier=int(p.tier), weight=float(p.weight),
                                 hours_allocated=float(p.hours_allocated), hours_charged=charged.get(p.code, 0.0))
            for p in list_programs(s)}


def program_report(s: Session, code: str | None = None) -> list[dict[str, Any]]:
    """Per program: allocated, charged and remaining hours, completion (executions done over
    executions asked, withdrawn requests left out), request counts."""
    charged = charged_hours_by_program(s)
    q = (select(Program.code, func.coalesce(func.sum(Request.completed_repeats), 0), func.coalesce(func.sum(Request.repeats), 0),
                func.count(Request.id))
         .select_from(Program).join(Request, (Request.program_id == Program.id) & (Request.status != RequestStatus.WITHDRAWN),
                                    isouter=True).group_by(Program.code))
    counts = {c: (int(d), int(t), int(n)) for c, d, t, n in s.execute(q).all()}
    progs = list_programs(s) if code is None else [get_program(s, code)]
    out = []
    for p in progs:
        done, total, n = counts.get(p.code, (0, 0, 0))
        h = charged.get(p.code, 0.0)
        out.append({**program_dict(p), "hours_charged": round(h, 4),
                    "hours_remaining": round(p.hours_allocated - h, 4) if p.hours_allocated > 0 else None,
                    "executions_done": done, "executions": total, "requests": n,
                    "completion": round(completion(done, total), 4)})
    return out


def get_program(s: Session, code: str) -> Program:
    p = s.scalar(select(Program).where(Program.code == code))
    if p is None:
        raise NotFoundError(f"program {code!r} not found")
    return p


def list_programs(s: Session) -> list[Program]:
    return list(s.scalars(select(Program).order_by(Program.code)))


def program_codes(s: Session) -> set[str]:
    return set(s.scalars(select(Program.code)))


def program_weights(s: Session) -> dict[str, float]:
    return {p.code: p.weight for p in list_programs(s)}


# --------------------------------------------------------------------------- requests

def add_requests(s: Session, specs: Iterable[RequestSpec]) -> list[int]:
    """Insert validated requests; the caller's transaction makes a batch all or nothing."""
    programs = {p.code: p for p in list_programs(s)}
    rows = []
    for spec in specs:
        prog = programs.get(spec.program)
        if prog is None:
            raise InputError("program", f"unknown program {spec.program!r}")
        row = Request(program_id=prog.id, **{f: getattr(spec, f) for f in SPEC_FIELDS})
        row.ephemeris_csv = spec.ephemeris.to_csv() if spec.ephemeris is not None else None
        row.status = RequestStatus.QUEUED
        s.add(row)
        rows.append(row)
    s.flush()
    return [r.id for r in rows]


def _ephemeris(text: str, source: str):
    """A stored ephemeris table, parsed (sky.bodies, and numpy, load only when one exists)."""
    from scheduler.sky.bodies import parse_ephemeris_csv

    return parse_ephemeris_csv(text, source)


def to_spec(row: Request) -> RequestSpec:
    table = _ephemeris(row.ephemeris_csv, f"request {row.id} ephemeris") if row.ephemeris_csv else None
    return RequestSpec(program=row.program.code, id=row.id, ephemeris=table,
                       **{f: getattr(row, f) for f in SPEC_FIELDS})


def ephemeris_tables(s: Session, ids: Iterable[int]):
    """The ephemeris tables of those requests that have one, by request id (for the chart)."""
    ids = list(ids)
    if not ids:
        return {}
    q = select(Request.id, Request.ephemeris_csv).where(Request.id.in_(ids), Request.ephemeris_csv.is_not(None))
    return {rid: _ephemeris(text, f"request {rid} ephemeris") for rid, text in s.execute(q)}


def get_request(s: Session, request_id: int) -> Request:
    row = s.get(Request, request_id)
    if row is None:
        raise NotFoundError(f"request {request_id} not found")
    return row


def list_requests(s: Session, status: str | None = None, program: str | None = None) -> list[Request]:
    """Requests with their program loaded by the same query (a listing names every program)."""
    q = select(Request).join(Request.program).options(contains_eager(Request.program)).order_by(Request.id)
    if status:
        q = q.where(Request.status == status)
    if program:
        q = q.where(Program.code == program)
    return list(s.scalars(q))


def active_specs(s: Session) -> list[RequestSpec]:
    """Requests the planner may schedule, as RequestSpecs."""
    q = (select(Request).join(Request.program).options(contains_eager(Request.program))
         .where(Request.status.in_(ACTIVE_STATUSES)).order_by(Request.id))
    return [to_spec(r) for r in s.scalars(q)]


def withdraw_request(s: Session, request_id: int) -> Request:
    row = get_request(s, request_id)
    if row.status in CLOSED_STATUSES:
        raise InputError("id", f"request {request_id} is {row.status}; only queued, planned or failed requests can be withdrawn")
    row.status = RequestStatus.WITHDRAWN
    row.updated_at = utcnow()
    return row


def expire_requests(s: Session, now: datetime) -> list[int]:
    """Requests whose absolute window has passed leave the queue."""
    q = select(Request).where(Request.status.in_(ACTIVE_STATUSES), Request.not_after.is_not(None),
                              Request.not_after < now)
    rows = list(s.scalars(q))
    for r in rows:
        r.status = RequestStatus.EXPIRED
        r.updated_at = now
    return [r.id for r in rows]


# --------------------------------------------------------------------------- outcomes

def record_outcome(s: Session, request_id: int, result: str, exposure_s: float | None = None,
                   note: str | None = None, plan_entry_id: int | None = None, charge: str | None = None) -> Outcome:
    """done: one execution complete (the request leaves the queue when all repeats are done);
    partial: the exposure achieved is credited and the rest stays queued; failed: back to the queue.
    charge: none | program (default per result: model/charging.py); the hours are stored with it."""
    try:
        result = OutcomeResult(result)
    except ValueError:
        raise InputError("result", f"{result!r}; allowed {', '.join(OutcomeResult)}") from None
    row = get_request(s, request_id)
    if row.status in CLOSED_STATUSES:
        raise InputError("id", f"request {request_id} is {row.status}; outcomes are recorded for queued or planned requests")
    if exposure_s is not None and not (0 <= exposure_s <= row.exposure_s):
        raise InputError("exposure", f"{exposure_s} is out of range; allowed 0 to {row.exposure_s:g} seconds (the request's exposure)")
    if note is not None and len(note) > 2000:
        raise InputError("note", "at most 2000 characters")
    if result == OutcomeResult.DONE:
        row.completed_repeats += 1
        row.partial_exposure_s = 0.0
        row.status = RequestStatus.DONE if row.completed_repeats >= row.repeats else RequestStatus.QUEUED
    elif result == OutcomeResult.PARTIAL:
        got = exposure_s if exposure_s is not None else 0.0
        row.partial_exposure_s = min(row.partial_exposure_s + got, row.exposure_s)
        if row.partial_exposure_s >= row.exposure_s:
            row.completed_repeats += 1
            row.partial_exposure_s = 0.0
        row.status = RequestStatus.DONE if row.completed_repeats >= row.repeats else RequestStatus.QUEUED
    else:
        row.status = RequestStatus.QUEUED
    row.updated_at = utcnow()
    how = resolve_charge(result.value, charge)
    planned_s = None
    if plan_entry_id is not None:
        e = s.get(PlanEntry, plan_entry_id)
        if e is not None:
            planned_s = (e.end - e.start).total_seconds() + float(e.transition_s or 0.0)
    hours = charged_hours(result.value, how, planned_s=planned_s, request_exposure_s=row.exposure_s,
                          achieved_exposure_s=exposure_s)
    out = Outcome(request_id=request_id, result=result, exposure_s=exposure_s, note=note, plan_entry_id=plan_entry_id,
                  charge=how, charged_h=hours)
    s.add(out)
    s.flush()
    return out


# --------------------------------------------------------------------------- conditions

def store_conditions(s: Session, samples: list, source: str, issued_at: datetime | None = None) -> ConditionsReport:
    """One report with its samples (ingest.Sample-like objects)."""
    rep = ConditionsReport(issued_at=issued_at or utcnow(), source=source[:200], n_samples=len(samples))
    for smp in samples:
        rep.samples.append(ConditionsSample(
            time=smp.time, seeing_arcsec=smp.seeing_arcsec, pwv_mm=smp.pwv_mm, cloud_mag=smp.cloud_mag,
            wind_ms=smp.wind_ms, humidity_pct=smp.humidity_pct, dome_open=smp.dome_open,
            coherence_time_ms=smp.coherence_time_ms,
        ))
    s.add(rep)
    s.flush()
    return rep


def latest_conditions(s: Session) -> ConditionsReport | None:
    return s.scalar(select(ConditionsReport).order_by(ConditionsReport.id.desc()).limit(1))


def conditions_reports_for(s: Session, start: datetime, end: datetime) -> list[ConditionsReport]:
    """The reports that can speak for the span [start, end], with their samples: every report
    whose samples reach into it, and the one(s) that ended last before it (what a report said
    last, such as the dome state, holds after it; conditions/merge.py decides per time)."""
    spans = s.execute(select(ConditionsSample.report_id, func.min(ConditionsSample.time),
                             func.max(ConditionsSample.time))
                      .where(ConditionsSample.time <= end).group_by(ConditionsSample.report_id)).all()
    ids = {rid for rid, _first, last in spans if last >= start}
    ended = [last for _rid, _first, last in spans if last < start]
    if ended:
        ids |= {rid for rid, _first, last in spans if last == max(ended)}
    return conditions_reports(s, ids)


def sample_of(row: ConditionsSample) -> Sample:
    """A stored conditions sample as the pipeline takes it."""
    return Sample(time=row.time, seeing_arcsec=row.seeing_arcsec, pwv_mm=row.pwv_mm, cloud_mag=row.cloud_mag,
                  wind_ms=row.wind_ms, humidity_pct=row.humidity_pct, dome_open=row.dome_open,
                  coherence_time_ms=row.coherence_time_ms)


def report_samples(s: Session, report_id: int | None) -> list[Sample]:
    """The samples of one report (empty for None or a report that is gone: defaults were assumed)."""
    if report_id is None:
        return []
    rep = s.get(ConditionsReport, report_id)
    return [sample_of(x) for x in rep.samples] if rep is not None else []


def measured_samples(s: Session, start: datetime, end: datetime) -> list[Sample]:
    """Samples in [start, end] that were already in the past when their report was issued:
    measurements, as opposed to forecast values (the newest report wins for a time)."""
    rows = s.execute(select(ConditionsSample, ConditionsReport.id)
                     .join(ConditionsReport, ConditionsSample.report_id == ConditionsReport.id)
                     .where(ConditionsSample.time >= start, ConditionsSample.time <= end,
                            ConditionsSample.time <= ConditionsReport.issued_at)
                     .order_by(ConditionsSample.time, ConditionsReport.id)).all()
    by_time: dict = {}
    for smp, _rid in rows:
        by_time[smp.time] = sample_of(smp)
    return [by_time[t] for t in sorted(by_time)]


def conditions_reports(s: Session, ids) -> list[ConditionsReport]:
    """These reports with their samples (those that still exist), by id."""
    ids = list(ids)
    if not ids:
        return []
    return list(s.scalars(select(ConditionsReport).where(ConditionsReport.id.in_(ids))
                          .options(selectinload(ConditionsReport.samples)).order_by(ConditionsReport.id)))


# --------------------------------------------------------------------------- opportunities cache

def load_opportunities(s: Session, config_key: str, first: date, last: date) -> list[tuple[str, str, date, bool]]:
    """Cached verdicts (config key, request key, night, feasible) for nights first..last."""
    q = select(Opportunity.config_key, Opportunity.request_key, Opportunity.night, Opportunity.feasible).where(
        Opportunity.config_key == config_key, Opportunity.night >= first, Opportunity.night <= last)
    return [tuple(r) for r in s.execute(q).all()]


def save_opportunities(s: Session, rows: list[tuple[str, str, date, bool]], before: date) -> None:
    """Store new verdicts (a row another process stored meanwhile is left as it is) and drop
    those of nights before ``before``."""
    s.execute(delete(Opportunity).where(Opportunity.night < before))
    if not rows:
        return
    name = s.get_bind().dialect.name
    if name == "postgresql":
        from sqlalchemy.dialects.postgresql import insert
    else:
        from sqlalchemy.dialects.sqlite import insert
    values = [{"config_key": c, "request_key": r, "night": n, "feasible": bool(f)} for c, r, n, f in rows]
    for i in range(0, len(values), 5000):
        s.execute(insert(Opportunity).values(values[i:i + 5000]).on_conflict_do_nothing())
