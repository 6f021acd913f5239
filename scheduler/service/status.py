"""The service's state as plain data: the `nightplan status --json` document (also `GET /api/status`).

Is a service alive (since when, pid, last heartbeat), the active plan, the newest conditions
report, pending re-plan orders and the last one done. ``status_of`` builds the document from
the rows, whoever read them: ``status_document`` reads them through SQLAlchemy (any database;
the web page), ``db/sqlite_direct.py`` straight from a SQLite file (the command, which must
answer without loading SQLAlchemy). This module imports no database library.
"""

from __future__ import annotations

from typing import Any

from scheduler.db.documents import order_dict
from scheduler.model.timegrid import iso
from scheduler.service.holder import LockInfo


def status_of(lock, plan, plan_entries: int, report, pending: list, last) -> dict[str, Any]:
    """The document from the rows: the service lock row, the newest active plan and its number
    of entries, the newest conditions report, the pending re-plan orders and the last one done
    (None where there is no such row)."""
    if lock is None:
        service = {"alive": False, "state": "stopped", "why": "no service holds this database"}
    else:
        info = LockInfo.of(lock)
        why = info.stale_reason()
        service = {"alive": why is None, "state": "running" if why is None else "dead", **info.as_dict()}
        if why:
            service["why"] = why
    plan_d = None if plan is None else {
        "version": plan.id, "night": plan.night.isoformat(), "reason": plan.reason,
        "created_at": iso(plan.created_at), "planned_from": iso(plan.planned_from),
        "solver_status": plan.solver_status, "entries": plan_entries,
        "conditions_report": plan.conditions_report_id,
        # share of the night the conditions reports covered when it was built, and the warning
        # (conditions/merge.py) when that was below planning.min_forecast_share
        "forecast_share": (plan.summary or {}).get("forecast_share"),
        "conditions_warning": (plan.summary or {}).get("conditions_warning"),
    }
    rep_d = None if report is None else {
        "report": report.id, "source": report.source, "issued_at": iso(report.issued_at),
        "received_at": iso(report.received_at), "samples": report.n_samples,
    }
    return {"service": service, "plan": plan_d, "conditions": rep_d,
            "pending_orders": [order_dict(o) for o in pending],
            "last_order": order_dict(last) if last is not None else None}


def status_document(db) -> dict[str, Any]:
    """The document of a database opened with SQLAlchemy (db/session.Database)."""
    from scheduler.db import plans, store
    from scheduler.db.models import ServiceLock
    from scheduler.service.holder import LOCK_NAME

    with db.session() as s:
        plan = plans.active_plan(s)
        return status_of(s.get(ServiceLock, LOCK_NAME), plan, 0 if plan is None else len(plan.entries),
                         store.latest_conditions(s), plans.pending_orders(s), plans.last_done_order(s))
