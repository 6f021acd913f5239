"""How much search one build does: a wall-clock deadline shared out between the stages, or a
deterministic effort.

Wall clock (the default; the CLI's --time-limit and the service): the limit bounds the WHOLE
build, from the moment planning starts (``started``, which the caller may set earlier than the
call, e.g. when it read the queue) to the checked plan, with ``finish_reserve_s`` kept back for
the checker and for storing the plan. Every stage gets a share of the time LEFT when it starts
(never of the nominal limit), so a slow sky or feasibility stage shortens the searches instead
of pushing the build past its limit. Results then depend on the machine's speed and load.

Effort (an integer >= 1; tests, the season simulator's --effort): every stage does a fixed
amount of work, ``effort`` times the unit below, and nothing reads the clock. Same inputs, same
effort and same seed give the identical plan on any machine. One unit is about a tenth of what
the default 10 s build does on the 500-request benchmark queue (docs/solver.md, "Work budget"),
so effort=10 searches about as much as that build; work grows linearly with effort.

Whether CP-SAT runs at all is decided per build (``cpsat_can_pay``): from the size of its model
and the time left (wall clock), or from the size alone (effort, so the decision is the same on
any machine). When it does not run, its share goes to the ruin-and-recreate search, resumed.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from scheduler.model.config import MAX_EFFORT, MAX_SEED
from scheduler.model.errors import InputError

# Work per unit of effort. Measured on the 500-request benchmark queue (docs/solver.md).
RANDOMIZED_RUNS_PER_EFFORT = 40  # perturbed dispatches
RUIN_RECREATE_PER_EFFORT = 300  # ruin-and-recreate moves (first phase)
RUIN_RECREATE_2_PER_EFFORT = 150  # the same search resumed, only when CP-SAT does not run
LAGRANGIAN_PER_EFFORT = 30  # subgradient steps of the time-indexed bound (each of its two passes)
SEQUENCE_PER_EFFORT = 1  # subgradient steps of the sequence bound (one DP pass each)
CPSAT_DETERMINISTIC_PER_EFFORT = 0.05  # CP-SAT deterministic time units

# CP-SAT's fixed cost (building the model, loading the hint, presolve) per literal of its model,
# measured on 2 loaded cores: 0.8 s build + 1.5-2.3 s presolve for 10^4 literals (500 requests),
# 8.6 s build + 4 s solve for 8.7 x 10^4 (4000 requests). It is only worth running when the
# time left is several times that cost: at 500 requests with 3-4 s left it returned UNKNOWN in
# every one of 21 measured builds, at 100 requests it improves the searches' plan.
CPSAT_SETUP_S_PER_LITERAL = 2.0e-4
CPSAT_PAYS_FACTOR = 3.0  # time left >= this x the estimated fixed cost
# CP-SAT runs on models up to this size, under an effort (where the decision cannot read the
# clock) and with a time limit alike. It improved the searches' plan on the 100-request
# benchmark queue (about 2100 literals) and never at 500 (11,600) or above; when the searches
# leave it 20-30 s at 2000 requests (47,600 literals) it still returns nothing better (585.24
# against 589.68 when the search has that time).
CPSAT_MAX_LITERALS = 6000

# Shares of the time left when a stage starts. The sequence bound gets most of what the first
# ruin-and-recreate phase leaves: its column generation also finds plans (on the standard
# 500-request benchmark queue the best one known, 448.20, which 15,000 ruin-and-recreate moves
# do not reach), and it needs about 20-40 passes of 0.15 s there (docs/solver.md). With 70 %
# one build in eight (one of five in a spread test) stopped before the column that is that plan
# came up; with 85 % none of five did. The dense queue's plan did not change with it.
RUIN_RECREATE_SHARE = 0.30
SEQUENCE_SHARE = 0.85
SEQUENCE_SHARE_BEFORE_CPSAT = 0.15

FINISH_SHARE = 0.02  # of the limit, kept back for the checker and storing the plan
FINISH_MIN_S = 0.05


@dataclass(frozen=True)
class StageBudget:
    iterations: int
    time_limit_s: float | None  # None: no wall-clock stop (deterministic)


@dataclass(frozen=True)
class CpSatBudget:
    time_limit_s: float | None  # wall clock: what is left once the model is built (set then)
    deterministic_time_s: float | None  # CP-SAT's deterministic time
    deadline: float | None = None  # perf_counter time by which CP-SAT must have answered


def check_effort(effort) -> int:
    """An effort value, validated: an integer from 1 to MAX_EFFORT."""
    if isinstance(effort, bool) or not isinstance(effort, int) or not 1 <= effort <= MAX_EFFORT:
        raise InputError("effort", f"must be an integer from 1 to {MAX_EFFORT}, got {effort!r}")
    return effort


def check_seed(seed) -> int:
    """A seed of the randomized searches, validated: an integer from 0 to MAX_SEED."""
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed <= MAX_SEED:
        raise InputError("seed", f"must be an integer from 0 to {MAX_SEED}, got {seed!r}")
    return seed


class WorkBudget:
    """The budget of one build. ``started``: perf_counter time the limit counts from (default now)."""

    def __init__(self, time_limit_s: float, effort: int | None = None, started: float | None = None):
        self.time_limit_s = float(time_limit_s)
        self.effort = None if effort is None else check_effort(effort)
        self.started = time.perf_counter() if started is None else float(started)
        self.finish_reserve_s = FINISH_SHARE * self.time_limit_s + FINISH_MIN_S

    @property
    def deterministic(self) -> bool:
        return self.effort is not None

    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    @property
    def search_deadline(self) -> float:
        """perf_counter time at which optimisation must stop (the finish reserve comes after)."""
        return self.started + self.time_limit_s - self.finish_reserve_s

    def left(self) -> float:
        """Seconds of optimisation left (0 when the budget is spent)."""
        return max(0.0, self.search_deadline - time.perf_counter())

    def _stage(self, per_effort: int, iterations: int, share: float, floor_s: float = 0.0) -> StageBudget:
        if self.deterministic:
            return StageBudget(per_effort * self.effort, None)
        left = self.left()
        return StageBudget(iterations, min(left, max(floor_s, share * left)))

    def randomized_dispatch(self) -> StageBudget:
        return self._stage(RANDOMIZED_RUNS_PER_EFFORT, 400, 0.08)

    def lagrangian(self) -> StageBudget:
        return self._stage(LAGRANGIAN_PER_EFFORT, 300, 0.04)

    def ruin_and_recreate(self) -> StageBudget:
        return self._stage(RUIN_RECREATE_PER_EFFORT, 10**6, RUIN_RECREATE_SHARE)

    def sequence(self, cpsat_next: bool = False) -> StageBudget:
        """SEQUENCE_SHARE of what is left after the first searches (it stops sooner once the gap
        is met), or SEQUENCE_SHARE_BEFORE_CPSAT when CP-SAT is to run next and needs the rest."""
        return self._stage(SEQUENCE_PER_EFFORT, 400, SEQUENCE_SHARE_BEFORE_CPSAT if cpsat_next else SEQUENCE_SHARE)

    def ruin_and_recreate_2(self) -> StageBudget:
        """Everything left, when CP-SAT does not run."""
        return self._stage(RUIN_RECREATE_2_PER_EFFORT, 10**6, 1.0)

    def cpsat_can_pay(self, n_literals: int) -> bool:
        """Can CP-SAT improve on the searches in what is left? (see the constants above)"""
        if self.deterministic:
            return n_literals <= CPSAT_MAX_LITERALS
        return n_literals <= CPSAT_MAX_LITERALS and \
            self.left() >= CPSAT_PAYS_FACTOR * CPSAT_SETUP_S_PER_LITERAL * n_literals + 0.5

    def cpsat(self) -> CpSatBudget:
        if self.deterministic:
            return CpSatBudget(None, CPSAT_DETERMINISTIC_PER_EFFORT * self.effort)
        # the wall-clock limit is set once the model is built, from what is left then
        return CpSatBudget(None, None, self.search_deadline)


class StageClock:
    """The wall-clock stop of one search loop: ``out_of_time()`` at the top of each iteration is
    True once the next iteration, expected to take as long as the last one did, would end past
    the limit (so a loop whose iterations are slow does not overrun by one of them). With
    ``time_limit_s=None`` it never stops the loop (deterministic work budgets)."""

    def __init__(self, time_limit_s: float | None):
        self.limit = time_limit_s
        self.t0 = self.last = time.perf_counter()

    def out_of_time(self) -> bool:
        if self.limit is None:
            return False
        now = time.perf_counter()
        step, self.last = now - self.last, now
        return now + step > self.t0 + self.limit

    def elapsed(self) -> float:
        """Seconds since the loop started."""
        return time.perf_counter() - self.t0

    def spent(self) -> float:
        """Share of the limit used so far (0..1; 0 without a limit)."""
        if not self.limit:
            return 0.0
        return min(1.0, self.elapsed() / self.limit)
