"""The night's scheduling problem as plain arrays.

``build_problem`` turns feasibility/merit arrays + requests + program weights (+ a previous
plan when re-planning) into a ``Problem``: one node per request execution with its feasible
start steps, its value per start (merit buckets, valued by solve/objective.py), and the
transition bounds between requests (solve/transitions.py). The heuristics, the bounds and the
CP-SAT model all read a Problem; none touches I/O.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Mapping, NamedTuple, Sequence

import numpy as np

from scheduler.constraints.catalog import STEP_CONSTRAINTS
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.plan import PlanEntry
from scheduler.solve.factors import DEFAULT_TIER, ProgramState, RequestFactors, as_programs
from scheduler.solve.objective import (STABILITY_WEIGHT, STABILITY_WINDOW_STEPS, merit_buckets, stability_coef,
                                      value_coef, value_factors)
from scheduler.solve.transitions import pair_transition_steps


# --------------------------------------------------------------------------- problem

@dataclass
class Execution:
    """One node: execution ``k`` of request ``req`` (index into Problem.requests)."""

    req: int
    k: int
    duration: int  # grid steps
    starts: np.ndarray  # sorted feasible start steps (>= now), int64
    bucket_lo: np.ndarray  # bucket b covers starts in [bucket_lo[b], bucket_hi[b]]
    bucket_hi: np.ndarray
    bucket_coef: np.ndarray  # integer objective coefficient per bucket
    fixed_start: int | None = None  # in progress or frozen: start is kept exactly
    in_progress: bool = False
    prev_start: int | None = None  # start in the previous plan (stability, hint)

    def coef_at(self, s: int) -> int:
        b = int(np.searchsorted(self.bucket_lo, s, side="right")) - 1
        if b < 0 or s > self.bucket_hi[b]:
            raise ValueError(f"step {s} is not a feasible start of this execution")
        return int(self.bucket_coef[b])


@dataclass
class Problem:
    config: ObservatoryConfig
    step_s: int
    n_t: int
    now_step: int
    requests: list[RequestSpec]  # only those in the model
    request_ids: np.ndarray  # [n_req]
    feas_rows: np.ndarray  # [n_req] row in the Feasibility
    base_value: np.ndarray  # [n_req] weight x priority weight x exposure_h x urgency x balance (before merit)
    instruments: list[str]
    bands: list[str]
    spacing_steps: np.ndarray  # [n_req] min start-to-start spacing between executions
    T: np.ndarray  # [n_req, n_req] transition bound in steps (see transitions.pair_transition_steps)
    tmax: np.ndarray  # [n_req] transition bound into a request from anything
    execs: list[Execution]
    mean_az: np.ndarray  # [n_req] circular mean azimuth over the feasible starts (classes for bounds)
    stability_weight: float
    stability_window: int  # steps: an execution "stays" if it starts within this of its old start
    unscheduled: dict[int, str]  # request_id -> reason, for requests that are not in the model
    dropped_fixed: list[tuple[int, str]] = field(default_factory=list)
    factors: RequestFactors | None = None  # [n_req] rows: tier, urgency, opportunities, balance, ...

    @property
    def tier(self) -> np.ndarray:
        """[n_req] program tier of each request (1 = most important)."""
        if self.factors is None:
            return np.full(len(self.requests), DEFAULT_TIER, dtype=np.int64)
        return self.factors.tier

    def exec_requests(self) -> np.ndarray:
        """[n_exec] the request of each execution (index into ``requests``)."""
        return np.array([ex.req for ex in self.execs], dtype=np.int64)

    def exec_durations(self) -> np.ndarray:
        """[n_exec] grid steps of each execution."""
        return np.array([ex.duration for ex in self.execs], dtype=np.int64)

    def exec_tiers(self) -> np.ndarray:
        return self.tier[self.exec_requests()] if self.execs else np.zeros(0, dtype=np.int64)

    def exec_T(self, a: int, b: int) -> int:
        return int(self.T[self.execs[a].req, self.execs[b].req])

    def stability_coef(self, e: int) -> int:
        """The stability bonus of execution e (defined in objective.stability_coef)."""
        return stability_coef(self, e)


def _sliding_all(ok: np.ndarray, d: int) -> np.ndarray:
    """start_ok for duration d: ok at every step of [t, t + d) and t + d <= n_t."""
    n_t = ok.shape[0]
    c = np.concatenate([[0], np.cumsum(ok, dtype=np.int64)])
    out = np.zeros(n_t, dtype=bool)
    if d <= n_t:
        out[: n_t - d + 1] = (c[d:] - c[: n_t - d + 1]) == d
    return out


# The solver's words for each constraint are the catalog's labels ("never feasible: <label>").
_REASON_LABELS = {int(c.reason): c.label for c in STEP_CONSTRAINTS}  # NIGHT_END is about starts, not steps


def never_feasible_reason(reasons_row: np.ndarray, ok_row: np.ndarray, now_step: int, duration: int,
                          step_s: int) -> str:
    """Short reason a request has no feasible start tonight (after now)."""
    r = reasons_row[now_step:].astype(np.int64)
    ok = ok_row[now_step:]
    if r.size == 0:
        return "never feasible: night over"
    if ok.any():
        return f"never feasible: no window of {duration * step_s / 60:.0f} min"
    always = [lab for bit, lab in _REASON_LABELS.items() if np.all(r & bit)]
    if always:
        return "never feasible: " + always[0]
    counts = {lab: int(np.count_nonzero(r & bit)) for bit, lab in _REASON_LABELS.items()}
    top = sorted((c, lab) for lab, c in counts.items() if c)[::-1][:2]
    return "never feasible: " + " + ".join(lab for _, lab in top)


def failing_constraint(reasons: np.ndarray) -> str:
    """The constraint that fails most often over these steps (its label)."""
    r = np.asarray(reasons).astype(np.int64)
    counts = [(int(np.count_nonzero(r & bit)), lab) for bit, lab in _REASON_LABELS.items()]
    n, lab = max(counts)
    return lab if n else "unknown"


class _ExecutionPlan(NamedTuple):
    """What build_problem decides for one execution before its value buckets are cut."""

    duration: int
    starts: np.ndarray
    fixed_start: int | None
    in_progress: bool
    prev_start: int | None


def build_problem(config: ObservatoryConfig, requests: Sequence[RequestSpec],
                  program_weights: Mapping[str, float | ProgramState] | None,
                  feas, alt: np.ndarray, az: np.ndarray, *, step_s: int, now_step: int = 0,
                  previous: Sequence[PlanEntry] | None = None, freeze_steps: int = 0,
                  stability_weight: float = STABILITY_WEIGHT, stability_window: int = STABILITY_WINDOW_STEPS,
                  bucket_steps: int = 10, transition_bucket_steps: int = 15,
                  factors: RequestFactors | None = None) -> Problem:
    """Build the Problem. ``feas`` rows follow ``requests``; alt/az are [n_req, n_t] per request.

    program_weights: programs (ProgramState: tier, weight, hours) or plain weights. factors:
    the requests' value factors (objective.value_factors, rows follow ``requests``); computed
    here without an opportunities count when not given. A request whose program is past its
    allocation (balance 0) does not enter the model.

    previous: entries of the previous plan. One that started before now and ends after it is
    kept exactly (in progress) if its remaining steps are still feasible; one starting within
    ``freeze_steps`` of now keeps its start if that start is still feasible; the others only
    guide the solution (stability bonus, hint).
    """
    n_t = feas.ok.shape[1]
    if factors is None:
        factors = value_factors(config, requests, program_weights)
    programs = as_programs(program_weights)
    prev_by_req = _previous_by_request(previous, now_step)
    keep: list[int] = []
    plans: list[list[_ExecutionPlan]] = []
    unscheduled: dict[int, str] = {}
    dropped_fixed: list[tuple[int, str]] = []
    for r, spec in enumerate(requests):
        rid = int(feas.request_ids[r]) if spec.id is None else int(spec.id)
        prevs = prev_by_req.get(rid, [])
        if spec.remaining_repeats <= 0 and not prevs:
            continue
        if factors.balance[r] <= 0:
            p = programs.get(spec.program)
            hours = f" ({p.hours_charged:.1f} of {p.hours_allocated:.1f} h charged)" if p else ""
            unscheduled[rid] = f"program {spec.program} past its allocation{hours}"
            continue
        setup_s = config.instrument_for(spec.band, spec.instrument).setup_s
        lst, interrupted = _request_executions(spec, r, feas, prevs, setup_s=setup_s, step_s=step_s,
                                               now_step=now_step, freeze_steps=freeze_steps)
        if interrupted is not None:
            dropped_fixed.append((rid, interrupted))
        if lst:
            keep.append(r)
            plans.append(lst)
        elif interrupted is None:
            d0 = int(feas.duration_steps[r])
            unscheduled[rid] = never_feasible_reason(feas.reasons[r], feas.ok[r], now_step, d0, step_s)

    reqs = [requests[r] for r in keep]
    rows = np.array(keep, dtype=np.int64)
    insts = [config.instrument_for(s.band, s.instrument).name for s in reqs]
    kept_factors = factors.take(rows)
    base = kept_factors.base
    execs = _executions(plans, rows, feas.merit, base, now_step, n_t, bucket_steps)
    start_ok, end_ok = _start_and_end_masks(execs, len(reqs), n_t)
    alt_m, az_m = (alt[rows], az[rows]) if reqs else (alt[:0], az[:0])
    T, tmax = pair_transition_steps(config, step_s, alt_m, az_m, insts, [s.band for s in reqs], end_ok, start_ok,
                                    bucket_steps=transition_bucket_steps)
    _release_clashing_fixed(execs, T)
    return Problem(
        config=config, step_s=step_s, n_t=n_t, now_step=now_step, requests=reqs,
        request_ids=np.array([int(feas.request_ids[r]) if requests[r].id is None else int(requests[r].id)
                              for r in keep], dtype=np.int64),
        feas_rows=rows, base_value=base, instruments=insts, bands=[s.band for s in reqs],
        spacing_steps=np.array([_steps(s.min_spacing_s or 0.0, step_s) for s in reqs], dtype=np.int64),
        T=T, tmax=tmax, execs=execs, mean_az=_mean_azimuths(az_m, start_ok),
        stability_weight=stability_weight if previous else 0.0,
        stability_window=stability_window, unscheduled=unscheduled, dropped_fixed=dropped_fixed,
        factors=kept_factors,
    )


def _steps(seconds: float, step_s: int) -> int:
    """A duration in whole grid steps, rounded up (float noise ignored)."""
    return int(math.ceil(seconds / step_s - 1e-9))


def _previous_by_request(previous: Sequence[PlanEntry] | None, now_step: int) -> dict[int, list[PlanEntry]]:
    """Entries of the previous plan not yet over, by request id, in order of start."""
    out: dict[int, list[PlanEntry]] = {}
    for e in previous or ():
        if e.end_step > now_step:
            out.setdefault(int(e.request_id), []).append(e)
    for v in out.values():
        v.sort(key=lambda e: e.start_step)
    return out


def _request_executions(spec: RequestSpec, r: int, feas, prevs: list[PlanEntry], *, setup_s: float, step_s: int,
                        now_step: int, freeze_steps: int) -> tuple[list[_ExecutionPlan], str | None]:
    """The executions of one request tonight, and why its entry in progress was interrupted
    (None if it was not). The first execution still owed may be shorter (partial exposure
    credited); later ones need the full setup + exposure."""
    d0 = int(feas.duration_steps[r])
    d_full = max(d0, _steps(setup_s + spec.exposure_s, step_s))
    so0 = feas.start_ok[r].copy()
    so0[:now_step] = False
    so_full = so0 if d_full == d0 else _sliding_all(feas.ok[r], d_full)
    so_full[:now_step] = False
    out: list[_ExecutionPlan] = []
    interrupted = None
    pi = 0
    # In progress: kept exactly while its remaining steps stay feasible.
    if prevs and prevs[0].start_step < now_step:
        p = prevs[0]
        pi = 1
        if feas.ok[r, now_step:p.end_step].all():
            out.append(_ExecutionPlan(p.end_step - p.start_step, np.array([p.start_step]), p.start_step, True,
                                      p.start_step))
        else:
            interrupted = "interrupted: " + failing_constraint(feas.reasons[r, now_step:p.end_step])
    queue = list(prevs[pi:])
    for k in range(max(0, spec.remaining_repeats - len(out))):
        d = d0 if (k == 0 and not out) else d_full
        mask = so0 if d == d0 else so_full
        # Previous entries are matched to the executions still owed in order; one that can no
        # longer start where it stood yields to the next one that can (else that one, kept
        # where it stands, would have to wait for a repeat that cannot come first).
        while len(queue) > 1 and not _can_start(mask, queue[0]) and _can_start(mask, queue[1]):
            queue.pop(0)
        p = queue.pop(0) if queue else None
        fixed = None
        if p is not None and now_step <= p.start_step < now_step + freeze_steps and mask[p.start_step]:
            fixed = p.start_step
        out.append(_ExecutionPlan(d, np.flatnonzero(mask), fixed, False, p.start_step if p is not None else None))
    # Cap executions at what can fit (start-to-start spacing >= max(duration, min_spacing)); a
    # repeat with no feasible start (the first may be shorter: partial exposure credited) ends
    # the list, since repeats run in order.
    free = [x for x in out if not x.in_progress]
    empty = [i for i, x in enumerate(free) if x.starts.size == 0]
    free = free[:empty[0]] if empty else free
    if free and free[0].starts.size:
        span = int(free[0].starts[-1] - free[0].starts[0])
        spacing = _steps(spec.min_spacing_s or 0.0, step_s)
        free = free[:1 + span // max(1, max(free[0].duration, spacing))]
    else:
        free = []
    return [x for x in out if x.in_progress] + free, interrupted


def _can_start(mask: np.ndarray, entry: PlanEntry) -> bool:
    return 0 <= entry.start_step < mask.size and bool(mask[entry.start_step])


def _executions(plans: list[list[_ExecutionPlan]], rows: np.ndarray, merit_all: np.ndarray, base: np.ndarray,
                now_step: int, n_t: int, bucket_steps: int) -> list[Execution]:
    """Execution nodes with their value buckets (objective.merit_buckets)."""
    execs: list[Execution] = []
    for i, (r, lst) in enumerate(zip(rows, plans)):
        merit = np.asarray(merit_all[r], dtype=np.float64)
        for k, x in enumerate(lst):
            if x.in_progress:
                s = int(x.starts[0])
                m = float(merit[s]) if 0 <= s < n_t and merit[s] > 0 else float(merit[now_step:].max(initial=0.0))
                coef = np.array([value_coef(base[i], max(m, 1e-6))])
                execs.append(Execution(i, k, x.duration, x.starts, x.starts.copy(), x.starts.copy(), coef,
                                       x.fixed_start, True, x.prev_start))
                continue
            mask = np.zeros(n_t, dtype=bool)
            mask[x.starts] = True
            lo, hi, coef = merit_buckets(mask, merit, base[i], max(1, bucket_steps))
            execs.append(Execution(i, k, x.duration, x.starts, lo, hi, coef, x.fixed_start, False, x.prev_start))
    return execs


def _start_and_end_masks(execs: list[Execution], n: int, n_t: int) -> tuple[np.ndarray, np.ndarray]:
    """[n_req, n_t] masks: where each request can start, and where it can end (its last step is t-1)."""
    end_ok = np.zeros((n, n_t), dtype=bool)
    start_ok = np.zeros((n, n_t), dtype=bool)
    for ex in execs:
        start_ok[ex.req, ex.starts[(ex.starts >= 0) & (ex.starts < n_t)]] = True
        ends = ex.starts + ex.duration
        end_ok[ex.req, ends[ends < n_t]] = True
    return start_ok, end_ok


def _mean_azimuths(az: np.ndarray, start_ok: np.ndarray) -> np.ndarray:
    """Circular mean azimuth of each request over its feasible starts (all steps if none)."""
    out = np.zeros(az.shape[0])
    for r in range(az.shape[0]):
        a = np.radians(az[r][start_ok[r]]) if start_ok[r].any() else np.radians(az[r])
        out[r] = np.degrees(np.arctan2(np.sin(a).mean(), np.cos(a).mean())) % 360.0 if a.size else 0.0
    return out


def _release_clashing_fixed(execs: list[Execution], T: np.ndarray) -> None:
    """Frozen entries whose gap no longer holds tonight's transition bound become free again."""
    fixed = sorted((ex for ex in execs if ex.fixed_start is not None), key=lambda ex: ex.fixed_start)
    last = None
    for ex in fixed:
        if last is not None and not ex.in_progress:
            gap = ex.fixed_start - (last.fixed_start + last.duration)
            if gap < T[last.req, ex.req]:
                ex.fixed_start = None  # back to its feasible starts; prev_start still guides it
                continue
        last = ex


# --------------------------------------------------------------------------- solutions

@dataclass(frozen=True)
class Placement:
    exec_index: int
    start: int


def check_model_feasible(problem: Problem, plan: Sequence[Placement]) -> list[str]:
    """Does a plan satisfy the MODEL's constraints (transition bounds, starts, repeats)?

    Used to validate hints and greedy plans; the independent checker validates physics.
    """
    errs = []
    ps = sorted(plan, key=lambda p: p.start)
    for p in ps:
        ex = problem.execs[p.exec_index]
        if ex.fixed_start is not None and p.start != ex.fixed_start:
            errs.append(f"exec {p.exec_index} moved from fixed start {ex.fixed_start}")
        if not np.any(ex.starts == p.start):
            errs.append(f"exec {p.exec_index} start {p.start} not feasible")
    for a, b in zip(ps, ps[1:]):
        ea = problem.execs[a.exec_index]
        gap = b.start - (a.start + ea.duration)
        if gap < problem.exec_T(a.exec_index, b.exec_index):
            errs.append(f"gap {gap} < T between exec {a.exec_index} and {b.exec_index}")
    by_req: dict[int, list[Placement]] = {}
    for p in ps:
        by_req.setdefault(problem.execs[p.exec_index].req, []).append(p)
    for r, lst in by_req.items():
        ks = [problem.execs[p.exec_index].k for p in lst]
        if ks != list(range(len(ks))):
            errs.append(f"request {r}: executions {ks} not in order")
        for a, b in zip(lst, lst[1:]):
            if b.start - a.start < max(problem.execs[a.exec_index].duration, int(problem.spacing_steps[r])):
                errs.append(f"request {r}: spacing")
    return errs
