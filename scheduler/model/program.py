"""A program as the planner's value sees it (ground floor: storage builds it, the solver reads it)."""

from __future__ import annotations

from dataclasses import dataclass

DEFAULT_TIER = 2  # tiers are strict, 1 = most important (docs/solver.md)


@dataclass(frozen=True)
class ProgramState:
    """What the value needs to know of a program."""

    code: str
    tier: int = DEFAULT_TIER
    weight: float = 1.0
    hours_allocated: float = 0.0  # 0: no allocation, not balanced
    hours_charged: float = 0.0

    @property
    def used_fraction(self) -> float | None:
        return None if self.hours_allocated <= 0 else self.hours_charged / self.hours_allocated

    @property
    def past_allocation(self) -> bool:
        return self.hours_allocated > 0 and self.hours_charged >= self.hours_allocated
