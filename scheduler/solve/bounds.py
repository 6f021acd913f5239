"""Upper bounds on the model objective from relaxations, by Lagrangian subgradient.

* ``lagrangian_bound``: the time-indexed relaxation (each execution covers at least its
  duration plus the smallest transition into it; covered steps are disjoint), per-step prices.
* ``sequence_bound``: keeps the order of the night and the transitions between classes of
  requests, prices "each execution at most once"; a dynamic programme over (time, last class).

Any prices give a valid bound (weak duality), so the result holds whatever the number of
iterations; more iterations only tighten it. Each stops after its iterations and, when
``time_limit_s`` is given, at that wall-clock time too (None: deterministic). docs/solver.md
has the derivations; the tests compare both with brute force and CP-SAT optima.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass

import numpy as np

from scheduler.solve.objective import start_values
from scheduler.solve.problem import Problem

_FAR = np.iinfo(np.int64).max // 4  # "never": a transition no plan can make


def _out_of_time(t0: float, time_limit_s: float | None) -> bool:
    return time_limit_s is not None and time.perf_counter() - t0 > time_limit_s


def _self_transitions_forbidden(problem: Problem) -> np.ndarray:
    """Problem.T with a request of a single execution unable to follow itself."""
    Tm = problem.T.astype(np.int64).copy()
    n_exec_of = np.bincount([ex.req for ex in problem.execs], minlength=len(problem.requests))
    single = np.flatnonzero(n_exec_of <= 1)
    Tm[single, single] = _FAR
    return Tm


def _all_starts(problem: Problem) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(E, S, C): every (execution, start, objective value) candidate, execution by execution."""
    E, S, C = [], [], []
    for e in range(len(problem.execs)):
        st, val = start_values(problem, e)
        E.append(np.full(st.size, e)), S.append(st), C.append(val.astype(np.float64))
    return np.concatenate(E), np.concatenate(S), np.concatenate(C)


# --------------------------------------------------------------------------- time-indexed bound

@dataclass(frozen=True)
class LagrangianResult:
    bound: int  # valid upper bound on the model objective (integer units)
    order: list[int]  # executions by decreasing reduced value at the best prices
    preferred: dict[int, int]  # each execution's best start at the best prices
    iterations: int
    reduced: np.ndarray | None = None  # each execution's best reduced value at the best prices (>= 0)


class _TimeIndexed:
    """The time-indexed relaxation's candidates: execution e started at s covers [LO, HI)."""

    def __init__(self, problem: Problem):
        P = problem
        n_t = P.n_t
        # tmin over ALL predecessors (not only the sparse arcs): valid for any arc set.
        Tm = _self_transitions_forbidden(P)
        col_min = Tm.min(axis=0) if Tm.size else np.zeros(0, dtype=np.int64)
        self.E, self.S, self.C = _all_starts(P)
        tmin = np.array([0 if ex.in_progress else int(min(P.tmax[ex.req], col_min[ex.req])) for ex in P.execs])
        dur = np.array([ex.duration for ex in P.execs])
        self.LO = np.clip(self.S - tmin[self.E], 0, n_t)
        self.HI = np.clip(self.S + dur[self.E], 0, n_t)
        self.forced = np.array([ex.fixed_start is not None for ex in P.execs])
        self.seg_len = np.bincount(self.E, minlength=len(P.execs))
        self.seg0 = np.concatenate([[0], np.cumsum(self.seg_len)[:-1]])
        self.n_t = n_t

    def reduced(self, lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Reduced value of every candidate, and each execution's best."""
        cum = np.concatenate([[0.0], np.cumsum(lam)])
        red = self.C - (cum[self.HI] - cum[self.LO])
        return red, np.maximum.reduceat(red, self.seg0)

    def value(self, lam: np.ndarray, segmax: np.ndarray) -> float:
        return float(lam.sum() + np.maximum(segmax[~self.forced], 0.0).sum() + segmax[self.forced].sum())

    def best_choice(self, red: np.ndarray, segmax: np.ndarray, mask: np.ndarray | None = None) -> np.ndarray:
        """Index of each execution's first best candidate (only executions in ``mask``)."""
        is_max = red >= np.repeat(segmax, self.seg_len) - 1e-9
        idx = np.flatnonzero(is_max if mask is None else is_max & mask[self.E])
        _, first = np.unique(self.E[idx], return_index=True)
        return idx[first]

    def subgradient(self, chosen: np.ndarray) -> np.ndarray:
        """1 - (number of chosen candidates covering each step)."""
        diff = np.zeros(self.n_t + 1)
        np.add.at(diff, self.LO[chosen], 1.0)
        np.add.at(diff, self.HI[chosen], -1.0)
        return 1.0 - np.cumsum(diff)[:self.n_t]


def lagrangian_bound(problem: Problem, lower: int, *, iterations: int = 300,
                     time_limit_s: float | None = 2.0) -> LagrangianResult:
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
    t_start = time.perf_counter()
    if not P.execs:
        return LagrangianResult(0, [], {}, 0)
    rel = _TimeIndexed(P)
    lam = np.full(P.n_t, max(lower, 1) / max(1, P.n_t - P.now_step), dtype=np.float64)
    lam[: P.now_step] = 0.0
    best = (math.inf, lam.copy())
    theta, stall = 1.0, 0
    it = 0
    for it in range(1, iterations + 1):
        red, segmax = rel.reduced(lam)
        val = rel.value(lam, segmax)
        if val < best[0] - 1e-9:
            best, stall = (val, lam.copy()), 0
        else:
            stall += 1
            if stall >= 8:
                theta, stall = theta / 2, 0
        g = rel.subgradient(rel.best_choice(red, segmax, rel.forced | (segmax > 0)))
        nrm = float(g @ g)
        if nrm == 0 or theta < 1e-4 or _out_of_time(t_start, time_limit_s):
            break
        lam = np.maximum(0.0, lam - theta * max(val - lower, 1e-6) / nrm * g)
    red, segmax = rel.reduced(best[1])
    preferred = {int(rel.E[i]): int(rel.S[i]) for i in rel.best_choice(red, segmax)}
    order = [int(e) for e in np.argsort(-segmax, kind="stable")]
    return LagrangianResult(int(math.floor(best[0] + 1e-6)), order, preferred, it, np.maximum(segmax, 0.0))


# --------------------------------------------------------------------------- sequence bound

def _classes(problem: Problem, sectors: int) -> tuple[np.ndarray, np.ndarray]:
    """Class of each request (instrument, band, azimuth sector of its mean position) and the
    smallest transition bound between any two requests of two classes (grid steps)."""
    P = problem
    n = len(P.requests)
    key: dict[tuple, int] = {}
    cls = np.empty(n, dtype=np.int64)
    for r in range(n):
        sec = int(P.mean_az[r] // (360.0 / sectors)) % sectors if sectors > 1 else 0
        cls[r] = key.setdefault((P.instruments[r], P.bands[r], sec), len(key))
    K = len(key)
    Lc = np.full((K, K), _FAR, dtype=np.int64)
    np.minimum.at(Lc, (cls[:, None].repeat(n, 1), cls[None, :].repeat(n, 0)), _self_transitions_forbidden(P))
    return cls, Lc


class _SequenceDP:
    """The sequence relaxation's candidates in order of start, and its dynamic programme.

    Kept entries (in progress, frozen) are in every plan: a bonus M on them changes no plan's
    ranking, and M * (number kept) is taken off the bound again.
    """

    def __init__(self, problem: Problem, sectors: int):
        P = problem
        execs = P.execs
        self.n_t = P.n_t
        cls_r, self.Lc = _classes(P, sectors)
        self.K = self.Lc.shape[0]
        self.forced = np.array([ex.fixed_start is not None for ex in execs])
        self.M = 10.0 * float(sum(int(ex.bucket_coef.max()) for ex in execs)) + 1.0
        E, S, C = _all_starts(P)
        C = C + np.where(self.forced[E], self.M, 0.0)
        order = np.argsort(S, kind="stable")
        self.E, self.S, self.C = E[order], S[order], C[order]
        dur = np.array([ex.duration for ex in execs], dtype=np.int64)
        ecls = cls_r[np.array([ex.req for ex in execs], dtype=np.int64)]
        self.END, self.CL = self.S + dur[self.E], ecls[self.E]
        self.by_start = np.searchsorted(self.S, np.arange(self.n_t + 1), side="left")
        self.t0 = int(min(P.now_step, self.S.min()))  # an entry in progress started before now
        self.n_exec = len(execs)

    def best_sequence(self, mu: np.ndarray) -> tuple[float, np.ndarray]:
        """(value of the best sequence at prices mu, how often it uses each execution)."""
        R, RT, bp, bpk = self._programme(self.C - mu[self.E])
        kbest = int(np.argmax(R[self.n_t]))
        seq_val = max(0.0, float(R[self.n_t, kbest]))
        count = np.zeros(self.n_exec)
        if seq_val > 0:  # walk the back-pointers
            t, k = int(RT[self.n_t, kbest]), kbest
            while t >= 0 and bp[t, k] >= 0:
                c = int(bp[t, k])
                count[self.E[c]] += 1
                pk = int(bpk[t, k])
                if pk < 0:
                    break
                t, k = int(RT[int(self.S[c]) - self.Lc[pk, k], pk]), pk
        return seq_val, count

    def _programme(self, val: np.ndarray):
        """One pass over the grid. F[t, k]: best value of a sequence whose last entry ends at t
        with class k; R: running max of F over times <= t, RT where it was reached; bp / bpk:
        the candidate that set F[t, k] and its predecessor class (-1: first entry)."""
        n_t, K, NEG = self.n_t, self.K, -1e18
        F = np.full((n_t + 1, K), NEG)
        R = np.full((n_t + 1, K), NEG)
        RT = np.zeros((n_t + 1, K), dtype=np.int64)
        bp = np.full((n_t + 1, K), -1, dtype=np.int64)
        bpk = np.full((n_t + 1, K), -1, dtype=np.int64)
        lag_idx = np.arange(K)[:, None]
        for s in range(self.t0, n_t + 1):
            if s > 0:
                better = F[s] > R[s - 1]
                R[s] = np.where(better, F[s], R[s - 1])
                RT[s] = np.where(better, s, RT[s - 1])
            else:
                R[s], RT[s] = F[s], 0
            lo, hi = self.by_start[s], self.by_start[s + 1] if s < n_t else len(self.S)
            if lo >= hi:
                continue
            # best predecessor for a start of class k2 at s: max_k R[s - Lc[k, k2], k], or none (0)
            tt = s - self.Lc
            got = np.where(tt >= self.t0, R[np.clip(tt, 0, n_t), lag_idx], NEG)
            pk = np.argmax(got, axis=0)
            pv = got[pk, np.arange(K)]
            first = pv < 0.0
            pv, pk = np.where(first, 0.0, pv), np.where(first, -1, pk)
            idx = np.arange(lo, hi)
            cand = pv[self.CL[idx]] + val[idx]
            # keep the best candidate per (end, class), then compare with F
            key = self.END[idx] * K + self.CL[idx]
            o = np.lexsort((cand, key))
            last = np.ones(o.size, dtype=bool)
            last[:-1] = key[o][1:] != key[o][:-1]
            w = o[last]
            ends, cl, cv = self.END[idx][w], self.CL[idx][w], cand[w]
            upd = cv > F[ends, cl]
            ends, cl, cv, wi = ends[upd], cl[upd], cv[upd], idx[w][upd]
            F[ends, cl] = cv
            bp[ends, cl] = wi
            bpk[ends, cl] = pk[cl]
        return R, RT, bp, bpk


def sequence_bound(problem: Problem, lower: int, *, mu0: np.ndarray | None = None, sectors: int = 8,
                   iterations: int = 200, time_limit_s: float | None = 2.0) -> tuple[int, int]:
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
    if not problem.execs:
        return 0, 0
    t_start = time.perf_counter()
    dp = _SequenceDP(problem, sectors)
    n_kept = int(dp.forced.sum())
    mu = np.zeros(dp.n_exec) if mu0 is None else np.asarray(mu0, dtype=np.float64).copy()
    best = math.inf
    theta, stall = 1.0, 0
    it = 0
    for it in range(1, iterations + 1):
        seq_val, count = dp.best_sequence(mu)
        bound = float(mu.sum()) + seq_val - dp.M * n_kept
        if bound < best - 1e-9:
            best, stall = bound, 0
        else:
            stall += 1
            if stall >= 5:
                theta, stall = theta / 2, 0
        g = 1.0 - count
        g[(mu <= 0) & (g > 0)] = 0.0  # projected: mu cannot go below 0
        g[dp.forced] = 0.0
        nrm = float(g @ g)
        if nrm == 0 or theta < 1e-3 or _out_of_time(t_start, time_limit_s):
            break
        mu = np.maximum(0.0, mu - theta * max(best - lower, 1e-6) / nrm * g)
    return int(math.floor(best + 1e-6)), it
