"""Why a request is not in a plan: the computation behind `nightplan plan why` (report/why.py
formats it). Pure: the plan arrives as plain data (report.export.plan_document's entries).

Two answers for a request in the queue that the plan does not hold:

* never feasible: no start time of the night after the plan's ``planned_from`` has every
  constraint hold for the whole setup + exposure (constraints/explain.py: the binding
  constraint, how close it came, the closest time);
* feasible but displaced: it has feasible starts, and the plan uses that time for other
  entries. For every feasible start we sum the values of the plan entries that overlap it
  (including their transition in); the start with the best margin (own value minus what it
  would push out) is its best chance. Winning there needs a value above that sum; the
  priority that would give it is shown. This is the local trade only: the solver weighs the
  whole night at once (and stops at its gap), so the figure is a guide, not a promise.

Value of one execution (solve/objective.py): within its tier, weight x priority weight x
exposure_h x merit x urgency x balance; ``value_breakdown`` lays those factors out for one
execution (a scheduled entry, or the best start of a displaced request).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.constraints.explain import Unobservable, unobservable
from scheduler.constraints.feasibility import evaluate
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import iso, parse_time, utc
from scheduler.sky.ephemeris import SkyGrid
from scheduler.solve.objective import science_base_value, value_factors

MAX_PRIORITY = 10


@dataclass(frozen=True)
class Displacement:
    """The answer for a feasible request the plan leaves out (plain data)."""

    starts: np.ndarray  # feasible start steps from now, sorted
    windows: list[dict[str, str]]  # runs of consecutive starts: {start, last_start} (UTC ISO)
    blockers: list[int]  # indices of the entries that overlap any feasible start, by their start
    best: int  # index into starts of its best chance
    at_best: list[int]  # indices of the entries that overlap the best start
    own_value: float  # its value at the best start
    value_needed: float  # the summed value of at_best
    merit_at_best: float
    priority_needed: int | None  # the lowest priority that would win there (None: not even 10)


@dataclass(frozen=True)
class WhyNot:
    now_step: int  # the grid step of the plan's planned_from (timegrid.step_of)
    duration_steps: int  # setup + remaining exposure
    unobservable: Unobservable | None  # set when it has no feasible start
    displaced: Displacement | None  # set otherwise


def why_not(config: ObservatoryConfig, spec: RequestSpec, sky: SkyGrid, cond: ConditionsGrid,
            planned_from: datetime, entries: Sequence[dict[str, Any]], weights,
            fmt_t: Callable[[float], str], later_opportunities: int = 0) -> WhyNot:
    """Why ``spec`` (row 0 of ``sky``) is not among ``entries``, the plan's from ``planned_from``.
    weights: the programs (ProgramState) or plain weights; later_opportunities: its
    opportunities after tonight (constraints/opportunities.py), for its urgency."""
    feas = evaluate([spec], np.array([0]), sky, cond, config)
    now_step = sky.night.step_of(planned_from)
    duration = int(feas.duration_steps[0])
    starts = np.flatnonzero(feas.start_ok[0, now_step:]) + now_step
    if starts.size == 0:
        return WhyNot(now_step, duration, unobservable(spec, config, sky, cond, feas, now_step, fmt_t), None)
    merit = np.asarray(feas.merit[0], dtype=np.float64)
    trade = displacement(spec, weights, merit, starts, sky.night.times_unix, duration * sky.night.step_s, entries,
                         config=config, opportunities_left=1 + int(later_opportunities))
    return WhyNot(now_step, duration, None, trade)


def value_breakdown(config: ObservatoryConfig, spec: RequestSpec, weights, merit: float, *,
                    opportunities_left: int | None = None, tier: int | None = None, urgency: float | None = None,
                    balance: float | None = None, value: float | None = None) -> dict[str, Any]:
    """The factors of one execution's value (docs/solver.md) and their product. Factors a stored
    entry carries (tier, urgency, balance, opportunities, value) are taken as given; the others
    are computed from the request, its program and the configuration. With a stored value the
    merit shown is the one credited (value over the other factors: the lowest merit of the
    start's 10-minute bucket, solve/objective.merit_buckets) and ``merit_at_start`` the merit
    at the start itself."""
    f = value_factors(config, [spec], weights, None if opportunities_left is None else [opportunities_left]).row(0)
    if tier is not None:
        f["tier"] = int(tier)
    if urgency is not None:
        f["urgency"] = float(urgency)
    if balance is not None:
        f["balance"] = float(balance)
    if opportunities_left is None:
        f["opportunities_left"] = None
    f["priority"] = spec.priority
    f["priority_ratio"] = config.planning.priority_ratio
    f["merit_at_start"] = float(merit)
    others = f["program_weight"] * f["priority_weight"] * f["exposure_h"] * f["urgency"] * f["balance"]
    if value is not None and others > 0:
        f["merit"], f["value"] = float(value) / others, float(value)
    else:
        f["merit"], f["value"] = float(merit), others * float(merit)
    return f


def _entry_spans(entries: Sequence[dict[str, Any]]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(from, to, value) per entry: from includes the transition into it (unix seconds)."""
    e0 = np.array([parse_time(e["start"], "start").timestamp() - float(e.get("transition_s") or 0.0)
                   for e in entries], dtype=np.float64)
    e1 = np.array([parse_time(e["end"], "end").timestamp() for e in entries], dtype=np.float64)
    ev = np.array([float(e.get("value") or 0.0) for e in entries], dtype=np.float64)
    return e0, e1, ev


def displacement(spec: RequestSpec, weights, merit: np.ndarray, starts: np.ndarray,
                 times: np.ndarray, duration_s: float, entries: Sequence[dict[str, Any]], *,
                 config: ObservatoryConfig | None = None, opportunities_left: int | None = None) -> Displacement:
    """The local trade at each feasible start (see the module docstring). ``merit`` over the grid."""
    e0, e1, ev = _entry_spans(entries)
    s0 = times[starts]
    s1 = s0 + duration_s
    overlap = (e0[None, :] < s1[:, None]) & (e1[None, :] > s0[:, None])  # [starts, entries]
    cost = overlap.astype(np.float64) @ ev if len(entries) else np.zeros(starts.size)
    base = float(science_base_value(spec, weights, config, opportunities_left))
    own = base * merit[starts]
    best = int(np.argmax(own - cost))
    need = float(cost[best])
    merit_b = float(merit[starts[best]])
    need_prio = None
    if base > 0 and merit_b > 0:
        # the priority weight is ratio ** (p - 5): the lowest p whose value beats the need
        ratio = (config.planning.priority_ratio if config is not None else 2.0)
        per_weight = base / ratio ** (spec.priority - 5) * merit_b
        need_prio = next((p for p in range(1, MAX_PRIORITY + 1) if per_weight * ratio ** (p - 5) > need), None)
    return Displacement(
        starts=starts, windows=start_runs(starts, times),
        blockers=sorted(np.flatnonzero(overlap.any(axis=0)).tolist(), key=lambda i: e0[i]),
        best=best, at_best=np.flatnonzero(overlap[best]).tolist(), own_value=float(own[best]), value_needed=need,
        merit_at_best=merit_b, priority_needed=need_prio,
    )


def start_runs(starts: np.ndarray, t: np.ndarray) -> list[dict[str, str]]:
    """Runs of consecutive start steps as {start, last_start} (UTC ISO)."""
    if starts.size == 0:
        return []
    cut = np.flatnonzero(np.diff(starts) != 1) + 1
    return [{"start": iso(utc(t[g[0]])), "last_start": iso(utc(t[g[-1]]))} for g in np.split(starts, cut)]
