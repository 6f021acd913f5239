"""One realization of the season, night by night: plan from the forecast, meet the weather.

Pure apart from a SkyCache (memory): the queue arrives as plain data (``SeasonSetup``), every
plan comes from the real pipeline (``build_plan`` under a deterministic effort), and the
service's re-plan rule is the service's own (``conditions_changes``, ``entry_failures``). No
database, no files, no clock: the same setup, realization and nights give the same outcome
in any process.

A night (docs/season.md, "The simulated night"):

1. Requests past ``not_after`` at sunset expire.
2. The weather model draws the night: the weather that comes (on the plan grid) and the
   forecast the planner would have had. The first plan is built at sunset from the forecast.
3. Every ``MONITOR_STEP_S`` the site reports: measured conditions up to now, the conditions
   of now held for ``NOWCAST_HOLD_S``, the forecast after that (the dome's last measured
   state holds: an operator's fact, not a forecast). The
   service's rule decides: a material conditions change or a planned entry no longer
   feasible, or an outcome other than the plan expected (a failure), re-plans from now with
   the plan in force as the previous plan.
4. An entry starts when its time comes and runs against the weather that came: it is
   ``done`` if its request's constraints hold at every step it covers, else ``failed`` at the
   first step they do not (the observer aborts); an entry in progress that a re-plan does not
   keep is interrupted (``failed``). Outcomes are recorded when the entry ends or aborts,
   as the observer would, and charge hours by the recording rule.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from datetime import date, datetime
from typing import Mapping, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid, conditions_on_grid
from scheduler.conditions.ingest import Sample
from scheduler.model.config import ObservatoryConfig
from scheduler.model.charging import charged_hours
from scheduler.model.plan import PlanEntry, PlanResult
from scheduler.model.program import ProgramState
from scheduler.model.request import ACTIVE_STATUSES, OutcomeResult, RequestSpec, RequestStatus
from scheduler.model.timegrid import utc
from scheduler.planning.pipeline import BuildOptions, build_plan
from scheduler.season.simulate import NightOutcome, ProgramInfo, RealizationOutcome, RequestInfo
from scheduler.season.weather import (
    DEFAULT_MODEL, Climatology, NightDraw, SeasonDraw, WeatherModel, draw_night, draw_season, realization_seed,
)
from scheduler.service.validity import Planned, conditions_changes, entry_failures, feasibility_for
from scheduler.sky.ephemeris import SkyCache, sky_for
from scheduler.sky.night import ASTRONOMICAL_ALT_DEG, Night, night_for

MONITOR_STEP_S = 1800.0  # the site reports its conditions every half hour (as often as the forecast samples)
NOWCAST_HOLD_S = 3600.0  # a report holds the conditions measured now for an hour (about the seeing's correlation time)


@dataclass(frozen=True)
class SeasonSetup:
    """Everything a realization needs, as plain data (read once from the database)."""

    config: ObservatoryConfig
    climatology: Climatology
    specs: tuple[RequestSpec, ...]  # the active queue at the season's start, in id order
    programs: tuple[ProgramState, ...]  # as the database had them at the season's start (hours charged so far)
    dates: tuple[date, ...]  # the season's nights, consecutive local evening dates
    seed: int
    effort: int
    model: WeatherModel = DEFAULT_MODEL

    def request_infos(self) -> list[RequestInfo]:
        return [RequestInfo(int(s.id), s.program, s.remaining_repeats, s.exposure_s / 3600.0) for s in self.specs]

    def program_infos(self) -> list[ProgramInfo]:
        return [ProgramInfo(p.code, int(p.tier), p.hours_allocated) for p in self.programs]

    def planner_programs(self, charged_in_season: Mapping[str, float]) -> dict[str, ProgramState]:
        """The programs as ``build_plan`` reads them, as a build from the database would see them
        at that point of the season: the hours charged so far include the season's."""
        return {p.code: replace(p, hours_charged=p.hours_charged + charged_in_season.get(p.code, 0.0))
                for p in self.programs}


@dataclass(frozen=True)
class RealizationState:
    """A realization between blocks of nights: its copy of the queue and its nights so far."""

    realization: int
    specs: tuple[RequestSpec, ...]
    nights: tuple[NightOutcome, ...] = ()

    def outcome(self) -> RealizationOutcome:
        return RealizationOutcome(self.realization, self.nights)


def initial_state(setup: SeasonSetup, realization: int) -> RealizationState:
    return RealizationState(realization, tuple(setup.specs))


def build_seed(seed: int, realization: int, night: date, replan: int) -> int:
    """The randomized searches' seed for one build: from the master seed, never from the clock."""
    seq = np.random.SeedSequence(seed, spawn_key=(realization, 3, night.toordinal(), replan))
    return int(seq.generate_state(1, dtype=np.uint32)[0] & 0x7FFFFFFF)


def replan_effort(effort: int, config: ObservatoryConfig) -> int:
    """A re-plan's budget: the service gives re-plans the smaller of its two time limits, so a
    re-plan here gets that share of the night's first build (at least 1)."""
    p = config.planning
    share = min(p.time_limit_s, p.replan_time_limit_s) / p.time_limit_s
    return max(1, int(round(effort * share)))


def season_draw(setup: SeasonSetup, realization: int) -> SeasonDraw:
    return draw_season(setup.climatology, setup.dates, realization_seed(setup.seed, realization), setup.model)


def simulate_nights(setup: SeasonSetup, state: RealizationState, indices: Sequence[int],
                    sky_cache: SkyCache) -> RealizationState:
    """Run the nights ``setup.dates[i]`` for i in ``indices`` (consecutive, in order) of one realization."""
    draw = season_draw(setup, state.realization)
    specs, nights = state.specs, list(state.nights)
    charged: dict[str, float] = {}
    for n in nights:
        for code, h in sorted(n.charged_h.items()):
            charged[code] = charged.get(code, 0.0) + h
    for i in indices:
        if len(nights) != i:
            raise ValueError(f"realization {state.realization}: night {i} follows {len(nights)} nights done")
        specs, outcome = simulate_night(setup, state.realization, draw, i, specs, sky_cache, charged)
        nights.append(outcome)
        for code, h in sorted(outcome.charged_h.items()):
            charged[code] = charged.get(code, 0.0) + h
    return RealizationState(state.realization, specs, tuple(nights))


# --------------------------------------------------------------------------- outcomes on the queue copy

def expire(specs: Sequence[RequestSpec], now: datetime) -> tuple[RequestSpec, ...]:
    """Active requests whose absolute window has passed leave the queue (as ``store.expire_requests``)."""
    return tuple(s.with_(status=RequestStatus.EXPIRED) if s.status in ACTIVE_STATUSES and s.not_after is not None
                 and s.not_after < now else s for s in specs)


def apply_outcome(spec: RequestSpec, result: str) -> RequestSpec:
    """The queue's response to one recorded outcome (as ``store.record_outcome``): done counts
    an execution and leaves the queue when all are done; failed goes back to the queue."""
    if result == OutcomeResult.DONE:
        n = spec.completed_repeats + 1
        return spec.with_(completed_repeats=n, partial_exposure_s=0.0,
                          status=RequestStatus.DONE if n >= spec.repeats else RequestStatus.QUEUED)
    if result == OutcomeResult.FAILED:
        return spec.with_(status=RequestStatus.QUEUED)
    raise ValueError(f"unknown result {result!r}")


def charged_h(result: str, entry: PlanEntry, spec: RequestSpec) -> float:
    """Hours an outcome recorded against a plan entry charges (model/charging.py, the recording
    rule with its default charge: done is charged the entry's time as planned plus the
    transition into it; failed is the telescope's or the weather's, not charged)."""
    planned_s = (entry.end - entry.start).total_seconds() + entry.transition_s
    return charged_hours(str(result), None, planned_s=planned_s, request_exposure_s=spec.exposure_s,
                         achieved_exposure_s=None)


# --------------------------------------------------------------------------- the night

@dataclass
class _Run:
    """An entry that has started: when it ends (or aborts) and how."""

    entry: PlanEntry
    finish_step: int  # the step at which the telescope is free again
    result: str  # done | failed


@dataclass
class _Night:
    setup: SeasonSetup
    realization: int
    night: Night
    sky_cache: SkyCache
    specs: dict[int, RequestSpec]
    truth_ok: dict[int, np.ndarray]  # request id -> ok[n_t] under the weather that came
    busy: np.ndarray  # [n_t] bool: telescope moving to, or observing, a target
    charged_before: dict[str, float]  # hours charged per program in the season before tonight
    charged: dict[str, float] = field(default_factory=dict)  # tonight
    done: dict[int, int] = field(default_factory=dict)
    failed: dict[int, int] = field(default_factory=dict)
    band_h: dict[str, float] = field(default_factory=dict)
    builds: int = 0

    def record(self, run: _Run) -> None:
        """The observer records the outcome: the queue copy, the charge and the telescope's time."""
        e = run.entry
        before = int(math.ceil(e.transition_s / self.night.step_s - 1e-9))
        self.busy[max(int(e.start_step) - before, 0):run.finish_step] = True
        rid = int(e.request_id)
        spec = self.specs.get(rid)
        if spec is None or spec.status not in ACTIVE_STATUSES:
            return
        self.specs[rid] = apply_outcome(spec, run.result)
        if run.result == OutcomeResult.DONE:
            self.done[rid] = self.done.get(rid, 0) + 1
            self.charged[spec.program] = self.charged.get(spec.program, 0.0) + charged_h(run.result, e, spec)
            self.band_h[spec.band] = self.band_h.get(spec.band, 0.0) + (e.end - e.start).total_seconds() / 3600.0
        else:
            self.failed[rid] = self.failed.get(rid, 0) + 1

    def active(self) -> list[RequestSpec]:
        return [s for s in self.specs.values() if s.status in ACTIVE_STATUSES]

    def build(self, cond: ConditionsGrid, now_step: int | None, previous: Sequence[PlanEntry]) -> PlanResult | None:
        s = self.setup
        now = None if now_step is None else _at(self.night, now_step)
        effort = s.effort if now_step is None else replan_effort(s.effort, s.config)
        opts = BuildOptions(now=now, previous_entries=list(previous) or None, effort=effort,
                            seed=build_seed(s.seed, self.realization, self.night.date, self.builds))
        self.builds += 1
        so_far = {code: self.charged_before.get(code, 0.0) + self.charged.get(code, 0.0)
                  for code in sorted(set(self.charged_before) | set(self.charged))}
        result = build_plan(s.config, self.active(), s.planner_programs(so_far), self.night, cond,
                            sky=self.sky_cache, options=opts)
        return None if result.violations else result  # a plan the checker refuses is never put in force

    def start(self, e: PlanEntry) -> _Run:
        """The entry meets the weather that came: done, or failed at the first step that fails."""
        ok = self.truth_ok.get(int(e.request_id))
        a, b = int(e.start_step), int(e.end_step)
        seg = ok[a:b] if ok is not None else np.zeros(max(b - a, 1), dtype=bool)
        if seg.size and seg.all():
            return _Run(e, b, OutcomeResult.DONE)
        fail = a + int(np.argmin(seg)) if seg.size else a
        return _Run(e, min(fail + 1, b), OutcomeResult.FAILED)  # aborted at the step that fails


def _at(night: Night, step: int) -> datetime:
    return utc(float(night.times_unix[0]) + step * night.step_s)


def report_at(samples: tuple[Sequence[Sample], Sequence[Sample]], night: Night, step: int) -> list[Sample]:
    """What the site reports at grid step ``step`` given the night's (measured, forecast) samples:
    measured up to now; the conditions of now held for ``NOWCAST_HOLD_S`` (persistence, the
    usual short-range nowcast); the forecast after that. Only measured samples carry the dome's
    state (its last measured state holds: an operator's fact, not a forecast)."""
    measured, forecast = samples
    t_now = float(night.times_unix[0]) + step * night.step_s
    past = [s for s in measured if s.time.timestamp() <= t_now]
    out = list(past)
    if past:
        out.append(replace(past[-1], time=utc(t_now + NOWCAST_HOLD_S), dome_open=None))
    out += [replace(s, dome_open=None) for s in forecast if s.time.timestamp() > t_now + NOWCAST_HOLD_S]
    return out


def simulate_night(setup: SeasonSetup, realization: int, season: SeasonDraw, i: int, specs: Sequence[RequestSpec],
                   sky_cache: SkyCache, charged: Mapping[str, float] | None = None
                   ) -> tuple[tuple[RequestSpec, ...], NightOutcome]:
    """Night ``i`` of the season: its weather drawn, then ``run_night``."""
    cfg = setup.config
    night = night_for(cfg.site, setup.dates[i], cfg.planning.step_s)
    if night.n_times == 0:
        return expire(specs, night.start), NightOutcome(night.date)
    draw = draw_night(setup.climatology, season, i, night.times_unix, cfg.safety,
                      realization_seed(setup.seed, realization), setup.model)
    return run_night(setup, realization, night, draw, specs, sky_cache, charged)


def run_night(setup: SeasonSetup, realization: int, night: Night, draw: NightDraw, specs: Sequence[RequestSpec],
              sky_cache: SkyCache, charged: Mapping[str, float] | None = None
              ) -> tuple[tuple[RequestSpec, ...], NightOutcome]:
    """One night of one realization given its weather (``charged``: hours charged per program
    in the season before this night): (the queue after it, what happened)."""
    cfg = setup.config
    specs = expire(specs, night.start)
    # The whole season's targets in one call: computed once per night on this worker, then
    # every realization planning this night reads them from the cache.
    sky, _ = sky_for(cfg.site, night, list(setup.specs), sky_cache)
    samples = (draw.actual.samples(), draw.forecast.samples())
    actual = conditions_on_grid(samples[0], night.times_unix, cfg.defaults)
    forecast = conditions_on_grid(samples[1], night.times_unix, cfg.defaults)

    by_id = {int(s.id): s for s in specs}
    active = [s for s in specs if s.status in ACTIVE_STATUSES]
    truth = feasibility_for(cfg, night, sky_cache, active, actual) if active else None
    truth_ok = {int(s.id): truth.ok[r] for r, s in enumerate(active)} if truth is not None else {}
    run = _Night(setup, realization, night, sky_cache, by_id, truth_ok, np.zeros(night.n_times, dtype=bool),
                 dict(charged or {}))

    plan = run.build(forecast, None, ()) if active else None
    entries = sorted(plan.entries, key=lambda e: e.start_step) if plan else []
    believed = forecast
    step_k = max(1, int(round(MONITOR_STEP_S / night.step_s)))
    checks = list(range(step_k, night.n_times, step_k)) + [night.n_times]
    t = 0
    running: _Run | None = None
    unrecorded_failure = False
    for c in checks:
        for e in entries:  # entries start when their time comes
            if t <= e.start_step < c and (running is None or running.finish_step <= e.start_step):
                if running is not None:
                    run.record(running)
                    unrecorded_failure |= running.result == OutcomeResult.FAILED
                running = run.start(e)
        if running is not None and running.finish_step <= c:
            run.record(running)
            unrecorded_failure |= running.result == OutcomeResult.FAILED
            running = None
        t = c
        if c >= night.n_times:
            break
        now = _at(night, c)
        new = conditions_on_grid(report_at(samples, night, c), night.times_unix, cfg.defaults)
        ahead = [x for x in entries if x.start_step >= c]  # not started yet
        in_force = ahead + ([running.entry] if running is not None else [])
        planned = [Planned(int(x.request_id), x.start, x.end) for x in in_force]
        reasons = conditions_changes(cfg, night, believed, new, now)
        reasons += entry_failures(cfg, night, sky_cache, planned, run.specs, new, now)
        if unrecorded_failure:
            reasons.append("outcome recorded: failed")
        if not reasons:
            continue
        unrecorded_failure = False
        result = run.build(new, c, in_force) if run.active() or running is not None else None
        if result is None:
            continue
        believed = new
        kept = running is not None and any(
            x.request_id == running.entry.request_id and x.start_step == running.entry.start_step
            for x in result.entries)
        if running is not None and not kept:  # interrupted by the re-plan
            running = _Run(running.entry, c, OutcomeResult.FAILED)
            run.record(running)
            running = None
        entries = sorted((x for x in result.entries if x.start_step >= c), key=lambda e: e.start_step)
    if running is not None:
        run.record(running)

    return tuple(run.specs[int(s.id)] for s in specs), _night_outcome(run, sky, actual)


def _night_outcome(run: _Night, sky, actual: ConditionsGrid) -> NightOutcome:
    cfg, night = run.setup.config, run.night
    step_h = night.step_s / 3600.0
    dark = np.asarray(sky.sun_alt_deg) <= ASTRONOMICAL_ALT_DEG
    closed = ~actual.dome_open | (actual.wind_ms > cfg.safety.max_wind_ms) | \
        (actual.humidity_pct > cfg.safety.max_humidity_pct)
    return NightOutcome(
        night.date,
        charged_h=dict(sorted(run.charged.items())),
        done=dict(sorted(run.done.items())),
        hours_by_band=dict(sorted(run.band_h.items())),
        weather_lost_h=float(np.count_nonzero(dark & closed)) * step_h,
        idle_dark_h=float(np.count_nonzero(dark & ~closed & ~run.busy)) * step_h,
        failed=dict(sorted(run.failed.items())),
        builds=run.builds,
    )

