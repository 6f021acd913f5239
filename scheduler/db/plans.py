"""Plan versions in the database: store (one transaction), read back, diff, re-plan orders.

A plan is immutable once stored. Storing a new plan for a night supersedes the active one in
the same transaction, so readers always see exactly one complete active plan per night.
"""

from __future__ import annotations

import math
from datetime import date, datetime
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from scheduler.model import plan as contract
from scheduler.model.errors import InputError, NotFoundError
from scheduler.model.request import RequestSpec, RequestStatus
from scheduler.model.timegrid import iso
from scheduler.db.models import ConditionsReport, Outcome, Plan, PlanEntry, Program, ReplanOrder, Request, utcnow


def plan_diff(old: list[PlanEntry] | None, new: tuple[contract.PlanEntry, ...],
              moved_tolerance_s: float = 60.0) -> dict[str, list]:
    """added / dropped / moved between the previous active plan's entries and a new plan's.

    Executions are matched per request in time order (the k-th planned execution of a request
    in one plan against the k-th in the other).
    """
    def by_request(items, key_start):
        out: dict[int, list] = {}
        for it in sorted(items, key=key_start):
            out.setdefault(it.request_id, []).append(it)
        return out

    before = by_request(old or [], lambda e: e.start)
    after = by_request(new, lambda e: e.start)
    diff: dict[str, list] = {"added": [], "dropped": [], "moved": []}
    for rid in sorted(set(before) | set(after)):
        b, a = before.get(rid, []), after.get(rid, [])
        for k in range(max(len(a), len(b))):
            if k >= len(b):
                diff["added"].append({"request_id": rid, "start": iso(a[k].start)})
            elif k >= len(a):
                diff["dropped"].append({"request_id": rid, "start": iso(b[k].start)})
            elif abs((a[k].start - b[k].start).total_seconds()) > moved_tolerance_s:
                diff["moved"].append({"request_id": rid, "from": iso(b[k].start), "to": iso(a[k].start),
                                      "minutes": round((a[k].start - b[k].start).total_seconds() / 60.0, 1)})
    return diff


def active_plan(s: Session, night: date | None = None) -> Plan | None:
    """The active plan of a night (default: the newest active plan of any night)."""
    q = select(Plan).where(Plan.active.is_(True))
    if night is not None:
        q = q.where(Plan.night == night)
    return s.scalar(q.order_by(Plan.id.desc()).limit(1))


def active_plans(s: Session) -> list[Plan]:
    """The active plan of every night, newest night first, with their entries (one query more)."""
    q = (select(Plan).where(Plan.active.is_(True)).options(selectinload(Plan.entries))
         .order_by(Plan.night.desc(), Plan.id.desc()))
    return list(s.scalars(q))


def plan_listing(s: Session, night: date | None = None) -> list[dict[str, Any]]:
    """Stored plan versions, newest first, as `plan list --json` prints them. One query: the
    entries are counted by the database, not loaded plan by plan."""
    n_entries = (select(PlanEntry.plan_id, func.count(PlanEntry.id).label("n"))
                 .group_by(PlanEntry.plan_id).subquery())
    q = (select(Plan, func.coalesce(n_entries.c.n, 0))
         .outerjoin(n_entries, n_entries.c.plan_id == Plan.id).order_by(Plan.id.desc()))
    if night is not None:
        q = q.where(Plan.night == night)
    return [{"version": p.id, "night": p.night.isoformat(), "created_at": iso(p.created_at), "active": p.active,
             "reason": p.reason, "solver_status": p.solver_status, "objective": p.objective, "gap": p.gap,
             "entries": int(n), "previous_version": p.previous_id} for p, n in s.execute(q)]


def get_plan(s: Session, version: int | None = None) -> Plan:
    if version is None:
        plan = active_plan(s)
        if plan is None:
            raise NotFoundError("no plan yet; build one with `nightplan plan build`")
        return plan
    plan = s.get(Plan, version)
    if plan is None:
        raise NotFoundError(f"plan version {version} not found")
    return plan


def entries_as_planned(plan: Plan | None) -> list[contract.PlanEntry]:
    """A stored plan's entries in the contract's PlanEntry form (to seed or stabilise a re-plan)."""
    if plan is None:
        return []
    out = []
    for e in plan.entries:
        out.append(contract.PlanEntry(
            request_id=e.request_id, execution=e.execution, start=e.start, end=e.end,
            start_step=-1, end_step=-1, slew_s=e.slew_s, transition_s=e.transition_s, setup_s=e.setup_s,
            airmass_start=e.airmass_start, airmass_end=e.airmass_end, predicted_fwhm_arcsec=e.fwhm_arcsec,
            predicted_pwv_mm=e.pwv_mm, transmission=e.transmission, merit=e.merit,
            moon_sep_deg=e.moon_sep_deg if e.moon_sep_deg is not None else float("nan"), value=e.value,
            tier=e.tier, urgency=e.urgency, opportunities_left=e.opportunities_left, balance=e.balance,
            fixed=e.fixed, ra_deg=e.ra_deg, dec_deg=e.dec_deg, strehl=e.strehl,
            surface_efficiency=e.surface_efficiency,
        ))
    return out


def entries_without_outcome(s: Session, plan: Plan | None) -> list[contract.PlanEntry]:
    """``entries_as_planned`` less the entries an outcome was recorded for: an outcome ends its
    entry (the observation finished, stopped or failed), so a re-plan neither holds it as in
    progress nor counts it among the executions still owed."""
    if plan is None:
        return []
    ids = [e.id for e in plan.entries]
    ended = set(s.scalars(select(Outcome.plan_entry_id).where(Outcome.plan_entry_id.in_(ids)))) if ids else set()
    return [c for c, e in zip(entries_as_planned(plan), plan.entries) if e.id not in ended]


def store_plan(s: Session, result: contract.PlanResult, *, night: date, reason: str, planned_from: datetime,
               specs: dict[int, RequestSpec], conditions_report_id: int | None,
               extra_summary: dict[str, Any] | None = None) -> Plan:
    """Write a checked plan as a new active version and supersede the night's previous one."""
    if result.violations:
        raise ValueError(f"refusing to store a plan that fails the checker: {result.violations[0]}")
    previous = active_plan(s, night)
    # what is already over when re-planning from now is not "dropped": compare what is still to come
    still_to_come = [e for e in previous.entries if e.end > planned_from] if previous else None
    diff = plan_diff(still_to_come, result.entries)
    now = utcnow()
    if previous is not None:
        previous.active = False
        previous.superseded_at = now
    summary = {
        "unscheduled": [{"request_id": rid, "reason": why} for rid, why in result.unscheduled],
        "timings": result.timings,
        "used_greedy": result.used_greedy,
        "stability_bonus": result.stability_bonus,
        "science_value": result.science_value,
        "message": result.message,
        "stats": result.stats,
    }
    summary.update(extra_summary or {})
    plan = Plan(
        night=night, reason=reason[:2000] or "-", planned_from=planned_from,
        conditions_report_id=conditions_report_id, solver_status=result.solver_status,
        objective=float(result.objective), bound=float(result.bound), gap=float(result.gap),
        runtime_s=float(result.runtime_s), greedy_objective=float(result.greedy_objective),
        active=True, previous_id=previous.id if previous else None,
        summary=_plain(summary), diff=_plain(diff),
    )
    for e in result.entries:
        spec = specs.get(e.request_id)
        exposure = (spec.next_exposure_s if e.execution == 0 else spec.exposure_s) if spec else \
            max((e.end - e.start).total_seconds() - e.setup_s, 0.0)
        plan.entries.append(PlanEntry(
            request_id=e.request_id, execution=e.execution, start=e.start, end=e.end, slew_s=float(e.slew_s),
            transition_s=float(e.transition_s), setup_s=float(e.setup_s), exposure_s=float(exposure),
            airmass_start=float(e.airmass_start), airmass_end=float(e.airmass_end),
            fwhm_arcsec=float(e.predicted_fwhm_arcsec), pwv_mm=float(e.predicted_pwv_mm),
            transmission=float(e.transmission), merit=float(e.merit),
            moon_sep_deg=_finite_or_none(e.moon_sep_deg), value=float(e.value), fixed=bool(e.fixed),
            tier=int(e.tier), urgency=float(e.urgency), balance=float(e.balance),
            opportunities_left=None if e.opportunities_left is None else int(e.opportunities_left),
            ra_deg=_finite_or_none(e.ra_deg), dec_deg=_finite_or_none(e.dec_deg), strehl=_finite_or_none(e.strehl),
            surface_efficiency=_finite_or_none(e.surface_efficiency),
        ))
    s.add(plan)
    s.flush()
    _mark_planned(s, {e.request_id for e in result.entries})
    return plan


def _mark_planned(s: Session, planned_ids: set[int]) -> None:
    """queued <-> planned follows the active plan; done/withdrawn/expired are left alone."""
    rows = s.scalars(select(Request).where(Request.status.in_((RequestStatus.QUEUED, RequestStatus.PLANNED))))
    for r in rows:
        want = RequestStatus.PLANNED if r.id in planned_ids else RequestStatus.QUEUED
        if r.status != want:
            r.status = want


def _finite_or_none(x: float | None) -> float | None:
    if x is None:
        return None
    x = float(x)
    return x if x == x and abs(x) != float("inf") else None


def _plain(o: Any) -> Any:
    """A value a JSON column stores on any database: numpy scalars as numbers, times as ISO
    text, tuples as lists, NaN and infinities as null (PostgreSQL's JSON refuses them)."""
    if isinstance(o, dict):
        return {str(k): _plain(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_plain(v) for v in o]
    if hasattr(o, "tolist"):  # numpy scalar or array
        return _plain(o.tolist())
    if o is None or isinstance(o, (bool, int, str)):
        return o
    if isinstance(o, float):
        return o if math.isfinite(o) else None
    if isinstance(o, (datetime, date)):
        return o.isoformat()
    return str(o)


def plan_summary(plan: Plan) -> dict[str, Any]:
    return plan.summary or {}


def plan_diff_of(plan: Plan) -> dict[str, Any]:
    return plan.diff or {}


def stored_plan(s: Session, plan: Plan) -> contract.StoredPlan:
    """A stored plan version with the requests and the conditions report its reports name, as
    plain data (three queries whatever the plan's size: the entries, the requests with their
    programs, the report)."""
    summary = plan_summary(plan)
    entries = tuple(contract.StoredEntry(
        request_id=e.request_id, execution=e.execution, start=e.start, end=e.end, slew_s=e.slew_s,
        transition_s=e.transition_s, setup_s=e.setup_s, exposure_s=e.exposure_s, airmass_start=e.airmass_start,
        airmass_end=e.airmass_end, fwhm_arcsec=e.fwhm_arcsec, pwv_mm=e.pwv_mm, transmission=e.transmission,
        tier=e.tier, urgency=e.urgency, opportunities_left=e.opportunities_left, balance=e.balance,
        merit=e.merit, moon_sep_deg=e.moon_sep_deg, value=e.value, fixed=e.fixed,
        ra_deg=e.ra_deg, dec_deg=e.dec_deg, strehl=e.strehl, surface_efficiency=e.surface_efficiency,
    ) for e in sorted(plan.entries, key=lambda x: x.start))
    ids = {e.request_id for e in entries} | {int(u["request_id"]) for u in summary.get("unscheduled", [])}
    requests: dict[int, contract.RequestLabel] = {}
    if ids:
        q = (select(Request.id, Program.code, Request.target, Request.ra_deg, Request.dec_deg, Request.band,
                    Request.instrument, Request.body).join(Request.program).where(Request.id.in_(ids)))
        for rid, code, target, ra, dec, band, instrument, body in s.execute(q):
            requests[rid] = contract.RequestLabel(id=rid, program=code, target=target, ra_deg=ra, dec_deg=dec,
                                                  band=band, instrument=instrument, body=body)
    report = s.get(ConditionsReport, plan.conditions_report_id) if plan.conditions_report_id else None
    conditions = (contract.ConditionsLabel(id=report.id, source=report.source, issued_at=report.issued_at)
                  if report is not None else None)
    return contract.StoredPlan(
        version=plan.id, night=plan.night, created_at=plan.created_at, reason=plan.reason,
        planned_from=plan.planned_from, solver_status=plan.solver_status, objective=plan.objective,
        bound=plan.bound, gap=plan.gap, runtime_s=plan.runtime_s, greedy_objective=plan.greedy_objective,
        active=plan.active, superseded_at=plan.superseded_at, previous_version=plan.previous_id,
        summary=summary, diff=plan_diff_of(plan), entries=entries, requests=requests,
        conditions_report_id=plan.conditions_report_id, conditions=conditions,
    )


# --------------------------------------------------------------------------- re-plan orders

def add_order(s: Session, reason: str, requested_by: str) -> ReplanOrder:
    reason = (reason or "").strip()
    if not reason or len(reason) > 2000:
        raise InputError("reason", "must be 1 to 2000 characters")
    order = ReplanOrder(reason=reason, requested_by=requested_by[:200])
    s.add(order)
    s.flush()
    return order


def pending_orders(s: Session) -> list[ReplanOrder]:
    return list(s.scalars(select(ReplanOrder).where(ReplanOrder.done_at.is_(None)).order_by(ReplanOrder.id)))


def last_done_order(s: Session) -> ReplanOrder | None:
    return s.scalar(select(ReplanOrder).where(ReplanOrder.done_at.is_not(None))
                    .order_by(ReplanOrder.done_at.desc()).limit(1))


def finish_order(order: ReplanOrder, result: str, plan_id: int | None) -> None:
    order.done_at = utcnow()
    order.result = result[:2000]
    order.plan_id = plan_id
