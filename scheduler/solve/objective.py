"""The objective: what one execution of a request is worth. The one home of the science value
(program weight, priority, exposure, merit buckets), of the stability bonus a re-plan pays for
keeping an entry near its previous start, and of the integer scale CP-SAT works in.

Science value of one execution started at grid step s (docs/solver.md), within its program's
tier (tiers are strict: pipeline.solve_by_tiers):

    value = program_weight * priority_ratio**(priority - 5) * (exposure_s / 3600) * merit(s)
            * urgency * balance

the factors being solve/factors.py's pure functions (value_factors composes them), read on
merit buckets (the bucket's lowest merit counts for every start in it), as the integer
coefficient round(VALUE_SCALE * value), at least 1. On a re-plan an execution that starts
within ``stability_window`` steps of its previous start earns a further
round(stability_weight * its value at the previous start).

Every search, bound and the CP-SAT model read values from here, so they all optimise the same
number. Pure: imports the ground floor and solve/factors.py (the Problem is read through its attributes).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Mapping, Sequence

import numpy as np

from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.solve.factors import ProgramState, RequestFactors, as_programs, request_factors
from scheduler.model.timegrid import consecutive_runs

if TYPE_CHECKING:  # annotations only: problem.py imports this module
    from scheduler.solve.problem import Placement, Problem

VALUE_SCALE = 10_000  # objective units per unit of science value (integer objective for CP-SAT)
STABILITY_WEIGHT = 0.2  # bonus for staying, as a share of the execution's value (common practice)
STABILITY_WINDOW_STEPS = 2  # "stays": starts within this many grid steps of its previous start


def value_factors(config: ObservatoryConfig, specs: Sequence[RequestSpec],
                  programs: Mapping[str, float | ProgramState] | None,
                  opportunities_left: Sequence[int] | None = None) -> RequestFactors:
    """Every factor of every request's value but merit (solve/factors.py), with the config's
    planning knobs. opportunities_left: nights left, tonight included (docs/solver.md); None
    counts every request as having the whole lookahead (urgency near 1, for callers without a
    count, such as synthetic-sky tests)."""
    p = config.planning
    n_left = [p.lookahead_nights] * len(specs) if opportunities_left is None else opportunities_left
    return request_factors(specs, as_programs(programs), n_left, priority_ratio=p.priority_ratio,
                           urgency_max=p.urgency_max, balance_max=p.balance_max, allow_overfill=p.allow_overfill)


def science_base_value(spec: RequestSpec, programs: Mapping[str, float | ProgramState] | None,
                       config: ObservatoryConfig | None = None, opportunities_left: int | None = None) -> float:
    """The value of one execution before merit: weight x priority weight x exposure hours x
    urgency x balance (value_factors for one request; the starter planning knobs without a config)."""
    if config is None:
        from scheduler.model.config import starter_config
        config = starter_config()
    n = None if opportunities_left is None else [opportunities_left]
    return float(value_factors(config, [spec], programs, n).base[0])


def value_coef(base: float, merit: float) -> int:
    """Integer objective coefficient of one execution of base value ``base`` at ``merit``
    (at least 1: a planned execution is never worth nothing)."""
    return max(1, int(round(VALUE_SCALE * base * merit)))


def merit_buckets(starts_mask: np.ndarray, merit: np.ndarray, base: float, bucket_steps: int):
    """(bucket_lo, bucket_hi, coef): feasible starts cut into buckets of ``bucket_steps``; each
    bucket is worth the value at its lowest merit (conservative; bucket_steps=1 is exact)."""
    lo_l, hi_l, coef_l = [], [], []
    for lo, hi in consecutive_runs(np.flatnonzero(starts_mask)):
        for b0 in range(lo, hi + 1, bucket_steps):
            b1 = min(hi, b0 + bucket_steps - 1)
            lo_l.append(b0)
            hi_l.append(b1)
            coef_l.append(value_coef(base, float(np.min(merit[b0:b1 + 1]))))
    return (np.array(lo_l, dtype=np.int64), np.array(hi_l, dtype=np.int64), np.array(coef_l, dtype=np.int64))


def stability_coef(problem: Problem, e: int) -> int:
    """The bonus execution ``e`` earns for starting within the stability window of its previous
    start (0 when it has none, is kept exactly anyway, or this is not a re-plan)."""
    ex = problem.execs[e]
    if ex.prev_start is None or ex.fixed_start is not None or problem.stability_weight <= 0:
        return 0
    try:
        c = ex.coef_at(ex.prev_start)
    except ValueError:  # the previous start is no longer feasible: the bonus of its best bucket
        c = int(ex.bucket_coef.max()) if ex.bucket_coef.size else 0
    return int(round(problem.stability_weight * c))


def start_values(problem: Problem, e: int) -> tuple[np.ndarray, np.ndarray]:
    """(starts, values): the starts execution ``e`` may take (only its kept start when it is
    kept) and the objective coefficient of each, stability bonus included."""
    ex = problem.execs[e]
    starts = ex.starts if ex.fixed_start is None else np.array([ex.fixed_start], dtype=np.int64)
    b = np.searchsorted(ex.bucket_lo, starts, side="right") - 1
    values = ex.bucket_coef[b].astype(np.int64)
    bonus = stability_coef(problem, e)
    if bonus:
        values = values + bonus * (np.abs(starts - ex.prev_start) <= problem.stability_window)
    return starts, values


def objective_of(problem: Problem, plan: Sequence[Placement]) -> tuple[int, int]:
    """(science objective, stability bonus) of a plan, in integer objective units."""
    sci = 0
    stab = 0
    for p in plan:
        ex = problem.execs[p.exec_index]
        sci += ex.coef_at(p.start)
        if ex.prev_start is not None and abs(p.start - ex.prev_start) <= problem.stability_window:
            stab += stability_coef(problem, p.exec_index)
    return sci, stab


def plan_value(problem: Problem, plan: Sequence[Placement]) -> int:
    """The model objective of a plan: science value plus stability bonus (integer units)."""
    return sum(objective_of(problem, plan))
