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

import numpy as np

from .problem import Placement, Problem


def dense_tables(problem: Problem) -> tuple[np.ndarray, np.ndarray]:
    """(next_start [n_exec, n_t + 1], coef [n_exec, n_t]): first feasible start >= t (n_t: none)
    and the objective coefficient of starting at t."""
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
    return nxt, coef


def greedy_plan(problem: Problem) -> list[Placement]:
    P = problem
    n_t = P.n_t
    execs = P.execs
    if not execs:
        return []
    nxt, coef = dense_tables(P)
    req = np.array([ex.req for ex in execs], dtype=np.int64)
    dur = np.array([ex.duration for ex in execs], dtype=np.int64)
    kk = np.array([ex.k for ex in execs], dtype=np.int64)

    placed: list[Placement] = []
    blocks = sorted((e for e, ex in enumerate(execs) if ex.fixed_start is not None),
                    key=lambda e: execs[e].fixed_start)
    for b in blocks:
        placed.append(Placement(b, int(execs[b].fixed_start)))
    taken = np.zeros(len(execs), dtype=bool)
    taken[blocks] = True
    # per request: start of its last placed execution (spacing), count placed
    last_start = np.full(len(P.requests), -10**9, dtype=np.int64)
    last_dur = np.zeros(len(P.requests), dtype=np.int64)
    for b in blocks:
        r = execs[b].req
        if execs[b].fixed_start > last_start[r]:
            last_start[r], last_dur[r] = execs[b].fixed_start, execs[b].duration
    # The telescope is free from now, or from the end of the entry in progress.
    cur = P.now_step
    last = None
    bi = 0
    while bi < len(blocks) and execs[blocks[bi]].fixed_start < cur:
        cur = max(cur, execs[blocks[bi]].fixed_start + execs[blocks[bi]].duration)
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
                ok &= end + P.T[req[cand], execs[nb].req] <= execs[nb].fixed_start
            if ok.any():
                sc = np.where(ok, coef[cand, np.minimum(s, n_t - 1)] / np.maximum(end - cur, 1), -1.0)
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
        cur = max(cur, execs[nb].fixed_start + execs[nb].duration)
        last = nb
        bi += 1
    placed.sort(key=lambda p: p.start)
    return placed
