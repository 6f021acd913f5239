"""The edge between storage and the pure pipeline: read the queue, build, check, store.

Used by `nightplan plan build`, `nightplan replan` (inline), the service and the demo. Keeps a
SkyCache and the computed nights, so a long-lived process (the service) never recomputes the
sky for a target it has seen; only the conditions-dependent layers are redone on a re-plan.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import date, datetime, timedelta, timezone
from typing import Callable

from scheduler.conditions.grid import ConditionsGrid, conditions_on_grid
from scheduler.conditions.ingest import Sample
from scheduler.conditions.merge import Report, conditions_from_reports, coverage_warning, forecast_share
from scheduler.model.config import ObservatoryConfig, site_dict, telescope_dict
from scheduler.db import plans, store
from scheduler.db.session import Database
from scheduler.model.request import OutcomeResult, RequestSpec
from scheduler.model.timegrid import as_utc
from scheduler.sky.ephemeris import SkyCache, sky_for
from scheduler.sky.night import Night, night_date_for, night_for
from scheduler.model.plan import PlanEntry, PlanResult


@dataclass(frozen=True)
class PlanInputs:
    """A consistent snapshot of what a plan is built from (read in one transaction)."""

    specs: list[RequestSpec]
    weights: dict  # program code -> ProgramState (tier, weight, allocated and charged hours)
    reports: tuple[Report, ...]  # the conditions reports that can speak for the night (merge.py picks per time)
    previous: list[PlanEntry]
    previous_version: int | None


@dataclass(frozen=True)
class BuiltPlan:
    version: int | None  # None when nothing was stored
    result: PlanResult
    night: Night
    planned_from: datetime
    conditions: ConditionsGrid
    forecast_share: float = 0.0  # share of the night (from planned_from) inside some report's span
    conditions_warning: str | None = None  # merge.coverage_warning: below planning.min_forecast_share


def report_of(row) -> Report:
    """A stored conditions report as conditions/merge.py takes it."""
    return Report(row.id, as_utc(row.issued_at), tuple(store.sample_of(x) for x in row.samples))


def reports_for_night(s, night: Night) -> tuple[Report, ...]:
    """The stored reports that can speak for the night (in an open session)."""
    return tuple(report_of(r) for r in store.conditions_reports_for(s, night.start, night.end))


def plan_report_ids(plan) -> tuple[int, ...]:
    """The conditions reports a stored plan was built on, newest first (before the summary
    listed them, a plan named only its one report)."""
    ids = (plan.summary or {}).get("conditions_report_ids")
    if ids is None:
        return (plan.conditions_report_id,) if plan.conditions_report_id is not None else ()
    return tuple(int(i) for i in ids)


def stored_plan_reports(s, plan) -> tuple[Report, ...]:
    """The reports a stored plan was built on (in an open session); merged they give its conditions."""
    return tuple(report_of(r) for r in store.conditions_reports(s, plan_report_ids(plan)))


class Planner:
    def __init__(self, config: ObservatoryConfig, sky_cache: SkyCache | None = None):
        self.config = config
        self.sky_cache = sky_cache or SkyCache()
        from scheduler.constraints.opportunities import OpportunityCache

        self.opportunity_cache = OpportunityCache()  # per request and night, for this process
        self._opportunities_loaded: date | None = None  # the night whose stored verdicts were read

    # ---------------------------------------------------------------- pure-ish helpers

    def night(self, night_date: date) -> Night:
        return night_for(self.config.site, night_date, self.config.planning.step_s)

    def night_date(self, when: datetime | None = None) -> date:
        return night_date_for(self.config.site, when or datetime.now(timezone.utc))

    def coming_night(self, now: datetime) -> date:
        """The night ``now`` belongs to; once that night is over (after sunrise), the coming one."""
        d = self.night_date(now)
        if now >= self.night(d).end:
            d += timedelta(days=1)
        return d

    def conditions(self, night: Night, samples: list[Sample], report_id: int | None) -> ConditionsGrid:
        """One report's samples on the night's grid."""
        return conditions_on_grid(samples, night.times_unix, self.config.defaults, report_id)

    def night_conditions(self, night: Night, reports: tuple[Report, ...]) -> ConditionsGrid:
        """Several reports on the night's grid: for each time the newest report covering it."""
        return conditions_from_reports(reports, night.times_unix, self.config.defaults)

    def coverage(self, night: Night, reports: tuple[Report, ...], planned_from: datetime) -> tuple[float, str | None]:
        """(share of the night still to plan that some report covers, the warning when that is
        below planning.min_forecast_share)."""
        k = night.step_of(planned_from)
        if k >= night.n_times:  # past the grid's last step: nothing is left to cover
            return 1.0, None
        share = forecast_share(reports, night.times_unix[k:])
        label = str(night.date) if k == 0 else f"{night.date} from {planned_from.strftime('%H:%M')} UTC"
        return share, coverage_warning(share, self.config.planning.min_forecast_share, label)

    # ---------------------------------------------------------------- storage edges

    def read_inputs(self, db: Database, night_date: date) -> PlanInputs:
        night = self.night(night_date)
        with db.session() as s:
            specs = store.active_specs(s)
            weights = store.program_states(s)
            reports = reports_for_night(s, night)
            prev = plans.active_plan(s, night_date)
            previous = plans.entries_without_outcome(s, prev)
            return PlanInputs(specs, weights, reports, previous, prev.id if prev else None)

    def opportunities(self, db: Database | None, night_date: date, specs: list[RequestSpec],
                      progress: Callable[[str], None] | None = None) -> dict[int, int]:
        """Each request's opportunities after tonight (constraints/opportunities.py), from the
        planner's cache: only new or changed requests and a new night are computed. With a
        database the cache is also kept in its ``opportunity`` table, so a command-line build
        reuses what an earlier one (or the service) computed."""
        from scheduler.constraints.opportunities import config_key, count_opportunities

        cache = self.opportunity_cache
        last = night_date + timedelta(days=self.config.planning.lookahead_nights - 1)
        if db is not None and self._opportunities_loaded != night_date:
            with db.session() as s:
                cache.load(store.load_opportunities(s, config_key(self.config), night_date, last))
            cache.forget_before(night_date)
            self._opportunities_loaded = night_date
        opp = count_opportunities(self.config, specs, night_date, cache=cache, progress=progress)
        new = cache.take_new()
        if db is not None and new:
            db.retrying(lambda s: store.save_opportunities(s, new, before=night_date))
        return {int(sp.id): int(n) for sp, n in zip(specs, opp.future()) if sp.id is not None}

    def build(self, inputs: PlanInputs, night: Night, *, now: datetime | None = None,
              time_limit_s: float | None = None, progress: Callable[[str], None] | None = None,
              use_previous: bool = True, opportunities: dict[int, int] | None = None,
              started: float | None = None, effort: int | None = None,
              seed: int | None = None) -> tuple[PlanResult, ConditionsGrid]:
        """Build a plan for ``night``; ``time_limit_s``, ``effort`` and ``seed`` as BuildOptions
        takes them (None: from the configuration)."""
        from scheduler.planning.pipeline import BuildOptions, build_plan

        cond = self.night_conditions(night, inputs.reports)
        result = build_plan(
            self.config, inputs.specs, inputs.weights, night, cond, sky=self.sky_cache,
            options=BuildOptions(now=now, previous_entries=inputs.previous if (use_previous and inputs.previous) else None,
                                 time_limit_s=time_limit_s, effort=effort, seed=seed,
                                 progress=progress, opportunities=opportunities,
                                 opportunity_cache=self.opportunity_cache, started=started),
        )
        return result, cond

    def build_and_store(self, db: Database, *, night_date: date | None = None, reason: str,
                        now: datetime | None = None, time_limit_s: float | None = None,
                        progress: Callable[[str], None] | None = None, started: float | None = None,
                        effort: int | None = None, seed: int | None = None) -> BuiltPlan:
        """Build from the current queue and conditions and store a new active plan version.

        ``now`` inside the night makes this a re-plan from now (the entry in progress is kept,
        nothing new starts before now); otherwise the plan covers the whole night.
        ``started``: the time.perf_counter() value the time limit counts from (default: this
        call), so the limit bounds reading the queue, the build and storing the plan.
        """
        started = time.perf_counter() if started is None else started
        night_date = night_date or self.night_date(now)
        night = self.night(night_date)
        inputs = self.read_inputs(db, night_date)
        in_night = now is not None and night.start <= now < night.end
        opportunities = self.opportunities(db, night_date, inputs.specs, progress)
        result, cond = self.build(inputs, night, now=now if in_night else None,
                                  time_limit_s=time_limit_s, progress=progress, opportunities=opportunities,
                                  started=started, effort=effort, seed=seed)
        planned_from = now if in_night else night.start
        share, warning = self.coverage(night, inputs.reports, planned_from)
        if result.violations:  # the checker refused it: never stored
            return BuiltPlan(None, result, night, planned_from, cond, share, warning)
        spec_by_id = {sp.id: sp for sp in inputs.specs}

        def write(s):
            return plans.store_plan(
                s, result, night=night_date, reason=reason, planned_from=planned_from, specs=spec_by_id,
                conditions_report_id=cond.report_id,
                extra_summary={"conditions_covered_fraction": float(cond.covered.mean()) if cond.covered.size else 0.0,
                               "conditions_report_ids": list(cond.report_ids), "forecast_share": share,
                               "conditions_warning": warning, "queue_size": len(inputs.specs),
                               "site": site_dict(self.config), "telescope": telescope_dict(self.config)},
            ).id

        version = db.retrying(write)
        return BuiltPlan(version, result, night, planned_from, cond, share, warning)


def verify_stored_plan(db: Database, config: ObservatoryConfig, version: int | None = None,
                       planner: Planner | None = None) -> tuple[int, list[str]]:
    """Re-run the independent checker on a stored plan, against every conditions report it used
    (merged again as when it was built).

    Returns (version, violations). Used by `nightplan plan check` and the crash-safety tests.
    Requests are checked as they were when the plan was made (later outcomes are undone).
    """
    from scheduler.planning.pipeline import entries_on_grid
    from scheduler.solve.checker import check_plan

    planner = planner or Planner(config)
    with db.session() as s:
        plan = plans.get_plan(s, version)
        version = plan.id
        stored = plans.entries_as_planned(plan)
        ids = {e.request_id for e in stored}
        specs = {r.id: store.to_spec(r) for r in store.list_requests(s) if r.id in ids}
        # Outcomes recorded after the plan was made are undone, so a plan is checked against the
        # queue it was built from (a request observed since is not a violation).
        from scheduler.db.models import Outcome
        from sqlalchemy import select

        since = s.scalars(select(Outcome).where(Outcome.request_id.in_(ids), Outcome.recorded_at > plan.created_at))
        for o in since:
            sp = specs[o.request_id]
            if o.result == OutcomeResult.DONE:
                specs[o.request_id] = sp.with_(completed_repeats=max(sp.completed_repeats - 1, 0), partial_exposure_s=0.0)
            elif o.result == OutcomeResult.PARTIAL and o.exposure_s:
                specs[o.request_id] = sp.with_(partial_exposure_s=max(sp.partial_exposure_s - o.exposure_s, 0.0))
        reports = stored_plan_reports(s, plan)
        night_date, planned_from = plan.night, plan.planned_from
    night = planner.night(night_date)
    entries = entries_on_grid(stored, night)
    if len(entries) != len(stored):
        return version, [f"{len(stored) - len(entries)} entries fall outside the night of {night_date}"]
    spec_list = list(specs.values())
    sky, rows = sky_for(config.site, night, spec_list, planner.sky_cache)
    row_by_id = {sp.id: int(r) for sp, r in zip(spec_list, rows)}
    cond = planner.night_conditions(night, reports)
    now_step = night.step_of(planned_from)
    return version, check_plan(entries, specs, row_by_id, sky, cond, config, now_step=now_step)
