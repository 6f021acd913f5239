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
  ``stability_window`` steps of their start in the previous plan. Maximised.
"""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass
from typing import Callable, Sequence

import numpy as np
from ortools.sat.python import cp_model

from scheduler.solve.objective import VALUE_SCALE
from scheduler.solve.problem import Placement, Problem, objective_of
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
    req = np.array([ex.req for ex in execs])
    dur = np.array([ex.duration for ex in execs])
    first = np.array([ex.starts.min() if ex.fixed_start is None else ex.fixed_start for ex in execs])
    last = np.array([ex.starts.max() if ex.fixed_start is None else ex.fixed_start for ex in execs])
    density = P.base_value[req] / np.maximum(dur, 1)
    fixed = np.array([ex.fixed_start is not None for ex in execs])
    arcs: set[tuple[int, int]] = set()
    for j in range(n_e):
        if execs[j].in_progress:
            continue
        t = P.T[req, req[j]]
        ok = (t < P.tmax[req[j]]) & (first + dur + t <= last[j]) & (np.arange(n_e) != j)
        same = req == req[j]
        ok &= ~same | (np.array([ex.k for ex in execs]) == execs[j].k - 1)
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
                upper_bound: int | None = None) -> tuple[cp_model.CpModel, ModelVars]:
    """The whole CP-SAT model. Pure: reads the Problem's arrays, no I/O.

    upper_bound: a proven bound on the objective (lagrangian_bound); stated as a constraint it
    cuts no solution and lets the gap-based stop work from the first second.
    """
    P = problem
    m = cp_model.CpModel()
    n_e = len(P.execs)
    horizon = P.n_t + int(P.tmax.max(initial=0)) + 1
    present, start, before, buckets, tmin = [], [], [], [], []
    gap_starts: dict[int, object] = {}
    intervals = []
    objective = []
    preds: dict[int, list[int]] = {j: [] for j in range(n_e)}
    for i, j in arcs:
        preds[j].append(i)

    for j, ex in enumerate(P.execs):
        rid = int(P.request_ids[ex.req])
        name = f"r{rid}_x{ex.k}"
        T_in = [int(P.T[P.execs[i].req, ex.req]) for i in preds[j]]
        tmax_j = int(P.tmax[ex.req])
        if ex.in_progress:
            # The entry being observed: kept exactly, no transition before it to model.
            p = m.NewConstant(1)
            s = m.NewConstant(int(ex.fixed_start))
            pre = m.NewConstant(0)
            intervals.append(m.NewIntervalVar(s, ex.duration, s + ex.duration, f"in_progress_{name}"))
            objective.append(int(ex.bucket_coef[0]) * p)
            present.append(p), start.append(s), before.append(pre), buckets.append([]), tmin.append(0)
            continue
        p = m.NewBoolVar(f"run_{name}")
        if ex.fixed_start is not None:
            s = m.NewIntVar(int(ex.fixed_start), int(ex.fixed_start), f"start_{name}")
            m.Add(p == 1)
        else:
            dom = cp_model.Domain.FromIntervals([[int(lo), int(hi)] for lo, hi in consecutive_runs(ex.starts)])
            s = m.NewIntVarFromDomain(dom, f"start_{name}")
        tmin.append(min([tmax_j] + T_in))
        pre = m.NewIntVar(tmin[-1], horizon, f"transition_before_{name}")
        gap_start = m.NewIntVar(-horizon, P.n_t, f"gap_start_{name}")  # = start - transition_before
        gap_starts[j] = gap_start
        intervals.append(m.NewOptionalIntervalVar(gap_start, pre + ex.duration, s + ex.duration, p, f"slot_{name}"))
        # Value: the merit bucket that holds the start.
        lo, hi, coef = ex.bucket_lo, ex.bucket_hi, ex.bucket_coef
        if ex.fixed_start is not None:
            b = int(np.searchsorted(lo, ex.fixed_start, side="right")) - 1
            objective.append(int(coef[b]) * p)
            buckets.append([])
        elif len(lo) == 1:
            objective.append(int(coef[0]) * p)
            buckets.append([])
        else:
            lits = []
            for b in range(len(lo)):
                y = m.NewBoolVar(f"starts_in_bucket_{name}_{b}")
                m.Add(s >= int(lo[b])).OnlyEnforceIf(y)
                m.Add(s <= int(hi[b])).OnlyEnforceIf(y)
                lits.append((y, b))
                objective.append(int(coef[b]) * y)
            m.Add(sum(y for y, _ in lits) == p)
            buckets.append(lits)
        present.append(p), start.append(s), before.append(pre)

    follows: dict[tuple[int, int], object] = {}
    after_gap: dict[int, object] = {}
    succ: dict[int, list] = {i: [] for i in range(n_e)}
    for j, ex in enumerate(P.execs):
        if ex.in_progress:
            continue
        name = f"r{int(P.request_ids[ex.req])}_x{ex.k}"
        g = m.NewBoolVar(f"after_gap_{name}")
        m.Add(before[j] >= int(P.tmax[ex.req])).OnlyEnforceIf(g)
        after_gap[j] = g
        entry = [g]
        for i in preds[j]:
            exi = P.execs[i]
            f = m.NewBoolVar(f"follows_{name}_after_r{int(P.request_ids[exi.req])}_x{exi.k}")
            m.Add(start[j] - before[j] == start[i] + exi.duration).OnlyEnforceIf(f)
            m.Add(before[j] >= int(P.T[exi.req, ex.req])).OnlyEnforceIf(f)
            m.AddImplication(f, present[i])
            follows[(i, j)] = f
            entry.append(f)
            succ[i].append(f)
        m.Add(sum(entry) == present[j])
    for i, lits in succ.items():
        if len(lits) > 1:
            m.Add(sum(lits) <= present[i])

    m.AddNoOverlap(intervals)

    # Repeats of one request: in order, spaced start to start.
    by_req: dict[int, list[int]] = {}
    for j, ex in enumerate(P.execs):
        by_req.setdefault(ex.req, []).append(j)
    for r, js in by_req.items():
        js.sort(key=lambda j: P.execs[j].k)
        for a, b in zip(js, js[1:]):
            gap = max(P.execs[a].duration, int(P.spacing_steps[r]))
            m.AddImplication(present[b], present[a])
            m.Add(start[b] >= start[a] + gap).OnlyEnforceIf(present[b])

    # Stability: stay near the previous plan's start unless the gain is worth more.
    keep: dict[int, object] = {}
    for j, ex in enumerate(P.execs):
        c = P.stability_coef(j)
        if c <= 0:
            continue
        k = m.NewBoolVar(f"keeps_previous_start_r{int(P.request_ids[ex.req])}_x{ex.k}")
        m.AddImplication(k, present[j])
        m.Add(start[j] >= ex.prev_start - P.stability_window).OnlyEnforceIf(k)
        m.Add(start[j] <= ex.prev_start + P.stability_window).OnlyEnforceIf(k)
        objective.append(c * k)
        keep[j] = k

    if upper_bound is not None:
        m.Add(sum(objective) <= int(upper_bound))
    m.Maximize(sum(objective))
    return m, ModelVars(present, start, before, buckets, follows, after_gap, keep, gap_starts, tmin)


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
        model.AddHint(v.present[j], on)
        if not on:
            # complete hint: absent executions get harmless values too (CP-SAT then accepts the
            # hint as a solution at once instead of searching for the missing part)
            s0 = int(ex.fixed_start if ex.fixed_start is not None else ex.starts[0])
            lo = int(v.tmin[j])
            model.AddHint(v.start[j], s0)
            model.AddHint(v.transition_before[j], lo)
            model.AddHint(v.gap_start[j], s0 - lo)
            for y, b in v.buckets[j]:
                model.AddHint(y, False)
            if j in v.after_gap:
                model.AddHint(v.after_gap[j], False)
            if j in v.keep:
                model.AddHint(v.keep[j], False)
            continue
        s = at[j]
        model.AddHint(v.start[j], s)
        for y, b in v.buckets[j]:
            model.AddHint(y, bool(ex.bucket_lo[b] <= s <= ex.bucket_hi[b]))
        i = prev_of[j]
        use_arc = i is not None and (i, j) in v.follows and s - (at[i] + P.execs[i].duration) < P.tmax[ex.req]
        model.AddHint(v.after_gap[j], not use_arc)
        pre = s - (at[i] + P.execs[i].duration) if use_arc else int(P.tmax[ex.req])
        model.AddHint(v.transition_before[j], pre)
        model.AddHint(v.gap_start[j], s - pre)
        if j in v.keep:
            model.AddHint(v.keep[j], abs(s - ex.prev_start) <= P.stability_window)
    for (i, j), f in v.follows.items():
        model.AddHint(f, j in at and prev_of.get(j) == i and at[j] - (at[i] + P.execs[i].duration) < P.tmax[P.execs[j].req])


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
        self.cb(f"solve: objective {self.ObjectiveValue() / VALUE_SCALE:.3f}, CP-SAT bound "
                f"{self.BestObjectiveBound() / VALUE_SCALE:.3f} at {time.perf_counter() - self.t0:.1f}s")


def solve_problem(problem: Problem, *, time_limit_s: float = 10.0, gap_tolerance: float = 0.01,
                  hint: Sequence[Placement] | None = None, upper_bound: int | None = None,
                  k_best: int = 10, num_workers: int | None = None,
                  seed: int = 0, progress: Callable[[str], None] | None = None,
                  model_timer: Callable[[float], None] | None = None) -> SolveOutcome:
    """Build, hint and solve the model. Stops at the time limit or the relative gap tolerance."""
    t0 = time.perf_counter()
    arcs = candidate_arcs(problem, k_best, hint_pairs(problem, hint) if hint else ())
    model, v = build_model(problem, arcs, upper_bound)
    if hint:
        add_hint(model, v, problem, hint)
    n_buckets = sum(max(1, len(b)) for b in v.buckets)
    if model_timer:
        model_timer(time.perf_counter() - t0)
    solver = cp_model.CpSolver()
    prm = solver.parameters
    prm.max_time_in_seconds = float(time_limit_s)
    prm.relative_gap_limit = float(gap_tolerance)
    prm.num_workers = int(num_workers or os.cpu_count() or 1)
    prm.random_seed = seed
    prm.cp_model_probing_level = 0  # probing costs seconds of wall time on 10^4 booleans and finds little
    prm.catch_sigint_signal = False  # else CP-SAT leaves SIGINT at its default: Ctrl-C would kill the service
    t1 = time.perf_counter()
    cb = _Progress(progress, t1) if progress else None
    status = solver.Solve(model, cb) if cb else solver.Solve(model)
    runtime = time.perf_counter() - t1
    name = solver.StatusName(status)
    if status not in (cp_model.OPTIMAL, cp_model.FEASIBLE):
        return SolveOutcome([], name, 0.0, float("inf"), float("inf"), runtime, len(arcs), n_buckets)
    plan = [Placement(j, int(solver.Value(v.start[j]))) for j in range(len(problem.execs))
            if solver.Value(v.present[j])]
    plan.sort(key=lambda p: p.start)
    sci, stab = objective_of(problem, plan)
    # A solution may leave a keeps_previous_start literal false although the start is inside the
    # window (nothing forces it true): the plan then earns more than the model says. Never less.
    assert sci + stab >= solver.ObjectiveValue() - 0.5, "plan value below the model objective"
    obj = float(sci + stab)
    bound = max(min(solver.BestObjectiveBound(), upper_bound if upper_bound is not None else math.inf), obj)
    # CP-SAT says OPTIMAL also when it stops at the relative gap limit: report what is proven
    name = "OPTIMAL" if bound - obj < 1.0 else "FEASIBLE"
    gap = 0.0 if name == "OPTIMAL" else (bound - obj) / max(abs(bound), 1e-9)
    return SolveOutcome(plan, name, obj / VALUE_SCALE, bound / VALUE_SCALE, gap, runtime, len(arcs), n_buckets)


# --------------------------------------------------------------------------- bound

@dataclass(frozen=True)
class LagrangianResult:
    bound: int  # valid upper bound on the model objective (integer units)
    order: list[int]  # executions by decreasing reduced value at the best prices
    preferred: dict[int, int]  # each execution's best start at the best prices
    iterations: int
    reduced: np.ndarray | None = None  # each execution's best reduced value at the best prices (>= 0)


def lagrangian_bound(problem: Problem, lower: int, *, iterations: int = 300, time_limit_s: float = 2.0) -> LagrangianResult:
    """Upper bound from the time-indexed relaxation, by subgradient on per-step prices.

    Relaxation: an execution started at s occupies at least the steps [s - tmin, s + d) of the
    grid (tmin = the smallest transition bound into it from any request, so it is no larger
    than the model's transition_before); entries are disjoint, so every step is covered at
    most once. Pricing each step with lambda >= 0 and dropping the cover constraints gives,
    for ANY lambda,

        L(lambda) = sum_t lambda_t + sum_free_e max(0, max_s [c_e(s) - sum_{t in cover(e,s)} lambda_t])
                    + sum_kept_e [c_e(s_e) - sum_{t in cover(e,s_e)} lambda_t]

    >= the model's optimum (c includes the stability bonus where it can apply; repeats and
    transitions beyond tmin are relaxed). Polyak steps toward ``lower`` (a known plan's value).
    """
    P = problem
    execs = P.execs
    n_t = P.n_t
    t_start = time.perf_counter()
    if not execs:
        return LagrangianResult(0, [], {}, 0)
    # tmin over ALL predecessors (not only the sparse arcs): the relaxation stays valid for any arc set.
    Tm = P.T.copy()
    n_exec_of = np.bincount([ex.req for ex in execs], minlength=len(P.requests))
    single = np.flatnonzero(n_exec_of <= 1)
    Tm[single, single] = np.iinfo(np.int64).max // 4  # a request with one execution cannot follow itself
    col_min = Tm.min(axis=0) if Tm.size else np.zeros(0, dtype=np.int64)
    E, S, C, LO, HI, forced = [], [], [], [], [], []
    for e, ex in enumerate(execs):
        tmin = 0 if ex.in_progress else int(min(P.tmax[ex.req], col_min[ex.req]))
        st = ex.starts if ex.fixed_start is None else np.array([ex.fixed_start], dtype=np.int64)
        b = np.searchsorted(ex.bucket_lo, st, side="right") - 1
        c = ex.bucket_coef[b].astype(np.float64)
        sc = P.stability_coef(e)
        if sc and ex.prev_start is not None:
            c = c + sc * (np.abs(st - ex.prev_start) <= P.stability_window)
        E.append(np.full(st.size, e)), S.append(st), C.append(c)
        LO.append(np.clip(st - tmin, 0, n_t)), HI.append(np.clip(st + ex.duration, 0, n_t))
        forced.append(ex.fixed_start is not None)
    E, S, C = np.concatenate(E), np.concatenate(S), np.concatenate(C)
    LO, HI = np.concatenate(LO), np.concatenate(HI)
    forced = np.array(forced)
    seg_len = np.array([1 if ex.fixed_start is not None else ex.starts.size for ex in execs])
    seg0 = np.concatenate([[0], np.cumsum(seg_len)[:-1]])
    free = ~forced
    span = max(1, n_t - P.now_step)
    lam = np.full(n_t, max(lower, 1) / span, dtype=np.float64)
    lam[: P.now_step] = 0.0
    best = (math.inf, lam.copy())
    theta, stall = 1.0, 0
    it = 0
    for it in range(1, iterations + 1):
        cum = np.concatenate([[0.0], np.cumsum(lam)])
        red = C - (cum[HI] - cum[LO])
        segmax = np.maximum.reduceat(red, seg0)
        val = lam.sum() + np.maximum(segmax[free], 0.0).sum() + segmax[forced].sum()
        if val < best[0] - 1e-9:
            best, stall = (val, lam.copy()), 0
        else:
            stall += 1
            if stall >= 8:
                theta, stall = theta / 2, 0
        take = forced | (segmax > 0)
        is_max = red >= np.repeat(segmax, seg_len) - 1e-9
        idx = np.flatnonzero(is_max & take[E])
        _, first = np.unique(E[idx], return_index=True)
        ch = idx[first]
        diff = np.zeros(n_t + 1)
        np.add.at(diff, LO[ch], 1.0)
        np.add.at(diff, HI[ch], -1.0)
        g = 1.0 - np.cumsum(diff)[:n_t]
        nrm = float(g @ g)
        if nrm == 0 or theta < 1e-4 or time.perf_counter() - t_start > time_limit_s:
            break
        lam = np.maximum(0.0, lam - theta * max(val - lower, 1e-6) / nrm * g)
    lam = best[1]
    cum = np.concatenate([[0.0], np.cumsum(lam)])
    red = C - (cum[HI] - cum[LO])
    segmax = np.maximum.reduceat(red, seg0)
    is_max = red >= np.repeat(segmax, seg_len) - 1e-9
    idx = np.flatnonzero(is_max)
    _, first = np.unique(E[idx], return_index=True)
    ch = idx[first]
    preferred = {int(E[i]): int(S[i]) for i in ch}
    order = [int(e) for e in np.argsort(-segmax, kind="stable")]
    return LagrangianResult(int(math.floor(best[0] + 1e-6)), order, preferred, it, np.maximum(segmax, 0.0))


# --------------------------------------------------------------------------- sequence bound

def _classes(problem: Problem, sectors: int) -> tuple[np.ndarray, np.ndarray]:
    """Class of each request (instrument, band, azimuth sector of its mean position) and the
    smallest transition bound between any two requests of two classes (grid steps)."""
    P = problem
    n = len(P.requests)
    key = {}
    cls = np.empty(n, dtype=np.int64)
    for r in range(n):
        sec = int(P.mean_az[r] // (360.0 / sectors)) % sectors if sectors > 1 else 0
        cls[r] = key.setdefault((P.instruments[r], P.bands[r], sec), len(key))
    K = len(key)
    Tm = P.T.astype(np.int64).copy()
    n_exec_of = np.bincount([ex.req for ex in P.execs], minlength=n)
    single = np.flatnonzero(n_exec_of <= 1)
    Tm[single, single] = np.iinfo(np.int64).max // 4  # a single execution cannot follow itself
    Lc = np.full((K, K), np.iinfo(np.int64).max // 4, dtype=np.int64)
    np.minimum.at(Lc, (cls[:, None].repeat(n, 1), cls[None, :].repeat(n, 0)), Tm)
    return cls, Lc


def sequence_bound(problem: Problem, lower: int, *, mu0: np.ndarray | None = None, sectors: int = 8,
                   iterations: int = 200, time_limit_s: float = 2.0) -> tuple[int, int]:
    """Upper bound that keeps the order of the night and the transitions between classes.

    Relaxation: a plan is a sequence in time of (execution, start) with no overlap and gaps of at
    least Lc[class(prev), class(next)] steps, Lc being the smallest model transition bound between
    any two requests of the two classes (class = instrument, band, azimuth sector), so every
    model-feasible plan is such a sequence. Only "each execution at most once" is dropped, priced
    by mu >= 0 (Lagrange): for any mu,

        B(mu) = sum_e mu_e + max over sequences of sum (c_e(s) - mu_e)

    bounds the model's optimum; the max is a dynamic programme over (time, last class). Subgradient
    steps on mu (Polyak, toward ``lower``). Returns (bound, iterations).
    """
    P = problem
    execs = P.execs
    n_t = P.n_t
    NEG = -1e18
    if not execs:
        return 0, 0
    t_start = time.perf_counter()
    cls_r, Lc = _classes(P, sectors)
    K = Lc.shape[0]
    # candidates grouped by start step
    # Kept entries (in progress, frozen) are in every plan: a bonus M on them changes no plan's
    # ranking, and M * (number kept) is taken off the bound again.
    forced = np.array([ex.fixed_start is not None for ex in execs])
    M = 10.0 * float(sum(int(ex.bucket_coef.max()) for ex in execs)) + 1.0
    E, S, C = [], [], []
    for e, ex in enumerate(execs):
        st = ex.starts if ex.fixed_start is None else np.array([ex.fixed_start], dtype=np.int64)
        b = np.searchsorted(ex.bucket_lo, st, side="right") - 1
        c = ex.bucket_coef[b].astype(np.float64) + (M if forced[e] else 0.0)
        sc = P.stability_coef(e)
        if sc and ex.prev_start is not None:
            c = c + sc * (np.abs(st - ex.prev_start) <= P.stability_window)
        E.append(np.full(st.size, e)), S.append(st), C.append(c)
    E, S, C = np.concatenate(E), np.concatenate(S), np.concatenate(C)
    order = np.argsort(S, kind="stable")
    E, S, C = E[order], S[order], C[order]
    dur = np.array([ex.duration for ex in execs], dtype=np.int64)
    ecls = cls_r[np.array([ex.req for ex in execs], dtype=np.int64)]
    END, CL = S + dur[E], ecls[E]
    bounds = np.searchsorted(S, np.arange(n_t + 1), side="left")
    t0 = int(min(P.now_step, S.min()))  # an entry in progress started before now
    lag_idx = np.arange(K)[:, None]
    mu = np.zeros(len(execs)) if mu0 is None else np.asarray(mu0, dtype=np.float64).copy()
    best = math.inf
    theta, stall = 1.0, 0
    it = 0
    for it in range(1, iterations + 1):
        F = np.full((n_t + 1, K), NEG)  # best value, telescope free from t, last class k
        R = np.full((n_t + 1, K), NEG)  # running max of F over times <= t
        RT = np.zeros((n_t + 1, K), dtype=np.int64)  # where that max was reached
        bp = np.full((n_t + 1, K), -1, dtype=np.int64)  # candidate index that set F[t, k]
        bpk = np.full((n_t + 1, K), -1, dtype=np.int64)  # its predecessor class (-1: first entry)
        val = C - mu[E]
        for s in range(t0, n_t + 1):
            if s > 0:
                better = F[s] > R[s - 1]
                R[s] = np.where(better, F[s], R[s - 1])
                RT[s] = np.where(better, s, RT[s - 1])
            else:
                R[s], RT[s] = F[s], 0
            lo, hi = bounds[s], bounds[s + 1] if s < n_t else len(S)
            if lo >= hi:
                continue
            # best predecessor for a start of class k2 at s: max_k R[s - Lc[k, k2], k], or none (0)
            tt = s - Lc  # [K, K]
            ok = tt >= t0
            got = np.where(ok, R[np.clip(tt, 0, n_t), lag_idx], NEG)
            pk = np.argmax(got, axis=0)
            pv = got[pk, np.arange(K)]
            first = pv < 0.0
            pv = np.where(first, 0.0, pv)
            pk = np.where(first, -1, pk)
            idx = np.arange(lo, hi)
            cand = pv[CL[idx]] + val[idx]
            # keep the best candidate per (end, class), then compare with F
            key = END[idx] * K + CL[idx]
            o = np.lexsort((cand, key))
            last = np.ones(o.size, dtype=bool)
            last[:-1] = key[o][1:] != key[o][:-1]
            w = o[last]
            ends, cl, cv = END[idx][w], CL[idx][w], cand[w]
            upd = cv > F[ends, cl]
            ends, cl, cv, wi = ends[upd], cl[upd], cv[upd], idx[w][upd]
            F[ends, cl] = cv
            bp[ends, cl] = wi
            bpk[ends, cl] = pk[cl]
        # the bound at these prices
        R_end = R[n_t]
        kbest = int(np.argmax(R_end))
        seq_val = max(0.0, float(R_end[kbest]))
        bound = float(mu.sum()) + seq_val - M * int(forced.sum())
        if bound < best - 1e-9:
            best, stall = bound, 0
        else:
            stall += 1
            if stall >= 5:
                theta, stall = theta / 2, 0
        # the optimal sequence: walk the back-pointers
        count = np.zeros(len(execs))
        if seq_val > 0:
            t, k = int(RT[n_t, kbest]), kbest
            while t >= 0 and bp[t, k] >= 0:
                c = int(bp[t, k])
                count[E[c]] += 1
                pk_ = int(bpk[t, k])
                if pk_ < 0:
                    break
                s = int(S[c])
                t, k = int(RT[s - Lc[pk_, k], pk_]), pk_
        g = 1.0 - count
        g[(mu <= 0) & (g > 0)] = 0.0  # projected: mu cannot go below 0
        g[forced] = 0.0
        nrm = float(g @ g)
        if nrm == 0 or theta < 1e-3 or time.perf_counter() - t_start > time_limit_s:
            break
        mu = np.maximum(0.0, mu - theta * max(best - lower, 1e-6) / nrm * g)
    return int(math.floor(best + 1e-6)), it
