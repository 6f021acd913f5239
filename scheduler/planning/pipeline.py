"""The pure orchestration: requests + night + conditions -> a checked night plan.

config + queue + conditions -> sky grid -> feasibility -> problem -> searches + bounds + CP-SAT
-> plan -> independent checker. No database, no files: ``now`` is an option, and the clock is
read only to keep a wall-clock time limit (BuildOptions.effort replaces it by a deterministic
work budget). Used by the CLI, the service, the demo and the benchmark.

``build_plan`` runs named stages, each a function of the one before:

    prepare_problem -> search_for_plans -> bound_objective -> insertion by prices
    -> optimise_with_cpsat -> choose_plan -> check_and_finalise

PlanEntry and PlanResult (the contract for storage and reports) live in scheduler/model/plan.py
and are re-exported here.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field, replace
from datetime import datetime, timedelta
from typing import Callable, Mapping, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.model.plan import PlanEntry, PlanResult
from scheduler.model.request import ACTIVE_STATUSES, RequestSpec
from scheduler.model.timegrid import utc
from scheduler.sky.ephemeris import SkyGrid, distinct_targets, sky_for
from scheduler.sky.night import Night
from scheduler.solve.bounds import LagrangianResult, lagrangian_bound, sequence_bound
from scheduler.solve.budget import CpSatBudget, WorkBudget, check_effort, check_seed
from scheduler.solve.checker import check_plan, true_transition_s
from scheduler.solve.cpsat import SolveOutcome, model_size, solve_problem
from scheduler.solve.greedy import DispatchTables, dispatch_tables, greedy_plan
from scheduler.solve.heuristics import RuinAndRecreate, insertion_plan, plan_from_sequence, randomized_dispatch
from scheduler.constraints.opportunities import SHARED_CACHE, OpportunityCache, count_opportunities
from scheduler.solve.factors import ProgramState, TierSolve, lexicographic, tier_order
from scheduler.solve.objective import VALUE_SCALE, objective_of, plan_value, value_factors
from scheduler.solve.problem import Placement, Problem, build_problem, check_model_feasible
from scheduler.solve.transitions import slew_s as _slew_s

__all__ = ["BuildOptions", "build_plan", "PlanEntry", "PlanResult", "target_rows_for", "entries_on_grid"]


@dataclass(frozen=True)
class BuildOptions:
    """How to build a plan. ``BuildOptions()`` plans the whole night within the config's limits.

    now: re-plan from this time (nothing new starts before it; the entry in progress is kept).
    previous_entries: the plan in force, for the entry in progress, the freeze horizon, the
      stability bonus and the search's seed plan (storage form with steps -1 is accepted).
    time_limit_s: wall-clock budget of the build (default config.planning.time_limit_s).
    effort: instead of the clock, a deterministic work budget (an integer >= 1): every search,
      bound and CP-SAT does ``effort`` units of work (solve/budget.py) and nothing reads the
      clock, so the same inputs, effort and seed give the identical plan on any machine.
      time_limit_s is then not used. Default: config.planning.effort, unless time_limit_s is
      given (an explicit time limit takes the place of a configured effort).
    seed: seeds the randomized searches (and CP-SAT); default config.planning.seed.
    gap_tolerance: stop once the proven relative gap is below this (default from the config).
    freeze_horizon_min: entries starting this soon after now keep their start (default from
      the config).
    num_workers: CP-SAT workers (default: all cores; one under ``effort``).
    progress: called with a short line at each stage and each CP-SAT solution.
    k_best_arcs, bucket_steps: model size (candidate predecessors per execution; merit
      bucket width in grid steps, 1 = exact).
    opportunities: each request's opportunities after tonight (request id -> nights), from
      constraints/opportunities.py; tonight counts when the request has a start on tonight's
      grid. Not given: counted here through ``opportunity_cache`` (default: the process-wide
      cache, so a long-lived process computes each request and night once).
    started: the time.perf_counter() value the time limit counts from (default: when
      build_plan is called). A caller that does work of its own before the build (reading the
      queue, computing the sky) passes the time it started, so the limit bounds all of it.
    """

    now: datetime | None = None
    previous_entries: Sequence[PlanEntry] | None = None
    time_limit_s: float | None = None
    effort: int | None = None
    seed: int | None = None
    gap_tolerance: float | None = None
    freeze_horizon_min: float | None = None
    num_workers: int | None = None
    progress: Callable[[str], None] | None = None
    k_best_arcs: int = 10
    bucket_steps: int = 10
    opportunities: Mapping[int, int] | None = None
    opportunity_cache: OpportunityCache | None = None
    started: float | None = None

    def __post_init__(self):
        if self.effort is not None:
            check_effort(self.effort)
        if self.seed is not None:
            check_seed(self.seed)


@dataclass
class _Build:
    """One build in progress: the options resolved against the config, the budget (its clock
    starts here), the timings and the progress line."""

    config: ObservatoryConfig
    night: Night
    options: BuildOptions
    budget: WorkBudget
    gap_tolerance: float
    now_step: int
    seed: int
    timings: dict = field(default_factory=lambda: dict.fromkeys(("sky", "feasibility", "value", "model", "solve", "check"), 0.0))
    cpsat_budget: CpSatBudget | None = None
    cpsat_decision: str = "not needed"

    @classmethod
    def start(cls, config: ObservatoryConfig, night: Night, options: BuildOptions) -> _Build:
        p = config.planning
        limit = p.time_limit_s if options.time_limit_s is None else options.time_limit_s
        tol = p.gap_tolerance if options.gap_tolerance is None else options.gap_tolerance
        now_step = 0 if options.now is None else night.step_of(options.now)
        effort = options.effort if options.effort is not None or options.time_limit_s is not None else p.effort
        seed = p.seed if options.seed is None else options.seed
        return cls(config, night, options, WorkBudget(limit, effort, options.started), float(tol), now_step, seed)

    def say(self, msg: str) -> None:
        if self.options.progress:
            self.options.progress(msg)


@dataclass
class Prepared:
    """The problem and what it was built from (rows of ``feasibility`` follow ``requests``)."""

    requests: list[RequestSpec]
    sky: SkyGrid
    rows: np.ndarray  # each request's row in the sky grid
    feasibility: object
    cond: ConditionsGrid
    previous: list[PlanEntry]
    problem: Problem
    tables: DispatchTables
    greedy: list[Placement]
    greedy_value: int


class PlanPool:
    """The best model-feasible plan found so far: the CP-SAT hint, and the floor the build
    returns when CP-SAT finds nothing better."""

    def __init__(self, problem: Problem, plan: list[Placement], label: str):
        self.problem = problem
        self.plan, self.label, self.value = plan, label, plan_value(problem, plan)
        self.randomized_runs = 0
        self.search: RuinAndRecreate | None = None  # the ruin-and-recreate search, resumed by search_more
        self.before_cpsat: int | None = None  # the pool's value when CP-SAT started (None: it did not run)

    def consider(self, label: str, plan: list[Placement]) -> None:
        value = plan_value(self.problem, plan)
        if value > self.value and not check_model_feasible(self.problem, plan):
            self.plan, self.label, self.value = plan, label, value

    @property
    def ruin_recreate_iterations(self) -> int:
        return self.search.moves if self.search is not None else 0

    def kept_what(self) -> str:
        return "greedy plan kept" if self.label == "greedy" else f"best heuristic plan kept ({self.label})"


@dataclass(frozen=True)
class Bounds:
    lagrangian: LagrangianResult
    sequence: int
    sequence_iterations: int
    upper: int  # the tightest valid bound (integer objective units)
    warning: str | None = None
    columns: int = 0  # the sequence bound's column generation: columns and window cuts (0: not run)
    cuts: int = 0
    prices: str = ""  # how its request-class passes set their prices, and why


@dataclass(frozen=True)
class Choice:
    """The plan the build settles on before the checker, and how it was found."""

    plan: list[Placement]
    status: str
    objective: float
    bound: float
    gap: float
    used_greedy: bool
    message: str = ""


def build_plan(config: ObservatoryConfig, requests: list[RequestSpec],
               program_weights: Mapping[str, float | ProgramState] | None,
               night: Night, cond: ConditionsGrid, *, sky=None, options: BuildOptions | None = None,
               feasibility=None, static=None) -> PlanResult:
    """Build a checked night plan.

    sky: a SkyGrid holding every request's target, or a SkyCache, or None (computed here).
    program_weights: the programs (ProgramState: tier, weight, allocated and charged hours) or
      plain weights (tier 2, no allocation).
    options: BuildOptions (now, previous plan, time limit or effort, seed, ...).
    feasibility / static: precomputed Feasibility (rows = the active requests in order) or the
      feasibility static layer, to reuse on a re-plan.
    """
    run = _Build.start(config, night, options or BuildOptions())
    reqs = active_requests(requests)
    if not reqs:
        return PlanResult((), (), "EMPTY", 0.0, 0.0, 0.0, 0.0, 0.0, False, run.timings, (), now_step=run.now_step,
                          message="no active requests")
    prep = prepare_problem(run, reqs, program_weights, cond, sky, feasibility, static)
    tiers = tier_order(prep.problem.exec_tiers())
    if len(tiers) > 1:
        return solve_by_tiers(run, prep, tiers)
    t0 = time.perf_counter()  # searches and bounds are optimisation: counted in "solve"
    pool, first_bound = search_for_plans(run, prep)
    bounds = bound_objective(run, prep, pool, first_bound)
    lag = bounds.lagrangian
    pool.consider("price-guided insertion", insertion_plan(prep.problem, lag.order, lag.preferred, prep.tables))
    outcome = None
    if cpsat_pays(run, prep, pool, bounds):
        search_s = time.perf_counter() - t0
        outcome = optimise_with_cpsat(run, prep, pool, bounds)
    else:
        search_more(run, prep, pool, bounds)
        search_s = time.perf_counter() - t0
    run.timings["solve"] = search_s + (outcome.runtime_s if outcome else 0.0)
    choice = choose_plan(prep, pool, bounds, outcome, run.cpsat_decision)
    result = check_and_finalise(run, prep, pool, bounds, outcome, choice, search_s)
    one = [{"tier": t, "executions": len(prep.problem.execs), "value": float(choice.objective),
            "bound": float(choice.bound), "status": choice.status} for t in tiers]
    return replace(result, stats={**result.stats, "tiers": one, "gap_tier": tiers[0] if tiers and choice.gap else None})


def _tier_values(problem: Problem, plan: Sequence[Placement]) -> dict[int, int]:
    """Integer value (stability bonus included) of each tier's executions in a plan."""
    tiers = problem.exec_tiers()
    out: dict[int, int] = {}
    for p in plan:
        t = int(tiers[p.exec_index])
        out[t] = out.get(t, 0) + plan_value(problem, [p])
    return out


def solve_by_tiers(run: _Build, prep: Prepared, tiers: list[int]) -> PlanResult:
    """Strict tiers (docs/solver.md): one step per tier, most important first. Step k
    maximises tier k's value over the executions of tiers <= k, every higher tier held at
    least at the value it reached; lower tiers do not enter (they cannot change a higher
    tier's optimum). The first step is the whole single-objective build on the top tier
    alone (searches, bounds, CP-SAT); later steps start from the previous step's plan with
    the dispatch filling around it (it meets the floors) and let CP-SAT improve it. Each step
    keeps full integer precision and its own proven bound; the plan's gap is the first tier
    not proven optimal (factors.lexicographic)."""
    P = prep.problem
    et = P.exec_tiers()
    # held executions (in progress, frozen) of every tier enter every step: they are on the
    # telescope's timeline whatever their tier, so a higher tier may not be planned over them
    held = np.array([ex.fixed_start is not None for ex in P.execs], dtype=bool)
    work = {t: int(np.count_nonzero(et == t)) for t in tiers}
    plan: list[Placement] = []
    floors: dict[int, int] = {}
    steps: list[TierSolve] = []
    step_stats: list[dict] = []
    first = None  # (pool, bounds) of the top tier's build, for the statistics and the fallback
    outcome = None
    t_search = time.perf_counter()
    search_s = 0.0
    run.cpsat_decision = "ran (strict tiers: one CP-SAT step per tier, each a share of the time left)"
    for i, k in enumerate(tiers):
        t0 = time.perf_counter()
        sel = np.flatnonzero((et <= k) | held)
        sub = replace(P, execs=[P.execs[j] for j in sel])
        index_in_sub = {int(j): n for n, j in enumerate(sel)}
        tables = dispatch_tables(sub)
        share = work[k] / max(1, sum(work[t] for t in tiers[i:]))
        if i == 0:
            g = greedy_plan(sub, tables=tables)
            sp = replace(prep, problem=sub, tables=tables, greedy=g, greedy_value=plan_value(sub, g))
            s0 = time.perf_counter()
            pool, first_bound = search_for_plans(run, sp)
            bounds = bound_objective(run, sp, pool, first_bound)
            lag = bounds.lagrangian
            pool.consider("price-guided insertion", insertion_plan(sub, lag.order, lag.preferred, tables))
            search_s += time.perf_counter() - s0
            outcome = optimise_with_cpsat(run, sp, pool, bounds, share=share)
            choice = choose_plan(sp, pool, bounds, outcome)
            first = (pool, bounds)
            sub_plan, value, bound, status = choice.plan, choice.objective, choice.bound, choice.status
        else:
            kept = [Placement(index_in_sub[p.exec_index], p.start) for p in plan]
            hint = greedy_plan(sub, keep=kept, tables=tables)
            if check_model_feasible(sub, hint):  # the dispatch could not hold them: keep the plan as it is
                hint = kept
            sp = replace(prep, problem=sub, tables=tables, greedy=hint, greedy_value=plan_value(sub, hint))
            pool = PlanPool(sub, hint, f"tier {tiers[i - 1]} plan + dispatch")
            outcome = optimise_with_cpsat(run, sp, pool, None, share=share, objective_tier=k, floors=dict(floors))
            hint_k = _tier_values(sub, hint).get(k, 0) / VALUE_SCALE
            if outcome is not None and outcome.status in ("OPTIMAL", "FEASIBLE") and outcome.objective >= hint_k - 1e-9:
                sub_plan, value, bound, status = outcome.placements, outcome.objective, outcome.bound, outcome.status
            else:
                sub_plan, value, status = hint, hint_k, "GREEDY"
                bound = max(outcome.bound, value) if outcome is not None and np.isfinite(outcome.bound) else value
        plan = [Placement(int(sel[p.exec_index]), p.start) for p in sub_plan]
        # every tier reached so far is held from now on (a tier may have gained on the way)
        floors = {t: v for t, v in _tier_values(P, plan).items() if t <= k}
        steps.append(TierSolve(k, float(value), float(bound), status))
        step_stats.append({"tier": k, "executions": work[k], "value": float(value), "bound": float(bound),
                           "status": status, "seconds": round(time.perf_counter() - t0, 3)})
    objective, bound, gap, gap_tier = lexicographic(steps)
    run.timings["solve"] = time.perf_counter() - t_search
    used_greedy = steps[-1].status == "GREEDY"
    status = "GREEDY" if used_greedy else ("OPTIMAL" if gap == 0.0 else "FEASIBLE")
    message = "" if gap_tier is None else f"tier {gap_tier} not proven optimal"
    choice = Choice(plan, status, objective, bound, gap, used_greedy, message)
    pool, bounds = first
    fallback = PlanPool(P, prep.greedy, "greedy")  # the checker's fallback: the whole queue's dispatch
    fallback.randomized_runs, fallback.search = pool.randomized_runs, pool.search  # for the statistics
    result = check_and_finalise(run, prep, fallback, bounds, outcome, choice, search_s)
    return replace(result, stats={**result.stats, "tiers": step_stats, "gap_tier": gap_tier})


def active_requests(requests: Sequence[RequestSpec]) -> list[RequestSpec]:
    """The requests the planner considers, each with a unique id (max id + 1, ... where missing)."""
    reqs = [r for r in requests if r.status in ACTIVE_STATUSES]
    used = {r.id for r in reqs if r.id is not None}
    nxt = max(used, default=0) + 1
    out = []
    for r in reqs:
        if r.id is None:
            while nxt in used:
                nxt += 1
            r = r.with_(id=nxt)
            used.add(nxt)
        out.append(r)
    return out


def prepare_problem(run: _Build, reqs: list[RequestSpec], program_weights, cond: ConditionsGrid,
                    sky, feasibility, static) -> Prepared:
    """Stage 1: sky grid, feasibility, the Problem, and the greedy dispatch (baseline and floor)."""
    config, night, opts = run.config, run.night, run.options
    t0 = time.perf_counter()
    run.say(f"sky: {len(reqs)} requests")
    sky_grid, rows = _sky_rows(sky, config, night, reqs)
    run.timings["sky"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    run.say("feasibility")
    if feasibility is None:
        feasibility = _evaluate(reqs, rows, sky_grid, cond, config, static)
    run.timings["feasibility"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    run.say("value")
    factors = request_value_factors(run, reqs, program_weights, feasibility)
    run.timings["value"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    run.say("model")
    step = int(night.step_s)
    prev = one_in_progress(entries_on_grid(opts.previous_entries, night), run.now_step, step) if opts.previous_entries else []
    freeze_min = config.planning.freeze_horizon_min if opts.freeze_horizon_min is None else opts.freeze_horizon_min
    problem = build_problem(
        config, reqs, program_weights, feasibility, sky_grid.alt_deg[rows], sky_grid.az_deg[rows], step_s=step,
        now_step=run.now_step, previous=prev, freeze_steps=int(math.ceil(freeze_min * 60 / step)),
        bucket_steps=opts.bucket_steps, factors=factors)
    tables = dispatch_tables(problem)
    greedy = greedy_plan(problem, tables=tables)
    run.timings["model"] = time.perf_counter() - t0
    return Prepared(reqs, sky_grid, rows, feasibility, cond, prev, problem, tables, greedy,
                    plan_value(problem, greedy))


def request_value_factors(run: _Build, reqs: list[RequestSpec], programs, feasibility):
    """Every request's value factors but merit: its remaining opportunities (tonight from the
    planning grid, the later nights from the multi-night count), urgency, tier, balance."""
    config, opts = run.config, run.options
    if opts.opportunities is not None:
        later = np.array([int(opts.opportunities.get(int(r.id), 0)) for r in reqs], dtype=np.int64)
    else:
        cache = opts.opportunity_cache if opts.opportunity_cache is not None else SHARED_CACHE
        later = count_opportunities(config, reqs, run.night.date, cache=cache).future()
    tonight = np.asarray(feasibility.start_ok)[:, run.now_step:].any(axis=1)
    return value_factors(config, reqs, programs, tonight.astype(np.int64) + later)


def search_for_plans(run: _Build, prep: Prepared) -> tuple[PlanPool, LagrangianResult]:
    """Stage 2: randomized dispatch, the previous plan filled around (re-planning), then
    ruin-and-recreate from the best, stopping once within the gap tolerance of a first
    time-indexed bound (returned too: the bound stage starts from it)."""
    P, budget = prep.problem, run.budget
    run.say("hint search")
    pool = PlanPool(P, prep.greedy, "greedy")
    b = budget.randomized_dispatch()
    rnd, pool.randomized_runs = randomized_dispatch(P, runs=b.iterations, time_limit_s=b.time_limit_s,
                                                    seed=run.seed, tables=prep.tables)
    pool.consider("randomized dispatch", rnd)
    if prep.previous:
        # the previous plan seeds the search: its still-feasible part, with the dispatch filling
        # what the change left empty (alone it would lose to any full plan and never be improved)
        pool.consider("previous plan", greedy_plan(P, keep=_previous_hint(P, prep.previous), tables=prep.tables))
    b = budget.lagrangian()
    first = lagrangian_bound(P, pool.value, iterations=b.iterations, time_limit_s=b.time_limit_s)
    b = budget.ruin_and_recreate()
    pool.search = RuinAndRecreate(P, pool.plan, seed=run.seed, tables=prep.tables)
    pool.search.run(b.iterations, b.time_limit_s, stop_at=(1.0 - run.gap_tolerance) * first.bound)
    pool.consider(pool.label + " + ruin-and-recreate", pool.search.best)
    return pool, first


def bound_objective(run: _Build, prep: Prepared, pool: PlanPool, first: LagrangianResult) -> Bounds:
    """Stage 3: the time-indexed bound again (a better target gives better steps), then the
    sequence bound from its prices. A bound below a plan in hand would be a bug: it is ignored
    and reported."""
    P, budget = prep.problem, run.budget
    b = budget.lagrangian()
    second = lagrangian_bound(P, pool.value, iterations=b.iterations, time_limit_s=b.time_limit_s)
    lag = second if second.bound < first.bound else first
    b = budget.sequence(cpsat_next=budget.cpsat_can_pay(model_size(P, run.options.k_best_arcs)))
    # the bound stops once it proves half the gap tolerance: the reported gap then has a margin

    def near_plan(pairs) -> int:
        """A sequence of the column generation, made into a plan for the pool."""
        pool.consider("column generation", plan_from_sequence(P, pairs, prep.tables))
        return pool.value

    seq = sequence_bound(P, pool.value, mu0=lag.reduced, sectors=16, iterations=b.iterations,
                         time_limit_s=b.time_limit_s, stop_gap=0.5 * run.gap_tolerance,
                         start_plan=[(p.exec_index, p.start) for p in pool.plan], on_sequence=near_plan)
    upper = min(lag.bound, seq.bound)
    if upper < pool.value:
        warning = f"bound {upper / VALUE_SCALE:.3f} below plan {pool.value / VALUE_SCALE:.3f}; ignored"
        return Bounds(lag, seq.bound, seq.iterations, max(lag.bound, pool.value), warning, seq.columns, seq.cuts,
                      seq.prices)
    return Bounds(lag, seq.bound, seq.iterations, upper, None, seq.columns, seq.cuts, seq.prices)


def cpsat_pays(run: _Build, prep: Prepared, pool: PlanPool, bounds: Bounds) -> bool:
    """Stage 4a: run CP-SAT only where it can improve the plan: something to optimise, the gap
    not already within the tolerance, and a model small enough for the time left (wall clock)
    or small enough outright (effort; solve/budget.py has the measured costs). The decision
    and its reason go to stats["cpsat"]."""
    P = prep.problem
    if not P.execs:
        run.cpsat_decision = "skipped: nothing to optimise"
        return False
    if bounds.upper - pool.value <= run.gap_tolerance * abs(bounds.upper):
        run.cpsat_decision = "skipped: the searches' plan is within the gap tolerance of the bound"
        return False
    size = model_size(P, run.options.k_best_arcs)
    if not run.budget.cpsat_can_pay(size):
        left = "" if run.budget.deterministic else f" with {run.budget.left():.1f} s left"
        run.cpsat_decision = f"skipped: model of about {size} literals too large{left}"
        return False
    run.cpsat_decision = f"ran (model of about {size} literals)"
    return True


def search_more(run: _Build, prep: Prepared, pool: PlanPool, bounds: Bounds) -> None:
    """Stage 4b, when CP-SAT does not run: the ruin-and-recreate search goes on where it stopped
    (same trajectory; from the pool's plan if something else found better) with the time (or
    effort) CP-SAT would have had, until within the gap tolerance of the bound."""
    b = run.budget.ruin_and_recreate_2()
    if not prep.problem.execs or pool.search is None or (b.time_limit_s is not None and b.time_limit_s <= 0.0):
        return
    run.say("more ruin-and-recreate")
    pool.search.adopt(pool.plan)
    pool.search.run(b.iterations, b.time_limit_s, stop_at=(1.0 - run.gap_tolerance) * bounds.upper)
    label = pool.label if pool.label.endswith("ruin-and-recreate") else pool.label + " + ruin-and-recreate"
    pool.consider(label, pool.search.best)


def optimise_with_cpsat(run: _Build, prep: Prepared, pool: PlanPool, bounds: Bounds | None, *, share: float = 1.0,
                        objective_tier: int | None = None, floors: dict[int, int] | None = None) -> SolveOutcome | None:
    """Stage 4: CP-SAT on the whole model, hinted with the best plan so far and capped by the
    bound. None when there is nothing to optimise. With a time limit it must answer by the
    build's search deadline, its limit set once its model is built (cpsat.solve_problem).
    share < 1: this solve takes that share of the time left (one step of the strict-tier
    solve; deterministic work is not shared, each step does the effort's amount);
    objective_tier / floors: that step (cpsat.build_model)."""
    run.say(f"greedy objective {prep.greedy_value / VALUE_SCALE:.3f}; solving"
            + (f" tier {objective_tier}" if objective_tier is not None else ""))
    if not prep.problem.execs:
        return None
    limits = run.budget.cpsat()
    if share < 1.0 and limits.deadline is not None:
        limits = replace(limits, deadline=time.perf_counter() + share * run.budget.left())
    run.cpsat_budget = limits
    pool.before_cpsat = pool.value
    opts = run.options
    model_s = [0.0]
    outcome = solve_problem(
        prep.problem, time_limit_s=limits.time_limit_s, deterministic_time_s=limits.deterministic_time_s,
        gap_tolerance=run.gap_tolerance, hint=pool.plan, k_best=opts.k_best_arcs,
        upper_bound=max(bounds.upper, pool.value) if bounds is not None else None, num_workers=opts.num_workers,
        seed=run.seed, progress=opts.progress, model_timer=lambda s: model_s.__setitem__(0, s),
        objective_tier=objective_tier, floors=floors, deadline=limits.deadline)
    run.timings["model"] += model_s[0]
    return outcome


def choose_plan(prep: Prepared, pool: PlanPool, bounds: Bounds, outcome: SolveOutcome | None,
                cpsat_decision: str = "") -> Choice:
    """Stage 5: CP-SAT's plan when it is at least the floor, else the floor: the best
    model-feasible plan of the searches (the greedy or better). On a re-plan that is the one
    seeded by the previous plan, so a short budget never throws the plan's stability away.
    When CP-SAT did not run (cpsat_pays), the searches' plan is the answer, with the
    relaxations' bound: status OPTIMAL when it meets the bound, else FEASIBLE."""
    floor = pool.value / VALUE_SCALE
    if outcome is not None and outcome.status in ("OPTIMAL", "FEASIBLE") and outcome.objective >= floor - 1e-9:
        status = outcome.status if prep.problem.execs else "EMPTY"
        return Choice(outcome.placements, status, outcome.objective, outcome.bound, outcome.gap, False)
    if outcome is None:
        bound = max(bounds.upper / VALUE_SCALE, floor)
        gap = (bound - floor) / max(abs(bound), 1e-9) if prep.problem.execs else 0.0
        message = (f"CP-SAT {cpsat_decision}; plan from the searches ({pool.label})" if prep.problem.execs
                   else "nothing to optimise")
        status = ("OPTIMAL" if bound - floor < 1.0 / VALUE_SCALE else "FEASIBLE") if prep.problem.execs else "EMPTY"
        return Choice(pool.plan, status, floor, bound, gap, False, message)
    else:
        bound = max(min(outcome.bound, bounds.upper / VALUE_SCALE), floor)
        gap = (bound - floor) / max(abs(bound), 1e-9)
        message = (f"CP-SAT returned {outcome.status} with objective {outcome.objective:.3f} below "
                   f"{floor:.3f}: {pool.kept_what()}" if outcome.status in ("OPTIMAL", "FEASIBLE")
                   else f"CP-SAT returned {outcome.status}: {pool.kept_what()}")
    status = "GREEDY" if prep.problem.execs else "EMPTY"
    return Choice(pool.plan, status, floor, bound, gap, True, message)


def check_and_finalise(run: _Build, prep: Prepared, pool: PlanPool, bounds: Bounds, outcome: SolveOutcome | None,
                       choice: Choice, search_s: float) -> PlanResult:
    """Stage 6: entries with their predicted values, the independent checker (a failing CP-SAT
    plan falls back to the floor; as a last resort the entries it names are dropped), the
    reasons for what is not planned, and the result."""
    t0 = time.perf_counter()
    choice, entries, violations, dropped = _checked(run, prep, pool, choice)
    run.timings["check"] = time.perf_counter() - t0
    stab = objective_of(prep.problem, choice.plan)[1]
    return PlanResult(
        entries=tuple(entries), unscheduled=tuple(sorted(_unscheduled(prep.problem, entries, dropped))),
        solver_status=choice.status, objective=float(choice.objective), bound=float(choice.bound),
        gap=float(choice.gap), runtime_s=float(outcome.runtime_s if outcome else 0.0),
        greedy_objective=float(prep.greedy_value / VALUE_SCALE), used_greedy=choice.used_greedy,
        timings=run.timings, violations=tuple(violations),
        stability_bonus=float(stab / VALUE_SCALE) if not dropped else 0.0, now_step=run.now_step,
        message=choice.message, stats=_stats(run, prep, pool, bounds, outcome, len(entries), search_s),
    )


def _checked(run: _Build, prep: Prepared, pool: PlanPool, choice: Choice):
    """(choice, entries, violations, dropped) after the checker has had its say."""
    config, now_step = run.config, run.now_step
    spec_by_id = {int(r.id): r for r in prep.requests}
    row_by_id = {int(r.id): int(prep.rows[i]) for i, r in enumerate(prep.requests)}

    def entries_and_violations(plan):
        entries = _entries(prep.problem, plan, prep.feasibility, prep.sky, prep.rows, prep.cond, config, run.night)
        return entries, check_plan(entries, spec_by_id, row_by_id, prep.sky, prep.cond, config, now_step=now_step)

    entries, violations = entries_and_violations(choice.plan)
    if violations and not choice.used_greedy:
        message = f"CP-SAT plan failed the checker ({violations[0]}); {pool.kept_what()}"
        choice = replace(choice, plan=pool.plan, status="GREEDY", objective=pool.value / VALUE_SCALE,
                         used_greedy=True, message=message)
        entries, violations = entries_and_violations(pool.plan)
    dropped: list[tuple[int, str]] = []
    if violations:
        entries, violations, dropped = _drop_failing(entries, violations, spec_by_id, row_by_id, prep.sky,
                                                     prep.cond, config, now_step)
        message = (choice.message + "; " if choice.message else "") + f"checker removed {len(dropped)} entries"
        choice = replace(choice, objective=sum(e.value for e in entries), message=message)
    return choice, entries, violations, dropped


def _unscheduled(problem: Problem, entries: Sequence[PlanEntry], dropped: list[tuple[int, str]]) -> list[tuple[int, str]]:
    """(request id, reason) for every request not fully planned."""
    planned: dict[int, int] = {}
    for e in entries:
        planned[e.request_id] = planned.get(e.request_id, 0) + 1
    out: list[tuple[int, str]] = list(problem.dropped_fixed) + dropped
    out += list(problem.unscheduled.items())
    for i, spec in enumerate(problem.requests):
        rid = int(problem.request_ids[i])
        n = planned.get(rid, 0)
        want = spec.remaining_repeats
        if n == 0:
            out.append((rid, "displaced"))
        elif n < want:
            out.append((rid, f"displaced ({n} of {want} executions planned)"))
    return out


def _stats(run: _Build, prep: Prepared, pool: PlanPool, bounds: Bounds, outcome: SolveOutcome | None,
           n_entries: int, search_s: float) -> dict:
    """Model size, where the plan came from, the bounds, the work done and the limits used."""
    P, lag, cp = prep.problem, bounds.lagrangian, run.cpsat_budget
    return {
        "requests": len(prep.requests), "in_model": len(P.requests), "executions": len(P.execs),
        "arcs": outcome.n_arcs if outcome else 0, "buckets": outcome.n_buckets if outcome else 0,
        "hint": pool.label, "hint_objective": pool.value / VALUE_SCALE, "lagrangian_bound": lag.bound / VALUE_SCALE,
        "sequence_bound": bounds.sequence / VALUE_SCALE if bounds.sequence_iterations else None,
        "sequence_bound_iterations": bounds.sequence_iterations,
        "sequence_columns": bounds.columns, "sequence_cuts": bounds.cuts, "sequence_prices": bounds.prices,
        **({"bound_warning": bounds.warning} if bounds.warning else {}),
        "lagrangian_iterations": lag.iterations, "hint_search_s": search_s, "randomized_runs": pool.randomized_runs,
        "ruin_recreate_iterations": pool.ruin_recreate_iterations, "greedy_entries": len(prep.greedy),
        "entries": n_entries, "now_step": run.now_step,
        "time_limit_s": None if run.budget.deterministic else run.budget.time_limit_s,
        "solver_time_limit_s": cp.time_limit_s if cp else None, "gap_tolerance": run.gap_tolerance,
        "effort": run.budget.effort, "seed": run.seed,
        "solver_deterministic_limit": cp.deterministic_time_s if cp else None,
        "solver_deterministic_time": outcome.deterministic_s if outcome else 0.0,
        "cpsat": run.cpsat_decision,
        "cpsat_improved": bool(outcome is not None and pool.before_cpsat is not None
                               and outcome.status in ("OPTIMAL", "FEASIBLE")
                               and outcome.objective * VALUE_SCALE > pool.before_cpsat + 0.5),
        "cpsat_gain": (max(0.0, outcome.objective - pool.before_cpsat / VALUE_SCALE)
                       if outcome is not None and pool.before_cpsat is not None
                       and outcome.status in ("OPTIMAL", "FEASIBLE") else 0.0),
        "budget_elapsed_s": run.budget.elapsed(),
    }


FEASIBILITY_CHUNK = 1000  # requests evaluated at once: bounds the intermediates' memory on big queues


def _evaluate(reqs, rows, sky_grid, cond, config, static):
    """Feasibility of every request, in chunks of requests when there is no precomputed static
    layer (each request's row depends only on its own target and limits), written into arrays
    allocated once, so the peak memory of a 10,000-request queue stays near the result's size."""
    from dataclasses import fields

    from scheduler.constraints.feasibility import Feasibility, evaluate
    n = len(reqs)
    if static is not None or n <= FEASIBILITY_CHUNK:
        return evaluate(reqs, rows, sky_grid, cond, config, static)
    out: dict[str, np.ndarray] = {}
    for a in range(0, n, FEASIBILITY_CHUNK):
        b = min(n, a + FEASIBILITY_CHUNK)
        part = evaluate(reqs[a:b], rows[a:b], sky_grid, cond, config)
        for f in fields(Feasibility):
            x = getattr(part, f.name)
            if f.name not in out:
                out[f.name] = np.empty((n,) + x.shape[1:], dtype=x.dtype)
            out[f.name][a:b] = x
        del part
    return Feasibility(**out)


def target_rows_for(requests: Sequence[RequestSpec]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(ra, dec) of each distinct target, and each request's row among them (moving targets are
    told apart by their track; their ra/dec here are only listed positions: use sky_for)."""
    ra, dec, _, rows = distinct_targets(requests)
    return ra, dec, rows


def _sky_rows(sky, config: ObservatoryConfig, night: Night, requests: Sequence[RequestSpec]):
    """A SkyGrid covering the requests' targets and each request's row in it."""
    return sky_for(config.site, night, requests, sky)


def entries_on_grid(entries: Sequence[PlanEntry], night: Night) -> list[PlanEntry]:
    """Previous entries with grid steps recomputed from their times (storage does not keep steps).

    An entry that began before the grid's first step and is still running is held from step 0:
    the grid has no earlier step to start it on (a negative step would index the night from its
    end), and only what is left of it matters to a re-plan.

    An entry off the grid (stored under another step, or moved by hand) starts on the step it
    falls in and keeps its whole length in steps, rounded up: rounding its start and end to the
    nearest step each could make it a step shorter than its exposure."""
    t0, step = float(night.times_unix[0]), float(night.step_s)
    out = []
    for e in entries:
        s = int(math.floor((e.start.timestamp() - t0) / step + 1e-6))
        en = s + int(math.ceil((e.end.timestamp() - e.start.timestamp()) / step - 1e-6))
        if en <= 0 or s >= night.n_times:
            continue
        out.append(replace(e, start_step=max(s, 0), end_step=min(en, night.n_times)))
    return out


def one_in_progress(entries: Sequence[PlanEntry], now_step: int, step_s: int) -> list[PlanEntry]:
    """At most one entry in progress: a telescope observes one thing at a time, so where a
    damaged or hand-edited plan has several begun before now and running past it, the one begun
    last is at the telescope and each earlier one ended when the next began (its end moves
    there; if that is before now it is no longer in progress)."""
    running = sorted((e for e in entries if e.start_step < now_step < e.end_step), key=lambda e: e.start_step)
    if len(running) < 2:
        return list(entries)
    ends = {id(a): b.start_step for a, b in zip(running, running[1:])}
    out = []
    for e in entries:
        if id(e) in ends:
            new_end = max(ends[id(e)], e.start_step + 1)
            e = replace(e, end_step=new_end, end=e.start + timedelta(seconds=(new_end - e.start_step) * step_s))
        out.append(e)
    return out


def _previous_hint(problem: Problem, previous: Sequence[PlanEntry]) -> list[Placement]:
    """The previous plan mapped onto tonight's model, keeping only what is still model-feasible."""
    cand = []
    for j, ex in enumerate(problem.execs):
        s = ex.fixed_start if ex.fixed_start is not None else ex.prev_start
        if s is not None and (ex.in_progress or np.any(ex.starts == s)):
            cand.append(Placement(j, int(s)))
    cand.sort(key=lambda p: p.start)
    kept: list[Placement] = []
    for p in cand:
        if not check_model_feasible(problem, kept + [p]):
            kept.append(p)
    return kept


def _entries(problem: Problem, plan: Sequence[Placement], feas, sky: SkyGrid, sky_rows: np.ndarray,
             cond: ConditionsGrid, config: ObservatoryConfig, night: Night) -> list[PlanEntry]:
    out: list[PlanEntry] = []
    step = night.step_s
    prev = None
    for p in sorted(plan, key=lambda p: p.start):
        ex = problem.execs[p.exec_index]
        spec = problem.requests[ex.req]
        r = int(problem.feas_rows[ex.req])
        row = int(sky_rows[r])
        s, e = p.start, p.start + ex.duration
        inst = config.instrument_for(spec.band, spec.instrument)
        start_t = float(night.times_unix[s])
        entry = PlanEntry(
            request_id=int(problem.request_ids[ex.req]), execution=ex.k,
            start=utc(start_t), end=utc(start_t + ex.duration * step), start_step=s, end_step=e,
            slew_s=0.0, transition_s=0.0, setup_s=float(inst.setup_s),
            airmass_start=float(sky.airmass[row, s]), airmass_end=float(sky.airmass[row, e - 1]),
            predicted_fwhm_arcsec=float(feas.fwhm_arcsec[r, s]), predicted_pwv_mm=float(cond.pwv_mm[s]),
            transmission=float(feas.transmission[r, s]), merit=float(feas.merit[r, s]),
            moon_sep_deg=float(sky.moon_sep_deg[row, s]), value=ex.coef_at(s) / VALUE_SCALE,
            program=spec.program, target=spec.target, band=spec.band, instrument=inst.name,
            fixed=ex.fixed_start is not None, **_entry_factors(problem, ex.req),
            **_entry_physics(sky, row, s, feas, r),
        )
        if prev is not None:
            pe, pspec, prow = prev
            a1, z1 = sky.alt_deg[prow, min(pe.end_step, night.n_times - 1)], sky.az_deg[prow, min(pe.end_step, night.n_times - 1)]
            a2, z2 = sky.alt_deg[row, s], sky.az_deg[row, s]
            entry = replace(entry, slew_s=float(_slew_s(config, a1, z1, a2, z2)),
                            transition_s=true_transition_s(config, sky, pe, pspec, prow, entry, spec, row))
        out.append(entry)
        prev = (entry, spec, row)
    return out


def _entry_factors(problem: Problem, req: int) -> dict:
    f = problem.factors
    if f is None:
        return {}
    return {"tier": int(f.tier[req]), "urgency": float(f.urgency[req]),
            "opportunities_left": int(f.opportunities_left[req]), "balance": float(f.balance[req])}


def _entry_physics(sky: SkyGrid, row: int, s: int, feas, r: int) -> dict:
    """Position at the entry's start (a moving target's own), predicted Strehl and dish efficiency."""
    ra, dec = sky.position_deg(row, s)
    strehl = None if feas.strehl is None else float(feas.strehl[r, s])
    surface = None if feas.surface_eff is None else float(feas.surface_eff[r, s])
    return dict(ra_deg=ra, dec_deg=dec,
                strehl=strehl if strehl is not None and math.isfinite(strehl) else None,
                surface_efficiency=surface if surface is not None and surface < 1.0 else None)


def _drop_failing(entries, violations, spec_by_id, row_by_id, sky, cond, config, now_step):
    """Last resort: remove the entries the checker names until the plan passes."""
    entries = list(entries)
    dropped: list[tuple[int, str]] = []
    for _ in range(len(entries) + 1):
        if not violations:
            break
        rid, k = getattr(violations[0], "request_id", None), getattr(violations[0], "execution", None)
        if rid is None or k is None:
            break
        keep = [e for e in entries if not (e.request_id == rid and e.execution == k)]
        if len(keep) == len(entries):
            break
        entries = keep
        dropped.append((rid, "dropped: failed the plan check (" + violations[0].split(": ", 1)[-1][:80] + ")"))
        violations = check_plan(entries, spec_by_id, row_by_id, sky, cond, config, now_step=now_step)
    return entries, violations, dropped
