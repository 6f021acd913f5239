"""Searches for good plans on top of the greedy dispatch: randomized dispatch, ruin-and-recreate
and price-guided insertion. Every plan they return satisfies the model (Problem.T transition
bounds, feasible starts, repeats), so each is a valid CP-SAT hint and a valid floor.

Each search stops after a number of iterations and, when ``time_limit_s`` is given, at that
wall-clock time too. With ``time_limit_s=None`` it does exactly its iterations: same problem,
same iterations, same seed, same plan on any machine (the build's deterministic effort).
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from scheduler.solve.budget import StageClock
from scheduler.solve.greedy import DispatchTables, dispatch_tables, greedy_plan
from scheduler.solve.objective import plan_value
from scheduler.solve.problem import Placement, Problem, check_model_feasible


def randomized_dispatch(problem: Problem, runs: int = 400, time_limit_s: float | None = 2.0, seed: int = 0,
                        tables: DispatchTables | None = None) -> tuple[list[Placement], int]:
    """Best of many perturbed greedy dispatches (scores times U[1 - noise, 1 + noise], noise and
    the wait exponent drawn per run from a seeded generator). Returns (plan, runs done).

    The plain greedy is myopic: it takes the best value per minute now even when that blocks a
    better request later. Perturbed runs explore other first choices cheaply (a run is a few ms
    for 500 requests) and give CP-SAT a much better starting point.
    """
    clock = StageClock(time_limit_s)
    tables = tables if tables is not None else dispatch_tables(problem)
    rng = np.random.default_rng(seed)
    best = greedy_plan(problem, tables=tables)
    best_v = plan_value(problem, best)
    k = 0
    for k in range(1, runs + 1):
        if clock.out_of_time():
            k -= 1
            break
        plan = greedy_plan(problem, wait_exponent=float(rng.uniform(0.7, 1.3)), noise=float(rng.uniform(0.1, 0.8)),
                           seed=int(rng.integers(2**31)), tables=tables)
        v = plan_value(problem, plan)
        if v > best_v:
            best, best_v = plan, v
    return best, k


# The acceptance threshold falls from its start to 0 over each cycle of this many moves; the
# next cycle starts again from the best plan so far. It follows the move count, never the
# clock, so one seed gives one trajectory whatever the machine's speed: builds with a time
# limit differ only in how far along it they get (the objective's spread between runs,
# docs/benchmarks.md). On the 500-request benchmark queue, 10,000 moves from the same start
# over eight seeds: 438.96-443.82 (mean 442.28) with the threshold falling once over the run,
# 441.33-445.74 (mean 443.84) in cycles of 1000 from the best (443.54 in cycles of 2000).
TAU_CYCLE_MOVES = 1000


class RuinAndRecreate:
    """Local search on a plan: drop 1..max_drop consecutive entries, let a perturbed dispatch refill
    the night around the rest, and move to the result if it is model-feasible and worth at least
    (1 - tau) times the current plan, tau falling from ``threshold`` to 0 over each cycle of
    TAU_CYCLE_MOVES moves (threshold accepting: small steps back let the search leave local
    optima). Resumable: ``run`` continues the same trajectory (plan, random stream, move count),
    so a build's two search phases are one search with the bounds computed in between. Each
    cycle starts from the best plan seen."""

    def __init__(self, problem: Problem, plan: Sequence[Placement], *, seed: int = 0, threshold: float = 0.02,
                 max_drop: int = 5, tables: DispatchTables | None = None):
        self.problem = problem
        self.tables = tables if tables is not None else dispatch_tables(problem)
        self.rng = np.random.default_rng(seed)
        self.threshold, self.max_drop = threshold, max_drop
        self.cur = sorted(plan, key=lambda p: p.start)
        self.cur_v = plan_value(problem, self.cur)
        self.best, self.best_v = self.cur, self.cur_v
        self.moves = 0

    def adopt(self, plan: Sequence[Placement]) -> None:
        """Continue from ``plan`` when it is model-feasible and better than anything seen (a plan
        found elsewhere)."""
        v = plan_value(self.problem, plan)
        if v > self.best_v and not check_model_feasible(self.problem, plan):
            self.cur = self.best = sorted(plan, key=lambda p: p.start)
            self.cur_v = self.best_v = v

    def run(self, iterations: int, time_limit_s: float | None = None, stop_at: float | None = None) -> int:
        """Up to ``iterations`` moves, within ``time_limit_s`` (None: no clock), stopping once the
        best reaches ``stop_at``. Returns the moves done."""
        P, rng = self.problem, self.rng
        clock = StageClock(time_limit_s)
        done = 0
        for _ in range(iterations):
            free = [p for p in self.cur if P.execs[p.exec_index].fixed_start is None]
            if clock.out_of_time() or not free or (stop_at is not None and self.best_v >= stop_at):
                break
            phase = self.moves % TAU_CYCLE_MOVES
            if phase == 0:
                self.cur, self.cur_v = self.best, self.best_v
            tau = self.threshold * (1.0 - phase / TAU_CYCLE_MOVES)
            n_drop = int(rng.integers(1, min(self.max_drop, len(free)) + 1))
            i = int(rng.integers(0, len(free) - n_drop + 1))
            keep = free[:i] + free[i + n_drop:]
            cand = greedy_plan(P, wait_exponent=float(rng.uniform(0.8, 1.2)), noise=float(rng.uniform(0.0, 0.5)),
                               seed=int(rng.integers(2**31)), tables=self.tables, keep=keep)
            self.moves += 1
            done += 1
            v = plan_value(P, cand)
            if v >= self.cur_v * (1.0 - tau) and not check_model_feasible(P, cand):
                self.cur, self.cur_v = cand, v
                if v > self.best_v:
                    self.best, self.best_v = cand, v
        return done


def insertion_plan(problem: Problem, order: Sequence[int], preferred: dict[int, int] | None = None,
                   tables: DispatchTables | None = None) -> list[Placement]:
    """Insert executions one by one, in ``order``, wherever they fit in the plan built so far.

    An execution fits in a gap between two planned entries when one of its feasible starts
    leaves the transition bound (Problem.T) on both sides; among the fitting starts it takes
    ``preferred[e]`` when that fits, else the one with the highest value. Repeats keep their
    order and spacing. Used with orders derived from the Lagrangian prices
    (bounds.lagrangian_bound) to give CP-SAT a strong first solution.
    """
    P = problem
    execs = P.execs
    coef = (tables if tables is not None else dispatch_tables(P)).coef
    seq: list[Placement] = sorted((Placement(e, int(ex.fixed_start)) for e, ex in enumerate(execs)
                                   if ex.fixed_start is not None), key=lambda p: p.start)
    placed_at: dict[int, int] = {p.exec_index: p.start for p in seq}
    by_req: dict[int, list[int]] = {}
    for e, ex in enumerate(execs):
        by_req.setdefault(ex.req, []).append(e)
    for lst in by_req.values():
        lst.sort(key=lambda e: execs[e].k)
    preferred = preferred or {}
    pending = [e for e in order if e not in placed_at]
    for _ in range(2):  # a second pass picks up repeats whose predecessor was placed late
        left = []
        for e in pending:
            st = _starts_between_repeats(P, e, by_req[execs[e].req], placed_at)
            if st is None:
                left.append(e)  # its previous repeat is not placed (yet)
                continue
            s = _best_slot(P, seq, e, st, preferred.get(e), coef) if st.size else None
            if s is None:
                continue
            seq.insert(int(np.searchsorted([p.start for p in seq], s)), Placement(e, s))
            placed_at[e] = s
        if not left:
            break
        pending = left
    return seq


def _starts_between_repeats(P: Problem, e: int, siblings: list[int], placed_at: dict[int, int]) -> np.ndarray | None:
    """Feasible starts of e that keep order and spacing with its placed repeats (None: the
    repeat before it is not placed)."""
    ex = P.execs[e]
    pos = siblings.index(e)
    lo, hi = P.now_step, P.n_t - 1
    spacing = int(P.spacing_steps[ex.req])
    if pos > 0:
        prev_e = siblings[pos - 1]
        if prev_e not in placed_at:
            return None
        lo = max(lo, placed_at[prev_e] + max(P.execs[prev_e].duration, spacing))
    if pos + 1 < len(siblings) and siblings[pos + 1] in placed_at:
        hi = min(hi, placed_at[siblings[pos + 1]] - max(ex.duration, spacing))
    return ex.starts[(ex.starts >= lo) & (ex.starts <= hi)]


def _best_slot(P: Problem, seq: list[Placement], e: int, st: np.ndarray, want: int | None,
               coef: np.ndarray) -> int | None:
    """The start of e (among ``st``) with the highest value over the gaps of ``seq`` it fits in
    with the transition bound on both sides; ``want`` where it fits in that gap."""
    ex = P.execs[e]
    best = None
    for g in range(len(seq) + 1):
        a = seq[g - 1] if g > 0 else None
        b = seq[g] if g < len(seq) else None
        lo = P.now_step if a is None else a.start + P.execs[a.exec_index].duration + int(P.T[P.execs[a.exec_index].req, ex.req])
        hi = P.n_t - ex.duration if b is None else b.start - ex.duration - int(P.T[ex.req, P.execs[b.exec_index].req])
        if hi < lo or (a is not None and a.start > st[-1]) or (b is not None and b.start < st[0]):
            continue
        i0, i1 = np.searchsorted(st, lo, "left"), np.searchsorted(st, hi, "right")
        if i1 <= i0:
            continue
        cand = st[i0:i1]
        if want is not None and lo <= want <= hi and np.any(cand == want):
            s = int(want)
        else:
            s = int(cand[int(np.argmax(coef[e, cand]))])
        if best is None or int(coef[e, s]) > best[0]:
            best = (int(coef[e, s]), s)
    return None if best is None else best[1]


def plan_from_sequence(problem: Problem, placements: Sequence[tuple[int, int]],
                       tables: DispatchTables | None = None) -> list[Placement]:
    """A model-feasible plan from a sequence of the sequence relaxation (bounds.py): its
    (execution, start) pairs taken in order of start, each request's entries renumbered as its
    executions 0, 1, ... (the relaxation may use one execution twice), an entry kept only where
    it fits after the kept ones (a feasible start of that execution, the transition bound from
    the entry before, the spacing from the request's previous entry), the dispatch filling the
    rest. The relaxation's best sequences at good prices are often a plan but for one or two
    entries; these plans are how the column generation feeds the search (docs/solver.md)."""
    P = problem
    tables = tables if tables is not None else dispatch_tables(P)
    free_of: dict[int, list[int]] = {}  # each request's executions not held by the plan in force, in order
    for e in tables.by_request:
        if P.execs[int(e)].fixed_start is None:
            free_of.setdefault(int(tables.req[e]), []).append(int(e))
    fixed = [(e, s, True) for e, s in tables.kept]  # always there: the dispatch holds them too
    # a request's free executions come after its held ones (repeats run in order, spaced)
    after_held: dict[int, int] = {}
    for e, s in tables.kept:
        r = int(tables.req[e])
        after_held[r] = max(after_held.get(r, s), s + max(int(tables.duration[e]), int(P.spacing_steps[r])))
    walk = sorted(fixed + [(int(e), int(s), False) for e, s in placements if P.execs[int(e)].fixed_start is None],
                  key=lambda q: q[1])
    kept: list[Placement] = []
    before: Placement | None = None  # the entry before the next one (kept or fixed)
    taken: dict[int, int] = {}  # request -> executions used
    last: dict[int, Placement] = {}
    for e0, s, is_fixed in walk:
        r = int(tables.req[e0])
        if is_fixed:
            before = last[r] = Placement(e0, s)
            continue
        k = taken.get(r, 0)
        if s < after_held.get(r, s) or k >= len(free_of.get(r, ())):
            continue  # more entries than the request has executions
        e = free_of[r][k]
        if not 0 <= s < P.n_t or int(tables.next_start[e, s]) != s:
            continue  # not a feasible start of that execution
        if before is not None and s - (before.start + int(tables.duration[before.exec_index])) < P.exec_T(before.exec_index, e):
            continue
        if r in last and s - last[r].start < max(int(tables.duration[last[r].exec_index]), int(P.spacing_steps[r])):
            continue
        nxt = min(((fs, f) for f, fs in tables.kept if fs > s), default=None)  # the next held entry
        if nxt is not None and s + int(tables.duration[e]) + P.exec_T(e, nxt[1]) > nxt[0]:
            continue
        p = Placement(e, s)
        kept.append(p)
        before = last[r] = p
        taken[r] = k + 1
    return greedy_plan(P, tables=tables, keep=kept)
