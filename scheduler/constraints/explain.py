"""Why a request cannot start tonight: which constraints bind, how close each came, and the
closest time. Pure numpy over one request's row of the Feasibility.

No start time from ``now_step`` on has every constraint hold for the whole setup + exposure.
The BINDING constraint is the one that, lifted alone, opens the most start times (windows of
the full duration). When no single constraint would open a window, two or more bind together:
the two failing most often are named. Each binding constraint's ``detail`` (the catalog's)
says how close it came, looking at the times when nothing but the binding constraints fail,
so the figure is from a time that would work. "Closest" is where the first binding constraint
came closest, else the time with the fewest failing constraints.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Callable

import numpy as np

from scheduler.conditions.grid import ConditionsGrid
from scheduler.constraints.catalog import BY_NAME, STEP_BITS, STEP_CONSTRAINTS, Closeness, names
from scheduler.constraints.feasibility import Feasibility, start_windows
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import runs
from scheduler.sky.ephemeris import SkyGrid


@dataclass(frozen=True)
class Unobservable:
    """The answer for a request with no feasible start (plain data; steps index the night grid)."""

    binding: list[str]  # constraint names (catalog), one or two
    wording: list[str]  # their one-line wording for users
    alone_opens_starts: int  # start steps lifting binding[0] alone would open (0: none alone)
    details: list[tuple[str, str]]  # (constraint name, how close it came), in binding order
    closest_step: int
    closest_failing: list[str]  # constraint names failing at closest_step
    longest_ok_steps: int  # longest run of steps from now_step where every constraint holds


def binding(reasons: np.ndarray, duration: int, now_step: int) -> dict[str, Any]:
    """Which constraint, lifted alone, opens the most start times of the full duration."""
    r = np.asarray(reasons, dtype=np.int64) & STEP_BITS
    counts: dict[str, int] = {}
    opened: dict[str, int] = {}
    for c in STEP_CONSTRAINTS:
        bit = int(c.reason)
        counts[c.name] = int(np.count_nonzero(r[now_step:] & bit))
        if counts[c.name] == 0:
            continue
        so, _ = start_windows(((r & ~bit) == 0)[None, :], np.array([duration]))
        opened[c.name] = int(np.count_nonzero(so[0, now_step:]))
    best = max(opened, key=lambda n: (opened[n], counts[n]), default=None)
    if best is not None and opened[best] > 0:
        return {"constraints": [best], "alone_opens_starts": opened[best]}
    ranked = sorted((n for n in counts if counts[n]), key=lambda n: -counts[n])
    if not ranked:  # every step is fine, yet no window: the night ends too soon
        return {"constraints": ["NIGHT_END"], "alone_opens_starts": 0}
    return {"constraints": ranked[:2], "alone_opens_starts": 0}


def fewest_failing_step(reasons: np.ndarray, now_step: int) -> int:
    """The step from now_step on with the fewest failing constraints (the first of ties)."""
    r = np.asarray(reasons[now_step:], dtype=np.int64) & STEP_BITS
    n_fail = np.zeros(r.shape, dtype=np.int64)
    for c in STEP_CONSTRAINTS:
        n_fail += (r & int(c.reason)) != 0
    return now_step + int(np.argmin(n_fail))


def failing_at(reasons: np.ndarray, step: int) -> list[str]:
    """Names of the step constraints failing at ``step`` (empty for an empty row)."""
    return names(int(reasons[step]) & STEP_BITS) if len(reasons) else []


def unobservable(spec: RequestSpec, config: ObservatoryConfig, sky: SkyGrid, cond: ConditionsGrid,
                 feas: Feasibility, now_step: int, fmt_t: Callable[[float], str]) -> Unobservable:
    """The answer for request ``spec`` (row 0 of ``sky`` and ``feas``), from ``now_step`` on.

    ``fmt_t`` formats a unix time for the detail texts.
    """
    row = np.asarray(feas.reasons[0], dtype=np.int64)
    b = binding(row, int(feas.duration_steps[0]), now_step)
    bits = 0
    for n in b["constraints"]:
        bits |= int(BY_NAME[n].reason)
    # the focus: times when nothing but the binding constraints fail
    only = (row[now_step:] & ~bits & STEP_BITS) == 0
    view = Closeness(spec=spec, config=config, sky=sky, cond=cond, feas=feas, now_step=now_step, fmt_t=fmt_t,
                     focus=only)
    found = [(n, *BY_NAME[n].detail(view)) for n in b["constraints"]]
    closest = next((i for _, _, i in found if i is not None), None)
    if closest is None:
        closest = fewest_failing_step(row, now_step) if row.size else 0
    longest = max((z - a for a, z in runs(feas.ok[0, now_step:])), default=0)
    return Unobservable(
        binding=list(b["constraints"]), wording=[BY_NAME[n].wording for n in b["constraints"]],
        alone_opens_starts=int(b["alone_opens_starts"]), details=[(n, txt) for n, txt, _ in found if txt],
        closest_step=int(closest), closest_failing=failing_at(row, closest),
        longest_ok_steps=int(longest),
    )
