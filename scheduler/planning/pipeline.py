"""The pure orchestration: requests + night + conditions -> a checked night plan.

config + queue + conditions -> sky grid -> feasibility -> problem -> greedy + CP-SAT -> plan
-> independent checker. No database, no files, no clock: ``now`` is an argument. Used by the
CLI, the service, the demo and the benchmark.

PlanEntry and PlanResult (the contract for storage and reports) are defined in
scheduler/solve/problem.py and re-exported here.
"""

from __future__ import annotations

import math
import time
from datetime import datetime
from typing import Callable, Sequence

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import ACTIVE_STATUSES, RequestSpec
from scheduler.sky.ephemeris import SkyGrid
from scheduler.sky.night import Night
from scheduler.solve.checker import check_plan, true_transition_s
from scheduler.solve.cpsat import lagrangian_bound, sequence_bound, solve_problem
from scheduler.solve.greedy import dense_tables, greedy_plan, insertion_plan, randomized_dispatch, ruin_and_recreate
from scheduler.model.plan import PlanEntry, PlanResult
from scheduler.solve.objective import VALUE_SCALE
from scheduler.solve.problem import Placement, Problem, build_problem, check_model_feasible, objective_of
from scheduler.solve.transitions import slew_s as _slew_s
from scheduler.model.timegrid import utc

__all__ = ["build_plan", "PlanEntry", "PlanResult", "target_rows_for"]


def target_rows_for(requests: Sequence[RequestSpec]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(ra, dec) of each distinct target, and each request's row among them."""
    keys = [(float(r.ra_deg), float(r.dec_deg)) for r in requests]
    uniq = list(dict.fromkeys(keys))
    pos = {k: i for i, k in enumerate(uniq)}
    ra = np.array([k[0] for k in uniq], dtype=np.float64)
    dec = np.array([k[1] for k in uniq], dtype=np.float64)
    return ra, dec, np.array([pos[k] for k in keys], dtype=np.int64)


def _sky_rows(sky, config: ObservatoryConfig, night: Night, requests: Sequence[RequestSpec]):
    """A SkyGrid covering the requests' targets and each request's row in it."""
    ra, dec, rows = target_rows_for(requests)
    if sky is None:
        from scheduler.sky.ephemeris import compute_sky
        return compute_sky(config.site, night, ra, dec), rows
    if isinstance(sky, SkyGrid):
        index = {(float(a), float(d)): i for i, (a, d) in enumerate(zip(sky.ra_deg, sky.dec_deg))}
        try:
            where = np.array([index[(float(a), float(d))] for a, d in zip(ra, dec)], dtype=np.int64)
        except KeyError as e:
            raise ValueError(f"sky grid has no row for target at (ra, dec) = {e.args[0]}") from None
        return sky, where[rows]
    return sky.get(config.site, night, ra, dec), rows  # a SkyCache


def entries_on_grid(entries: Sequence[PlanEntry], night: Night) -> list[PlanEntry]:
    """Previous entries with grid steps recomputed from their times (storage does not keep steps)."""
    from dataclasses import replace
    t0, step = float(night.times_unix[0]), float(night.step_s)
    out = []
    for e in entries:
        s = int(round((e.start.timestamp() - t0) / step))
        en = int(round((e.end.timestamp() - t0) / step))
        if en <= 0 or s >= night.n_times:
            continue
        out.append(replace(e, start_step=s, end_step=min(en, night.n_times)))
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
            fixed=ex.fixed_start is not None,
        )
        if prev is not None:
            pe, pspec, prow = prev
            a1, z1 = sky.alt_deg[prow, min(pe.end_step, night.n_times - 1)], sky.az_deg[prow, min(pe.end_step, night.n_times - 1)]
            a2, z2 = sky.alt_deg[row, s], sky.az_deg[row, s]
            from dataclasses import replace
            entry = replace(entry, slew_s=float(_slew_s(config, a1, z1, a2, z2)),
                            transition_s=true_transition_s(config, sky, pe, pspec, prow, entry, spec, row))
        out.append(entry)
        prev = (entry, spec, row)
    return out


def build_plan(config: ObservatoryConfig, requests: list[RequestSpec], program_weights: dict[str, float],
               night: Night, cond: ConditionsGrid, *, sky=None, now: datetime | None = None,
               previous_entries: Sequence[PlanEntry] | None = None, time_limit_s: float | None = None,
               gap_tolerance: float | None = None, progress: Callable[[str], None] | None = None,
               feasibility=None, static=None, num_workers: int | None = None,
               k_best_arcs: int = 10, bucket_steps: int = 10) -> PlanResult:
    """Build a checked night plan.

    sky: a SkyGrid holding every request's target, or a SkyCache, or None (computed here).
    now: re-plan from this time (nothing new starts before it; the entry in progress is kept).
    previous_entries: the active plan, for the in-progress entry, the freeze horizon
      (config.planning.freeze_horizon_min), the stability bonus and the hint.
    time_limit_s: wall-clock budget for the whole build (default config.planning.time_limit_s);
      CP-SAT gets what is left after sky, feasibility and model, less a small margin (at least 1 s).
    gap_tolerance: stop once the proven relative gap is below this (default config.planning.gap_tolerance).
    feasibility / static: precomputed Feasibility (rows = requests after filtering) or the
      feasibility static layer, to reuse on a re-plan.
    """
    t_start = time.perf_counter()
    say = progress or (lambda _msg: None)
    limit = float(config.planning.time_limit_s if time_limit_s is None else time_limit_s)
    tol = float(config.planning.gap_tolerance if gap_tolerance is None else gap_tolerance)
    timings = {"sky": 0.0, "feasibility": 0.0, "model": 0.0, "solve": 0.0, "check": 0.0}
    step = int(night.step_s)
    now_step = 0 if now is None else night.step_of(now)

    # Requests the planner considers; ids must be unique (assign where missing).
    reqs = [r for r in requests if r.status in ACTIVE_STATUSES]
    used = {r.id for r in reqs if r.id is not None}
    nxt = max(used, default=0) + 1
    fixed_ids = []
    for r in reqs:
        if r.id is None:
            while nxt in used:
                nxt += 1
            fixed_ids.append(r.with_(id=nxt))
            used.add(nxt)
        else:
            fixed_ids.append(r)
    reqs = fixed_ids
    prev = entries_on_grid(previous_entries, night) if previous_entries else []

    if not reqs:
        return PlanResult((), (), "EMPTY", 0.0, 0.0, 0.0, 0.0, 0.0, False, timings, (), now_step=now_step,
                          message="no active requests")

    t0 = time.perf_counter()
    say(f"sky: {len(reqs)} requests")
    sky_grid, rows = _sky_rows(sky, config, night, reqs)
    timings["sky"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    say("feasibility")
    if feasibility is None:
        from scheduler.constraints.feasibility import evaluate
        feasibility = evaluate(reqs, rows, sky_grid, cond, config, static)
    feas = feasibility
    timings["feasibility"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    say("model")
    problem = build_problem(
        config, reqs, program_weights, feas, sky_grid.alt_deg[rows], sky_grid.az_deg[rows], step_s=step,
        now_step=now_step, previous=prev, freeze_steps=int(math.ceil(config.planning.freeze_horizon_min * 60 / step)),
        bucket_steps=bucket_steps)
    greedy = greedy_plan(problem)
    g_sci, g_stab = objective_of(problem, greedy)
    timings["model"] = time.perf_counter() - t0
    t0 = time.perf_counter()  # the hint search is optimisation: counted in "solve"
    say("hint search")
    hint, hint_from, hint_obj = greedy, "greedy", g_sci + g_stab
    rnd, n_rnd = randomized_dispatch(problem, runs=400, time_limit_s=max(0.2, 0.1 * limit))
    candidates = [("randomized dispatch", rnd)]
    if prev:
        # the previous plan seeds the search: its still-feasible part, with the dispatch filling
        # what the change left empty (alone it would lose to any full plan and never be improved)
        candidates.append(("previous plan", greedy_plan(problem, keep=_previous_hint(problem, prev))))

    def consider(label, plan_c):
        nonlocal hint, hint_from, hint_obj
        val = sum(objective_of(problem, plan_c))
        if val > hint_obj and not check_model_feasible(problem, plan_c):
            hint, hint_from, hint_obj = plan_c, label, val

    for label, plan_c in candidates:
        consider(label, plan_c)
    lag = lagrangian_bound(problem, hint_obj, time_limit_s=max(0.2, 0.05 * limit))
    rr, n_rr = ruin_and_recreate(problem, hint, iterations=10**6,
                                 time_limit_s=max(0.3, 0.45 * (limit - (time.perf_counter() - t_start))),
                                 stop_at=(1.0 - tol) * lag.bound)
    consider(hint_from + " + ruin-and-recreate", rr)
    lag2 = lagrangian_bound(problem, hint_obj, time_limit_s=max(0.2, 0.05 * limit))  # better target, better steps
    if lag2.bound < lag.bound:
        lag = lag2
    seq_bound, seq_its = sequence_bound(problem, hint_obj, mu0=lag.reduced, sectors=16, iterations=60,
                                        time_limit_s=max(0.3, 0.12 * limit))
    upper = min(lag.bound, seq_bound)
    bound_warning = None
    if upper < hint_obj:  # a bound below a plan we hold would be a bug: fall back, and say so
        bound_warning = f"bound {upper / VALUE_SCALE:.3f} below plan {hint_obj / VALUE_SCALE:.3f}; ignored"
        upper = max(lag.bound, hint_obj)
    consider("price-guided insertion", insertion_plan(problem, lag.order, lag.preferred, dense_tables(problem)[1]))
    search_s = time.perf_counter() - t0
    say(f"greedy objective {(g_sci + g_stab) / VALUE_SCALE:.3f}; solving")

    # CP-SAT overruns its limit by a few hundred ms on big models (loading, response): keep a margin
    budget = max(1.0, 0.9 * (limit - (time.perf_counter() - t_start)) - 0.3)
    model_s = [0.0]
    outcome = None
    if problem.execs:
        outcome = solve_problem(problem, time_limit_s=budget, gap_tolerance=tol, hint=hint, k_best=k_best_arcs,
                                upper_bound=max(upper, hint_obj),
                                num_workers=num_workers, progress=progress,
                                model_timer=lambda s: model_s.__setitem__(0, s))
        timings["model"] += model_s[0]
    timings["solve"] = search_s + (outcome.runtime_s if outcome else 0.0)
    greedy_obj = (g_sci + g_stab) / VALUE_SCALE
    # The floor is the best model-feasible plan of the hint search (the greedy or better): on a
    # re-plan it is the one seeded by the previous plan, so falling back to the plain greedy
    # would throw the plan's stability away whenever CP-SAT finds nothing in a short budget.
    fallback, fallback_obj = hint, hint_obj / VALUE_SCALE
    kept_what = "greedy plan kept" if hint_from == "greedy" else f"best heuristic plan kept ({hint_from})"
    used_greedy = False
    message = ""
    if outcome is not None and outcome.status in ("OPTIMAL", "FEASIBLE") and outcome.objective >= fallback_obj - 1e-9:
        plan, status = outcome.placements, outcome.status
        objective, bound, gap = outcome.objective, outcome.bound, outcome.gap
    else:
        plan, status, used_greedy = fallback, "GREEDY", True
        objective = fallback_obj
        if outcome is None:
            bound, gap = objective, 0.0
            message = "nothing to optimise"
        else:
            bound = max(min(outcome.bound, upper / VALUE_SCALE), objective)
            gap = (bound - objective) / max(abs(bound), 1e-9)
            message = (f"CP-SAT returned {outcome.status} with objective {outcome.objective:.3f} below "
                       f"{fallback_obj:.3f}: {kept_what}" if outcome.status in ("OPTIMAL", "FEASIBLE")
                       else f"CP-SAT returned {outcome.status}: {kept_what}")
    if not problem.execs:
        status = "EMPTY"

    t0 = time.perf_counter()
    entries = _entries(problem, plan, feas, sky_grid, rows, cond, config, night)
    spec_by_id = {int(r.id): r for r in reqs}
    row_by_id = {int(r.id): int(rows[i]) for i, r in enumerate(reqs)}
    violations = check_plan(entries, spec_by_id, row_by_id, sky_grid, cond, config, now_step=now_step)
    dropped: list[tuple[int, str]] = []
    if violations and not used_greedy:
        g_entries = _entries(problem, fallback, feas, sky_grid, rows, cond, config, night)
        g_viol = check_plan(g_entries, spec_by_id, row_by_id, sky_grid, cond, config, now_step=now_step)
        message = f"CP-SAT plan failed the checker ({violations[0]}); {kept_what}"
        entries, violations, used_greedy, status, objective = g_entries, g_viol, True, "GREEDY", fallback_obj
        plan = fallback
    if violations:
        entries, violations, dropped = _drop_failing(entries, violations, spec_by_id, row_by_id, sky_grid, cond,
                                                     config, now_step)
        message = (message + "; " if message else "") + f"checker removed {len(dropped)} entries"
        objective = sum(e.value for e in entries)
    timings["check"] = time.perf_counter() - t0

    planned: dict[int, int] = {}
    for e in entries:
        planned[e.request_id] = planned.get(e.request_id, 0) + 1
    unscheduled: list[tuple[int, str]] = list(problem.dropped_fixed) + dropped
    for rid, why in problem.unscheduled.items():
        unscheduled.append((rid, why))
    for i, spec in enumerate(problem.requests):
        rid = int(problem.request_ids[i])
        n = planned.get(rid, 0)
        want = spec.remaining_repeats
        if n == 0:
            unscheduled.append((rid, "displaced"))
        elif n < want:
            unscheduled.append((rid, f"displaced ({n} of {want} executions planned)"))
    stab = sum(problem.stability_coef(p.exec_index) for p in plan
               if problem.execs[p.exec_index].prev_start is not None
               and abs(p.start - problem.execs[p.exec_index].prev_start) <= problem.stability_window)
    stats = {
        "requests": len(reqs), "in_model": len(problem.requests), "executions": len(problem.execs),
        "arcs": outcome.n_arcs if outcome else 0, "buckets": outcome.n_buckets if outcome else 0,
        "hint": hint_from, "hint_objective": hint_obj / VALUE_SCALE, "lagrangian_bound": lag.bound / VALUE_SCALE,
        "sequence_bound": seq_bound / VALUE_SCALE if seq_its else None, "sequence_bound_iterations": seq_its,
        **({"bound_warning": bound_warning} if bound_warning else {}),
        "lagrangian_iterations": lag.iterations, "hint_search_s": search_s, "randomized_runs": n_rnd, "ruin_recreate_iterations": n_rr, "greedy_entries": len(greedy), "entries": len(entries), "now_step": now_step,
        "time_limit_s": limit, "solver_time_limit_s": budget, "gap_tolerance": tol,
    }
    return PlanResult(
        entries=tuple(entries), unscheduled=tuple(sorted(unscheduled)), solver_status=status,
        objective=float(objective), bound=float(bound), gap=float(gap),
        runtime_s=float(outcome.runtime_s if outcome else 0.0), greedy_objective=float(greedy_obj),
        used_greedy=used_greedy, timings=timings, violations=tuple(violations),
        stability_bonus=float(stab / VALUE_SCALE) if not dropped else 0.0, now_step=now_step, message=message,
        stats=stats,
    )


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
