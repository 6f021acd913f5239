"""The factors of the science value, as pure functions (docs/solver.md states the objective).

Within a tier, one execution of a request started at a time with merit m is worth

    value = program weight x priority weight x exposure hours x merit x urgency x balance

and tiers are strict: tier-1 value first, then tier-2 value given that, and so on
(``lexicographic``). The composition lives in solve/objective.py; the factors live here so that
the objective, ``plan why``, the reports and the tests read one definition.

priority weight  ``priority_ratio ** (priority - 5)`` (default ratio 2): each step of priority
                 doubles the weight, so a priority-9 request of 10 minutes (16 x 1/6 h = 2.7)
                 outweighs a priority-5 request of 60 minutes (1 x 1 h = 1). Priority 5 is 1.
urgency          ``1 + (urgency_max - 1) / n`` for n >= 1 remaining opportunities (nights, tonight
                 included, on which the request can still be done before its deadline or the
                 lookahead): urgency_max (default 4) when tonight is the last chance, 1 + 3/n
                 after (2.5 with two nights left, 1.3 with ten, 1.05 with sixty). Tonight is one
                 of n chances; skipping it loses about 1/n of the request's remaining chances, and
                 the factor grows as that share does. With the defaults a last chance is worth two
                 priority steps. n = 0 (no opportunity found) is shown as urgency_max.
balance          per program within its tier: used fraction f = charged / allocated hours; the
                 tier's fraction F = sum(charged) / sum(allocated) over its programs with an
                 allocation. balance = (1 - f) / (1 - F), clipped to [1/balance_max, balance_max]
                 (default [0.5, 2]): a program behind its tier's pace gains weight, one ahead of it
                 loses some. A program at or past its allocation (f >= 1) gets 0, it is not
                 planned, unless ``planning.allow_overfill`` (then 1/balance_max). A program with
                 no allocated hours (0) is not balanced (1). When the tier as a whole is at or past
                 its allocation (F >= 1) the programs still inside theirs get balance_max.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Mapping, Sequence

import numpy as np

from scheduler.model.program import DEFAULT_TIER, ProgramState  # noqa: F401  (re-exported: the value's input)

def priority_weight(priority, ratio: float = 2.0):
    """``ratio ** (priority - 5)``; priority 1..10 (array or scalar)."""
    p = np.asarray(priority, dtype=np.float64)
    w = np.power(float(ratio), p - 5.0)
    return float(w) if w.ndim == 0 else w


def urgency_factor(n_left, urgency_max: float = 4.0):
    """``1 + (urgency_max - 1) / n`` for n >= 1 remaining opportunities; urgency_max for n <= 0."""
    n = np.asarray(n_left, dtype=np.float64)
    u = np.where(n >= 1, 1.0 + (float(urgency_max) - 1.0) / np.maximum(n, 1.0), float(urgency_max))
    return float(u) if u.ndim == 0 else u


def balance_factors(programs: Iterable[ProgramState], balance_max: float = 2.0,
                    allow_overfill: bool = False) -> dict[str, float]:
    """Balance factor of every program (see the module doc); 0 = not planned."""
    progs = list(programs)
    lo, hi = 1.0 / float(balance_max), float(balance_max)
    tier_frac: dict[int, float] = {}
    for t in {p.tier for p in progs}:
        alloc = [p for p in progs if p.tier == t and p.hours_allocated > 0]
        a = sum(p.hours_allocated for p in alloc)
        tier_frac[t] = sum(p.hours_charged for p in alloc) / a if a > 0 else 0.0
    out: dict[str, float] = {}
    for p in progs:
        f = p.used_fraction
        if f is None:
            out[p.code] = 1.0
        elif f >= 1.0:
            out[p.code] = lo if allow_overfill else 0.0
        elif tier_frac[p.tier] >= 1.0:
            out[p.code] = hi
        else:
            out[p.code] = float(np.clip((1.0 - f) / (1.0 - tier_frac[p.tier]), lo, hi))
    return out


def tier_order(tiers: Iterable[int]) -> list[int]:
    """The distinct tiers, most important (lowest number) first."""
    return sorted(set(int(t) for t in tiers))


# --------------------------------------------------------------------------- strict tiers

@dataclass(frozen=True)
class TierSolve:
    """One step of the lexicographic solve: tier ``tier``'s value with every higher tier held
    at least at what the earlier steps reached, and the proven bound of that step."""

    tier: int
    value: float
    bound: float
    status: str  # OPTIMAL / FEASIBLE / GREEDY / ...


def lexicographic(steps: Sequence[TierSolve]) -> tuple[float, float, float, int | None]:
    """(objective, bound, gap, tier of the gap) of a plan solved tier after tier.

    objective is the plan's total value (sum over tiers). Each step's bound is valid for its
    tier given the tiers above at their reached values, so the gap that says how far the plan
    may be from the lexicographic optimum is the first (most important) tier whose step is not
    proven: a gap in tier 2 says nothing about tier 1 if tier 1 is proven, and lower tiers'
    gaps only matter once the higher ones are closed. bound = objective + that tier's slack.
    """
    objective = float(sum(s.value for s in steps))
    for s in steps:
        slack = max(0.0, s.bound - s.value)
        if slack > 1e-9 * max(1.0, abs(s.bound)):
            return objective, objective + slack, slack / max(abs(s.bound), 1e-9), s.tier
    return objective, objective, 0.0, None


def tier_budgets(total_s: float, work: Mapping[int, int], floor_s: float = 0.5) -> dict[int, float]:
    """A first share of the time limit per tier, in proportion to its work (executions), at least
    ``floor_s``. The caller gives each step max(its share, what is left / tiers left), so time a
    proven tier did not use flows to the next."""
    total = max(1, sum(max(0, int(w)) for w in work.values()))
    return {t: max(floor_s, total_s * max(0, int(w)) / total) for t, w in work.items()}


# --------------------------------------------------------------------------- per request

@dataclass(frozen=True)
class RequestFactors:
    """The factors of every request (rows follow the request list); merit is per start time and
    comes from feasibility. ``base`` = weight x priority weight x exposure hours x urgency x
    balance, the value of an execution before merit."""

    tier: np.ndarray  # [n_r] int
    weight: np.ndarray  # [n_r] program weight
    priority_weight: np.ndarray
    exposure_h: np.ndarray  # the request's exposure, hours
    opportunities_left: np.ndarray  # [n_r] int: nights, tonight included
    urgency: np.ndarray
    balance: np.ndarray  # 0: the program is past its allocation and not planned

    @property
    def base(self) -> np.ndarray:
        return self.weight * self.priority_weight * self.exposure_h * self.urgency * self.balance

    def take(self, rows) -> "RequestFactors":
        """The factors of these rows only."""
        rows = np.asarray(rows, dtype=np.int64)
        return RequestFactors(*(getattr(self, f)[rows] for f in ("tier", "weight", "priority_weight", "exposure_h",
                                                                 "opportunities_left", "urgency", "balance")))

    def row(self, i: int) -> dict[str, float | int]:
        return {"tier": int(self.tier[i]), "program_weight": float(self.weight[i]),
                "priority_weight": float(self.priority_weight[i]), "exposure_h": float(self.exposure_h[i]),
                "opportunities_left": int(self.opportunities_left[i]), "urgency": float(self.urgency[i]),
                "balance": float(self.balance[i])}


def request_factors(specs: Sequence, programs: Mapping[str, ProgramState], opportunities_left: Sequence[int], *,
                    priority_ratio: float = 2.0, urgency_max: float = 4.0, balance_max: float = 2.0,
                    allow_overfill: bool = False) -> RequestFactors:
    """Factors of each request. A program missing from ``programs`` is tier 2, weight 1, unbalanced."""
    bal = balance_factors(programs.values(), balance_max, allow_overfill)
    n_left = np.asarray(opportunities_left, dtype=np.int64)
    if n_left.shape != (len(specs),):
        raise ValueError(f"opportunities_left has shape {n_left.shape}; expected ({len(specs)},)")
    prog = [programs.get(s.program) for s in specs]
    return RequestFactors(
        tier=np.array([p.tier if p else DEFAULT_TIER for p in prog], dtype=np.int64),
        weight=np.array([p.weight if p else 1.0 for p in prog], dtype=np.float64),
        priority_weight=np.asarray(priority_weight(np.array([s.priority for s in specs], dtype=np.float64),
                                                   priority_ratio), dtype=np.float64).reshape(len(specs)),
        exposure_h=np.array([s.exposure_s / 3600.0 for s in specs], dtype=np.float64),
        opportunities_left=n_left,
        urgency=np.asarray(urgency_factor(n_left, urgency_max), dtype=np.float64).reshape(len(specs)),
        balance=np.array([bal.get(s.program, 1.0) for s in specs], dtype=np.float64),
    )


def as_programs(programs: Mapping[str, "float | ProgramState"] | None) -> dict[str, ProgramState]:
    """Programs as ProgramState; a plain number is a program weight (tier 2, no allocation)."""
    out: dict[str, ProgramState] = {}
    for code, p in (programs or {}).items():
        out[code] = p if isinstance(p, ProgramState) else ProgramState(code, weight=float(p))
    return out
