"""The CP-SAT model of the night (OR-Tools), built in one function from a Problem.

Formulation (docs/solver.md has the full write-up and the proof sketch):

* Every request execution is an OPTIONAL interval. Its start is an integer grid step whose
  domain is exactly the execution's feasible starts (setup + exposure feasible throughout).
* The interval is extended to the LEFT by a variable ``transition_before``: it covers the gap
  before the entry. All extended intervals go into one NoOverlap, so nothing else can sit in
  the gap, and the gap is at least ``transition_before``.
* Each present execution names how it is entered, exactly one of:
    - ``follows[i, j]``: it comes straight after execution i. Then its extended interval
      starts exactly when i ends (so i really is the previous entry) and
      transition_before >= T[i, j], the pair's transition bound.
    - ``after_gap[j]``: no named predecessor. Then transition_before >= tmax[j], a bound on
      the transition into j from ANY target at ANY time, so whatever precedes it is covered.
  ``follows`` literals exist only for a sparse set of candidate pairs (the K with the
  smallest transition bound into each execution, plus every pair the hint uses); pairs without
  one simply pay tmax[j] if they end up adjacent. Sparse arcs cost at most a few minutes of
  idle time in rare cases and never make a plan wrong.
* Repeats: execution k+1 only if k; start-to-start spacing >= max(duration, min_spacing).
* Objective: sum over executions of the value coefficient of the merit bucket holding its
  start (a bucket literal per bucket), plus a stability bonus for executions that stay within
  ``stability_window`` steps of their start in the previous plan (solve/objective.py). Maximised.

The relaxation bounds that cap the objective live in solve/bounds.py.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from ortools.sat.python import cp_model

from scheduler.solve.objective import VALUE_SCALE, objective_of, stability_coef
from scheduler.solve.problem import Placement, Problem
from scheduler.model.timegrid import consecutive_runs


@dataclass
class ModelVars:
    present: list
    start: list
    transition_before: list
    buckets: list  # per execution: list of (literal, bucket index) (empty when a single bucket)
    follows: dict  # (i, j) -> literal
    after_gap: dict  # j -> literal
    keep: dict  # j -> literal (stability)
    gap_start: dict  # j -> start of the slot (= start - transition_before)
    tmin: list  # lower end of each transition_before domain


@dataclass(frozen=True)
class SolveOutcome:
    placements: list[Placement]
    status: str
    objective: float  # science-value units (objective / VALUE_SCALE)
    bound: float
    gap: float
    runtime_s: float
    n_arcs: int
    n_buckets: int
    deterministic_s: float = 0.0  # CP-SAT's deterministic time spent (its own work units)


def candidate_arcs(problem: Problem, k_best: int, forced: Sequence[tuple[int, int]] = ()) -> list[tuple[int, int]]:
    """Pairs (i, j) that get a ``follows`` literal.

    Into each execution j: the k_best predecessors with the smallest transition bound below
    tmax[j] (ties: higher base value per step first), the previous execution of the same
    request, all kept (fixed) executions, and every pair in ``forced`` (the hints' pairs).
    """
    P = problem
    execs = P.execs
    n_e = len(execs)
    if n_e == 0:
        return []
    req = P.exec_requests()
    dur = P.exec_durations()
    first = np.array([ex.starts.min() if ex.fixed_start is None else ex.fixed_start for ex in execs])
    last = np.array([ex.starts.max() if ex.fixed_start is None else ex.fixed_start for ex in execs])
    density = P.base_value[req] / np.maximum(dur, 1)
    fixed = np.array([ex.fixed_start is not None for ex in execs])
    ks = np.array([ex.k for ex in execs])
    arcs: set[tuple[int, int]] = set()
    for j in range(n_e):
        if execs[j].in_progress:
            continue
        t = P.T[req, req[j]].astype(np.int64)
        ok = (t < P.tmax[req[j]]) & (first + dur + t <= last[j])
        ok[j] = False
        same = req == req[j]
        ok &= ~same | (ks == execs[j].k - 1)
        cand = np.flatnonzero(ok & ~fixed)
        if cand.size > k_best:
            order = np.lexsort((-density[cand], t[cand]))
            cand = cand[order[:k_best]]
        arcs.update((int(i), j) for i in cand)
        arcs.update((int(i), j) for i in np.flatnonzero(ok & (fixed | same)))
        if fixed[j]:
            arcs.update((int(i), j) for i in np.flatnonzero(ok))
    for i, j in forced:
        if i != j and not execs[j].in_progress:
            arcs.add((int(i), int(j)))
    return sorted(arcs)


def build_model(problem: Problem, arcs: Sequence[tuple[int, int]],
                upper_bound: int | None = None, objective_tier: int | None = None,
                floors: dict[int, int] | None = None) -> tuple[cp_model.CpModel, ModelVars]:
    """The whole CP-SAT model. Pure: reads the Problem's arrays, no I/O.

    upper_bound: a proven bound on the objective (bounds.py); stated as a constraint it cuts no
    solution and lets the gap-based stop work from the first second.
    objective_tier / floors (strict tiers, pipeline.solve_by_tiers): maximise the value of the
    executions of that program tier only, holding each tier t in ``floors`` at a value of at
    least floors[t] (integer units, stability bonus included, as in the objective).
    """
    P = problem
    model = cp_model.CpModel()
    n_execs = len(P.execs)
    horizon = P.n_t + int(P.tmax.max(initial=0)) + 1
    names = [f"r{int(P.request_ids[ex.req])}_x{ex.k}" for ex in P.execs]
    predecessors: dict[int, list[int]] = {j: [] for j in range(n_execs)}
    for i, j in arcs:
        predecessors[j].append(i)

    present, start, transition_before, bucket_literals, tmin = [], [], [], [], []
    gap_start: dict[int, cp_model.IntVar] = {}
    slots = []
    objective_terms = []

    # Each execution: an optional slot [start - transition_before, start + duration).
    for j, ex in enumerate(P.execs):
        name = names[j]
        if ex.in_progress:
            # The entry being observed: kept exactly, no transition before it to model.
            runs = model.new_constant(1)
            starts_at = model.new_constant(int(ex.fixed_start))
            slots.append(model.new_interval_var(starts_at, ex.duration, starts_at + ex.duration, f"in_progress_{name}"))
            objective_terms.append((j, int(ex.bucket_coef[0]) * runs))
            present.append(runs)
            start.append(starts_at)
            transition_before.append(model.new_constant(0))
            bucket_literals.append([])
            tmin.append(0)
            continue
        runs = model.new_bool_var(f"run_{name}")
        if ex.fixed_start is not None:
            starts_at = model.new_int_var(int(ex.fixed_start), int(ex.fixed_start), f"start_{name}")
            model.add(runs == 1)
        else:
            feasible_starts = cp_model.Domain.from_intervals(
                [[int(lo), int(hi)] for lo, hi in consecutive_runs(ex.starts)])
            starts_at = model.new_int_var_from_domain(feasible_starts, f"start_{name}")
        smallest_in = min([int(P.tmax[ex.req])] + [int(P.T[P.execs[i].req, ex.req]) for i in predecessors[j]])
        before = model.new_int_var(smallest_in, horizon, f"transition_before_{name}")
        gap_start[j] = model.new_int_var(-horizon, P.n_t, f"gap_start_{name}")  # = start - transition_before
        slots.append(model.new_optional_interval_var(gap_start[j], before + ex.duration, starts_at + ex.duration,
                                                     runs, f"slot_{name}"))
        present.append(runs)
        start.append(starts_at)
        transition_before.append(before)
        tmin.append(smallest_in)

        # Value: the merit bucket that holds the start.
        lo, hi, coef = ex.bucket_lo, ex.bucket_hi, ex.bucket_coef
        literals = []
        if ex.fixed_start is not None:
            b = int(np.searchsorted(lo, ex.fixed_start, side="right")) - 1
            objective_terms.append((j, int(coef[b]) * runs))
        elif len(lo) == 1:
            objective_terms.append((j, int(coef[0]) * runs))
        else:
            for b in range(len(lo)):
                in_bucket = model.new_bool_var(f"starts_in_bucket_{name}_{b}")
                model.add(starts_at >= int(lo[b])).only_enforce_if(in_bucket)
                model.add(starts_at <= int(hi[b])).only_enforce_if(in_bucket)
                literals.append((in_bucket, b))
                objective_terms.append((j, int(coef[b]) * in_bucket))
            model.add(sum(y for y, _ in literals) == runs)
        bucket_literals.append(literals)

    # How each execution is entered: straight after a named predecessor, or after a gap.
    follows: dict[tuple[int, int], cp_model.IntVar] = {}
    after_gap: dict[int, cp_model.IntVar] = {}
    successors: dict[int, list] = {i: [] for i in range(n_execs)}
    for j, ex in enumerate(P.execs):
        if ex.in_progress:
            continue
        enters_after_gap = model.new_bool_var(f"after_gap_{names[j]}")
        model.add(transition_before[j] >= int(P.tmax[ex.req])).only_enforce_if(enters_after_gap)
        after_gap[j] = enters_after_gap
        ways_in = [enters_after_gap]
        for i in predecessors[j]:
            previous = P.execs[i]
            follows_i = model.new_bool_var(f"follows_{names[j]}_after_{names[i]}")
            model.add(start[j] - transition_before[j] == start[i] + previous.duration).only_enforce_if(follows_i)
            model.add(transition_before[j] >= int(P.T[previous.req, ex.req])).only_enforce_if(follows_i)
            model.add_implication(follows_i, present[i])
            follows[(i, j)] = follows_i
            ways_in.append(follows_i)
            successors[i].append(follows_i)
        model.add(sum(ways_in) == present[j])
    for i, literals in successors.items():
        if len(literals) > 1:
            model.add(sum(literals) <= present[i])

    model.add_no_overlap(slots)

    # Repeats of one request: in order, spaced start to start.
    by_request: dict[int, list[int]] = {}
    for j, ex in enumerate(P.execs):
        by_request.setdefault(ex.req, []).append(j)
    for r, js in by_request.items():
        js.sort(key=lambda j: P.execs[j].k)
        for a, b in zip(js, js[1:]):
            spacing = max(P.execs[a].duration, int(P.spacing_steps[r]))
            model.add_implication(present[b], present[a])
            model.add(start[b] >= start[a] + spacing).only_enforce_if(present[b])

    # Stability: stay near the previous plan's start unless the gain is worth more.
    keep: dict[int, cp_model.IntVar] = {}
    for j, ex in enumerate(P.execs):
        bonus = stability_coef(P, j)
        if bonus <= 0:
            continue
        keeps = model.new_bool_var(f"keeps_previous_start_{names[j]}")
        model.add_implication(keeps, present[j])
        model.add(start[j] >= ex.prev_start - P.stability_window).only_enforce_if(keeps)
        model.add(start[j] <= ex.prev_start + P.stability_window).only_enforce_if(keeps)
        objective_terms.append((j, bonus * keeps))
        keep[j] = keeps

    if objective_tier is None:
        objective = [x for _, x in objective_terms]
    else:
        tiers = P.exec_tiers()
        objective = [x for j, x in objective_terms if tiers[j] == objective_tier]
        for t, floor in (floors or {}).items():
            model.add(sum(x for j, x in objective_terms if tiers[j] == t) >= int(floor))
    if upper_bound is not None:
        model.add(sum(objective) <= int(upper_bound))
    model.maximize(sum(objective))
    return model, ModelVars(present, start, transition_before, bucket_literals, follows, after_gap, keep, gap_start,
                            tmin)


def add_hint(model: cp_model.CpModel, v: ModelVars, problem: Problem, plan: Sequence[Placement]) -> None:
    """Hint every decision variable from a model-feasible plan (greedy or previous)."""
    P = problem
    at = {p.exec_index: p.start for p in plan}
    order = sorted(plan, key=lambda p: p.start)
    prev_of: dict[int, int | None] = {}
    for a, b in zip([None] + order[:-1], order):
        prev_of[b.exec_index] = None if a is None else a.exec_index
    for j, ex in enumerate(P.execs):
        if ex.in_progress:
            continue
        on = j in at
        model.add_hint(v.present[j], on)
        if not on:
            # complete hint: absent executions get harmless values too (CP-SAT then accepts the
            # hint as a solution at once instead of searching for the missing part)
            s0 = int(ex.fixed_start if ex.fixed_start is not None else ex.starts[0])
            lo = int(v.tmin[j])
            model.add_hint(v.start[j], s0)
            model.add_hint(v.transition_before[j], lo)
            model.add_hint(v.gap_start[j], s0 - lo)
            for y, b in v.buckets[j]:
                model.add_hint(y, False)
            if j in v.after_gap:
                model.add_hint(v.after_gap[j], False)
            if j in v.keep:
                model.add_hint(v.keep[j], False)
            continue
        s = at[j]
        model.add_hint(v.start[j], s)
        for y, b in v.buckets[j]:
            model.add_hint(y, bool(ex.bucket_lo[b] <= s <= ex.bucket_hi[b]))
        i = prev_of[j]
        use_arc = i is not None and (i, j) in v.follows and s - (at[i] + P.execs[i].duration) < P.tmax[ex.req]
        model.add_hint(v.after_gap[j], not use_arc)
        pre = s - (at[i] + P.execs[i].duration) if use_arc else int(P.tmax[ex.req])
        model.add_hint(v.transition_before[j], pre)
        model.add_hint(v.gap_start[j], s - pre)
        if j in v.keep:
            model.add_hint(v.keep[j], abs(s - ex.prev_start) <= P.stability_window)
    for (i, j), f in v.follows.items():
        model.add_hint(f, j in at and prev_of.get(j) == i and at[j] - (at[i] + P.execs[i].duration) < P.tmax[P.execs[j].req])


def hint_pairs(problem: Problem, plan: Sequence[Placement]) -> list[tuple[int, int]]:
    """Consecutive pairs of a plan closer than tmax: they need a follows literal."""
    order = sorted(plan, key=lambda p: p.start)
    out = []
    for a, b in zip(order, order[1:]):
        gap = b.start - (a.start + problem.execs[a.exec_index].duration)
        if gap < problem.tmax[problem.execs[b.exec_index].req]:
            out.append((a.exec_index, b.exec_index))
    return out


class _Progress(cp_model.CpSolverSolutionCallback):
    def __init__(self, cb: Callable[[str], None], t0: float):
        super().__init__()
        self.cb, self.t0 = cb, t0

    def on_solution_callback(self) -> None:
        # CP-SAT's own bound so far; the reported bound is the tightest of it and the relaxations
        self.cb(f"solve: objective {self.objective_value / VALUE_SCALE:.3f}, CP-SAT bound "
                f"{self.best_objective_bound / VALUE_SCALE:.3f} at {time.perf_counter() - self.t0:.1f}s")


def set_parameters(params, *, time_limit_s: float | None, deterministic_time_s: float | None,
                   gap_tolerance: float, num_workers: int | None, seed: int) -> None:
    """CP-SAT's stop rules and search settings.

    Wall clock: ``time_limit_s``, all cores by default. Deterministic (``deterministic_time_s``
    set, in CP-SAT's deterministic time units): one worker by default, or several with
    interleaved search; either way the same model, seed and limit give the same answer on any
    machine, however loaded.
    """
    params.relative_gap_limit = float(gap_tolerance)
    if time_limit_s is not None:
        params.max_time_in_seconds = float(time_limit_s)
    if deterministic_time_s is not None:
        params.max_deterministic_time = float(deterministic_time_s)
        params.num_workers = int(num_workers or 1)
        params.interleave_search = params.num_workers > 1
    else:
        params.num_workers = int(num_workers or os.cpu_count() or 1)
    params.random_seed = int(seed)
    params.cp_model_probing_level = 0  # probing costs seconds of wall time on 10^4 booleans and finds little
    params.catch_sigint_signal = False  # else CP-SAT leaves SIGINT at its default: Ctrl-C would kill the service


# CP-SAT may answer a little after its wall-clock limit (loading the response, stopping its
# workers): the limit it gets is shortened by this much plus a share of itself.
CPSAT_STOP_MARGIN_S = 0.1
CPSAT_STOP_MARGIN_SHARE = 0.05


def model_size(problem: Problem, k_best: int) -> int:
    """The number of literals build_model will make, estimated before building it (bucket
    literals + about k_best arcs per execution + a few per execution)."""
    return sum(len(ex.bucket_lo) for ex in problem.execs) + (k_best + 4) * len(problem.execs)


def solve_problem(problem: Problem, *, time_limit_s: float | None = 10.0, deterministic_time_s: float | None = None,
                  gap_tolerance: float = 0.01, hint: Sequence[Placement] | None = None,
                  upper_bound: int | None = None, k_best: int = 10, num_workers: int | None = None,
                  seed: int = 0, progress: Callable[[str], None] | None = None,
                  model_timer: Callable[[float], None] | None = None, objective_tier: int | None = None,
                  floors: dict[int, int] | None = None, deadline: float | None = None) -> SolveOutcome:
    """Build, hint and solve the model. Stops at the time limit, the deterministic-time limit or
    the relative gap tolerance, whichever comes first (set_parameters).

    objective_tier / floors: one step of the strict-tier solve (build_model); the outcome's
    objective, bound and gap are then that tier's.
    deadline: a perf_counter time by which the answer is due; the wall-clock limit is then what
    is left of it once the model is built (less a stop margin), and the solve is skipped
    (status "NO_TIME") when too little is left."""
    t0 = time.perf_counter()
    arcs = candidate_arcs(problem, k_best, hint_pairs(problem, hint) if hint else ())
    model, v = (build_model(problem, arcs, upper_bound) if objective_tier is None
                else build_model(problem, arcs, upper_bound, objective_tier, floors))
    if hint:
        add_hint(model, v, problem, hint)
    n_buckets = sum(max(1, len(b)) for b in v.buckets)
    if model_timer:
        model_timer(time.perf_counter() - t0)
    if deadline is not None:
        left = deadline - time.perf_counter()
        time_limit_s = left * (1.0 - CPSAT_STOP_MARGIN_SHARE) - CPSAT_STOP_MARGIN_S
        if time_limit_s < 0.2:
            return SolveOutcome([], "NO_TIME", 0.0, float("inf"), float("inf"), 0.0, len(arcs), n_buckets, 0.0)
    solver = cp_model.CpSolver()
    set_parameters(solver.parameters, time_limit_s=time_limit_s, deterministic_time_s=deterministic_time_s,
                   gap_tolerance=gap_tolerance, num_workers=num_workers, seed=seed)
    t1 = time.perf_counter()
    status = solver.solve(model, _Progress(progress, t1) if progress else None)
    runtime = time.perf_counter() - t1
    if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
        return SolveOutcome([], solver.status_name(status), 0.0, float("inf"), float("inf"), runtime, len(arcs),
                            n_buckets, solver.deterministic_time)
    plan = [Placement(j, int(solver.value(v.start[j]))) for j in range(len(problem.execs))
            if solver.value(v.present[j])]
    plan.sort(key=lambda p: p.start)
    if objective_tier is None:
        sci, stab = objective_of(problem, plan)
    else:
        tiers = problem.exec_tiers()
        sci, stab = objective_of(problem, [p for p in plan if tiers[p.exec_index] == objective_tier])
    # A solution may leave a keeps_previous_start literal false although the start is inside the
    # window (nothing forces it true): the plan then earns more than the model says. Never less.
    assert sci + stab >= solver.objective_value - 0.5, "plan value below the model objective"
    obj = float(sci + stab)
    bound = max(min(solver.best_objective_bound, upper_bound if upper_bound is not None else math.inf), obj)
    # CP-SAT says OPTIMAL also when it stops at the relative gap limit: report what is proven
    name = "OPTIMAL" if bound - obj < 1.0 else "FEASIBLE"
    gap = 0.0 if name == "OPTIMAL" else (bound - obj) / max(abs(bound), 1e-9)
    return SolveOutcome(plan, name, obj / VALUE_SCALE, bound / VALUE_SCALE, gap, runtime, len(arcs), n_buckets,
                        solver.deterministic_time)
