"""The service's state as plain data: the `nightplan status --json` document (also `GET /api/status`).

Is a service alive (since when, pid, last heartbeat), the active plan, the newest conditions
report, pending re-plan orders and the last one done. Reads the database only.
"""

from __future__ import annotations

from typing import Any

from scheduler.db import plans, store
from scheduler.db.session import Database
from scheduler.model.timegrid import iso
from scheduler.service.lock import read_lock


def status_document(db: Database) -> dict[str, Any]:
    info = read_lock(db)
    if info is None:
        service = {"alive": False, "state": "stopped", "why": "no service holds this database"}
    else:
        why = info.stale_reason()
        service = {"alive": why is None, "state": "running" if why is None else "dead", **info.as_dict()}
        if why:
            service["why"] = why
    with db.session() as s:
        plan = plans.active_plan(s)
        plan_d = None if plan is None else {
            "version": plan.id, "night": plan.night.isoformat(), "reason": plan.reason,
            "created_at": iso(plan.created_at), "planned_from": iso(plan.planned_from),
            "solver_status": plan.solver_status, "entries": len(plan.entries),
            "conditions_report": plan.conditions_report_id,
            # share of the night the conditions reports covered when it was built, and the warning
            # (conditions/merge.py) when that was below planning.min_forecast_share
            "forecast_share": (plan.summary or {}).get("forecast_share"),
            "conditions_warning": (plan.summary or {}).get("conditions_warning"),
        }
        rep = store.latest_conditions(s)
        rep_d = None if rep is None else {
            "report": rep.id, "source": rep.source, "issued_at": iso(rep.issued_at),
            "received_at": iso(rep.received_at), "samples": rep.n_samples,
        }
        pending = [plans.order_dict(o) for o in plans.pending_orders(s)]
        last = plans.last_done_order(s)
        last_d = plans.order_dict(last) if last is not None else None
    return {"service": service, "plan": plan_d, "conditions": rep_d, "pending_orders": pending, "last_order": last_d}
