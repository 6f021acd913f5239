"""When can a request be observed tonight, and if never, which constraint binds. Pure.

When a request has no window, the binding constraint and the closest time are the ones
``plan why`` gives (constraints/explain.py is their one home), read over the whole night.
"""

from __future__ import annotations

from datetime import date
from typing import Any, Sequence

import numpy as np

from scheduler.conditions.grid import conditions_on_grid
from scheduler.constraints.catalog import BY_NAME
from scheduler.constraints.explain import binding, failing_at, fewest_failing_step
from scheduler.constraints.feasibility import Feasibility, evaluate
from scheduler.model.config import ObservatoryConfig
from scheduler.model.request import RequestSpec
from scheduler.model.timegrid import iso, runs, utc
from scheduler.sky.ephemeris import SkyGrid, sky_for
from scheduler.sky.night import Night, night_for


def request_windows(spec: RequestSpec, feas: Feasibility, row: int, night: Night) -> dict[str, Any]:
    """Feasible start windows of one request (row of feas), or the binding constraint."""
    t = night.times_unix
    step = night.step_s
    dur = int(feas.duration_steps[row])
    out: dict[str, Any] = {"request_id": spec.id, "night": night.date.isoformat(), "duration_s": dur * step,
                           "windows": []}
    for a, b in runs(feas.start_ok[row]):
        out["windows"].append({
            "start": iso(utc(t[a])),  # earliest start
            "last_start": iso(utc(t[b - 1])),
            "end": iso(utc(t[b - 1] + dur * step)),  # latest end
            "best_merit": round(float(feas.merit[row, a:b].max()), 4),
        })
    if not out["windows"] and t.size:
        reasons = np.asarray(feas.reasons[row], dtype=np.int64)
        bound = binding(reasons, dur, 0)["constraints"]
        out["binding"] = " and ".join(BY_NAME[n].wording for n in bound)
        out["binding_constraint"] = bound[0]
        out["binding_constraints"] = bound  # two when no single constraint alone would open a window
        closest = fewest_failing_step(reasons, 0)
        out["closest"] = {"time": iso(utc(t[closest])), "failing": failing_at(reasons, closest)}
    return out


def feasible_windows(config: ObservatoryConfig, spec: RequestSpec, night_date: date, samples: Sequence,
                     *, night: Night | None = None, sky: SkyGrid | None = None) -> dict[str, Any]:
    """Everything from scratch for one request (CLI `request show --night`)."""
    night = night or night_for(config.site, night_date, config.planning.step_s)
    sky = sky or sky_for(config.site, night, [spec])[0]
    cond = conditions_on_grid(samples, night.times_unix, config.defaults)
    feas = evaluate([spec], np.array([0]), sky, cond, config)
    out = request_windows(spec, feas, 0, night)
    out["conditions_covered_fraction"] = round(float(cond.covered.mean()), 3) if cond.covered.size else 0.0
    return out
