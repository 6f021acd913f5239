"""How much search one build does: shares of a wall-clock limit, or a deterministic effort.

Wall clock (the default; the CLI's --time-limit and the service): each search stage gets a share
of the build's time limit, and CP-SAT what is left. Results then depend on the machine's speed
and load.

Effort (an integer >= 1; tests, the season simulator's --effort): every stage does a fixed
amount of work, ``effort`` times the unit below, and nothing reads the clock. Same inputs, same
effort and same seed give the identical plan on any machine. One unit is about a tenth of what
the default 10 s build does on the 500-request benchmark queue (docs/solver.md, "Work budget"),
so effort=10 searches about as much as that build; work grows linearly with effort.
"""

from __future__ import annotations

import time
from dataclasses import dataclass

from scheduler.model.errors import InputError

MAX_EFFORT = 1000

# Work per unit of effort. Measured on the 500-request benchmark queue (docs/solver.md).
RANDOMIZED_RUNS_PER_EFFORT = 40  # perturbed dispatches
RUIN_RECREATE_PER_EFFORT = 300  # ruin-and-recreate moves
LAGRANGIAN_PER_EFFORT = 30  # subgradient steps of the time-indexed bound (each of its two passes)
SEQUENCE_PER_EFFORT = 1  # subgradient steps of the sequence bound (one DP pass each)
CPSAT_DETERMINISTIC_PER_EFFORT = 0.05  # CP-SAT deterministic time units


@dataclass(frozen=True)
class StageBudget:
    iterations: int
    time_limit_s: float | None  # None: no wall-clock stop (deterministic)


@dataclass(frozen=True)
class CpSatBudget:
    time_limit_s: float | None  # wall clock
    deterministic_time_s: float | None  # CP-SAT's deterministic time


def check_effort(effort) -> int:
    """An effort value, validated: an integer from 1 to MAX_EFFORT."""
    if isinstance(effort, bool) or not isinstance(effort, int) or not 1 <= effort <= MAX_EFFORT:
        raise InputError("effort", f"must be an integer from 1 to {MAX_EFFORT}, got {effort!r}")
    return effort


class WorkBudget:
    """The budget of one build, started when the build starts."""

    def __init__(self, time_limit_s: float, effort: int | None = None):
        self.time_limit_s = float(time_limit_s)
        self.effort = None if effort is None else check_effort(effort)
        self.started = time.perf_counter()

    @property
    def deterministic(self) -> bool:
        return self.effort is not None

    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    def _stage(self, per_effort: int, iterations: int, time_limit_s: float) -> StageBudget:
        if self.deterministic:
            return StageBudget(per_effort * self.effort, None)
        return StageBudget(iterations, time_limit_s)

    def randomized_dispatch(self) -> StageBudget:
        return self._stage(RANDOMIZED_RUNS_PER_EFFORT, 400, max(0.2, 0.1 * self.time_limit_s))

    def lagrangian(self) -> StageBudget:
        return self._stage(LAGRANGIAN_PER_EFFORT, 300, max(0.2, 0.05 * self.time_limit_s))

    def ruin_and_recreate(self) -> StageBudget:
        # wall clock: 45 % of what is left once the model is built and the first searches ran
        left = self.time_limit_s - self.elapsed()
        return self._stage(RUIN_RECREATE_PER_EFFORT, 10**6, max(0.3, 0.45 * left))

    def sequence(self) -> StageBudget:
        return self._stage(SEQUENCE_PER_EFFORT, 60, max(0.3, 0.12 * self.time_limit_s))

    def cpsat(self) -> CpSatBudget:
        if self.deterministic:
            return CpSatBudget(None, CPSAT_DETERMINISTIC_PER_EFFORT * self.effort)
        # CP-SAT overruns its limit by a few hundred ms on big models (loading, response): keep a margin
        return CpSatBudget(max(1.0, 0.9 * (self.time_limit_s - self.elapsed()) - 0.3), None)
