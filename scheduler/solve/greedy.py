"""Greedy dispatch: the baseline, the CP-SAT hint, the floor and the fallback.

From the first free step (dusk, or `now` when re-planning), repeatedly take the execution
with the best science value per minute of telescope time it costs, where the cost counts the
transition from the previous entry, any wait for the target's next feasible start, and the
entry itself:

    score = value(start) / (start + duration - free_step)

Kept (in progress / frozen) entries are obstacles: an execution is only taken if it and the
transition out of it fit before the next kept entry. Transitions use the same per-pair bounds
as the CP-SAT model (Problem.T), so the greedy plan is always a valid model solution (a
complete hint) and the checker's true transitions are never longer.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from scheduler.solve.problem import Placement, Problem


def dense_tables(problem: Problem) -> tuple[np.ndarray, np.ndarray]:
    """(next_start [n_exec, n_t + 1], coef [n_exec, n_t]): first feasible start >= t (n_t: none)
    and the objective coefficient of starting at t, stability bonus included (re-planning: a
    start within the stability window of the previous plan's start earns it, as in the model)."""
    n_t = problem.n_t
    n_e = len(problem.execs)
    nxt = np.full((n_e, n_t + 1), n_t, dtype=np.int64)
    coef = np.zeros((n_e, n_t), dtype=np.int64)
    grid = np.arange(n_t + 1)
    for e, ex in enumerate(problem.execs):
        st = ex.starts if ex.fixed_start is None else np.array([ex.fixed_start])
        st = st[(st >= 0) & (st < n_t)]
        if st.size:
            idx = np.searchsorted(st, grid, side="left")
            nxt[e] = np.where(idx < st.size, st[np.minimum(idx, st.size - 1)], n_t)
        for lo, hi, c in zip(ex.bucket_lo, ex.bucket_hi, ex.bucket_coef):
            coef[e, max(lo, 0):hi + 1] = c
        sc = problem.stability_coef(e)
        if sc > 0:
            w = problem.stability_window
            lo, hi = max(ex.prev_start - w, 0), min(ex.prev_start + w + 1, n_t)
            if hi > lo:
                coef[e, lo:hi] += np.where(coef[e, lo:hi] > 0, sc, 0)
    return nxt, coef


def greedy_plan(problem: Problem, wait_exponent: float = 1.0, noise: float = 0.0, seed: int = 0,
                tables: tuple[np.ndarray, np.ndarray] | None = None,
                keep: Sequence[Placement] = ()) -> list[Placement]:
    """The dispatch described above. noise > 0 multiplies each score by a random factor in
    [1 - noise, 1 + noise] (seeded): used to try perturbed dispatches and keep the best.
    keep: placements held like kept entries (the dispatch fills around them)."""
    P = problem
    n_t = P.n_t
    execs = P.execs
    if not execs:
        return []
    nxt, coef = tables if tables is not None else dense_tables(P)
    rng = np.random.default_rng(seed) if noise > 0 else None
    req = np.array([ex.req for ex in execs], dtype=np.int64)
    dur = np.array([ex.duration for ex in execs], dtype=np.int64)
    kk = np.array([ex.k for ex in execs], dtype=np.int64)

    placed: list[Placement] = []
    bstart = {e: int(ex.fixed_start) for e, ex in enumerate(execs) if ex.fixed_start is not None}
    bstart.update({p.exec_index: int(p.start) for p in keep})
    blocks = sorted(bstart, key=lambda e: bstart[e])
    for b in blocks:
        placed.append(Placement(b, bstart[b]))
    taken = np.zeros(len(execs), dtype=bool)
    taken[blocks] = True
    # per request: start of its last placed execution (spacing), count placed
    last_start = np.full(len(P.requests), -10**9, dtype=np.int64)
    last_dur = np.zeros(len(P.requests), dtype=np.int64)
    for b in blocks:
        r = execs[b].req
        if bstart[b] > last_start[r]:
            last_start[r], last_dur[r] = bstart[b], execs[b].duration
    # The telescope is free from now, or from the end of the entry in progress.
    cur = P.now_step
    last = None
    bi = 0
    while bi < len(blocks) and bstart[blocks[bi]] < cur:
        cur = max(cur, bstart[blocks[bi]] + execs[blocks[bi]].duration)
        last = blocks[bi]
        bi += 1
    free = ~taken
    while True:
        nb = blocks[bi] if bi < len(blocks) else None
        # frontier: the lowest-k free execution of each request
        cand = np.flatnonzero(free)
        if cand.size:
            order = np.lexsort((kk[cand], req[cand]))
            cand = cand[order]
            first = np.ones(cand.size, dtype=bool)
            first[1:] = req[cand][1:] != req[cand][:-1]
            cand = cand[first]
        if cand.size == 0 and nb is None:
            break
        if cand.size:
            lb = np.full(cand.size, cur, dtype=np.int64)
            if last is not None:
                lb += P.T[execs[last].req, req[cand]]
            r = req[cand]
            lb = np.maximum(lb, last_start[r] + np.maximum(last_dur[r], P.spacing_steps[r]))
            s = nxt[cand, np.minimum(lb, n_t)]
            ok = s < n_t
            end = s + dur[cand]
            if nb is not None:
                ok &= end + P.T[req[cand], execs[nb].req] <= bstart[nb]
            if ok.any():
                cost = np.maximum(end - cur, 1).astype(np.float64)
                if wait_exponent != 1.0:
                    cost = cost ** wait_exponent
                sc = np.where(ok, coef[cand, np.minimum(s, n_t - 1)] / cost, -1.0)
                if rng is not None:
                    sc = sc * rng.uniform(1.0 - noise, 1.0 + noise, sc.size)
                j = int(np.argmax(sc))
                e = int(cand[j])
                placed.append(Placement(e, int(s[j])))
                free[e] = False
                cur = int(end[j])
                last = e
                last_start[execs[e].req] = int(s[j])
                last_dur[execs[e].req] = execs[e].duration
                continue
        if nb is None:
            break
        # nothing fits before the next kept entry: jump past it
        cur = max(cur, bstart[nb] + execs[nb].duration)
        last = nb
        bi += 1
    placed.sort(key=lambda p: p.start)
    return placed


def insertion_plan(problem: Problem, order: Sequence[int], preferred: dict[int, int] | None = None,
                   coef: np.ndarray | None = None) -> list[Placement]:
    """Insert executions one by one, in ``order``, wherever they fit in the plan built so far.

    An execution fits in a gap between two planned entries when one of its feasible starts
    leaves the transition bound (Problem.T) on both sides; among the fitting starts it takes
    ``preferred[e]`` when that fits, else the one with the highest value. Repeats keep their
    order and spacing. Used with orders derived from the Lagrangian prices (cpsat.lagrangian_bound)
    to give CP-SAT a strong first solution.
    """
    P = problem
    execs = P.execs
    n_t = P.n_t
    if coef is None:
        coef = dense_tables(P)[1]
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
            ex = execs[e]
            sib = by_req[ex.req]
            pos = sib.index(e)
            lo_bound, hi_bound = P.now_step, n_t - 1
            if pos > 0:
                prev_e = sib[pos - 1]
                if prev_e not in placed_at:
                    left.append(e)
                    continue
                lo_bound = max(lo_bound, placed_at[prev_e] + max(execs[prev_e].duration, int(P.spacing_steps[ex.req])))
            if pos + 1 < len(sib) and sib[pos + 1] in placed_at:
                nxt_e = sib[pos + 1]
                hi_bound = min(hi_bound, placed_at[nxt_e] - max(ex.duration, int(P.spacing_steps[ex.req])))
            st = ex.starts[(ex.starts >= lo_bound) & (ex.starts <= hi_bound)]
            if st.size == 0:
                continue
            best = None
            starts_seq = [p.start for p in seq]
            for g in range(len(seq) + 1):
                a = seq[g - 1] if g > 0 else None
                b = seq[g] if g < len(seq) else None
                lo = P.now_step if a is None else a.start + execs[a.exec_index].duration + int(P.T[execs[a.exec_index].req, ex.req])
                hi = n_t - ex.duration if b is None else b.start - ex.duration - int(P.T[ex.req, execs[b.exec_index].req])
                if hi < lo or (a is not None and a.start > st[-1]) or (b is not None and b.start < st[0]):
                    continue
                i0, i1 = np.searchsorted(st, lo, "left"), np.searchsorted(st, hi, "right")
                if i1 <= i0:
                    continue
                cand = st[i0:i1]
                want = preferred.get(e)
                if want is not None and lo <= want <= hi and np.any(cand == want):
                    s = want
                else:
                    s = int(cand[int(np.argmax(coef[e, cand]))])
                c = int(coef[e, s])
                if best is None or c > best[0]:
                    best = (c, int(s))
            if best is None:
                continue
            s = best[1]
            k = int(np.searchsorted(starts_seq, s))
            seq.insert(k, Placement(e, s))
            placed_at[e] = s
        if not left:
            break
        pending = left
    return seq


def randomized_dispatch(problem: Problem, runs: int = 400, time_limit_s: float = 2.0,
                        seed: int = 0) -> tuple[list[Placement], int]:
    """Best of many perturbed greedy dispatches (scores times U[1 - noise, 1 + noise], noise and
    the wait exponent drawn per run from a seeded generator). Returns (plan, runs done).

    The plain greedy is myopic: it takes the best value per minute now even when that blocks a
    better request later. Perturbed runs explore other first choices cheaply (a run is a few ms
    for 500 requests) and give CP-SAT a much better starting point.
    """
    import time

    from scheduler.solve.problem import objective_of

    t0 = time.perf_counter()
    tables = dense_tables(problem)
    rng = np.random.default_rng(seed)
    best = greedy_plan(problem, tables=tables)
    best_v = sum(objective_of(problem, best))
    k = 0
    for k in range(1, runs + 1):
        if time.perf_counter() - t0 > time_limit_s:
            break
        plan = greedy_plan(problem, wait_exponent=float(rng.uniform(0.7, 1.3)), noise=float(rng.uniform(0.1, 0.8)),
                           seed=int(rng.integers(2**31)), tables=tables)
        v = sum(objective_of(problem, plan))
        if v > best_v:
            best, best_v = plan, v
    return best, k


def ruin_and_recreate(problem: Problem, plan: Sequence[Placement], iterations: int = 600,
                      time_limit_s: float = 2.0, seed: int = 0, threshold: float = 0.02,
                      max_drop: int = 5, stop_at: float | None = None) -> tuple[list[Placement], int]:
    """Local search on a plan: drop 1..max_drop consecutive entries, let a perturbed dispatch refill
    the night around the rest, and move to the result if it is model-feasible and worth at least
    (1 - tau) times the current plan, tau falling linearly from ``threshold`` to 0 over the time
    limit (threshold accepting: small steps back let the search leave local optima). Returns
    (best plan seen, iterations done). Stops early once the best reaches ``stop_at``."""
    import time

    from scheduler.solve.problem import check_model_feasible, objective_of

    t0 = time.perf_counter()
    tables = dense_tables(problem)
    rng = np.random.default_rng(seed)
    cur = sorted(plan, key=lambda p: p.start)
    cur_v = sum(objective_of(problem, cur))
    best, best_v = cur, cur_v
    it = 0
    for it in range(1, iterations + 1):
        elapsed = time.perf_counter() - t0
        free = [p for p in cur if problem.execs[p.exec_index].fixed_start is None]
        if elapsed > time_limit_s or not free or (stop_at is not None and best_v >= stop_at):
            break
        tau = threshold * max(0.0, 1.0 - elapsed / time_limit_s)
        n_drop = int(rng.integers(1, min(max_drop, len(free)) + 1))
        i = int(rng.integers(0, len(free) - n_drop + 1))
        keep = free[:i] + free[i + n_drop:]
        cand = greedy_plan(problem, wait_exponent=float(rng.uniform(0.8, 1.2)), noise=float(rng.uniform(0.0, 0.5)),
                           seed=int(rng.integers(2**31)), tables=tables, keep=keep)
        v = sum(objective_of(problem, cand))
        if v >= cur_v * (1.0 - tau) and not check_model_feasible(problem, cand):
            cur, cur_v = cand, v
            if v > best_v:
                best, best_v = cand, v
    return best, it
