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
from dataclasses import dataclass

import numpy as np

from scheduler.solve.budget import StageClock
from scheduler.solve.objective import start_values
from scheduler.solve.problem import Problem

_FAR = np.iinfo(np.int64).max // 4  # "never": a transition no plan can make


_CHUNK = 512  # rows of Problem.T handled at once (memory stays linear in the number of requests)


def _single_execution(problem: Problem) -> np.ndarray:
    """[n_req] True for a request with one execution tonight: it cannot follow itself."""
    n_exec_of = np.bincount(problem.exec_requests(), minlength=len(problem.requests))
    return n_exec_of <= 1


def _row_chunks(problem: Problem):
    """(rows, T[rows] as int64 with a single-execution request unable to follow itself), by chunks."""
    n = len(problem.requests)
    single = _single_execution(problem)
    for r0 in range(0, n, _CHUNK):
        rows = np.arange(r0, min(n, r0 + _CHUNK))
        block = np.asarray(problem.T[rows], dtype=np.int64)
        own = rows[single[rows]]
        block[own - r0, own] = _FAR
        yield rows, block


def _smallest_transition_into(problem: Problem) -> np.ndarray:
    """[n_req] the smallest transition bound into each request from any request."""
    out = np.full(len(problem.requests), _FAR, dtype=np.int64)
    for _, block in _row_chunks(problem):
        np.minimum(out, block.min(axis=0), out=out)
    return out


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
        col_min = _smallest_transition_into(P)
        self.E, self.S, self.C = _all_starts(P)
        tmin = np.array([0 if ex.in_progress else int(min(P.tmax[ex.req], col_min[ex.req])) for ex in P.execs])
        dur = P.exec_durations()
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
    clock = StageClock(time_limit_s)
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
        if nrm == 0 or theta < 1e-4 or clock.out_of_time():
            break
        lam = np.maximum(0.0, lam - theta * max(val - lower, 1e-6) / nrm * g)
    red, segmax = rel.reduced(best[1])
    preferred = {int(rel.E[i]): int(rel.S[i]) for i in rel.best_choice(red, segmax)}
    order = [int(e) for e in np.argsort(-segmax, kind="stable")]
    return LagrangianResult(int(math.floor(best[0] + 1e-6)), order, preferred, it, np.maximum(segmax, 0.0))


# --------------------------------------------------------------------------- sequence bound

# Requests in the model up to which the sequence bound, after its passes over classes, makes more
# passes with every request its own class (the transitions then are the model's own T[i, j]).
# One such pass reads K predecessors for each (start, class) pair a candidate has: 0.14-0.17 s
# at 261-264 requests on the 2-core machine (0.06-0.07 s with 119-126 classes), 3 s at 1009
# (0.14 s with 156 classes). With a request's repeats kept apart (_requests_as_classes) these
# passes bring the 500-request benchmark's 10 s bound from 455.1 to 452 (docs/solver.md,
# "Bound and gap"). At 2000 requests (1009 in the model) the 60 s build's bound stage, about
# 4.6 s, mostly leaves no room for a 3 s pass; in one trial run it did, the bound went from 598.3
# to 590.4.
REQUEST_CLASSES_MAX = 1200
CLASS_PHASE_SHARE = 0.3  # of the sequence bound's time (wall clock) spent on the class passes
PASS_COST_MARGIN = 1.5  # on the estimate of a request-class pass's time (_pass_work_ratio)


def _requests_in_model(problem: Problem) -> np.ndarray:
    """The requests with at least one execution tonight (sorted)."""
    return np.unique(problem.exec_requests())


def _requests_as_classes(problem: Problem) -> tuple[np.ndarray, np.ndarray]:
    """Every request with an execution its own class: Lc is the model's T between them (a
    request with one execution cannot follow itself), and a request's repeat cannot follow
    it closer than its spacing allows."""
    P = problem
    used = _requests_in_model(P)
    cls = np.zeros(len(P.requests), dtype=np.int64)
    cls[used] = np.arange(used.size)
    Lc = np.full((used.size, used.size), _FAR, dtype=np.int64)
    for rows, block in _row_chunks(P):
        mine = np.isin(rows, used)
        if mine.any():
            Lc[cls[rows[mine]]] = block[mine][:, used]
    # Two entries of one request next to each other start at least max(duration of the first,
    # spacing) apart (the model's repeat rule), so the gap between them is at least spacing -
    # its longest execution. Without this the relaxation stacks a request's repeats back to
    # back at its best merit: on the benchmark's 500-request queues the converged relaxation
    # (column generation) falls from 455.15 to 451.34 (standard) and from 193.6 to about 186
    # (dense) with it.
    longest = np.zeros(len(P.requests), dtype=np.int64)
    np.maximum.at(longest, P.exec_requests(), P.exec_durations())
    k = np.arange(used.size)
    Lc[k, k] = np.maximum(Lc[k, k], P.spacing_steps[used] - longest[used])
    return cls, Lc


def _classes(problem: Problem, sectors: int) -> tuple[np.ndarray, np.ndarray]:
    """Class of each request (instrument, band, azimuth sector of its mean position) and the
    smallest transition bound between any two requests of two classes (grid steps).
    sectors=0: every request its own class (``_requests_as_classes``)."""
    P = problem
    if sectors == 0:
        return _requests_as_classes(P)
    n = len(P.requests)
    key: dict[tuple, int] = {}
    cls = np.empty(n, dtype=np.int64)
    for r in range(n):
        sec = int(P.mean_az[r] // (360.0 / sectors)) % sectors if sectors > 1 else 0
        cls[r] = key.setdefault((P.instruments[r], P.bands[r], sec), len(key))
    K = len(key)
    Lc = np.full((K, K), _FAR, dtype=np.int64)
    # row chunks: columns reduced by class (sorted, reduceat), then rows by class (minimum.at)
    order = np.argsort(cls, kind="stable")
    cuts = np.flatnonzero(np.r_[True, cls[order][1:] != cls[order][:-1]])
    col_cls = cls[order][cuts]
    for rows, block in _row_chunks(P):
        by_col = np.minimum.reduceat(block[:, order], cuts, axis=1)  # [chunk, classes present]
        part = np.full((rows.size, K), _FAR, dtype=np.int64)
        part[:, col_cls] = by_col
        np.minimum.at(Lc, cls[rows], part)
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
        # a free execution comes after its request's held ones of lower number (repeats run in
        # order, start to start at least max(duration, spacing)): earlier candidates are in no
        # plan. Without this a re-plan that holds a later repeat let the programme put the free
        # repeats before it (on small re-plan scenes, bounds 1.1-2.4 times the optimum).
        earliest = np.full(len(execs), -1, dtype=np.int64)
        for f, held in enumerate(execs):
            if held.fixed_start is not None:
                after = int(held.fixed_start) + max(held.duration, int(P.spacing_steps[held.req]))
                for e, ex in enumerate(execs):
                    if ex.req == held.req and ex.fixed_start is None and ex.k > held.k:
                        earliest[e] = max(earliest[e], after)
        keep = S >= earliest[E]
        E, S, C = E[keep], S[keep], C[keep]
        order = np.argsort(S, kind="stable")
        self.E, self.S, self.C = E[order], S[order], C[order]
        dur = P.exec_durations()
        ecls = cls_r[P.exec_requests()]
        self.END, self.CL = self.S + dur[self.E], ecls[self.E]
        self.by_start = np.searchsorted(self.S, np.arange(self.n_t + 1), side="left")
        self.t0 = int(min(P.now_step, self.S.min()))  # an entry in progress started before now
        self.n_exec = len(execs)
        finite = self.Lc[self.Lc < _FAR]
        self.Lmin = int(finite.min()) if finite.size else 0
        self.block = int(min(64, max(1, int(dur.min()) + self.Lmin)))

    @property
    def kept_bonus(self) -> float:
        """What the kept entries' bonus adds to every sequence that holds them all."""
        return self.M * int(self.forced.sum())

    def bound_at(self, prices_total: float, seq_val: float) -> float:
        """The relaxation's bound at prices summing to ``prices_total`` (executions and any
        windows) whose best sequence is worth ``seq_val``: weak duality, kept bonus taken off."""
        return prices_total + seq_val - self.kept_bonus

    def best_sequence(self, mu: np.ndarray) -> tuple[float, np.ndarray]:
        """(value of the best sequence at prices mu, how often it uses each execution)."""
        seq_val, cands = self.sequence(self.C - mu[self.E])
        return seq_val, np.bincount(self.E[cands], minlength=self.n_exec).astype(np.float64)

    def sequence(self, val: np.ndarray) -> tuple[float, np.ndarray]:
        """(value, candidate indices in order of start) of the best sequence when candidate c is
        worth val[c]; the empty sequence (0) when nothing is worth more."""
        R, RT, bp, bpk = self._programme(val)
        kbest = int(np.argmax(R[self.n_t]))
        seq_val = max(0.0, float(R[self.n_t, kbest]))
        out: list[int] = []
        if seq_val > 0:  # walk the back-pointers
            t, k = int(RT[self.n_t, kbest]), kbest
            while t >= 0 and bp[t, k] >= 0:
                c = int(bp[t, k])
                out.append(c)
                pk = int(bpk[t, k])
                if pk < 0:
                    break
                t, k = int(RT[int(self.S[c]) - self.Lc[pk, k], pk]), pk
        return seq_val, np.array(out[::-1], dtype=np.int64)

    def _programme(self, val: np.ndarray):
        """One pass over the grid. F[t, k]: best value of a sequence whose last entry ends at t
        with class k; R: running max of F over times <= t, RT where it was reached; bp / bpk:
        the candidate that set F[t, k] and its predecessor class (-1: first entry).

        Vectorised over blocks of ``self.block`` start steps: a start s reads R at s - Lc >=
        s - Lmin and its entries end at s + duration >= s + Dmin, so with blocks of at most
        Dmin + Lmin steps nothing a block writes is read inside it, and R is final wherever it
        is read (each block first completes R up to the last step it reads)."""
        n_t, K, NEG, t0 = self.n_t, self.K, -1e18, self.t0
        F = np.full((n_t + 1, K), NEG)
        R = np.full((n_t + 1, K), NEG)
        RT = np.zeros((n_t + 1, K), dtype=np.int64)
        bp = np.full((n_t + 1, K), -1, dtype=np.int64)
        bpk = np.full((n_t + 1, K), -1, dtype=np.int64)
        k_idx = np.arange(K)[None, :]
        done = t0  # R[t] is final for t < done

        def complete_r(upto: int) -> None:
            nonlocal done
            if upto <= done:
                return
            seg = F[done:upto]
            prev = R[done - 1] if done > t0 else np.full(K, NEG)
            acc = np.maximum.accumulate(np.vstack([prev[None, :], seg]), axis=0)
            R[done:upto] = acc[1:]
            where = np.where(seg > acc[:-1], np.arange(done, upto)[:, None], -1)
            prev_t = RT[done - 1] if done > t0 else np.zeros(K, dtype=np.int64)
            RT[done:upto] = np.maximum.accumulate(np.vstack([prev_t[None, :], where]), axis=0)[1:]
            done = upto

        B = self.block
        for s0 in range(t0, n_t + 1, B):
            s1 = min(s0 + B, n_t + 1)
            complete_r(min(s1 - self.Lmin, n_t + 1))
            lo, hi = self.by_start[s0], self.by_start[s1] if s1 <= n_t else len(self.S)
            if lo >= hi:
                continue
            # best predecessor for a start of class k2 at s: max_k R[s - Lc[k, k2], k], or none
            # (0); only for the (s, k2) pairs some candidate starts at
            idx = np.arange(lo, hi)
            rel, cl_all = self.S[idx] - s0, self.CL[idx]
            pairs, inv = np.unique(rel * K + cl_all, return_inverse=True)
            tt = (s0 + pairs // K)[:, None] - self.Lc[:, pairs % K].T  # [pairs, K]
            got = np.where(tt >= t0, R[np.clip(tt, 0, n_t), k_idx], NEG)
            pk = np.argmax(got, axis=1)
            pv = got[np.arange(pairs.size), pk]
            first = pv < 0.0
            pv, pk = np.where(first, 0.0, pv)[inv], np.where(first, -1, pk)[inv]
            cand = pv + val[idx]
            # keep the best candidate per (end, class), then compare with F
            key = self.END[idx] * K + cl_all
            o = np.lexsort((cand, key))
            last = np.ones(o.size, dtype=bool)
            last[:-1] = key[o][1:] != key[o][:-1]
            w = o[last]
            ends, cl, cv = self.END[idx][w], cl_all[w], cand[w]
            upd = cv > F[ends, cl]
            ends, cl, cv, w = ends[upd], cl[upd], cv[upd], w[upd]
            F[ends, cl] = cv
            bp[ends, cl] = idx[w]
            bpk[ends, cl] = pk[w]
        complete_r(n_t + 1)
        return R, RT, bp, bpk


@dataclass(frozen=True)
class SequenceBound:
    bound: int  # valid upper bound (integer objective units)
    iterations: int  # passes of the dynamic programme
    columns: int = 0  # columns of the column generation's master (0: it did not run)
    cuts: int = 0  # its window cuts
    prices: str = "subgradient"  # how the request-class passes set their prices, and why


def sequence_bound(problem: Problem, lower: int, *, mu0: np.ndarray | None = None, sectors: int = 8,
                   iterations: int = 200, time_limit_s: float | None = 2.0,
                   stop_gap: float | None = None, start_plan=(), on_sequence=None) -> SequenceBound:
    """Upper bound that keeps the order of the night and the transitions between classes.

    Relaxation: a plan is a sequence in time of (execution, start) with no overlap and gaps of at
    least Lc[class(prev), class(next)] steps, Lc being the smallest model transition bound between
    any two requests of the two classes (class = instrument, band, azimuth sector), so every
    model-feasible plan is such a sequence. Only "each execution at most once" is dropped, priced
    by mu >= 0 (Lagrange): for any mu,

        B(mu) = sum_e mu_e + max over sequences of sum (c_e(s) - mu_e)

    bounds the model's optimum; the max is a dynamic programme over (time, last class). Subgradient
    steps on mu (Polyak, toward ``lower``). Stops early once (bound - lower) / bound <=
    ``stop_gap`` (the plan in hand is then proven good enough).

    When the model has at most REQUEST_CLASSES_MAX requests, the class passes take
    CLASS_PHASE_SHARE of the time (or all but a quarter of the iterations; with fewer than four
    there is no refinement) and the rest goes to
    passes with every request its own class, from the best class prices: the model's own
    T[i, j] then separates consecutive entries, a tighter relaxation (every plan is still such
    a sequence) that is slower per pass; when not even one such pass would fit in the time left,
    the class passes go on instead. ``sectors=0`` makes every pass so. Those passes set their
    prices by column generation (``_column_generation``, from ``start_plan``, calling
    ``on_sequence`` with each sequence), and by subgradient steps once it stalls, or from the
    start where fewer than CG_MIN_PASSES passes fit or ``start_plan`` has more than
    CG_MAX_ENTRIES entries.
    """
    if not problem.execs:
        return SequenceBound(0, 0)
    n_req = _requests_in_model(problem).size
    more = iterations // 4  # the request-class passes (none under 4 iterations)
    refine = sectors != 0 and n_req <= REQUEST_CLASSES_MAX and more > 0 and (time_limit_s is None or time_limit_s > 0)
    first_s = None if time_limit_s is None else (CLASS_PHASE_SHARE if refine else 1.0) * time_limit_s
    stage = StageClock(time_limit_s)
    mu = np.zeros(len(problem.execs)) if mu0 is None else np.asarray(mu0, dtype=np.float64).copy()
    dp = _SequenceDP(problem, sectors)
    best, mu, its, met = _subgradient(dp, lower, mu, iterations - more if refine else iterations,
                                      StageClock(first_s), stop_gap, 1.0)
    if not refine or met:
        return SequenceBound(int(math.floor(best + 1e-6)), its)
    # a pass reads K predecessors for each (start, class) pair some candidate has, so its
    # cost goes as pairs x K (measured 2.4-2.5 times a class pass at 500 requests, where
    # this ratio says 3.3-3.8, and 22.6 times at 2000, where it says 24.4; the margin also
    # covers building its programme): skip when even one would not fit in the time left
    one_pass_s = None if time_limit_s is None else (
        PASS_COST_MARGIN * stage.spent() * time_limit_s / its * _pass_work_ratio(problem, dp))

    def left() -> float | None:
        return None if time_limit_s is None else max(0.0, time_limit_s * (1.0 - stage.spent()))

    if one_pass_s is not None and one_pass_s > left():
        # with no room for one, the class passes go on in the time left instead
        best2, _, its2, _ = _subgradient(dp, lower, mu, more, StageClock(left()), stop_gap, 0.25)
        return SequenceBound(int(math.floor(min(best, best2) + 1e-6)), its + its2)
    fine = _SequenceDP(problem, 0)
    if (time_limit_s is None and more < CG_MIN_PASSES) or len(start_plan) > CG_MAX_ENTRIES:
        # too few passes for the master to learn anything, or a night of many short entries,
        # where it learns too slowly: subgradient steps
        why = "few passes" if len(start_plan) <= CG_MAX_ENTRIES else f"{len(start_plan)} entries"
        best2, _, its2, _ = _subgradient(fine, lower, mu, more, StageClock(left()), stop_gap, 0.25)
        return SequenceBound(int(math.floor(min(best, best2) + 1e-6)), its + its2, prices=f"subgradient ({why})")
    cg = _column_generation(problem, fine, lower, mu, more, StageClock(left()), stop_gap, start_plan, on_sequence,
                            min_passes=CG_MIN_PASSES)
    best, its = min(best, cg.best), its + cg.passes
    if not (cg.met or cg.converged) and cg.passes < more and (time_limit_s is None or left() > 0):
        best2, _, its2, _ = _subgradient(fine, cg.lower, cg.mu, more - cg.passes, StageClock(left()), stop_gap, 0.25)
        best, its = min(best, best2), its + its2
    return SequenceBound(int(math.floor(best + 1e-6)), its, cg.columns, cg.cuts, cg.outcome)


def _pass_work_ratio(problem: Problem, dp: _SequenceDP) -> float:
    """How much more a pass with every request its own class reads than a pass of ``dp``:
    (start, class) pairs x classes, for both."""
    def work(cls: np.ndarray) -> int:
        return np.unique(dp.S * (int(cls.max()) + 1) + cls).size * np.unique(cls).size
    return work(problem.exec_requests()[dp.E]) / work(dp.CL)


def _subgradient(dp: _SequenceDP, lower: int, mu: np.ndarray, iterations: int, clock: StageClock,
                 stop_gap: float | None, theta: float) -> tuple[float, np.ndarray, int, bool]:
    """Subgradient steps on the sequence relaxation's prices: (best bound, its prices,
    iterations, whether the stop gap was proven)."""
    best, best_mu = math.inf, mu
    stall, it, met = 0, 0, False
    for it in range(1, iterations + 1):
        seq_val, count = dp.best_sequence(mu)
        bound = dp.bound_at(float(mu.sum()), seq_val)
        if bound < best - 1e-9:
            best, best_mu, stall = bound, mu, 0
        else:
            stall += 1
            if stall >= 5:
                theta, stall = theta / 2, 0
        g = 1.0 - count
        g[(mu <= 0) & (g > 0)] = 0.0  # projected: mu cannot go below 0
        g[dp.forced] = 0.0
        nrm = float(g @ g)
        met = stop_gap is not None and best - lower <= stop_gap * abs(best)
        if nrm == 0 or theta < 1e-3 or met or clock.out_of_time():
            break
        mu = np.maximum(0.0, mu - theta * max(best - lower, 1e-6) / nrm * g)
    return best, best_mu, it, met


# --------------------------------------------------------------------------- column generation

# The request-class phase of the sequence bound sets its prices by column generation when it can:
# a linear master (GLOP) over the sequences found so far ("at most one sequence", "each execution
# at most once", and "at most one start of a request in any spacing-long window" as cuts) gives
# prices, the dynamic programme gives the best sequence at those prices (a new column) and a valid
# bound. On the 500-request standard benchmark queue it reaches the converged relaxation
# (450.02, cuts included) in about 35 passes, where the subgradient is at 451.6-452.3, and its
# columns, made into plans (heuristics.plan_from_sequence), include the best plan known (448.20).
# On the dense queue (60-150 entries a sequence) the master learns too slowly: there
# (CG_MAX_ENTRIES), where too few passes fit (CG_MIN_PASSES) and after CG_STALL passes without
# progress, the subgradient takes the request-class passes as before.
CG_BOX = 0.25  # the master's duals stay within center +- CG_BOX x (center + mean center, with a floor)
CG_STALL = 8  # passes without a better bound or a better master before the subgradient takes over
CG_CUTS_PER_PASS = 30  # window cuts added to the master per pass, the most violated first
CG_MIN_PASSES = 12  # fewer request-class passes than this (timed by the first one): subgradient steps only
# A plan in hand with more entries than this: subgradient steps only. Measured from the same
# class prices, 60 passes: standard 500 (17 entries) column generation 450.02 against the
# subgradient's 451.6; dense 500 (59 entries) 191.74 against 186.78, the master learning slowly
# from sequences of 60-150 entries.
CG_MAX_ENTRIES = 40


@dataclass
class _Columns:
    """What column generation hands back: the best bound, its prices, passes, whether the stop
    gap was proven, and counts for the build's stats."""

    best: float
    mu: np.ndarray
    passes: int
    met: bool
    converged: bool  # the master met the bound: no prices can do better on this relaxation
    lower: float  # the best plan value known at the end (raised by on_sequence)
    columns: int
    cuts: int
    outcome: str  # why it stopped, for the build's stats


def _column_generation(problem: Problem, dp: _SequenceDP, lower: float, mu: np.ndarray, iterations: int,
                       clock: StageClock, stop_gap: float | None, start_plan=(), on_sequence=None,
                       min_passes: int = 0) -> _Columns:
    """Column generation over the sequences of ``dp`` (every request its own class), starting at
    the prices ``mu``. The first pass runs the programme at ``mu`` itself; each later pass solves
    the master (its duals kept within a box around the best prices so far, below), runs the
    programme at its duals, adds the sequence as a column and separates window cuts. The bound
    at any prices mu >= 0, lam >= 0 is

        sum mu + sum lam + max over sequences (value - mu of its executions - lam of its windows)

    (every plan is such a sequence, uses each execution at most once and each window at most
    once), so every pass gives a valid bound whatever the master does. Stops at ``iterations``
    passes, at the clock, when the stop gap is proven against ``lower``, when the master meets
    the bound (converged) or after CG_STALL passes in which neither the bound nor the master
    got better. ``on_sequence(pairs)`` is called with each new sequence's (execution, start)
    pairs and returns the best plan value known (the sequences are near-plans); it raises
    ``lower``. ``start_plan``: (execution, start) pairs of a plan, the master's first column.
    With a clock, it also stops after its first pass when fewer than ``min_passes`` more passes
    of that pass's measured time fit in the clock's limit (the subgradient does better with few)."""
    from ortools.linear_solver import pywraplp  # only the builds that get here pay the import

    P = problem
    creq = P.exec_requests()[dp.E]  # request of each candidate
    spacing = P.spacing_steps
    n_exec_of = np.bincount(P.exec_requests(), minlength=len(P.requests))
    windowed = (n_exec_of >= 2) & (spacing >= 2)

    lp = pywraplp.Solver.CreateSolver("GLOP")
    one = lp.Constraint(-lp.infinity(), 1.0)
    once = [lp.Constraint(-lp.infinity(), 1.0) for _ in range(dp.n_exec)]
    objective = lp.Objective()
    objective.SetMaximization()
    cols: list[np.ndarray] = []  # candidate indices of each column
    xs: list = []
    cuts: list[tuple[int, int, object]] = []  # (request, first step, row)

    # every column's candidates, concatenated (column number, request, start): a cut's
    # coefficients are one count over them, not a loop over columns
    all_col = np.zeros(0, dtype=np.int64)
    all_req = np.zeros(0, dtype=np.int64)
    all_start = np.zeros(0, dtype=np.int64)

    def in_windows(col: np.ndarray) -> np.ndarray:
        """How many starts of ``col`` each cut's window holds."""
        if not cuts:
            return np.zeros(0, dtype=np.int64)
        r = np.array([c[0] for c in cuts])
        t = np.array([c[1] for c in cuts])
        inside = ((creq[col][None, :] == r[:, None]) & (dp.S[col][None, :] >= t[:, None])
                  & (dp.S[col][None, :] < (t + spacing[r])[:, None]))
        return inside.sum(axis=1)

    def add_column(col: np.ndarray) -> None:
        nonlocal all_col, all_req, all_start
        x = lp.NumVar(0.0, lp.infinity(), "")
        one.SetCoefficient(x, 1.0)
        for e, k in zip(*np.unique(dp.E[col], return_counts=True)):
            once[int(e)].SetCoefficient(x, float(k))
        for (_, _, row), k in zip(cuts, in_windows(col)):
            if k:
                row.SetCoefficient(x, float(k))
        objective.SetCoefficient(x, float(dp.C[col].sum()))
        all_col = np.r_[all_col, np.full(col.size, len(cols))]
        all_req, all_start = np.r_[all_req, creq[col]], np.r_[all_start, dp.S[col]]
        cols.append(col)
        xs.append(x)

    def window_penalty(lam: np.ndarray) -> np.ndarray:
        pen = np.zeros(dp.E.size)
        for (r, t, _), v in zip(cuts, lam):
            if v > 0:
                lo, hi = dp.by_start[t], dp.by_start[min(t + int(spacing[r]), dp.n_t)]
                pen[lo:hi] += np.where(creq[lo:hi] == r, v, 0.0)
        return pen

    def separate(x_val: list[float]) -> None:
        """Window cuts the master's solution violates: more than one start of a request (in
        total over the columns it uses) within one spacing."""
        starts: dict[int, list[tuple[int, float]]] = {}
        for x, col in zip(x_val, cols):
            if x > 1e-9:
                for c in col[windowed[creq[col]]]:
                    starts.setdefault(int(creq[c]), []).append((int(dp.S[c]), x))
        have = {(r, t) for r, t, _ in cuts}
        found = []
        for r, lst in starts.items():
            s_arr = np.array([a for a, _ in lst])
            w_arr = np.array([b for _, b in lst])
            for t in np.unique(s_arr):
                total = float(w_arr[(s_arr >= t) & (s_arr < t + spacing[r])].sum())
                if total > 1.0 + 1e-6 and (r, int(t)) not in have:
                    found.append((-total, r, int(t)))
        for _, r, t in sorted(found)[:CG_CUTS_PER_PASS]:
            row = lp.Constraint(-lp.infinity(), 1.0)
            hits = (all_req == r) & (all_start >= t) & (all_start < t + spacing[r])
            for j, k in enumerate(np.bincount(all_col[hits], minlength=len(cols))):
                if k:
                    row.SetCoefficient(xs[j], float(k))
            cuts.append((r, t, row))

    # the plan in hand is the first column: the master has a real plan from the start
    plan_cols = []
    for e, s in start_plan:
        lo, hi = dp.by_start[s], dp.by_start[min(s + 1, dp.n_t)]
        hit = lo + np.flatnonzero(dp.E[lo:hi] == e)
        plan_cols.extend(hit[:1].tolist())
    if plan_cols:
        add_column(np.array(plan_cols, dtype=np.int64))

    # Box stabilisation: each "once" row gets a surplus (priced center + width) and a slack
    # (priced center - width), so the master's duals stay within center +- width; the center
    # moves to the duals whenever they give a better bound. Without it the first duals of a
    # master with a handful of columns are extreme (the plan's executions priced high, the rest
    # 0) and the bound at them is worse than where it started (587 against 455 on the standard
    # benchmark queue), for ten passes and more.
    surplus = [lp.NumVar(0.0, lp.infinity(), "") for _ in range(dp.n_exec)]
    slack = [lp.NumVar(0.0, 1.0, "") for _ in range(dp.n_exec)]
    for e in range(dp.n_exec):
        once[e].SetCoefficient(surplus[e], -1.0)
        once[e].SetCoefficient(slack[e], 1.0)

    # the box's width has a floor: from prices all 0 a width of CG_BOX x (center + mean) would
    # pin every dual at 0 (a tenth of a typical candidate's value, kept entries' bonus aside)
    free_values = dp.C[~dp.forced[dp.E]]
    floor = 0.1 * float(free_values.mean()) if free_values.size else 0.0

    def set_box() -> None:
        """Prices of the surplus and slack variables around the current center. (Boxing the
        window cuts' prices as well was tried: on the standard 500 queue the bound got to
        450.5 but the column that is the 448.20 plan no longer came up in a 10 s build.)"""
        width = CG_BOX * (center + max(float(center.mean()), floor))
        for e in range(dp.n_exec):
            objective.SetCoefficient(surplus[e], -float(center[e] + width[e]))
            objective.SetCoefficient(slack[e], float(max(0.0, center[e] - width[e])))

    center = np.maximum(mu, 0.0)
    set_box()
    best, best_master, best_boxed = math.inf, -math.inf, -math.inf
    stall, met, converged, passes = 0, False, False, 0
    outcome = "column generation: all passes done"
    for passes in range(1, iterations + 1):
        if passes == 1:  # the prices handed in, as they are
            mu_p, lam_p, master, boxed, x_val = center, np.zeros(len(cuts)), -math.inf, -math.inf, []
        else:
            if lp.Solve() != pywraplp.Solver.OPTIMAL:
                # the warm-started simplex can fail after many passes and then keeps failing;
                # its duals are not read (any prices would still give a valid bound)
                outcome = "column generation: master not solved, then subgradient"
                break
            x_val = [x.solution_value() for x in xs]
            boxed = objective.Value()  # the master within its box: rises while the box stays
            # the plan the master holds, when it needs no surplus (else it is not a plan mix)
            inside = max(v.solution_value() for v in surplus) <= 1e-7
            master = float(sum(objective.GetCoefficient(x) * v for x, v in zip(xs, x_val))) - dp.kept_bonus \
                if inside else -math.inf
            mu_p = np.maximum(0.0, np.array([row.dual_value() for row in once]))
            lam_p = np.maximum(0.0, np.array([row.dual_value() for _, _, row in cuts]))
        seq_val, col = dp.sequence(dp.C - mu_p[dp.E] - window_penalty(lam_p))
        bound = dp.bound_at(float(mu_p.sum() + lam_p.sum()), seq_val)
        progress = master > best_master + 1e-4 * abs(best) or boxed > best_boxed + 1e-4 * abs(best)
        best_boxed = max(best_boxed, boxed)
        if bound < best - 1e-9:
            best, center, progress = bound, mu_p, True
            set_box()
            best_boxed = -math.inf  # a new box: its master starts again
        best_master = max(best_master, master)
        stall = 0 if progress else stall + 1
        if col.size:
            add_column(col)
            if on_sequence is not None:
                lower = max(lower, on_sequence(list(zip(dp.E[col].tolist(), dp.S[col].tolist()))))
        met = stop_gap is not None and best - lower <= stop_gap * abs(best)
        converged = best - master <= 1e-4 * abs(best)
        if passes == 1 and clock.limit is not None:
            first_s = max(clock.elapsed(), 1e-9)
            fit = int((clock.limit - first_s) / first_s)
            if fit < min_passes:
                outcome = f"subgradient (about {fit} passes fit)"
                break
        if met or converged or stall >= CG_STALL or clock.out_of_time():
            outcome = ("column generation: " + ("gap proven" if met else "converged" if converged
                       else "stalled, then subgradient" if stall >= CG_STALL else "out of time"))
            break
        if cols and x_val:
            separate(x_val)
    return _Columns(best, center, passes, met, converged, lower, len(cols), len(cuts), outcome)
