"""The one re-plan action: rebuild the coming night from now, store it, and record the result on
the operator orders it serves.

Two callers, one behaviour: the service (``service/jobs.py``: operator orders, a plan that no
longer holds, the heartbeat) and `nightplan replan` when no service is alive (``cli/service.py``,
the inline path). Both go through :func:`replan` and, for orders, :func:`carry_out_orders`.

Time budget, one rule for every re-plan from now: the lower of ``planning.time_limit_s`` and
``planning.replan_time_limit_s`` (:func:`replan_time_limit`; 4 s with the starter
configuration). A re-plan answers a change in the sky or an operator waiting at the console, so
it is held to the short limit wherever it runs. `nightplan plan build` is a build, not a
re-plan: it takes ``planning.time_limit_s`` or its --time-limit. When the configuration sets
``planning.effort`` (a deterministic work budget), every re-plan does that much work instead
and reads no clock.
"""

from __future__ import annotations

from datetime import datetime
from typing import Callable

from scheduler.db import plans
from scheduler.db.models import ReplanOrder, utcnow
from scheduler.db.session import Database
from scheduler.model.config import ObservatoryConfig
from scheduler.model.timegrid import iso
from scheduler.planning.planner import BuiltPlan, Planner


def replan_time_limit(config: ObservatoryConfig) -> float | None:
    """Seconds a re-plan from now may take (the module docstring says why); None when
    planning.effort bounds every build instead of the clock."""
    p = config.planning
    return None if p.effort is not None else min(p.time_limit_s, p.replan_time_limit_s)


def replan(planner: Planner, db: Database, *, now: datetime, reason: str,
           time_limit_s: float | None = None) -> BuiltPlan:
    """Re-plan the night ``now`` belongs to (or the coming one) from ``now`` and store the result.

    Returns the BuiltPlan; its version is None when the checker refused the plan (nothing stored).
    ``time_limit_s`` overrides :func:`replan_time_limit` (the service's constructor takes one,
    for tests and rehearsals).
    """
    limit = replan_time_limit(planner.config) if time_limit_s is None else time_limit_s
    return planner.build_and_store(db, night_date=planner.coming_night(now), reason=reason, now=now,
                                   time_limit_s=limit)


def describe_built(built: BuiltPlan) -> str:
    """One line for an order's result and the event log: what was stored and how it was built."""
    r = built.result
    covered = float(built.conditions.covered.mean()) if built.conditions.covered.size else 0.0
    text = (f"plan version {built.version} for the night of {built.night.date} from {iso(built.planned_from)}: "
            f"{len(r.entries)} entries, solver {r.solver_status}, gap {100 * r.gap:.1f} %, "
            f"built in {sum(r.timings.values()):.1f} s")
    if covered == 0.0:
        text += "; no conditions report covers this night: the configuration's defaults were assumed"
    return text


def take_pending_orders(db: Database) -> list[tuple[int, str, str]]:
    """Mark every pending order taken (also those taken by a service that died) and return
    (id, reason, requested_by) of each, oldest first."""
    def take(s):
        orders = plans.pending_orders(s)
        now = utcnow()
        for o in orders:
            o.taken_at = now
        return [(o.id, o.reason, o.requested_by) for o in orders]

    return db.retrying(take)


def add_taken_order(db: Database, reason: str, requested_by: str) -> int:
    """An order carried out at once by the process that writes it (the inline `replan`); if that
    process dies mid-build, the next service finds the order taken but not done and serves it."""
    def add(s):
        o = plans.add_order(s, reason, requested_by)
        o.taken_at = utcnow()
        return o.id

    return db.retrying(add)


def orders_reason(orders: list[tuple[int, str, str]]) -> str:
    """The reason stored on the plan that serves these orders (one build serves them all)."""
    return orders[0][1] if len(orders) == 1 else "; ".join(o[1] for o in orders)


def carry_out_orders(db: Database, order_ids: list[int], build: Callable[[], BuiltPlan], *,
                     prefix: str = "") -> tuple[str, int | None]:
    """Run ``build`` once for these orders and record its result on each of them.

    Never raises for a failed build: the failure is the orders' result. Returns (result text,
    plan version or None). ``prefix`` marks how the orders were served ("inline: ").
    """
    version = None
    try:
        built = build()
        version = built.version
        result = prefix + describe_built(built) if version is not None else \
            f"failed: the plan checker refused the plan ({built.result.violations[0]})"
    except Exception as e:  # noqa: BLE001 - recorded on the orders; the caller reports it
        result = f"failed: {type(e).__name__}: {e}"

    def finish(s):
        for oid in order_ids:
            o = s.get(ReplanOrder, oid)
            if o is not None and o.done_at is None:
                plans.finish_order(o, result, version)

    db.retrying(finish)
    return result, version
