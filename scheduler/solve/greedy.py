"""Greedy dispatch: the baseline, the CP-SAT hint, the floor and the fallback.

From the first free step (dusk, or `now` when re-planning), repeatedly take the execution
with the best science value per minute of telescope time it costs, where the cost counts the
transition from the previous entry, any wait for the target's next feasible start, and the
entry itself:

    score = value(start) / (start + duration - free_step)

Kept (in progress / frozen) entries are obstacles: an execution is only taken if it and the
transition out of it fit before the next kept entry. Transitions use the same per-pair bounds
as the CP-SAT model (Problem.T), so the greedy plan is always a valid model solution (a
complete hint) and the checker's true transitions are never longer. The searches built on the
dispatch (randomized dispatch, ruin-and-recreate, insertion) are in solve/heuristics.py.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from scheduler.solve.objective import start_values
from scheduler.solve.problem import Placement, Problem


@dataclass(frozen=True)
class DispatchTables:
    """Per-execution arrays the dispatch reads on every run, built once per problem."""

    next_start: np.ndarray  # [n_exec, n_t + 1] first feasible start >= t (n_t: none)
    coef: np.ndarray  # [n_exec, n_t] objective value of starting at t, stability bonus included
    req: np.ndarray  # [n_exec] request index
    duration: np.ndarray  # [n_exec] grid steps
    k: np.ndarray  # [n_exec] execution number within its request
    by_request: np.ndarray  # [n_exec] executions sorted by (request, k): the frontier's order
    kept: tuple  # ((execution, start), ...) of the kept (in progress / frozen) executions


def dispatch_tables(problem: Problem) -> DispatchTables:
    """The dispatch's tables. Values come from objective.start_values, so on a re-plan a start
    within the stability window of the previous start earns the bonus, as in the model."""
    n_t = problem.n_t
    n_e = len(problem.execs)
    nxt = np.full((n_e, n_t + 1), n_t, dtype=np.int64)
    coef = np.zeros((n_e, n_t), dtype=np.int64)
    grid = np.arange(n_t + 1)
    for e in range(n_e):
        st, val = start_values(problem, e)
        inside = (st >= 0) & (st < n_t)
        st, val = st[inside], val[inside]
        if st.size:
            idx = np.searchsorted(st, grid, side="left")
            nxt[e] = np.where(idx < st.size, st[np.minimum(idx, st.size - 1)], n_t)
            coef[e, st] = val
    execs = problem.execs
    req = problem.exec_requests()
    k = np.array([ex.k for ex in execs], dtype=np.int64)
    kept = tuple((e, int(ex.fixed_start)) for e, ex in enumerate(execs) if ex.fixed_start is not None)
    return DispatchTables(nxt, coef, req, problem.exec_durations(), k,
                          np.lexsort((k, req)), kept)


@dataclass
class _Dispatch:
    """Where one dispatch run stands: the plan so far, the free step, the last entry, and the
    kept entries ("blocks") still ahead."""

    problem: Problem
    placed: list[Placement]
    blocks: list[int]  # kept executions in order of start
    block_start: dict[int, int]
    free: np.ndarray  # [n_exec] not placed yet
    last_start: np.ndarray  # [n_req] start of each request's last placed execution (spacing)
    last_dur: np.ndarray  # [n_req] its duration
    cur: int = 0  # first free step
    last: int | None = None  # execution placed last (its transition out)
    bi: int = 0  # next block

    @classmethod
    def start(cls, problem: Problem, tables: DispatchTables, keep: Sequence[Placement]) -> _Dispatch:
        execs = problem.execs
        bstart = dict(tables.kept)
        bstart.update({p.exec_index: int(p.start) for p in keep})
        blocks = sorted(bstart, key=lambda e: bstart[e])
        free = np.ones(len(execs), dtype=bool)
        free[blocks] = False
        last_start = np.full(len(problem.requests), -10**9, dtype=np.int64)
        last_dur = np.zeros(len(problem.requests), dtype=np.int64)
        for b in blocks:
            r = execs[b].req
            if bstart[b] > last_start[r]:
                last_start[r], last_dur[r] = bstart[b], execs[b].duration
        d = cls(problem, [Placement(b, bstart[b]) for b in blocks], blocks, bstart, free, last_start, last_dur,
                cur=problem.now_step)
        # The telescope is free from now, or from the end of the entry in progress.
        while d.bi < len(blocks) and bstart[blocks[d.bi]] < d.cur:
            d.jump_past(blocks[d.bi])
        return d

    def next_block(self) -> int | None:
        return self.blocks[self.bi] if self.bi < len(self.blocks) else None

    def jump_past(self, b: int) -> None:
        self.cur = max(self.cur, self.block_start[b] + self.problem.execs[b].duration)
        self.last = b
        self.bi += 1

    def place(self, e: int, s: int, end: int) -> None:
        self.placed.append(Placement(e, s))
        self.free[e] = False
        self.cur = end
        self.last = e
        r = self.problem.execs[e].req
        self.last_start[r], self.last_dur[r] = s, self.problem.execs[e].duration


def _frontier(tables: DispatchTables, free: np.ndarray) -> np.ndarray:
    """The lowest-k free execution of each request (repeats are taken in order)."""
    cand = tables.by_request[free[tables.by_request]]
    if cand.size:
        r = tables.req[cand]
        first = np.ones(cand.size, dtype=bool)
        first[1:] = r[1:] != r[:-1]
        cand = cand[first]
    return cand


def _best_candidate(d: _Dispatch, tables: DispatchTables, cand: np.ndarray, nb: int | None,
                    wait_exponent: float, noise: float, rng) -> tuple[int, int, int] | None:
    """(execution, start, end) with the best score among ``cand``, or None if none fits before
    the next kept entry ``nb``."""
    P = d.problem
    n_t = P.n_t
    req = tables.req[cand]
    lb = np.full(cand.size, d.cur, dtype=np.int64)
    if d.last is not None:
        lb += P.T[P.execs[d.last].req, req]
    lb = np.maximum(lb, d.last_start[req] + np.maximum(d.last_dur[req], P.spacing_steps[req]))
    s = tables.next_start[cand, np.minimum(lb, n_t)]
    ok = s < n_t
    end = s + tables.duration[cand]
    if nb is not None:
        ok &= end + P.T[req, P.execs[nb].req] <= d.block_start[nb]
    if not ok.any():
        return None
    cost = np.maximum(end - d.cur, 1).astype(np.float64)
    if wait_exponent != 1.0:
        cost = cost ** wait_exponent
    score = np.where(ok, tables.coef[cand, np.minimum(s, n_t - 1)] / cost, -1.0)
    if rng is not None:
        score = score * rng.uniform(1.0 - noise, 1.0 + noise, score.size)
    j = int(np.argmax(score))
    return int(cand[j]), int(s[j]), int(end[j])


def greedy_plan(problem: Problem, wait_exponent: float = 1.0, noise: float = 0.0, seed: int = 0,
                tables: DispatchTables | None = None, keep: Sequence[Placement] = ()) -> list[Placement]:
    """The dispatch described above. noise > 0 multiplies each score by a random factor in
    [1 - noise, 1 + noise] (seeded): used to try perturbed dispatches and keep the best.
    keep: placements held like kept entries (the dispatch fills around them)."""
    if not problem.execs:
        return []
    tables = tables if tables is not None else dispatch_tables(problem)
    rng = np.random.default_rng(seed) if noise > 0 else None
    d = _Dispatch.start(problem, tables, keep)
    shortest = int(tables.duration.min())
    cand = _frontier(tables, d.free)  # changes only when something is placed
    while True:
        nb = d.next_block()
        if cand.size == 0 and nb is None:
            break
        # a gap before the next kept entry shorter than any execution takes nothing (a refill
        # around kept entries meets many such gaps); skipping it changes no choice and no draw
        fits = nb is None or d.block_start[nb] - d.cur >= shortest
        pick = _best_candidate(d, tables, cand, nb, wait_exponent, noise, rng) if cand.size and fits else None
        if pick is not None:
            d.place(*pick)
            cand = _frontier(tables, d.free)
            continue
        if nb is None:
            break
        d.jump_past(nb)  # nothing fits before the next kept entry: jump past it
    d.placed.sort(key=lambda p: p.start)
    return d.placed
