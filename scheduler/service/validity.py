"""Does the active plan still hold? Pure functions of the plan, the queue and the conditions.

The service calls these after each new conditions report and whenever the queue or the
outcomes change; any sentence returned is a reason to re-plan from now, and the sentences
become the new plan version's reason. Material changes:

- conditions: a closure (dome, wind, humidity) or a seeing / PWV / cloud change beyond the
  configured thresholds from now on (``conditions.change.compare``);
- a planned entry, from now to its end, no longer passes its request's constraints under the
  new conditions (named in the constraint catalog's words, with the numbers for seeing, PWV
  and cloud);
- a new request, feasible tonight after now, that outranks the least valuable entry still to
  come (tier first, then the value before merit: objective.value_factors), or any new target of
  opportunity, or any new feasible request when nothing is left in the plan;
- a recorded outcome, or a planned request that left the queue (withdrawn, expired, done).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Sequence

import numpy as np

from scheduler.conditions.change import compare
from scheduler.conditions.grid import ConditionsGrid
from scheduler.model.config import ObservatoryConfig
from scheduler.constraints.catalog import STEP_BITS, STEP_CONSTRAINTS
from scheduler.constraints.feasibility import Feasibility, evaluate, static_layer
from scheduler.model.request import RequestSpec
from scheduler.sky.ephemeris import SkyCache, sky_for
from scheduler.sky.night import Night
from scheduler.constraints.opportunities import SHARED_CACHE, count_opportunities
from scheduler.solve.objective import value_factors


@dataclass(frozen=True)
class Planned:
    """One stored plan entry, as much as validity needs."""

    request_id: int
    start: datetime
    end: datetime


def hhmm(t: datetime) -> str:
    return t.astimezone(timezone.utc).strftime("%H:%M UTC")


def feasibility_for(config: ObservatoryConfig, night: Night, sky_cache: SkyCache, specs: Sequence[RequestSpec],
                    cond: ConditionsGrid) -> Feasibility:
    sky, rows = sky_for(config.site, night, list(specs), sky_cache)
    return evaluate(list(specs), rows, sky, cond, config, static_layer(list(specs), rows, sky, config))


def conditions_changes(config: ObservatoryConfig, night: Night, old: ConditionsGrid, new: ConditionsGrid,
                       now: datetime) -> list[str]:
    p = config.planning
    return compare(old, new, night.step_of(now), p.replan_seeing_change_arcsec, p.replan_pwv_change_mm,
                   safety=config.safety, times_unix=night.times_unix)


def _why(bits: int, spec: RequestSpec, cond: ConditionsGrid, a: int, b: int) -> str:
    """The failing constraints over steps [a, b), in the catalog's words (with the numbers for
    the weather ones)."""
    return ", ".join(c.breach(spec, cond, a, b) for c in STEP_CONSTRAINTS if bits & int(c.reason))


def entry_failures(config: ObservatoryConfig, night: Night, sky_cache: SkyCache, entries: Sequence[Planned],
                   specs: dict[int, RequestSpec], cond: ConditionsGrid, now: datetime) -> list[str]:
    """Planned entries (from now to their end) whose constraints fail under ``cond``."""
    i0 = night.step_of(now)
    todo = [e for e in entries if e.end > now and e.request_id in specs]
    if not todo or i0 >= night.n_times:
        return []
    ids = sorted({e.request_id for e in todo})
    row_of = {rid: i for i, rid in enumerate(ids)}
    feas = feasibility_for(config, night, sky_cache, [specs[i] for i in ids], cond)
    out = []
    for e in sorted(todo, key=lambda e: e.start):
        a = max(night.step_of(e.start), i0)
        b = night.step_of(e.end)
        r = row_of[e.request_id]
        if b <= a or feas.ok[r, a:b].all():
            continue
        bits = int(np.bitwise_or.reduce(feas.reasons[r, a:b].astype(np.int64) & STEP_BITS))
        spec = specs[e.request_id]
        out.append(f"request {e.request_id} ({spec.target}) planned {hhmm(e.start)[:5]}-{hhmm(e.end)} no longer "
                   f"feasible: {_why(bits, spec, cond, a, b) or 'constraints fail'}")
    return out


def outranking_requests(config: ObservatoryConfig, night: Night, sky_cache: SkyCache, new: Sequence[RequestSpec],
                        remaining: Sequence[RequestSpec], weights, cond: ConditionsGrid,
                        now: datetime, opportunity_cache=None) -> list[str]:
    """New requests worth a re-plan (see module doc). weights: the programs (ProgramState) or
    plain weights; opportunity_cache: the planner's (default: the process-wide one)."""
    i0 = night.step_of(now)
    if not new or i0 >= night.n_times:
        return []
    feas = feasibility_for(config, night, sky_cache, list(new), cond)
    # The planner's value (objective.value_factors): tier first, then the value before merit,
    # with urgency from the same opportunities count (tonight counted: all of these can start).
    both = list(remaining) + list(new)
    cache = opportunity_cache if opportunity_cache is not None else SHARED_CACHE
    later = count_opportunities(config, both, night.date, cache=cache).future()
    f = value_factors(config, both, weights, 1 + later)
    key = [(-int(t), float(b)) for t, b in zip(f.tier, f.base)]
    floor = min(key[:len(remaining)], default=None)
    out = []
    for r, spec in enumerate(new):
        if spec.remaining_repeats <= 0 or not feas.start_ok[r, i0:].any():
            continue
        tier, value = key[len(remaining) + r]
        label = f"new request {spec.id} ({spec.target}, priority {spec.priority})"
        if spec.too:
            out.append(f"{label}: target of opportunity")
        elif floor is None:
            out.append(f"{label}: feasible tonight and nothing else is planned")
        elif tier > floor[0]:
            out.append(f"{label} outranks the plan (tier {-tier} above the plan's lowest, tier {-floor[0]})")
        elif tier == floor[0] and value > floor[1] + 1e-12:
            out.append(f"{label} outranks the plan (value {value:.3g} > {floor[1]:.3g})")
    return out
