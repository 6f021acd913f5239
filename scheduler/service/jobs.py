"""The service's jobs: each reads the database, decides, and writes in its own transactions.

Jobs never raise: the daemon wraps them, logs one line per failure and keeps running. They
are run one at a time (a single worker), so two re-plans never race each other.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from datetime import date, datetime
from pathlib import Path

from sqlalchemy import func, select
from sqlalchemy.exc import SQLAlchemyError

from scheduler.conditions.files import FileChanged, SettleWatch, is_feed_candidate, take_feed_file
from scheduler.model.config import ObservatoryConfig
from scheduler.db import plans, store
from scheduler.db.models import ConditionsReport, Outcome, Plan, Request, utcnow
from scheduler.db.session import Database
from scheduler.model.errors import InputError
from scheduler.planning.planner import Planner, plan_report_ids, reports_for_night, stored_plan_reports
from scheduler.planning.replan import carry_out_orders, orders_reason, replan, take_pending_orders
from scheduler.model.request import ACTIVE_STATUSES
from scheduler.service.clock import Clock
from scheduler.service.log import EventLog
from scheduler.textfile import file_state
from scheduler.service.validity import Planned, conditions_changes, entry_failures, outranking_requests

DONE_DIR = "done"
REJECTED_DIR = "rejected"
RETRY_AFTER_FAILURE_S = 60.0  # after a failed automatic re-plan, wait before the next one
MAX_LISTED = 5  # outcomes or requests named in one reason


@dataclass
class FeedResult:
    stored: int = 0
    rejected: int = 0


class Jobs:
    def __init__(self, db: Database, config: ObservatoryConfig, planner: Planner, clock: Clock, log: EventLog,
                 watch: Path | None = None, time_limit_s: float | None = None):
        self.db = db
        self.config = config
        self.planner = planner
        self.clock = clock
        self.log = log
        self.watch = watch
        self.time_limit_s = time_limit_s
        self._checked_key: tuple | None = None
        self._unmovable: set[str] = set()
        self._auto_paused_until = 0.0
        self._settle = SettleWatch(config.service.feed_settle_s)  # feed files seen, until they settle
        self.failed_replans = 0  # re-plans that stored nothing (`serve --once` exits non-zero after one)

    # ------------------------------------------------------------------ helpers

    def target_night(self, now: datetime) -> date:
        return self.planner.coming_night(now)

    def replan(self, reason: str, *, trigger: str):
        """The re-plan action (planning/replan.py) with the service's event log around it.
        Returns the BuiltPlan (version None if refused)."""
        now = self.clock.now()
        night = self.target_night(now)
        t0 = time.monotonic()
        self.log.info("replan_start", trigger=trigger, night=night, now=now, reason=reason)
        built = replan(self.planner, self.db, now=now, reason=reason, time_limit_s=self.time_limit_s)
        secs = time.monotonic() - t0
        if built.version is None:
            self.log.error("plan_refused", trigger=trigger, night=night, seconds=secs,
                           violation=built.result.violations[0] if built.result.violations else "-")
        else:
            r = built.result
            with self.db.session() as s:
                diff = plans.plan_diff_of(s.get(Plan, built.version))
            self.log.info("plan_stored", version=built.version, trigger=trigger, night=night,
                          planned_from=built.planned_from, entries=len(r.entries), status=r.solver_status,
                          objective=r.objective, gap=r.gap, seconds=secs, added=len(diff.get("added", [])),
                          dropped=len(diff.get("dropped", [])), moved=len(diff.get("moved", [])), reason=reason)
            if built.conditions_warning:
                self.log.warning("forecast_coverage_low", version=built.version, night=night,
                                 share=round(built.forecast_share, 3),
                                 min_share=self.config.planning.min_forecast_share, warning=built.conditions_warning)
        self._checked_key = None  # look again at the new plan
        return built

    def _auto_replan(self, reason: str, trigger: str) -> None:
        """A re-plan the service decided on; a failure pauses automatic re-plans for a while."""
        try:
            built = self.replan(reason, trigger=trigger)
            ok = built.version is not None
        except Exception as e:  # noqa: BLE001 - logged, retried later
            self.log.error("replan_failed", trigger=trigger, error=f"{type(e).__name__}: {e}")
            ok = False
        if not ok:
            self.failed_replans += 1
            self._auto_paused_until = time.monotonic() + RETRY_AFTER_FAILURE_S

    # ------------------------------------------------------------------ conditions feed

    def ingest_folder(self) -> FeedResult:
        """Complete conditions files in the watched folder: stored, then moved to done/ or rejected/.

        A file is taken once it has settled (conditions/files.py: size and mtime unchanged for
        service.feed_settle_s); one still being written is left for a later poll, never stored
        truncated nor rejected half-read.
        """
        res = FeedResult()
        if self.watch is None:
            return res
        try:
            names = sorted(os.listdir(self.watch))
        except OSError as e:
            self.log.error("feed_unreadable", folder=self.watch, error=str(e))
            return res
        self._settle.keep_only(set(names))
        for name in names:
            p = self.watch / name
            if not is_feed_candidate(name) or not p.is_file() or name in self._unmovable:
                continue  # partial uploads (.part, dot files), other files and sub-folders are left alone
            state = file_state(p)
            if state is None or not self._settle.settled(name, state, time.monotonic(), time.time()):
                continue  # gone, or still changing (or seen for the first time)
            try:
                taken = take_feed_file(p, state)
                rep_id = self._store_report(taken.report, p)
            except FileChanged:
                self._settle.forget(name)
                self.log.info("feed_file_changing", file=name)
                continue
            except InputError as e:
                self._settle.forget(name)
                dest = self._move(p, REJECTED_DIR)
                if dest is None:
                    continue
                try:
                    dest.with_name(dest.name + ".error.txt").write_text(str(e) + "\n", encoding="utf-8")
                except OSError:
                    pass
                self.log.warning("feed_rejected", file=name, moved_to=dest, error=str(e))
                res.rejected += 1
                continue
            except SQLAlchemyError as e:  # not the file's fault: leave it for the next poll
                self.log.error("feed_store_failed", file=name, error=f"{type(e).__name__}: {str(e).splitlines()[0]}")
                break
            self._settle.forget(name)
            dest = self._move(p, DONE_DIR)  # None: stored, but left in place (logged; not read again)
            rep = taken.report
            self.log.info("conditions_stored", report=rep_id, samples=len(rep), source=rep.source or name,
                          file=name, bytes=taken.size, sha256=taken.sha256[:16], first=rep[0].time,
                          last=rep[-1].time, moved_to=dest)
            res.stored += 1
        return res

    def _store_report(self, report, p: Path) -> int:
        src = report.source or p.name
        return self.db.retrying(lambda s: store.store_conditions(s, list(report), src, report.issued).id)

    def _move(self, p: Path, sub: str) -> Path | None:
        """Move a processed file into done/ or rejected/. On failure (permissions, disk) the file
        is remembered and skipped until the service restarts, so it is neither re-read nor logged
        on every poll."""
        folder = self.watch / sub
        try:
            folder.mkdir(exist_ok=True)
            dest = folder / p.name
            if dest.exists():
                stamp = datetime.now().strftime("%Y%m%dT%H%M%S%f")
                dest = folder / f"{p.stem}.{stamp}{p.suffix}"
            os.replace(p, dest)
            return dest
        except OSError as e:
            self._unmovable.add(p.name)
            self.log.error("feed_move_failed", file=p.name, to=sub, error=str(e))
            return None

    # ------------------------------------------------------------------ operator orders

    def take_orders(self) -> int:
        """Pending re-plan orders (also those taken by a service that died): one build serves them all."""
        orders = take_pending_orders(self.db)
        if not orders:
            return 0
        ids = ",".join(str(o[0]) for o in orders)
        self.log.info("order_taken", orders=ids, requested_by=orders[0][2])
        result, version = carry_out_orders(self.db, [o[0] for o in orders],
                                           lambda: self.replan(orders_reason(orders), trigger="order"))
        (self.log.info if version is not None else self.log.error)("order_done", orders=ids, result=result)
        if version is None:
            self.failed_replans += 1
        return len(orders)

    # ------------------------------------------------------------------ validity

    def _change_key(self, s, plan_id: int | None) -> tuple:
        return (
            plan_id,
            s.scalar(select(func.max(ConditionsReport.id))),
            s.scalar(select(func.max(Outcome.id))),
            s.scalar(select(func.max(Request.updated_at))),
            s.scalar(select(func.count(Request.id))),
        )

    def check_validity(self) -> list[str] | None:
        """Re-plan if the active plan no longer holds. Returns the reasons found (None: not checked)."""
        if time.monotonic() < self._auto_paused_until:
            return None
        now = self.clock.now()
        night_date = self.target_night(now)
        night = self.planner.night(night_date)
        with self.db.session() as s:
            plan = plans.active_plan(s, night_date)
            if plan is None:
                reasons = [f"first plan for the night of {night_date}"]
                key = None
            else:
                key = self._change_key(s, plan.id)
                if key == self._checked_key:
                    return None
                reasons = self._assess(s, plan, night, now)
        if plan is not None and not reasons:
            self._checked_key = key
            self.log.info("plan_still_valid", version=plan.id, report=key[1], now=now)
            return []
        self._auto_replan("; ".join(reasons), "no_plan" if plan is None else "validity")
        return reasons

    def _assess(self, s, plan, night, now: datetime) -> list[str]:
        cfg, cache = self.config, self.planner.sky_cache
        reasons: list[str] = []
        entries = [Planned(e.request_id, e.start, e.end) for e in plan.entries if e.end > now]
        rows = {r.id: r for r in s.scalars(select(Request).where(Request.id.in_({e.request_id for e in entries})))}
        specs = {rid: store.to_spec(r) for rid, r in rows.items()}

        # the night's conditions as a build now would see them (merge.py: the newest report covering
        # each time), against those the plan was built on; a report for another night changes nothing
        cond = self.planner.night_conditions(night, reports_for_night(s, night))
        if cond.report_ids != plan_report_ids(plan):
            old = self.planner.night_conditions(night, stored_plan_reports(s, plan))
            changes = conditions_changes(cfg, night, old, cond, now)
            if changes:
                newest = s.get(ConditionsReport, cond.report_id) if cond.report_id is not None else None
                label = f"conditions report {newest.id} ({newest.source})" if newest is not None else "conditions"
                reasons.append(f"{label}: " + "; ".join(changes))
            reasons += entry_failures(cfg, night, cache, entries, specs, cond, now)

        outcomes = list(s.scalars(select(Outcome).where(Outcome.recorded_at > plan.created_at).order_by(Outcome.id)))
        told = set()
        if outcomes:
            text = ", ".join(f"request {o.request_id} {o.result}" for o in outcomes[:MAX_LISTED])
            more = f" and {len(outcomes) - MAX_LISTED} more" if len(outcomes) > MAX_LISTED else ""
            reasons.append(f"outcome recorded: {text}{more}")
            told = {o.request_id for o in outcomes}
        gone = sorted({(rid, r.status) for rid, r in rows.items()
                       if r.status not in ACTIVE_STATUSES and rid not in told})
        if gone:
            reasons.append("planned request left the queue: " + ", ".join(f"{rid} {st}" for rid, st in gone[:MAX_LISTED]))

        new_rows = s.scalars(select(Request).where(Request.created_at > plan.created_at,
                                                   Request.status.in_(ACTIVE_STATUSES)).order_by(Request.id))
        new_specs = [store.to_spec(r) for r in new_rows]
        if new_specs:
            remaining = [specs[e.request_id] for e in entries if e.start > now and e.request_id in specs
                         and rows[e.request_id].status in ACTIVE_STATUSES]
            found = outranking_requests(cfg, night, cache, new_specs, remaining, store.program_states(s), cond, now,
                                        opportunity_cache=self.planner.opportunity_cache)
            reasons += found[:MAX_LISTED]
        return reasons

    # ------------------------------------------------------------------ heartbeat and expiry

    def heartbeat(self) -> bool:
        """Re-plan when the night's active plan is older than planning.heartbeat_min."""
        if time.monotonic() < self._auto_paused_until:
            return False
        now = self.clock.now()
        with self.db.session() as s:
            plan = plans.active_plan(s, self.target_night(now))
            if plan is None:
                return False  # check_validity builds the first plan
            age_min = (utcnow() - plan.created_at).total_seconds() / 60.0
            version = plan.id
        if age_min < self.config.planning.heartbeat_min:
            return False
        self._auto_replan(f"heartbeat: plan version {version} is {age_min:.0f} min old", "heartbeat")
        return True

    def expire(self) -> list[int]:
        now = self.clock.now()
        ids = self.db.retrying(lambda s: store.expire_requests(s, now))
        if ids:
            self.log.info("requests_expired", ids=",".join(map(str, ids)), now=now)
        return ids
